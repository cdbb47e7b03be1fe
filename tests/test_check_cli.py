"""`ncs-tracker check`, `evaluate` and `limits` through the real entry point, on both backends."""

from __future__ import annotations

import datetime as dt
import json

import pytest
from sqlalchemy import func, select

from conftest import DEMO, fingerprint, run_cli
from tracker.db.models import Evaluation, LimitSet

DEMO_FILES = [str(DEMO / n) for n in ("measurements.csv", "treatments.csv", "scores.csv")]


@pytest.fixture
def demo_db(db_url, capsys):
    code, _, err = run_cli(capsys, "--db", db_url, "import", *DEMO_FILES)
    assert code == 0, err
    return db_url


def test_check_json_follows_the_contract(demo_db, capsys):
    code, out, err = run_cli(
        capsys,
        "--db",
        demo_db,
        "check",
        "DEMO-01",
        "--visit",
        "2023-02-14",
        "--criteria",
        "efns-pns-2010-cidp",
        "--format",
        "json",
    )
    assert code == 0, err
    payload = json.loads(out)
    for key in ("patient", "visit_date", "criteria", "limits", "outcome", "nerves"):
        assert key in payload
    assert payload["patient"] == "DEMO-01" and payload["visit_date"] == "2023-02-14"
    assert payload["outcome"] in ("definite", "probable", "possible", "not_met")
    finding = payload["nerves"][0]["findings"][0]
    for key in ("parameter", "value", "limit", "threshold", "status", "source"):
        assert key in finding
    assert {f["status"] for n in payload["nerves"] for f in n["findings"]} <= {
        "met",
        "not_met",
        "not_evaluable",
        "not_applicable",
    }  # DESIGN.md §5
    assert "qualified clinician" in payload["caution"]


def test_check_text_names_values_limits_and_sources(demo_db, capsys):
    code, out, err = run_cli(
        capsys, "--db", demo_db, "check", "DEMO-01", "--criteria", "efns-pns-2010-cidp", "--detail"
    )
    assert code == 0, err
    assert "Outcome:" in out and "Sources" in out and "qualified clinician" in out
    assert "ULN 4.40" in out  # the median distal latency limit of the default set, at clinical precision


def test_check_saves_an_evaluation_and_recomputes_after_new_limits(demo_db, sessions, tmp_path, capsys):
    assert run_cli(capsys, "--db", demo_db, "check", "DEMO-02", "--criteria", "efns-pns-2010-cidp")[0] == 0
    with sessions() as session:
        first = session.scalars(select(Evaluation)).all()
        assert len(first) == 1 and first[0].criteria_id == "efns-pns-2010-cidp"
        default_set = session.scalar(select(LimitSet).where(LimitSet.name == "default"))
        assert first[0].limit_set_id == default_set.id and first[0].limit_set_version == 2
    # Invented laboratory limits (not for clinical use): a stricter median motor distal latency.
    lab = tmp_path / "lab.csv"
    lab.write_text(
        "nerve,modality,parameter,bound,value,source\n"
        "median,motor,distal_latency_ms,uln,4.0,invented for a test\n",
        encoding="utf-8",
    )
    code, out, err = run_cli(capsys, "--db", demo_db, "limits", "import", str(lab), "--name", "lab")
    assert code == 0, err and "lab v1" in out
    code, out, _ = run_cli(
        capsys,
        "--db",
        demo_db,
        "check",
        "DEMO-02",
        "--criteria",
        "efns-pns-2010-cidp",
        "--limits",
        "lab",
        "--format",
        "json",
    )
    assert code == 0
    assert json.loads(out)["limits"] == "lab v1"
    with sessions() as session:
        assert session.scalar(select(func.count()).select_from(Evaluation)) == 2


def test_evaluate_recomputes_only_what_changed(demo_db, capsys):
    code, out, err = run_cli(capsys, "--db", demo_db, "evaluate")
    assert code == 0, err
    assert "29 visits" in out and " 0 unchanged" in out
    code, out, _ = run_cli(capsys, "--db", demo_db, "evaluate")
    assert code == 0 and " 0 evaluations recomputed" in out


def test_limits_import_refuses_bad_rows_and_changes_nothing(demo_db, engine, tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    bad.write_text(
        "nerve,modality,parameter,bound,value,age_min,age_max\n"
        "medain,motor,distal_latency_ms,uln,4.2,,\n"
        "median,motor,latency,uln,4.2,,\n"
        "median,motor,distal_latency_ms,upper,4.2,,\n"
        "median,motor,distal_latency_ms,uln,-1,,\n"
        "median,motor,cv_ms,lln,49,60,40\n",
        encoding="utf-8",
    )
    before = fingerprint(engine)
    code, _, err = run_cli(capsys, "--db", demo_db, "limits", "import", str(bad), "--name", "lab")
    assert code == 1
    for expected in (
        "row 2, column 'nerve'",
        "did you mean 'median'",
        "row 3, column 'parameter'",
        "row 4, column 'bound'",
        "row 5, column 'value'",
        "row 6, column 'age_max'",
    ):
        assert expected in err
    assert fingerprint(engine) == before


def test_limits_list_shows_the_default(demo_db, capsys):
    code, out, _ = run_cli(capsys, "--db", demo_db, "limits", "list")
    assert code == 0 and "* default v2" in out


def test_unknown_criteria_and_patient_are_clear_errors(demo_db, capsys):
    code, _, err = run_cli(capsys, "--db", demo_db, "check", "DEMO-01", "--criteria", "efns-2010")
    assert code == 1 and "Unknown criteria set" in err
    code, _, err = run_cli(capsys, "--db", demo_db, "check", "DEMO-1")
    assert code == 1 and "did you mean 'DEMO-01'" in err


def test_annotate_records_wrist_entrapment_and_keeps_history(demo_db, sessions, capsys):
    from tracker.db.models import AuditEvent, Visit, VisitRevision

    # Before: DEMO-01's first visit has a median distal latency of 7.05 ms, met for EFNS/PNS 2010 (a).
    code, out, _ = run_cli(
        capsys,
        "--db",
        demo_db,
        "check",
        "DEMO-01",
        "--visit",
        "2023-02-14",
        "--criteria",
        "efns-pns-2010-cidp",
        "--format",
        "json",
    )
    median = lambda payload: next(
        f
        for n in payload["nerves"]
        if n["nerve"] == "median" and n["modality"] == "motor"
        for f in n["findings"]
        if f["item"] == "dml"
    )
    assert median(json.loads(out))["status"] == "met"
    code, out, err = run_cli(
        capsys,
        "--db",
        demo_db,
        "annotate",
        "DEMO-01",
        "--visit",
        "2023-02-14",
        "--wrist-entrapment",
        "right=yes",
    )
    assert code == 0, err and "right median wrist entrapment" in out
    code, out, _ = run_cli(
        capsys,
        "--db",
        demo_db,
        "check",
        "DEMO-01",
        "--visit",
        "2023-02-14",
        "--criteria",
        "efns-pns-2010-cidp",
        "--format",
        "json",
    )
    after = median(json.loads(out))
    assert after["status"] == "not_applicable" and "wrist" in after["reason"]
    with sessions() as session:
        visit = session.scalar(select(Visit).where(Visit.visit_date == dt.date(2023, 2, 14)))
        assert visit.version == 2
        assert (
            session.scalar(
                select(func.count()).select_from(VisitRevision).where(VisitRevision.visit_id == visit.id)
            )
            == 1
        )
        assert "set_clinician_inputs" in session.scalars(select(AuditEvent.action)).all()
    # Re-importing the original file now conflicts (the stored visit differs) instead of silently undoing it.
    code, _, err = run_cli(capsys, "--db", demo_db, "import", str(DEMO / "measurements.csv"))
    assert code == 1 and "--replace" in err
