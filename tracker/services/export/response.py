"""Treatment-response columns of the visit-level research export: for each exported visit, the regimen running
on the visit day, that regimen's classification by the response rule set(s) as judged on that day, and the
value of the adjusted INCAT (and the weaker hand's grip) at the visit with its changes since the regimen
baseline and since the previous scored visit, each flagged against the scale's minimal important change.

The arithmetic is :mod:`tracker.response` (regimens, computed scales, baseline, ``meets``, ``classify``); this
module only reads the chunk's patients' treatments, scores and visit dates and lays the answers out per visit.
Real dates never leave it: a regimen start is given as days since the patient's first visit, shifted by the
patient's secret offset, or (identified export only) as the real date. The classification's evidence and notes
(which hold dates) are not exported.
"""

from __future__ import annotations

import bisect
import datetime as dt
from dataclasses import dataclass, field

import pandas as pd
from sqlalchemy.orm import Session

from tracker.domain.conduction import quantise
from tracker.response import rules
from tracker.response.change import baseline, meets
from tracker.response.regimens import Regimen, TreatmentPeriod, regimens
from tracker.response.scales import ScaleInfo, scale_table, with_computed
from tracker.response.settings import ResponseSettings
from tracker.services.export.columns import RESPONSE_SCORE_DAYS, response_column
from tracker.services.response.loading import scores_frame, treatment_periods, visit_dates

# Scales whose value and changes are columns: the adjusted INCAT (ICE, Hughes RAC et al. Lancet Neurol 2008)
# and the weaker hand's grip (computed from both hands' Vigorimeter grip of the day).
CHANGE_SCALES = ("adjusted_incat", "grip_kpa_weaker")
# The rule sets whose classification is a column.
RESPONSE_RULES = (rules.DEFAULT_RULES,)
# Scales a rule set names that are not stored as such: the more affected hand's grip reads both hands.
_RULE_SCALE_READS = {rules.AFFECTED_GRIP: ("grip_kpa_left", "grip_kpa_right", "grip_kpa_weaker")}

Point = tuple[dt.date, float]


@dataclass(frozen=True)
class ResponseSpec:
    """What the response columns depend on: the rule sets, the settings and the scales with change columns."""

    rule_sets: tuple[rules.RuleSet, ...]
    settings: ResponseSettings = field(default_factory=ResponseSettings)
    scales: tuple[ScaleInfo, ...] = ()

    @property
    def rules_info(self) -> list[tuple[str, str, str]]:
        return [(r.id, r.version, r.title) for r in self.rule_sets]


def response_spec(settings: ResponseSettings | None = None) -> ResponseSpec:
    available = rules.rule_sets()
    table = scale_table()
    return ResponseSpec(
        tuple(available[r] for r in RESPONSE_RULES),
        settings or ResponseSettings(),
        tuple(table[s] for s in CHANGE_SCALES),
    )


def manifest_entry(spec: ResponseSpec) -> dict:
    """What the manifest records about the response columns."""
    return {
        "rule_sets": [
            {
                "id": r.id,
                "version": r.version,
                "title": r.title,
                "column": response_column(r.id),
                "rules": [
                    {
                        "scale": x.scale,
                        "threshold": x.threshold,
                        "comparator": x.comparator,
                        "change_kind": x.change_kind,
                        "confirm_visits": x.confirm_visits,
                        "required": x.required,
                        "source": x.source,
                        "status": x.status,
                    }
                    for x in r.rules
                ],
            }
            for r in spec.rule_sets
        ],
        "settings": {d["setting"]: d["value"] for d in spec.settings.describe()},
        "scales": [
            {
                "scale": s.name,
                "unit": s.unit,
                "minimal_important_change": s.mic_words(),
                "source": s.mic_source,
            }
            for s in spec.scales
        ],
        "score_at_visit": (
            f"score on the visit date, else the latest within {RESPONSE_SCORE_DAYS} days before it and after "
            "the previous visit"
        ),
    }


def with_response(
    session: Session,
    frame: pd.DataFrame,
    context: pd.DataFrame,
    spec: ResponseSpec,
    *,
    shifted: bool,
    identified: bool,
) -> pd.DataFrame:
    """``frame`` (one row per visit, ``visit_key``) with the response columns added;
    reads only the chunk's patients."""
    patient_ids = sorted(set(int(p) for p in context["patient_id"]))
    recorded = scores_frame(session, patient_ids)
    scores, _ = with_computed(recorded)  # the notes name patients and dates: not exported
    values = response_values(
        context, treatment_periods(session, patient_ids), scores, visit_dates(session, patient_ids), spec
    )
    for name in values.columns:
        if name == "regimen_start_date" and not identified:
            continue
        frame[name] = frame["visit_key"].map(values[name])
    if shifted and not identified:
        shift = frame["visit_key"].map(context.set_index("visit_key")["shift_days"])
        frame["regimen_start_date_shifted"] = [
            None if not isinstance(start, dt.date) else start + dt.timedelta(days=int(days))
            for start, days in zip(frame["visit_key"].map(values["regimen_start_date"]), shift)
        ]
    return frame


def response_values(
    context: pd.DataFrame,
    periods: dict[int, list[TreatmentPeriod]],
    scores: pd.DataFrame,
    all_visits: pd.DataFrame,
    spec: ResponseSpec,
) -> pd.DataFrame:
    """The response columns of each visit in ``context`` (``visit_key``, ``patient_id``, ``visit_date``),
    indexed by visit key; ``regimen_start_date`` holds the real date (the caller shifts it or drops it).

    ``scores``: recorded and computed scores of these patients
    (:func:`tracker.response.scales.with_computed`); ``all_visits``: every visit of
    these patients (``patient``, ``visit_date``), also those outside the filters, for the
    first visit and the previous scored visit.
    """
    table = scale_table()
    series: dict[int, dict[str, list[Point]]] = {}
    for pid, scale, day, value in zip(scores["patient"], scores["scale"], scores["date"], scores["value"]):
        series.setdefault(int(pid), {}).setdefault(scale, []).append((_as_date(day), float(value)))
    for by_scale in series.values():
        for points in by_scale.values():
            points.sort()
    days_of: dict[int, list[dt.date]] = {}
    for pid, day in zip(all_visits["patient"], all_visits["visit_date"]):
        days_of.setdefault(int(pid), []).append(_as_date(day))
    rows: dict[int, dict] = {}
    wanted = context[["visit_key", "patient_id", "visit_date"]]
    for pid, visits in wanted.groupby("patient_id", sort=False):
        pid = int(pid)
        patient_days = sorted(days_of.get(pid, []))
        first = patient_days[0] if patient_days else None
        plan = regimens(periods.get(pid, []), spec.settings)
        by_scale = series.get(pid, {})
        at_visits = {
            name: _scores_at_visits(by_scale.get(name, []), patient_days) for name in _read_scales(spec)
        }
        for key, day in zip(visits["visit_key"], visits["visit_date"]):
            rows[int(key)] = _visit_row(_as_date(day), first, plan, by_scale, at_visits, spec, table)
    return pd.DataFrame.from_dict(rows, orient="index").reindex(columns=value_columns(spec))


def _as_date(value) -> dt.date:
    """A plain ``datetime.date`` (loaders may hand back dates, timestamps or ISO text)."""
    if isinstance(value, dt.date) and not isinstance(value, dt.datetime):
        return value
    return pd.Timestamp(value).date()


def value_columns(spec: ResponseSpec) -> list[str]:
    """The columns of :func:`response_values` (``regimen_start_date`` is the real date, never exported as such
    unless the export is identified)."""
    names = [
        "regimen_therapy",
        "regimen_dose",
        "regimen_dose_unit",
        "regimen_interval_days",
        "regimen_induction",
        "regimens_running",
        "regimen_start_days_since_first_visit",
        "regimen_start_date",
        "regimen_days_since_start",
    ]
    names += [response_column(r.id) for r in spec.rule_sets]
    for scale in spec.scales:
        names += [
            f"{scale.name}_{suffix}"
            for suffix in (
                "at_visit",
                "offset_days",
                "change_from_baseline",
                "baseline_offset_days",
                "change_from_baseline_meets_mic",
                "change_from_previous",
                "previous_offset_days",
                "change_from_previous_meets_mic",
            )
        ]
    return names


def _rule_set_scales(rule_set: rules.RuleSet) -> set[str]:
    """The stored or computed scales a rule set reads."""
    names: set[str] = set()
    for rule in rule_set.rules:
        names.update(_RULE_SCALE_READS.get(rule.scale, (rule.scale,)))
    return names


def _read_scales(spec: ResponseSpec) -> set[str]:
    return {*(s.name for s in spec.scales), *(n for r in spec.rule_sets for n in _rule_set_scales(r))}


def score_at(points: list[Point], day: dt.date, previous_visit: dt.date | None = None) -> Point | None:
    """The score on ``day``, else the latest within :data:`RESPONSE_SCORE_DAYS` before it and after
    ``previous_visit`` (so that one score never stands at two visits); ``points`` sorted by day."""
    index = bisect.bisect_right(points, (day, float("inf"))) - 1
    if index < 0:
        return None
    found = points[index]
    if (day - found[0]).days > RESPONSE_SCORE_DAYS:
        return None
    if found[0] != day and previous_visit is not None and found[0] <= previous_visit:
        return None
    return found


def _scores_at_visits(
    points: list[Point], days: list[dt.date]
) -> dict[dt.date, tuple[Point | None, Point | None]]:
    """For each of a patient's visit days (sorted): (score at the visit,
    score at the previous scored visit)."""
    out: dict[dt.date, tuple[Point | None, Point | None]] = {}
    earlier: Point | None = None
    previous_visit: dt.date | None = None
    for day in days:
        here = score_at(points, day, previous_visit)
        out[day] = (here, earlier if here is not None else None)
        if here is not None:
            earlier = here
        previous_visit = day
    return out


def _running(plan: list[Regimen], day: dt.date) -> list[Regimen]:
    return [r for r in plan if r.attributes(day)]


def _visit_row(
    day: dt.date,
    first: dt.date | None,
    plan: list[Regimen],
    by_scale: dict[str, list[Point]],
    at_visits: dict[str, dict],
    spec: ResponseSpec,
    table: dict[str, ScaleInfo],
) -> dict:
    running = _running(plan, day)
    regimen = (
        running[-1] if running else None
    )  # the latest started when several overlap (as the response pages do)
    row: dict = {"regimens_running": len(running)}
    if regimen is not None:
        row.update(
            {
                "regimen_therapy": regimen.therapy,
                "regimen_dose": regimen.dose,
                "regimen_dose_unit": regimen.dose_unit,
                "regimen_interval_days": regimen.interval_days,
                "regimen_induction": regimen.induction is not None,
                "regimen_start_days_since_first_visit": None
                if first is None
                else (regimen.start_date - first).days,
                "regimen_start_date": regimen.start_date,
                "regimen_days_since_start": (day - regimen.start_date).days,
            }
        )
    for rule_set in spec.rule_sets:
        judged = regimen is not None and any(
            at_visits[name][day][0] is not None for name in _rule_set_scales(rule_set)
        )
        row[response_column(rule_set.id)] = (
            rules.classify(
                regimen, by_scale, rule_set, at=day, settings=spec.settings, scales=table
            ).classification
            if judged
            else None
        )
    for scale in spec.scales:
        here, previous = at_visits[scale.name][day]
        name = scale.name
        if here is None:
            continue
        row[f"{name}_at_visit"] = here[1]
        row[f"{name}_offset_days"] = (here[0] - day).days
        if regimen is not None:
            base = baseline(by_scale.get(name, []), regimen, spec.settings)
            if base is not None and base[0] < here[0]:
                _change(row, f"{name}_change_from_baseline", here[1] - base[1], scale)
                row[f"{name}_baseline_offset_days"] = (base[0] - day).days
        if previous is not None:
            _change(row, f"{name}_change_from_previous", here[1] - previous[1], scale)
            row[f"{name}_previous_offset_days"] = (previous[0] - day).days
    return row


def _change(row: dict, column: str, change: float, scale: ScaleInfo) -> None:
    row[column] = quantise(change)
    row[f"{column}_meets_mic"] = (
        None if scale.mic is None else meets(change, scale.mic, scale.mic_comparator or ">=")
    )
