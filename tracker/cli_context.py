"""What every command needs: the database (resolved lazily), the acting user and the debug switch.

Kept apart from :mod:`tracker.cli` so that command groups in their own modules can use it.
"""

from __future__ import annotations

import os
from pathlib import Path

import click
from sqlalchemy import Engine

from tracker.cli_prompt import read_password
from tracker.config import ENV_DB, ENV_USER, resolve_database_url
from tracker.errors import SchemaNotReady
from tracker.services.access.permissions import Actor, NotPermitted


class Context:
    """What every command needs: the database URL (resolved lazily) and the acting user.

    The acting user is the login (:func:`tracker.services.access.accounts.system_identity`), never a name
    typed on the command line: ``--user`` / ``NCS_TRACKER_USER`` may only restate it.
    """

    def __init__(self, db: str | None, user: str | None, debug: bool):
        self._db = db
        self.stated_user = user or os.environ.get(ENV_USER) or None
        self.debug = debug
        self._engine: Engine | None = None
        self._schema_checked = False
        self._actors: dict[str, Actor] = {}

    @property
    def user(self) -> str:
        """The acting login's name (for commands that write without a particular permission)."""
        return self.acting("read").name

    def acting(self, permission: str) -> Actor:
        """The acting login as an :class:`Actor` allowed ``permission``, or :class:`NotPermitted`.

        Privileged permissions (``permissions.PRIVILEGED``) ask for the account's password once per command;
        a failed attempt is committed (it counts towards lock-out) before the refusal is raised.
        """
        from tracker.services.access import accounts
        from tracker.services.access.permissions import PRIVILEGED

        if permission in self._actors:
            return self._actors[permission]
        refused: Exception | None = None
        with self.session_factory().begin() as session:
            actor = accounts.system_actor(session)
            if self.stated_user and self.stated_user != actor.name:
                raise NotPermitted(
                    f"--user/{ENV_USER} cannot choose who acts: commands on this database act as the login "
                    f"{actor.name!r}. Run the command as that person's own login."
                )
            actor.require(permission)
            if permission in PRIVILEGED and not actor.single_user and not actor.authenticated:
                password = read_password(f"Password of {actor.name}")
                try:
                    actor = accounts.authenticate(session, actor.name, password, via=actor.via)
                except accounts.SignInRefused as error:
                    refused = error
        if refused is not None:
            raise refused
        self._actors[permission] = actor
        return actor.require(permission)

    @property
    def url(self) -> str:
        url, is_default = resolve_database_url(self._db)
        if is_default:
            click.echo(
                f"Database: {url.removeprefix('sqlite:///')} (default; choose another with --db or {ENV_DB})",
                err=True,
            )
        return url

    def engine(self, *, require_schema: bool = True) -> Engine:
        from tracker.db.schema_check import require_current_schema
        from tracker.db.session import make_engine

        if self._engine is None:
            url = self.url
            missing_file = _missing_sqlite_file(url)
            if require_schema and missing_file:
                raise SchemaNotReady(
                    f"There is no database file at {missing_file}; run: ncs-tracker db upgrade"
                )
            self._engine = make_engine(url)
        if require_schema and not self._schema_checked:  # once per command: the schema does not move under it
            require_current_schema(self._engine)
            self._schema_checked = True
        return self._engine

    def close(self) -> None:
        if self._engine is not None:
            self._engine.dispose()
            self._engine = None
            self._schema_checked = False

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
