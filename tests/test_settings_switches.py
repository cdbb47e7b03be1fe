"""Settings page: switches for the project rules that change a publication's literal result (AAN 1991 wrist
exclusion, EFNS/PNS 2010 duration filter), off by default (the publication's reading), saved for everyone
using the database, audited, and applied by the criteria settings the pages evaluate with.

Demo data: the invented clinic (not patients). Clinical facts used: EFNS/PNS 2010 distal CMAP duration cut-off
median ≥ 6.6 ms (Van den Bergh PYK et al. Eur J Neurol 2010;17:356–363, verified via Ann Clin Transl Neurol
2021, Table 2), derived at a 20 Hz filter (Isose 2009 — from memory, not verified).
"""

from __future__ import annotations

from pathlib import Path

import pytest
import streamlit as st
from sqlalchemy import select
from streamlit.testing.v1 import AppTest

from conftest import new_database
from dashboard_support import fill_demo
from tracker.criteria import engine as criteria_engine
from tracker.criteria.model import Settings
from tracker.db.models import AuditEvent, Patient, Visit
from tracker.db.session import make_engine, make_session_factory
from tracker.domain.labels import CRITERIA_SWITCH_LABELS
from tracker.services import preferences
from tracker.services.evaluation import load_frames
from tracker.services.limit_sets import resolve

APP = str(Path(__file__).resolve().parent.parent / "tracker" / "dashboard" / "app.py")
SWITCHES = ("aan_wrist_exclusion", "duration_filter_strict")


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def demo_url(request, tmp_path):
    generator = new_database(request.param, tmp_path)
    url = next(generator)
    fill_demo(url)
    yield url
    next(generator, None)


@pytest.fixture(autouse=True)
def clean_streamlit():
    st.cache_data.clear()
    st.cache_resource.clear()
    yield
    st.cache_data.clear()
    st.cache_resource.clear()


def settings_page(monkeypatch, url: str) -> AppTest:
    monkeypatch.setenv("NCS_TRACKER_DB", url)
    at = AppTest.from_file(APP, default_timeout=120)
    at.run()
    at.switch_page("views/settings.py")
    at.run()
    assert not at.exception, [e.message for e in at.exception]
    return at


def stored(url: str) -> tuple[Settings, set[str]]:
    engine = make_engine(url)
    try:
        with make_session_factory(engine)() as session:
            keys = set(session.scalars(select(AuditEvent.entity_key).where(AuditEvent.entity == "setting")))
            return preferences.criteria_settings(session), keys
    finally:
        engine.dispose()


def test_switches_default_off_explained_saved_and_applied(monkeypatch, demo_url):
    at = settings_page(monkeypatch, demo_url)
    toggles = {field: at.toggle(key=f"settings_{field}") for field in SWITCHES}
    assert all(t.value is False for t in toggles.values())  # off: the publication's reading
    captions = " ".join(c.value for c in at.caption)
    for field in SWITCHES:
        label, explanation = CRITERIA_SWITCH_LABELS[field]
        assert toggles[field].label == label and explanation in captions
        assert "publication's reading" in explanation
    # Nothing stored yet: the criteria settings are the publication's.
    before, _ = stored(demo_url)
    assert (before.aan_wrist_exclusion, before.duration_filter_strict) == (False, False)

    for toggle in toggles.values():
        toggle.set_value(True)
    at.button(key="settings_save").click().run()
    assert not at.exception, [e.message for e in at.exception]
    after, audited = stored(demo_url)
    assert (after.aan_wrist_exclusion, after.duration_filter_strict) == (True, True)
    assert {"criteria_aan_wrist_exclusion", "criteria_duration_filter_strict"} <= audited
    # The page shows the stored values when opened again.
    st.cache_data.clear()
    again = settings_page(monkeypatch, demo_url)
    assert all(again.toggle(key=f"settings_{field}").value is True for field in SWITCHES)

    # Applied: DEMO-01's first visit has a median distal CMAP duration of 7.8 ms recorded at 2 Hz (invented).
    engine = make_engine(demo_url)
    try:
        with make_session_factory(engine)() as session:
            visit_id = session.scalar(
                select(Visit.id)
                .join(Patient)
                .where(Patient.code == "DEMO-01")
                .order_by(Visit.visit_date)
                .limit(1)
            )
            visits, tests, sites = load_frames(session, [visit_id])
            _, limits = resolve(session, None)
            settings = preferences.criteria_settings(session)
    finally:
        engine.dispose()
    results = {
        name: criteria_engine.evaluate(visits, tests, sites, limits, ["efns-pns-2010-cidp"], chosen)[
            "efns-pns-2010-cidp"
        ]
        for name, chosen in (("publication", Settings()), ("stored", settings))
    }
    rows = {}
    for name, result in results.items():
        findings = result.findings
        chosen = findings[
            (findings["item"] == "dcmap_duration")
            & (findings["nerve"] == "median")
            & (findings["side"] == "right")
        ]
        rows[name] = chosen.iloc[0]
    assert (
        rows["publication"]["status"] == "met"
        and "setting duration_filter_strict off" in rows["publication"]["reason"]
    )
    assert (
        rows["stored"]["status"] == "not_evaluable"
        and "setting duration_filter_strict on" in rows["stored"]["reason"]
    )


def test_switching_back_off_restores_the_publication(monkeypatch, demo_url):
    engine = make_engine(demo_url)
    with make_session_factory(engine).begin() as session:
        for field in SWITCHES:
            preferences.set_criteria_switch(session, field, True, username="invented-test-user")
    engine.dispose()
    at = settings_page(monkeypatch, demo_url)
    for field in SWITCHES:
        assert at.toggle(key=f"settings_{field}").value is True
        at.toggle(key=f"settings_{field}").set_value(False)
    at.button(key="settings_save").click().run()
    assert not at.exception
    after, _ = stored(demo_url)
    assert after == Settings(cold_limbs=after.cold_limbs)


def test_unknown_switch_is_refused():
    from tracker.errors import TrackerError

    with pytest.raises(TrackerError, match="Unknown criteria switch"):
        preferences._switch_key("no_such_switch")
