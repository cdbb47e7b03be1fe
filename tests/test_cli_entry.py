"""The installed console script, run as a separate process (the way a clinic runs it)."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from conftest import DEMO

SCRIPT = shutil.which("ncs-tracker", path=str(Path(sys.executable).parent)) or shutil.which("ncs-tracker")


def _run(*args: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess:
    assert SCRIPT, "the ncs-tracker console script is not installed (pip install -e .)"
    full_env = {**os.environ, **(env or {})}
    return subprocess.run([SCRIPT, *args], capture_output=True, text=True, env=full_env, timeout=120)


def test_help_names_the_commands():
    result = _run("--help")
    assert result.returncode == 0
    for command in ("db", "import", "show", "demo"):
        assert command in result.stdout
    assert "qualified clinician" in result.stdout


def test_usage_error_exits_2():
    result = _run("show")
    assert result.returncode == 2
    assert "Missing argument" in result.stderr


def test_default_database_path_is_printed_and_env_var_is_honoured(tmp_path):
    env = {"XDG_DATA_HOME": str(tmp_path / "data"), "NCS_TRACKER_DB": ""}
    env.pop("NCS_TRACKER_DB")
    clean = {k: v for k, v in os.environ.items() if k != "NCS_TRACKER_DB"}
    clean["XDG_DATA_HOME"] = str(tmp_path / "data")
    result = subprocess.run([SCRIPT, "db", "upgrade"], capture_output=True, text=True, env=clean, timeout=120)
    assert result.returncode == 0, result.stderr
    expected = tmp_path / "data" / "ncs-tracker" / "ncs-tracker.sqlite3"
    assert str(expected) in result.stderr
    assert expected.exists()

    other = tmp_path / "other.sqlite3"
    result = _run("db", "upgrade", env={"NCS_TRACKER_DB": f"sqlite:///{other}"})
    assert result.returncode == 0, result.stderr
    assert other.exists()
    assert "default" not in result.stderr


def test_upgrade_import_show_round_trip(tmp_path):
    url = f"sqlite:///{tmp_path / 'clinic.sqlite3'}"
    assert _run("--db", url, "db", "upgrade").returncode == 0
    result = _run("--db", url, "import", str(DEMO / "measurements.csv"), str(DEMO / "treatments.csv"))
    assert result.returncode == 0, result.stderr
    assert "added 29 visits" in result.stdout
    result = _run("--db", url, "show", "DEMO-04")
    assert result.returncode == 0, result.stderr
    assert "ulnar left: wrist → below elbow" in result.stdout  # sites in words (issue 10, item 12)
    assert "CV (m/s)" in result.stdout


def test_bad_input_gives_a_message_not_a_traceback(tmp_path):
    url = f"sqlite:///{tmp_path / 'clinic.sqlite3'}"
    assert _run("--db", url, "db", "upgrade").returncode == 0
    bad = tmp_path / "bad.csv"
    bad.write_bytes("patient,visit_date,nerve\nT-1,2024-01-01,m\xe9dian\n".encode("latin-1"))
    result = _run("--db", url, "import", str(bad))
    assert result.returncode == 1
    assert "not UTF-8" in result.stderr
    assert "Traceback" not in result.stderr + result.stdout


@pytest.mark.slow
def test_demo_builds_a_fresh_database_each_time(tmp_path):
    path = tmp_path / "demo.sqlite3"
    for _ in range(2):
        result = _run("demo", "--path", str(path), "--no-serve")
        assert result.returncode == 0, result.stderr
        assert "added 29 visits" in result.stderr  # fresh each time: never "unchanged"
    assert "DEMO-06" in result.stdout and "invented" in result.stdout


def test_serve_refuses_a_database_without_schema(tmp_path):
    # Before starting a server: one line naming the command to run, exit 1, no traceback.
    result = _run("--db", f"sqlite:///{tmp_path / 'missing.sqlite3'}", "serve", "--port", "8599")
    assert result.returncode == 1
    assert "ncs-tracker db upgrade" in result.stderr and "Traceback" not in result.stderr


def test_import_help_cites_only_what_the_repository_holds():
    """Issue 10, item 16: `import --help` must not send the reader to a file absent from the repository."""
    import re

    from conftest import ROOT

    result = _run("import", "--help")
    assert result.returncode == 0, result.stderr
    text = " ".join(result.stdout.split())
    cited = set(re.findall(r"[\w./-]+\.(?:md|csv|py|toml|txt)\b", text)) | set(
        re.findall(r"\b[\w.-]+/(?=\s|$)", text)
    )
    if "README" in text:
        cited.add("README.md")
    assert cited, text  # the help does point somewhere: the check below is not vacuous
    for name in cited:
        assert (ROOT / name).exists() or (ROOT / "tracker" / name).exists(), (
            f"{name} is cited but not in the repository"
        )
    for heading in re.findall(r'README \("([^"]+)"\)', text):
        assert re.search(
            rf"^#+ {re.escape(heading)}$", (ROOT / "README.md").read_text(encoding="utf-8"), re.M
        ), heading
    assert "§" not in text, text  # a section sign points into a document the repository does not hold


@pytest.mark.slow
def test_demo_without_serving_prints_commands_that_work_on_the_demo_database(tmp_path):
    """Issue 10, item 16: the printed `show` and `check` commands name the demo database (`check DEMO-01`
    alone answered "no database file"); run exactly as printed, from a folder with a space in its name."""
    import shlex

    path = tmp_path / "demo folder" / "demo.sqlite3"
    result = _run("demo", "--path", str(path), "--no-serve")
    assert result.returncode == 0, result.stderr
    printed = [shlex.split(line) for line in result.stdout.splitlines() if line.startswith("  ncs-tracker ")]
    commands = {words[3]: words for words in printed}
    assert set(commands) == {"show", "check", "serve"}, result.stdout
    elsewhere = {"XDG_DATA_HOME": str(tmp_path / "elsewhere"), "NCS_TRACKER_DB": ""}
    for name in ("show", "check"):
        ran = _run(*commands[name][1:], env=elsewhere)
        assert ran.returncode == 0, (commands[name], ran.stderr)
        assert "DEMO-01" in ran.stdout and "no database file" not in ran.stderr, ran.stderr
    exported = [line for line in result.stdout.splitlines() if "export NCS_TRACKER_DB=" in line]
    assert len(exported) == 1, result.stdout
    url = shlex.split(exported[0].split("export ", 1)[1])[0].split("=", 1)[1]
    ran = _run("check", "DEMO-01", env={**elsewhere, "NCS_TRACKER_DB": url})
    assert ran.returncode == 0 and "no database file" not in ran.stderr, ran.stderr
