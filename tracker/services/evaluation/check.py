"""Check one visit against criteria sets (the `check` command and the visit report): evaluate it beside its
previous visit, optionally save and audit the result."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

import pandas as pd
from sqlalchemy import select
from sqlalchemy.orm import Session

from tracker.criteria import engine, features
from tracker.criteria.model import SetResult, Settings
from tracker.db.models import Visit
from tracker.errors import NotFound, TrackerError
from tracker.services.evaluation.frames import load_frames
from tracker.services.evaluation.saving import _audit_saved, _save
from tracker.services.limit_sets import LimitSetInfo, resolve
from tracker.services.records import find_patient

# The set a visit is checked against when none is asked for, by the visit's working diagnosis.
DEFAULT_CRITERIA = {"cidp": "ean-pns-2021-cidp", "mmn": "efns-pns-2010-mmn", "gbs": "hadden-1998-gbs"}
FALLBACK_CRITERIA = "efns-pns-2010-cidp"


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
    built = features.build(visit_frame, tests, sites, limits)
    results = engine.evaluate(visit_frame, tests, sites, limits, criteria_ids, settings, built=built)
    current = {cid: _only(result, chosen.id) for cid, result in results.items()}
    if username is not None:  # saved (and audited) for a known user; otherwise only computed
        chosen_frame = visit_frame[visit_frame["visit_key"] == chosen.id]
        changes = _save(session, chosen_frame, current, info, settings)
        _audit_saved(session, changes, chosen_frame, info, settings, username=username, one_visit=True)
    outcome_changes = {cid: _outcome_change_at(visit_frame, r, chosen.id) for cid, r in results.items()}
    return VisitCheck(
        patient=patient.code,
        visit_date=chosen.visit_date,
        visit_key=chosen.id,
        phenotype=visit_frame.loc[visit_frame["visit_key"] == chosen.id, "phenotype"].iloc[0],
        limits=info,
        results=current,
        warnings=engine.temperature_warnings(
            visit_frame[visit_frame["visit_key"] == chosen.id], tests, sites, limits, nerves=built[0]
        ),
        closest={cid: engine.closest_miss(r) for cid, r in current.items()},
        changes={cid: _changes_at(visit_frame, r, chosen.id) for cid, r in results.items()},
        previous_date=previous.visit_date if previous else None,
        outcome_changes={cid: change for cid, change in outcome_changes.items() if change},
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
