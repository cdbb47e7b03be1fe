"""The whole-tool benchmark runs end to end (a smoke test, not timed): every step on a tiny invented cohort
on SQLite, and its one table printed with a number in every ratio cell. Also: the invented cohort generator
shared by the benchmark and the tests is deterministic and a larger cohort extends a smaller one."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

from tracker import synthetic

ROOT = Path(__file__).resolve().parent.parent
STEPS = (
    "import (3 files)",
    "criteria engine (6 sets, in memory)",
    "evaluate command (6 sets, saved)",
    "follow-up page (AppTest)",
    "patients page (AppTest)",
    "check one visit (wall)",
    "export per visit (nerve, csv)",
    "response per patient",
    "peak memory: import (10 × data)",
    "peak memory: evaluate (10 × data)",
    "peak memory: export (10 × data)",
    "peak memory: response (10 × data)",
    "database bytes per visit",
)


def test_the_benchmark_prints_its_table_on_a_tiny_cohort():
    command = [sys.executable, str(ROOT / "benchmarks" / "tool_benchmark.py"), "--backend", "sqlite"]
    command += ["--patients", "3", "--small", "2", "--smoke"]
    finished = subprocess.run(command, capture_output=True, text=True, cwd=ROOT, timeout=600)
    assert finished.returncode == 0, finished.stderr[-3000:]
    out = finished.stdout
    assert "ncs-tracker tool benchmark — sqlite, 3 invented patients" in out
    assert "invented data" in out
    lines = {line.split("  ")[0]: line for line in out.splitlines()}
    for step in STEPS:
        assert step in lines, f"{step!r} missing from:\n{out}"
        ratio = re.search(r"\s(\d+\.\d\d)\s+(≤ [\d.]+|—)\s+(ok|MISSED|info)$", lines[step])
        assert ratio, lines[step]
        assert float(ratio.group(1)) > 0


def test_the_invented_cohort_is_deterministic_and_extends_by_prefix():
    small = list(synthetic.cohort(4))
    large = list(synthetic.cohort(9))
    assert [p.code for p in small] == ["SYN-TARGET", "SYN-00001", "SYN-00002", "SYN-00003"]
    assert small == large[:4]
    assert [synthetic.measurement_rows(p) for p in small] == [
        synthetic.measurement_rows(p) for p in large[:4]
    ]
    target = small[0]
    assert len(target.visits) == synthetic.TARGET_VISITS
    rows = synthetic.measurement_rows(target)
    assert len(rows) == synthetic.TARGET_VISITS * synthetic.SITES_PER_VISIT
    assert all(len(row) == len(synthetic.MEASUREMENT_HEADER) for row in rows)


def test_the_invented_courses_follow_their_diagnosis():
    """GBS recovers after its first visit; the followed patient relapses while the interval is stretched."""
    patients = [synthetic.cohort_patient(n) for n in range(1, 400)]
    gbs = [p for p in patients if p.diagnosis == "gbs"]
    assert gbs and all(p.visits[-1][1] < p.visits[0][1] for p in gbs)
    target = synthetic.followed_patient()
    severity = [s for _, s in target.visits]
    assert severity[8] < severity[0] and severity[20] > severity[15] and severity[-1] < severity[20]


def test_the_step_profiles_run_on_a_tiny_cohort():
    """benchmarks/profile_steps.py (where import and the engine spend their time): every listing printed."""
    command = [sys.executable, str(ROOT / "benchmarks" / "profile_steps.py"), "--backend", "sqlite"]
    command += ["--patients", "3", "--top", "3"]
    finished = subprocess.run(command, capture_output=True, text=True, cwd=ROOT, timeout=600)
    assert finished.returncode == 0, finished.stderr[-3000:]
    out = finished.stdout
    assert "import under cProfile: wall" in out
    assert "engine, six sets under cProfile: wall" in out
    assert out.count("our functions by cumulative time") == 2
    assert "tracker/services/importing/" in out and "tracker/criteria/engine.py" in out
    assert ".venv" not in out  # library functions are never listed as ours
    lines = [line for line in out.splitlines() if "+ foreign keys on (the real tables)" in line]
    assert len(lines) == 1 and re.search(r"\d+\.\d\d s", lines[0])
