"""The course of every patient (Patients page, benchmark): the regimen running on the patient's latest day
(visit or score) classified by one rule set — scores and treatments only, never the nerve tables."""

from __future__ import annotations

import pandas as pd
from sqlalchemy.orm import Session

from tracker.response import rules
from tracker.response.regimens import regimens
from tracker.response.scales import scale_table, with_computed
from tracker.response.settings import ResponseSettings
from tracker.services.response.loading import patients, scores_frame, treatment_periods, visit_dates

COURSE_COLUMNS = ["code", "course", "rules", "rules_version", "regimen", "since", "why"]


def cohort_course(session: Session, *, rules_id: str | None = None, settings: ResponseSettings | None = None) -> pd.DataFrame:
    """One row per patient: ``course`` (improved / stable / worsened / not_assessable), the rule set and its
    version, the regimen (words), since when it runs, and ``why`` (the deciding change or the missing data)."""
    settings = settings or ResponseSettings()
    available = rules.rule_sets()
    rule_set = available[rules_id or rules.DEFAULT_RULES]
    people = patients(session)
    periods = treatment_periods(session)
    scores, _ = with_computed(scores_frame(session))
    visits = visit_dates(session)
    last_visit = visits.groupby("patient")["visit_date"].max().to_dict() if len(visits) else {}
    table = scale_table()
    by_patient: dict[int, dict[str, list]] = {}
    for pid, scale, day, value in zip(scores["patient"], scores["scale"], scores["date"], scores["value"]):
        by_patient.setdefault(pid, {}).setdefault(scale, []).append((day, float(value)))
    for series in by_patient.values():
        for points in series.values():
            points.sort()
    rows = []
    for pid, code in zip(people["patient"], people["code"]):
        series = by_patient.get(pid, {})
        days = [points[-1][0] for points in series.values()]
        if pid in last_visit:
            days.append(last_visit[pid])
        at = max(days) if days else None
        plan = [r for r in regimens(periods.get(pid, []), settings) if at is not None and r.start_date <= at]
        running = [r for r in plan if r.covers(at)] if at else []
        chosen = running[-1] if running else (plan[-1] if plan else None)
        if chosen is None:
            rows.append({"code": code, "course": "not_assessable", "rules": rule_set.id, "rules_version": rule_set.version,
                         "regimen": "", "since": None, "why": "no treatment recorded"})
            continue
        result = rules.classify(chosen, series, rule_set, at=at, settings=settings, scales=table)
        deciding = [e for e in result.evidence if e["outcome"] == result.classification]
        why = "; ".join(f"{e['label']} {e['baseline_value']:g} → {e['value']:g}" for e in deciding) or "; ".join(result.missing)
        rows.append({"code": code, "course": result.classification, "rules": rule_set.id, "rules_version": rule_set.version,
                     "regimen": chosen.label(), "since": chosen.start_date, "why": why})
    return pd.DataFrame(rows, columns=COURSE_COLUMNS)


def cohort_response(session: Session, *, rules_id: str | None = None, settings: ResponseSettings | None = None,
                    limits_name: str | None = None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The course of every patient (:func:`cohort_course`) and, per patient, the nerve conduction changes of
    the latest study against the previous one (:data:`tracker.response.change.NERVE_CHANGE_COLUMNS` plus
    ``code``): the whole response question for a cohort in one pass over the measurements."""
    from tracker.criteria import features
    from tracker.response import change, reproducibility
    from tracker.services.evaluation import load_frames
    from tracker.services.limit_sets import resolve

    settings = settings or ResponseSettings()
    course = cohort_course(session, rules_id=rules_id, settings=settings)
    visits, tests, sites = load_frames(session)
    if tests.empty:
        return course, pd.DataFrame(columns=["code", *change.NERVE_CHANGE_COLUMNS])
    _, limits = resolve(session, limits_name)
    nerves, paths = features.build(visits, tests, sites, limits)
    values = change.nerve_values(nerves, paths, sites)
    studied = visits[visits["visit_key"].isin(values["visit_key"].unique())].sort_values(["patient", "visit_date"], kind="stable")
    last_two = studied.groupby("patient", sort=False).tail(2)
    pairs = last_two.groupby("patient", sort=False)
    table = reproducibility.shipped()
    parts = []
    for code, pair in pairs:
        if len(pair) < 2:
            continue
        (ref_key, cur_key), (ref_date, _) = pair["visit_key"].tolist(), pair["visit_date"].tolist()
        scope = values[values["visit_key"].isin([ref_key, cur_key])]
        parts.append(change.nerve_changes(scope, cur_key, ref_key, "previous", ref_date, table, settings).assign(code=code))
    changes = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=["code", *change.NERVE_CHANGE_COLUMNS])
    return course, changes[["code", *change.NERVE_CHANGE_COLUMNS]]
