"""Entry points: :func:`import_file` (a file, long ones in blocks) and :func:`import_table` (a parsed
table: a file, an upload or the entry form)."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

from sqlalchemy.orm import Session

from tracker.db.locking import busy_as_error
from tracker.services.importing.blocks import _import_stream
from tracker.services.importing.dispatch import _check_and_store, _record_import
from tracker.services.importing.report import ImportReport
from tracker.services.tables import InputTable, open_stream, read_table


def import_file(
    session: Session,
    path: Path,
    *,
    username: str,
    dry_run: bool = False,
    replace: bool = False,
    force: bool = False,
    allow_unusual: bool = False,
    today: dt.date | None = None,
) -> ImportReport:
    """Import one file (kind recognised from its header). Raises :class:`InputRejected` on any problem.

    A long CSV file of measurements, treatments or scores is read, checked and written in blocks of whole
    patients (:class:`~tracker.services.tables.TableStream`), so that memory does not grow with the file;
    the blocks are written inside a savepoint, and a file with any problem (or one that is not regular
    enough to be read in blocks) is rolled back to it and imported whole, which names every problem.
    ``replace`` imports are read whole: they compare with versions read before the write lock.
    """
    if not replace:
        stream = open_stream(path)
        if stream is not None:
            with busy_as_error():
                report = _import_stream(
                    session,
                    stream,
                    username=username,
                    dry_run=dry_run,
                    allow_unusual=allow_unusual,
                    today=today,
                )
            if report is not None:
                return report
    return import_table(
        session,
        read_table(path),
        username=username,
        dry_run=dry_run,
        replace=replace,
        force=force,
        allow_unusual=allow_unusual,
        today=today,
    )


def import_table(
    session: Session,
    table: InputTable,
    *,
    username: str,
    dry_run: bool = False,
    replace: bool = False,
    force: bool = False,
    allow_unusual: bool = False,
    today: dt.date | None = None,
) -> ImportReport:
    """Import a parsed table (from a file, an upload or the entry form): the same checks and storage.

    ``force`` (with ``replace``): replace a stored visit even when it changed after the file's base version;
    recorded in the audit trail. Another writer holding the database past the bounded wait raises
    :class:`~tracker.db.locking.DatabaseBusy`.
    """
    with busy_as_error():
        return _import_table(
            session,
            table,
            username=username,
            dry_run=dry_run,
            replace=replace,
            force=force,
            allow_unusual=allow_unusual,
            today=today,
        )


def _import_table(
    session: Session,
    table: InputTable,
    *,
    username: str,
    dry_run: bool,
    replace: bool,
    force: bool,
    allow_unusual: bool,
    today: dt.date | None,
) -> ImportReport:
    forced: list[str] = []
    report = _check_and_store(
        session,
        table,
        username=username,
        dry_run=dry_run,
        replace=replace,
        force=force,
        allow_unusual=allow_unusual,
        today=today,
        forced=forced,
    )
    report.rows = len(table.cells)
    if not dry_run:
        _record_import(
            session,
            table.kind,
            table.sha256,
            report,
            username=username,
            replace=replace,
            force=force,
            allow_unusual=allow_unusual,
            forced=forced,
        )
    return report
