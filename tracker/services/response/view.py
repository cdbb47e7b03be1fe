"""The treatment response as the follow-up and patients pages show it: drawing-ready tables and words built
from :mod:`tracker.services.response` (no arithmetic of its own beyond what :mod:`tracker.response` offers).

Entry points: :func:`response_view` (one patient: score panels with the minimal-important-change band, each
nerve value's change since the previous study against the smallest detectable change, one card per regimen),
:func:`with_course` (the patients table with the course column), :func:`rule_set_choices`.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

import pandas as pd
from sqlalchemy.orm import Session

from tracker.domain.labels import (
    CHANGE_VERDICT_LABELS,
    CHANGE_VERDICT_SHAPES,
    CLASSIFICATION_LABELS,
    CLASSIFICATION_SHAPES,
    COURSE_LABELS,
    SDC_STEP_LABELS,
)
from tracker.response import change, rules
from tracker.response.scales import ScaleInfo, scale_table
from tracker.services.follow_up import panel_name
from tracker.services.response.patient import PatientResponse, patient_response

# Follow-up page parameter → the response analysis's nerve parameter (same value, same feature table).
NERVE_PARAMETER_OF = {
    "cv": "segment_velocity",
    "distal_latency": "distal_latency",
    "distal_cmap": "distal_cmap_amplitude",
    "block": "block_pct",
    "f_latency": "f_latency",
    "sensory_cv": "sensory_velocity",
    "snap": "snap_amplitude",
}
# Parameters measured per segment or per path: a point is matched on its series (segment) too.
PER_SERIES = {"segment_velocity", "block_pct"}

PANEL_COLUMNS = [
    "scale",
    "title",
    "label",
    "unit",
    "minimum",
    "maximum",
    "direction",
    "mic",
    "mic_kind",
    "mic_words",
    "mic_source",
    "mic_status",
    "baseline_date",
    "baseline_value",
    "band_low",
    "band_high",
    "band_start",
    "band_end",
]
STEP_COLUMNS = [
    "follow_parameter",
    "panel",
    "series",
    "nerve",
    "side",
    "modality",
    "parameter",
    "where",
    "visit_date",
    "reference_date",
    "reference_value",
    "value",
    "change",
    "change_pct",
    "verdict",
    "sdc",
    "less_certain",
    "words",
]
POINT_COLUMNS = ["scale", "date", "value", "computed", "note", "change_words"]
EVIDENCE_COLUMNS = ["measure", "baseline", "latest", "change", "threshold", "verdict", "counted as", "source"]
DEFERS = (
    "The classification defers to the treating clinician: it applies the chosen rule set's published "
    "thresholds to the recorded scores and supports, never replaces, clinical judgement."
)


@dataclass
class RegimenCard:
    """One regimen's classification in words (plain data for the page)."""

    regimen: str
    period: str
    ongoing: bool
    classification: str  # identifier (improved / stable / worsened / not_assessable), for colour and tests
    word: str  # "▼ worsened (relapse or deterioration)"
    evidence: pd.DataFrame  # EVIDENCE_COLUMNS
    missing: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    compared: list[dt.date] = field(default_factory=list)


@dataclass
class ResponseView:
    response: PatientResponse
    panels: pd.DataFrame  # PANEL_COLUMNS, one row per scale with scores, in scales.csv order
    points: pd.DataFrame  # POINT_COLUMNS: every score (recorded and computed) with its hover words
    steps: pd.DataFrame  # STEP_COLUMNS, every studied visit against the previous one, every mapped parameter
    cards: list[RegimenCard]  # the running regimen first, then the others newest first
    rules_title: str
    rules_id: str
    rules_version: str
    defers: str = DEFERS


def rule_set_choices() -> dict[str, str]:
    """{rule-set id: words for a selector}, the default first."""
    available = rules.rule_sets()
    ordered = [rules.DEFAULT_RULES, *[r for r in available if r != rules.DEFAULT_RULES]]
    return {
        r: f"{available[r].title} — {r}, version {available[r].version}" for r in ordered if r in available
    }


def response_view(
    session: Session, code: str, *, rules_id: str | None = None, limits_name: str | None = None
) -> ResponseView:
    """The response of patient ``code`` at the latest visit or score, ready for the follow-up page."""
    return build_view(patient_response(session, code, rules_id=rules_id, limits_name=limits_name))


def build_view(result: PatientResponse) -> ResponseView:
    return ResponseView(
        response=result,
        panels=score_panels(result),
        points=score_points(result),
        steps=nerve_steps(result),
        cards=regimen_cards(result),
        rules_title=result.rule_set.title,
        rules_id=result.rule_set.id,
        rules_version=result.rule_set.version,
    )


def score_panels(result: PatientResponse, scales: dict[str, ScaleInfo] | None = None) -> pd.DataFrame:
    """One row per scale that has scores: its range and direction (scales.csv), and for
    scales with a minimal important change (MIC) the band baseline ± MIC around the running
    regimen's baseline (:func:`tracker.response.change.baseline`), from the baseline day to
    the regimen's end or the latest day."""
    scales = scales or scale_table()
    present = set(result.scores["scale"])
    order = [s for s in scales if s in present] + sorted(present - set(scales))
    by_scale = rules.series_by_scale(
        result.scores[result.scores["date"] <= result.at] if result.at else result.scores
    )
    rows = []
    for scale in order:
        info = scales.get(scale)
        if info is None:  # not in the reference table (cannot be imported, kept for safety)
            rows.append({"scale": scale, "title": scale.replace("_", " "), "label": scale.replace("_", " ")})
            continue
        row = {
            "scale": scale,
            "title": f"{info.label} ({info.unit}) — {info.direction_words}",
            "label": info.label,
            "unit": info.unit,
            "minimum": info.minimum,
            "maximum": info.maximum,
            "direction": info.direction_words,
            "mic": info.mic,
            "mic_kind": info.mic_kind,
            "mic_words": info.mic_words(),
            "mic_source": info.mic_source,
            "mic_status": info.mic_status,
        }
        base = (
            change.baseline(by_scale.get(scale, []), result.current, result.settings)
            if result.current and info.mic
            else None
        )
        if base is not None:
            day, value = base
            size = info.mic if info.mic_kind == "absolute" else abs(value) * info.mic / 100.0
            end = result.current.end_date or result.at
            row.update(
                baseline_date=day,
                baseline_value=value,
                band_low=value - size,
                band_high=value + size,
                band_start=day,
                band_end=max(end, day + dt.timedelta(days=1)),
            )
        rows.append(row)
    return pd.DataFrame(rows, columns=PANEL_COLUMNS)


def score_points(result: PatientResponse) -> pd.DataFrame:
    """Every score with words for its hover: computed or recorded, and the change since the baseline of the
    regimen then running, judged against the scale's minimal important change (``score_changes``)."""
    scores = result.scores.sort_values(["scale", "date"], kind="stable")
    changes = result.score_changes
    since = (
        changes[changes["reference"] == "regimen_baseline"].set_index(["scale", "date"])
        if len(changes)
        else None
    )
    notes, words = [], []
    for scale, day, computed in zip(scores["scale"], scores["date"], scores["computed"].astype(bool)):
        notes.append(
            ("computed from the arm and leg grades" if scale.endswith("incat") else "computed")
            if computed
            else ""
        )
        text = ""
        if since is not None and (scale, day) in since.index:
            c = since.loc[(scale, day)]
            c = c.iloc[0] if isinstance(c, pd.DataFrame) else c
            verdict = (
                f"{CHANGE_VERDICT_SHAPES.get(c['verdict'], '')} "
                f"{CHANGE_VERDICT_LABELS.get(c['verdict'], c['verdict'])}"
            ).strip()
            text = (
                f"since the regimen baseline ({c['reference_date'].isoformat()}): {c['change']:+g} — "
                f"{verdict} ({c['threshold']})"
            )
        words.append(text)
    out = scores.assign(note=notes, change_words=words)
    return out[POINT_COLUMNS].reset_index(drop=True)


def nerve_steps(result: PatientResponse) -> pd.DataFrame:
    """Each studied visit against the previous studied visit, per nerve parameter the follow-up page plots,
    judged against the smallest detectable change (:func:`tracker.response.change.nerve_changes`)."""
    values = result.nerve_values
    if values.empty:
        return pd.DataFrame(columns=STEP_COLUMNS)
    follow_of = {v: k for k, v in NERVE_PARAMETER_OF.items()}
    values = values[values["parameter"].isin(follow_of)]
    dates = values.drop_duplicates("visit_key")[["visit_key", "visit_date"]].sort_values(
        "visit_date", kind="stable"
    )
    keys, days = list(dates["visit_key"]), list(dates["visit_date"])
    parts = [
        change.nerve_changes(
            values, keys[i], keys[i - 1], "previous", days[i - 1], result.detectable, result.settings
        ).assign(visit_date=days[i])
        for i in range(1, len(keys))
    ]
    parts = [p for p in parts if len(p)]
    if not parts:
        return pd.DataFrame(columns=STEP_COLUMNS)
    frame = pd.concat(parts, ignore_index=True)
    frame["follow_parameter"] = frame["parameter"].map(follow_of)
    frame["panel"] = [
        panel_name(n, s, m) for n, s, m in zip(frame["nerve"], frame["side"], frame["modality"])
    ]
    frame["series"] = [w if p in PER_SERIES else None for p, w in zip(frame["parameter"], frame["where"])]
    frame["words"] = [_step_words(r) for r in frame.itertuples(index=False)]
    return frame[STEP_COLUMNS].reset_index(drop=True)


def sdc_words(view: ResponseView, follow_parameter: str) -> str:
    """The smallest detectable change used for a follow-up parameter, with its source, in words."""
    parameter = NERVE_PARAMETER_OF.get(follow_parameter)
    info = view.response.detectable.get(parameter) if parameter else None
    if info is None:
        return "No smallest detectable change is set for this parameter: no change is marked."
    if info.sdc is None:
        return (
            f"No published smallest detectable change for {info.label} ({info.source}): no change is marked."
        )
    unit = "%" if info.change_kind == "percent" else f" {info.unit}"
    return f"Smallest detectable change of {info.label}: {info.sdc:g}{unit} ({info.source})."


def _step_words(row) -> str:
    """``▼ worse beyond SDC: 45.20 → 31.00 (−31.4 %; SDC 27.1 %) since 2024-04-09``; '' when not beyond."""
    if row.verdict not in SDC_STEP_LABELS:
        return ""
    if (
        row.value is None
        or row.reference_value is None
        or row.value != row.value
        or row.reference_value != row.reference_value
    ):
        shape = CHANGE_VERDICT_SHAPES[row.verdict]
        where = "this visit" if getattr(row, "absent", False) else "the earlier visit"
        return (
            f"{shape} {'better' if row.verdict == change.IMPROVED else 'worse'}: F-waves absent at {where} "
            f"({row.reference_date.isoformat()})"
        )
    size = (
        f"{row.change_pct:+.1f} %"
        if row.change_pct == row.change_pct and row.change_pct is not None
        else f"{row.change:+.2f}"
    )
    text = (
        f"{SDC_STEP_LABELS[row.verdict]}: {row.reference_value:.2f} → {row.value:.2f} ({size}; SDC "
        f"{row.sdc:g} %) since {row.reference_date.isoformat()}"
    )
    if row.less_certain:
        text += f" — less certain: {row.less_certain}"
    return text


def regimen_cards(result: PatientResponse) -> list[RegimenCard]:
    cards = []
    for c in result.classifications:
        r = c.regimen
        ongoing = result.current is not None and r.key == result.current.key
        cards.append(
            RegimenCard(
                regimen=r.label(),
                period=f"{r.start_date.isoformat()} → {r.end_date.isoformat() if r.end_date else 'ongoing'}",
                ongoing=ongoing,
                classification=c.classification,
                word=f"{CLASSIFICATION_SHAPES[c.classification]} {CLASSIFICATION_LABELS[c.classification]}",
                evidence=evidence_table(c),
                missing=list(c.missing),
                notes=list(c.notes),
                compared=list(c.compared),
            )
        )
    cards.reverse()  # newest first
    cards.sort(key=lambda card: not card.ongoing)  # stable: the running regimen on top
    return cards


def _value(value: float, day: dt.date) -> str:
    return f"{value:g} on {day.isoformat()}"


def evidence_table(c: rules.Classification) -> pd.DataFrame:
    """One line per scale the rule set reads: baseline, latest, change, threshold,
    verdict and source, in words."""
    rows = []
    for e in c.evidence:
        pct = "" if e["change_pct"] is None else f" ({e['change_pct']:+.0f} %)"
        rows.append(
            {
                "measure": f"{e['label']} ({e['unit']}, {e['direction']})",
                "baseline": _value(e["baseline_value"], e["baseline_date"]),
                "latest": _value(e["value"], e["date"]),
                "change": f"{e['change']:+g} {e['unit']}{pct}",
                "threshold": e["threshold"],
                "verdict": (
                    f"{CHANGE_VERDICT_SHAPES.get(e['verdict'], '')} "
                    f"{CHANGE_VERDICT_LABELS.get(e['verdict'], e['verdict'])}"
                ).strip(),
                "counted as": (
                    f"{CLASSIFICATION_SHAPES.get(e['outcome'], '')} "
                    f"{CLASSIFICATION_LABELS.get(e['outcome'], e['outcome'])}"
                ).strip(),
                "source": e["source"] + ("" if e["status"] == "verified" else " (from memory, not verified)"),
            }
        )
    return pd.DataFrame(rows, columns=EVIDENCE_COLUMNS)


def with_course(table: pd.DataFrame, course: pd.DataFrame) -> pd.DataFrame:
    """The patients table (column ``patient``) with ``course`` in words, the
    rule set that judged it, and why."""
    found = course.set_index("code")
    out = table.copy()
    known = out["patient"].isin(found.index)
    out["course"] = [
        COURSE_LABELS[found.at[p, "course"]] if k else COURSE_LABELS["not_assessable"]
        for p, k in zip(out["patient"], known)
    ]
    titles = {rule_set.id: rule_set.title for rule_set in rules.rule_sets().values()}
    out["course rule set"] = [
        f"{titles.get(found.at[p, 'rules'], found.at[p, 'rules'])} (version {found.at[p, 'rules_version']})"
        if k
        else ""
        for p, k in zip(out["patient"], known)
    ]
    out["course basis"] = [found.at[p, "why"] if k else "" for p, k in zip(out["patient"], known)]
    return out
