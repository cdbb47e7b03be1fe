"""A long CSV file imported block by block (whole patients per block) inside a savepoint; rolled back to
it, for the whole-file import, on any problem."""

from __future__ import annotations

import datetime as dt

from sqlalchemy.orm import Session

from tracker.db.locking import take_write_lock
from tracker.errors import InputRejected, Problem
from tracker.services.importing.dispatch import _check_and_store, _record_import
from tracker.services.importing.report import ImportReport
from tracker.services.tables import InputTable, TableStream


class _ReadWhole(Exception):
    """A streamed file turned out to need the whole-file import (see :func:`_import_stream`)."""


def _import_stream(
    session: Session,
    stream: TableStream,
    *,
    username: str,
    dry_run: bool,
    allow_unusual: bool,
    today: dt.date | None,
) -> ImportReport | None:
    """Import a long file block by block; ``None`` (with nothing of it written) when it must be imported
    whole: a problem in any block, or a file not regular enough for blocks. The counts, accepted values and
    warnings add up to what the whole-file import reports, in the same order."""
    if not dry_run:  # a transaction of its own around the savepoint (SQLite: RELEASE must not commit)
        take_write_lock(session, serialise="import")
    savepoint = None if dry_run else session.begin_nested()
    total = ImportReport(kind=stream.kind, rows=0, dry_run=dry_run)
    keyed: list[tuple[tuple, Problem]] = []
    try:
        for cells in stream.blocks():
            part = _check_and_store(
                session,
                InputTable(cells=cells, sha256="", kind=stream.kind),
                username=username,
                dry_run=dry_run,
                replace=False,
                force=False,
                allow_unusual=allow_unusual,
                today=today,
                forced=[],
            )
            total.rows += len(cells)
            total.added += part.added
            total.replaced += part.replaced
            total.unchanged += part.unchanged
            total.patients_added += part.patients_added
            total.unusual += part.unusual
            keyed += zip(part.warning_keys, part.warnings, strict=True)
        if stream.unusual:
            raise _ReadWhole
    except (InputRejected, _ReadWhole):
        if savepoint is not None:
            savepoint.rollback()
        return None
    except BaseException:
        if savepoint is not None and savepoint.is_active:
            savepoint.rollback()
        raise
    if savepoint is not None:
        savepoint.commit()
    # The whole-file order: segment velocities before sensory ones, each by row; warnings by kind, then
    # by patient and visit date.
    total.unusual.sort(key=lambda p: (not p.message.startswith("segment"), p.row or 0))
    keyed.sort(key=lambda pair: pair[0])
    total.warnings = [problem for _, problem in keyed]
    total.warning_keys = [key for key, _ in keyed]
    if not dry_run:
        _record_import(
            session,
            stream.kind,
            stream.sha256,
            total,
            username=username,
            replace=False,
            force=False,
            allow_unusual=allow_unusual,
            forced=[],
        )
    return total
