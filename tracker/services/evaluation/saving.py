"""Save evaluations: recompute what is stale (input fingerprints), a chunk of visits at a time, and write
the outcomes with their stored traces in bulk, audited."""

from __future__ import annotations

import hashlib
import json
from collections.abc import Callable
from typing import Any

import pandas as pd
from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from tracker.criteria import engine
from tracker.criteria.model import SetResult, Settings
from tracker.db.locking import DatabaseBusy, checkpoint, retry_when_busy, take_write_lock
from tracker.db.models import Evaluation, Visit, utc_now
from tracker.domain.labels import settings_in_words
from tracker.services.access import audit
from tracker.services.evaluation.frames import _typed_visits, _visit_query, load_frames
from tracker.services.evaluation.traces import stored_traces
from tracker.services.limit_sets import LimitSetInfo, resolve
from tracker.services.rows import chunks as _chunks


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


def _rows(
    visits: pd.DataFrame | dict[int, str],
    result: SetResult,
    info: LimitSetInfo,
    settings: Settings,
    encode: Callable[[Any], Any],
) -> list[dict[str, Any]]:
    """The evaluation rows of ``visits`` (the frame, or its :func:`_fingerprint_prefixes`) for one criteria
    set, the trace in its stored form (:func:`~tracker.services.evaluation.traces.stored_traces`) already
    encoded for its column by ``encode`` (:func:`_trace_encoder`), so that the work is done before the write
    lock is taken. A visit the set gave no outcome for has no row."""
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


def _write(
    session: Session, criteria_id: str, info: LimitSetInfo, keys: list[int], rows: list[dict[str, Any]]
) -> list[tuple[int, str, str | None, str]]:
    """Replace the stored evaluations of ``keys`` by ``rows``; return ``(visit_key, criteria_id, outcome
    before or None, outcome now)`` for the audit trail."""
    before: dict[int, str] = {}
    for part in _chunks(keys):
        scope = (
            Evaluation.visit_id.in_(part),
            Evaluation.criteria_id == criteria_id,
            Evaluation.limit_set_id == info.id,
        )
        outcomes = session.execute(select(Evaluation.visit_id, Evaluation.outcome).where(*scope))
        before.update((visit_id, outcome) for visit_id, outcome in outcomes)
        session.execute(delete(Evaluation).where(*scope))
    _insert_rows(session, rows)
    return [(r["visit_id"], criteria_id, before.get(r["visit_id"]), r["outcome"]) for r in rows]


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
            with cursor.copy(f"COPY {quote(table.name)} ({columns}) FROM STDIN") as copy:
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
    changes: list[tuple[int, str, str | None, str]] = []
    for criteria_id, rows in prepared.items():
        changes += _write(session, criteria_id, info, keys, rows)
    return changes


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

    def run(part: list[int], label: str | None) -> list[int]:
        def attempt() -> tuple[int, int, list[int]]:
            try:
                outcome = _refresh_part(
                    session, part, criteria_ids, info, limits, settings, username=username, label=label
                )
                if commit_chunks:
                    session.commit()
                    checkpoint("evaluate-chunk-committed")
                return outcome
            except BaseException:
                if commit_chunks:
                    session.rollback()
                raise

        try:
            recomputed, unchanged, changed = retry_when_busy(attempt, attempts=attempts)
        except DatabaseBusy:
            if not commit_chunks:
                raise
            raise DatabaseBusy(
                f"{done:,} of {len(keys):,} visits were evaluated and saved; run evaluate again to continue"
            ) from None
        counts["recomputed"] += recomputed
        counts["unchanged"] += unchanged
        return changed

    again: list[int] = []
    for index, part in enumerate(parts):
        again += run(part, f"{index + 1} of {len(parts)}" if len(parts) > 1 else None)
        done += len(part)
        if progress is not None:
            progress(done, len(keys))
    for _ in range(RECHECK_ROUNDS):
        if not again:
            break
        again = run(again, "visits changed while evaluated, again")
    counts["changed_meanwhile"] = len(again)
    return counts


def _refresh_part(
    session: Session,
    part: list[int],
    criteria_ids: list[str],
    info: LimitSetInfo,
    limits: pd.DataFrame,
    settings: Settings,
    *,
    username: str,
    label: str | None,
) -> tuple[int, int, list[int]]:
    """Evaluate one chunk of visits and save what is stale; return (evaluations saved, evaluations already
    current, visits whose inputs changed between reading and saving: left for another round)."""
    visits, tests, sites = load_frames(session, part)
    stored: dict[tuple[int, str], str] = {}
    for keys in _chunks(part):
        stored.update(
            ((visit_id, criteria_id), fingerprint)
            for visit_id, criteria_id, fingerprint in session.execute(
                select(Evaluation.visit_id, Evaluation.criteria_id, Evaluation.input_sha256).where(
                    Evaluation.limit_set_id == info.id, Evaluation.visit_id.in_(keys)
                )
            )
        )
    results = engine.evaluate(visits, tests, sites, limits, criteria_ids, settings)
    del tests, sites
    unchanged = 0
    encode = _trace_encoder(session)
    # Criteria id → (criteria version, stale visits, their rows, their input fingerprints as read).
    planned: dict[str, tuple[str, list[int], list[dict[str, Any]], dict[int, str]]] = {}
    prefixes = _fingerprint_prefixes(visits)
    for criteria_id, result in results.items():
        fingerprints = _input_fingerprints(prefixes, info, result.version, settings)
        stale = [k for k, h in fingerprints.items() if stored.get((k, criteria_id)) != h]
        unchanged += len(fingerprints) - len(stale)
        if stale:
            rows = _rows({k: prefixes[k] for k in stale}, result, info, settings, encode)
            planned[criteria_id] = (result.version, stale, rows, {k: fingerprints[k] for k in stale})
    del results
    if not planned:
        return 0, unchanged, []
    take_write_lock(session, serialise="evaluations")
    # The inputs again, now that this transaction is the writer: a visit changed since it was read (an import
    # with --replace, an annotation) is not saved with an outdated trace but taken up again.
    stale_ids = sorted({k for _, keys, _, _ in planned.values() for k in keys})
    now = pd.concat(
        [pd.read_sql(_visit_query(ids), session.connection()) for ids in _chunks(stale_ids)],
        ignore_index=True,
    )
    now = _typed_visits(now)
    moved: set[int] = set()
    for version, keys, _, expected in planned.values():
        current = _input_fingerprints(now, info, version, settings)
        moved |= {k for k in keys if current.get(k) != expected[k]}
    changes: list[tuple[int, str, str | None, str]] = []
    saved = 0
    for criteria_id, (_, keys, rows, _) in planned.items():
        keep = [k for k in keys if k not in moved]
        saved += len(keep)
        changes += _write(session, criteria_id, info, keep, [r for r in rows if r["visit_id"] not in moved])
    _audit_saved(session, changes, visits, info, settings, username=username, one_visit=False, part=label)
    checkpoint("evaluate-chunk-written")
    return saved, unchanged, sorted(moved)
