"""Migrations: models and revisions do not drift; down and up again keeps the data, on both backends."""

from __future__ import annotations

import pytest
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import func, inspect, select, text

from conftest import DEMO, run_cli
from tracker.db import migrate, schema_check
from tracker.db.models import Base, NerveTest, OutcomeScore, Patient, StimulationSite, Treatment, Visit
from tracker.db.session import is_sqlite, make_engine
from tracker.errors import SchemaNotReady

CORE = [Patient, Visit, NerveTest, StimulationSite, Treatment, OutcomeScore]


def _counts(url: str) -> dict[str, int]:
    engine = make_engine(url)
    try:
        with engine.connect() as connection:
            return {m.__tablename__: connection.scalar(select(func.count()).select_from(m)) for m in CORE}
    finally:
        engine.dispose()


def test_models_and_migrations_do_not_drift(db_url):
    engine = make_engine(db_url)
    with engine.connect() as connection:
        context = MigrationContext.configure(connection, opts={"compare_type": True})
        assert compare_metadata(context, Base.metadata) == []
    engine.dispose()


def test_down_and_up_keeps_the_data(db_url, capsys):
    code, _, err = run_cli(
        capsys,
        "--db",
        db_url,
        "import",
        *(str(DEMO / n) for n in ("measurements.csv", "treatments.csv", "scores.csv")),
    )
    assert code == 0, err
    before = _counts(db_url)
    assert before["stimulation_sites"] > 300

    migrate.downgrade(db_url, "0001")
    # Revision 0001 recreated `visits` on SQLite (batch mode): its children must survive the DROP TABLE.
    assert _counts(db_url) == before
    engine = make_engine(db_url)
    assert "content_sha256" not in {c["name"] for c in inspect(engine).get_columns("visits")}
    engine.dispose()

    migrate.upgrade(db_url)
    assert _counts(db_url) == before
    engine = make_engine(db_url)
    assert migrate.current_revision(engine) == migrate.head_revision()
    if is_sqlite(engine):
        with engine.connect() as connection:
            assert connection.execute(text("PRAGMA foreign_key_check")).fetchall() == []
    engine.dispose()
    # The round trip emptied the stored fingerprints; they are recomputed from the rows, so the same file is
    # still recognised as already imported.
    code, out, err = run_cli(capsys, "--db", db_url, "import", str(DEMO / "measurements.csv"))
    assert code == 0, err
    assert f"{before['visits']} unchanged" in out
    assert _counts(db_url) == before


def test_commands_refuse_a_database_without_schema(empty_url, capsys):
    code, out, err = run_cli(capsys, "--db", empty_url, "show", "DEMO-01")
    assert code == 1
    assert "ncs-tracker db upgrade" in err
    assert len(err.strip().splitlines()) == 1


def test_commands_refuse_an_outdated_schema(empty_url, capsys):
    migrate.upgrade(empty_url, "0001")
    code, _, err = run_cli(capsys, "--db", empty_url, "import", str(DEMO / "measurements.csv"))
    assert code == 1
    assert "outdated" in err and "ncs-tracker db upgrade" in err
    code, out, _ = run_cli(capsys, "--db", empty_url, "db", "upgrade")
    assert code == 0 and "current" in out


def test_the_quick_schema_check_knows_the_newest_migration(empty_url):
    # The start-up check answers "current" without Alembic from its own copy of the newest revision id.
    assert schema_check.SCHEMA_HEAD == migrate.head_revision()
    migrate.upgrade(empty_url, "0005")
    engine = make_engine(empty_url)
    try:
        with pytest.raises(SchemaNotReady, match="outdated"):
            schema_check.require_current_schema(engine)
        migrate.upgrade(empty_url)
        schema_check.require_current_schema(engine)  # current: no error
    finally:
        engine.dispose()


def test_the_audit_chain_migration_seals_existing_rows_and_keeps_them(empty_url, capsys):
    """Audit rows written before the chain existed are sealed in id order by 0005; verify then passes, a
    change made afterwards is found, and down/up keeps every row (both backends)."""
    from tracker.services.access.audit import verify

    migrate.upgrade(empty_url, "0004")
    engine = make_engine(empty_url)
    with engine.begin() as connection:
        for n in range(3):
            connection.execute(
                text(
                    "INSERT INTO audit_events (occurred_at, username, action, entity, entity_key, detail) "
                    "VALUES (:at, 'older-invented', 'import_measurements', 'file', :key, 'before the chain')"
                ),
                {"at": f"2026-0{n + 1}-01 10:00:00", "key": f"sha256:{n}"},
            )
    migrate.upgrade(empty_url)
    with engine.connect() as connection:
        report = verify(connection)
        assert report.intact and report.rows == 3
    code, _, err = run_cli(capsys, "--db", empty_url, "import", str(DEMO / "treatments.csv"))
    assert code == 1 or code == 0  # unknown patients refuse the file; either way the chain must hold
    with engine.connect() as connection:
        assert verify(connection).intact
    migrate.downgrade(empty_url, "0004")
    migrate.upgrade(empty_url)
    with engine.connect() as connection:
        assert connection.scalar(text("SELECT count(*) FROM audit_events")) >= 3
        assert verify(connection).intact
    engine.dispose()
