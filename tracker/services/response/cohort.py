"""The course of every patient (Patients page, benchmark): the regimen running on the patient's latest day
(visit or score) classified by one rule set — scores and treatments only, never the nerve tables."""

from __future__ import annotations

import pandas as pd
from sqlalchemy.orm import Session

from tracker.errors import NotFound
from tracker.response import rules
from tracker.response.regimens import regimens
from tracker.response.scales import scale_table, with_computed
from tracker.response.settings import ResponseSettings
from tracker.services.response.loading import patients, scores_frame, treatment_periods, visit_dates

# The recorded scales each rule scale is read or computed from.
_SOURCES = {
    "adjusted_incat": ("adjusted_incat", "incat_arm", "incat_leg"),
    "incat": ("incat", "incat_arm", "incat_leg"),
    rules.AFFECTED_GRIP: ("grip_kpa_left", "grip_kpa_right"),
}


def _inputs(rule_set: rules.RuleSet) -> list[str]:
    return sorted({name for rule in rule_set.rules for name in _SOURCES.get(rule.scale, (rule.scale,))})


COURSE_COLUMNS = ["code", "course", "rules", "rules_version", "regimen", "since", "ongoing", "why"]


def cohort_course(
    session: Session,
    *,
    rules_id: str | None = None,
    settings: ResponseSettings | None = None,
    loaded: tuple[pd.DataFrame, pd.DataFrame] | None = None,
    codes: list[str] | None = None,
) -> pd.DataFrame:
    """One row per patient: ``course`` (improved / stable / worsened / not_assessable), the rule set and its
    version, the regimen (words), since when it runs, and ``why`` (the deciding change or the missing data).
    ``loaded``: (patients, visit dates) when the caller has read them already; ``codes``: only these patients
    (a page of the patient list: then only their rows are read)."""
    settings = settings or ResponseSettings()
    available = rules.rule_sets()
    if (rules_id or rules.DEFAULT_RULES) not in available:
        raise NotFound(f"Unknown response rule set {rules_id!r}; choose one of {', '.join(available)}")
    rule_set = available[rules_id or rules.DEFAULT_RULES]
    people, visits = loaded if loaded is not None else (patients(session, codes), None)
    ids = None if codes is None else [int(i) for i in people["patient"]]
    if visits is None:
        visits = visit_dates(session, ids)
    periods = treatment_periods(session, ids)
    scores, _ = with_computed(scores_frame(session, ids, scales=_inputs(rule_set)))
    last_visit: dict[int, object] = {}
    for pid, day in zip(
        visits["patient"].tolist(), visits["visit_date"].tolist()
    ):  # sorted by patient and date
        last_visit[pid] = day
    table = scale_table()
    by_patient: dict[int, dict[str, list]] = {}
    for pid, scale, day, value in zip(
        scores["patient"].tolist(),
        scores["scale"].tolist(),
        scores["date"].tolist(),
        scores["value"].tolist(),
    ):
        by_patient.setdefault(pid, {}).setdefault(scale, []).append((day, float(value)))
    for series in by_patient.values():
        for points in series.values():
            points.sort()
    rows = []
    for pid, code in zip(people["patient"].tolist(), people["code"].tolist()):
        series = by_patient.get(pid, {})
        days = [points[-1][0] for points in series.values()]
        if pid in last_visit:
            days.append(last_visit[pid])
        at = max(days) if days else None
        plan = [r for r in regimens(periods.get(pid, []), settings) if at is not None and r.start_date <= at]
        running = [r for r in plan if r.attributes(at)] if at else []
        chosen = running[-1] if running else (plan[-1] if plan else None)
        if chosen is None:
            rows.append(
                {
                    "code": code,
                    "course": "not_assessable",
                    "rules": rule_set.id,
                    "rules_version": rule_set.version,
                    "regimen": "",
                    "since": None,
                    "ongoing": False,
                    "why": "no treatment recorded",
                }
            )
            continue
        result = rules.classify(chosen, series, rule_set, at=at, settings=settings, scales=table)
        deciding = [e for e in result.evidence if e["outcome"] == result.classification]
        why = "; ".join(
            f"{e['label']} {e['baseline_value']:g} → {e['value']:g}" for e in deciding
        ) or "; ".join(result.missing)
        regimen = chosen.label()
        if not chosen.attributes(at):  # the last regimen has ended: say so beside its course
            regimen += (
                f" (ended {chosen.end_date.isoformat()}; no treatment since)"
                if chosen.end_date
                else " (ended)"
            )
        rows.append(
            {
                "code": code,
                "course": result.classification,
                "rules": rule_set.id,
                "rules_version": rule_set.version,
                "regimen": regimen,
                "since": chosen.start_date,
                "ongoing": chosen.attributes(at),
                "why": why,
            }
        )
    return pd.DataFrame(rows, columns=COURSE_COLUMNS)


def cohort_response(
    session: Session,
    *,
    rules_id: str | None = None,
    settings: ResponseSettings | None = None,
    limits_name: str | None = None,
    chunk_visits: int = 5000,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The course of every patient (:func:`cohort_course`) and the nerve conduction changes of each
    patient's latest visit against the previous visit and against the running regimen's baseline visit
    (:data:`tracker.response.change.NERVE_CHANGE_COLUMNS` plus ``code``). Only those (at most three) visits
    per patient are read and turned into features, ``chunk_visits`` at a time."""
    import datetime as dt

    from tracker.criteria import features
    from tracker.response import change, reproducibility
    from tracker.services.evaluation import load_frames
    from tracker.services.limit_sets import resolve

    settings = settings or ResponseSettings()
    people, visits = patients(session), visit_dates(session)
    course = cohort_course(session, rules_id=rules_id, settings=settings, loaded=(people, visits))
    # As the patient view: a regimen baseline study only for a regimen the latest visit is attributed to.
    since = {
        code: day for code, day, ongoing in zip(course["code"], course["since"], course["ongoing"]) if ongoing
    }
    by_patient: dict[int, list[tuple[object, int]]] = {}
    for pid, day, key in zip(visits["patient"], visits["visit_date"], visits["visit_key"]):
        by_patient.setdefault(pid, []).append((day, int(key)))
    lookback = dt.timedelta(days=settings.baseline_lookback_days)
    grace = dt.timedelta(days=settings.baseline_grace_days)
    pairs: list[tuple[int, int, str, object, str]] = []
    for pid, code in zip(people["patient"], people["code"]):
        studied = by_patient.get(pid, [])
        if len(studied) < 2:
            continue
        (day, key), (previous_day, previous_key) = studied[-1], studied[-2]
        start = since.get(code)
        baseline = None
        if start is not None and start == start:
            before = [v for v in studied if start - lookback <= v[0] <= start]
            after = [v for v in studied if start < v[0] <= start + grace]
            baseline = before[-1] if before else (after[0] if after else None)
        if baseline is not None and baseline[1] == previous_key:
            pairs.append((key, previous_key, "previous = regimen_baseline", previous_day, code))
            continue
        pairs.append((key, previous_key, "previous", previous_day, code))
        if baseline is not None and baseline[0] < day:
            pairs.append((key, baseline[1], "regimen_baseline", baseline[0], code))
    pair_frame = pd.DataFrame(
        pairs, columns=["visit_key", "reference_key", "reference", "reference_date", "code"]
    )
    needed = sorted(set(pair_frame["visit_key"]) | set(pair_frame["reference_key"]))
    empty = pd.DataFrame(columns=["code", *change.NERVE_CHANGE_COLUMNS])
    if not needed:
        return course, empty
    _, limits = resolve(session, limits_name)
    table = reproducibility.shipped()
    parts = []
    # Chunks by patient pair (a pair's two visits always in one chunk), so memory stays bounded.
    for start in range(0, len(pair_frame), chunk_visits):
        chunk = pair_frame.iloc[start : start + chunk_visits]
        keys = sorted(set(chunk["visit_key"]) | set(chunk["reference_key"]))
        frames = load_frames(session, [int(k) for k in keys])
        if frames[1].empty:
            continue
        nerves, paths = features.build(*frames, limits)
        values = change.nerve_values(nerves, paths, frames[2])
        found = change.nerve_changes_many(values, chunk.drop(columns=["code"]), table, settings)
        parts.append(
            found.merge(
                chunk[["visit_key", "reference_key", "reference", "code"]].drop(columns=["reference_key"]),
                on=["visit_key", "reference"],
            )
        )
    changes = pd.concat(parts, ignore_index=True) if parts else empty
    return course, changes[["code", *change.NERVE_CHANGE_COLUMNS]]
