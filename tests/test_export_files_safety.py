"""Export files on disk (issue 11): created exclusively in the target folder, never through a planted link,
readable by their owner only, renamed into place, and reported by their full path — on both backends.

Finding reproduced before the fix: a link named like the export's temporary file
(``ncs-export-visit.csv.partial``) made the export overwrite the link's target. The clinic is the invented
demo clinic (demo_data/).
"""

from __future__ import annotations

import os
import stat
import tempfile
from pathlib import Path

import pytest

from conftest import DEMO, run_cli
from tracker.errors import TrackerError
from tracker.services.export import deidentify, write_export
from tracker.services.export import files as export_files
from tracker.services.export.tables import ExportOptions
from tracker.services.importing import import_file

USER = "export-safety-tester"
VICTIM_TEXT = "a file the exporting user can write but never meant to change\n"
FORMATS = ("csv", "parquet", "xlsx")


@pytest.fixture
def clinic(sessions):
    with sessions.begin() as session:
        import_file(session, DEMO / "measurements.csv", username=USER)
    return sessions


@pytest.fixture
def usual_umask():
    """Run with the common umask 022, under which a plain ``open`` creates world-readable files."""
    previous = os.umask(0o022)
    yield
    os.umask(previous)


def export(sessions, out: Path | str, file_format: str = "csv", **options):
    with sessions.begin() as session:
        return write_export(
            session, ExportOptions(level="visit", **options), file_format=file_format, out=out, username=USER
        )


def victim(tmp_path: Path) -> Path:
    path = tmp_path / "victim.txt"
    path.write_text(VICTIM_TEXT, encoding="utf-8")
    return path


@pytest.mark.parametrize("file_format", FORMATS)
def test_links_at_the_former_temporary_names_are_left_alone(clinic, tmp_path, file_format):
    """The finding's attack: a link at ``<file>.partial`` for every file of the export."""
    target = victim(tmp_path)
    out = tmp_path / "exports"
    out.mkdir()
    names = [f"ncs-export-visit.{file_format}", f"ncs-export-visit.{file_format}.manifest.json"]
    names += [f"ncs-export-visit.{file_format}.{table}.csv" for table in ("limits", "criteria")]
    if file_format != "xlsx":
        names.append(f"ncs-export-visit.{file_format}.dictionary.csv")
    for name in names:
        (out / f"{name}.partial").symlink_to(target)
    result = export(clinic, out, file_format)
    assert target.read_text(encoding="utf-8") == VICTIM_TEXT
    for written in result.files:
        assert not written.path.is_symlink() and written.path.stat().st_size > 0
    for name in names:
        assert (out / f"{name}.partial").is_symlink()


def test_a_link_at_the_exact_temporary_name_is_not_followed(clinic, tmp_path, monkeypatch):
    """Even when the temporary name is guessed: creation is exclusive, so a planted link makes that name fail
    and another is taken. (The name generator is made predictable through tempfile's candidate-name hook.)"""
    target = victim(tmp_path)
    out = tmp_path / "exports"
    out.mkdir()
    guesses = [f"guess{i}" for i in range(50)]
    monkeypatch.setattr(tempfile, "_get_candidate_names", lambda: iter(guesses))
    names = [
        "ncs-export-visit.csv",
        "ncs-export-visit.csv.criteria.csv",
        "ncs-export-visit.csv.dictionary.csv",
        "ncs-export-visit.csv.limits.csv",
        "ncs-export-visit.csv.manifest.json",
    ]
    for name in names:
        for guess in guesses[:3]:
            (out / f".{name}.{guess}.partial").symlink_to(target)
    export(clinic, out)
    assert target.read_text(encoding="utf-8") == VICTIM_TEXT
    assert sorted(p.name for p in out.iterdir() if not p.is_symlink()) == names


def test_a_link_at_a_final_name_is_refused_or_replaced_never_written_through(clinic, tmp_path):
    target = victim(tmp_path)
    out = tmp_path / "exports"
    out.mkdir()
    planted = out / "ncs-export-visit.csv"
    planted.symlink_to(tmp_path / "nowhere.txt")  # dangling: Path.exists() says False
    with pytest.raises(TrackerError, match="already exists"):
        export(clinic, out)
    assert planted.is_symlink() and not (tmp_path / "nowhere.txt").exists()
    planted.unlink()
    planted.symlink_to(target)
    with clinic.begin() as session:
        result = write_export(
            session, ExportOptions(level="visit"), file_format="csv", out=out, username=USER, overwrite=True
        )
    assert target.read_text(encoding="utf-8") == VICTIM_TEXT
    assert not planted.is_symlink() and result.files[0].path == planted and planted.stat().st_size > 0


@pytest.mark.parametrize("file_format", FORMATS)
def test_every_export_file_is_readable_by_its_owner_only(clinic, tmp_path, usual_umask, file_format):
    result = export(clinic, tmp_path / "out", file_format)
    # data, (dictionary,) limits table, criteria table, manifest
    assert len(result.files) == (4 if file_format == "xlsx" else 5)
    for written in result.files:
        assert stat.S_IMODE(written.path.stat().st_mode) == 0o600, written.path


def test_an_identified_export_is_readable_by_its_owner_only(clinic, tmp_path, usual_umask, monkeypatch):
    """Finding: identified exports were created world-readable (644). Permission to receive one is tested
    with the accounts; here it is granted so that the files can be inspected."""
    monkeypatch.setattr(deidentify, "require_identified_permission", lambda *args, **kwargs: "coordinator")
    result = export(clinic, tmp_path / "out", "csv", identified=True)
    assert result.manifest["identified"] is True
    assert "DEMO-01" in result.files[0].path.read_text(encoding="utf-8")  # identified: the clinic's codes
    for written in result.files:
        assert stat.S_IMODE(written.path.stat().st_mode) == 0o600, written.path


def test_no_temporary_file_is_left_behind(clinic, tmp_path, monkeypatch):
    out = tmp_path / "out"
    out.mkdir()
    export(clinic, out)
    assert len(list(out.iterdir())) == 5 and not [p for p in out.iterdir() if p.name.endswith(".partial")]

    def broken(self, frame):
        raise RuntimeError("disk full (simulated)")

    monkeypatch.setattr(export_files.CsvTable, "append", broken)
    failed = tmp_path / "failed"
    failed.mkdir()
    with pytest.raises(RuntimeError):
        export(clinic, failed)
    assert list(failed.iterdir()) == []


def test_files_are_reported_by_their_full_path(clinic, db_url, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    result = export(clinic, "exports/")
    for written in result.files:
        assert written.path.is_absolute() and written.path.parent == tmp_path / "exports"
    code, out, err = run_cli(capsys, "--db", db_url, "export", "--out", "again/", "--format", "parquet")
    assert code == 0, err
    assert f"data: {tmp_path / 'again' / 'ncs-export-visit.parquet'} (" in out
    assert f"manifest: {tmp_path / 'again' / 'ncs-export-visit.parquet.manifest.json'} (" in out
