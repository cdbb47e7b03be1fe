"""Schema migrations (Alembic) and the schema-status check every command makes.

On SQLite, Alembic's batch mode recreates tables (copy, DROP, rename). With ``foreign_keys=ON`` the DROP
would fire ``ON DELETE CASCADE`` on child tables and silently delete data, so migrations run on a
dedicated engine whose connections have foreign keys OFF (set before any transaction begins, because
SQLite ignores the pragma inside one), and ``PRAGMA foreign_key_check`` runs afterwards.

A revision that rewrites a large table (0006 compresses the saved traces) reports progress through
``config.attributes["progress"]`` and names the tables whose old data it left behind in
``config.attributes["reclaim"]``; :func:`upgrade` then reclaims that space once Alembic has committed
(SQLite ``VACUUM`` and PostgreSQL ``VACUUM FULL`` cannot run inside a transaction).
"""

from __future__ import annotations

import functools
import sys
from collections.abc import Callable
from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Engine, text

from tracker.db.session import is_sqlite, make_engine, sqlite_file
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


@functools.cache
def head_revision() -> str:
    """The newest revision of the installed migrations (read once per process: the scripts do not change)."""
    script = ScriptDirectory.from_config(alembic_config("sqlite://"))
    head = script.get_current_head()
    assert head is not None
    return head


def current_revision(engine: Engine) -> str | None:
    with engine.connect() as connection:
        return MigrationContext.configure(connection).get_current_revision()


# The signature of a progress callback: (what, done, total), e.g. ("converting saved evaluations", 10000,
# 165378). Revisions that rewrite many rows call it after every chunk.
Progress = Callable[[str, int, int], None]
PROGRESS_EVERY_ROWS = 10_000


def stderr_progress(every: int = PROGRESS_EVERY_ROWS) -> Progress:
    """A progress callback printing a line on stderr every ``every`` rows and at the end (long runs only)."""
    last = {"printed": 0}

    def report(what: str, done: int, total: int) -> None:
        if total < every:
            return
        if done - last["printed"] >= every or done == total:
            last["printed"] = done
            print(f"{what}: {done:,} of {total:,} rows", file=sys.stderr, flush=True)

    return report


def _run(url: str, action, progress: Progress | None = None) -> set[str]:
    """Run ``action(config)`` on a migration engine in one transaction; return the tables whose freed
    space the revisions asked to reclaim (they set ``config.attributes["reclaim"]``)."""
    migration_engine = make_engine(url, foreign_keys=False)
    try:
        with migration_engine.connect() as connection:
            config = alembic_config(url)
            config.attributes["connection"] = connection
            if progress is not None:
                config.attributes["progress"] = progress
            action(config)
            connection.commit()
            if is_sqlite(migration_engine):
                problems = connection.execute(text("PRAGMA foreign_key_check")).fetchall()
                if problems:
                    raise TrackerError(
                        f"Migration left {len(problems)} rows that break foreign keys; restore the backup."
                    )
            return set(config.attributes.get("reclaim", ()))
    finally:
        migration_engine.dispose()


def reclaim_space(url: str, tables: set[str], say: Callable[[str], None] | None = None) -> None:
    """Give the space freed by a migration back to the file system, outside any transaction (VACUUM refuses
    to run inside one): on SQLite ``VACUUM`` rewrites the whole file, then the WAL is truncated; on
    PostgreSQL ``VACUUM FULL`` rewrites each table in ``tables`` (it locks the table while it runs)."""
    if not tables:
        return
    say = say or (lambda line: None)
    base = make_engine(url, foreign_keys=False)
    engine = base.execution_options(isolation_level="AUTOCOMMIT")
    try:
        with engine.connect() as connection:
            if is_sqlite(engine):
                path = sqlite_file(url)
                before = path.stat().st_size if path else None
                say("reclaiming free space (VACUUM) …")
                connection.exec_driver_sql("VACUUM")
                connection.exec_driver_sql("PRAGMA wal_checkpoint(TRUNCATE)")
                if path is not None and before is not None:
                    say(f"database file: {before / 1e6:,.1f} MB → {path.stat().st_size / 1e6:,.1f} MB")
            else:
                preparer = engine.dialect.identifier_preparer
                for table in sorted(tables):
                    say(f"reclaiming free space (VACUUM FULL {table}) …")
                    connection.exec_driver_sql(f"VACUUM FULL {preparer.quote(table)}")
    finally:
        base.dispose()


def upgrade(url: str, revision: str = "head", *, progress: Progress | None = None) -> None:
    """Create the schema or migrate it to ``revision``; then reclaim the space a revision freed.

    ``progress`` is called while a revision converts rows (default: a line on stderr every 10,000 rows);
    the reclaim step is announced on stderr after a conversion of at least that many rows."""
    report = progress or stderr_progress()
    converted = {"rows": 0}

    def counting(what: str, done: int, total: int) -> None:
        converted["rows"] = max(converted["rows"], total)
        report(what, done, total)

    tables = _run(url, lambda config: command.upgrade(config, revision), counting)
    long_run = converted["rows"] >= PROGRESS_EVERY_ROWS  # a small database is reclaimed silently
    reclaim_space(url, tables, (lambda line: print(line, file=sys.stderr, flush=True)) if long_run else None)


def downgrade(url: str, revision: str, *, progress: Progress | None = None) -> None:
    """Migrate the schema down to ``revision`` (for development and tests)."""
    tables = _run(url, lambda config: command.downgrade(config, revision), progress)
    reclaim_space(url, tables)


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
