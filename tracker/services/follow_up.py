"""One patient's follow-up as plain tables: per-nerve values over time, the reference lines they are read
against, treatments, scores, and the outcome of every criteria set per visit.

Everything is computed from this patient's visits only (the page must not scan the whole database). Values
come from the criteria engine's own feature tables, and reference lines from its findings, so a plotted point
and its line are the numbers the criteria were applied to.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, replace

import pandas as pd
from sqlalchemy import select
from sqlalchemy.orm import Session

from tracker.criteria import engine, features, thresholds
from tracker.criteria.model import Settings
from tracker.db.models import OutcomeScore, Treatment, Visit
from tracker.domain.labels import COMPARATOR_SIGNS, PLOTTED_FEATURE_LABELS, threshold_label, treatment_words
from tracker.services.evaluation import default_criteria, load_frames
from tracker.services.limit_sets import LimitSetInfo, resolve
from tracker.services.records import find_patient


@dataclass(frozen=True)
class Parameter:
    """A quantity the follow-up page can plot.

    ``limit_column``: the normal-limit column the engine attaches to each nerve test (``lln_cv`` …);
    ``items``: the criteria items whose threshold is drawn (the first one the chosen set has wins);
    ``modality``: which nerve tests have it.
    """

    key: str
    label: str
    unit: str
    modality: str
    limit_column: str | None
    bound: str | None
    items: tuple[str, ...]


PARAMETERS: dict[str, Parameter] = {
    p.key: p
    for p in (
        Parameter("cv", "Motor conduction velocity", "m/s", "motor", "lln_cv", "LLN", ("cv",)),
        Parameter(
            "distal_latency", "Distal motor latency", "ms", "motor", "uln_distal_latency_ms", "ULN", ("dml",)
        ),
        Parameter(
            "distal_cmap",
            "Distal CMAP amplitude",
            "mV",
            "motor",
            "lln_amplitude",
            "LLN",
            ("axonal_low_cmap",),
        ),
        # Block and dispersion: the chosen set decides amplitude or area, from the distal site
        # or over the segment; follow_up() gives the parameter the label of the feature it
        # plots (labels.PLOTTED_FEATURE_LABELS).
        Parameter(
            "block",
            "Conduction block (CMAP reduction)",
            "%",
            "motor",
            None,
            None,
            ("cb", "definite_cb", "cb_td"),
        ),
        Parameter(
            "dispersion", "Temporal dispersion (CMAP duration increase)", "%", "motor", None, None, ("td",)
        ),
        Parameter(
            "f_latency", "Minimal F-wave latency", "ms", "motor", "uln_f_latency_ms", "ULN", ("f_latency",)
        ),
        Parameter(
            "sensory_cv", "Sensory conduction velocity", "m/s", "sensory", "lln_cv", "LLN", ("sensory_cv",)
        ),
        Parameter(
            "snap",
            "SNAP amplitude",
            "µV",
            "sensory",
            "lln_amplitude",
            "LLN",
            ("snap_reduced", "snap_amplitude", "snap_normal"),
        ),
    )
}

POINT_COLUMNS = [
    "panel",
    "nerve",
    "side",
    "modality",
    "visit_key",
    "visit_date",
    "series",
    "segment_kind",
    "value",
    "unit",
    "temperature_c",
    "temperature_minimum_c",
    "cold",
    "note",
]
REFERENCE_COLUMNS = ["panel", "visit_key", "visit_date", "kind", "value", "label", "comparator", "source"]


@dataclass
class FollowUp:
    """What the follow-up page shows for one patient and one parameter (plain data, no Streamlit)."""

    patient: str
    diagnosis: str | None
    parameter: Parameter
    criteria: str
    criteria_version: str
    limits: LimitSetInfo
    visit_dates: list[dt.date]
    points: pd.DataFrame  # POINT_COLUMNS
    references: pd.DataFrame  # REFERENCE_COLUMNS
    treatments: pd.DataFrame  # therapy, start_date, end_date, dose, dose_unit, interval_days, label
    scores: pd.DataFrame  # score_date, scale, value
    outcomes: pd.DataFrame  # visit_date, criteria, outcome


def panel_name(nerve: str, side: str, modality: str) -> str:
    return f"{nerve.replace('_', ' ')} {side} ({modality})"


def follow_up(
    session: Session,
    code: str,
    *,
    parameter: str = "cv",
    criteria: str | None = None,
    limits_name: str | None = None,
    settings: Settings | None = None,
    strip_criteria: list[str] | None = None,
) -> FollowUp:
    """The follow-up of patient ``code`` for one parameter (a key of :data:`PARAMETERS`).

    ``criteria``: the set whose thresholds are drawn (default: by the patient's diagnosis);
    ``strip_criteria``: the sets shown in the per-visit outcome strip (default: all; ``[]``: none, when the
    caller gets the strip from :func:`outcome_history`).
    """
    if parameter not in PARAMETERS:
        raise ValueError(f"Unknown parameter {parameter!r}; choose one of {', '.join(PARAMETERS)}")
    chosen = PARAMETERS[parameter]
    settings = settings or Settings()
    patient = find_patient(session, code)
    criteria = criteria or default_criteria(patient.diagnosis)
    visit_ids = list(
        session.scalars(select(Visit.id).where(Visit.patient_id == patient.id).order_by(Visit.visit_date))
    )
    info, limits = resolve(session, limits_name)
    visits, tests, sites = load_frames(session, visit_ids)
    dates = dict(zip(visits["visit_key"].astype(int), visits["visit_date"]))
    strip = list(
        dict.fromkeys([criteria, *(engine.available() if strip_criteria is None else strip_criteria)])
    )
    nerves, paths = (
        features.build(visits, tests, sites, limits) if len(tests) else (pd.DataFrame(), pd.DataFrame())
    )
    # The engine reuses the feature tables the points are read from (built once per page).
    results = (
        engine.evaluate(visits, tests, sites, limits, strip, settings, built=(nerves, paths))
        if len(tests)
        else {}
    )
    if chosen.key in (
        "block",
        "dispersion",
    ):  # say what is plotted: amplitude or area, from distal or per segment
        chosen = replace(chosen, label=PLOTTED_FEATURE_LABELS[_path_column(chosen, criteria)[0]])
    points = _points(chosen, nerves, paths, criteria, dates)
    references = _references(chosen, nerves, results.get(criteria), dates, thresholds.load(criteria))
    shown = (
        results if strip_criteria is None else {cid: r for cid, r in results.items() if cid in strip_criteria}
    )
    outcomes = _outcome_rows(shown, dates)
    version = results[criteria].version if criteria in results else thresholds.load(criteria).version
    return FollowUp(
        patient=patient.code,
        diagnosis=patient.diagnosis,
        parameter=chosen,
        criteria=criteria,
        criteria_version=version,
        limits=info,
        visit_dates=sorted(dates.values()),
        points=points,
        references=references,
        treatments=_treatments(session, patient.id),
        scores=_scores(session, patient.id),
        outcomes=outcomes,
    )


def _outcome_rows(results: dict, dates: dict[int, dt.date]) -> pd.DataFrame:
    frame = pd.DataFrame(
        [
            {"visit_date": dates[int(row.visit_key)], "criteria": cid, "outcome": str(row.outcome)}
            for cid, result in results.items()
            for row in result.outcomes.itertuples()
        ],
        columns=["visit_date", "criteria", "outcome"],
    )
    return frame.sort_values(["criteria", "visit_date"], kind="stable").reset_index(drop=True)


def outcome_history(
    session: Session,
    code: str,
    *,
    criteria: list[str] | None = None,
    limits_name: str | None = None,
    settings: Settings | None = None,
) -> pd.DataFrame:
    """Per visit of patient ``code``, the outcome of each criteria set (all by default): the outcome strip."""
    patient = find_patient(session, code)
    visit_ids = list(session.scalars(select(Visit.id).where(Visit.patient_id == patient.id)))
    _, limits = resolve(session, limits_name)
    visits, tests, sites = load_frames(session, visit_ids)
    if not len(tests):
        return _outcome_rows({}, {})
    results = engine.evaluate(
        visits, tests, sites, limits, criteria or engine.available(), settings or Settings()
    )
    return _outcome_rows(results, dict(zip(visits["visit_key"].astype(int), visits["visit_date"])))


def _points(
    chosen: Parameter, nerves: pd.DataFrame, paths: pd.DataFrame, criteria: str, dates: dict[int, dt.date]
) -> pd.DataFrame:
    if nerves.empty:
        return pd.DataFrame(columns=POINT_COLUMNS)
    nerves = nerves[nerves["modality"] == chosen.modality]
    context = nerves.set_index("test_key")[["temperature_c", "temperature_minimum_c", "cold"]]
    if chosen.key in ("cv", "block", "dispersion"):
        motor = paths[paths["test_key"].isin(nerves["test_key"])]
        if chosen.key == "cv":
            column, series = "segment_velocity", "segment"
        else:
            column, series = _path_column(chosen, criteria)
        frame = motor[motor[column].notna()]
        frame = pd.DataFrame(
            {
                "nerve": frame["nerve"],
                "side": frame["side"],
                "modality": "motor",
                "test_key": frame["test_key"],
                "visit_key": frame["visit_key"],
                "series": frame[series],
                "segment_kind": frame["segment_kind"],
                "value": frame[column].astype(float),
                "note": "",
            }
        )
    else:
        column = {
            "distal_latency": "distal_latency_ms",
            "distal_cmap": "distal_amplitude",
            "f_latency": "f_latency_ms",
            "sensory_cv": "sensory_cv",
            "snap": "distal_amplitude",
        }[chosen.key]
        frame = pd.DataFrame(
            {
                "nerve": nerves["nerve"],
                "side": nerves["side"],
                "modality": nerves["modality"],
                "test_key": nerves["test_key"],
                "visit_key": nerves["visit_key"],
                "series": chosen.label,
                "segment_kind": "",
                "value": nerves[column].astype(float),
                "note": "",
            }
        )
        if chosen.key == "f_latency":
            # Absent F-waves have no latency to plot; the note keeps them visible in the values table.
            absent = nerves["f_absent"].to_numpy(dtype=bool)
            frame.loc[absent, "note"] = "F-waves absent"
            frame = frame[frame["value"].notna() | absent]
        else:
            frame = frame[frame["value"].notna()]
    frame = frame.join(context, on="test_key")
    frame["panel"] = [
        panel_name(n, s, m) for n, s, m in zip(frame["nerve"], frame["side"], frame["modality"])
    ]
    frame["visit_date"] = [dates[int(k)] for k in frame["visit_key"]]
    frame["unit"] = chosen.unit
    frame["cold"] = frame["cold"].fillna(False).astype(bool)
    frame = frame.sort_values(["panel", "series", "visit_date"], kind="stable")
    return frame[POINT_COLUMNS].reset_index(drop=True)


def _path_column(chosen: Parameter, criteria: str) -> tuple[str, str]:
    """(paths column, series column) of a block or dispersion parameter: the feature the chosen set's
    threshold table names for its item (``segment_area_reduction_pct`` for EFNS/PNS 2010 MMN, measured per
    segment; ``amplitude_reduction_pct`` from the distal site for the CIDP sets …), so the plotted value is
    the one the threshold applies to."""
    default = {"block": "amplitude_reduction_pct", "dispersion": "duration_increase_pct"}[chosen.key]
    table = thresholds.load(criteria)
    feature = next((r.parameter for item in chosen.items for r in table.rows if r.item == item), default)
    if feature not in features.PATH_COLUMNS:  # e.g. "either amplitude or area": plot the amplitude reduction
        feature = default
    return feature, ("segment" if feature.startswith("segment_") else "path")


def _threshold_row(table: thresholds.ThresholdTable, item: str, nerve: str) -> thresholds.Threshold | None:
    """The threshold-table row an item applies to this nerve (a nerve-specific row wins over ``*``)."""
    rows = [r for r in table.rows if r.item == item and r.nerve in (nerve, "*")]
    return min(rows, key=lambda r: r.nerve == "*") if rows else None


def _threshold_words(chosen: Parameter, table: thresholds.ThresholdTable, item: str, row) -> str:
    """The threshold line in words, from the threshold table (never from a precondition's limit name)."""
    found = _threshold_row(table, item, row.nerve)
    if found is None:  # an item whose threshold is a normal limit itself (e.g. SNAP below LLN)
        sign = COMPARATOR_SIGNS.get(str(row.comparator), "")
        named = (
            row.limit_name
            if isinstance(row.limit_name, str) and row.limit_name
            else f"{float(row.threshold):g} {chosen.unit}"
        )
        return f"threshold: {sign} {named}"
    value = float(row.threshold) if found.reference in ("percent", "absolute") else found.value
    return threshold_label(chosen.key, str(row.comparator), value, found.reference, chosen.unit)


def _references(
    chosen: Parameter,
    nerves: pd.DataFrame,
    result,
    dates: dict[int, dt.date],
    table: thresholds.ThresholdTable,
) -> pd.DataFrame:
    rows: list[dict] = []
    if nerves.empty:
        return pd.DataFrame(columns=REFERENCE_COLUMNS)
    nerves = nerves[nerves["modality"] == chosen.modality]
    if chosen.limit_column:
        for row in nerves[nerves[chosen.limit_column].notna()].itertuples(index=False):
            rows.append(
                {
                    "panel": panel_name(row.nerve, row.side, row.modality),
                    "visit_key": int(row.visit_key),
                    "visit_date": dates[int(row.visit_key)],
                    "kind": "normal limit",
                    "value": float(getattr(row, chosen.limit_column)),
                    "label": chosen.bound,
                    "comparator": "",
                    "source": getattr(row, f"{chosen.limit_column}_source"),
                }
            )
    if result is not None and not result.findings.empty:
        findings = result.findings
        item = next((i for i in chosen.items if (findings["item"] == i).any()), None)
        if item is not None:
            wanted = findings[
                (findings["item"] == item)
                & (findings["modality"] == chosen.modality)
                & findings["threshold"].notna()
            ]
            wanted = wanted.drop_duplicates(["visit_key", "nerve", "side", "modality"], keep="first")
            for row in wanted.itertuples(index=False):
                rows.append(
                    {
                        "panel": panel_name(row.nerve, row.side, row.modality),
                        "visit_key": int(row.visit_key),
                        "visit_date": dates[int(row.visit_key)],
                        "kind": "criteria threshold",
                        "value": float(row.threshold),
                        "label": _threshold_words(chosen, table, item, row),
                        "comparator": str(row.comparator),
                        "source": str(row.source),
                    }
                )
    frame = pd.DataFrame(rows, columns=REFERENCE_COLUMNS)
    return frame.sort_values(["panel", "kind", "visit_date"], kind="stable").reset_index(drop=True)


def _treatments(session: Session, patient_id: int) -> pd.DataFrame:
    rows = session.execute(
        select(
            Treatment.therapy,
            Treatment.start_date,
            Treatment.end_date,
            Treatment.dose,
            Treatment.dose_unit,
            Treatment.interval_days,
        )
        .where(Treatment.patient_id == patient_id)
        .order_by(Treatment.start_date)
    ).all()
    frame = pd.DataFrame(
        rows, columns=["therapy", "start_date", "end_date", "dose", "dose_unit", "interval_days"]
    )
    frame["label"] = [
        treatment_label(r.therapy, r.dose, r.dose_unit, r.interval_days) for r in frame.itertuples()
    ]
    return frame


def treatment_label(
    therapy: str, dose: float | None, dose_unit: str | None, interval_days: float | None
) -> str:
    """``ivig 2 g/kg every 21 days`` (see :func:`tracker.domain.labels.treatment_words`)."""
    return treatment_words(therapy, dose, dose_unit, interval_days)


def _scores(session: Session, patient_id: int) -> pd.DataFrame:
    rows = session.execute(
        select(OutcomeScore.score_date, OutcomeScore.scale, OutcomeScore.value)
        .where(OutcomeScore.patient_id == patient_id)
        .order_by(OutcomeScore.scale, OutcomeScore.score_date)
    ).all()
    return pd.DataFrame(rows, columns=["score_date", "scale", "value"])
