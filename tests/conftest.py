"""Shared fixtures: a fresh database per test module on each backend (SQLite file and real PostgreSQL).

PostgreSQL: the server at ``NCS_TRACKER_TEST_PG`` (default
``postgresql+psycopg://postgres@127.0.0.1:5432/postgres``) gets a throwaway database per fixture. When
it is unreachable the PostgreSQL tests are skipped, except when the ``CI`` environment variable is set:
then they fail, so CI can never pass without them.
"""

from __future__ import annotations

import hashlib
import os
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import create_engine, select, text
from sqlalchemy.engine import make_url

from tracker.db import migrate
from tracker.db.models import Base
from tracker.db.session import make_engine, make_session_factory

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "demo_data"
PG_ADMIN_URL = os.environ.get("NCS_TRACKER_TEST_PG", "postgresql+psycopg://postgres@127.0.0.1:5432/postgres")
BACKENDS = ["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]


def _pg_admin():
    engine = create_engine(PG_ADMIN_URL, isolation_level="AUTOCOMMIT")
    try:
        with engine.connect() as connection:
            connection.execute(text("SELECT 1"))
    except Exception as error:
        engine.dispose()
        if os.environ.get("CI"):
            pytest.fail(f"PostgreSQL is required in CI but unreachable at {PG_ADMIN_URL}: {error}")
        pytest.skip(f"PostgreSQL unreachable at {PG_ADMIN_URL} (set CI=1 to make this a failure)")
    return engine


def new_database(backend: str, tmp_path: Path) -> Iterator[str]:
    """Yield the URL of an empty database; drop it afterwards."""
    if backend == "sqlite":
        yield f"sqlite:///{tmp_path / 'ncs.sqlite3'}"
        return
    admin = _pg_admin()
    name = f"ncs_test_{uuid.uuid4().hex[:12]}"
    with admin.connect() as connection:
        connection.execute(text(f'CREATE DATABASE "{name}"'))
    url = make_url(PG_ADMIN_URL).set(database=name).render_as_string(hide_password=False)
    try:
        yield url
    finally:
        with admin.connect() as connection:
            connection.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()


@pytest.fixture(params=BACKENDS)
def backend(request) -> str:
    return request.param


@pytest.fixture
def empty_url(backend, tmp_path) -> Iterator[str]:
    yield from new_database(backend, tmp_path)


@pytest.fixture
def db_url(empty_url) -> str:
    """A migrated, empty database."""
    migrate.upgrade(empty_url)
    return empty_url


@pytest.fixture
def engine(db_url):
    engine = make_engine(db_url)
    yield engine
    engine.dispose()


@pytest.fixture
def sessions(engine):
    return make_session_factory(engine)


def fingerprint(engine) -> str:
    """SHA-256 over every row of every table, ordered by primary key: equal means an unchanged database."""
    digest = hashlib.sha256()
    with engine.connect() as connection:
        for table in Base.metadata.sorted_tables:
            digest.update(table.name.encode())
            order = list(table.primary_key.columns)
            for row in connection.execute(select(table).order_by(*order)):
                digest.update(repr(tuple(row)).encode())
    return digest.hexdigest()


def run_cli(capsys, *args: str) -> tuple[int, str, str]:
    """Run the real console entry point in-process; return (exit code, stdout, stderr)."""
    from tracker.cli import main

    with pytest.raises(SystemExit) as exit_info:
        main(list(args))
    captured = capsys.readouterr()
    return int(exit_info.value.code or 0), captured.out, captured.err
