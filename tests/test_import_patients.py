"""The patients file: symptom-onset dates into the pseudonymous record, identities into their own table,
refused with the value unseen, filled into ``days_since_onset``, shown only in an identified export.

Every patient, name, record number and date here is invented.
"""

from __future__ import annotations

import datetime as dt
import json
import logging
import zipfile

import pandas as pd
import pytest
from sqlalchemy import select

from conftest import DEMO, fingerprint, run_cli
from tracker.db.models import AuditEvent, Patient, PatientIdentity, User

DEMO_FILES = [str(DEMO / n) for n in ("measurements.csv", "treatments.csv", "scores.csv")]
# Invented identities, unlike anything else in the demo files, so that a byte scan finds only them.
NAME = "Quirinia Vantongeren-Aldous"
RECORD = "MRN-INVENTED-55713"
BIRTH = "1958-11-23"
OTHER_NAME = "Oswin Trelawney-Haddock"
IDENTIFYING = (NAME, RECORD, BIRTH, OTHER_NAME)
ONSET = "2022-12-01"  # DEMO-03's invented onset; their visit of 2023-03-21 is 110 days later
DEMO_03_VISIT = dt.date(2023, 3, 21)


def _write(path, lines: list[str]):
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return str(path)


def _patients_file(tmp_path, name: str = NAME, birth: str = BIRTH, file_name: str = "patients.csv") -> str:
    return _write(
        tmp_path / file_name,
        [
            "patient,onset_date,full_name,record_number,birth_date,sex",
            f"DEMO-03,{ONSET},{name},{RECORD},{birth},",
            "DEMO-01,2021-06-15,,,,female",
        ],
    )


def _contents(path) -> list[bytes]:
    """The file's bytes, and what a compressed format holds uncompressed: every part of a zip (xlsx), every
    value and the schema metadata of a Parquet file (its pages may be compressed)."""
    raw = path.read_bytes()
    blobs = [raw]
    if zipfile.is_zipfile(path):
        with zipfile.ZipFile(path) as archive:
            blobs += [archive.read(member) for member in archive.namelist()]
    if raw[:4] == b"PAR1":
        import pyarrow.parquet as pq

        table = pq.read_table(path)
        blobs += [repr(table.to_pydict()).encode("utf-8"), repr(table.schema.metadata).encode("utf-8")]
    return blobs


def _patient_rows(engine) -> list[tuple]:
    with engine.connect() as connection:
        return [
            tuple(row)
            for table in (Patient.__table__, PatientIdentity.__table__)
            for row in connection.execute(select(table).order_by(*table.primary_key.columns))
        ]


def _stored_text(engine) -> str:
    """Every audit event and setting as text: what the trail and the settings would show anyone."""
    with engine.connect() as connection:
        rows = connection.execute(select(AuditEvent.__table__)).all()
    return "\n".join(json.dumps([str(v) for v in row], ensure_ascii=False) for row in rows)


@pytest.fixture
def demo_db(db_url, capsys):
    code, _, err = run_cli(capsys, "--db", db_url, "import", *DEMO_FILES)
    assert code == 0, err
    return db_url


def test_patients_file_stores_onset_in_the_record_and_identities_apart(
    demo_db, engine, sessions, tmp_path, capsys, caplog
):
    caplog.set_level(logging.DEBUG)
    code, out, err = run_cli(capsys, "--db", demo_db, "import", _patients_file(tmp_path))
    assert code == 0, err
    assert "patients: 2 rows checked; 2 patients given new details" in out
    assert "identity fields of 1 patients" in out
    with sessions() as session:
        three = session.scalar(select(Patient).where(Patient.code == "DEMO-03"))
        one = session.scalar(select(Patient).where(Patient.code == "DEMO-01"))
        assert three.onset_date == dt.date(2022, 12, 1) and one.onset_date == dt.date(2021, 6, 15)
        identity = session.get(PatientIdentity, three.id)
        assert (identity.full_name, identity.record_number, identity.birth_date) == (
            NAME,
            RECORD,
            dt.date(1958, 11, 23),
        )
        assert session.get(PatientIdentity, one.id) is None  # no identity field given: no identity row
        events = session.scalars(select(AuditEvent).where(AuditEvent.entity == "patient_identities")).all()
        assert [(e.action, e.entity_key, e.after) for e in events] == [
            (
                "update_patient_identity",
                "DEMO-03",
                {"fields_set": ["birth_date", "full_name", "record_number"], "fields_replaced": []},
            )
        ]
    # Nothing identifying in what the command printed, in any log record, or in the audit trail.
    shown = out + err + "\n".join(r.getMessage() for r in caplog.records) + _stored_text(engine)
    for value in IDENTIFYING:
        assert value not in shown
    # The same file again changes no patient and no identity (the import itself is audited).
    before = _patient_rows(engine)
    code, out, err = run_cli(capsys, "--db", demo_db, "import", _patients_file(tmp_path))
    assert code == 0, err
    assert "0 patients given new details, 0 replaced, 2 unchanged" in out
    assert _patient_rows(engine) == before


def test_bad_birth_date_is_refused_by_row_and_column_without_the_value(demo_db, engine, tmp_path, capsys):
    before = fingerprint(engine)
    path = _write(
        tmp_path / "patients.csv",
        [
            "patient,onset_date,full_name,birth_date",
            f"DEMO-01,{ONSET},{OTHER_NAME},1961-04-02",  # a good row: not written either (all or nothing)
            f"DEMO-03,{ONSET},{NAME},1958-02-30",  # no 30 February
            f"DEMO-02,2999-01-01,{'x' * 201},",  # onset in the future; a name longer than the column
        ],
    )
    code, out, err = run_cli(capsys, "--db", demo_db, "import", path)
    assert code == 1
    assert "row 3, column 'birth_date': not a real date" in err
    assert "1958-02-30" not in err and "1958-" not in err  # at most a few leading characters are shown
    assert "row 4, column 'onset_date': date is in the future" in err
    assert "row 4, column 'full_name': a name has at most 200 characters" in err
    for value in (NAME, OTHER_NAME, "x" * 10):
        assert value not in out + err
    assert "Traceback" not in err
    assert fingerprint(engine) == before


@pytest.mark.parametrize(
    ("lines", "expected"),
    [
        (
            ["patient,birth_date,birth_year", "DEMO-01,1958-11-23,1959"],
            "row 2, column 'birth_date': the birth date's year differs from birth_year on the same row",
        ),
        (
            ["patient,birth_date,onset_date", "DEMO-01,1958-11-23,1950-01-01"],
            "row 2, column 'onset_date': the symptom onset is before the birth date",
        ),
        (
            ["patient,birth_date", "DEMO-01,1850-01-01"],
            "row 2, column 'birth_date': the year of birth is outside the plausible range",
        ),
        (
            ["patient,onset_date", "DEMO-01,2022-01-01", "DEMO-01,2022-01-02"],
            "row 3, column 'patient': the same patient appears on rows 2, 3",
        ),
        (
            ["patient,onset_date", "DEMO-99,2022-01-01"],
            "row 2, column 'patient': unknown patient; import the patient's measurements first",
        ),
        (["patient,onset_date,address", "DEMO-01,2022-01-01,x"], "row 1, column 'address': unknown column"),
    ],
)
def test_patients_file_problems_are_refused(demo_db, engine, tmp_path, capsys, lines, expected):
    before = fingerprint(engine)
    code, _, err = run_cli(capsys, "--db", demo_db, "import", _write(tmp_path / "p.csv", lines))
    assert code == 1 and expected in err, err
    assert "1958-11-23" not in err
    assert fingerprint(engine) == before


def test_a_different_stored_identity_or_onset_needs_replace(demo_db, engine, sessions, tmp_path, capsys):
    code, _, err = run_cli(capsys, "--db", demo_db, "import", _patients_file(tmp_path))
    assert code == 0, err
    changed = _write(
        tmp_path / "changed.csv",
        ["patient,onset_date,full_name", f"DEMO-03,2022-12-02,{OTHER_NAME}"],
    )
    before = fingerprint(engine)
    code, out, err = run_cli(capsys, "--db", demo_db, "import", changed)
    assert code == 1
    assert (
        "row 2, column 'onset_date': patient DEMO-03 is stored with onset date 2022-12-01, the file gives "
        "2022-12-02; import with --replace"
    ) in err
    assert (
        "row 2, column 'full_name': patient DEMO-03 is stored with another name; import with --replace" in err
    )
    assert NAME not in out + err and OTHER_NAME not in out + err
    assert fingerprint(engine) == before
    # A dry run tells, writes nothing.
    code, out, err = run_cli(capsys, "--db", demo_db, "import", "--dry-run", "--replace", changed)
    assert code == 0, err
    assert "1 would be replaced" in out and fingerprint(engine) == before
    code, out, err = run_cli(capsys, "--db", demo_db, "import", "--replace", changed)
    assert code == 0, err
    assert "0 patients given new details, 1 replaced" in out
    assert NAME not in out + err and OTHER_NAME not in out + err
    with sessions() as session:
        three = session.scalar(select(Patient).where(Patient.code == "DEMO-03"))
        identity = session.get(PatientIdentity, three.id)
        assert three.onset_date == dt.date(2022, 12, 2)
        assert (identity.full_name, identity.record_number) == (OTHER_NAME, RECORD)  # an empty cell keeps
        last = session.scalars(
            select(AuditEvent).where(AuditEvent.entity == "patient_identities").order_by(AuditEvent.id)
        ).all()[-1]
        assert last.after == {"fields_set": ["full_name"], "fields_replaced": ["full_name"]}
        onset_event = session.scalars(
            select(AuditEvent).where(AuditEvent.action == "update_patient").order_by(AuditEvent.id)
        ).all()[-1]
        assert (onset_event.before, onset_event.after) == (
            {"onset_date": "2022-12-01"},
            {"onset_date": "2022-12-02"},
        )
    assert all(v not in _stored_text(engine) for v in IDENTIFYING)


def _days_since_onset(frame: pd.DataFrame, visit_date: dt.date | None = None) -> list:
    rows = frame if visit_date is None else frame[frame["visit_date"] == visit_date.isoformat()]
    return rows["days_since_onset"].tolist()


def test_identified_export_by_a_coordinator_shows_identities_and_days_since_onset(
    demo_db, sessions, tmp_path, capsys, monkeypatch
):
    from access_support import PASSWORD, login, typed
    from tracker.services.access import accounts

    code, _, err = run_cli(capsys, "--db", demo_db, "import", _patients_file(tmp_path))
    assert code == 0, err
    with login(monkeypatch, demo_db, "coordinator-invented") as (url, name):
        with sessions.begin() as session:
            session.add(
                User(username=name, role="coordinator", password_hash=accounts.hash_password(PASSWORD))
            )
        typed(monkeypatch, PASSWORD)
        out_file = tmp_path / "cohort.csv"
        code, out, err = run_cli(
            capsys,
            "--db",
            url,
            "export",
            "--identified",
            "--patients",
            "DEMO-03",
            "--criteria",
            "aan-1991-cidp",
            "--out",
            str(out_file),
        )
    assert code == 0, err
    frame = pd.read_csv(out_file, dtype=str, keep_default_na=False)
    assert set(frame["full_name"]) == {NAME} and set(frame["record_number"]) == {RECORD}
    assert set(frame["birth_date"]) == {BIRTH}
    # Visit date − onset date, counted by hand: 2022-12-01 → 2023-03-21 is 30 + 31 + 28 + 21 = 110 days.
    assert _days_since_onset(frame, DEMO_03_VISIT) == ["110"]
    for value in IDENTIFYING:
        assert value not in out + err


@pytest.mark.parametrize("file_format", ["csv", "parquet", "xlsx"])
def test_de_identified_export_holds_no_identity_but_days_since_onset(demo_db, tmp_path, capsys, file_format):
    code, _, err = run_cli(capsys, "--db", demo_db, "import", _patients_file(tmp_path))
    assert code == 0, err
    out = tmp_path / "export"
    code, stdout, err = run_cli(
        capsys, "--db", demo_db, "export", "--format", file_format, "--out", f"{out}/"
    )
    assert code == 0, err
    written = sorted(p for p in out.rglob("*") if p.is_file())
    assert written
    for path in written:  # byte scan of every file, compressed content uncompressed
        for blob in _contents(path):
            for value in IDENTIFYING:
                assert value.encode("utf-8") not in blob, (path.name, value)
                assert value.encode("utf-16-le") not in blob, (path.name, value)
    for value in IDENTIFYING:
        assert value not in stdout + err
    data = next(p for p in written if p.name == f"ncs-export-visit.{file_format}")
    frame = {"csv": pd.read_csv, "parquet": pd.read_parquet, "xlsx": pd.read_excel}[file_format](data)
    for column in ("full_name", "record_number", "birth_date"):
        assert column not in frame.columns
    days = frame["days_since_onset"].dropna()
    # DEMO-03 and DEMO-01 have an onset: their visits (and only theirs) have a day count, each ≥ 0.
    assert len(days) > 0 and (days >= 0).all() and frame["days_since_onset"].isna().any()
    assert 110 in set(int(d) for d in days)


@pytest.mark.parametrize("suffix", ["csv", "parquet", "xlsx"])
def test_the_byte_scan_finds_a_name_in_every_format(tmp_path, suffix):
    """The scan above can fail: a name written in any export format, compressed or not, is found."""
    frame = pd.DataFrame({"export_id": ["a1", "b2"], "note": ["", NAME]})
    path = tmp_path / f"control.{suffix}"
    {
        "csv": lambda: frame.to_csv(path, index=False),
        "parquet": lambda: frame.to_parquet(path),
        "xlsx": lambda: frame.to_excel(path, index=False),
    }[suffix]()
    assert any(NAME.encode("utf-8") in blob for blob in _contents(path))


def test_demo_onsets_give_the_days_the_demo_story_tells(demo_db, tmp_path, capsys):
    """demo_data/README.md (invented): DEMO-05 is studied on days 7, 30 and 90 from onset."""
    code, out, err = run_cli(capsys, "--db", demo_db, "import", str(DEMO / "patients.csv"))
    assert code == 0, err
    assert "6 patients given new details" in out and "identity fields of 0 patients" in out
    out_file = tmp_path / "gbs.csv"
    code, _, err = run_cli(capsys, "--db", demo_db, "export", "--patients", "DEMO-05", "--out", str(out_file))
    assert code == 0, err
    frame = pd.read_csv(out_file)
    assert sorted(frame["days_since_onset"].tolist()) == [7, 30, 90]


def test_an_onset_after_the_first_visit_is_stored_with_a_warning(demo_db, sessions, tmp_path, capsys):
    path = _write(tmp_path / "p.csv", ["patient,onset_date", "DEMO-05,2025-08-25", "DEMO-03,2023-03-22"])
    code, out, err = run_cli(capsys, "--db", demo_db, "import", path)
    assert code == 0, err
    assert (
        "warning: row 3, column 'onset_date': the onset of DEMO-03 (2023-03-22) is after their first visit "
        "(2023-03-21): days_since_onset of that visit is negative — check the date"
    ) in err
    assert "DEMO-05" not in err  # onset a week before the first study: no warning
    with sessions() as session:
        assert session.scalar(select(Patient.onset_date).where(Patient.code == "DEMO-03")) == dt.date(
            2023, 3, 22
        )
        event = session.scalars(select(AuditEvent).where(AuditEvent.action == "import_patients")).one()
        assert len(event.after["warnings"]) == 1 and event.after["identities"] == 0
