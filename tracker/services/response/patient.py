"""One patient's treatment response at a visit: regimens and their classification, score changes against
their minimal important change, nerve conduction changes against the smallest detectable change, trends."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd
from sqlalchemy.orm import Session

from tracker import CAUTION
from tracker.criteria import features
from tracker.errors import NotFound, TrackerError
from tracker.response import change, reproducibility, rules, trend
from tracker.response.regimens import Regimen, regimens
from tracker.response.scales import scale_table, with_computed
from tracker.response.settings import ResponseSettings
from tracker.services.evaluation import load_frames
from tracker.services.limit_sets import resolve
from tracker.services.records import find_patient
from tracker.services.response.loading import scores_frame, treatment_periods, visit_dates

WINDOWS = ("regimen", "all")


@dataclass(frozen=True)
class TrendRow:
    """A slope per year over the window: of a score (``kind`` "score") or of a nerve parameter ("nerve")."""

    kind: str
    name: str
    nerve: str
    side: str
    modality: str
    where: str
    unit: str
    trend: trend.Trend


@dataclass
class PatientResponse:
    patient: str
    diagnosis: str | None
    at: dt.date | None
    visit_dates: list[dt.date]
    rule_set: rules.RuleSet
    settings: ResponseSettings
    regimens: list[Regimen]
    classifications: list[rules.Classification]
    current: Regimen | None
    scores: pd.DataFrame  # patient, date, scale, value, computed
    score_changes: pd.DataFrame  # change.SCORE_CHANGE_COLUMNS (every scored day up to ``at``)
    nerve_changes: pd.DataFrame  # change.NERVE_CHANGE_COLUMNS (the visit ``at`` against earlier visits)
    nerve_summary: list[dict]
    nerve_values: pd.DataFrame  # change.NERVE_VALUE_COLUMNS plus visit_date
    trends: list[TrendRow]
    window: tuple[dt.date, dt.date] | None
    detectable: dict[str, reproducibility.Detectable]
    notes: list[str] = field(default_factory=list)
    caution: str = CAUTION


def _parse_window(window: str) -> str:
    if window not in WINDOWS:
        raise TrackerError(f"Unknown trend window {window!r}; choose one of {', '.join(WINDOWS)}")
    return window


def patient_response(
    session: Session,
    code: str,
    *,
    visit_date: dt.date | None = None,
    rules_id: str | None = None,
    rules_files: tuple[Path, ...] = (),
    reproducibility_file: Path | None = None,
    settings: ResponseSettings | None = None,
    window: str = "regimen",
    limits_name: str | None = None,
) -> PatientResponse:
    """The response of patient ``code`` as seen on ``visit_date`` (default: the latest visit or score)."""
    settings = settings or ResponseSettings()
    window = _parse_window(window)
    available = rules.rule_sets(tuple(rules_files))
    rules_id = rules_id or rules.DEFAULT_RULES
    if rules_id not in available:
        raise NotFound(f"Unknown response rule set {rules_id!r}; choose one of {', '.join(available)}")
    rule_set = available[rules_id]
    detectable = (
        reproducibility.from_file(reproducibility_file) if reproducibility_file else reproducibility.shipped()
    )
    patient = find_patient(session, code)
    visits = visit_dates(session, [patient.id])
    dates = [d for d in visits["visit_date"]]
    if visit_date is not None and visit_date not in dates:
        listed = ", ".join(d.isoformat() for d in dates) or "none"
        raise NotFound(f"Patient {code} has no visit on {visit_date.isoformat()}; visits: {listed}")
    recorded = scores_frame(session, [patient.id])
    scores, notes = with_computed(recorded)
    notes = [n.replace(f"{patient.id} ", "", 1) for n in notes]
    at = visit_date or max([*dates, *scores["date"]], default=None)
    plan = regimens(treatment_periods(session, [patient.id]).get(patient.id, []), settings)
    plan = [r for r in plan if at is not None and r.start_date <= at]
    table = scale_table()
    by_scale = rules.series_by_scale(scores)
    classifications = [
        rules.classify(r, by_scale, rule_set, at=at, settings=settings, scales=table) for r in plan
    ]
    current = _running(plan, at) if at else None
    shown = scores[scores["date"] <= at] if at else scores
    score_changes = change.score_changes(
        shown, table, {d: _running(plan, d) for d in shown["date"].unique()}, settings
    )

    values = _nerve_values(session, visits, limits_name)
    nerve_changes, summary = _nerve_changes(values, visits, at, current, detectable, settings)
    window_span = _window(current, at, window, visits, scores, settings)
    trends = _trends(shown, values, window_span, table)
    return PatientResponse(
        patient=patient.code,
        diagnosis=patient.diagnosis,
        at=at,
        visit_dates=dates,
        rule_set=rule_set,
        settings=settings,
        regimens=plan,
        classifications=classifications,
        current=current,
        scores=scores,
        score_changes=score_changes,
        nerve_changes=nerve_changes,
        nerve_summary=summary,
        nerve_values=values,
        trends=trends,
        window=window_span,
        detectable=detectable,
        notes=notes,
    )


def _running(plan: list[Regimen], day: dt.date) -> Regimen | None:
    """The regimen a change on ``day`` is attributed to (the latest started when several overlap)."""
    running = [r for r in plan if r.attributes(day)]
    return running[-1] if running else None


def _nerve_values(session: Session, visits: pd.DataFrame, limits_name: str | None) -> pd.DataFrame:
    keys = [int(k) for k in visits["visit_key"]]
    if not keys:
        return pd.DataFrame(columns=[*change.NERVE_VALUE_COLUMNS, "visit_date"])
    frames = load_frames(session, keys)
    if frames[1].empty:
        return pd.DataFrame(columns=[*change.NERVE_VALUE_COLUMNS, "visit_date"])
    _, limits = resolve(session, limits_name)
    nerves, paths = features.build(*frames, limits)
    values = change.nerve_values(nerves, paths, frames[2])
    values["visit_date"] = values["visit_key"].map(dict(zip(visits["visit_key"], visits["visit_date"])))
    return values


def _nerve_changes(
    values: pd.DataFrame,
    visits: pd.DataFrame,
    at: dt.date | None,
    current: Regimen | None,
    detectable,
    settings: ResponseSettings,
) -> tuple[pd.DataFrame, list[dict]]:
    studied = sorted(set(values["visit_date"])) if len(values) else []
    if at is None or at not in studied:
        return pd.DataFrame(columns=change.NERVE_CHANGE_COLUMNS), []
    key_of = dict(zip(visits["visit_date"], visits["visit_key"]))
    earlier = [d for d in studied if d < at]
    parts = []
    if earlier:
        parts.append(
            change.nerve_changes(
                values, key_of[at], key_of[earlier[-1]], "previous", earlier[-1], detectable, settings
            )
        )
    if current is not None:
        base = change.baseline([(d, 0.0) for d in studied], current, settings)
        if base is not None and base[0] < at and (not earlier or base[0] != earlier[-1]):
            parts.append(
                change.nerve_changes(
                    values, key_of[at], key_of[base[0]], "regimen_baseline", base[0], detectable, settings
                )
            )
        elif base is not None and earlier and base[0] == earlier[-1] and parts:
            # The previous study is also the regimen baseline: one comparison, both names.
            parts[0] = parts[0].assign(reference="previous = regimen_baseline")
    frame = (
        pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=change.NERVE_CHANGE_COLUMNS)
    )
    return frame, change.nerve_summary(frame)


def _window(
    current: Regimen | None,
    at: dt.date | None,
    window: str,
    visits: pd.DataFrame,
    scores: pd.DataFrame,
    settings: ResponseSettings,
) -> tuple[dt.date, dt.date] | None:
    if at is None:
        return None
    days = sorted({*visits["visit_date"], *scores["date"]})
    if window == "all" or current is None:
        return (days[0], at) if days else None
    start = current.start_date - dt.timedelta(days=settings.baseline_lookback_days)
    # From the regimen baseline (the last day seen before the start, within the look-back) to ``at``.
    before = [d for d in days if start <= d <= current.start_date]
    return (before[-1] if before else current.start_date, at)


def _trends(
    scores: pd.DataFrame, values: pd.DataFrame, span: tuple[dt.date, dt.date] | None, table
) -> list[TrendRow]:
    if span is None:
        return []
    lo, hi = span
    out: list[TrendRow] = []
    inside = scores[(scores["date"] >= lo) & (scores["date"] <= hi)]
    for scale, part in inside.groupby("scale", sort=True):
        unit = table[scale].unit if scale in table else ""
        out.append(
            TrendRow(
                "score",
                scale,
                "",
                "",
                "",
                "",
                unit,
                trend.slope_per_year(list(part["date"]), list(part["value"])),
            )
        )
    if len(values):
        inside = values[(values["visit_date"] >= lo) & (values["visit_date"] <= hi) & values["value"].notna()]
        units = {p: d.unit for p, d in reproducibility.shipped().items()}
        for (nerve, side, modality, parameter, where), part in inside.groupby(
            ["nerve", "side", "modality", "parameter", "where"], sort=True
        ):
            unit = "µV" if parameter == "snap_amplitude" else units.get(parameter, "")
            out.append(
                TrendRow(
                    "nerve",
                    parameter,
                    nerve,
                    side,
                    modality,
                    where,
                    unit,
                    trend.slope_per_year(list(part["visit_date"]), list(part["value"])),
                )
            )
    return out


def _iso(value):
    if isinstance(value, dt.date):
        return value.isoformat()
    if isinstance(value, list):
        return [_iso(v) for v in value]
    if isinstance(value, float) and value != value:
        return None
    return value


def _regimen_dict(regimen: Regimen) -> dict:
    return {
        "therapy": regimen.therapy,
        "start_date": regimen.start_date.isoformat(),
        "end_date": regimen.end_date.isoformat() if regimen.end_date else None,
        "dose": regimen.dose,
        "dose_unit": regimen.dose_unit,
        "interval_days": regimen.interval_days,
        "label": regimen.label(),
        "maintenance_start_date": regimen.maintenance_start.isoformat(),
        "assessed_until": regimen.assessed_until.isoformat() if regimen.assessed_until else None,
        "single_course": regimen.single_course,
        "induction": None
        if regimen.induction is None
        else {
            "start_date": regimen.induction.start_date.isoformat(),
            "end_date": regimen.induction.end_date.isoformat() if regimen.induction.end_date else None,
            "dose": regimen.induction.dose,
            "dose_unit": regimen.induction.dose_unit,
        },
    }


def _records(frame: pd.DataFrame) -> list[dict]:
    return [{k: _iso(v) for k, v in row.items()} for row in frame.to_dict("records")]


def response_json(result: PatientResponse) -> dict:
    """The DESIGN.md §5 ``response`` object (extended; nothing listed there is renamed)."""
    return {
        "patient": result.patient,
        "visit_date": _iso(result.at),
        "rules": result.rule_set.id,
        "rules_version": result.rule_set.version,
        "rules_title": result.rule_set.title,
        "regimens": [
            {
                **_regimen_dict(c.regimen),
                "classification": c.classification,
                "evidence": [{k: _iso(v) for k, v in e.items()} for e in c.evidence],
                "missing": c.missing,
                "notes": c.notes,
                "visits_compared": _iso(c.compared),
                "rules": c.rule_set,
                "rules_version": c.rule_set_version,
            }
            for c in result.classifications
        ],
        "scores": [
            {
                "date": _iso(r["date"]),
                "scale": r["scale"],
                "value": r["value"],
                "computed": bool(r["computed"]),
            }
            for r in result.scores.sort_values(["date", "scale"], kind="stable").to_dict("records")
        ],
        "score_changes": _records(result.score_changes),
        "nerve_changes": _records(result.nerve_changes),
        "nerve_summary": result.nerve_summary,
        "trends": [
            {
                "kind": t.kind,
                "name": t.name,
                "nerve": t.nerve or None,
                "side": t.side or None,
                "where": t.where or None,
                "unit": t.unit,
                "points": t.trend.points,
                "slope_per_year": t.trend.slope,
                "ci95_low": t.trend.low,
                "ci95_high": t.trend.high,
                "reason": t.trend.reason or None,
            }
            for t in result.trends
        ],
        "trend_window": None if result.window is None else [d.isoformat() for d in result.window],
        "settings": result.settings.describe(),
        "notes": result.notes,
        "caution": result.caution,
    }
