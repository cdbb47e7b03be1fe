"""Import a measurements, treatments, scores or patients file: validate everything, then write in one
transaction.

The caller owns the transaction: on any :class:`~tracker.errors.InputRejected` nothing has been written.
Re-importing identical content changes no clinical data; changed content of a stored visit (or treatment,
or score) is refused unless ``replace`` is given, and a replaced visit keeps its earlier values in
``visit_revisions``.

Concurrent writers: an import reads the stored versions of its visits, then takes the write lock
(:func:`tracker.db.locking.take_write_lock`) and reads again before it compares and writes, so that two
imports of the same visit never both insert it, and a visit changed by someone else after the file's base
version (its ``visit_version`` column, else the version this import first read) is not replaced unless
``force``.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
from sqlalchemy import Date, DateTime, delete, func, insert, select, text, update
from sqlalchemy.orm import Session

from tracker.db.locking import busy_as_error, checkpoint, is_unique_violation, take_write_lock
from tracker.db.models import (
    NerveTest,
    OutcomeScore,
    Patient,
    PatientIdentity,
    StimulationSite,
    Treatment,
    Visit,
    utc_now,
)
from tracker.errors import InputRejected, Problem

# history as a module, its functions looked up when called: history imports measurements_check from this
# package, so importing history first runs this package while history is still half loaded.
from tracker.services import history
from tracker.services.access import audit
from tracker.services.importing.clinical_check import (
    SCORE_KEY,
    TREATMENT_KEY,
    validate_scores,
    validate_treatments,
)
from tracker.services.importing.measurements_check import (
    VISIT_KEY,
    MeasurementBatch,
    validate_measurements,
)
from tracker.services.importing.patients_check import IDENTITY_VALUES, RECORD_VALUES, validate_patients
from tracker.services.input_limits import guarded
from tracker.services.rows import chunks as _chunks
from tracker.services.rows import clean as _clean
from tracker.services.tables import ROW, InputTable, TableStream, open_stream, read_table

# Optional measurements column: the version of the stored visit that the file's values were made from
# (``ncs-tracker show`` prints it). With it, --replace goes ahead only while the stored visit is still that
# version. Read here, not by the file validator: it says which stored visit the rows amend, not what was
# measured.
VERSION_COLUMN = "visit_version"
# Tables, not mapped classes, in the queries of every import: Core statements compile faster and need no
# mapper configuration (a cost paid again by every new process, such as each ncs-tracker command).
_PATIENTS = Patient.__table__
_VISITS = Visit.__table__


@dataclass
class ImportReport:
    """What an import did (or, with ``dry_run``, would do)."""

    kind: str
    rows: int
    dry_run: bool
    added: int = 0
    replaced: int = 0
    unchanged: int = 0
    patients_added: int = 0
    identities: int = 0  # patients file: patients whose identity fields were added or replaced
    unusual: list[Problem] = field(default_factory=list)
    warnings: list[Problem] = field(default_factory=list)  # imported all the same; worth a look
    # Sort key of each warning (kind of warning, patient, visit date): a file imported in blocks lists its
    # warnings in the order of the whole file.
    warning_keys: list[tuple] = field(default_factory=list, repr=False)

    def summary(self) -> str:
        if self.kind == "patients":
            return self._patients_summary()
        noun = {"measurements": "visits", "treatments": "treatment periods", "scores": "scores"}[self.kind]
        verb = "would add" if self.dry_run else "added"
        text = (
            f"{self.kind}: {self.rows} rows checked; {verb} {self.added} {noun}, "
            f"{'would replace' if self.dry_run else 'replaced'} {self.replaced}, {self.unchanged} unchanged"
        )
        if self.kind == "measurements":
            text += f"; {self.patients_added} new patients"
        if self.unusual:
            text += f"; {len(self.unusual)} unusual values accepted with --allow-unusual"
        return text + (" (dry run: nothing written)" if self.dry_run else "")

    def _patients_summary(self) -> str:
        """Counts only: a patients file may carry names, and a summary never repeats one."""
        would = "would be " if self.dry_run else ""
        text = (
            f"patients: {self.rows} rows checked; {self.added} patients {would}given new details, "
            f"{self.replaced} {would}replaced, {self.unchanged} unchanged; identity fields of "
            f"{self.identities} patients {would}stored apart from the pseudonymous record"
        )
        return text + (" (dry run: nothing written)" if self.dry_run else "")


def _records(frame: pd.DataFrame, columns: list[str]) -> list[dict[str, Any]]:
    """Rows as dicts of Python values (None for missing), ready for an executemany."""
    data = frame[columns].astype(object)
    return data.where(frame[columns].notna(), None).to_dict("records")


def _allocate_ids(session: Session, table, count: int) -> list[int]:
    """Primary keys for ``count`` new rows of ``table``, which no concurrent writer can take.

    PostgreSQL: drawn from the table's own sequence. SQLite: the next integers after the largest key, read
    after a no-op UPDATE has taken SQLite's single write lock for this transaction.
    """
    connection = session.connection()
    if connection.dialect.name == "postgresql":
        drawn = connection.execute(
            text(
                "SELECT array_agg(nextval(pg_get_serial_sequence(:table, 'id'))) "
                "FROM generate_series(1, :count)"
            ),
            {"table": table.name, "count": count},
        ).scalar_one()
        return list(drawn or [])
    connection.execute(update(table).where(text("0 = 1")).values(id=table.c.id))
    start = connection.execute(select(func.coalesce(func.max(table.c.id), 0))).scalar_one() + 1
    return list(range(start, start + count))


def _bulk_insert(session: Session, table, frame: pd.DataFrame, columns: list[str]) -> None:
    """Insert many rows in bulk (tens of thousands of sites): ``COPY … FROM STDIN`` through psycopg 3 on
    PostgreSQL, the driver's own executemany on SQLite.

    Dates and times are converted exactly as SQLAlchemy would (its bind processors: ISO text on SQLite),
    once per distinct value; numbers, text and booleans are passed to the driver as they are, missing
    values as NULL.
    """
    if frame.empty:
        return
    connection = session.connection()
    dialect = connection.dialect
    if dialect.name == "postgresql":
        payload = _copy_text(frame, columns)
        if payload is not None:
            quote = dialect.identifier_preparer.quote
            copy_sql = f"COPY {quote(table.name)} ({', '.join(quote(c) for c in columns)}) FROM STDIN"
            cursor = connection.connection.driver_connection.cursor()
            try:
                with cursor.copy(copy_sql) as copy:
                    copy.write(payload)
            finally:
                cursor.close()
            return
    marker = "?" if dialect.paramstyle == "qmark" else "%s"
    quote = dialect.identifier_preparer.quote
    sql = (
        f"INSERT INTO {quote(table.name)} ({', '.join(quote(c) for c in columns)}) "
        f"VALUES ({', '.join([marker] * len(columns))})"
    )
    cells_by_column = []
    for column in columns:
        series = frame[column]
        if series.dtype == np.float64 and dialect.name == "sqlite":
            cells = series.tolist()  # SQLite stores a bound NaN as NULL: no per-cell conversion needed
        else:
            cells = series.astype(object).where(series.notna(), None).tolist()
        if isinstance(table.c[column].type, (Date, DateTime)):
            process = table.c[column].type.bind_processor(dialect) or (lambda value: value)
            converted = {
                v: process(v.to_pydatetime() if isinstance(v, pd.Timestamp) else v)
                for v in set(cells)
                if v is not None
            }
            cells = [None if v is None else converted[v] for v in cells]
        cells_by_column.append(cells)
    cursor = connection.connection.driver_connection.cursor()
    try:
        if dialect.name == "postgresql":
            # COPY: one statement streams every row (executemany sends them one by one, even pipelined).
            copy_sql = f"COPY {quote(table.name)} ({', '.join(quote(c) for c in columns)}) FROM STDIN"
            with cursor.copy(copy_sql) as copy:
                for row in zip(*cells_by_column, strict=True):
                    copy.write_row(row)
        else:
            cursor.executemany(sql, zip(*cells_by_column, strict=True))
    finally:
        cursor.close()


# Arrow types whose text (Arrow's cast to string) PostgreSQL reads back as the same value: numbers in their
# shortest exact form, booleans as true/false, text as it is (escaped below).
_COPY_TEXT_TYPES = (
    pa.types.is_floating,
    pa.types.is_integer,
    pa.types.is_boolean,
    pa.types.is_string,
    pa.types.is_null,  # a column with no value stated
)
_COPY_ESCAPES = (("\\", "\\\\"), ("\t", "\\t"), ("\n", "\\n"), ("\r", "\\r"))


def _copy_text(frame: pd.DataFrame, columns: list[str]) -> bytes | None:
    """The rows in ``COPY … FROM STDIN`` text format, built column by column by Arrow (instead of one
    ``write_row`` call per row, which cost more than everything else of the write); ``None`` when a column
    holds values of another kind (dates, times: they go row by row, formatted by psycopg).

    Missing values (NaN, None) become ``\\N`` (NULL); text is escaped as the format requires.
    """
    texts = []
    for column in columns:
        try:
            values = pa.Array.from_pandas(frame[column])  # NaN and None are nulls
        except (pa.ArrowInvalid, pa.ArrowTypeError):
            return None
        if isinstance(values, pa.ChunkedArray):
            values = values.combine_chunks()
        if pa.types.is_large_string(values.type):
            values = values.cast(pa.string())
        if not any(is_type(values.type) for is_type in _COPY_TEXT_TYPES):
            return None
        text_values = pc.cast(values, pa.large_string())
        if pa.types.is_string(values.type):
            for plain, escaped in _COPY_ESCAPES:
                text_values = pc.replace_substring(text_values, plain, escaped)
        texts.append(pc.fill_null(text_values, "\\N"))
    lines = pc.binary_join_element_wise(*texts, pa.scalar("\t", pa.large_string()))
    ending = pa.array([""] * len(frame), pa.large_string())  # joined with "\n": a newline after each row
    lines = pc.binary_join_element_wise(lines, ending, pa.scalar("\n", pa.large_string()))
    offsets = np.frombuffer(lines.buffers()[1], dtype=np.int64)[lines.offset : lines.offset + len(lines) + 1]
    return lines.buffers()[2].to_pybytes()[int(offsets[0]) : int(offsets[-1])]


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


def _check_and_store(
    session: Session,
    table: InputTable,
    *,
    username: str,
    dry_run: bool,
    replace: bool,
    force: bool,
    allow_unusual: bool,
    today: dt.date | None,
    forced: list[str],
) -> ImportReport:
    """Validate a table and store it (nothing of the import's own audit event); raises on any problem."""
    if table.kind == "measurements":
        batch, file_versions = _check_measurements(table.cells, allow_unusual=allow_unusual, today=today)
        report = _store_measurements(
            session,
            batch,
            username=username,
            dry_run=dry_run,
            replace=replace,
            force=force,
            file_versions=file_versions,
            forced=forced,
        )
    elif table.kind == "patients":
        frame = validate_patients(
            table.cells, today=today, known_patients=lambda codes: _stored_codes(session, codes)
        )
        report = _store_patients(session, frame, username=username, dry_run=dry_run, replace=replace)
    elif table.kind == "treatments":
        frame = validate_treatments(
            table.cells, today=today, known_patients=lambda codes: _stored_codes(session, codes)
        )
        report = _store_records(
            session, frame, kind="treatments", username=username, dry_run=dry_run, replace=replace
        )
    else:
        frame = validate_scores(
            table.cells, today=today, known_patients=lambda codes: _stored_codes(session, codes)
        )
        report = _store_records(
            session, frame, kind="scores", username=username, dry_run=dry_run, replace=replace
        )
    return report


def _check_measurements(
    cells: pd.DataFrame, *, allow_unusual: bool, today: dt.date | None
) -> tuple[MeasurementBatch, pd.DataFrame]:
    """Validate measurement cells: the batch and the ``visit_version`` stated per visit (no database
    read); raises on any problem."""
    cells, stated, version_problems = _stated_versions(cells)
    try:
        batch = validate_measurements(cells, allow_unusual=allow_unusual, today=today)
    except InputRejected as error:
        if not version_problems:
            raise
        merged = sorted(error.problems + version_problems, key=lambda p: p.row or 0)
        raise InputRejected(error.summary, merged) from None
    file_versions, disagreements = _versions_by_visit(batch, stated)
    if version_problems or disagreements:
        raise InputRejected(
            "The measurements file was refused",
            sorted(version_problems + disagreements, key=lambda p: p.row or 0),
        )
    return batch, file_versions


def _record_import(
    session: Session,
    kind: str,
    sha256: str,
    report: ImportReport,
    *,
    username: str,
    replace: bool,
    force: bool,
    allow_unusual: bool,
    forced: list[str],
) -> None:
    """The import's audit event (file digest, counts, options, accepted values, warnings)."""
    audit.record(
        session,
        username=username,
        action=f"import_{kind}",
        entity="file",
        entity_key=f"sha256:{sha256[:16]}",
        after={
            "file_sha256": sha256,
            "rows": report.rows,
            "added": report.added,
            "replaced": report.replaced,
            "unchanged": report.unchanged,
            "patients_added": report.patients_added,
            **({"identities": report.identities} if kind == "patients" else {}),
            "replace": replace,
            "allow_unusual": allow_unusual,
            "unusual_values_accepted": [str(p) for p in report.unusual],
            "warnings": [str(p) for p in report.warnings],
            **({"force": True, "forced_over": forced} if force else {}),
        },
    )
    checkpoint("import-written")


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


# -- the visit version a file was made from ------------------------------------------------------------------


def _stated_versions(cells: pd.DataFrame) -> tuple[pd.DataFrame, pd.Series | None, list[Problem]]:
    """The cells without the ``visit_version`` column, the versions it states by file row (NaN where empty),
    and a problem for each cell that is not a whole number from 1."""
    if VERSION_COLUMN not in cells.columns:
        return cells, None, []
    raw = cells[VERSION_COLUMN].astype(str).str.strip()
    numbers = pd.to_numeric(raw.where(raw != ""), errors="coerce")
    valid = numbers.notna() & (numbers >= 1) & (numbers <= 2**31 - 1) & (numbers == numbers.round())
    bad = (raw != "") & ~valid
    problems = [
        Problem(
            int(row),
            VERSION_COLUMN,
            value[:20],
            "expected the stored visit's version as a whole number from 1 (ncs-tracker show prints it as "
            "'version N'), or an empty cell",
        )
        for row, value in zip(cells.loc[bad, ROW], raw[bad])
    ]
    stated = pd.Series(numbers.where(valid).to_numpy(), index=cells[ROW].to_numpy())
    return cells.drop(columns=[VERSION_COLUMN]), stated, problems


def _versions_by_visit(
    batch: MeasurementBatch, stated: pd.Series | None
) -> tuple[pd.DataFrame, list[Problem]]:
    """One ``file_version`` per visit that states one (empty cells are left out); a visit whose rows state
    different versions is a problem at its first disagreeing row."""
    if stated is None or batch.rows is None:
        return pd.DataFrame(columns=[*VISIT_KEY, "file_version"]), []
    rows = batch.rows[[ROW, *VISIT_KEY]].assign(file_version=batch.rows[ROW].map(stated))
    rows = rows[rows["file_version"].notna()].sort_values(ROW)
    first = rows.drop_duplicates(VISIT_KEY).set_index(VISIT_KEY)["file_version"]
    expected = rows.set_index(VISIT_KEY).index.map(first)
    differ = rows[rows["file_version"].to_numpy() != np.asarray(expected, dtype=float)]
    differ = differ.drop_duplicates(VISIT_KEY)
    problems = [
        Problem(
            int(getattr(r, ROW)),
            VERSION_COLUMN,
            None,
            f"the rows of the visit of {r.patient} on {r.visit_date.isoformat()} state different "
            f"versions ({int(first.loc[(r.patient, r.visit_date)])} and {int(r.file_version)}); a visit "
            "is made from one version",
        )
        for r in differ.itertuples()
    ]
    return first.astype(int).reset_index(), problems


def _version_conflicts(
    session: Session,
    visits: pd.DataFrame,
    replaced: pd.Series,
    base: dict[tuple[str, dt.date], int] | None,
    *,
    force: bool,
    forced: list[str],
    lock: bool,
) -> tuple[list[Problem], dict[int, dict[str, Any]]]:
    """The stored visits this import would replace although they changed after the file's base version.

    The base of a visit is its ``visit_version`` in the file, else the version this import read before it took
    the write lock (``base``; ``None`` in a dry run, where nothing is waited for). Refused, unless ``force``:
    then listed in ``forced`` (for the import's audit event) and returned by visit id (for the visit's own).
    ``lock``: read the stored versions as the writer, locking the rows (:func:`_locked_versions`).
    """
    rows = visits[replaced]
    if rows.empty:
        return [], {}
    current = _locked_versions(session, [int(v) for v in rows["visit_id"]]) if lock else {}
    late: list[tuple[Any, int, int | None, bool]] = []
    for row in rows.itertuples():
        stored = current.get(int(row.visit_id), int(row.version))
        if pd.notna(row.file_version):
            based_on, from_file = int(row.file_version), True
        elif base is not None:
            based_on, from_file = base.get((row.patient, row.visit_date)), False
        else:
            continue
        if based_on != stored:
            late.append((row, stored, based_on, from_file))
    if not late:
        return [], {}
    who = history.last_changes(session, [int(row.visit_id) for row, *_ in late])
    problems, overridden = [], {}
    for row, stored, based_on, from_file in late:
        visit = f"the visit of {row.patient} on {row.visit_date.isoformat()}"
        now = f"it is stored as version {stored}, {who.get(int(row.visit_id), 'changed by someone else')}"
        if from_file:
            what = f"{visit} changed after version {based_on}, the version this file was made from: {now}"
        elif based_on is None:
            what = f"{visit} was stored by another process while this import ran: {now}"
        else:
            what = (
                f"{visit} was changed by another process while this import ran (it read version "
                f"{based_on}): {now}"
            )
        if force:
            base_words = "no stored visit" if based_on is None else f"version {based_on}"
            forced.append(
                f"{row.patient}/{row.visit_date.isoformat()}: stored version {stored}, "
                f"file based on {base_words}"
            )
            overridden[int(row.visit_id)] = {
                "stored_version": stored,
                "based_on_version": based_on,
                "based_on": "visit_version column" if from_file else "read by this import",
            }
            continue
        problems.append(
            Problem(
                int(getattr(row, ROW)),
                VERSION_COLUMN if from_file else "visit_date",
                None,
                f"{what}; nothing was replaced — look at the stored values (ncs-tracker show "
                f"{row.patient} --visit {row.visit_date.isoformat()}), make the change on them, or "
                "import with --replace --force to overwrite them anyway",
            )
        )
    return problems, overridden


def _locked_versions(session: Session, visit_ids: list[int]) -> dict[int, int]:
    """The current version of each visit, read right before writing. PostgreSQL: the rows are locked for this
    transaction (FOR NO KEY UPDATE: others wait to change them; saving evaluations of them is not held up).
    SQLite: this transaction holds the database's write lock already."""
    found: dict[int, int] = {}
    for part in _chunks(visit_ids):
        query = select(Visit.id, Visit.version).where(Visit.id.in_(part)).with_for_update(key_share=True)
        found.update((int(i), int(v)) for i, v in session.execute(query))
    return found


def _base_versions(session: Session, batch: MeasurementBatch) -> dict[tuple[str, dt.date], int]:
    """(patient code, visit date) → stored version of the file's visits that are stored, read before the write
    lock: what this import starts from when the file states no ``visit_version``."""
    patients = _existing_patients(session, batch.patients["patient"].tolist())
    stored = _existing_visits(session, [int(i) for i in patients["patient_id"]])
    codes = patients.set_index("patient_id")["patient"]
    return {(codes[int(r.patient_id)], r.visit_date): int(r.version) for r in stored.itertuples()}


# -- measurements --------------------------------------------------------------------------------------------


def _existing_patients(session: Session, codes: list[str]) -> pd.DataFrame:
    found = []
    for part in _chunks(codes):
        found += map(
            tuple,
            session.execute(
                select(_PATIENTS.c.id, _PATIENTS.c.code, _PATIENTS.c.sex, _PATIENTS.c.birth_year).where(
                    _PATIENTS.c.code.in_(part)
                )
            ),
        )
    return pd.DataFrame(found, columns=["patient_id", "patient", "db_sex", "db_birth_year"])


def _stored_codes(session: Session, codes: list[str]) -> list[str]:
    return _existing_patients(session, codes)["patient"].tolist()


def _existing_visits(session: Session, patient_ids: list[int]) -> pd.DataFrame:
    found = []
    for part in _chunks(patient_ids):
        found += map(
            tuple,
            session.execute(
                select(
                    _VISITS.c.id,
                    _VISITS.c.patient_id,
                    _VISITS.c.visit_date,
                    _VISITS.c.content_sha256,
                    _VISITS.c.status,
                    _VISITS.c.version,
                ).where(_VISITS.c.patient_id.in_(part))
            ),
        )
    return pd.DataFrame(
        found, columns=["visit_id", "patient_id", "visit_date", "db_fingerprint", "status", "version"]
    )


def _patient_conflicts(patients: pd.DataFrame) -> list[Problem]:
    problems = []
    for row in patients.itertuples():
        for column, stored in (("sex", row.db_sex), ("birth_year", row.db_birth_year)):
            given = getattr(row, column)
            if given is None or pd.isna(given) or stored is None or pd.isna(stored):
                continue
            if (float(given) != float(stored)) if column == "birth_year" else given != stored:
                problems.append(
                    Problem(
                        int(getattr(row, ROW)),
                        column,
                        str(given if column == "sex" else int(given)),
                        f"patient {row.patient} is stored with {column} {stored!r}; import with --replace to "
                        "change it",
                    )
                )
    return problems


def _store_measurements(
    session: Session,
    batch: MeasurementBatch,
    *,
    username: str,
    dry_run: bool,
    replace: bool,
    force: bool = False,
    file_versions: pd.DataFrame | None = None,
    forced: list[str] | None = None,
) -> ImportReport:
    report = ImportReport(kind="measurements", rows=0, dry_run=dry_run, unusual=batch.unusual)
    forced = [] if forced is None else forced
    # What this import starts from, read before it waits for the write lock; then everything is read again
    # as the writer, so that another import's visits are seen (as unchanged, or as conflicts) and a visit
    # replaced meanwhile is noticed.
    base = _base_versions(session, batch) if replace and not dry_run else None
    checkpoint("import-read")
    if not dry_run:
        take_write_lock(session, serialise="import")
    checkpoint("import-locked")
    codes = batch.patients["patient"].tolist()
    patients = batch.patients.merge(_existing_patients(session, codes), on="patient", how="left")
    conflicts = _patient_conflicts(patients[patients["patient_id"].notna()])

    known_ids = [int(i) for i in patients["patient_id"].dropna()]
    stored = _existing_visits(session, known_ids)
    visits = batch.visits.merge(patients[["patient", "patient_id"]], on="patient", how="left")
    visits = visits.merge(stored, on=["patient_id", "visit_date"], how="left")
    if file_versions is None:
        file_versions = pd.DataFrame(columns=[*VISIT_KEY, "file_version"])
    visits = visits.merge(file_versions, on=VISIT_KEY, how="left")
    is_stored = visits["visit_id"].notna()
    unknown = is_stored & (visits["db_fingerprint"] == "")
    if unknown.any():  # stored before fingerprints existed (or after a downgrade): compute from the rows
        recomputed = history.stored_fingerprints(session, [int(v) for v in visits.loc[unknown, "visit_id"]])
        visits.loc[unknown, "db_fingerprint"] = visits.loc[unknown, "visit_id"].map(recomputed)
    unchanged = is_stored & (visits["db_fingerprint"] == visits["fingerprint"])
    changed = is_stored & ~unchanged
    forced_visits: dict[int, dict[str, Any]] = {}
    if not replace:
        conflicts += history.describe_changes(session, visits[changed], batch)
    else:
        late, forced_visits = _version_conflicts(
            session, visits, changed, base, force=force, forced=forced, lock=not dry_run
        )
        conflicts += late
    if conflicts:
        raise InputRejected(
            "The file conflicts with stored data", sorted(conflicts, key=lambda p: p.row or 0)
        )  # stable: a visit's line first

    new_patients = patients[patients["patient_id"].isna()]
    report.patients_added = len(new_patients)
    report.unchanged = int(unchanged.sum())
    report.replaced = int(changed.sum())
    report.added = int((~is_stored).sum())
    written = ~unchanged
    stored_dates = stored.assign(
        patient=stored["patient_id"].map(patients.set_index("patient_id")["patient"].to_dict())
    )
    keyed = [
        (number, *key, problem)
        for number, found in enumerate(
            (
                _single_nerve_visits(batch, visits[written]),
                _date_slips(visits[written], batch.visits, stored_dates),
                _versions_of_new_visits(visits[~is_stored]),
            )
        )
        for key, problem in found
    ]
    report.warnings = [problem for *_, problem in keyed]
    report.warning_keys = [(number, patient, day) for number, patient, day, _ in keyed]
    if dry_run:
        return report
    try:
        _write_measurements(
            session,
            batch,
            patients,
            new_patients,
            visits,
            is_stored,
            unchanged,
            changed,
            username=username,
            replace=replace,
            forced_visits=forced_visits,
        )
    except Exception as error:
        if not is_unique_violation(error):
            raise
        raise _stored_meanwhile(visits[~unchanged]) from None
    return report


def _write_measurements(
    session: Session,
    batch: MeasurementBatch,
    patients: pd.DataFrame,
    new_patients: pd.DataFrame,
    visits: pd.DataFrame,
    is_stored: pd.Series,
    unchanged: pd.Series,
    changed: pd.Series,
    *,
    username: str,
    replace: bool,
    forced_visits: dict[int, dict[str, Any]],
) -> None:
    """Write what :func:`_store_measurements` decided: new patients and visits, replaced visits (kept in
    their history first), nerve tests and sites."""
    if len(new_patients):
        latest = _latest_stated(batch.visits)
        new_patients = new_patients.assign(
            id=_allocate_ids(session, Patient.__table__, len(new_patients)),
            code=new_patients["patient"],
            birth_year=new_patients["birth_year"].astype("Int64"),
            diagnosis=new_patients["patient"].map(latest["diagnosis"]),
            phenotype=new_patients["patient"].map(latest["phenotype"]),
            created_at=utc_now(),
        )
        columns = ["id", "code", "sex", "birth_year", "diagnosis", "phenotype", "created_at"]
        _bulk_insert(session, Patient.__table__, new_patients, columns)
        patients.loc[new_patients.index, "patient_id"] = new_patients["id"]
    _fill_or_replace_patients(session, patients.drop(new_patients.index), username=username, replace=replace)
    visits["patient_id"] = visits["patient"].map(patients.set_index("patient")["patient_id"]).astype(int)

    replaced_ids = [int(v) for v in visits.loc[changed, "visit_id"]]
    if replaced_ids:
        history.keep_history(session, visits[changed], username=username, forced=forced_visits)
        for part in _chunks(replaced_ids):
            session.execute(delete(NerveTest).where(NerveTest.visit_id.in_(part)))
        columns = [
            "visit_id",
            "patient",
            "visit_date",
            "height_cm",
            "diagnosis",
            "phenotype",
            "fingerprint",
            "version",
        ]
        for row in _records(visits[changed], columns):
            done = session.execute(
                update(Visit)
                .where(Visit.id == row["visit_id"], Visit.version == int(row["version"]))
                .values(
                    height_cm=row["height_cm"],
                    diagnosis=row["diagnosis"],
                    phenotype=row["phenotype"],
                    content_sha256=row["fingerprint"],
                    version=int(row["version"]) + 1,
                    updated_at=utc_now(),
                )
            )
            if done.rowcount != 1:  # read as the writer: only a writer outside these rules gets here
                raise InputRejected(
                    "The file conflicts with stored data",
                    [
                        Problem(
                            None,
                            "visit_date",
                            None,
                            f"the visit of {row['patient']} on {row['visit_date'].isoformat()} changed while "
                            "it was being replaced (its version moved on); nothing was written — import "
                            "again",
                        )
                    ],
                )

    new_visits = visits[~is_stored].copy()
    if len(new_visits):
        now = utc_now()
        new_visits = new_visits.assign(
            id=_allocate_ids(session, Visit.__table__, len(new_visits)),
            content_sha256=new_visits["fingerprint"],
            status="final",
            version=1,
            created_at=now,
        )
        columns = [
            "id",
            "patient_id",
            "visit_date",
            "height_cm",
            "diagnosis",
            "phenotype",
            "content_sha256",
            "status",
            "version",
            "created_at",
        ]
        _bulk_insert(session, Visit.__table__, new_visits, columns)
        visits.loc[~is_stored, "visit_id"] = new_visits["id"].to_numpy()
    checkpoint("import-visits-written")

    written = visits[~unchanged][["patient", "visit_date", "visit_id"]]
    _insert_nerve_tests(session, batch, written)
    known = patients.drop(new_patients.index)["patient_id"]
    _refresh_patient_diagnosis(session, [int(i) for i in known])


Keyed = list[tuple[tuple[str, dt.date], Problem]]  # warnings with their visit (patient code, visit date)


def _versions_of_new_visits(new_visits: pd.DataFrame) -> Keyed:
    """A ``visit_version`` stated for a visit that is not stored (another database, a changed date?): the
    visit is added as version 1, with a warning."""
    stated = new_visits[new_visits["file_version"].notna()]
    return [
        (
            (r.patient, r.visit_date),
            Problem(
                int(getattr(r, ROW)),
                VERSION_COLUMN,
                None,
                f"visit_version {int(r.file_version)} is stated but no visit of {r.patient} on "
                f"{r.visit_date.isoformat()} is stored here: it is added as a new visit (version 1) — check "
                "the date if it was meant to amend one",
            ),
        )
        for r in stated.itertuples()
    ]


def _stored_meanwhile(written: pd.DataFrame) -> InputRejected:
    """The refusal when a UNIQUE constraint stopped this import: another writer stored or replaced one of its
    visits (or added one of its patients) between this import's reading and writing. Names the visits it was
    writing."""
    named = [f"the visit of {r.patient} on {r.visit_date.isoformat()}" for r in written.head(10).itertuples()]
    more = f" and {len(written) - len(named)} more" if len(written) > len(named) else ""
    return InputRejected(
        "Another process wrote some of the same visits at the same time",
        [
            Problem(
                None,
                "visit_date",
                None,
                f"{', '.join(named)}{more}: stored or replaced by another import while this one ran; "
                "nothing of this file was written — import it again (visits now stored the same are "
                "reported as unchanged, changed ones are listed)",
            )
        ],
    )


SLIP_WINDOW_DAYS = 14


def _single_nerve_visits(batch: MeasurementBatch, written: pd.DataFrame) -> Keyed:
    """A visit of one nerve (one side of one nerve, motor and/or sensory) is imported, with a warning: the
    criteria sets need several nerves, so it may be part of a study exported in pieces."""
    positions = _written_positions(batch, written)
    if positions is not None and batch.test_visit is not None:
        # By position: the distinct (nerve, side) pairs of each visit, counted on integer codes.
        tests = batch.nerve_tests
        nerve_codes, nerve_words = pd.factorize(tests["nerve"])
        side_codes, side_words = pd.factorize(tests["side"])
        pair = nerve_codes.astype(np.int64) * max(len(side_words), 1) + side_codes
        width = max(len(nerve_words), 1) * max(len(side_words), 1)
        distinct = np.unique(batch.test_visit.astype(np.int64) * width + pair)
        counts = np.bincount(distinct // width, minlength=len(batch.visits))
        first_test = np.full(len(batch.visits), -1, dtype=np.int64)
        seen, first_at = np.unique(batch.test_visit, return_index=True)
        first_test[seen] = first_at
        chosen = counts[positions] == 1
        tested = first_test[positions[chosen]]
        single = written[chosen].assign(
            nerve=tests["nerve"].to_numpy()[tested], side=tests["side"].to_numpy()[tested]
        )
    else:
        nerves = batch.nerve_tests.drop_duplicates(["patient", "visit_date", "nerve", "side"])
        counts = nerves.groupby(["patient", "visit_date"]).agg(
            count=("nerve", "size"), nerve=("nerve", "first"), side=("side", "first")
        )
        single = written.merge(
            counts[counts["count"] == 1].reset_index(), on=["patient", "visit_date"], how="inner"
        )
    return [
        (
            (row.patient, row.visit_date),
            Problem(
                int(getattr(row, ROW)),
                "nerve",
                None,
                f"the visit of {row.patient} on {row.visit_date.isoformat()} holds a single nerve "
                f"({row.nerve.replace('_', ' ')} {row.side}); the criteria need several nerves — check that "
                "the whole study is in the file",
            ),
        )
        for row in single.itertuples()
    ]


def _swapped(day: dt.date) -> dt.date | None:
    """The date with day and month exchanged, when that is another real date (2024-02-12 → 2024-12-02)."""
    if day.day == day.month or day.day > 12:
        return None
    try:
        return dt.date(day.year, day.day, day.month)
    except ValueError:
        return None


def _date_slips(written: pd.DataFrame, file_visits: pd.DataFrame, stored: pd.DataFrame) -> Keyed:
    """A visit within 14 days of another visit of the same patient, whose day and month swapped would be a
    real date, may carry a date-entry slip: imported, with a warning naming both dates."""
    days = written["visit_date"].tolist()
    swapped_of = {day: _swapped(day) for day in set(days)}  # once per distinct date
    could_slip = np.array([swapped_of[day] is not None for day in days], dtype=bool)
    candidates = [(row, swapped_of[row.visit_date]) for row in written[could_slip].itertuples()]
    if not candidates:
        return []
    dates: dict[str, set[dt.date]] = {}
    for frame in (file_visits, stored):
        for patient, day in zip(frame["patient"], frame["visit_date"]):
            if isinstance(patient, str):
                dates.setdefault(patient, set()).add(day)
    warnings = []
    for row, swapped in candidates:
        near = sorted(
            d for d in dates.get(row.patient, ()) if 0 < abs((d - row.visit_date).days) <= SLIP_WINDOW_DAYS
        )
        if not near:
            continue
        other = min(near, key=lambda d: abs((d - row.visit_date).days))
        gap = abs((other - row.visit_date).days)
        warnings.append(
            (
                (row.patient, row.visit_date),
                Problem(
                    int(getattr(row, ROW)),
                    "visit_date",
                    None,
                    f"the visit of {row.patient} on {row.visit_date.isoformat()} is {gap} "
                    f"day{'s' if gap != 1 else ''} from their visit on {other.isoformat()}; with day and "
                    f"month swapped it would be {swapped.isoformat()} — check the date for an entry slip",
                ),
            )
        )
    return warnings


def _latest_stated(visits: pd.DataFrame) -> dict[str, pd.Series]:
    """Per patient code: diagnosis and phenotype of their latest visit that states a diagnosis."""
    ordered = visits[visits["diagnosis"].notna()].sort_values(["patient", "visit_date"])
    latest = ordered.drop_duplicates("patient", keep="last").set_index("patient")
    return {column: latest[column] for column in ("diagnosis", "phenotype")}


def _fill_or_replace_patients(session: Session, known: pd.DataFrame, *, username: str, replace: bool) -> None:
    """Fill empty sex / birth year of stored patients; overwrite differing ones only with ``replace``."""
    for row in known.itertuples():
        changes = {}
        for column, stored in (("sex", row.db_sex), ("birth_year", row.db_birth_year)):
            given = getattr(row, column)
            if given is None or pd.isna(given):
                continue
            given = int(given) if column == "birth_year" else given
            if stored is None or pd.isna(stored) or (replace and given != stored):
                changes[column] = given
        if changes:
            before = {k: _clean(getattr(row, f"db_{k}")) for k in changes}
            session.execute(update(Patient).where(Patient.id == int(row.patient_id)).values(**changes))
            audit.record(
                session,
                username=username,
                action="update_patient",
                entity="patients",
                entity_key=row.patient,
                before=before,
                after=changes,
            )


def _written_positions(batch: MeasurementBatch, written: pd.DataFrame) -> np.ndarray | None:
    """The rows of ``batch.visits`` that ``written`` holds (its index, when it was cut from a frame aligned
    with ``batch.visits``, as :func:`_store_measurements` makes it), else ``None``."""
    if batch.site_test is None or batch.test_visit is None:
        return None
    positions = written.index.to_numpy()
    if positions.dtype.kind not in "iu" or (len(positions) and positions.max() >= len(batch.visits)):
        return None
    own = batch.visits.iloc[positions]
    if not (
        np.array_equal(own["patient"].to_numpy(), written["patient"].to_numpy())
        and np.array_equal(own["visit_date"].to_numpy(), written["visit_date"].to_numpy())
    ):
        return None
    return positions


def _insert_nerve_tests(session: Session, batch: MeasurementBatch, written: pd.DataFrame) -> None:
    """Insert the nerve tests and sites of the written visits (Core executemany: no ORM overhead).

    Nerve tests and sites are linked to their visits by the batch's positions (:attr:`MeasurementBatch.
    site_test`, :attr:`~MeasurementBatch.test_visit`): a merge on the text keys of every site cost more
    than the rest of this function. Rows are inserted in the batch's order either way.
    """
    if written.empty:
        return
    key = ["patient", "visit_date"]
    test_key = ["nerve", "side", "modality"]
    positions = _written_positions(batch, written)
    if positions is None:
        tests = batch.nerve_tests.merge(written, on=key, how="inner")
    else:
        visit_ids = np.full(len(batch.visits), -1, dtype=np.int64)
        visit_ids[positions] = written["visit_id"].astype(int).to_numpy()
        test_visit_ids = visit_ids[batch.test_visit]
        test_kept = test_visit_ids >= 0
        tests = batch.nerve_tests[test_kept].reset_index(drop=True)
        tests["visit_id"] = test_visit_ids[test_kept]
    tests["visit_id"] = tests["visit_id"].astype(int)
    tests["f_absent"] = tests["f_absent"].astype(bool)
    test_columns = [
        "visit_id",
        *test_key,
        "recording_site",
        "temperature_c",
        "lff_hz",
        "f_latency_ms",
        "f_absent",
        "f_persistence_pct",
        "wrist_entrapment",
    ]
    tests["nerve_test_id"] = _allocate_ids(session, NerveTest.__table__, len(tests))
    _bulk_insert(
        session, NerveTest.__table__, tests.rename(columns={"nerve_test_id": "id"}), ["id", *test_columns]
    )
    if positions is None:
        sites = batch.sites.merge(
            tests[[*key, *test_key, "nerve_test_id"]], on=[*key, *test_key], how="inner"
        )
    else:
        test_ids = np.full(len(batch.nerve_tests), -1, dtype=np.int64)
        test_ids[np.flatnonzero(test_kept)] = tests["nerve_test_id"].to_numpy()
        site_test_ids = test_ids[batch.site_test]
        site_kept = site_test_ids >= 0
        sites = batch.sites[site_kept].reset_index(drop=True)
        sites["nerve_test_id"] = site_test_ids[site_kept]
    sites["nerve_test_id"] = sites["nerve_test_id"].astype(int)
    site_columns = [
        "nerve_test_id",
        "site_order",
        "label",
        "distance_mm",
        "latency_ms",
        "peak_latency_ms",
        "amplitude_mv",
        "amplitude_uv",
        "duration_ms",
        "area_mvms",
    ]
    _bulk_insert(session, StimulationSite.__table__, sites, site_columns)


def _refresh_patient_diagnosis(session: Session, patient_ids: list[int]) -> None:
    """A patient's current diagnosis and phenotype are those of their latest visit that states a diagnosis."""
    for column in ("diagnosis", "phenotype"):
        latest = (
            select(_VISITS.c[column])
            .where(_VISITS.c.patient_id == _PATIENTS.c.id, _VISITS.c.diagnosis.is_not(None))
            .order_by(_VISITS.c.visit_date.desc())
            .limit(1)
            .scalar_subquery()
        )
        for part in _chunks(patient_ids):
            session.execute(update(_PATIENTS).where(_PATIENTS.c.id.in_(part)).values({column: latest}))


# -- treatments and scores -----------------------------------------------------------------------------------


def _store_records(
    session: Session, frame: pd.DataFrame, *, kind: str, username: str, dry_run: bool, replace: bool
) -> ImportReport:
    report = ImportReport(kind=kind, rows=0, dry_run=dry_run)
    model = Treatment if kind == "treatments" else OutcomeScore
    key = TREATMENT_KEY if kind == "treatments" else SCORE_KEY
    value_columns = (
        ["end_date", "dose", "dose_unit", "interval_days", "note"] if kind == "treatments" else ["value"]
    )
    date_column = "start_date" if kind == "treatments" else "score_date"
    frame = frame.rename(columns={"date": "score_date"}) if kind == "scores" else frame
    key = [date_column if k == "date" else k for k in key]

    if not dry_run:  # read as the writer: a record another import adds meanwhile is seen, not inserted twice
        take_write_lock(session, serialise="import")
    codes = sorted(frame["patient"].unique())
    ids = _existing_patients(session, codes).set_index("patient")["patient_id"]
    unknown = frame[~frame["patient"].isin(ids.index)]
    if len(unknown):  # validated without ``known_patients``: still refuse, row by row
        problems = [
            Problem(int(r), "patient", p, "unknown patient; import the patient's measurements first")
            for r, p in zip(unknown[ROW], unknown["patient"])
        ]
        raise InputRejected(f"The {kind} file was refused", problems)
    frame = frame.assign(patient_id=frame["patient"].map(ids).astype(int))
    key_db = ["patient_id"] + key[1:]

    stored_rows = []
    for part in _chunks([int(i) for i in ids]):
        records = model.__table__
        stored_rows += map(
            tuple,
            session.execute(
                select(records.c.id, *[records.c[c] for c in key_db + value_columns]).where(
                    records.c.patient_id.in_(part)
                )
            ),
        )
    stored = pd.DataFrame(stored_rows, columns=["record_id"] + key_db + [f"db_{c}" for c in value_columns])
    merged = frame.merge(stored, on=key_db, how="left")
    is_stored = merged["record_id"].notna()
    same = pd.Series(True, index=merged.index)
    for column in value_columns:
        a, b = merged[column], merged[f"db_{column}"]
        same &= (a.isna() & b.isna()) | (a.astype(object) == b.astype(object))
    unchanged = is_stored & same
    changed = is_stored & ~same
    if changed.any() and not replace:
        problems = []
        for r in merged[changed].to_dict("records"):
            for column in value_columns:
                given, stored = _jsonable(r[column]), _jsonable(r[f"db_{column}"])
                if given != stored:
                    record = (
                        f"{r['therapy'].replace('_', ' ')} from {r['start_date'].isoformat()}"
                        if kind == "treatments"
                        else f"{r['scale']} on {r['score_date'].isoformat()}"
                    )
                    unit = " days" if column == "interval_days" else ""
                    problems.append(
                        Problem(
                            int(r[ROW]),
                            column,
                            None,
                            f"differs from the stored {kind[:-1]} of {r['patient']} ({record}): "
                            f"{column.replace('_', ' ')} {history.shown_value(stored)} → "
                            f"{history.shown_value(given)}{unit}; "
                            "import with --replace to replace it",
                        )
                    )
        raise InputRejected("The file conflicts with stored data", problems)
    report.added, report.replaced, report.unchanged = (
        int((~is_stored).sum()),
        int(changed.sum()),
        int(unchanged.sum()),
    )
    if dry_run:
        return report
    if (~is_stored).any():
        added = merged[~is_stored]
        if "interval_days" in added:  # whole days, validated; stored as an integer
            added = added.assign(interval_days=added["interval_days"].astype("Int64"))
        _bulk_insert(session, model.__table__, added, key_db + value_columns)
    for r in merged[changed].itertuples():
        before = {c: _jsonable(getattr(r, f"db_{c}")) for c in value_columns}
        after = {c: _jsonable(getattr(r, c)) for c in value_columns}
        values = {c: _clean(getattr(r, c)) for c in value_columns}
        if "interval_days" in values and values["interval_days"] is not None:
            values["interval_days"] = int(values["interval_days"])
        session.execute(update(model).where(model.id == int(r.record_id)).values(**values))
        audit.record(
            session,
            username=username,
            action=f"replace_{kind[:-1]}",
            entity=model.__tablename__,
            entity_key=f"{r.patient}/{getattr(r, key[1])}/{getattr(r, key[-1])}",
            before=before,
            after=after,
        )
    return report


def _jsonable(value: Any) -> Any:
    value = _clean(value)
    return value.isoformat() if isinstance(value, dt.date) else value


# -- patients: onset date and identities ---------------------------------------------------------------------

RECORD_WORDS = {"sex": "sex", "birth_year": "birth year", "onset_date": "onset date"}
IDENTITY_WORDS = {"full_name": "name", "record_number": "record number", "birth_date": "birth date"}


@dataclass
class _PatientChange:
    """What one row of a patients file changes: values of the pseudonymous record (with the stored ones they
    replace) and identity fields (whose values are never audited or printed)."""

    row: int
    code: str
    patient_id: int
    record: dict[str, Any] = field(default_factory=dict)
    record_before: dict[str, Any] = field(default_factory=dict)
    identity: dict[str, Any] = field(default_factory=dict)
    identity_replaced: list[str] = field(default_factory=list)
    identity_stored: bool = False
    replaced: bool = False


def _store_patients(
    session: Session, frame: pd.DataFrame, *, username: str, dry_run: bool, replace: bool
) -> ImportReport:
    """Fill empty values of stored patients and their identities; a value that differs from a stored one is
    refused unless ``replace`` (as sex and birth year in a measurements file). Identity fields go to
    ``patient_identities`` only, and messages and the audit trail name the fields, never their values."""
    report = ImportReport(kind="patients", rows=0, dry_run=dry_run)
    if not dry_run:  # read as the writer: a value stored meanwhile by another import is compared, not lost
        take_write_lock(session, serialise="import")
    codes = sorted(frame["patient"].unique())
    record: dict[str, dict[str, Any]] = {}
    ids: dict[str, int] = {}
    for part in _chunks(codes):
        for row in session.execute(
            select(Patient.id, Patient.code, *[getattr(Patient, c) for c in RECORD_VALUES]).where(
                Patient.code.in_(part)
            )
        ):
            ids[row.code] = int(row.id)
            record[row.code] = {c: getattr(row, c) for c in RECORD_VALUES}
    unknown = frame[~frame["patient"].isin(list(ids))]
    if len(unknown):  # validated without ``known_patients``: still refuse, row by row
        raise InputRejected(
            "The patients file was refused",
            guarded(
                [
                    Problem(int(r), "patient", p, "unknown patient; import the patient's measurements first")
                    for r, p in zip(unknown[ROW], unknown["patient"])
                ]
            ),
        )
    identities: dict[int, dict[str, Any]] = {}
    for part in _chunks(sorted(ids.values())):
        for row in session.execute(
            select(PatientIdentity.patient_id, *[getattr(PatientIdentity, c) for c in IDENTITY_VALUES]).where(
                PatientIdentity.patient_id.in_(part)
            )
        ):
            identities[int(row.patient_id)] = {c: getattr(row, c) for c in IDENTITY_VALUES}

    changes, conflicts = [], []
    for r in frame.to_dict("records"):
        code = r["patient"]
        change = _PatientChange(row=int(r[ROW]), code=code, patient_id=ids[code])
        stored_identity = identities.get(change.patient_id)
        change.identity_stored = stored_identity is not None
        for column in RECORD_VALUES + IDENTITY_VALUES:
            given = _clean(r[column])
            if given is None:  # an empty cell keeps the stored value
                continue
            given = int(given) if column == "birth_year" else given
            is_identity = column in IDENTITY_VALUES
            stored = (stored_identity or {}).get(column) if is_identity else record[code][column]
            if stored == given:
                continue
            if stored is not None and not replace:
                if is_identity:  # neither value is shown: a name or record number is not for a message
                    message = (
                        f"patient {code} is stored with another {IDENTITY_WORDS[column]}; import with "
                        "--replace to replace it"
                    )
                else:
                    message = (
                        f"patient {code} is stored with {RECORD_WORDS[column]} "
                        f"{history.shown_value(stored)}, the file gives {history.shown_value(given)}; "
                        "import with --replace to replace it"
                    )
                conflicts.append(Problem(change.row, column, None, message))
                continue
            change.replaced = change.replaced or stored is not None
            if is_identity:
                change.identity[column] = given
                if stored is not None:
                    change.identity_replaced.append(column)
            else:
                change.record[column] = given
                change.record_before[column] = _jsonable(stored)
        changes.append(change)
    if conflicts:
        raise InputRejected(
            "The file conflicts with stored data", sorted(conflicts, key=lambda p: p.row or 0)
        )
    report.replaced = sum(c.replaced for c in changes)
    report.added = sum(bool(c.record or c.identity) and not c.replaced for c in changes)
    report.unchanged = sum(not (c.record or c.identity) for c in changes)
    report.identities = sum(bool(c.identity) for c in changes)
    report.warnings = _onsets_after_visits(session, changes)
    if dry_run:
        return report
    for change in changes:
        if change.record:
            session.execute(update(Patient).where(Patient.id == change.patient_id).values(**change.record))
            audit.record(
                session,
                username=username,
                action="update_patient",
                entity="patients",
                entity_key=change.code,
                before=change.record_before,
                after={k: _jsonable(v) for k, v in change.record.items()},
            )
        if change.identity:
            if change.identity_stored:
                session.execute(
                    update(PatientIdentity)
                    .where(PatientIdentity.patient_id == change.patient_id)
                    .values(**change.identity)
                )
            else:
                session.execute(
                    insert(PatientIdentity).values(patient_id=change.patient_id, **change.identity)
                )
            # The fields, never their values: the audit trail is read by people who may not see identities.
            audit.record(
                session,
                username=username,
                action="update_patient_identity",
                entity="patient_identities",
                entity_key=change.code,
                after={
                    "fields_set": sorted(change.identity),
                    "fields_replaced": sorted(change.identity_replaced),
                },
            )
    return report


def _onsets_after_visits(session: Session, changes: list[_PatientChange]) -> list[Problem]:
    """A new onset date after the patient's first stored visit is stored, with a warning: that visit's
    ``days_since_onset`` would be negative, which is more often a typing slip than a study before symptoms."""
    onsets = {c.patient_id: c for c in changes if "onset_date" in c.record}
    first: dict[int, dt.date] = {}
    for part in _chunks(sorted(onsets)):
        first.update(
            (int(pid), day)
            for pid, day in session.execute(
                select(Visit.patient_id, func.min(Visit.visit_date))
                .where(Visit.patient_id.in_(part))
                .group_by(Visit.patient_id)
            )
        )
    warnings = []
    for pid, change in onsets.items():
        onset, visit = change.record["onset_date"], first.get(pid)
        if visit is not None and onset > visit:
            warnings.append(
                Problem(
                    change.row,
                    "onset_date",
                    None,
                    f"the onset of {change.code} ({onset.isoformat()}) is after their first visit "
                    f"({visit.isoformat()}): days_since_onset of that visit is negative — check the date",
                )
            )
    return sorted(warnings, key=lambda p: p.row or 0)
