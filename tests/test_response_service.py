"""`ncs-tracker response` and the response service on both backends: invented stories imported
through the ordinary importer (and the CLI), classified per regimen, with the DESIGN.md §5
JSON contract and a 120-column text report.

Every patient, date and value in this file is INVENTED for these tests and describes no real person.
Thresholds and smallest detectable changes are the published ones named beside each check.
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import pytest

from conftest import BACKENDS, DEMO, new_database, run_cli
from tracker.db import migrate
from tracker.db.session import make_engine, make_session_factory
from tracker.services.importing import import_file
from tracker.services.response import patient_response, response_json

USER = "response-tester"
CLASSIFICATIONS = {"improved", "stable", "worsened", "not_assessable"}

# Invented studies: one median motor nerve test (wrist, elbow) per visit, in the measurements
# format of DESIGN.md §4.1. INV-RELAPSE: forearm velocity 228 mm / (10.00 − 4.00) ms = 38.0 m/s,
# then 228 / (11.35 − 4.00) = 31.02 m/s; block (distal − proximal) / distal = (6.00 − 4.44) /
# 6.00 = 26 %, then (5.00 − 2.20) / 5.00 = 56 %.
MEASUREMENT_HEADER = (
    "patient,visit_date,nerve,side,modality,site_order,site,distance_mm,latency_ms,amplitude_mv,"
    "temperature_c,lff_hz,diagnosis"
)
RELAPSE_STUDIES = [
    ("INV-RELAPSE", "2024-05-15", "4.00", "6.00", "10.00", "4.44", "33.0"),
    ("INV-RELAPSE", "2024-09-10", "4.00", "5.00", "11.35", "2.20", "33.2"),
]
OTHER_STUDIES = [
    ("INV-RESPONDER", "2024-01-10", "5.60", "4.10", "12.80", "3.20", "32.8"),
    ("INV-RESPONDER", "2024-07-10", "5.20", "5.00", "11.60", "4.30", "33.1"),
    ("INV-STEROID", "2024-01-05", "5.00", "5.50", "11.20", "4.60", "33.0"),
    ("INV-STEROID", "2024-08-01", "4.80", "5.80", "10.80", "5.00", "32.9"),
    ("INV-CONFIRM", "2024-01-05", "4.60", "6.00", "10.60", "5.40", "33.0"),
    ("INV-CONFIRM", "2024-04-05", "4.60", "5.90", "10.70", "5.30", "33.0"),
    ("INV-CONFIRM", "2024-07-05", "4.70", "5.90", "10.80", "5.20", "33.0"),
    ("INV-NOSCORE", "2024-03-01", "4.60", "6.00", "10.60", "5.40", "33.0"),
    ("INV-COMPOSITE", "2024-04-05", "4.60", "6.00", "10.60", "5.40", "33.0"),
]


def measurements(studies) -> str:
    lines = [MEASUREMENT_HEADER]
    for code, day, distal_latency, distal_amp, proximal_latency, proximal_amp, temperature in studies:
        lines.append(
            f"{code},{day},median,right,motor,1,wrist,70,{distal_latency},{distal_amp},{temperature},2,cidp"
        )
        lines.append(
            f"{code},{day},median,right,motor,2,elbow,228,{proximal_latency},{proximal_amp},{temperature},2,cidp"
        )
    return "\n".join(lines) + "\n"


RELAPSE_TREATMENTS = """patient,therapy,start_date,end_date,dose,dose_unit,interval_days,note
INV-RELAPSE,ivig,2023-09-01,2024-05-31,1,g/kg,21,invented
INV-RELAPSE,ivig,2024-06-01,,1,g/kg,42,invented interval extension
"""
OTHER_TREATMENTS = """patient,therapy,start_date,end_date,dose,dose_unit,interval_days,note
INV-RESPONDER,ivig,2024-01-15,2024-01-19,2,g/kg,,invented induction
INV-RESPONDER,ivig,2024-02-05,,1,g/kg,21,invented maintenance
INV-STEROID,corticosteroid,2024-01-08,2024-04-07,60,mg,1,invented prednisolone course
INV-STEROID,ivig,2024-04-15,2024-04-19,2,g/kg,,invented induction
INV-STEROID,ivig,2024-05-10,,1,g/kg,21,invented maintenance
INV-CONFIRM,ivig,2024-01-08,,1,g/kg,21,invented
INV-NOSCORE,ivig,2023-06-01,,1,g/kg,21,invented
INV-COMPOSITE,ivig,2024-01-08,,1,g/kg,21,invented
"""


def grades(code: str, day: str, arm: int, leg: int, **others: float) -> list[str]:
    return [
        f"{code},{day},incat_arm,{arm}",
        f"{code},{day},incat_leg,{leg}",
        *[f"{code},{day},{s},{v}" for s, v in others.items()],
    ]


# Relapse: INCAT 1 → 3 (arm 0 → 1, leg 1 → 2), adjusted INCAT 1 → 2.
RELAPSE_SCORES = [
    *grades("INV-RELAPSE", "2023-08-20", 0, 1),
    *grades("INV-RELAPSE", "2024-05-15", 0, 1),
    *grades("INV-RELAPSE", "2024-09-10", 1, 2),
]
OTHER_SCORES = [
    # Responder: adjusted INCAT 4 → 2 → 1.
    *grades("INV-RESPONDER", "2024-01-10", 2, 3),
    *grades("INV-RESPONDER", "2024-04-10", 1, 2),
    *grades("INV-RESPONDER", "2024-07-10", 1, 1),
    # Steroid course without effect (adjusted INCAT 3 → 3), then IVIg (3 → 1).
    *grades("INV-STEROID", "2024-01-05", 2, 2),
    *grades("INV-STEROID", "2024-04-05", 2, 2),
    *grades("INV-STEROID", "2024-08-01", 1, 1),
    # Confirmation: adjusted INCAT 1 → 2 → 2.
    *grades("INV-CONFIRM", "2024-01-05", 1, 1),
    *grades("INV-CONFIRM", "2024-04-05", 1, 2),
    *grades("INV-CONFIRM", "2024-07-05", 1, 2),
    # Missing scores: the only grades come nine months after the start, and only totals before.
    "INV-NOSCORE,2023-05-20,incat,3",
    *grades("INV-NOSCORE", "2024-03-01", 1, 2),
    # Composite: only the I-RODS moves (+4 centile points); the left hand is the weaker one.
    *grades("INV-COMPOSITE", "2024-01-05", 1, 2, i_rods=50, grip_kpa_left=60, grip_kpa_right=70),
    *grades("INV-COMPOSITE", "2024-04-05", 1, 2, i_rods=54, grip_kpa_left=62, grip_kpa_right=70),
]


def scores(rows: list[str]) -> str:
    return "patient,date,scale,value\n" + "\n".join(rows) + "\n"


def write_files(folder: Path, studies, treatments: str, score_rows: list[str]) -> list[Path]:
    files = {
        "measurements.csv": measurements(studies),
        "treatments.csv": treatments,
        "scores.csv": scores(score_rows),
    }
    for name, text in files.items():
        (folder / name).write_text(text, encoding="utf-8")
    return [folder / name for name in files]


def response(capsys, url: str, *args: str) -> dict:
    code, out, err = run_cli(capsys, "--db", url, "response", *args, "--format", "json")
    assert code == 0, err
    return json.loads(out)


def text_lines(capsys, url: str, *args: str) -> list[str]:
    code, out, err = run_cli(capsys, "--db", url, "response", *args)
    assert code == 0, err
    return out.splitlines()


@pytest.fixture(scope="module", params=BACKENDS)
def clinic(request, tmp_path_factory) -> str:
    """A database per backend with the invented stories other than the relapse,
    imported by the ordinary importer."""
    folder = tmp_path_factory.mktemp(f"response_{request.param}")
    files = write_files(folder, OTHER_STUDIES, OTHER_TREATMENTS, OTHER_SCORES)
    for url in new_database(request.param, folder):
        migrate.upgrade(url)
        engine = make_engine(url)
        with make_session_factory(engine).begin() as session:
            for path in files:
                import_file(session, path, username=USER)
        engine.dispose()
        yield url


# -- Relapse after an interval extension, imported through the CLI -------------------------------------------


@pytest.fixture
def relapse_db(db_url, tmp_path, capsys) -> str:
    files = write_files(tmp_path, RELAPSE_STUDIES, RELAPSE_TREATMENTS, RELAPSE_SCORES)
    code, _, err = run_cli(capsys, "--db", db_url, "import", *map(str, files))
    assert code == 0, err
    return db_url


def test_relapse_is_attributed_to_the_stretched_regimen(relapse_db, capsys):
    payload = response(capsys, relapse_db, "INV-RELAPSE")
    assert payload["patient"] == "INV-RELAPSE" and payload["rules"] == "trial-aincat"
    by_interval = {r["interval_days"]: r for r in payload["regimens"]}
    assert by_interval[21]["classification"] == "stable"
    assert by_interval[42]["classification"] == "worsened"
    # PATH relapse: ≥1-point increase of the adjusted INCAT (van Schaik IN et al. Lancet Neurol 2018;17:35–46,
    # normatives.md §4.2): 0 + 1 = 1 on 2024-05-15 → 2 + max(1 − 1, 0) = 2 on 2024-09-10.
    [evidence] = by_interval[42]["evidence"]
    assert (evidence["scale"], evidence["baseline_date"], evidence["baseline_value"], evidence["value"]) == (
        "adjusted_incat",
        "2024-05-15",
        1.0,
        2.0,
    )
    assert evidence["verdict"] == "worsened" and "van Schaik" in evidence["source"]


def test_relapse_nerve_changes_against_the_smallest_detectable_change(relapse_db, capsys):
    payload = response(capsys, relapse_db, "INV-RELAPSE")
    changes = {c["parameter"]: c for c in payload["nerve_changes"] if c["where"] == "wrist → elbow"}
    before, after = 228 / (10.00 - 4.00), 228 / (11.35 - 4.00)  # hand arithmetic from the file's cells, m/s
    velocity = changes["segment_velocity"]
    assert (velocity["reference_value"], velocity["value"]) == (
        pytest.approx(before),
        pytest.approx(after, abs=1e-6),
    )
    assert velocity["change_pct"] == pytest.approx((after - before) / before * 100, abs=1e-5)  # −18.4 %
    # SDC 27.1 % = 2.77 × CoV 9.8 % (Kong X et al. BioMed Eng OnLine 2009;8:33,
    # normatives.md §3.1): within it.
    assert velocity["sdc"] == 27.1 and velocity["verdict"] == "within_noise"
    # Block: no published between-session SDC (normatives.md §3.2, gap): the change is shown, never flagged.
    block = changes["block_pct"]
    assert (block["reference_value"], block["value"]) == (pytest.approx(26.0), pytest.approx(56.0))
    assert block["sdc"] is None and block["verdict"] == "no_threshold"
    # The previous study is also the 42-day regimen's baseline: one comparison named both ways.
    assert {c["reference"] for c in payload["nerve_changes"]} == {"previous = regimen_baseline"}
    assert all(
        c["less_certain"] == "" for c in payload["nerve_changes"]
    )  # 0.2 °C apart, same filter, same distances


def test_relapse_text_names_the_regimen_and_fits_120_columns(relapse_db, capsys):
    lines = text_lines(capsys, relapse_db, "INV-RELAPSE", "--all-changes")
    assert any(line.startswith("▼ WORSENED") and "every 42 days" in line for line in lines)
    assert any(line.startswith("■ STABLE") and "every 21 days" in line for line in lines)
    assert max(len(line) for line in lines) <= 120
    assert any("qualified clinician" in line for line in lines)


def test_a_laboratory_reproducibility_file_replaces_the_sdc(relapse_db, tmp_path, capsys):
    # Invented laboratory figures (not for clinical use): velocity SDC 15 %, block SDC 20 percentage points.
    lab = tmp_path / "reproducibility.csv"
    lab.write_text(
        "parameter,sdc_pct,source\nsegment_velocity,15,invented laboratory study\n"
        "block_pct,20,invented laboratory study\n",
        encoding="utf-8",
    )
    payload = response(capsys, relapse_db, "INV-RELAPSE", "--reproducibility", str(lab))
    changes = {c["parameter"]: c for c in payload["nerve_changes"] if c["where"] == "wrist → elbow"}
    assert (changes["segment_velocity"]["sdc"], changes["segment_velocity"]["verdict"]) == (
        15.0,
        "worsened",
    )  # 18.4 % ≥ 15 %
    assert (changes["block_pct"]["sdc"], changes["block_pct"]["verdict"]) == (
        20.0,
        "worsened",
    )  # +30 points ≥ 20
    # A laboratory figure without a source is refused, naming row and column.
    lab.write_text("parameter,sdc_pct,source\nsegment_velocity,15,\n", encoding="utf-8")
    code, _, err = run_cli(
        capsys, "--db", relapse_db, "response", "INV-RELAPSE", "--reproducibility", str(lab)
    )
    assert code == 1 and "row 2, column 'source'" in err


def test_as_seen_on_an_earlier_visit(relapse_db, capsys):
    payload = response(capsys, relapse_db, "INV-RELAPSE", "--visit", "2024-05-15")
    assert payload["visit_date"] == "2024-05-15"
    assert [(r["interval_days"], r["classification"]) for r in payload["regimens"]] == [(21, "stable")]
    assert {s["date"] for s in payload["scores"] if s["date"] > "2024-05-15"} <= {"2024-09-10"}
    code, _, err = run_cli(capsys, "--db", relapse_db, "response", "INV-RELAPSE", "--visit", "2024-06-01")
    assert code == 1 and "no visit on 2024-06-01" in err


# -- The other invented stories (module database per backend) ------------------------------------------------


def test_responder_improved_from_the_baseline_before_the_induction(clinic, capsys):
    [regimen] = response(capsys, clinic, "INV-RESPONDER")["regimens"]
    assert (regimen["therapy"], regimen["dose"], regimen["interval_days"], regimen["classification"]) == (
        "ivig",
        1.0,
        21,
        "improved",
    )
    assert regimen["start_date"] == "2024-01-15" and regimen["induction"]["dose"] == 2.0
    # ICE response: adjusted INCAT improved ≥1 point from baseline (Hughes RAC et al. Lancet Neurol
    # 2008;7:136–144): 3 + (2 − 1) = 4 on 2024-01-10 → 1 + 0 = 1 on 2024-07-10.
    [evidence] = regimen["evidence"]
    assert (
        evidence["baseline_date"],
        evidence["baseline_value"],
        evidence["date"],
        evidence["value"],
        evidence["change"],
    ) == ("2024-01-10", 4.0, "2024-07-10", 1.0, -3.0)


def test_steroid_course_then_ivig_classified_per_regimen(clinic, capsys):
    payload = response(capsys, clinic, "INV-STEROID")
    assert [(r["therapy"], r["classification"]) for r in payload["regimens"]] == [
        ("corticosteroid", "stable"),
        ("ivig", "improved"),
    ]
    steroid, ivig = payload["regimens"]
    assert (steroid["end_date"], steroid["interval_days"]) == ("2024-04-07", 1)
    assert ivig["evidence"][0]["baseline_date"] == "2024-04-05" and ivig["evidence"][0]["value"] == 1.0


def test_missing_scores_are_not_assessable_and_named(clinic, capsys):
    [regimen] = response(capsys, clinic, "INV-NOSCORE")["regimens"]
    assert regimen["classification"] == "not_assessable" and regimen["classification"] != "stable"
    # Only an INCAT total before the start: the adjusted INCAT needs the grades.
    assert regimen["missing"] == [
        "adjusted INCAT score: no score from 90 days before the regimen started (2023-06-01) "
        "to 14 days after (baseline)"
    ]
    assert regimen["evidence"] == []
    lines = text_lines(capsys, clinic, "INV-NOSCORE")
    assert any(line.startswith("? NOT ASSESSABLE") for line in lines)


def test_confirmation_rule_set(clinic, capsys):
    # ADVANCE-CIDP 1 (NCT02549170 registry record): ≥1-point increase on 2 consecutive adjusted INCAT scores.
    once = response(
        capsys, clinic, "INV-CONFIRM", "--visit", "2024-04-05", "--rules", "trial-aincat-confirmed"
    )
    [regimen] = once["regimens"]
    assert regimen["classification"] == "not_assessable"  # a single worsening awaits its confirming visit
    assert "confirming visit is not recorded yet" in regimen["missing"][0]
    single = response(capsys, clinic, "INV-CONFIRM", "--visit", "2024-04-05")
    assert [r["classification"] for r in single["regimens"]] == [
        "worsened"
    ]  # trial-aincat: one score is enough
    twice = response(capsys, clinic, "INV-CONFIRM", "--rules", "trial-aincat-confirmed")
    [regimen] = twice["regimens"]
    assert twice["rules"] == "trial-aincat-confirmed" and regimen["classification"] == "worsened"
    assert regimen["evidence"][0]["confirmed_dates"] == ["2024-04-05", "2024-07-05"]


def test_composite_rule_set_i_rods_alone_improving(clinic, capsys):
    # ADHERE-style composite (Allen JA et al. Lancet Neurol 2024; thresholds from memory, not verified):
    # I-RODS +4 centile points is enough, the adjusted INCAT alone says stable.
    composite = response(capsys, clinic, "INV-COMPOSITE", "--rules", "trial-composite")
    [regimen] = composite["regimens"]
    assert regimen["classification"] == "improved"
    assert {e["rule_scale"]: e["outcome"] for e in regimen["evidence"]} == {
        "adjusted_incat": "stable",
        "i_rods": "improved",
        "grip_kpa_affected": "stable",
    }
    assert [r["classification"] for r in response(capsys, clinic, "INV-COMPOSITE")["regimens"]] == ["stable"]


def test_a_clinics_rule_set_file(clinic, tmp_path, capsys):
    # Invented local rule: MRC-free, 2 points of INCAT (not a published rule; a clinic's own choice).
    good = tmp_path / "clinic.csv"
    good.write_text(
        "rule_set,version,title,scale,threshold,comparator,change_kind,confirm_visits,required,source,status\n"
        'clinic-incat2,1,"INCAT 2 points",incat,2,>=,absolute,1,yes,'
        '"local rule, invented clinic, 2024",local\n',
        encoding="utf-8",
    )
    payload = response(capsys, clinic, "INV-RESPONDER", "--rules-file", str(good), "--rules", "clinic-incat2")
    [regimen] = payload["regimens"]
    assert payload["rules"] == "clinic-incat2" and regimen["classification"] == "improved"  # INCAT 5 → 2
    code, out, _ = run_cli(capsys, "--db", clinic, "response", "--list-rules", "--rules-file", str(good), "X")
    assert code == 0 and "clinic-incat2 (version 1, clinic.csv)" in out
    bad = tmp_path / "bad.csv"
    bad.write_text(
        "rule_set,version,title,scale,threshold,comparator,change_kind,confirm_visits,required,source,status\n"
        "clinic-bad,1,bad,adjusted_incat,1,>=,absolute,1,yes,local rule,local\n"
        "clinic-bad,1,bad,walking_speed,1,>=,absolute,1,yes,local rule,local\n",
        encoding="utf-8",
    )
    code, out, err = run_cli(capsys, "--db", clinic, "response", "INV-RESPONDER", "--rules-file", str(bad))
    assert code == 1 and out == ""
    assert "row 3, column 'scale'" in err and "walking_speed" in err


def test_unknown_rule_set_and_unknown_patient_exit_1(clinic, capsys):
    code, _, err = run_cli(capsys, "--db", clinic, "response", "INV-RESPONDER", "--rules", "no-such-rules")
    assert code == 1 and "no-such-rules" in err and "trial-aincat" in err
    code, _, err = run_cli(capsys, "--db", clinic, "response", "INV-NOBODY")
    assert code == 1 and "INV-NOBODY" in err


# -- The JSON contract (DESIGN.md §5) and the text width -----------------------------------------------------


@pytest.mark.parametrize(
    "code", ["INV-RESPONDER", "INV-STEROID", "INV-CONFIRM", "INV-NOSCORE", "INV-COMPOSITE"]
)
def test_json_follows_the_contract(clinic, capsys, code):
    payload = response(capsys, clinic, code)
    assert {"patient", "rules", "regimens", "scores"} <= set(payload)
    assert payload["patient"] == code and payload["regimens"]
    for regimen in payload["regimens"]:
        assert {
            "therapy",
            "start_date",
            "end_date",
            "dose",
            "dose_unit",
            "interval_days",
            "classification",
            "evidence",
        } <= set(regimen)
        assert regimen["classification"] in CLASSIFICATIONS
        dt.date.fromisoformat(regimen["start_date"])
        assert isinstance(regimen["evidence"], list)
    for score in payload["scores"]:
        assert {"date", "scale", "value"} <= set(score)
        dt.date.fromisoformat(score["date"])
    # The computed adjusted INCAT stands beside the recorded grades, on every day both grades were recorded.
    graded_days = {s["date"] for s in payload["scores"] if s["scale"] == "incat_arm" and not s["computed"]}
    adjusted_days = {s["date"] for s in payload["scores"] if s["scale"] == "adjusted_incat" and s["computed"]}
    assert graded_days and adjusted_days == graded_days
    assert "qualified clinician" in payload["caution"]


def test_json_is_the_service_result(clinic):
    engine = make_engine(clinic)
    try:
        with make_session_factory(engine)() as session:
            payload = response_json(patient_response(session, "INV-STEROID"))
    finally:
        engine.dispose()
    assert json.loads(json.dumps(payload)) == payload  # plain JSON types only


@pytest.mark.parametrize("rules_id", ["trial-aincat", "trial-aincat-confirmed", "trial-composite"])
def test_text_fits_120_columns(clinic, capsys, rules_id):
    for code in ("INV-RESPONDER", "INV-STEROID", "INV-CONFIRM", "INV-NOSCORE", "INV-COMPOSITE"):
        lines = text_lines(capsys, clinic, code, "--rules", rules_id, "--all-changes")
        too_long = [line for line in lines if len(line) > 120]
        assert too_long == [], (code, too_long)


# -- The demo clinic shows every state (demo_data/README.md; invented data) ----------------------------------


def test_the_demo_shows_every_classification(db_url, capsys):
    code, _, err = run_cli(
        capsys,
        "--db",
        db_url,
        "import",
        *(str(DEMO / n) for n in ("measurements.csv", "treatments.csv", "scores.csv")),
    )
    assert code == 0, err
    states = {}
    for patient in ("DEMO-01", "DEMO-02", "DEMO-03", "DEMO-05"):
        states[patient] = {
            (r["therapy"], r["interval_days"], r["start_date"]): r["classification"]
            for r in response(capsys, db_url, patient)["regimens"]
        }
    assert states["DEMO-01"] == {("ivig", 21, "2023-02-20"): "improved"}
    assert states["DEMO-02"][("ivig", 35, "2024-02-02")] == "worsened"
    assert states["DEMO-03"][("scig", 7, "2023-01-11")] == "stable"
    assert set(states["DEMO-05"].values()) == {"not_assessable"}
    # DEMO-02, 2024-01-16 → 2024-05-21: the arm grade 0 → 1 raises the INCAT by one point but not the adjusted
    # INCAT (ICE, Hughes RAC et al. Lancet Neurol 2008;7:136–144, normatives.md §4.1).
    by_day = {(s["date"], s["scale"]): s["value"] for s in response(capsys, db_url, "DEMO-02")["scores"]}
    assert (by_day[("2024-01-16", "incat_arm")], by_day[("2024-05-21", "incat_arm")]) == (0.0, 1.0)
    assert by_day[("2024-05-21", "incat")] - by_day[("2024-01-16", "incat")] == 1.0
    assert by_day[("2024-05-21", "adjusted_incat")] == by_day[("2024-01-16", "adjusted_incat")] == 2.0


# -- What was shown is kept: rule set, version, visits compared (saved by the response command, audited) -----


def test_response_command_saves_each_classification_once_and_audits_changes(relapse_db, tmp_path, capsys):
    from sqlalchemy import select

    from tracker.db.models import AuditEvent, ResponseAssessment

    payload = response(capsys, relapse_db, "INV-RELAPSE")
    response(capsys, relapse_db, "INV-RELAPSE")  # the same judgement again: nothing new is written
    engine = make_engine(relapse_db)
    try:
        with make_session_factory(engine)() as session:
            rows = session.scalars(
                select(ResponseAssessment).order_by(ResponseAssessment.regimen_start)
            ).all()
            saved = {
                (
                    r.regimen_start.isoformat(),
                    r.classification,
                    r.rule_set,
                    r.rule_set_version,
                    r.judged_on.isoformat(),
                    tuple(r.visits_compared),
                )
                for r in rows
            }
            shown = {
                (
                    g["start_date"],
                    g["classification"],
                    payload["rules"],
                    payload["rules_version"],
                    payload["visit_date"],
                    tuple(g["visits_compared"]),
                )
                for g in payload["regimens"]
            }
            assert saved == shown and len(rows) == len(payload["regimens"])
            events = session.scalars(select(AuditEvent).where(AuditEvent.action == "save_response")).all()
            assert len(events) == len(rows) and all(
                e.username and e.after["classification"] in CLASSIFICATIONS for e in events
            )
    finally:
        engine.dispose()
    # A corrected score changes the judgement of the same day: the saved row
    # is updated, before → after audited.
    day = payload["visit_date"]
    (tmp_path / "fix.csv").write_text(
        f"patient,date,scale,value\nINV-RELAPSE,{day},incat_leg,1\n", encoding="utf-8"
    )
    code, _, err = run_cli(capsys, "--db", relapse_db, "import", "--replace", str(tmp_path / "fix.csv"))
    assert code == 0, err
    after = response(capsys, relapse_db, "INV-RELAPSE")
    stretched = next(g for g in after["regimens"] if g["interval_days"] == 42)
    engine = make_engine(relapse_db)
    try:
        with make_session_factory(engine)() as session:
            row = session.scalars(
                select(ResponseAssessment).where(
                    ResponseAssessment.regimen_start == dt.date.fromisoformat(stretched["start_date"])
                )
            ).one()
            assert row.classification == stretched["classification"]
            changed = [
                e
                for e in session.scalars(select(AuditEvent).where(AuditEvent.action == "save_response"))
                if e.before
            ]
            assert changed and all(
                e.before["classification"] != e.after["classification"]
                or e.before["visits_compared"] != e.after["visits_compared"]
                for e in changed
            )
    finally:
        engine.dispose()
