"""Evaluation results unchanged by the work on speed and storage (issue 12): every criteria set over the
invented demo clinic and an invented generated cohort gives the outcome and the full trace (the shape of
``to_json``, DESIGN.md §5) recorded in ``tests/golden/evaluations.csv`` — on SQLite and on PostgreSQL.

The reference file was written by the code of 2026-12-03, before the evaluation path was reworked: it is a
regression reference of our own outputs, not an outside check (the criteria tests compare against the
publications). A trace is compared by the SHA-256 of its canonical JSON (compact, keys in order, UTF-8).

If a change to a criteria set is meant to change results, its criteria version changes too; rewrite the
file with ``NCS_TRACKER_WRITE_GOLDEN=1 .venv/bin/python -m pytest tests/test_golden_evaluations.py -k
sqlite`` and review the difference (``git diff tests/golden``) before committing it.
"""

from __future__ import annotations

import csv
import hashlib
import os
from pathlib import Path

import pytest
from sqlalchemy import select

from tracker.criteria import engine as criteria_engine
from tracker.criteria.model import Settings
from tracker.db.models import Evaluation, Patient, Visit
from tracker.db.session import make_engine, make_session_factory
from tracker.db.types import canonical_json
from tracker.services.demo import DEMO_FILES, demo_data_dir
from tracker.services.evaluation import expand_trace, load_frames, refresh_evaluations, to_json_many
from tracker.services.importing import import_file
from tracker.services.limit_sets import resolve
from tracker.synthetic import cohort, write_csv_files

GOLDEN = Path(__file__).resolve().parent / "golden" / "evaluations.csv"
GENERATED_PATIENTS = 40
FIELDS = ["patient", "visit_date", "criteria", "criteria_version", "outcome", "trace_sha256"]


def _digest(trace: dict) -> str:
    return hashlib.sha256(canonical_json(trace)).hexdigest()


def _fill(url: str, folder: Path) -> None:
    generated = folder / "generated"
    generated.mkdir()
    files = [demo_data_dir() / name for name in DEMO_FILES]
    files += write_csv_files(generated, list(cohort(GENERATED_PATIENTS)))
    engine = make_engine(url)
    try:
        with make_session_factory(engine).begin() as session:
            for path in files:
                import_file(session, path, username="invented-test-user")
    finally:
        engine.dispose()


def _rows(traces: dict[tuple[str, str, str], dict]) -> list[dict[str, str]]:
    return [
        {
            "patient": patient,
            "visit_date": date,
            "criteria": criteria,
            "criteria_version": trace["criteria_version"],
            "outcome": trace["outcome"],
            "trace_sha256": _digest(trace),
        }
        for (patient, date, criteria), trace in sorted(traces.items())
    ]


def _read_golden() -> list[dict[str, str]]:
    with open(GOLDEN, encoding="utf-8", newline="") as handle:
        return list(csv.DictReader(handle))


def test_every_outcome_and_trace_is_as_recorded(db_url, tmp_path, backend):
    _fill(db_url, tmp_path)
    engine = make_engine(db_url)
    try:
        with make_session_factory(engine).begin() as session:
            refresh_evaluations(session, username="invented-test-user")
        with make_session_factory(engine)() as session:
            info, limits = resolve(session, None)
            visits, tests, sites = load_frames(session)
            where = {int(r.visit_key): (r.patient, r.visit_date.isoformat()) for r in visits.itertuples()}
            saved = {
                (*where[visit_id], criteria_id): expand_trace(result)
                for visit_id, criteria_id, result in session.execute(
                    select(Evaluation.visit_id, Evaluation.criteria_id, Evaluation.result)
                    .join(Visit, Visit.id == Evaluation.visit_id)
                    .join(Patient, Patient.id == Visit.patient_id)
                )
            }
        results = criteria_engine.evaluate(
            visits, tests, sites, limits, criteria_engine.available(), Settings()
        )
    finally:
        engine.dispose()
    computed = {
        (*where[key], criteria_id): payload
        for criteria_id, result in results.items()
        for key, payload in to_json_many(result, list(where)).items()
    }
    rows = _rows(computed)
    if os.environ.get("NCS_TRACKER_WRITE_GOLDEN") and backend == "sqlite":
        GOLDEN.parent.mkdir(exist_ok=True)
        with open(GOLDEN, "w", encoding="utf-8", newline="") as handle:
            writer = csv.DictWriter(handle, FIELDS, lineterminator="\n")
            writer.writeheader()
            writer.writerows(rows)
        pytest.fail(f"{GOLDEN.name} written ({len(rows)} rows): review the difference, then run again")
    golden = _read_golden()
    # Both the demo clinic and the generated cohort are there, every set over every visit with findings.
    assert len(golden) > 6 * 200
    assert {r["criteria"] for r in golden} == set(criteria_engine.available())
    assert rows == golden
    # What is saved is what was computed: the stored evaluation reads back as the same trace.
    assert saved.keys() == computed.keys()
    differing = [key for key in computed if saved[key] != computed[key]]
    assert not differing, f"{len(differing)} saved traces differ, first {differing[0]}"
