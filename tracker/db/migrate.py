"""Schema migrations (Alembic) and the schema-status check every command makes.

On SQLite, Alembic's batch mode recreates tables (copy, DROP, rename). With ``foreign_keys=ON`` the DROP
would fire ``ON DELETE CASCADE`` on child tables and silently delete data, so migrations run on a
dedicated engine whose connections have foreign keys OFF (set before any transaction begins, because
SQLite ignores the pragma inside one), and ``PRAGMA foreign_key_check`` runs afterwards.
"""

from __future__ import annotations

from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Engine, text

from tracker.db.session import is_sqlite, make_engine
from tracker.errors import SchemaNotReady, TrackerError


def migrations_dir() -> Path:
    """The Alembic script folder: top-level ``migrations/`` in a checkout, else the wheel's copy."""
    package = Path(__file__).resolve().parent.parent
    for candidate in (package.parent / "migrations", package / "_migrations"):
        if (candidate / "env.py").is_file():
            return candidate
    raise TrackerError("The migrations folder is missing from this installation; reinstall ncs-tracker.")


def alembic_config(url: str) -> Config:
    config = Config()
    config.set_main_option("script_location", str(migrations_dir()))
    config.set_main_option("sqlalchemy.url", url.replace("%", "%%"))
    return config


def head_revision() -> str:
    script = ScriptDirectory.from_config(alembic_config("sqlite://"))
    head = script.get_current_head()
    assert head is not None
    return head


def current_revision(engine: Engine) -> str | None:
    with engine.connect() as connection:
        return MigrationContext.configure(connection).get_current_revision()


def _run(url: str, action) -> None:
    migration_engine = make_engine(url, foreign_keys=False)
    try:
        with migration_engine.connect() as connection:
            config = alembic_config(url)
            config.attributes["connection"] = connection
            action(config)
            connection.commit()
            if is_sqlite(migration_engine):
                problems = connection.execute(text("PRAGMA foreign_key_check")).fetchall()
                if problems:
                    raise TrackerError(
                        f"Migration left {len(problems)} rows that break foreign keys; restore the backup."
                    )
    finally:
        migration_engine.dispose()


def upgrade(url: str, revision: str = "head") -> None:
    """Create the schema or migrate it to ``revision``."""
    _run(url, lambda config: command.upgrade(config, revision))


def downgrade(url: str, revision: str) -> None:
    """Migrate the schema down to ``revision`` (for development and tests)."""
    _run(url, lambda config: command.downgrade(config, revision))


def require_current_schema(engine: Engine) -> None:
    """Stop with one line naming the command to run when the schema is missing or outdated."""
    try:
        current = current_revision(engine)
    except Exception as error:  # unreachable server, bad credentials…
        raise TrackerError(
            f"Cannot open the database: {type(error).__name__}. Check --db / NCS_TRACKER_DB."
        ) from None
    head = head_revision()
    if current is None:
        raise SchemaNotReady("This database has no ncs-tracker schema yet; run: ncs-tracker db upgrade")
    if current != head:
        script = ScriptDirectory.from_config(alembic_config("sqlite://"))
        known = {rev.revision for rev in script.walk_revisions()}
        if current not in known:
            raise SchemaNotReady(
                f"This database was migrated by a newer ncs-tracker (revision {current}); upgrade the tool."
            )
        raise SchemaNotReady(
            f"This database schema is outdated ({current}, current is {head}); run: ncs-tracker db upgrade"
        )
