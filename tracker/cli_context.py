"""What every command needs: the database (resolved lazily), the acting user and the debug switch.

Kept apart from :mod:`tracker.cli` so that command groups in their own modules can use it.
"""

from __future__ import annotations

from pathlib import Path

import click
from sqlalchemy import Engine

from tracker.config import ENV_DB, acting_user, resolve_database_url
from tracker.errors import SchemaNotReady


class Context:
    """What every command needs: the database URL (resolved lazily) and the acting user."""

    def __init__(self, db: str | None, user: str | None, debug: bool):
        self._db = db
        self.user = acting_user(user)
        self.debug = debug
        self._engine: Engine | None = None

    @property
    def url(self) -> str:
        url, is_default = resolve_database_url(self._db)
        if is_default:
            click.echo(f"Database: {url.removeprefix('sqlite:///')} (default; choose another with --db or {ENV_DB})", err=True)
        return url

    def engine(self, *, require_schema: bool = True) -> Engine:
        from tracker.db.migrate import require_current_schema
        from tracker.db.session import make_engine

        if self._engine is None:
            url = self.url
            missing_file = _missing_sqlite_file(url)
            if require_schema and missing_file:
                raise SchemaNotReady(f"There is no database file at {missing_file}; run: ncs-tracker db upgrade")
            self._engine = make_engine(url)
        if require_schema:
            require_current_schema(self._engine)
        return self._engine

    def close(self) -> None:
        if self._engine is not None:
            self._engine.dispose()
            self._engine = None

    def session_factory(self):
        from tracker.db.session import make_session_factory

        return make_session_factory(self.engine())


pass_context = click.make_pass_decorator(Context)


def _missing_sqlite_file(url: str) -> str | None:
    """The path of an SQLite database file that does not exist yet (connecting would create it empty)."""
    from sqlalchemy.engine import make_url

    parsed = make_url(url)
    if parsed.get_backend_name() != "sqlite" or parsed.database in (None, "", ":memory:"):
        return None
    return None if Path(parsed.database).exists() else parsed.database
