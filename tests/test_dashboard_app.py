"""The dashboard driven by Streamlit's testing API (AppTest): every page renders on the demo clinic,
a patient can be chosen, the parameter switched, a study entered (refused, then saved), settings changed.

Caches are cleared between tests (Streamlit keeps them per process); runs get a generous timeout.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
import re
from pathlib import Path

import pandas as pd
import pytest
import streamlit as st
from sqlalchemy import func, select
from streamlit.testing.v1 import AppTest

from conftest import fingerprint, new_database
from dashboard_support import fill_demo
from tracker.db.models import AuditEvent, NerveTest, Patient, StimulationSite, Visit
from tracker.db.session import make_engine, make_session_factory
from tracker.services import preferences
from tracker.services.access.accounts import system_identity
from tracker.services.entry import empty_layout, entry_table

APP = str(Path(__file__).resolve().parent.parent / "tracker" / "dashboard" / "app.py")
PAGES = [
    "views/patients.py",
    "views/follow_up.py",
    "views/visit_review.py",
    "views/visit_entry.py",
    "views/cohort.py",
    "views/settings.py",
]
TITLES = ["Patients", "Follow-up", "Visit review", "New study", "Cohort", "Settings"]


@pytest.fixture(scope="module", params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def demo_url(request, tmp_path_factory):
    generator = new_database(request.param, tmp_path_factory.mktemp("apptest"))
    url = next(generator)
    fill_demo(url)
    yield url
    next(generator, None)


@pytest.fixture
def fresh_url(tmp_path):
    """A demo database of its own, for tests that write (SQLite)."""
    url = f"sqlite:///{tmp_path / 'entry.sqlite3'}"
    fill_demo(url)
    return url


@pytest.fixture(autouse=True)
def clean_streamlit():
    st.cache_data.clear()
    st.cache_resource.clear()
    yield
    st.cache_data.clear()
    st.cache_resource.clear()


def open_page(monkeypatch, url: str, page: str | None = None, *, patient: str | None = None) -> AppTest:
    monkeypatch.setenv("NCS_TRACKER_DB", url)
    at = AppTest.from_file(APP, default_timeout=120)
    if patient:
        at.session_state["ncs_patient"] = patient
    at.run()
    if page and page != PAGES[0]:
        at.switch_page(page)
        at.run()
    assert not at.exception, [e.message for e in at.exception]
    return at


def plotly_specs(at: AppTest) -> list[dict]:
    return [json.loads(chart.proto.spec) for chart in at.get("plotly_chart")]


def page_text(at: AppTest) -> str:
    parts = (
        [m.value for m in at.markdown]
        + [c.value for c in at.caption]
        + [i.value for i in at.info]
        + [e.value for e in at.error]
    )
    return "\n".join(str(p) for p in parts)


@pytest.mark.parametrize(("page", "title"), list(zip(PAGES, TITLES)))
def test_every_page_renders_with_the_caution(monkeypatch, demo_url, page, title):
    at = open_page(monkeypatch, demo_url, page)
    assert [t.value for t in at.title] == [title]
    assert not at.error, [e.value for e in at.error]
    assert "must be reviewed by a qualified clinician" in page_text(at)


def test_patient_list_search_filter_and_open(monkeypatch, demo_url):
    at = open_page(monkeypatch, demo_url)
    table = at.dataframe[0].value
    assert list(table["patient"]) == [f"DEMO-0{i}" for i in range(1, 7)]
    assert not table.filter(like="latest outcome").iloc[:, 0].str.contains("not evaluated").any()
    at.text_input(key="patients_search").input("demo-04").run()
    assert list(at.dataframe[0].value["patient"]) == ["DEMO-04"]
    at.text_input(key="patients_search").input("").run()
    at.selectbox(key="patients_diagnosis").select("gbs").run()
    assert list(at.dataframe[0].value["patient"]) == ["DEMO-05"]
    at.selectbox(key="patients_diagnosis").select(None).run()
    at.selectbox(key="patients_open").select("DEMO-04").run()
    at.button(key="patients_go").click().run()
    assert not at.exception
    assert [t.value for t in at.title] == ["Follow-up"]
    assert at.selectbox(key="follow_patient").value == "DEMO-04"
    [strip, trend, *_] = plotly_specs(at)
    assert trend["layout"]["meta"]["patient"] == "DEMO-04"


def test_latest_outcome_filter(monkeypatch, demo_url):
    at = open_page(monkeypatch, demo_url)
    at.selectbox(key="patients_criteria").select("efns-pns-2010-mmn").run()
    everyone = at.dataframe[0].value
    outcomes = everyone.filter(like="latest outcome").iloc[:, 0]
    # The MMN patient (DEMO-04, invented) still shows a block at the latest visit; the others do not.
    positive = sorted(everyone.loc[outcomes.isin(["definite", "probable"]), "patient"])
    assert positive == ["DEMO-04"]
    wanted = outcomes[everyone["patient"] == "DEMO-04"].iloc[0]
    at.selectbox(key="patients_outcome").select(wanted).run()
    shown = at.dataframe[0].value
    assert list(shown["patient"]) == list(everyone.loc[outcomes == wanted, "patient"])


def test_follow_up_switches_parameter(monkeypatch, demo_url):
    at = open_page(monkeypatch, demo_url, "views/follow_up.py", patient="DEMO-01")
    trend = plotly_specs(at)[1]
    assert trend["layout"]["meta"]["parameter"] == "cv"
    at.radio(key="follow_parameter").set_value("distal_latency").run()
    assert not at.exception
    trend = plotly_specs(at)[1]
    assert trend["layout"]["meta"]["parameter"] == "distal_latency"
    median = [
        t
        for t in trend["data"]
        if t.get("meta", {}).get("panel") == "median right (motor)" and t["meta"]["kind"] == "measured"
    ][0]
    # First value = the demo file's distal latency of that visit
    # (demo_data/measurements.csv, invented): 7.05 ms.
    assert median["customdata"][0][:2] == ["2023-02-14", "7.05"]


def test_visit_review_shows_trace_and_outcome(monkeypatch, demo_url):
    at = open_page(monkeypatch, demo_url, "views/visit_review.py", patient="DEMO-01")
    at.selectbox(key="review_visit").select(dt.date(2023, 2, 14)).run()
    at.multiselect(key="review_criteria").set_value(["efns-pns-2010-cidp"]).run()
    assert not at.exception and not at.error
    text = page_text(at)
    # Hand-checked in tests/test_demo_outcomes.py: EFNS/PNS 2010 definite by distal latencies at this visit.
    assert "▲ definite" in text
    traces = [d.value for d in at.dataframe]
    median = next(
        t
        for t in traces
        if "criterion" in t
        and (t["criterion"] == "distal motor latency").any()
        and t["value"].str.contains("7.05").any()
    )
    row = median[median["criterion"] == "distal motor latency"].iloc[0]
    assert row["verdict"].startswith("▲ met") and "6.60" in row["threshold"]
    # The source is a footnote number; the footnote names the publication.
    number = re.match(r"\[(\d+)\]", row["source"]).group(1)
    assert re.search(rf"\[{number}\] Van den Bergh", text)


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def entry_url(request, tmp_path):
    """A demo database of its own on either backend, for the New study tests (they write)."""
    generator = new_database(request.param, tmp_path)
    url = next(generator)
    fill_demo(url)
    yield url
    next(generator, None)


MEDIAN = {"nerve": "median", "side": "right", "modality": "motor"}
ULNAR = {"nerve": "ulnar", "side": "right", "modality": "motor"}


def entry_sites(latency_elbow: float, *, ulnar: bool = False) -> list[dict]:
    """Invented sites: median right motor (wrist 70 mm, elbow 230 mm), optionally ulnar right motor."""
    rows = [
        {
            **MEDIAN,
            "site_order": 1,
            "site": "wrist",
            "distance_mm": 70.0,
            "latency_ms": 3.8,
            "amplitude_mv": 8.2,
        },
        {
            **MEDIAN,
            "site_order": 2,
            "site": "elbow",
            "distance_mm": 230.0,
            "latency_ms": latency_elbow,
            "amplitude_mv": 7.9,
        },
    ]
    if ulnar:  # 220 mm in 4.4 ms: 50.0 m/s
        rows += [
            {
                **ULNAR,
                "site_order": 1,
                "site": "wrist",
                "distance_mm": 70.0,
                "latency_ms": 3.0,
                "amplitude_mv": 9.0,
            },
            {
                **ULNAR,
                "site_order": 2,
                "site": "below elbow",
                "distance_mm": 220.0,
                "latency_ms": 7.4,
                "amplitude_mv": 8.8,
            },
        ]
    return rows


def fill_entry(
    at: AppTest,
    sites: list[dict],
    nerves: list[dict] | None = None,
    *,
    patient: str = "TEST-NEW",
    day: dt.date = dt.date(2026, 6, 1),
) -> None:
    # The grids are st.data_editor widgets, which AppTest cannot type into; the page starts the editors from
    # their template state (what "Copy layout" fills), so the test sets that state and submits the form.
    layout = empty_layout(nerves if nerves is not None else [{**MEDIAN, "temperature_c": 33.0}], sites)
    at.session_state["entry_template"] = layout.sites
    at.session_state["entry_nerve_template"] = layout.nerves
    at.session_state["entry_template_version"] = (
        at.session_state["entry_template_version"] + 1 if "entry_template_version" in at.session_state else 1
    )
    at.run()
    at.text_input(key="entry_patient").input(patient)
    at.date_input(key="entry_date").set_value(day)
    at.selectbox(key="entry_diagnosis").select("cidp")


def press(at: AppTest, label: str) -> None:
    next(b for b in at.button if b.label == label).click().run()
    assert not at.exception, [e.message for e in at.exception]


def row_problems(at: AppTest) -> pd.DataFrame:
    return next(d.value for d in at.dataframe if list(d.value.columns) == ["grid", "row", "field", "problem"])


def visits_of(engine, code: str) -> int:
    with make_session_factory(engine)() as session:
        return session.scalar(
            select(func.count()).select_from(Visit).join(Patient).where(Patient.code == code)
        )


def test_entry_refused_then_saved_and_shown(monkeypatch, entry_url):
    engine = make_engine(entry_url)
    before = fingerprint(engine)
    at = open_page(monkeypatch, entry_url, "views/visit_entry.py")
    # Elbow latency earlier than the wrist's: impossible (latencies grow proximally) — refused, nothing saved.
    fill_entry(at, entry_sites(latency_elbow=3.0))
    press(at, "Check and save")
    assert any("Nothing was saved" in e.value for e in at.error)
    problems = row_problems(at)
    # The grid's own numbering (1 = first row) and the field in words (issue 10, items 12 and 15).
    assert problems.iloc[0].tolist()[:3] == ["stimulation sites", 2, "onset latency (ms)"]
    [message] = [e.value for e in at.error]
    assert "fields marked in red" not in message and "grid rows listed below" in message  # no field is marked
    assert fingerprint(engine) == before
    # Corrected: 230 mm in 4.6 ms → 50.0 m/s. One nerve only: the importer's warning comes first, nothing
    # is saved yet.
    fill_entry(at, entry_sites(latency_elbow=8.4))
    press(at, "Check and save")
    assert not at.error, [e.value for e in at.error]
    warnings = "\n".join(w.value for w in at.warning)
    assert "Not saved yet" in warnings and "stimulation sites, row 1, nerve:" in warnings
    assert "holds a single nerve (median right)" in warnings
    assert fingerprint(engine) == before
    press(at, "Save with these warnings")
    assert not at.error, [e.value for e in at.error]
    assert any("Saved: TEST-NEW 2026-06-01" in s.value for s in at.success)
    assert any(
        "Saved with these warnings" in w.value and "single nerve" in w.value for w in at.warning
    )  # not lost
    assert visits_of(engine, "TEST-NEW") == 1
    engine.dispose()
    at.switch_page("views/follow_up.py")
    at.run()
    assert not at.exception
    assert at.selectbox(key="follow_patient").value == "TEST-NEW"
    trend = plotly_specs(at)[1]
    [line] = [t for t in trend["data"] if t.get("meta", {}).get("kind") == "measured"]
    assert line["customdata"][0][1] == "50.0"  # velocity at clinical precision, 1 decimal (issue 10, item 12)


def test_entry_nerve_values_entered_once_apply_to_every_site(monkeypatch, entry_url):
    # Issue 10, item 15: temperature, filter and F-waves are entered once per nerve test (invented values) and
    # written on every site row of that nerve test, as the measurements format wants (DESIGN.md §4.1).
    nerves = [
        {**MEDIAN, "temperature_c": 33.5, "lff_hz": 2.0, "f_latency_ms": "28.4", "f_persistence_pct": 80.0},
        {**ULNAR, "temperature_c": 32.0, "lff_hz": 2.0, "f_latency_ms": "absent"},
    ]
    sites = entry_sites(latency_elbow=8.4, ulnar=True)
    layout = empty_layout(nerves, sites)
    raw, places, problems = entry_table(
        {"patient": "TEST-ONCE", "visit_date": dt.date(2026, 6, 1)},
        layout.sites.set_axis(pd.RangeIndex(1, 5)),
        layout.nerves.set_axis(pd.RangeIndex(1, 3)),
    )
    assert problems == []
    rows = list(csv.DictReader(io.StringIO(raw.decode("utf-8"))))
    values = [
        (r["nerve"], r["site"], r["temperature_c"], r["lff_hz"], r["f_latency_ms"], r["f_persistence_pct"])
        for r in rows
    ]
    assert values == [
        ("median", "wrist", "33.5", "2", "28.4", "80"),
        ("median", "elbow", "33.5", "2", "28.4", "80"),
        ("ulnar", "wrist", "32", "2", "absent", ""),
        ("ulnar", "below elbow", "32", "2", "absent", ""),
    ]
    assert [(p.site_row, p.nerve_row) for p in places] == [(1, 1), (2, 1), (3, 2), (4, 2)]
    # The same through the page: saved at once (two nerves, nothing to warn of), the values stored per nerve.
    at = open_page(monkeypatch, entry_url, "views/visit_entry.py")
    fill_entry(at, sites, nerves, patient="TEST-ONCE")
    press(at, "Check and save")
    assert not at.error and not at.warning, [e.value for e in [*at.error, *at.warning]]
    assert any("Saved: TEST-ONCE 2026-06-01" in s.value for s in at.success)
    engine = make_engine(entry_url)
    with make_session_factory(engine)() as session:
        stored = session.execute(
            select(
                NerveTest.nerve,
                NerveTest.temperature_c,
                NerveTest.lff_hz,
                NerveTest.f_latency_ms,
                NerveTest.f_absent,
                NerveTest.f_persistence_pct,
            )
            .join(Visit)
            .join(Patient)
            .where(Patient.code == "TEST-ONCE")
            .order_by(NerveTest.nerve)
        ).all()
        sites_stored = session.scalar(
            select(func.count())
            .select_from(StimulationSite)
            .join(NerveTest)
            .join(Visit)
            .join(Patient)
            .where(Patient.code == "TEST-ONCE")
        )
    engine.dispose()
    assert [tuple(r) for r in stored] == [
        ("median", 33.5, 2.0, 28.4, False, 80.0),
        ("ulnar", 32.0, 2.0, None, True, None),
    ]
    assert sites_stored == 4


def test_entry_warnings_shown_after_a_dry_run_and_before_saving(monkeypatch, entry_url):
    # Invented demo patient DEMO-01 has a visit on 2023-02-14. A visit entered on 2023-02-10 is 4 days from
    # it, and 10 February with day and month swapped is 2 October: the importer warns of a possible entry
    # slip (issue 10, item 16: warn, not refuse). Two nerves, so no single-nerve warning.
    engine = make_engine(entry_url)
    before, visits = fingerprint(engine), visits_of(engine, "DEMO-01")
    at = open_page(monkeypatch, entry_url, "views/visit_entry.py")
    fill_entry(at, entry_sites(latency_elbow=8.4, ulnar=True), patient="DEMO-01", day=dt.date(2023, 2, 10))
    press(at, "Check only (nothing saved)")
    assert not at.error, [e.value for e in at.error]
    assert any("Check passed; nothing was saved" in i.value for i in at.info)
    [warning] = [w.value for w in at.warning]
    assert (
        "visit date:" in warning
        and "4 days from their visit on 2023-02-14" in warning
        and "2023-10-02" in warning
    )
    assert fingerprint(engine) == before
    press(at, "Check and save")
    assert any("Not saved yet" in w.value for w in at.warning) and fingerprint(engine) == before
    press(at, "Save with these warnings")
    assert any("Saved: DEMO-01 2023-02-10" in s.value for s in at.success)
    assert visits_of(engine, "DEMO-01") == visits + 1
    engine.dispose()


def test_entry_errors_name_the_grid_row_and_the_field(monkeypatch, entry_url):
    # Invented entry with two mistakes in the nerve-test grid: a limb temperature of 60 °C (outside the
    # 20–40 °C physical range of tracker/reference/plausibility.csv, common practice, no source) given once
    # for a nerve test of two sites, and a nerve test (tibial) with no site rows. No visit field is marked.
    engine = make_engine(entry_url)
    before = fingerprint(engine)
    at = open_page(monkeypatch, entry_url, "views/visit_entry.py")
    nerves = [
        {**MEDIAN, "temperature_c": 60.0},
        {"nerve": "tibial", "side": "left", "modality": "motor", "temperature_c": 31.0},
    ]
    fill_entry(at, entry_sites(latency_elbow=8.4, ulnar=True), nerves, patient="DEMO-01")
    press(at, "Check and save")
    problems = row_problems(at)
    assert problems[["grid", "row", "field"]].values.tolist() == [
        ["nerve tests", 1, "temperature (°C)"],  # once, though written on both median site rows
        ["nerve tests", 2, "nerve"],
    ]
    assert (
        "you entered '60'" in problems.iloc[0]["problem"]
        and "tibial left (motor)" in problems.iloc[1]["problem"]
    )
    [message] = [e.value for e in at.error]
    assert "fields marked in red" not in message and "grid rows listed below" in message
    assert not any(m.value.startswith(":red[") for m in at.markdown)
    assert identifiers_in(at) == {}
    # Corrected grids, but a sex that differs from the stored patient's (DEMO-01 is female in the invented
    # demo file): the field is marked, and only then does the message speak of marked fields.
    fill_entry(
        at, entry_sites(latency_elbow=8.4, ulnar=True), [{**MEDIAN, "temperature_c": 33.0}], patient="DEMO-01"
    )
    at.selectbox(key="entry_sex").select("male")
    press(at, "Check and save")
    [message] = [e.value for e in at.error]
    assert "the fields marked in red" in message and "grid rows" not in message
    [marked] = [m.value for m in at.markdown if m.value.startswith(":red[")]
    assert marked.startswith(":red[**sex:**") and "female" in marked and "--" not in marked
    assert identifiers_in(at) == {}
    assert fingerprint(engine) == before
    engine.dispose()


def test_settings_change_is_saved_and_audited(monkeypatch, fresh_url):
    at = open_page(monkeypatch, fresh_url, "views/settings.py")
    at.radio(key="settings_cold").set_value("exclude")
    at.selectbox(key="settings_criteria").select("efns-pns-2010-cidp")
    at.button(key="settings_save").click().run()
    assert not at.exception
    engine = make_engine(fresh_url)
    with make_session_factory(engine)() as session:
        assert preferences.cold_limbs(session) == "exclude"
        assert preferences.default_criteria(session) == "efns-pns-2010-cidp"
        users = set(session.scalars(select(AuditEvent.username).where(AuditEvent.entity == "setting")))
        login = system_identity(session)[0]  # without sign-in the dashboard acts as the login that started it
    engine.dispose()
    assert users == {login}


def test_cohort_counts_match_the_database(monkeypatch, demo_url):
    at = open_page(monkeypatch, demo_url, "views/cohort.py")
    counts = at.dataframe[0].value.set_index("diagnosis")
    engine = make_engine(demo_url)
    with make_session_factory(engine)() as session:
        visits = session.scalar(select(func.count()).select_from(Visit))
        by_diagnosis = dict(
            session.execute(select(Visit.diagnosis, func.count()).group_by(Visit.diagnosis)).all()
        )
    engine.dispose()
    assert int(counts["visits"].sum()) == visits == 29
    # Diagnoses in words on screen (labels.DIAGNOSIS_SHORT: "mmn" → "MMN"), ids in the database.
    from tracker.domain.labels import DIAGNOSIS_SHORT

    assert {k: int(v) for k, v in counts["visits"].items()} == {
        DIAGNOSIS_SHORT[k]: v for k, v in by_diagnosis.items()
    }
    at.selectbox(key="cohort_diagnosis").select("mmn").run()
    visits_table = at.dataframe[1].value
    assert set(visits_table["diagnosis"]) == {"MMN"} and len(visits_table) == by_diagnosis["mmn"]


@pytest.mark.parametrize("page", PAGES)
def test_every_page_works_on_a_new_empty_database(monkeypatch, tmp_path, page):
    # A clinic's first day: schema only, no patients, no limit sets stored yet.
    from tracker.db import migrate

    url = f"sqlite:///{tmp_path / 'empty.sqlite3'}"
    migrate.upgrade(url)
    at = open_page(monkeypatch, url, page)
    assert not at.error, [e.value for e in at.error]
    assert "must be reviewed by a qualified clinician" in page_text(at)


def test_outdated_schema_is_explained_not_shown_as_a_traceback(monkeypatch, tmp_path):
    url = f"sqlite:///{tmp_path / 'none.sqlite3'}"
    monkeypatch.setenv("NCS_TRACKER_DB", url)
    at = AppTest.from_file(APP, default_timeout=120)
    at.run()
    assert not at.exception
    assert any("ncs-tracker db upgrade" in e.value for e in at.error)


def test_follow_up_says_when_a_set_has_no_threshold_for_the_parameter(monkeypatch, demo_url):
    # EFNS/PNS 2010 MMN criteria are conduction-block criteria: no velocity threshold (Joint Task Force of the
    # EFNS and the PNS, J Peripher Nerv Syst 2010;15:295–301).
    at = open_page(monkeypatch, demo_url, "views/follow_up.py", patient="DEMO-04")
    at.selectbox(key="follow_criteria").select("efns-pns-2010-mmn").run()
    assert "sets no threshold on this parameter" in page_text(at)
    at.radio(key="follow_parameter").set_value("block").run()
    assert "Dotted vermillion: threshold of MMN" in page_text(at)
    trend = plotly_specs(at)[1]
    lines = [t for t in trend["data"] if t.get("meta", {}).get("kind") == "criteria threshold"]
    # Definite motor conduction block: negative-peak area reduction ≥ 50 % (same publication).
    assert lines and all(set(_numbers(t["y"])) == {50.0} for t in lines)
    blocks = [t for t in trend["data"] if t.get("meta", {}).get("kind") == "measured"]
    assert blocks and all(
        t["meta"]["series"].startswith("wrist →") or "→" in t["meta"]["series"] for t in blocks
    )


def _numbers(values) -> list[float]:
    """Plotly 7 sends numeric arrays as base64 ``bdata``; plain lists stay lists."""
    if isinstance(values, dict) and "bdata" in values:
        import base64

        import numpy as np

        return list(np.frombuffer(base64.b64decode(values["bdata"]), dtype=values["dtype"]).astype(float))
    return [float(v) for v in values]


def _service(url: str, call):
    engine = make_engine(url)
    try:
        with make_session_factory(engine)() as session:
            return call(session)
    finally:
        engine.dispose()


def test_follow_up_shows_score_panels_and_the_response(monkeypatch, demo_url):
    from tracker.domain.labels import CLASSIFICATION_LABELS, CLASSIFICATION_SHAPES
    from tracker.response.rules import DEFAULT_RULES
    from tracker.services.response import patient_response

    at = open_page(monkeypatch, demo_url, "views/follow_up.py", patient="DEMO-02")
    expected = _service(demo_url, lambda session: patient_response(session, "DEMO-02"))
    assert expected.rule_set.id == DEFAULT_RULES == at.selectbox(key="follow_rules").value
    # One score panel per scale (recorded and computed), each on a y-axis of its own.
    scores = plotly_specs(at)[2]
    score_lines = [t for t in scores["data"] if t.get("meta", {}).get("kind") == "score"]
    assert {t["meta"]["scale"] for t in score_lines} == set(expected.scores["scale"])
    assert len({t.get("yaxis", "y") for t in score_lines}) == len(score_lines) > 1
    # The response panel: every regimen's classification in words with its shape, and the deference.
    assert [s.value for s in at.subheader] == ["Treatment response"]
    text = page_text(at)
    for c in expected.classifications:
        assert f"{CLASSIFICATION_SHAPES[c.classification]} {CLASSIFICATION_LABELS[c.classification]}" in text
        assert c.regimen.label() in text
        for missing in c.missing:
            assert missing in text
    assert "defers to the treating clinician" in text and expected.rule_set.title in text
    # Another rule set: the panel follows the service.
    at.selectbox(key="follow_rules").select("trial-composite").run()
    assert not at.exception and not at.error
    composite = _service(
        demo_url, lambda session: patient_response(session, "DEMO-02", rules_id="trial-composite")
    )
    text = page_text(at)
    assert composite.rule_set.title in text
    for c in composite.classifications:
        assert f"{CLASSIFICATION_SHAPES[c.classification]} {CLASSIFICATION_LABELS[c.classification]}" in text
    evidence = [
        d.value for d in at.dataframe if "threshold" in d.value.columns and "source" in d.value.columns
    ]
    assert sum(len(e) for e in evidence) == sum(len(c.evidence) for c in composite.classifications)


def test_patients_page_has_the_course_column(monkeypatch, demo_url):
    from tracker.domain.labels import COURSE_LABELS
    from tracker.services.response import cohort_course

    at = open_page(monkeypatch, demo_url)
    for rules_id in ("trial-aincat", "trial-composite"):
        if rules_id != "trial-aincat":
            at.selectbox(key="patients_rules").select(rules_id).run()
            assert not at.exception
        expected = _service(demo_url, lambda session: cohort_course(session, rules_id=rules_id)).set_index(
            "code"
        )
        table = at.dataframe[0].value.set_index("patient")
        assert set(COURSE_LABELS.values()) >= set(table["course"])
        assert table["course"].to_dict() == {code: COURSE_LABELS[c] for code, c in expected["course"].items()}
        from tracker.response.rules import rule_sets

        title = rule_sets()[
            rules_id
        ].title  # the rule set in words, with its version (ids stay in JSON and exports)
        assert table["course rule set"].to_dict() == {
            code: f"{title} (version {v})" for code, v in zip(expected.index, expected["rules_version"])
        }


def test_visit_review_criteria_follow_the_patients_diagnosis(monkeypatch, demo_url):
    # The set shown by default is the one check uses for the patient's diagnosis (the project's mapping,
    # tracker.services.evaluation.default_criteria; common practice, no source): switching from a CIDP
    # patient to an MMN one, then a GBS one (the invented demo clinic), switches the sets with it.
    from tracker.domain.labels import criteria_title
    from tracker.services.evaluation import default_criteria

    at = open_page(monkeypatch, demo_url, "views/visit_review.py", patient="DEMO-01")
    assert at.multiselect(key="review_criteria").value == [default_criteria("cidp")]
    for code, diagnosis in (("DEMO-04", "mmn"), ("DEMO-05", "gbs"), ("DEMO-02", "cidp")):
        at.selectbox(key="review_patient").select(code).run()
        assert not at.exception and not at.error
        assert at.multiselect(key="review_criteria").value == [default_criteria(diagnosis)]
        assert criteria_title(default_criteria(diagnosis)) in page_text(at)
    assert default_criteria("mmn") != default_criteria("cidp") != default_criteria("gbs")


# --- words, not identifiers, on every page ------------------------------------------------------------------
# Issue 10, item 12: screens show labels (tracker/domain/labels.py); identifiers stay in JSON and exports.
# Common practice, no source. The regex finds any snake_case identifier ("below_elbow", "not_met").
IDENTIFIER = re.compile(r"\b[a-z]+_[a-z_]+\b")
ALLOWED_IDENTIFIERS: set[str] = set()  # none needed today


def _plotly_words(spec: dict) -> list[str]:
    layout = spec.get("layout", {})
    title = lambda t: (t.get("text") or "") if isinstance(t, dict) else (t or "")
    out = [title(layout.get("title"))] + [a.get("text") or "" for a in layout.get("annotations", []) or []]
    out += [
        title(v.get("title"))
        for k, v in layout.items()
        if k[:5] in ("xaxis", "yaxis") and isinstance(v, dict)
    ]
    for trace in spec.get("data", []):
        out.append(str(trace.get("name") or ""))
        for key in ("text", "x", "y"):  # category axes (criteria sets) and marker words
            value = trace.get(key)
            out += [value] if isinstance(value, str) else [v for v in value or [] if isinstance(v, str)]
        out.append(re.sub(r"%\{[^}]*\}", "", trace.get("hovertemplate") or ""))
        for row in trace.get("customdata") or []:
            out += [v for v in (row if isinstance(row, list) else [row]) if isinstance(v, str)]
    return out


def shown_words(at: AppTest) -> list[str]:
    """Every text a person reads on the page: markdown, captions, alerts, widget labels and options, table
    headers (as column_config names them) and cells, and the words of every chart."""
    out: list[str] = []

    def walk(node) -> None:
        kind = type(node).__name__
        if kind in (
            "Markdown",
            "Caption",
            "Title",
            "Header",
            "Subheader",
            "Info",
            "Warning",
            "Error",
            "Success",
            "Text",
            "Code",
        ):
            out.append(str(node.value))
        if kind in ("Selectbox", "Radio", "Multiselect"):
            out.append(node.label)
            out.extend(str(o) for o in node.options)
        elif getattr(node, "label", None) and kind not in ("Dataframe",):
            out.append(str(node.label))
        if kind == "Dataframe":
            config = json.loads(node.proto.columns) if node.proto.columns else {}
            named = {k: v.get("label") for k, v in config.items() if isinstance(v, dict) and v.get("label")}
            frame = node.value
            out.extend(named.get(str(c), str(c)) for c in frame.columns)
            out.extend(v for c in frame.columns for v in frame[c].tolist() if isinstance(v, str))
        if kind == "UnknownElement" and getattr(node, "type", "") == "plotly_chart":
            out.extend(_plotly_words(json.loads(node.proto.spec)))
        children = getattr(node, "children", None)
        for child in children.values() if isinstance(children, dict) else []:
            walk(child)

    walk(at._tree)
    return [t for t in out if t]


def identifiers_in(at: AppTest) -> dict[str, str]:
    found = {}
    for text in shown_words(at):
        for token in IDENTIFIER.findall(text):
            if token not in ALLOWED_IDENTIFIERS:
                found.setdefault(token, text[:160])
    return found


def test_the_word_collector_sees_identifiers():
    # The check below must be able to fail: a page that prints an identifier is caught, in text and in tables.
    at = AppTest.from_string(
        "import streamlit as st, pandas as pd\nst.caption('ulnar left: wrist → below_elbow')\n"
        "st.dataframe(pd.DataFrame({'velocity_m_s': [50.1], 'outcome': ['not_met']}))"
    ).run()
    assert set(identifiers_in(at)) == {"below_elbow", "velocity_m_s", "not_met"}


@pytest.mark.parametrize("code", ["DEMO-01", "DEMO-04", "DEMO-05"])  # invented CIDP, MMN and GBS patients
def test_no_identifier_on_any_page(monkeypatch, demo_url, code):
    for page in PAGES:
        at = open_page(monkeypatch, demo_url, page, patient=code)
        if page == "views/visit_review.py":  # every criteria set, so every item and outcome is worded
            from tracker.criteria import engine

            at.multiselect(key="review_criteria").set_value(engine.available()).run()
        assert not at.exception and not at.error
        assert identifiers_in(at) == {}, page
        if page == "views/follow_up.py":
            for parameter in ("block", "dispersion", "snap"):
                at.radio(key="follow_parameter").set_value(parameter).run()
                assert identifiers_in(at) == {}, (page, parameter)


def test_visit_review_changes_since_the_previous_visit_as_a_table(monkeypatch, demo_url):
    # Issue 10, item 14: "Changed since" is a short table (nerve, criterion, before, now), not a run-on line.
    from tracker.dashboard.tables import CHANGE_COLUMNS

    at = open_page(monkeypatch, demo_url, "views/visit_review.py", patient="DEMO-01")
    at.multiselect(key="review_criteria").set_value(
        ["ean-pns-2021-cidp", "efns-pns-2010-cidp", "aan-1991-cidp"]
    ).run()
    assert not at.exception
    changed = [d.value for d in at.dataframe if list(d.value.columns) == CHANGE_COLUMNS]
    assert changed and all(len(t) for t in changed)
    assert all(
        set(t["now"]) <= {"▲ met", "○ not met", "? not evaluable", "– not applicable"} for t in changed
    )
    assert any(m.value.startswith("**Changed since") for m in at.markdown)


def demo_rows(patient: str, day: str) -> list[dict[str, str]]:
    """The demo file's rows of one visit (invented data)."""
    path = Path(__file__).parent.parent / "demo_data" / "measurements.csv"
    with path.open(encoding="utf-8") as handle:
        return [r for r in csv.DictReader(handle) if (r["patient"], r["visit_date"]) == (patient, day)]


def test_entry_layout_copy_keeps_the_patients_details(monkeypatch, demo_url):
    # Issue 10, item 15: copying a patient's layout also fills the visit fields from that patient's record
    # (invented demo patient DEMO-04: MMN, male, born 1979, 181 cm — demo_data/measurements.csv).
    at = open_page(monkeypatch, demo_url, "views/visit_entry.py")
    at.text_input(key="entry_layout_code").input("DEMO-04")
    next(b for b in at.button if b.label == "Copy layout").click().run()
    assert not at.exception
    assert at.text_input(key="entry_patient").value == "DEMO-04"
    assert (
        at.selectbox(key="entry_diagnosis").value == "mmn" and at.selectbox(key="entry_sex").value == "male"
    )
    assert (
        at.number_input(key="entry_birth_year").value == 1979
        and at.number_input(key="entry_height").value == 181
    )
    # The layout itself: one nerve-test row per nerve test of the latest visit, one site row per site (demo
    # file, invented), identifiers in words, every measured value empty (temperature and F-waves are
    # measured anew).
    rows = demo_rows("DEMO-04", "2025-06-03")  # DEMO-04's latest visit
    nerves, sites = at.session_state["entry_nerve_template"], at.session_state["entry_template"]
    assert len(sites) == len(rows) and len(nerves) == len(
        {(r["nerve"], r["side"], r["modality"]) for r in rows}
    )
    assert (
        nerves[["temperature_c", "lff_hz", "f_persistence_pct"]].isna().all().all()
        and nerves["f_latency_ms"].isna().all()
    )
    assert sites[["latency_ms", "amplitude_mv", "amplitude_uv"]].isna().all().all()
    layout = sorted(
        zip(sites["nerve"], sites["side"], sites["modality"], sites["site_order"], sites["distance_mm"])
    )
    assert layout == sorted(
        (
            r["nerve"].replace("_", " "),
            r["side"],
            r["modality"],
            float(r["site_order"]),
            float(r["distance_mm"]),
        )
        for r in rows
    )
    assert "below elbow" in set(sites["site"]) and "abductor digiti minimi" in set(nerves["recording_site"])
    assert identifiers_in(at) == {}
