"""Engine and session factory.

SQLite connections get ``foreign_keys=ON``, WAL journalling and a busy timeout; migrations use their own
connection with foreign keys OFF (see :mod:`tracker.db.migrate`). PostgreSQL goes through psycopg 3.
"""

from __future__ import annotations

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


def make_engine(url: str, *, foreign_keys: bool = True) -> Engine:
    """Create an engine for ``url``.

    For SQLite, every new connection is set up with the pragmas; the listener is registered on this engine
    only, so a migration engine made with ``foreign_keys=False`` is not affected.
    """
    url = normalise_url(url)
    if not is_sqlite(url):
        return create_engine(url, pool_pre_ping=True)
    engine = create_engine(url, connect_args={"timeout": SQLITE_BUSY_TIMEOUT_MS / 1000})

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
