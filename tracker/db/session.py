"""Engine and session factory.

SQLite connections get ``foreign_keys=ON``, WAL journalling and a busy timeout; migrations use their own
connection with foreign keys OFF (see :mod:`tracker.db.migrate`). PostgreSQL goes through psycopg 3.

A new SQLite database file is created readable and writable by its owner only (mode 0600) before SQLite
opens it; SQLite gives its ``-wal`` and ``-shm`` files the main file's mode, so they are private too.
"""

from __future__ import annotations

import os
from pathlib import Path

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import make_url
from sqlalchemy.orm import Session, sessionmaker

SQLITE_BUSY_TIMEOUT_MS = 10_000


def normalise_url(url: str) -> str:
    """Route plain ``postgresql://`` URLs to psycopg 3 (the driver this project installs)."""
    parsed = make_url(url)
    if parsed.drivername in ("postgresql", "postgres"):
        parsed = parsed.set(drivername="postgresql+psycopg")
    return parsed.render_as_string(hide_password=False)


def is_sqlite(url_or_engine: str | Engine) -> bool:
    url = url_or_engine.url if isinstance(url_or_engine, Engine) else make_url(url_or_engine)
    return url.get_backend_name() == "sqlite"


def sqlite_file(url: str) -> Path | None:
    """The file of an SQLite URL, or ``None`` (another backend, an in-memory database, a ``file:`` URI)."""
    parsed = make_url(url)
    if parsed.get_backend_name() != "sqlite" or parsed.database in (None, "", ":memory:"):
        return None
    if parsed.query.get("uri") in ("true", "1") or parsed.database.startswith("file:"):
        return None
    return Path(parsed.database)


def create_private_file(path: Path) -> bool:
    """Create ``path`` empty with mode 0600 (owner only) unless it exists; ``True`` when this call created it.

    Exclusive creation (``O_EXCL``) never follows a link planted at ``path`` and never truncates a file
    another process made in between. A missing folder is left for SQLite to report as it always has.
    """
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0)
    try:
        os.close(os.open(path, flags, 0o600))
    except (FileExistsError, FileNotFoundError, NotADirectoryError):
        return False
    return True


def make_engine(url: str, *, foreign_keys: bool = True) -> Engine:
    """Create an engine for ``url``.

    For SQLite, every new connection is set up with the pragmas; the listener is registered on this engine
    only, so a migration engine made with ``foreign_keys=False`` is not affected. A database file that does
    not exist yet is created with mode 0600 before the first connection (SQLite itself would follow the umask,
    typically giving 0644).
    """
    url = normalise_url(url)
    if not is_sqlite(url):
        return create_engine(url, pool_pre_ping=True)
    engine = create_engine(url, connect_args={"timeout": SQLITE_BUSY_TIMEOUT_MS / 1000})
    path = sqlite_file(url)

    @event.listens_for(engine, "do_connect")
    def _private_file(_dialect, _record, _cargs, _cparams) -> None:
        # Before SQLite opens (and so creates) the file: a new database starts owner-only.
        if path is not None and not path.exists():
            create_private_file(path)

    @event.listens_for(engine, "connect")
    def _sqlite_pragmas(dbapi_connection, _record):  # pragma: no cover - exercised by every SQLite test
        cursor = dbapi_connection.cursor()
        cursor.execute(f"PRAGMA foreign_keys={'ON' if foreign_keys else 'OFF'}")
        cursor.execute("PRAGMA journal_mode=WAL")
        cursor.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_TIMEOUT_MS}")
        cursor.execute("PRAGMA synchronous=NORMAL")
        cursor.close()

    return engine


def make_session_factory(engine: Engine) -> sessionmaker[Session]:
    """Sessions whose objects stay readable after commit; the caller owns the transaction."""
    return sessionmaker(engine, expire_on_commit=False)
