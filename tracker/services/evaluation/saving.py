"""Save evaluations: recompute what is stale (input fingerprints), a chunk of visits at a time, and write
the outcomes with their stored traces in bulk, audited."""

from __future__ import annotations

import hashlib
import json
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor, wait
from dataclasses import dataclass
from typing import Any, TypeVar

import pandas as pd
from sqlalchemy import and_, delete, select
from sqlalchemy.orm import Session

from tracker.criteria import engine
from tracker.criteria.model import SetResult, Settings
from tracker.db.locking import DatabaseBusy, checkpoint, retry_when_busy, take_write_lock
from tracker.db.models import Evaluation, Visit, utc_now
from tracker.db.types import canonical_json, compress_canonical
from tracker.domain.labels import settings_in_words
from tracker.services.access import audit
from tracker.services.evaluation.frames import _typed_visits, _visit_query, load_frames
from tracker.services.evaluation.traces import stored_traces
from tracker.services.limit_sets import LimitSetInfo, resolve
from tracker.services.rows import chunks as _chunks

T = TypeVar("T")


def _fingerprint_prefixes(visits: pd.DataFrame) -> dict[int, str]:
    """Per visit, the part of its input fingerprint that does not depend on the criteria set."""
    return {
        int(row.visit_key): f"{row.content_sha256}|{row.age_years}|{row.height_cm}|{row.sex}|{row.phenotype}|"
        for row in visits.itertuples()
    }


def _input_fingerprints(
    visits: pd.DataFrame | dict[int, str], info: LimitSetInfo, criteria_version: str, settings: Settings
) -> dict[int, str]:
    """What an evaluation depends on: the visit's content, the patient's age/height/sex, the limits set and
    version, the criteria version and the settings. ``visits``: the frame, or its
    :func:`_fingerprint_prefixes` (computed once for every criteria set)."""
    prefixes = _fingerprint_prefixes(visits) if isinstance(visits, pd.DataFrame) else visits
    fixed = f"{info.id}:{info.version}:{criteria_version}:{settings}".encode()
    return {key: hashlib.sha256(prefix.encode() + fixed).hexdigest() for key, prefix in prefixes.items()}


# Visits read, evaluated and saved at a time by refresh_evaluations. Memory stays bounded whatever the cohort
# (a chunk's traces are built and encoded for their column before the write lock is taken), and with
# ``commit_chunks`` a chunk holds the database's write lock for one to two seconds (measured on SQLite with
# traces stored as JSON text, 6 criteria sets), so that an import waits seconds, not minutes.
CHUNK_VISITS = 1000
# How often visits whose data changed while they were being evaluated are taken up again in the same run.
RECHECK_ROUNDS = 2
_EVALUATION_COLUMNS = (
    "visit_id",
    "criteria_id",
    "criteria_version",
    "limit_set_id",
    "limit_set_version",
    "input_sha256",
    "outcome",
    "result",
    "computed_at",
)
# PostgreSQL types of those columns, for COPY in binary.
_COPY_TYPES = ("int4", "varchar", "varchar", "int4", "int4", "varchar", "varchar", "bytea", "timestamptz")
_RESULT = _EVALUATION_COLUMNS.index("result")


def _rows(
    visits: pd.DataFrame | dict[int, str],
    result: SetResult,
    info: LimitSetInfo,
    settings: Settings,
    encode: Callable[[Any], Any],
) -> list[dict[str, Any]]:
    """The evaluation rows of ``visits`` (the frame, or its :func:`_fingerprint_prefixes`) for one criteria
    set, the trace in its stored form (:func:`~tracker.services.evaluation.traces.stored_traces`) already
    encoded by ``encode``: for its column (:func:`_trace_encoder`), or as canonical JSON that
    :func:`_write_part` compresses; either way before the write lock is taken. A visit the set gave no
    outcome for has no row."""
    fingerprints = _input_fingerprints(visits, info, result.version, settings)
    documents = stored_traces(result, list(fingerprints))
    now = utc_now()
    return [
        {
            "visit_id": key,
            "criteria_id": result.criteria,
            "criteria_version": result.version,
            "limit_set_id": info.id,
            "limit_set_version": info.version,
            "input_sha256": fingerprints[key],
            "outcome": str(documents[key]["outcome"]),
            "result": encode(documents[key]),
            "computed_at": now,
        }
        for key in fingerprints
        if key in documents
    ]


def _keys_in(column: Any, keys: list[int]) -> Any:
    """``column IN keys`` with the keys' range beside it. PostgreSQL plans the range on the column's index
    even when the table has no statistics yet (a first evaluate on a fresh database, autovacuum late or
    off); with the IN list alone it scanned the whole evaluations table, or its limit-set index, for every
    statement, so that each chunk took longer than the one before (80 ms a statement at 33,000 rows)."""
    return and_(column.between(min(keys), max(keys)), column.in_(keys))


def _stored(
    session: Session, keys: list[int], info: LimitSetInfo
) -> dict[tuple[int, str], tuple[int, str, str]]:
    """The stored evaluations of ``keys`` under this limit set: ``(visit_key, criteria_id) → (row id, input
    fingerprint, outcome)``. Selected by visit alone (the unique index leads with it) and the limit set
    picked here: with the limit set in the query PostgreSQL, without statistics, chose the limit-set index,
    which holds every row."""
    found: dict[tuple[int, str], tuple[int, str, str]] = {}
    columns = (
        Evaluation.id,
        Evaluation.visit_id,
        Evaluation.criteria_id,
        Evaluation.limit_set_id,
        Evaluation.input_sha256,
        Evaluation.outcome,
    )
    for part in _chunks(sorted(keys)):
        for row_id, visit_id, criteria_id, limit_set_id, fingerprint, outcome in session.execute(
            select(*columns).where(_keys_in(Evaluation.visit_id, part))
        ):
            if limit_set_id == info.id:
                found[(visit_id, criteria_id)] = (row_id, fingerprint, outcome)
    return found


def _write(
    session: Session, info: LimitSetInfo, planned: list[tuple[str, list[int], list[dict[str, Any]]]]
) -> list[tuple[int, str, str | None, str]]:
    """Replace the stored evaluations of each ``(criteria_id, visit keys, rows)`` of ``planned`` by its rows
    (a visit without a row loses its old one); return ``(visit_key, criteria_id, outcome before or None,
    outcome now)`` for the audit trail. The caller holds the evaluation writers' lock: what is stored is read
    here, once for every set, and only rows that exist are deleted (none on a first evaluation)."""
    keys = sorted({k for _, part, _ in planned for k in part})
    existing = _stored(session, keys, info) if keys else {}
    doomed = sorted(existing[(k, c)][0] for c, part, _ in planned for k in part if (k, c) in existing)
    for part in _chunks(doomed):
        session.execute(
            delete(Evaluation).where(_keys_in(Evaluation.id, part)),
            execution_options={"synchronize_session": False},
        )
    _insert_rows(session, [row for _, _, rows in planned for row in rows])
    before = {pair: outcome for pair, (_, _, outcome) in existing.items()}
    return [
        (r["visit_id"], c, before.get((r["visit_id"], c)), r["outcome"])
        for c, _, rows in planned
        for r in rows
    ]


def _trace_encoder(session: Session) -> Callable[[Any], Any]:
    """The ``result`` column's own conversion of a trace into what the driver is given (as SQLAlchemy would
    apply it to a bound value). A JSON document that the column leaves to the driver to adapt (psycopg) is
    given as JSON text, which PostgreSQL reads into a json column."""
    process = Evaluation.__table__.c.result.type.bind_processor(session.connection().dialect)

    def encode(trace: Any) -> Any:
        value = process(trace) if process is not None else trace
        return json.dumps(value) if isinstance(value, (dict, list)) else value

    return encode


def _insert_rows(session: Session, rows: list[dict[str, Any]]) -> None:
    """Insert evaluation rows in bulk — ``COPY … FROM STDIN`` through psycopg 3 on PostgreSQL (its
    executemany sends the rows one by one: 166,000 evaluations took 180 s against 70 s on SQLite), the
    driver's executemany on SQLite; the traces come encoded for their column (:func:`_trace_encoder`)."""
    if not rows:
        return
    connection = session.connection()
    dialect = connection.dialect
    table = Evaluation.__table__
    marker = "?" if dialect.paramstyle == "qmark" else "%s"
    quote = dialect.identifier_preparer.quote
    sql = (
        f"INSERT INTO {quote(table.name)} ({', '.join(quote(c) for c in _EVALUATION_COLUMNS)}) "
        f"VALUES ({', '.join([marker] * len(_EVALUATION_COLUMNS))})"
    )
    stamp = table.c.computed_at.type.bind_processor(dialect) or (lambda value: value)
    values = [tuple(stamp(r[c]) if c == "computed_at" else r[c] for c in _EVALUATION_COLUMNS) for r in rows]
    cursor = connection.connection.driver_connection.cursor()
    try:
        if dialect.name == "postgresql":
            columns = ", ".join(quote(c) for c in _EVALUATION_COLUMNS)
            # Binary when the traces are bytes (the compressed column): no hex text of every trace to write
            # and for the server to parse.
            binary = all(isinstance(row[_RESULT], bytes) for row in values)
            options = " (FORMAT BINARY)" if binary else ""
            with cursor.copy(f"COPY {quote(table.name)} ({columns}) FROM STDIN{options}") as copy:
                if binary:
                    copy.set_types(_COPY_TYPES)
                for row in values:
                    copy.write_row(row)
        else:
            cursor.executemany(sql, values)
    finally:
        cursor.close()


def _save(
    session: Session,
    visits: pd.DataFrame,
    results: dict[str, SetResult],
    info: LimitSetInfo,
    settings: Settings,
) -> list[tuple[int, str, str | None, str]]:
    """Replace the stored evaluations of these visits (in the caller's transaction); return the changes for
    the audit trail (see :func:`_write`)."""
    keys = [int(k) for k in visits["visit_key"]]
    encode = _trace_encoder(session)
    prepared = {
        criteria_id: _rows(visits, result, info, settings, encode) for criteria_id, result in results.items()
    }
    take_write_lock(session, serialise="evaluations")
    return _write(session, info, [(criteria_id, keys, rows) for criteria_id, rows in prepared.items()])


def _audit_saved(
    session: Session,
    changes: list[tuple[int, str, str | None, str]],
    visits: pd.DataFrame,
    info: LimitSetInfo,
    settings: Settings,
    *,
    username: str,
    one_visit: bool,
    part: str | None = None,
) -> None:
    """One audit event per save: for one visit the outcome of each set before → after; for a cohort (or one
    chunk of it, named by ``part``) the counts, and every visit whose outcome changed (code/date: set
    before → after)."""
    if not changes:
        return
    where = {int(r.visit_key): f"{r.patient}/{r.visit_date.isoformat()}" for r in visits.itertuples()}
    common = {"limits": f"{info.name} v{info.version}", "settings": settings_in_words(settings)}
    if one_visit:
        key = changes[0][0]
        audit.record(
            session,
            username=username,
            action="save_evaluations",
            entity="evaluations",
            entity_key=where.get(key),
            before={c: old for _, c, old, _ in changes if old is not None} or None,
            after={**{c: new for _, c, _, new in changes}, **common},
        )
        return
    changed = [
        f"{where.get(k, k)}: {c} {old} → {new}"
        for k, c, old, new in changes
        if old is not None and old != new
    ]
    audit.record(
        session,
        username=username,
        action="save_evaluations",
        entity="evaluations",
        entity_key=None,
        after={
            "evaluations": len(changes),
            "visits": len({k for k, *_ in changes}),
            "outcomes_changed": len(changed),
            "changed": changed[:200],
            **common,
            **({"part": part} if part else {}),
        },
        detail=None if len(changed) <= 200 else f"{len(changed) - 200} more outcome changes not listed",
    )


def refresh_evaluations(
    session: Session,
    criteria: list[str] | None = None,
    limits_name: str | None = None,
    settings: Settings | None = None,
    visit_ids: list[int] | None = None,
    *,
    username: str,
    chunk_visits: int = CHUNK_VISITS,
    commit_chunks: bool = False,
    progress: Callable[[int, int], None] | None = None,
) -> dict[str, int]:
    """Recompute every evaluation whose inputs changed (of the given visits, or of all), ``chunk_visits``
    visits at a time (each chunk one vectorised pass); return counts of evaluations (visit × set).

    In the caller's transaction by default. With ``commit_chunks`` each chunk is committed as its own
    transaction (the session must not be inside ``Session.begin()``): other writers get the database between
    chunks, and an interrupted run keeps the finished chunks (a rerun skips them by their fingerprints).
    Every saved chunk is audited under ``username`` (one event per chunk). ``progress(done, total)`` is
    called after each chunk. A chunk whose write cannot get the database in time is tried again; then
    :class:`~tracker.db.locking.DatabaseBusy` says how far the run got.

    With ``commit_chunks`` a chunk is written and committed by a writer thread while this thread evaluates
    the next one (:func:`_pipelined`): the database's work (COPY, index upkeep, commit) and the compression
    of the traces (zlib lets go of the GIL) overlap the engine's. The session is used by one thread at a
    time, and at most two chunks are held in memory.
    """
    settings = settings or Settings()
    criteria_ids = criteria or engine.available()
    attempts = 3 if commit_chunks else 1  # in the caller's transaction a failed statement cannot be retried

    def start() -> tuple[LimitSetInfo, pd.DataFrame, list[int]]:
        try:
            info, limits = resolve(session, limits_name)  # may store the shipped limits, once
            if visit_ids is None:
                keys = [int(k) for k in session.scalars(select(Visit.id).order_by(Visit.id))]
            else:
                keys = sorted({int(k) for k in visit_ids})
            if commit_chunks:
                session.commit()
            return info, limits, keys
        except BaseException:
            if commit_chunks:
                session.rollback()
            raise

    info, limits, keys = retry_when_busy(start, attempts=attempts)
    counts = {"visits": len(keys), "recomputed": 0, "unchanged": 0, "changed_meanwhile": 0}
    parts = [keys[i : i + chunk_visits] for i in range(0, len(keys), chunk_visits)]
    done = 0

    def transaction(work: Callable[[], T]) -> T:
        """``work`` as one transaction of its own (with ``commit_chunks``), tried again when busy."""

        def attempt() -> T:
            try:
                outcome = work()
                if commit_chunks:
                    session.commit()
                return outcome
            except BaseException:
                if commit_chunks:
                    session.rollback()
                raise

        return retry_when_busy(attempt, attempts=attempts)

    def read(part: list[int]) -> _Read:
        return transaction(lambda: _read_part(session, part, info))

    def evaluate(raw: _Read, label: str | None) -> _Prepared:
        return _evaluate_part(raw, criteria_ids, info, limits, settings, label)

    def write(prepared: _Prepared) -> list[int]:
        try:
            saved, moved = transaction(
                lambda: _write_part(session, prepared, info, settings, username=username)
            )
        except DatabaseBusy:
            if not commit_chunks:
                raise
            raise DatabaseBusy(
                f"{done:,} of {len(keys):,} visits were evaluated and saved; run evaluate again to continue"
            ) from None
        if commit_chunks:
            checkpoint("evaluate-chunk-committed")
        counts["recomputed"] += saved
        counts["unchanged"] += prepared.unchanged
        return moved

    def written(prepared: _Prepared, moved: list[int]) -> None:
        nonlocal done
        again.extend(moved)
        done += len(prepared.part)
        if progress is not None:
            progress(done, len(keys))

    again: list[int] = []
    labels = [f"{index + 1} of {len(parts)}" if len(parts) > 1 else None for index in range(len(parts))]
    if commit_chunks:
        _pipelined(parts, labels, read, evaluate, write, written)
    else:
        for part, label in zip(parts, labels, strict=True):
            prepared = evaluate(read(part), label)
            written(prepared, write(prepared))
    for _ in range(RECHECK_ROUNDS):
        if not again:
            break
        rerun = again
        again = write(evaluate(read(rerun), "visits changed while evaluated, again"))
    counts["changed_meanwhile"] = len(again)
    return counts


def _pipelined(
    parts: list[list[int]],
    labels: list[str | None],
    read: Callable[[list[int]], _Read],
    evaluate: Callable[[_Read, str | None], _Prepared],
    write: Callable[[_Prepared], list[int]],
    written: Callable[[_Prepared, list[int]], None],
) -> None:
    """Write and commit chunk n in a writer thread while chunk n + 1 is evaluated in this one, so that the
    database's work (COPY, index upkeep, commit) and the compression of the traces overlap the engine's.

    Chunk n + 1 is read before chunk n's writer starts, and the writer has ended before anything else is
    read: the session is used by one thread at a time. The writer's error (a busy database) is raised here
    once it has ended; an error here (an interruption) first waits for the writer, so that the chunk it
    writes is committed or rolled back as a whole, not cut off.
    """
    pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="evaluate-writer")
    pending: _Prepared | None = None  # evaluated, not yet written
    try:
        for part, label in zip(parts, labels, strict=True):
            raw = read(part)
            writer = pool.submit(write, pending) if pending is not None else None
            try:
                prepared = evaluate(raw, label)
            finally:
                if writer is not None:
                    wait([writer])
            del raw
            if writer is not None and pending is not None:
                written(pending, writer.result())
            pending = prepared
        if pending is not None:
            written(pending, write(pending))
    finally:
        pool.shutdown(wait=True)


@dataclass
class _Read:
    """What one chunk needs from the database: the engine's frames and the stored fingerprints
    (``(visit_key, criteria_id) → input_sha256``)."""

    part: list[int]
    visits: pd.DataFrame
    tests: pd.DataFrame
    sites: pd.DataFrame
    stored: dict[tuple[int, str], str]


@dataclass
class _Prepared:
    """One chunk evaluated, waiting to be written: per criteria id ``(criteria version, stale visits, their
    rows with the trace as canonical JSON, their input fingerprints as read)``."""

    part: list[int]
    visits: pd.DataFrame
    planned: dict[str, tuple[str, list[int], list[dict[str, Any]], dict[int, str]]]
    unchanged: int
    label: str | None
    compressed: bool = False


def _read_part(session: Session, part: list[int], info: LimitSetInfo) -> _Read:
    visits, tests, sites = load_frames(session, part)
    stored = {pair: fingerprint for pair, (_, fingerprint, _) in _stored(session, part, info).items()}
    return _Read(part, visits, tests, sites, stored)


def _evaluate_part(
    read: _Read,
    criteria_ids: list[str],
    info: LimitSetInfo,
    limits: pd.DataFrame,
    settings: Settings,
    label: str | None,
) -> _Prepared:
    """Evaluate one chunk (no database): the rows of every evaluation whose stored fingerprint is not the
    current one, their traces encoded as canonical JSON (compressed by :func:`_write_part`)."""
    results = engine.evaluate(read.visits, read.tests, read.sites, limits, criteria_ids, settings)
    unchanged = 0
    planned: dict[str, tuple[str, list[int], list[dict[str, Any]], dict[int, str]]] = {}
    prefixes = _fingerprint_prefixes(read.visits)
    for criteria_id, result in results.items():
        fingerprints = _input_fingerprints(prefixes, info, result.version, settings)
        stale = [k for k, h in fingerprints.items() if read.stored.get((k, criteria_id)) != h]
        unchanged += len(fingerprints) - len(stale)
        if stale:
            rows = _rows({k: prefixes[k] for k in stale}, result, info, settings, canonical_json)
            planned[criteria_id] = (result.version, stale, rows, {k: fingerprints[k] for k in stale})
    return _Prepared(read.part, read.visits, planned, unchanged, label)


def _write_part(
    session: Session, prepared: _Prepared, info: LimitSetInfo, settings: Settings, *, username: str
) -> tuple[int, list[int]]:
    """Save one evaluated chunk in the session's transaction; return (evaluations saved, visits whose inputs
    changed between reading and saving: left for another round)."""
    if not prepared.planned:
        return 0, []
    # Compressed before the write lock is taken (and, in the writer thread, beside the engine's work); once,
    # should the write be tried again.
    if not prepared.compressed:
        for _, _, rows, _ in prepared.planned.values():
            for row in rows:
                row["result"] = compress_canonical(row["result"])
        prepared.compressed = True
    take_write_lock(session, serialise="evaluations")
    # The inputs again, now that this transaction is the writer: a visit changed since it was read (an import
    # with --replace, an annotation) is not saved with an outdated trace but taken up again.
    stale_ids = sorted({k for _, keys, _, _ in prepared.planned.values() for k in keys})
    now = pd.concat(
        [pd.read_sql(_visit_query(ids), session.connection()) for ids in _chunks(stale_ids)],
        ignore_index=True,
    )
    now = _typed_visits(now)
    moved: set[int] = set()
    for version, keys, _, expected in prepared.planned.values():
        current = _input_fingerprints(now, info, version, settings)
        moved |= {k for k in keys if current.get(k) != expected[k]}
    kept = [
        (criteria_id, [k for k in keys if k not in moved], [r for r in rows if r["visit_id"] not in moved])
        for criteria_id, (_, keys, rows, _) in prepared.planned.items()
    ]
    changes = _write(session, info, kept)
    _audit_saved(
        session,
        changes,
        prepared.visits,
        info,
        settings,
        username=username,
        one_visit=False,
        part=prepared.label,
    )
    checkpoint("evaluate-chunk-written")
    return sum(len(keys) for _, keys, _ in kept), sorted(moved)
