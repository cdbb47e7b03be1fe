"""The clinic's view of all its patients: the patient list and cohort counts, from saved evaluations.

Outcomes here are the evaluations saved by ``check``/``evaluate`` (or the dashboard's "evaluate" button) with
the default normal-limit set; a visit without one is shown as ``not evaluated`` — never as normal.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Any

import pandas as pd
from sqlalchemy import ColumnElement, Select, case, func, literal, select, true
from sqlalchemy.ext.compiler import compiles
from sqlalchemy.orm import Session, aliased
from sqlalchemy.sql.compiler import SQLCompiler
from sqlalchemy.sql.selectable import Alias

from tracker.db.models import EVALUATION_OUTCOME_INDEX, Evaluation, Patient, Treatment, Visit
from tracker.services.evaluation import DEFAULT_CRITERIA, FALLBACK_CRITERIA
from tracker.services.export import neutralise_text
from tracker.services.follow_up import treatment_label
from tracker.services.limit_sets import resolve

NOT_EVALUATED = "not evaluated"

PATIENT_COLUMNS = [
    "patient",
    "diagnosis",
    "phenotype",
    "visits",
    "first_visit",
    "last_visit",
    "current_treatment",
    "latest_outcome",
]


def _evaluations(session: Session, criteria: str, limit_set_id: int) -> pd.DataFrame:
    """Saved outcomes of ``criteria`` with one normal-limit set: visit_id, outcome."""
    query = select(Evaluation.visit_id, Evaluation.outcome).where(
        Evaluation.criteria_id == criteria, Evaluation.limit_set_id == limit_set_id
    )
    return pd.DataFrame(session.execute(query).all(), columns=["visit_id", "outcome"])


def patient_list(
    session: Session,
    *,
    criteria: str,
    limits_name: str | None = None,
    search: str = "",
    diagnosis: str | None = None,
    outcome: str | None = None,
    today: dt.date | None = None,
) -> pd.DataFrame:
    """One row per patient (``PATIENT_COLUMNS``), filtered by code (substring, any case), diagnosis and the
    latest visit's outcome of ``criteria``."""
    stats = (
        select(
            Visit.patient_id,
            func.count(Visit.id).label("visits"),
            func.min(Visit.visit_date).label("first_visit"),
            func.max(Visit.visit_date).label("last_visit"),
        )
        .group_by(Visit.patient_id)
        .subquery()
    )
    query = select(
        Patient.id,
        Patient.code,
        Patient.diagnosis,
        Patient.phenotype,
        stats.c.visits,
        stats.c.first_visit,
        stats.c.last_visit,
    ).outerjoin(stats, stats.c.patient_id == Patient.id)
    if search.strip():
        query = query.where(func.lower(Patient.code).contains(search.strip().lower(), autoescape=True))
    if diagnosis:
        query = query.where(Patient.diagnosis == diagnosis)
    frame = pd.DataFrame(
        session.execute(query.order_by(Patient.code)).all(),
        columns=["id", "patient", "diagnosis", "phenotype", "visits", "first_visit", "last_visit"],
    )
    frame["visits"] = frame["visits"].fillna(0).astype(int)
    latest = pd.DataFrame(
        session.execute(
            select(Visit.id, Visit.patient_id).join(
                stats, (stats.c.patient_id == Visit.patient_id) & (stats.c.last_visit == Visit.visit_date)
            )
        ).all(),
        columns=["visit_id", "id"],
    )
    outcomes = _evaluations(session, criteria, resolve(session, limits_name)[0].id).merge(
        latest, on="visit_id"
    )
    frame = frame.merge(outcomes[["id", "outcome"]], on="id", how="left")
    frame["latest_outcome"] = frame["outcome"].astype(object).where(frame["outcome"].notna(), NOT_EVALUATED)
    frame.loc[frame["visits"] == 0, "latest_outcome"] = "no visits"
    frame["current_treatment"] = _current_treatments(session, frame, today or dt.date.today())
    if outcome:
        frame = frame[frame["latest_outcome"] == outcome]
    return frame[PATIENT_COLUMNS].reset_index(drop=True)


@dataclass
class PatientPage:
    """One page of the patient list: ``rows`` (``PATIENT_COLUMNS`` and ``latest_criteria``, the set
    that judged the latest outcome), how many patients pass the filters, and which latest outcomes
    occur among them (for the outcome filter)."""

    rows: pd.DataFrame
    total: int
    outcomes: list[str]


class _OutcomeIndexed(Alias):
    """``evaluations`` under another name, read through the covering index of (visit, criteria, limits,
    outcome) on SQLite (``INDEXED BY``). Without statistics (no ANALYZE) SQLite prefers the unique index of
    the first three columns, then reads each row (about 1 kB with its trace) for its ``outcome``; with the
    hint the look-up ends in the index: the patient list's count over 5,000 invented patients took half
    the time (16.6 -> 8.4 ms). SQLAlchemy's ``with_hint`` renders nothing for SQLite, hence this alias."""

    inherit_cache = True


@compiles(_OutcomeIndexed)
def _render_alias(element: _OutcomeIndexed, compiler: SQLCompiler, **kw: Any) -> str:
    return compiler.visit_alias(element, **kw)


@compiles(_OutcomeIndexed, "sqlite")
def _render_alias_indexed(element: _OutcomeIndexed, compiler: SQLCompiler, **kw: Any) -> str:
    sql = compiler.visit_alias(element, **kw)
    # In a FROM clause only (SQLite syntax: ``table AS name INDEXED BY index``), not where it is named.
    return (
        f"{sql} INDEXED BY {EVALUATION_OUTCOME_INDEX}" if kw.get("asfrom") and not kw.get("ashint") else sql
    )


def patient_page(
    session: Session,
    *,
    criteria: str | None,
    limits_name: str | None = None,
    search: str = "",
    diagnosis: str | None = None,
    outcome: str | None = None,
    page: int = 1,
    page_rows: int = 50,
    today: dt.date | None = None,
) -> PatientPage:
    """The patient list as :func:`patient_list`, but filtered, counted and cut into pages by the database, so
    that a page costs about the same for 10 or 5,000 patients (the rows of one page only are read into
    Python; the counts per latest outcome are one aggregate over index look-ups).

    ``criteria`` None: each patient's latest visit is judged by the set its diagnosis maps to (the visit's
    diagnosis, else the patient's), as ``check`` and ``evaluate`` choose it; the rows then name the set in
    ``latest_criteria``."""
    limit_set_id = resolve(session, limits_name)[0].id
    latest_from, latest, on_latest = _latest_visit(session)
    if criteria is None:
        # A simple CASE: the diagnosis is worked out once per patient, not once per WHEN.
        chosen = case(
            DEFAULT_CRITERIA,
            value=func.coalesce(latest.diagnosis, Patient.diagnosis),
            else_=literal(FALLBACK_CRITERIA),
        )
    else:
        chosen = literal(criteria)
    outcome_from, saved_outcome, on_outcome = _saved_outcome(session, latest, chosen, limit_set_id)
    word = case(
        (latest.id.is_(None), literal("no visits")),
        else_=func.coalesce(saved_outcome, literal(NOT_EVALUATED)),
    )
    filters = []
    if search.strip():
        filters.append(func.lower(Patient.code).contains(search.strip().lower(), autoescape=True))
    if diagnosis:
        filters.append(Patient.diagnosis == diagnosis)

    def joined(*columns: Any) -> Select:
        return (
            select(*columns)
            .select_from(Patient)
            .outerjoin(latest_from, on_latest)
            .outerjoin(outcome_from, on_outcome)
            .where(*filters)
        )

    # One pass gives both the outcomes present (for the filter) and the counts (for the page count). The
    # only step that reads every patient: per patient one index step to the latest visit, its row, and its
    # outcome from the (visit, criteria, limits, outcome) index; nothing per patient reaches Python.
    counts = dict(session.execute(joined(word, func.count()).group_by(word)).all())
    outcomes = sorted(counts)
    total = counts.get(outcome, 0) if outcome else sum(counts.values())
    mine = Visit.patient_id == Patient.id
    query = joined(
        Patient.id,
        Patient.code,
        Patient.diagnosis,
        Patient.phenotype,
        select(func.count(Visit.id)).where(mine).correlate(Patient).scalar_subquery(),
        select(func.min(Visit.visit_date)).where(mine).correlate(Patient).scalar_subquery(),
        latest.visit_date,
        word,
        chosen,
    )
    offset = max(0, page - 1) * page_rows
    if outcome:
        query = query.where(word == outcome)
    else:  # the page's patients first (code index), so only their rows are joined whatever the plan
        query = query.where(
            Patient.id.in_(
                select(Patient.id).where(*filters).order_by(Patient.code).limit(page_rows).offset(offset)
            )
        )
        offset = 0
    rows = session.execute(query.order_by(Patient.code).limit(page_rows).offset(offset)).all()
    frame = pd.DataFrame(
        [tuple(r) for r in rows],
        columns=[
            "id",
            "patient",
            "diagnosis",
            "phenotype",
            "visits",
            "first_visit",
            "last_visit",
            "latest_outcome",
            "latest_criteria",
        ],
    )
    frame["visits"] = frame["visits"].fillna(0).astype(int)
    for column in ("first_visit", "last_visit"):
        frame[column] = [
            d if d is None or isinstance(d, dt.date) else dt.date.fromisoformat(str(d)) for d in frame[column]
        ]
    frame["current_treatment"] = _current_treatments(session, frame, today or dt.date.today())
    return PatientPage(
        frame[[*PATIENT_COLUMNS, "latest_criteria"]].reset_index(drop=True), int(total), outcomes
    )


def _latest_visit(session: Session) -> tuple[Any, Any, ColumnElement[bool]]:
    """Each patient's latest visit: what to left-join to ``Patient``, its columns (``id``, ``diagnosis``,
    ``visit_date``) and the join condition; one backward step in the (patient, date) index per patient.

    PostgreSQL: a LATERAL subquery, which the planner runs as that index step per patient (a join on a
    correlated subquery made it hash every visit and run the subquery twice per patient). SQLite, which has
    no LATERAL: the visit row by primary key, found by the same index step in a correlated subquery."""
    newest_first = select(Visit.id, Visit.diagnosis, Visit.visit_date).where(Visit.patient_id == Patient.id)
    newest_first = newest_first.order_by(Visit.visit_date.desc()).limit(1)
    if session.get_bind().dialect.name == "postgresql":
        latest = newest_first.lateral("latest_visit")
        return latest, latest.c, true()
    latest = aliased(Visit, name="latest_visit")
    return (
        latest,
        latest,
        latest.id == newest_first.with_only_columns(Visit.id).correlate(Patient).scalar_subquery(),
    )


def _saved_outcome(
    session: Session, latest: Any, chosen: ColumnElement[str], limit_set_id: int
) -> tuple[Any, ColumnElement[str], ColumnElement[bool]]:
    """The saved outcome of each patient's latest visit by the chosen criteria and ``limit_set_id``: what to
    left-join after :func:`_latest_visit`, the ``outcome`` column, and the join condition. Per patient one
    step in the (visit, criteria, limits, outcome) index, which holds the outcome itself.

    PostgreSQL: a LATERAL subquery, so that the planner looks each one up rather than hashing every saved
    evaluation of the limit set. On a database just written, without statistics (autovacuum off, no
    ANALYZE), the hash read all 166,000 rows (165 MB of heap) to count 5,000 invented patients: 130-210 ms,
    against about 20 ms for the look-ups. Until VACUUM marks the pages all-visible, an index-only look-up
    still visits the row's heap page. SQLite: an outer join read through the covering index
    (``_OutcomeIndexed``)."""
    if session.get_bind().dialect.name == "postgresql":
        found = (
            select(Evaluation.outcome)
            .where(
                Evaluation.visit_id == latest.id,
                Evaluation.criteria_id == chosen,
                Evaluation.limit_set_id == limit_set_id,
            )
            .limit(1)  # the unique (visit, criteria, limits) key: one row at most
            .lateral("saved_outcome")
        )
        return found, found.c.outcome, true()
    saved = aliased(Evaluation, _OutcomeIndexed._construct(Evaluation.__table__, name="saved_evaluation"))
    return (
        saved,
        saved.outcome,
        (saved.visit_id == latest.id) & (saved.criteria_id == chosen) & (saved.limit_set_id == limit_set_id),
    )


def _current_treatments(session: Session, patients: pd.DataFrame, today: dt.date) -> list[str]:
    """Treatments running today (no end date, or ending today or later), in words; '' when none."""
    query = (
        select(
            Treatment.patient_id,
            Treatment.therapy,
            Treatment.dose,
            Treatment.dose_unit,
            Treatment.interval_days,
            Treatment.start_date,
            Treatment.end_date,
        )
        .where(Treatment.start_date <= today, (Treatment.end_date.is_(None)) | (Treatment.end_date >= today))
        .order_by(Treatment.patient_id, Treatment.start_date)
    )
    if len(patients) <= 500:  # a page of the list: only its patients' treatments
        query = query.where(Treatment.patient_id.in_([int(i) for i in patients["id"]]))
    rows = session.execute(query).all()
    running: dict[int, list[str]] = {}
    for r in rows:
        running.setdefault(r.patient_id, []).append(
            treatment_label(r.therapy, r.dose, r.dose_unit, r.interval_days)
        )
    return ["; ".join(running.get(int(pid), [])) for pid in patients["id"]]


def visit_table(
    session: Session,
    *,
    criteria: list[str],
    limits_name: str | None = None,
    diagnosis: str | None = None,
    start: dt.date | None = None,
    end: dt.date | None = None,
) -> pd.DataFrame:
    """One row per visit: patient code, visit date, diagnosis, phenotype,
    and the saved outcome of each set."""
    query = select(
        Visit.id.label("visit_id"),
        Patient.code.label("patient"),
        Visit.visit_date,
        Visit.diagnosis,
        Visit.phenotype,
    ).join(Patient, Patient.id == Visit.patient_id)
    if diagnosis:
        query = query.where(Visit.diagnosis == diagnosis)
    if start:
        query = query.where(Visit.visit_date >= start)
    if end:
        query = query.where(Visit.visit_date <= end)
    frame = pd.DataFrame(
        session.execute(query.order_by(Patient.code, Visit.visit_date)).all(),
        columns=["visit_id", "patient", "visit_date", "diagnosis", "phenotype"],
    )
    limit_set_id = resolve(session, limits_name)[0].id
    for cid in criteria:
        saved = _evaluations(session, cid, limit_set_id).rename(columns={"outcome": cid})
        frame = frame.merge(saved, on="visit_id", how="left")
        frame[cid] = frame[cid].astype(object).where(frame[cid].notna(), NOT_EVALUATED)
    return frame.drop(columns=["visit_id"])


def counts_by_diagnosis(visits: pd.DataFrame) -> pd.DataFrame:
    """Patients and visits per diagnosis of a :func:`visit_table`."""
    if visits.empty:
        return pd.DataFrame(columns=["diagnosis", "patients", "visits"])
    table = visits.assign(diagnosis=visits["diagnosis"].astype(object).fillna("unspecified"))
    return (
        table.groupby("diagnosis")
        .agg(patients=("patient", "nunique"), visits=("patient", "size"))
        .reset_index()
        .sort_values("diagnosis")
        .reset_index(drop=True)
    )


def outcome_shares(visits: pd.DataFrame, criteria: list[str]) -> pd.DataFrame:
    """Per criteria set and outcome: number and share (%) of the table's visits."""
    rows = []
    for cid in criteria:
        if cid not in visits:
            continue
        counts = visits[cid].value_counts()
        for outcome_value, count in counts.items():
            rows.append(
                {
                    "criteria": cid,
                    "outcome": outcome_value,
                    "visits": int(count),
                    "share_pct": round(100.0 * count / len(visits), 1),
                }
            )
    return pd.DataFrame(rows, columns=["criteria", "outcome", "visits", "share_pct"])


def csv_bytes(frame: pd.DataFrame) -> bytes:
    """The table as UTF-8 CSV for a download, with text that a spreadsheet
    would run as a formula neutralised."""
    safe = frame.copy()
    for column in safe.columns:
        if not pd.api.types.is_numeric_dtype(safe[column]):
            safe[column] = safe[column].astype(object).map(neutralise_text)
    return safe.to_csv(index=False).encode("utf-8")
