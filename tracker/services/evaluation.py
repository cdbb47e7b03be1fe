"""Evaluate visits against criteria sets: load the rows, pick the normal limits, run the engine, keep the
evaluations (recomputed when the visit's data, the limits or the criteria version change)."""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from tracker.criteria import engine
from tracker.criteria.model import SetResult, Settings
from tracker.db.locking import DatabaseBusy, checkpoint, retry_when_busy, take_write_lock
from tracker.db.models import Evaluation, NerveTest, Patient, StimulationSite, Visit, utc_now
from tracker.domain.labels import settings_in_words
from tracker.errors import NotFound, TrackerError
from tracker.services.access import audit
from tracker.services.limit_sets import LimitSetInfo, resolve
from tracker.services.records import find_patient
from tracker.services.rows import chunks as _chunks

# The set a visit is checked against when none is asked for, by the visit's working diagnosis.
DEFAULT_CRITERIA = {"cidp": "ean-pns-2021-cidp", "mmn": "efns-pns-2010-mmn", "gbs": "hadden-1998-gbs"}
FALLBACK_CRITERIA = "efns-pns-2010-cidp"


def _visit_query(visit_ids: list[int] | None):
    query = select(
        Visit.id.label("visit_key"),
        Patient.code.label("patient"),
        Visit.visit_date,
        Visit.height_cm,
        Patient.sex,
        Patient.birth_year,
        Visit.phenotype,
        Visit.diagnosis,
        Visit.content_sha256,
    ).join(Patient, Patient.id == Visit.patient_id)
    return query if visit_ids is None else query.where(Visit.id.in_(visit_ids))


def load_frames(
    session: Session, visit_ids: list[int] | None = None
) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """(visits, tests, sites) as the engine expects them, for the given visits (all when ``None``)."""
    test_query = select(
        NerveTest.id.label("test_key"),
        NerveTest.visit_id.label("visit_key"),
        NerveTest.nerve,
        NerveTest.side,
        NerveTest.modality,
        NerveTest.temperature_c,
        NerveTest.lff_hz,
        NerveTest.f_latency_ms,
        NerveTest.f_absent,
        NerveTest.wrist_entrapment,
    )
    site_query = select(
        StimulationSite.nerve_test_id.label("test_key"),
        StimulationSite.site_order,
        StimulationSite.label,
        StimulationSite.distance_mm,
        StimulationSite.latency_ms,
        StimulationSite.peak_latency_ms,
        StimulationSite.amplitude_mv,
        StimulationSite.amplitude_uv,
        StimulationSite.duration_ms,
        StimulationSite.area_mvms,
    ).join(NerveTest, NerveTest.id == StimulationSite.nerve_test_id)
    if visit_ids is not None:
        test_query = test_query.where(NerveTest.visit_id.in_(visit_ids))
        site_query = site_query.where(NerveTest.visit_id.in_(visit_ids))
    connection = session.connection()
    visits = pd.read_sql(_visit_query(visit_ids), connection)
    tests = pd.read_sql(test_query, connection)
    sites = pd.read_sql(site_query, connection)
    return _typed(visits, tests, sites)


def _typed_visits(visits: pd.DataFrame) -> pd.DataFrame:
    visits["visit_date"] = pd.to_datetime(visits["visit_date"]).dt.date
    # Age at the visit from the birth year: exact to within a year (the full birth date is kept apart).
    visits["age_years"] = pd.to_datetime(visits["visit_date"]).dt.year - visits["birth_year"].astype(float)
    visits["height_cm"] = visits["height_cm"].astype(float)
    return visits


def _typed(
    visits: pd.DataFrame, tests: pd.DataFrame, sites: pd.DataFrame
) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    visits = _typed_visits(visits)
    tests["f_absent"] = tests["f_absent"].fillna(False).astype(bool)
    for column in ("temperature_c", "lff_hz", "f_latency_ms"):
        tests[column] = tests[column].astype(float)
    sites["amplitude"] = sites["amplitude_mv"].astype(float).fillna(sites["amplitude_uv"].astype(float))
    sites = sites.drop(columns=["amplitude_mv", "amplitude_uv"])
    for column in ("distance_mm", "latency_ms", "peak_latency_ms", "duration_ms", "area_mvms"):
        sites[column] = sites[column].astype(float)
    return visits, tests, sites


def default_criteria(diagnosis: str | None) -> str:
    return DEFAULT_CRITERIA.get(diagnosis or "", FALLBACK_CRITERIA)


@dataclass
class VisitCheck:
    """Everything a report of one visit needs (plain data; the CLI and dashboard render it)."""

    patient: str
    visit_date: dt.date
    visit_key: int
    phenotype: str | None
    limits: LimitSetInfo
    results: dict[str, SetResult]
    warnings: pd.DataFrame
    closest: dict[str, pd.DataFrame]
    changes: dict[str, pd.DataFrame]
    previous_date: dt.date | None
    # Criteria id → (previous outcome, outcome) where the outcome differs from the previous visit's.
    outcome_changes: dict[str, tuple[str, str]] = field(default_factory=dict)


def check_visit(
    session: Session,
    code: str,
    *,
    visit_date: dt.date | None,
    criteria: list[str] | None,
    limits_name: str | None,
    settings: Settings | None = None,
    username: str | None = None,
) -> VisitCheck:
    """Evaluate one visit (the latest when no date is given); with ``username``, save the evaluations in the
    caller's transaction and audit them (outcomes before → after)."""
    patient = find_patient(session, code)
    visits = session.execute(
        select(Visit.id, Visit.visit_date, Visit.diagnosis)
        .where(Visit.patient_id == patient.id)
        .order_by(Visit.visit_date)
    ).all()
    if not visits:
        raise NotFound(f"Patient {code} has no visits yet.")
    chosen = (
        visits[-1] if visit_date is None else next((v for v in visits if v.visit_date == visit_date), None)
    )
    if chosen is None:
        raise NotFound(
            f"Patient {code} has no visit on {visit_date.isoformat()}; visits: "
            f"{', '.join(v.visit_date.isoformat() for v in visits)}"
        )
    index = [v.id for v in visits].index(chosen.id)
    previous = visits[index - 1] if index > 0 else None
    wanted = [chosen.id] + ([previous.id] if previous else [])
    criteria_ids = criteria or [default_criteria(chosen.diagnosis or patient.diagnosis)]
    unknown = [c for c in criteria_ids if c not in engine.REGISTRY]
    if unknown:
        raise TrackerError(f"Unknown criteria set {unknown[0]!r}; known: {', '.join(engine.available())}")
    info, limits = resolve(session, limits_name)
    visit_frame, tests, sites = load_frames(session, wanted)
    if tests[tests["visit_key"] == chosen.id].empty:
        raise NotFound(
            f"The visit of {code} on {chosen.visit_date.isoformat()} has no nerve tests to evaluate."
        )
    settings = settings or Settings()
    results = engine.evaluate(visit_frame, tests, sites, limits, criteria_ids, settings)
    current = {cid: _only(result, chosen.id) for cid, result in results.items()}
    if username is not None:  # saved (and audited) for a known user; otherwise only computed
        chosen_frame = visit_frame[visit_frame["visit_key"] == chosen.id]
        changes = _save(session, chosen_frame, current, info, settings)
        _audit_saved(session, changes, chosen_frame, info, settings, username=username, one_visit=True)
    return VisitCheck(
        patient=patient.code,
        visit_date=chosen.visit_date,
        visit_key=chosen.id,
        phenotype=visit_frame.loc[visit_frame["visit_key"] == chosen.id, "phenotype"].iloc[0],
        limits=info,
        results=current,
        warnings=engine.temperature_warnings(
            visit_frame[visit_frame["visit_key"] == chosen.id], tests, sites, limits
        ),
        closest={cid: engine.closest_miss(r) for cid, r in current.items()},
        changes={cid: _changes_at(visit_frame, r, chosen.id) for cid, r in results.items()},
        previous_date=previous.visit_date if previous else None,
        outcome_changes={
            cid: _outcome_change_at(visit_frame, r, chosen.id)
            for cid, r in results.items()
            if _outcome_change_at(visit_frame, r, chosen.id)
        },
    )


def _outcome_change_at(visits: pd.DataFrame, result: SetResult, visit_key: int) -> tuple[str, str] | None:
    changed = engine.outcome_changes(visits, result)
    changed = changed[changed["visit_key"] == visit_key]
    return (
        (str(changed["previous_outcome"].iloc[0]), str(changed["outcome"].iloc[0])) if len(changed) else None
    )


def _changes_at(visits: pd.DataFrame, result: SetResult, visit_key: int) -> pd.DataFrame:
    changes = engine.changes_between_visits(visits, result)
    return changes[changes["visit_key"] == visit_key].reset_index(drop=True)


def _only(result: SetResult, visit_key: int) -> SetResult:
    return SetResult(
        result.criteria,
        result.version,
        result.findings[result.findings["visit_key"] == visit_key].reset_index(drop=True),
        result.outcomes[result.outcomes["visit_key"] == visit_key].reset_index(drop=True),
        result.extra_keys,
        result.outcome_items,
    )


def _input_fingerprints(
    visits: pd.DataFrame, info: LimitSetInfo, criteria_version: str, settings: Settings
) -> dict[int, str]:
    """What an evaluation depends on: the visit's content, the patient's age/height/sex, the limits set and
    version, the criteria version and the settings."""
    fixed = f"{info.id}:{info.version}:{criteria_version}:{settings}"
    result = {}
    for row in visits.itertuples():
        payload = f"{row.content_sha256}|{row.age_years}|{row.height_cm}|{row.sex}|{row.phenotype}|{fixed}"
        result[int(row.visit_key)] = hashlib.sha256(payload.encode()).hexdigest()
    return result


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
    visits: pd.DataFrame,
    result: SetResult,
    info: LimitSetInfo,
    settings: Settings,
    encode: Callable[[Any], Any],
) -> list[dict[str, Any]]:
    """The evaluation rows of ``visits`` for one criteria set, the trace already encoded for its column by
    ``encode`` (:func:`_trace_encoder`), so that the work is done before the write lock is taken. A visit the
    set gave no outcome for has no row."""
    fingerprints = _input_fingerprints(visits, info, result.version, settings)
    outcomes = result.outcomes.set_index("visit_key")
    keys = [k for k in fingerprints if k in outcomes.index]
    payloads = to_json_many(result, keys)
    now = utc_now()
    return [
        {
            "visit_id": key,
            "criteria_id": result.criteria,
            "criteria_version": result.version,
            "limit_set_id": info.id,
            "limit_set_version": info.version,
            "input_sha256": fingerprints[key],
            "outcome": str(outcomes.loc[key, "outcome"]),
            "result": encode(compact_trace(payloads[key])),
            "computed_at": now,
        }
        for key in keys
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
    """Insert evaluation rows through the driver's executemany; the traces come encoded for their column
    (:func:`_trace_encoder`)."""
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
    for criteria_id, result in results.items():
        fingerprints = _input_fingerprints(visits, info, result.version, settings)
        stale = [k for k, h in fingerprints.items() if stored.get((k, criteria_id)) != h]
        unchanged += len(fingerprints) - len(stale)
        if stale:
            rows = _rows(visits[visits["visit_key"].isin(stale)], result, info, settings, encode)
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


def _plain(value: Any) -> Any:
    if value is None:
        return None
    if isinstance(value, (float, np.floating)):
        return None if np.isnan(value) else round(float(value), 6)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.bool_,)):
        return bool(value)
    return value


def to_json(result: SetResult, visit_key: int) -> dict[str, Any]:
    """The evaluation of one visit in the interchange shape of DESIGN.md §5 (without patient and date)."""
    return to_json_many(result, [visit_key])[visit_key]


FINDING_TEXT = (
    "parameter",
    "item",
    "unit",
    "comparator",
    "status",
    "source",
    "source_status",
    "limit_source",
    "limit_status",
)


def _text_or_none(value: Any) -> str | None:
    return value if isinstance(value, str) and value else None


def _number_or_none(value: Any) -> float | None:
    if value is None or value is pd.NA:
        return None
    number = float(value)
    return None if math.isnan(number) else round(number, 6)


def to_json_many(result: SetResult, visit_keys: list[int]) -> dict[int, dict[str, Any]]:
    """:func:`to_json` of many visits in one pass over the findings (a per-visit filter of the whole table
    would make saving a cohort's evaluations quadratic)."""
    wanted = set(int(k) for k in visit_keys)
    findings = result.findings[result.findings["visit_key"].isin(wanted)]
    # Nerves sorted as groupby(sort=True) would; findings keep their order within a nerve.
    findings = findings.sort_values(["visit_key", "nerve", "side", "modality"], kind="stable")
    columns = {
        c: findings[c].to_numpy(dtype=object)
        for c in (
            "visit_key",
            "nerve",
            "side",
            "modality",
            "segment",
            "value",
            "limit",
            "limit_name",
            "threshold",
            "reason",
            *FINDING_TEXT,
        )
    }
    nerves: dict[int, list[dict[str, Any]]] = {k: [] for k in wanted}
    current: tuple | None = None
    for i in range(len(findings)):
        key = (int(columns["visit_key"][i]), columns["nerve"][i], columns["side"][i], columns["modality"][i])
        if key != current:
            current = key
            nerves[key[0]].append({"nerve": key[1], "side": key[2], "modality": key[3], "findings": []})
        nerves[key[0]][-1]["findings"].append(
            {
                "parameter": columns["parameter"][i],
                "item": columns["item"][i],
                "segment": _text_or_none(columns["segment"][i]),
                "value": _number_or_none(columns["value"][i]),
                "unit": _text_or_none(columns["unit"][i]),
                "limit": _number_or_none(columns["limit"][i]),
                "limit_name": _text_or_none(columns["limit_name"][i]),
                "threshold": _number_or_none(columns["threshold"][i]),
                "comparator": _text_or_none(columns["comparator"][i]),
                "status": columns["status"][i],
                "reason": _text_or_none(columns["reason"][i]),
                "source": _text_or_none(columns["source"][i]),
                "source_status": _text_or_none(columns["source_status"][i]),
                "limit_source": _text_or_none(columns["limit_source"][i]),
                "limit_status": _text_or_none(columns["limit_status"][i]),
            }
        )
    payloads: dict[int, dict[str, Any]] = {}
    for outcome in result.outcomes[result.outcomes["visit_key"].isin(wanted)].to_dict("records"):
        key = int(outcome["visit_key"])
        rule = outcome.get("rule")
        payload = {
            "criteria": result.criteria,
            "criteria_version": result.version,
            "outcome": outcome["outcome"],
            "rule": rule if isinstance(rule, str) else None,
        }
        for extra in result.extra_keys:
            payload[extra] = _json_safe(outcome[extra])
        if "undecided_items" in outcome:  # the CIDP and MMN sets (DESIGN.md §5)
            items = outcome["undecided_items"]
            payload["undecided_items"] = _json_safe(list(items)) if isinstance(items, (tuple, list)) else []
        payload["nerves"] = nerves[key]
        payloads[key] = payload
    return payloads


STORED_FORMAT = 2
_SOURCE_FIELDS = ("source", "limit_source")


def compact_trace(payload: dict[str, Any]) -> dict[str, Any]:
    """The trace as stored in ``evaluations.result``: the same content, each citation written once.

    Citations are long and repeated on every finding (about half of a trace's bytes); the stored form keeps
    them in ``sources`` and refers to them by position. :func:`expand_trace` gives back the full shape.
    """
    sources: dict[str, int] = {}
    nerves = []
    for nerve in payload["nerves"]:
        findings = []
        for finding in nerve["findings"]:
            item = dict(finding)
            for name in _SOURCE_FIELDS:
                text = item.pop(name)
                item[f"{name}_ref"] = None if text is None else sources.setdefault(text, len(sources))
            findings.append(item)
        nerves.append({**nerve, "findings": findings})
    return {**payload, "stored_format": STORED_FORMAT, "sources": list(sources), "nerves": nerves}


def expand_trace(stored: dict[str, Any]) -> dict[str, Any]:
    """The full trace (the shape of :func:`to_json`) from its stored form."""
    if stored.get("stored_format") != STORED_FORMAT:
        return stored
    sources = stored["sources"]
    nerves = []
    for nerve in stored["nerves"]:
        findings = []
        for finding in nerve["findings"]:
            item = {k: v for k, v in finding.items() if not k.endswith("_ref")}
            for name in _SOURCE_FIELDS:
                ref = finding[f"{name}_ref"]
                item[name] = None if ref is None else sources[ref]
            findings.append(item)
        nerves.append({**nerve, "findings": findings})
    payload = {k: v for k, v in stored.items() if k not in ("stored_format", "sources", "nerves")}
    payload["nerves"] = nerves
    return payload


def _json_safe(value: Any) -> Any:
    """Plain JSON values only: NaN becomes null (PostgreSQL's JSON refuses NaN), numpy scalars Python."""
    if isinstance(value, dict):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    if isinstance(value, str) or value is None or isinstance(value, bool):
        return value
    return _plain(value) if not (isinstance(value, float) and np.isnan(value)) else None
