"""`ncs-tracker show`: words for people (issue 10, item 12) — sites, nerves, therapies and scales in words,
table headers with units, numbers at clinical precision; identifiers stay in JSON and exports."""

from __future__ import annotations

import re

import pytest

from conftest import run_cli
from dashboard_support import demo_csv_rows
from tracker.services.demo import DEMO_FILES, demo_data_dir

IDENTIFIER = re.compile(r"\b[a-z]+_[a-z_]+\b")  # any snake_case identifier (common practice, no source)
DEMO_CODES = [f"DEMO-0{i}" for i in range(1, 7)]  # the invented demo clinic


@pytest.fixture
def demo_db(db_url, capsys) -> str:
    code, _, err = run_cli(
        capsys, "--db", db_url, "import", *(str(demo_data_dir() / name) for name in DEMO_FILES)
    )
    assert code == 0, err
    return db_url


def test_show_prints_no_identifier_for_any_demo_patient(demo_db, capsys):
    for code in DEMO_CODES:
        status, out, err = run_cli(capsys, "--db", demo_db, "show", code)
        assert status == 0, err
        assert IDENTIFIER.findall(out) == [], code


def test_show_words_units_and_clinical_precision(demo_db, capsys):
    # Invented demo cells (demo_data/measurements.csv), DEMO-01 2023-02-14 median right motor: wrist 7.05 ms,
    # elbow 14.00 ms, 222 mm apart → 222 / 6.95 = 31.94 m/s, printed at 1 decimal (velocities) and the
    # latency at 2 (issue 10, item 12; common practice, no source).
    rows = demo_csv_rows("DEMO-01", "2023-02-14", "median", "right", "motor")
    assert [r["latency_ms"] for r in rows] == ["7.05", "14.00"] and rows[1]["distance_mm"] == "222"
    status, out, err = run_cli(capsys, "--db", demo_db, "show", "DEMO-01", "--visit", "2023-02-14")
    assert status == 0, err
    segment = next(line for line in out.splitlines() if "median right: wrist → elbow" in line)
    assert f"{222 / (14.00 - 7.05):.1f}" in segment.split() and "31.94" not in segment
    motor = next(
        line for line in out.splitlines() if line.strip().startswith("median right") and "→" not in line
    )
    assert "7.05" in motor.split()
    # Headers carry units; sites, scales and therapies are words.
    for header in ("CV (m/s)", "distal latency (ms)", "CMAP (mV)", "SNAP (µV)", "F-wave latency (ms)"):
        assert header in out
    ulnar = [r for r in demo_csv_rows("DEMO-01", "2023-02-14", "ulnar", "right", "motor")]
    assert ulnar[1]["site"] == "below_elbow"  # the identifier in the file …
    assert "ulnar right: wrist → below elbow" in out  # … is words on the screen
    assert "INCAT disability score (points)" in out
    assert "IVIg" in out and "ivig" not in out
    assert "qualified clinician" in out  # the caution stays


def test_show_words_a_fibular_site_and_grip_strength(demo_db, capsys):
    # DEMO-04 (invented MMN patient): fibular segment "ankle → below_fibular_head" and grip strength per hand.
    status, out, err = run_cli(capsys, "--db", demo_db, "show", "DEMO-04")
    assert status == 0, err
    assert "fibular right: ankle → below fibular head" in out and "below_fibular_head" not in out
    assert "grip strength, left hand (kPa)" in out and "grip_kpa_left" not in out
