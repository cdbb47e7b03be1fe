"""Acting as someone else in tests, on both backends, the way the tool itself decides who acts.

SQLite: commands act as the operating-system account. A test process cannot become another account, so the
lookup of the account's name (``accounts.os_login``) is replaced; nothing else changes.
PostgreSQL: commands act as the database login (``current_user``). A real login role is created with the
privileges an application role would have (read and write the tables, no ownership), and the test connects
as it — no replacement at all.
"""

from __future__ import annotations

import io
import uuid
from collections.abc import Iterator
from contextlib import contextmanager

from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

from conftest import PG_ADMIN_URL

PASSWORD = "invented password 1"  # test accounts only


@contextmanager
def login(monkeypatch, db_url: str, name: str) -> Iterator[tuple[str, str]]:
    """Yield ``(url, login)``: a database URL on which commands act as the login ``login`` (``name`` with a
    unique suffix on PostgreSQL, where roles are shared by every database of the server)."""
    if make_url(db_url).get_backend_name() == "sqlite":
        from tracker.services.access import accounts

        with monkeypatch.context() as patch:
            patch.setattr(accounts, "os_login", lambda: name)
            yield db_url, name
        return
    role = f"{name}_{uuid.uuid4().hex[:6]}".replace("-", "_")
    admin = create_engine(PG_ADMIN_URL, isolation_level="AUTOCOMMIT")
    admin_url = make_url(
        PG_ADMIN_URL
    )  # the owner of every test database, even when db_url names another login
    owner_url = make_url(db_url).set(username=admin_url.username, password=admin_url.password)
    owner = create_engine(owner_url, isolation_level="AUTOCOMMIT")
    database = make_url(db_url).database
    with admin.connect() as connection:
        connection.execute(text(f'CREATE ROLE "{role}" LOGIN'))
        connection.execute(text(f'GRANT CONNECT ON DATABASE "{database}" TO "{role}"'))
    with owner.connect() as connection:
        connection.execute(text(f'GRANT USAGE ON SCHEMA public TO "{role}"'))
        connection.execute(
            text(f'GRANT SELECT, INSERT, UPDATE, DELETE ON ALL TABLES IN SCHEMA public TO "{role}"')
        )
        connection.execute(text(f'GRANT USAGE, SELECT ON ALL SEQUENCES IN SCHEMA public TO "{role}"'))
    try:
        yield owner_url.set(username=role, password=None).render_as_string(hide_password=False), role
    finally:
        with owner.connect() as connection:
            connection.execute(
                text(f"SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE usename = '{role}'")
            )
            connection.execute(text(f'DROP OWNED BY "{role}"'))
        with admin.connect() as connection:
            connection.execute(text(f'REVOKE ALL ON DATABASE "{database}" FROM "{role}"'))
            connection.execute(text(f'DROP ROLE IF EXISTS "{role}"'))
        owner.dispose()
        admin.dispose()


@contextmanager
def again(monkeypatch, db_url: str, name: str) -> Iterator[str]:
    """Yield a URL acting as the existing login ``name`` (made by :func:`login`)
    inside another login's block."""
    if make_url(db_url).get_backend_name() == "sqlite":
        from tracker.services.access import accounts

        with monkeypatch.context() as patch:
            patch.setattr(accounts, "os_login", lambda: name)
            yield db_url
        return
    yield make_url(db_url).set(username=name, password=None).render_as_string(hide_password=False)


def typed(monkeypatch, *lines: str) -> None:
    """What the person types at the prompts (passwords), one line each."""
    monkeypatch.setattr("sys.stdin", io.StringIO("".join(line + "\n" for line in lines)))
