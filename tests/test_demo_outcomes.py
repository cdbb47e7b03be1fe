"""`ncs-tracker check` on invented demo patients, against outcomes worked out by hand from the CSV cells.

Each test recomputes the deciding values with plain arithmetic from demo_data/measurements.csv (invented
data), applies the published thresholds as written, and compares with the tool's JSON output.
Thresholds: EFNS/PNS 2010 CIDP guideline (Van den Bergh PYK et al., Eur J Neurol 2010;17:356–363) and
EFNS/PNS 2010 MMN guideline (J Peripher Nerv Syst 2010;15:295–301). Normal limits: Preston & Shapiro
appendix (median/ulnar verified; fibular/tibial from memory, not verified).
"""

from __future__ import annotations

import csv
import json

import pytest

from conftest import DEMO, run_cli

ULN_DML = {"median": 4.4, "ulnar": 3.3, "fibular": 6.5, "tibial": 5.8}
LLN_CV = {"median": 49, "ulnar": 49, "fibular": 44, "tibial": 41}
ULN_F = {"median": 31, "ulnar": 32, "fibular": 56, "tibial": 56}
LLN_CMAP = {"median": 4.0, "ulnar": 6.0, "fibular": 2.0, "tibial": 4.0}
DURATION_2010 = {"median": 6.6, "ulnar": 6.7, "fibular": 7.6, "tibial": 8.8}


def motor_rows(patient: str, date: str, side: str = "right") -> dict[str, list[dict[str, str]]]:
    with open(DEMO / "measurements.csv", encoding="utf-8", newline="") as handle:
        rows = [
            r
            for r in csv.DictReader(handle)
            if r["patient"] == patient
            and r["visit_date"] == date
            and r["modality"] == "motor"
            and r["side"] == side
        ]
    by_nerve: dict[str, list[dict[str, str]]] = {}
    for row in sorted(rows, key=lambda r: int(r["site_order"])):
        by_nerve.setdefault(row["nerve"], []).append(row)
    return by_nerve


@pytest.fixture
def demo_db(db_url, capsys):
    files = [str(DEMO / n) for n in ("measurements.csv", "treatments.csv", "scores.csv")]
    assert run_cli(capsys, "--db", db_url, "import", *files)[0] == 0
    return db_url


def check(capsys, url, patient, date, criteria):
    code, out, err = run_cli(
        capsys, "--db", url, "check", patient, "--visit", date, "--criteria", criteria, "--format", "json"
    )
    assert code == 0, err
    return json.loads(out)


def test_demo_01_baseline_is_definite_by_distal_latency(demo_db, capsys):
    nerves = motor_rows("DEMO-01", "2023-02-14")
    # By hand: median 7.05 ≥ 1.5 × 4.4 = 6.6; ulnar 5.01 ≥ 1.5 × 3.3 = 4.95;
    # fibular 10.95 ≥ 9.75; tibial 9.46 ≥ 8.7.
    prolonged = [
        n for n, sites in nerves.items() if float(sites[0]["latency_ms"]) >= round(1.5 * ULN_DML[n], 6)
    ]
    assert sorted(prolonged) == ["fibular", "median", "tibial", "ulnar"]
    # median forearm CV by hand: 222 mm / (14.00 − 7.05) ms = 31.9 m/s ≤ 0.7 × 49 = 34.3 m/s
    median = nerves["median"]
    assert float(median[1]["distance_mm"]) / (
        float(median[1]["latency_ms"]) - float(median[0]["latency_ms"])
    ) == pytest.approx(31.94, abs=0.01)
    result = check(capsys, demo_db, "DEMO-01", "2023-02-14", "efns-pns-2010-cidp")
    assert result["outcome"] == "definite"
    assert result["rule"] == "(a) distal latency in ≥ 2 nerves"
    dml = {
        n["nerve"]: f
        for n in result["nerves"]
        if n["modality"] == "motor"
        for f in n["findings"]
        if f["item"] == "dml"
    }
    assert {n: f["status"] for n, f in dml.items()} == {n: "met" for n in prolonged}
    assert dml["median"]["threshold"] == 6.6 and dml["median"]["limit"] == 4.4


def test_demo_06_last_visit_meets_no_item(demo_db, capsys):
    nerves = motor_rows("DEMO-06", "2025-09-30")
    for nerve, sites in nerves.items():
        distal, proximal = sites[0], sites[1]
        dml = float(distal["latency_ms"])
        cv = float(proximal["distance_mm"]) / (float(proximal["latency_ms"]) - dml)
        f = float(distal["f_latency_ms"])
        drop = (
            (float(distal["amplitude_mv"]) - float(proximal["amplitude_mv"]))
            / float(distal["amplitude_mv"])
            * 100
        )
        rise = (
            (float(proximal["duration_ms"]) - float(distal["duration_ms"]))
            / float(distal["duration_ms"])
            * 100
        )
        # By hand, every value on the normal side of its EFNS/PNS 2010 threshold (the median distal latency
        # is also excluded: the clinician recorded neuropathy at the wrist on this visit):
        assert dml < 1.5 * ULN_DML[nerve], nerve  # e.g. ulnar 3.38 < 4.95
        assert cv > 0.7 * LLN_CV[nerve], nerve  # e.g. median 240 / (10.44 − 5.69) = 50.5 > 34.3
        assert f < 1.3 * ULN_F[nerve], nerve  # e.g. fibular 56.7 < 72.8
        assert drop < 30, nerve  # e.g. tibial (9.0 − 6.9) / 9.0 = 23.3 %
        assert rise <= 30, nerve  # e.g. tibial (7.7 − 6.2) / 6.2 = 24.2 %
        assert float(distal["duration_ms"]) < DURATION_2010[nerve], nerve
    assert nerves["median"][0]["wrist_entrapment"] == "yes"
    result = check(capsys, demo_db, "DEMO-06", "2025-09-30", "efns-pns-2010-cidp")
    assert result["outcome"] == "not_met"
    median_dml = next(
        f
        for n in result["nerves"]
        if n["nerve"] == "median" and n["modality"] == "motor"
        for f in n["findings"]
        if f["item"] == "dml"
    )
    assert median_dml["status"] == "not_applicable" and "wrist" in median_dml["reason"]
    assert result["closest_miss"]  # the nearest not-met finding is named


def test_demo_04_forearm_block_is_definite_mmn(demo_db, capsys):
    ulnar = motor_rows("DEMO-04", "2024-02-20", side="left")["ulnar"]
    wrist, below = ulnar[0], ulnar[1]
    area_drop = (float(wrist["area_mvms"]) - float(below["area_mvms"])) / float(wrist["area_mvms"]) * 100
    duration_rise = (
        (float(below["duration_ms"]) - float(wrist["duration_ms"])) / float(wrist["duration_ms"]) * 100
    )
    # By hand: area (26.7 − 10.0) / 26.7 = 62.5 % ≥ 50 %; duration (7.4 − 6.4) / 6.4 = 15.6 % ≤ 30 %;
    # distal CMAP 7.5 mV > 20 % of LLN 6.0 (1.2 mV) and > 1 mV; wrist → below elbow is not an entrapment site.
    assert area_drop == pytest.approx(62.55, abs=0.01)
    assert duration_rise == pytest.approx(15.62, abs=0.01)
    assert float(wrist["amplitude_mv"]) > max(0.2 * LLN_CMAP["ulnar"], 1.0)
    result = check(capsys, demo_db, "DEMO-04", "2024-02-20", "efns-pns-2010-mmn")
    assert result["outcome"] == "definite"
