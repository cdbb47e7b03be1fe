"""Saved evaluations: the trace stored for a visit evaluated with the whole cohort equals the trace of the
same visit evaluated on its own (the per-visit rules do not depend on other patients)."""

from __future__ import annotations

import json

import pytest
from sqlalchemy import select

from dashboard_support import fill_demo
from tracker.criteria import engine
from tracker.criteria.model import Settings
from tracker.db.models import Evaluation
from tracker.db.session import make_engine, make_session_factory
from tracker.services.evaluation import compact_trace, expand_trace, load_frames, to_json, to_json_many
from tracker.services.limit_sets import resolve


@pytest.fixture(scope="module")
def demo_sessions(tmp_path_factory):
    url = f"sqlite:///{tmp_path_factory.mktemp('store') / 'demo.sqlite3'}"
    fill_demo(url)
    engine_ = make_engine(url)
    yield make_session_factory(engine_)
    engine_.dispose()


@pytest.mark.parametrize("criteria", engine.available())
def test_cohort_trace_equals_single_visit_trace(demo_sessions, criteria):
    with demo_sessions() as session:
        visits, tests, sites = load_frames(session)
        _, limits = resolve(session, None)
        stored = {
            row.visit_id: row.result
            for row in session.scalars(select(Evaluation).where(Evaluation.criteria_id == criteria))
        }
    cohort = engine.evaluate(visits, tests, sites, limits, [criteria], Settings())[criteria]
    many = to_json_many(cohort, list(visits["visit_key"]))
    assert set(many) == set(int(k) for k in visits["visit_key"])
    for key in list(visits["visit_key"])[::4]:
        alone = engine.evaluate(
            visits[visits["visit_key"] == key],
            tests[tests["visit_key"] == key],
            sites[sites["test_key"].isin(tests.loc[tests["visit_key"] == key, "test_key"])],
            limits,
            [criteria],
            Settings(),
        )[criteria]
        single = to_json(alone, int(key))
        assert json.dumps(many[int(key)], sort_keys=True) == json.dumps(single, sort_keys=True)
        # What `evaluate` saved in the database (JSON column) is that same trace.
        assert json.dumps(expand_trace(stored[int(key)]), sort_keys=True) == json.dumps(
            single, sort_keys=True
        )
        # Stored once per citation: smaller than the full trace, and the same content.
        assert len(json.dumps(stored[int(key)])) < 0.8 * len(json.dumps(single))
        assert expand_trace(compact_trace(single)) == single
        assert all(
            f["status"] in ("met", "not_met", "not_evaluable", "not_applicable")
            for n in single["nerves"]
            for f in n["findings"]
        )
