"""`ncs-tracker export` through the real entry point: the demo database, identified exports and who may
ask for them, bad options. Demo data and identities are invented."""

from __future__ import annotations

import datetime as dt
import json

import pandas as pd
import pyarrow.parquet as pq
import pytest
from sqlalchemy import select

from conftest import DEMO, fingerprint, run_cli
from tracker.db.models import AuditEvent, Patient, PatientIdentity, User
from tracker.services.demo import build_demo_database
from tracker.services.export import files as export_files

DEMO_FILES = [str(DEMO / n) for n in ("measurements.csv", "treatments.csv", "scores.csv")]


@pytest.fixture
def demo_db(db_url, sessions, capsys):
    code, _, err = run_cli(capsys, "--db", db_url, "import", *DEMO_FILES)
    assert code == 0, err
    with sessions.begin() as session:
        patient = session.scalar(select(Patient).where(Patient.code == "DEMO-03"))
        # Invented identity.
        session.add(
            PatientIdentity(
                patient_id=patient.id,
                record_number="MRN-INVENTED-9031",
                full_name="Perpetua Oyelaran-Voss",
                birth_date=dt.date(1970, 7, 19),
            )
        )
    return db_url


def test_segment_parquet_on_the_demo_database_writes_table_dictionary_and_manifest(tmp_path, capsys):
    path = tmp_path / "demo.sqlite3"
    engine, _ = build_demo_database(path, username="tester")
    engine.dispose()
    out = tmp_path / "exports"
    code, stdout, err = run_cli(
        capsys,
        "--db",
        f"sqlite:///{path}",
        "export",
        "--level",
        "segment",
        "--format",
        "parquet",
        "--out",
        f"{out}/",
    )
    assert code == 0, err
    data = out / "ncs-export-segment.parquet"
    dictionary = out / "ncs-export-segment.parquet.dictionary.csv"
    manifest_path = out / "ncs-export-segment.parquet.manifest.json"
    tables = [out / f"ncs-export-segment.parquet.{name}.csv" for name in ("limits", "criteria")]
    written = (data, dictionary, manifest_path, *tables)
    assert sorted(p.name for p in out.iterdir()) == sorted(p.name for p in written)
    assert str(data) in stdout and "qualified clinician" in stdout
    table = pq.read_table(data)
    manifest = json.loads(manifest_path.read_text(encoding="utf-8"))
    assert (
        manifest["level"] == "segment" and manifest["format"] == "parquet" and manifest["identified"] is False
    )
    assert manifest["visits_selected"] == 29  # the demo clinic: 29 visits (invented)
    by_role = {f["role"]: f for f in manifest["files"]}
    assert by_role["data"]["rows"] == table.num_rows > 0
    assert by_role["data"]["sha256"] == export_files.sha256_of(data)
    assert by_role["dictionary"]["sha256"] == export_files.sha256_of(dictionary)
    listed = pd.read_csv(dictionary, dtype=str)["column"].tolist()
    assert [c for c in listed if not c.startswith("(")] == table.column_names and listed[-1] == "(caution)"
    assert {c["id"] for c in manifest["criteria"]} == {
        "efns-pns-2010-cidp",
        "ean-pns-2021-cidp",
        "aan-1991-cidp",
        "efns-pns-2010-mmn",
        "hadden-1998-gbs",
        "rajabally-2015-gbs",
    }
    # Every export is in the audit trail; a de-identified one as "export".
    code, again, err = run_cli(
        capsys,
        "--db",
        f"sqlite:///{path}",
        "export",
        "--level",
        "segment",
        "--format",
        "parquet",
        "--out",
        f"{out}/",
    )
    assert code == 1 and "already exists" in err and "--overwrite" in err


def test_identified_export_refused_without_a_role_and_nothing_written(demo_db, engine, tmp_path, capsys):
    before = fingerprint(engine)
    out = tmp_path / "out"
    code, _, err = run_cli(capsys, "--db", demo_db, "export", "--identified", "--out", f"{out}/")
    assert code == 1
    assert (
        "users init" in err and "Traceback" not in err
    )  # single-user mode: no account may receive identities
    assert not out.exists()
    assert fingerprint(engine) == before  # not even the export secret was created


def test_identified_export_refused_for_a_viewer(demo_db, engine, sessions, tmp_path, capsys, monkeypatch):
    from access_support import PASSWORD, login, typed
    from tracker.services.access import accounts

    with login(monkeypatch, demo_db, "viewer-invented") as (url, name):
        with sessions.begin() as session:
            session.add(User(username=name, role="viewer", password_hash=accounts.hash_password(PASSWORD)))
        before = fingerprint(engine)
        out = tmp_path / "out"
        typed(monkeypatch, PASSWORD)
        code, _, err = run_cli(capsys, "--db", url, "export", "--identified", "--out", f"{out}/")
    assert code == 1 and "coordinator or admin" in err and "role viewer" in err
    assert not out.exists() and fingerprint(engine) == before


def test_identified_export_by_a_coordinator_is_written_and_audited(
    demo_db, sessions, tmp_path, capsys, monkeypatch
):
    from access_support import PASSWORD, login, typed
    from tracker.services.access import accounts

    with login(monkeypatch, demo_db, "coordinator-invented") as (url, name):
        with sessions.begin() as session:
            session.add(
                User(username=name, role="coordinator", password_hash=accounts.hash_password(PASSWORD))
            )
        typed(monkeypatch, PASSWORD)
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
            str(tmp_path / "cohort.csv"),
        )
    assert code == 0, err
    assert "IDENTIFIED" in out
    text = (tmp_path / "cohort.csv").read_text(encoding="utf-8")
    assert (
        "DEMO-03" in text
        and "MRN-INVENTED-9031" in text
        and "Perpetua Oyelaran-Voss" in text
        and "1970-07-19" in text
    )
    assert "2023-03-21" in text  # a real visit date of DEMO-03 (demo file, invented)
    with sessions() as session:
        events = session.scalars(select(AuditEvent).where(AuditEvent.entity == "export")).all()
    assert [(e.action, e.username) for e in events] == [("export_identified", name)]
    assert events[0].after["filters"]["patients"]["codes"] == ["DEMO-03"]
    assert events[0].after["files"]["cohort.csv"] == export_files.sha256_of(tmp_path / "cohort.csv")


def test_de_identified_export_is_audited_too(demo_db, sessions, tmp_path, capsys):
    code, _, err = run_cli(
        capsys,
        "--db",
        demo_db,
        "export",
        "--level",
        "long",
        "--format",
        "csv",
        "--dates",
        "relative",
        "--out",
        str(tmp_path / "long"),
    )
    assert code == 0, err
    with sessions() as session:
        actions = [
            (e.action, e.entity_key)
            for e in session.scalars(select(AuditEvent).where(AuditEvent.entity == "export"))
        ]
        secret_events = session.scalars(select(AuditEvent).where(AuditEvent.entity == "setting")).all()
    assert actions == [("export", "long csv")]
    # The secret's creation is audited without its value.
    assert [e.after for e in secret_events] == [{"value": "(secret)"}]
    text = (tmp_path / "long.csv").read_text(encoding="utf-8")
    assert "DEMO-" not in text and "visit_date" not in text.splitlines()[0]


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--outcome", "efns-pns-2010-cidp"], "expected ID=VALUE"),
        (["--outcome", "efns-pns-2010-cidp=sure"], "Unknown outcome"),
        (["--from", "2024-13-01"], "expected a date"),
        (["--patients", "DEMO-77"], "No patient with code 'DEMO-77'"),
    ],
)
def test_bad_options_exit_with_a_message(demo_db, tmp_path, capsys, args, message):
    out = tmp_path / "out"
    code, _, err = run_cli(capsys, "--db", demo_db, "export", "--out", f"{out}/", *args)
    assert code in (1, 2) and message in err and "Traceback" not in err
    assert not out.exists()


def test_progress_is_shown_for_exports_of_several_chunks(demo_db, tmp_path, capsys):
    code, _, err = run_cli(
        capsys,
        "--db",
        demo_db,
        "export",
        "--criteria",
        "hadden-1998-gbs",
        "--chunk-visits",
        "10",
        "--out",
        f"{tmp_path}/x",
    )
    assert code == 0, err
    assert "10 of 29 visits exported" in err and "29 of 29 visits exported" in err
