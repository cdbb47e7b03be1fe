"""Importing good files: demo clinic, idempotent re-import, replacement with history, xlsx, encodings."""

from __future__ import annotations

import csv
import datetime as dt
from pathlib import Path

import openpyxl
import pytest
from sqlalchemy import func, select

from conftest import DEMO, fingerprint, run_cli
from tracker.db.models import (
    AuditEvent,
    NerveTest,
    OutcomeScore,
    Patient,
    StimulationSite,
    Treatment,
    Visit,
    VisitRevision,
)
from tracker.services.records import patient_record

DEMO_FILES = [DEMO / "measurements.csv", DEMO / "treatments.csv", DEMO / "scores.csv"]


def _count(sessions, model) -> int:
    with sessions() as session:
        return session.scalar(select(func.count()).select_from(model))


def _demo_rows() -> list[dict[str, str]]:
    with open(DEMO / "measurements.csv", encoding="utf-8", newline="") as handle:
        return list(csv.DictReader(handle))


def _write_rows(path: Path, rows: list[dict[str, str]]) -> Path:
    """Rows of the measurements file written back as CSV, header from the first row."""
    with open(path, "w", encoding="utf-8", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=list(rows[0]))
        writer.writeheader()
        writer.writerows(rows)
    return path


def _clinical_fingerprint(engine) -> str:
    """Fingerprint without the audit trail (re-imports are audited but change no clinical data)."""
    import hashlib

    from conftest import Base

    digest = hashlib.sha256()
    with engine.connect() as connection:
        for table in Base.metadata.sorted_tables:
            if table.name == "audit_events":
                continue
            for row in connection.execute(select(table).order_by(*table.primary_key.columns)):
                digest.update(repr(tuple(row)).encode())
    return digest.hexdigest()


def test_demo_files_import_and_counts_match_the_files(db_url, sessions, capsys):
    code, out, err = run_cli(capsys, "--db", db_url, "import", *map(str, DEMO_FILES))
    assert code == 0, err
    rows = _demo_rows()
    visits = {(r["patient"], r["visit_date"]) for r in rows}
    tests = {(r["patient"], r["visit_date"], r["nerve"], r["side"], r["modality"]) for r in rows}
    assert _count(sessions, Patient) == len({r["patient"] for r in rows})
    assert _count(sessions, Visit) == len(visits)
    assert _count(sessions, NerveTest) == len(tests)
    assert _count(sessions, StimulationSite) == len(rows)
    with open(DEMO / "treatments.csv", encoding="utf-8") as handle:
        assert _count(sessions, Treatment) == sum(1 for _ in handle) - 1
    with open(DEMO / "scores.csv", encoding="utf-8") as handle:
        assert _count(sessions, OutcomeScore) == sum(1 for _ in handle) - 1
    assert _count(sessions, AuditEvent) == 3  # one audit event per imported file
    assert "added" in out


def test_show_prints_velocities_computed_from_the_file(db_url, capsys):
    assert run_cli(capsys, "--db", db_url, "import", *map(str, DEMO_FILES))[0] == 0
    rows = [r for r in _demo_rows() if r["patient"] == "DEMO-01" and r["modality"] == "motor"]
    first_date = min(r["visit_date"] for r in rows)
    median = sorted(
        (r for r in rows if r["visit_date"] == first_date and r["nerve"] == "median"),
        key=lambda r: int(r["site_order"]),
    )
    # Hand arithmetic straight from the CSV cells: distance (mm) / latency difference (ms) = m/s.
    expected = float(median[1]["distance_mm"]) / (
        float(median[1]["latency_ms"]) - float(median[0]["latency_ms"])
    )
    code, out, err = run_cli(capsys, "--db", db_url, "show", "DEMO-01", "--visit", first_date)
    assert code == 0, err
    segment_line = next(line for line in out.splitlines() if "median right: wrist → elbow" in line)
    assert f"{expected:.1f}" in segment_line.split()
    assert "qualified clinician" in out


def test_reimport_changes_no_clinical_data(db_url, engine, capsys):
    assert run_cli(capsys, "--db", db_url, "import", *map(str, DEMO_FILES))[0] == 0
    before = _clinical_fingerprint(engine)
    code, out, _ = run_cli(capsys, "--db", db_url, "import", *map(str, DEMO_FILES))
    assert code == 0
    assert "added 0 visits" in out and "29 unchanged" in out
    assert _clinical_fingerprint(engine) == before


def test_reordered_and_reformatted_rows_are_the_same_content(db_url, engine, tmp_path, capsys):
    assert run_cli(capsys, "--db", db_url, "import", str(DEMO_FILES[0]))[0] == 0
    before = _clinical_fingerprint(engine)
    rows = list(reversed(_demo_rows()))
    for row in rows:  # "4.40" and "4.4" are the same number; upper-case words are the same words
        if row["latency_ms"]:
            row["latency_ms"] = f"{float(row['latency_ms']):.3f}"
        row["side"] = row["side"].upper()[0]
    path = _write_rows(tmp_path / "reordered.csv", rows)
    code, out, err = run_cli(capsys, "--db", db_url, "import", str(path))
    assert code == 0, err
    assert "29 unchanged" in out
    assert _clinical_fingerprint(engine) == before


def test_changed_visit_needs_replace_and_keeps_history(db_url, engine, sessions, tmp_path, capsys):
    assert run_cli(capsys, "--db", db_url, "import", str(DEMO_FILES[0]))[0] == 0
    rows = _demo_rows()
    target = next(
        i
        for i, r in enumerate(rows)
        if r["patient"] == "DEMO-03" and r["nerve"] == "ulnar" and r["site_order"] == "2"
    )
    old_latency = float(rows[target]["latency_ms"])
    rows[target]["latency_ms"] = f"{old_latency + 0.2:.2f}"
    path = _write_rows(tmp_path / "amended.csv", rows)

    before = fingerprint(engine)
    code, _, err = run_cli(capsys, "--db", db_url, "import", str(path))
    assert code == 1
    first_row_of_visit = 2 + min(
        i
        for i, r in enumerate(rows)
        if r["patient"] == "DEMO-03" and r["visit_date"] == rows[target]["visit_date"]
    )
    assert f"row {first_row_of_visit}, column 'visit_date'" in err
    assert "--replace" in err
    assert fingerprint(engine) == before

    code, out, err = run_cli(capsys, "--db", db_url, "import", "--replace", str(path))
    assert code == 0, err
    assert "replaced 1" in out
    date = dt.date.fromisoformat(rows[target]["visit_date"])
    with sessions() as session:
        visit = session.scalar(
            select(Visit).join(Patient).where(Patient.code == "DEMO-03", Visit.visit_date == date)
        )
        assert visit.version == 2
        revision = session.scalar(select(VisitRevision).where(VisitRevision.visit_id == visit.id))
        assert revision.revision == 1 and revision.replaced_by
        ulnar = next(
            t for t in revision.snapshot["nerve_tests"] if t["nerve"] == "ulnar" and t["modality"] == "motor"
        )
        assert [s["latency_ms"] for s in ulnar["sites"] if s["site_order"] == 2] == [old_latency]
        record = patient_record(session, "DEMO-03", visit_date=visit.visit_date)
        site = next(n for n in record.visits[0].nerves if n.nerve == "ulnar" and n.modality == "motor").sites[
            1
        ]
        assert site.latency_ms == pytest.approx(old_latency + 0.2)
        actions = session.scalars(select(AuditEvent.action)).all()
        assert "replace_visit" in actions


def test_xlsx_gives_the_same_content_as_csv(backend, tmp_path, capsys):
    from conftest import new_database
    from tracker.db import migrate
    from tracker.db.session import make_engine

    workbook = openpyxl.Workbook()
    sheet = workbook.active
    rows = _demo_rows()
    sheet.append(list(rows[0]))
    for row in rows:  # numbers as numbers and dates as dates, the way a spreadsheet holds them
        cells = []
        for key, value in row.items():
            if key == "visit_date":
                cells.append(dt.date.fromisoformat(value))
            else:
                try:
                    cells.append(float(value) if "." in value else int(value))
                except ValueError:
                    cells.append(value or None)
        sheet.append(cells)
    xlsx = tmp_path / "study.xlsx"
    workbook.save(xlsx)

    prints = []
    for name, path in (("csv", DEMO_FILES[0]), ("xlsx", xlsx)):
        folder = tmp_path / name
        folder.mkdir()
        for url in new_database(backend, folder):
            migrate.upgrade(url)
            code, _, err = run_cli(capsys, "--db", url, "import", str(path))
            assert code == 0, err
            engine = make_engine(url)
            with engine.connect() as connection:
                prints.append(
                    connection.execute(select(Visit.content_sha256).order_by(Visit.content_sha256))
                    .scalars()
                    .all()
                )
            engine.dispose()
    assert prints[0] == prints[1]


def test_bom_and_crlf_are_accepted(db_url, tmp_path, capsys):
    text = (DEMO / "measurements.csv").read_text(encoding="utf-8")
    path = tmp_path / "windows.csv"
    path.write_bytes(b"\xef\xbb\xbf" + text.replace("\n", "\r\n").encode("utf-8"))
    code, out, err = run_cli(capsys, "--db", db_url, "import", str(path))
    assert code == 0, err
    assert "added 29 visits" in out


def test_dry_run_writes_nothing(db_url, engine, capsys):
    before = fingerprint(engine)
    code, out, _ = run_cli(capsys, "--db", db_url, "import", "--dry-run", *map(str, DEMO_FILES[:1]))
    assert code == 0
    assert "would add 29 visits" in out
    assert fingerprint(engine) == before


def test_no_response_is_stored_as_a_finding(db_url, sessions, capsys):
    assert run_cli(capsys, "--db", db_url, "import", str(DEMO_FILES[0]))[0] == 0
    absent = [r for r in _demo_rows() if r["amplitude_uv"] == "0" or r["amplitude_mv"] == "0"]
    assert absent, "the demo clinic includes absent responses"
    with sessions() as session:
        stored = session.scalars(
            select(StimulationSite).where(
                (StimulationSite.amplitude_uv == 0) | (StimulationSite.amplitude_mv == 0)
            )
        ).all()
        assert len(stored) == len(absent)
        assert all(s.latency_ms is None for s in stored)


def test_fingerprints_recomputed_from_stored_rows_equal_the_import_ones(db_url, sessions, capsys):
    from tracker.services.history import stored_fingerprints

    assert run_cli(capsys, "--db", db_url, "import", str(DEMO_FILES[0]))[0] == 0
    with sessions() as session:
        stored = dict(session.execute(select(Visit.id, Visit.content_sha256)).all())
        assert stored_fingerprints(session, list(stored)) == stored


def test_patient_diagnosis_follows_the_latest_visit_that_states_it(db_url, sessions, tmp_path, capsys):
    # Invented scenario: an acute neuropathy first recorded as GBS is later judged CIDP.
    header = (
        "patient,visit_date,nerve,side,modality,site_order,distance_mm,latency_ms,amplitude_mv,"
        "diagnosis,phenotype\n"
    )
    first = tmp_path / "first.csv"
    first.write_text(header + "T-7,2024-01-10,median,right,motor,1,70,4.0,6.0,gbs,\n", encoding="utf-8")
    later = tmp_path / "later.csv"
    later.write_text(
        header + "T-7,2024-06-10,median,right,motor,1,70,4.6,5.0,cidp,typical\n", encoding="utf-8"
    )
    assert run_cli(capsys, "--db", db_url, "import", str(first))[0] == 0
    with sessions() as session:
        assert session.scalar(select(Patient.diagnosis).where(Patient.code == "T-7")) == "gbs"
    assert run_cli(capsys, "--db", db_url, "import", str(later))[0] == 0
    with sessions() as session:
        patient = session.scalar(select(Patient).where(Patient.code == "T-7"))
        assert (patient.diagnosis, patient.phenotype) == ("cidp", "typical")


def test_phenotype_comes_from_the_same_visit_as_the_diagnosis(db_url, sessions, tmp_path, capsys):
    # Invented scenario: CIDP (distal) first, later reclassified as "other" with no phenotype.
    header = (
        "patient,visit_date,nerve,side,modality,site_order,distance_mm,latency_ms,amplitude_mv,"
        "diagnosis,phenotype\n"
    )
    path = tmp_path / "two.csv"
    path.write_text(
        header
        + "T-8,2024-01-10,median,right,motor,1,70,4.0,6.0,cidp,distal\n"
        + "T-8,2024-06-10,median,right,motor,1,70,4.1,6.0,other,\n",
        encoding="utf-8",
    )
    assert run_cli(capsys, "--db", db_url, "import", str(path))[0] == 0
    with sessions() as session:
        patient = session.scalar(select(Patient).where(Patient.code == "T-8"))
        assert (patient.diagnosis, patient.phenotype) == ("other", None)


def test_text_with_backslashes_and_missing_values_is_stored_as_written(db_url, sessions, capsys, tmp_path):
    """Nerve tests and sites go to PostgreSQL as COPY text built column by column: a backslash in a word
    is escaped, not read as an escape, and missing values stay NULL (SQLite: the same rows)."""
    rows = _demo_rows()
    first = (rows[0]["patient"], rows[0]["visit_date"])
    visit_rows = [r for r in rows if (r["patient"], r["visit_date"]) == first]
    for row in visit_rows:
        row["recording_site"] = "apb\\adm\\N"
        row["temperature_c"] = ""
    path = _write_rows(tmp_path / "measurements.csv", visit_rows)
    code, _, err = run_cli(capsys, "--db", db_url, "import", str(path))
    assert code == 0, err
    with sessions() as session:
        tests = session.execute(select(NerveTest.recording_site, NerveTest.temperature_c)).all()
        sites = session.scalar(select(func.count()).select_from(StimulationSite))
    assert tests and {t.recording_site for t in tests} == {"apb\\adm\\n"}  # recording sites are lower-cased
    assert {t.temperature_c for t in tests} == {None}
    assert sites == len(visit_rows)
