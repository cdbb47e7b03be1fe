"""Evaluate visits against criteria sets: load the rows, pick the normal limits, run the engine, keep the
evaluations (recomputed when the visit's data, the limits or the criteria version change)."""

from __future__ import annotations

import datetime as dt
import hashlib
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import delete, insert, select
from sqlalchemy.orm import Session

from tracker.criteria import engine
from tracker.criteria.model import Settings, SetResult
from tracker.db.models import Evaluation, NerveTest, Patient, StimulationSite, Visit, utc_now
from tracker.errors import NotFound, TrackerError
from tracker.services.access import audit
from tracker.services.limit_sets import LimitSetInfo, resolve
from tracker.services.records import find_patient

# The set a visit is checked against when none is asked for, by the visit's working diagnosis.
DEFAULT_CRITERIA = {"cidp": "ean-pns-2021-cidp", "mmn": "efns-pns-2010-mmn", "gbs": "hadden-1998-gbs"}
FALLBACK_CRITERIA = "efns-pns-2010-cidp"


def load_frames(session: Session, visit_ids: list[int] | None = None) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """(visits, tests, sites) as the engine expects them, for the given visits (all when ``None``)."""
    visit_query = select(
        Visit.id.label("visit_key"), Patient.code.label("patient"), Visit.visit_date, Visit.height_cm, Patient.sex,
        Patient.birth_year, Visit.phenotype, Visit.diagnosis, Visit.content_sha256,
    ).join(Patient, Patient.id == Visit.patient_id)
    test_query = select(
        NerveTest.id.label("test_key"), NerveTest.visit_id.label("visit_key"), NerveTest.nerve, NerveTest.side, NerveTest.modality,
        NerveTest.temperature_c, NerveTest.lff_hz, NerveTest.f_latency_ms, NerveTest.f_absent, NerveTest.wrist_entrapment,
    )
    site_query = select(
        StimulationSite.nerve_test_id.label("test_key"), StimulationSite.site_order, StimulationSite.label, StimulationSite.distance_mm,
        StimulationSite.latency_ms, StimulationSite.peak_latency_ms, StimulationSite.amplitude_mv, StimulationSite.amplitude_uv,
        StimulationSite.duration_ms, StimulationSite.area_mvms,
    ).join(NerveTest, NerveTest.id == StimulationSite.nerve_test_id)
    if visit_ids is not None:
        visit_query = visit_query.where(Visit.id.in_(visit_ids))
        test_query = test_query.where(NerveTest.visit_id.in_(visit_ids))
        site_query = site_query.where(NerveTest.visit_id.in_(visit_ids))
    connection = session.connection()
    visits = pd.read_sql(visit_query, connection)
    tests = pd.read_sql(test_query, connection)
    sites = pd.read_sql(site_query, connection)
    return _typed(visits, tests, sites)


def _typed(visits: pd.DataFrame, tests: pd.DataFrame, sites: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    visits["visit_date"] = pd.to_datetime(visits["visit_date"]).dt.date
    # Age at the visit from the birth year: exact to within a year (the full birth date is kept apart).
    visits["age_years"] = pd.to_datetime(visits["visit_date"]).dt.year - visits["birth_year"].astype(float)
    visits["height_cm"] = visits["height_cm"].astype(float)
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


def check_visit(session: Session, code: str, *, visit_date: dt.date | None, criteria: list[str] | None,
                limits_name: str | None, settings: Settings | None = None, username: str | None = None) -> VisitCheck:
    """Evaluate one visit (the latest when no date is given); with ``username``, save the evaluations in the
    caller's transaction and audit them (outcomes before → after)."""
    patient = find_patient(session, code)
    visits = session.execute(select(Visit.id, Visit.visit_date, Visit.diagnosis).where(Visit.patient_id == patient.id).order_by(Visit.visit_date)).all()
    if not visits:
        raise NotFound(f"Patient {code} has no visits yet.")
    chosen = visits[-1] if visit_date is None else next((v for v in visits if v.visit_date == visit_date), None)
    if chosen is None:
        raise NotFound(f"Patient {code} has no visit on {visit_date.isoformat()}; visits: {', '.join(v.visit_date.isoformat() for v in visits)}")
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
        raise NotFound(f"The visit of {code} on {chosen.visit_date.isoformat()} has no nerve tests to evaluate.")
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
        warnings=engine.temperature_warnings(visit_frame[visit_frame["visit_key"] == chosen.id], tests, sites, limits),
        closest={cid: engine.closest_miss(r) for cid, r in current.items()},
        changes={cid: _changes_at(visit_frame, r, chosen.id) for cid, r in results.items()},
        previous_date=previous.visit_date if previous else None,
        outcome_changes={cid: _outcome_change_at(visit_frame, r, chosen.id) for cid, r in results.items() if _outcome_change_at(visit_frame, r, chosen.id)},
    )


def _outcome_change_at(visits: pd.DataFrame, result: SetResult, visit_key: int) -> tuple[str, str] | None:
    changed = engine.outcome_changes(visits, result)
    changed = changed[changed["visit_key"] == visit_key]
    return (str(changed["previous_outcome"].iloc[0]), str(changed["outcome"].iloc[0])) if len(changed) else None


def _changes_at(visits: pd.DataFrame, result: SetResult, visit_key: int) -> pd.DataFrame:
    changes = engine.changes_between_visits(visits, result)
    return changes[changes["visit_key"] == visit_key].reset_index(drop=True)


def _only(result: SetResult, visit_key: int) -> SetResult:
    return SetResult(
        result.criteria, result.version,
        result.findings[result.findings["visit_key"] == visit_key].reset_index(drop=True),
        result.outcomes[result.outcomes["visit_key"] == visit_key].reset_index(drop=True),
        result.extra_keys,
        result.outcome_items,
    )


def _input_fingerprints(visits: pd.DataFrame, info: LimitSetInfo, criteria_version: str, settings: Settings) -> dict[int, str]:
    """What an evaluation depends on: the visit's content, the patient's age/height/sex, the limits set and
    version, the criteria version and the settings."""
    fixed = f"{info.id}:{info.version}:{criteria_version}:{settings}"
    result = {}
    for row in visits.itertuples():
        payload = f"{row.content_sha256}|{row.age_years}|{row.height_cm}|{row.sex}|{row.phenotype}|{fixed}"
        result[int(row.visit_key)] = hashlib.sha256(payload.encode()).hexdigest()
    return result


def _save(session: Session, visits: pd.DataFrame, results: dict[str, SetResult], info: LimitSetInfo,
          settings: Settings) -> list[tuple[int, str, str | None, str]]:
    """Replace the stored evaluations of these visits; return ``(visit_key, criteria_id, outcome before or
    None, outcome now)`` for the audit trail."""
    changes: list[tuple[int, str, str | None, str]] = []
    for criteria_id, result in results.items():
        fingerprints = _input_fingerprints(visits, info, result.version, settings)
        keys = list(fingerprints)
        scope = (Evaluation.visit_id.in_(keys), Evaluation.criteria_id == criteria_id, Evaluation.limit_set_id == info.id)
        before = {visit: outcome for visit, outcome in session.execute(select(Evaluation.visit_id, Evaluation.outcome).where(*scope))}
        session.execute(delete(Evaluation).where(*scope))
        outcomes = result.outcomes.set_index("visit_key")
        payloads = to_json_many(result, [k for k in keys if k in outcomes.index])
        rows = []
        for key in keys:
            if key not in outcomes.index:
                continue
            outcome = str(outcomes.loc[key, "outcome"])
            changes.append((key, criteria_id, before.get(key), outcome))
            rows.append(
                {
                    "visit_id": key,
                    "criteria_id": criteria_id,
                    "criteria_version": result.version,
                    "limit_set_id": info.id,
                    "limit_set_version": info.version,
                    "input_sha256": fingerprints[key],
                    "outcome": outcome,
                    "result": compact_trace(payloads[key]),
                    "computed_at": utc_now(),
                }
            )
        if rows:
            session.execute(insert(Evaluation), rows)
    return changes


def _audit_saved(session: Session, changes: list[tuple[int, str, str | None, str]], visits: pd.DataFrame,
                 info: LimitSetInfo, settings: Settings, *, username: str, one_visit: bool) -> None:
    """One audit event per save: for one visit the outcome of each set before → after; for a cohort the
    counts, and every visit whose outcome changed (code/date: set before → after)."""
    if not changes:
        return
    where = {int(r.visit_key): f"{r.patient}/{r.visit_date.isoformat()}" for r in visits.itertuples()}
    common = {"limits": f"{info.name} v{info.version}", "settings": str(settings)}
    if one_visit:
        key = changes[0][0]
        audit.record(session, username=username, action="save_evaluations", entity="evaluations",
                     entity_key=where.get(key), before={c: old for _, c, old, _ in changes if old is not None} or None,
                     after={**{c: new for _, c, _, new in changes}, **common})
        return
    changed = [f"{where.get(k, k)}: {c} {old} → {new}" for k, c, old, new in changes if old is not None and old != new]
    audit.record(session, username=username, action="save_evaluations", entity="evaluations", entity_key=None,
                 after={"evaluations": len(changes), "visits": len({k for k, *_ in changes}),
                        "outcomes_changed": len(changed), "changed": changed[:200], **common},
                 detail=None if len(changed) <= 200 else f"{len(changed) - 200} more outcome changes not listed")


def refresh_evaluations(
    session: Session,
    criteria: list[str] | None = None,
    limits_name: str | None = None,
    settings: Settings | None = None,
    visit_ids: list[int] | None = None,
    *,
    username: str,
) -> dict[str, int]:
    """Recompute, in one vectorised pass, every evaluation whose inputs changed (of the given visits, or of
    all); return counts. The save is audited under ``username`` (one event)."""
    settings = settings or Settings()
    info, limits = resolve(session, limits_name)
    visits, tests, sites = load_frames(session, visit_ids)
    criteria_ids = criteria or engine.available()
    counts = {"visits": len(visits), "recomputed": 0, "unchanged": 0}
    stored = {
        (visit_id, criteria_id): fingerprint
        for visit_id, criteria_id, fingerprint in session.execute(
            select(Evaluation.visit_id, Evaluation.criteria_id, Evaluation.input_sha256).where(
                Evaluation.limit_set_id == info.id, *([Evaluation.visit_id.in_(visit_ids)] if visit_ids is not None else [])
            )
        )
    }
    results = engine.evaluate(visits, tests, sites, limits, criteria_ids, settings)
    changes = []
    for criteria_id, result in results.items():
        fingerprints = _input_fingerprints(visits, info, result.version, settings)
        stale = [k for k, h in fingerprints.items() if stored.get((k, criteria_id)) != h]
        counts["unchanged"] += len(fingerprints) - len(stale)
        counts["recomputed"] += len(stale)
        if stale:
            changes += _save(session, visits[visits["visit_key"].isin(stale)], {criteria_id: result}, info, settings)
    _audit_saved(session, changes, visits, info, settings, username=username, one_visit=False)
    return counts


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


FINDING_TEXT = ("parameter", "item", "unit", "comparator", "status", "source", "source_status", "limit_source", "limit_status")


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
    columns = {c: findings[c].to_numpy(dtype=object) for c in ("visit_key", "nerve", "side", "modality", "segment", "value", "limit", "limit_name", "threshold", "reason", *FINDING_TEXT)}
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
        payload = {"criteria": result.criteria, "criteria_version": result.version, "outcome": outcome["outcome"], "rule": rule if isinstance(rule, str) else None}
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
