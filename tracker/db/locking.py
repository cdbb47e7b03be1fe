"""Writers that meet: take the write lock on purpose, wait a bounded time, and say so in words.

SQLite has one writer at a time. A transaction that reads first and writes later can be overtaken between its
read and its first write; :func:`take_write_lock` takes the lock before reading (``BEGIN IMMEDIATE``), waiting
at most the connection's busy timeout (10 s, :mod:`tracker.db.session`). PostgreSQL has row locks instead; the
same function bounds every lock wait of the transaction to the same 10 s (``lock_timeout``) and, when asked,
takes a transaction-level advisory lock that serialises one kind of writer (imports).

A lock that cannot be had in time, a PostgreSQL serialisation failure or deadlock becomes
:class:`DatabaseBusy`, a :class:`~tracker.errors.TrackerError` with a sentence for the user
(:func:`busy_error`), never a driver's exception.

:func:`checkpoint` is a test hook: two-process tests use it to hold a command at a named point (to race two
imports deterministically, or to kill one at a chosen moment). Without ``NCS_TRACKER_TEST_CHECKPOINTS`` in the
environment it does nothing.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import TypeVar

from sqlalchemy import text
from sqlalchemy.exc import DBAPIError
from sqlalchemy.orm import Session

from tracker.db.session import SQLITE_BUSY_TIMEOUT_MS
from tracker.errors import TrackerError

# One bound for both backends: SQLite's busy timeout, PostgreSQL's lock_timeout (milliseconds).
LOCK_WAIT_MS = SQLITE_BUSY_TIMEOUT_MS
BUSY_MESSAGE = "another ncs-tracker process is writing to this database; try again when it has finished"
# PostgreSQL advisory lock keys (63-bit integers from short names), one per kind of serialised writer.
ADVISORY_KEYS = {
    "import": int.from_bytes(b"ncs-impo", "big") & 0x7FFF_FFFF_FFFF_FFFF,
    "evaluations": int.from_bytes(b"ncs-eval", "big") & 0x7FFF_FFFF_FFFF_FFFF,
}
# SQLSTATEs of PostgreSQL errors that mean "another transaction was in the way": lock_not_available (a
# lock_timeout expired), serialization_failure, deadlock_detected.
PG_BUSY_STATES = frozenset({"55P03", "40001", "40P01"})
SQLITE_BUSY_WORDS = ("database is locked", "database table is locked", "database is busy")
CHECKPOINT_ENV = "NCS_TRACKER_TEST_CHECKPOINTS"
CHECKPOINT_MAX_WAIT_S = 120.0

T = TypeVar("T")


class DatabaseBusy(TrackerError):
    """Another process held the database (or the rows needed) longer than the bounded wait."""

    def __init__(self, note: str | None = None):
        self.note = note
        waited = f" (waited up to {LOCK_WAIT_MS / 1000:g} s)"
        super().__init__(BUSY_MESSAGE + waited + (f"; {note}" if note else ""))


def is_busy(error: BaseException) -> bool:
    """Whether ``error`` (a SQLAlchemy or driver exception) says that another writer was in the way."""
    if isinstance(error, DatabaseBusy):
        return True
    original = error.orig if isinstance(error, DBAPIError) else error
    if original is None:
        return False
    if getattr(original, "sqlstate", None) in PG_BUSY_STATES:
        return True
    if type(original).__module__ != "sqlite3":
        return False
    name = getattr(original, "sqlite_errorname", "") or ""  # extended names too: SQLITE_BUSY_SNAPSHOT
    return name.startswith(("SQLITE_BUSY", "SQLITE_LOCKED")) or any(
        w in str(original).lower() for w in SQLITE_BUSY_WORDS
    )


def is_unique_violation(error: BaseException) -> bool:
    """Whether ``error`` is a UNIQUE constraint refusing a row (SQLite or PostgreSQL)."""
    original = error.orig if isinstance(error, DBAPIError) else error
    if getattr(original, "sqlstate", None) == "23505":
        return True
    return type(original).__module__ == "sqlite3" and str(original).startswith("UNIQUE constraint failed")


def busy_error(error: BaseException) -> DatabaseBusy | None:
    """The :class:`DatabaseBusy` that ``error`` stands for, or ``None`` when it is something else."""
    if isinstance(error, DatabaseBusy):
        return error
    return DatabaseBusy() if is_busy(error) else None


@contextmanager
def busy_as_error(note: str | None = None) -> Iterator[None]:
    """Turn a lock error raised inside the block into :class:`DatabaseBusy` (at a service's boundary)."""
    try:
        yield
    except DatabaseBusy:
        raise
    except Exception as error:
        if not is_busy(error):
            raise
        raise DatabaseBusy(note) from None


def take_write_lock(session: Session, *, serialise: str | None = None) -> None:
    """Make the session's transaction a writer before it reads what it will write on.

    SQLite: ``BEGIN IMMEDIATE`` (the database's single write lock, waited for up to the busy timeout); when
    the transaction has begun already, an empty UPDATE takes the lock (the driver begins a transaction only
    at its first write, so it usually holds the lock then). PostgreSQL: every lock wait of this transaction
    is bounded by ``lock_timeout``, and with ``serialise`` (a key of :data:`ADVISORY_KEYS`) a transaction
    advisory lock lets one writer of that kind at a time through. Raises :class:`DatabaseBusy` on timeout.
    """
    connection = session.connection()
    with busy_as_error():
        if connection.dialect.name == "sqlite":
            driver = connection.connection.driver_connection
            if not driver.in_transaction:
                connection.exec_driver_sql("BEGIN IMMEDIATE")
            else:
                connection.exec_driver_sql("UPDATE visits SET id = id WHERE 0 = 1")
            return
        if connection.dialect.name == "postgresql":
            connection.execute(text(f"SET LOCAL lock_timeout = {int(LOCK_WAIT_MS)}"))
            if serialise is not None:
                connection.execute(
                    text("SELECT pg_advisory_xact_lock(:key)"), {"key": ADVISORY_KEYS[serialise]}
                )


def retry_when_busy(work: Callable[[], T], *, attempts: int = 3) -> T:
    """Run ``work`` (one whole transaction, rolled back by itself on failure) again when another writer was
    in the way, at most ``attempts`` times in all (each attempt waits at most :data:`LOCK_WAIT_MS`); then
    raise :class:`DatabaseBusy`."""
    for attempt in range(1, attempts + 1):
        try:
            return work()
        except Exception as error:
            busy = busy_error(error)
            if busy is None:
                raise
            if attempt == attempts:
                raise busy from None
    raise AssertionError("unreachable")  # pragma: no cover - the loop returns or raises


def checkpoint(name: str) -> None:
    """Test hook: hold here while the test asks for it.

    With ``NCS_TRACKER_TEST_CHECKPOINTS`` naming a folder that holds a file ``NAME.hold``, write
    ``NAME.reached.PID`` and wait until ``NAME.hold`` is gone (at most two minutes). Otherwise return at once.
    """
    folder = os.environ.get(CHECKPOINT_ENV)
    if not folder:
        return
    hold = Path(folder) / f"{name}.hold"
    if not hold.exists():
        return
    (Path(folder) / f"{name}.reached.{os.getpid()}").touch()
    deadline = time.monotonic() + CHECKPOINT_MAX_WAIT_S
    while hold.exists() and time.monotonic() < deadline:
        time.sleep(0.02)
