"""Tables as a person reads them (pure functions of service results; no Streamlit): words and units from
:mod:`tracker.domain.labels`, numbers at clinical precision, the criteria trace with its verdict beside the
value and each source as a footnote number. The identifiers stay in the services' frames, JSON and exports.
"""

from __future__ import annotations

import re

import pandas as pd

from tracker.domain import catalogue
from tracker.domain.labels import (
    COMPARATOR_SIGNS,
    clinical_number,
    column_label,
    item_label,
    nerve_words,
    outcome_label,
    segment_words,
    status_label,
    words,
)

TRACE_COLUMNS = ["criterion", "measured", "value", "verdict", "threshold", "normal limit", "source"]
CHANGE_COLUMNS = ["nerve", "criterion", "before", "now", "value before", "value now"]
_IDENTIFIER = re.compile(r"\b[a-z]+(?:_[a-z0-9]+)+\b")


def _text(value) -> str:
    return value if isinstance(value, str) else ""


def _missing(value) -> bool:
    return (
        value is None
        or (isinstance(value, float) and value != value)
        or (not isinstance(value, str) and pd.isna(value))
    )


def known_identifiers() -> set[str]:
    """Nerve, stimulation-site and recording-site identifiers of the reference
    files (engine text may hold them)."""
    known = set(catalogue.known_nerve_words())
    for info in catalogue.nerves().values():
        known.update(s for s in (info.motor_recording_site, info.sensory_recording_site) if s)
        for modality in info.modalities:
            known.update(catalogue.known_site_words(info.name, modality))
    return known


def in_words(text: str) -> str:
    """Free text from a service (a reason, a note) with known identifiers put in words: ``below_elbow`` →
    ``below elbow``, ``possible_cidp`` → ``possible CIDP``, a criteria item → its label."""
    from tracker.domain.labels import ITEM_LABELS, OUTCOME_LABELS, SETTING_LABELS

    known = known_identifiers()

    def replace(match: re.Match) -> str:
        token = match.group(0)
        if token in SETTING_LABELS:
            return SETTING_LABELS[token]
        if token in OUTCOME_LABELS:
            return outcome_label(token)
        if token in ITEM_LABELS:
            return item_label(token)
        return words(token) if token in known else token

    return _IDENTIFIER.sub(replace, text)


def _threshold(f) -> str:
    threshold = getattr(f, "threshold", None)
    if _missing(threshold):
        return "—"  # never "≥ %": no threshold, no sign
    sign = COMPARATOR_SIGNS.get(_text(getattr(f, "comparator", "")), "")
    unit = _text(getattr(f, "unit", ""))
    return f"{sign} {clinical_number(float(threshold), unit)} {unit}".strip()


def _limit(f) -> str:
    name, limit = _text(getattr(f, "limit_name", "")), getattr(f, "limit", None)
    if _missing(limit):
        return in_words(name) or "—"
    unit = _text(getattr(f, "unit", ""))
    if unit == "%":  # a reduction judged with an amplitude precondition: the limit is that amplitude's
        unit = "mV" if getattr(f, "modality", "motor") == "motor" else "µV"
    return f"{in_words(name) or 'limit'} {clinical_number(float(limit), unit)} {unit}".strip()


def trace_tables(findings: pd.DataFrame) -> tuple[dict[str, pd.DataFrame], list[str]]:
    """The criteria trace per nerve (``median right (motor)`` → table of :data:`TRACE_COLUMNS`)
    and the footnotes: ``[n]`` in the source column is the n-th source; ``*`` marks
    a value from memory, not verified."""
    footnotes: list[str] = []
    tables: dict[str, list[dict]] = {}
    for f in findings.itertuples(index=False):
        source = _text(getattr(f, "source", ""))
        limit_source = _text(getattr(f, "limit_source", ""))
        cited = source + (f" — normal limit: {limit_source}" if limit_source else "")
        if cited and cited not in footnotes:
            footnotes.append(cited)
        memory = (
            _text(getattr(f, "source_status", "verified")) not in ("verified", "")
            or _text(getattr(f, "limit_status", "")) == "memory"
        )
        unit = _text(getattr(f, "unit", ""))
        value = getattr(f, "value", None)
        segment = segment_words(getattr(f, "segment", None))
        reason = in_words(_text(getattr(f, "reason", "")))
        nerve = nerve_words(str(f.nerve), str(f.side), str(f.modality))
        tables.setdefault(nerve, []).append(
            {
                "criterion": item_label(f.item),
                "measured": in_words(_text(getattr(f, "parameter", "")))
                + (f", {segment}" if segment else ""),
                "value": "—" if _missing(value) else f"{clinical_number(float(value), unit)} {unit}".strip(),
                "verdict": status_label(f.status) + (f" — {reason}" if reason else ""),
                "threshold": _threshold(f),
                "normal limit": _limit(f),
                "source": (f"[{footnotes.index(cited) + 1}]" if cited else "") + (" *" if memory else ""),
            }
        )
    return {
        nerve: pd.DataFrame(rows, columns=TRACE_COLUMNS) for nerve, rows in sorted(tables.items())
    }, footnotes


def closest_miss_words(row) -> str:
    """The closest miss in words: nerve, what was measured, value, how far from which threshold."""
    try:
        unit = _text(row.get("unit", ""))
        value, margin, threshold = float(row["value"]), abs(float(row["margin"])), float(row["threshold"])
        direction = "above" if row.get("comparator") in ("le", "lt") else "below"
        segment = segment_words(row.get("segment"))
        return (
            f"{nerve_words(str(row['nerve']), str(row['side']))}, {in_words(_text(row.get('parameter', '')))}"
            + (f" ({segment})" if segment else "")
            + f": {clinical_number(value, unit)} {unit}, {clinical_number(margin, unit)} {unit} {direction} "
            f"the {clinical_number(threshold, unit)} {unit} threshold ({item_label(row['item'])})"
        )
    except (KeyError, TypeError, ValueError):
        return in_words(_text(row.get("text", "")))


def changes_table(changes: pd.DataFrame) -> pd.DataFrame:
    """What changed since the previous visit, one short row per finding: nerve, criterion, before → now."""
    rows = []
    for c in changes.to_dict("records"):
        unit = _text(c.get("unit", ""))
        before_value, now_value = c.get("previous_value"), c.get("value")
        before = c.get("previous_status")
        rows.append(
            {
                "nerve": nerve_words(str(c.get("nerve", "")), _text(c.get("side", "")) or None),
                "criterion": item_label(c.get("item", "")),
                "before": status_label(before) if isinstance(before, str) else "—",
                "now": status_label(c["status"])
                if isinstance(c.get("status"), str)
                else in_words(_text(c.get("change", ""))),
                "value before": "—"
                if _missing(before_value)
                else f"{clinical_number(float(before_value), unit)} {unit}".strip(),
                "value now": "—"
                if _missing(now_value)
                else f"{clinical_number(float(now_value), unit)} {unit}".strip(),
            }
        )
    return pd.DataFrame(rows, columns=CHANGE_COLUMNS)


MEASURED_UNITS = {
    "distance_mm": "mm",
    "latency_ms": "ms",
    "duration_ms": "ms",
    "area_mVms": "mV·ms",
    "temperature_c": "°C",
    "velocity_m_s": "m/s",
    "amplitude_reduction_pct": "%",
    "area_reduction_pct": "%",
    "duration_increase_pct": "%",
}


def measurement_display(sites: pd.DataFrame, segments: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The visit's sites and derived segments with headers in words and
    units, numbers at clinical precision."""
    sites, segments = sites.copy(), segments.copy()
    for frame in (sites, segments):
        if "nerve" in frame:
            frame["nerve"] = [words(str(n)) for n in frame["nerve"]]
        for column in ("site", "segment"):
            if column in frame:
                frame[column] = [segment_words(s) for s in frame[column]]
        for column, unit in MEASURED_UNITS.items():
            if column in frame:
                frame[column] = [clinical_number(v, unit, missing="") for v in frame[column]]
    if "amplitude" in sites and "unit" in sites:
        sites["amplitude"] = [
            f"{clinical_number(v, u, missing='')} {u}".strip() if not _missing(v) else ""
            for v, u in zip(sites["amplitude"], sites["unit"])
        ]
        sites = sites.drop(columns=["unit"])
    rename = {
        "area_mVms": "area (mV·ms)",
        "velocity_m_s": "velocity (m/s)",
        "latency_ms": "onset latency (ms)",
    }
    sites = sites.rename(columns=lambda c: rename.get(c, column_label(c)))
    segments = segments.rename(columns=lambda c: rename.get(c, column_label(c)))
    return sites, segments


def plotted_values(fu) -> pd.DataFrame:
    """The follow-up page's plotted points as a table: value with its unit in
    the header, at clinical precision."""
    unit = fu.parameter.unit
    points = fu.points
    return pd.DataFrame(
        {
            "visit date": list(points["visit_date"]),
            "nerve": list(points["panel"]),
            "segment or site": [segment_words(s) for s in points["series"]],
            f"value ({unit})": [clinical_number(v, unit, missing="") for v in points["value"]],
            "limb temperature (°C)": [clinical_number(v, "°C", missing="") for v in points["temperature_c"]],
            "limb cold": ["cold" if c else "" for c in points["cold"]],
            "note": [in_words(_text(n)) for n in points["note"]],
        }
    )


def patient_rows(table: pd.DataFrame) -> pd.DataFrame:
    """The patient list in words: outcome values, criteria titles, headers (the
    ids stay in the service's frame)."""
    from tracker.domain.labels import DIAGNOSIS_SHORT, criteria_title

    shown = table.copy()
    if "latest_outcome" in shown:
        shown["latest_outcome"] = [
            outcome_label(o) if isinstance(o, str) else "" for o in shown["latest_outcome"]
        ]
    if "latest_criteria" in shown:
        shown["latest_criteria"] = [
            criteria_title(c) if isinstance(c, str) and c else "" for c in shown["latest_criteria"]
        ]
    if "diagnosis" in shown:
        shown["diagnosis"] = [
            DIAGNOSIS_SHORT.get(d, words(d)) if isinstance(d, str) else "" for d in shown["diagnosis"]
        ]
    for column in shown.columns:
        if shown[column].dtype == object:
            shown[column] = [
                in_words(v) if isinstance(v, str) and column not in ("patient",) else v for v in shown[column]
            ]
    return shown.rename(columns=column_label)


def cohort_visits(visits: pd.DataFrame) -> pd.DataFrame:
    """The cohort's visit table in words: one column per criteria set, titled, with outcomes in words."""
    from tracker.domain.labels import CRITERIA_TITLES, DIAGNOSIS_SHORT, criteria_title

    shown = visits.copy()
    for column in shown.columns:
        if column in CRITERIA_TITLES:
            shown[column] = [outcome_label(o) if isinstance(o, str) else "" for o in shown[column]]
    if "diagnosis" in shown:
        shown["diagnosis"] = [
            DIAGNOSIS_SHORT.get(d, words(d)) if isinstance(d, str) else "" for d in shown["diagnosis"]
        ]
    return shown.rename(columns=lambda c: criteria_title(c) if c in CRITERIA_TITLES else column_label(c))
