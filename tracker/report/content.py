"""What the printable follow-up report says, assembled from the services as plain data.

:func:`build` gathers one visit of one patient: limb temperatures, the criteria outcome(s) with the deciding
findings (:func:`tracker.services.evaluation.check_visit`), the treatment response with its rule set
(:func:`tracker.services.response.patient_response`), the changes that count and the series of the trend
figure. Everything is in words for people (``tracker.domain.labels``, ``scale_table()``); the renderers
(:mod:`tracker.report.html`, :mod:`tracker.report.pdf`) only lay it out.

Identifiers stay out: the report knows the pseudonymous patient code and nothing else about the person.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass
from typing import Any

import pandas as pd

from tracker import CAUTION, __version__
from tracker.check_report import TITLES, VERDICT
from tracker.criteria.thresholds import COMPARATORS
from tracker.domain.labels import (
    CHANGE_VERDICT_LABELS,
    CHANGE_VERDICT_SHAPES,
    CHANGE_VERDICT_SHORT,
    CLASSIFICATION_LABELS,
    CLASSIFICATION_SHAPES,
    DIAGNOSIS_LABELS,
    REFERENCE_LABELS,
    SUMMARY_LABELS,
    nerve_parameter_label,
    words,
)
from tracker.response.rules import AFFECTED_GRIP
from tracker.response.scales import scale_table
from tracker.services import preferences
from tracker.services.evaluation import VisitCheck, check_visit
from tracker.services.records import patient_record
from tracker.services.response import PatientResponse, patient_response

BEYOND = ("improved", "worsened")  # change verdicts that count (beyond the MIC or the SDC)
# Scales shown in the figure when the rule set names none that was recorded (first found wins).
FALLBACK_SCALES = ("adjusted_incat", "incat", "onls", "i_rods", "mrc_sum")
FIGURE_PARAMETER = "distal_cmap_amplitude"  # the nerve panel: distally evoked CMAP amplitude per motor nerve
MAX_SCORE_PANELS = 3
POLICY_WORDS = {"warn": "kept in the criteria with a warning", "exclude": "left out of the criteria"}
STATUS_WORDS = {"verified": "verified", "memory": "from memory, not verified"}


@dataclass(frozen=True)
class Text:
    """A paragraph. ``kind``: ``body``, ``note`` (small), ``outcome`` (large, bold), ``caution`` (boxed)."""

    text: str
    kind: str = "body"


@dataclass(frozen=True)
class Heading:
    text: str


@dataclass(frozen=True)
class Table:
    """Rows of text; ``widths`` relative column widths; ``empty`` is said instead of a table without rows."""

    header: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    widths: tuple[float, ...]
    empty: str = ""


Block = Text | Heading | Table


@dataclass(frozen=True)
class Section:
    title: str
    blocks: tuple[Block, ...]


@dataclass(frozen=True)
class Series:
    """One line of a figure panel (dates ascending)."""

    panel: str
    name: str
    dates: tuple[dt.date, ...]
    values: tuple[float, ...]


@dataclass(frozen=True)
class Span:
    """A regimen on the time axis, labelled ``R1``, ``R2`` … (the caption says which is which)."""

    tag: str
    start: dt.date
    end: dt.date
    label: str


@dataclass(frozen=True)
class TrendFigure:
    panels: tuple[str, ...]
    series: tuple[Series, ...]
    spans: tuple[Span, ...]
    visit: dt.date
    caption: str
    alt: str


@dataclass(frozen=True)
class FollowUpReport:
    """Everything the printable report says (plain data, no identifiers besides the pseudonymous code)."""

    patient: str
    visit_date: dt.date
    facts: tuple[tuple[str, str], ...]
    sections: tuple[Section, ...]
    figure: TrendFigure
    sources: tuple[str, ...]
    caution: str = CAUTION
    version: str = __version__

    @property
    def title(self) -> str:
        return f"Follow-up report — {self.patient}, visit {self.visit_date.isoformat()}"


def build(
    session,
    code: str,
    *,
    visit_date: dt.date | None = None,
    criteria: list[str] | None = None,
    limits_name: str | None = None,
    cold_limbs: str | None = None,
    username: str | None = None,
) -> FollowUpReport:
    """The report of patient ``code`` at the visit ``visit_date`` (default: the latest visit).

    ``criteria``: criteria set ids (default: the clinic's default set, else the set for the visit's
    diagnosis); ``cold_limbs``: temperature policy (default: the clinic's). With ``username`` the
    criteria evaluation is saved and audited in the caller's transaction, as ``check`` does. Raises
    :class:`tracker.errors.NotFound` for an unknown patient or visit.
    """
    chosen = list(criteria) if criteria else None
    if chosen is None and preferences.default_criteria(session):
        chosen = [preferences.default_criteria(session)]
    settings = preferences.criteria_settings(session, cold_limbs=cold_limbs)
    check = check_visit(
        session,
        code,
        visit_date=visit_date,
        criteria=chosen,
        limits_name=limits_name,
        settings=settings,
        username=username,
    )
    response = patient_response(session, code, visit_date=check.visit_date, limits_name=limits_name)
    record = patient_record(session, code, visit_date=check.visit_date)
    visit = record.visits[0]
    sources = _Sources()
    facts = (
        ("Patient (pseudonymous code)", check.patient),
        ("Visit", check.visit_date.isoformat()),
        ("Working diagnosis", _diagnosis_words(visit.diagnosis or record.diagnosis)),
        ("Phenotype", words(check.phenotype) if check.phenotype else "not stated"),
        ("Normal limits", f"{check.limits.name} v{check.limits.version}"),
        (
            "Earlier visits",
            ", ".join(d.isoformat() for d in response.visit_dates if d < check.visit_date) or "none",
        ),
    )
    sections = (
        _temperatures(visit, check, settings.cold_limbs),
        _criteria(check, sources),
        _response(response),
        _changes(response),
    )
    return FollowUpReport(
        patient=check.patient,
        visit_date=check.visit_date,
        facts=facts,
        sections=sections,
        figure=_figure(response),
        sources=tuple(sources.listed()),
        caution=CAUTION,
    )


# ---------------------------------------------------------------------------------------------- helpers


def _missing(value: Any) -> bool:
    return value is None or value is pd.NA or (isinstance(value, float) and math.isnan(value))


def _number(value: Any, unit: str = "", decimals: int = 2) -> str:
    if _missing(value):
        return "—"
    text = f"{float(value):.{decimals}f}".rstrip("0").rstrip(".") if decimals else f"{float(value):.0f}"
    return text + (f" {unit}" if unit else "")


def _signed(value: Any, unit: str = "", decimals: int = 2) -> str:
    if _missing(value):
        return "—"
    return ("+" if float(value) > 0 else "") + _number(value, unit, decimals)


def _text(value: Any) -> str:
    return value if isinstance(value, str) else ""


def _verdict_short(verdict: str) -> str:
    return (
        f"{CHANGE_VERDICT_SHAPES.get(verdict, '')} "
        f"{CHANGE_VERDICT_SHORT.get(verdict, CHANGE_VERDICT_LABELS.get(verdict, words(verdict)))}"
    ).strip()


def _diagnosis_words(diagnosis: str | None) -> str:
    return DIAGNOSIS_LABELS.get(diagnosis, words(diagnosis)) if diagnosis else "not stated"


class _Sources:
    """Numbered sources in order of first use ([1], [2] …)."""

    def __init__(self) -> None:
        self._numbers: dict[str, int] = {}

    def ref(self, source: str) -> str:
        if not source:
            return ""
        number = self._numbers.setdefault(source, len(self._numbers) + 1)
        return f"[{number}]"

    def listed(self) -> list[str]:
        return [f"[{n}] {s}" for s, n in self._numbers.items()]


# --------------------------------------------------------------------------------------------- sections


def _temperatures(visit, check: VisitCheck, policy: str) -> Section:
    cold = {}
    for w in check.warnings.itertuples(index=False):
        cold[(w.nerve, w.side, w.modality)] = str(w.message)
    rows = tuple(
        (
            f"{words(n.nerve)} {n.side}",
            n.modality,
            _number(n.temperature_c, "°C", 1) if not _missing(n.temperature_c) else "not recorded",
            cold.get((n.nerve, n.side, n.modality), ""),
        )
        for n in visit.nerves
    )
    return Section(
        "Limb temperatures at this visit",
        (
            Table(
                ("nerve", "modality", "limb temperature", "note"),
                rows,
                (2, 1.3, 1.5, 5.2),
                "No nerve tests at this visit.",
            ),
            Text(
                "A cold limb slows conduction; a nerve below the guideline minimum is noted here and, by "
                f"the clinic's policy, {POLICY_WORDS.get(policy, policy)}.",
                "note",
            ),
        ),
    )


def _criteria(check: VisitCheck, sources: _Sources) -> Section:
    blocks: list[Block] = []
    for criteria_id, result in check.results.items():
        outcome = result.outcomes.iloc[0]
        blocks.append(
            Heading(
                f"{TITLES.get(criteria_id, criteria_id)} — criteria table {criteria_id}, version "
                f"{result.version}"
            )
        )
        blocks.append(Text(f"Outcome: {words(str(outcome['outcome'])).upper()}", "outcome"))
        if _text(outcome.get("rule")):
            blocks.append(Text(f"Rule: {outcome['rule']}"))
        for key in result.extra_keys:
            blocks.append(Text(f"{words(key)}: {words(str(outcome[key]))}"))
        findings = result.findings
        cited = "".join(sources.ref(s) for s in dict.fromkeys(_text(v) for v in findings["source"]) if s)
        if cited:
            blocks.append(Text(f"Criteria source: {cited}", "note"))
        met = findings[findings["status"] == "met"]
        if len(met):
            blocks.append(Text("Items met at this visit (the findings behind the outcome):", "body"))
            blocks.append(_findings_table(met, sources))
        else:
            miss = check.closest.get(criteria_id)
            if miss is not None and len(miss):
                blocks.append(Text(f"No item met. Closest miss: {miss.iloc[0]['text']}"))
            else:
                blocks.append(Text("No item met."))
        unknown = findings[findings["status"] == "not_evaluable"]
        if len(unknown):
            listed = "; ".join(
                f"{words(str(f.nerve))} {f.side} {f.parameter}"
                + (f" ({f.reason})" if _text(f.reason) else "")
                for f in unknown.itertuples(index=False)
            )
            blocks.append(
                Text(f"Not evaluable ({len(unknown)} items, never read as normal): {listed}", "note")
            )
        if check.previous_date is not None:
            changes = check.changes.get(criteria_id)
            if changes is not None and len(changes):
                listed = "; ".join(
                    f"{words(str(c.nerve))} {c.side} {c.item} ({c.parameter}): {c.change}"
                    for c in changes.itertuples(index=False)
                )
                blocks.append(
                    Text(
                        f"Findings changed since the previous visit ({check.previous_date.isoformat()}): "
                        f"{listed}",
                        "note",
                    )
                )
            else:
                blocks.append(
                    Text(
                        f"No finding changed since the previous visit ({check.previous_date.isoformat()}).",
                        "note",
                    )
                )
    if len(check.warnings):
        blocks.append(
            Text(
                f"{len(check.warnings)} nerve tests below the guideline minimum temperature: see the limb "
                "temperatures above.",
                "note",
            )
        )
    blocks.append(
        Text(
            "Sources are numbered at the end of the report; * = threshold or normal limit from memory, not "
            "verified against the publication.",
            "note",
        )
    )
    return Section("Electrodiagnostic criteria", tuple(blocks))


def _findings_table(findings: pd.DataFrame, sources: _Sources) -> Table:
    rows = []
    for f in findings.itertuples(index=False):
        segment = f" [{words(f.segment)}]" if _text(f.segment) else ""
        limit = f"{f.limit_name} {_number(f.limit)}".strip() if _text(f.limit_name) else "—"
        comparator = COMPARATORS.get(f.comparator, f.comparator) if _text(f.comparator) else ""
        mark = "" if f.source_status == "verified" and f.limit_status != "memory" else "*"
        refs = sources.ref(_text(f.source)) + sources.ref(_text(f.limit_source)) + mark
        verdict = VERDICT.get(f.status, f.status) + (f" ({f.reason})" if _text(f.reason) else "")
        rows.append(
            (
                f"{words(str(f.nerve))} {f.side} {f.modality}",
                str(f.parameter),
                _number(f.value, _text(f.unit)) + segment,
                limit,
                f"{comparator} {_number(f.threshold, _text(f.unit))}".strip(),
                verdict,
                refs,
            )
        )
    return Table(
        ("nerve", "finding", "value", "normal limit", "threshold", "verdict", "source"),
        tuple(rows),
        (1.7, 2.1, 2, 1.5, 1.2, 1, 0.8),
    )


def _response(result: PatientResponse) -> Section:
    scales = scale_table()
    rule_set = result.rule_set
    blocks: list[Block] = [
        Text(
            f"Rule set: {rule_set.title} — id {rule_set.id}, version {rule_set.version} ({rule_set.origin})."
        ),
    ]
    rule_rows = []
    for rule in rule_set.rules:
        info = scales.get(rule.scale)
        label = (
            info.label
            if info
            else ("grip strength, more affected hand" if rule.scale == AFFECTED_GRIP else words(rule.scale))
        )
        unit = info.unit if info else "kPa"
        rule_rows.append(
            (
                label,
                rule.threshold_words(unit),
                str(rule.confirm_visits),
                "yes" if rule.required else "no",
                rule.source,
                STATUS_WORDS.get(rule.status, rule.status),
            )
        )
    blocks.append(
        Table(
            (
                "scale",
                "threshold from baseline",
                "visits to confirm",
                "required",
                "source of the threshold",
                "status",
            ),
            tuple(rule_rows),
            (1.6, 1.2, 0.9, 0.9, 4.2, 1.2),
        )
    )
    if not result.classifications:
        blocks.append(Text("No treatment recorded on or before this visit: no regimen to classify."))
    for c in result.classifications:
        span = (
            f"{c.regimen.start_date.isoformat()} → "
            f"{c.regimen.end_date.isoformat() if c.regimen.end_date else 'ongoing'}"
        )
        blocks.append(Heading(f"{c.regimen.label()}, {span}"))
        blocks.append(
            Text(
                f"{CLASSIFICATION_SHAPES[c.classification]} "
                f"{CLASSIFICATION_LABELS[c.classification].upper()}",
                "outcome",
            )
        )
        rows = []
        for e in c.evidence:
            verdict = e["verdict"]
            rows.append(
                (
                    f"{e['label']} ({e['unit']}; {e['direction']})",
                    f"{_number(e['baseline_value'])} on {e['baseline_date'].isoformat()}",
                    f"{_number(e['value'])} on {e['date'].isoformat()}",
                    _signed(e["change"]),
                    e["threshold"] + ("" if e["status"] == "verified" else " *"),
                    f"{CHANGE_VERDICT_SHAPES.get(verdict, '')} "
                    f"{CHANGE_VERDICT_LABELS.get(verdict, words(verdict))}".strip(),
                )
            )
        if rows:
            blocks.append(
                Table(
                    ("scale", "baseline", "latest", "change", "threshold", "verdict"),
                    tuple(rows),
                    (2.6, 1.6, 1.6, 0.8, 1.1, 2.1),
                )
            )
        for missing in c.missing:
            blocks.append(Text(f"Missing — {missing}", "note"))
        for note in c.notes:
            blocks.append(Text(f"Note — {note}", "note"))
        if c.compared:
            blocks.append(Text("Days compared: " + ", ".join(d.isoformat() for d in c.compared), "note"))
    blocks.append(
        Text(
            "Never “stable” for want of data: a regimen without a baseline or a follow-up score is not "
            "assessable, and the missing data are named. * = threshold from memory, not verified against the "
            "publication.",
            "note",
        )
    )
    return Section("Treatment response", tuple(blocks))


def _changes(result: PatientResponse) -> Section:
    scales = scale_table()
    blocks: list[Block] = []
    frame = result.score_changes
    if frame.empty:
        blocks.append(Text("Clinical scores: none recorded up to this visit."))
    else:
        day = frame["date"].max()
        on_day = frame[frame["date"] == day]
        counting = on_day[on_day["verdict"].isin(BEYOND)]
        when = (
            "this visit"
            if day == result.at
            else f"{day.isoformat()}, the latest scored day before this visit"
        )
        blocks.append(Heading(f"Clinical scores beyond their minimal important change ({when})"))
        rows = []
        for r in counting.itertuples(index=False):
            info = scales.get(r.scale)
            label = f"{info.label} ({info.unit}; {info.direction_words})" if info else words(r.scale)
            rows.append(
                (
                    label,
                    _number(r.value),
                    f"{REFERENCE_LABELS.get(r.reference, words(r.reference))}: {_number(r.reference_value)} "
                    f"on {r.reference_date.isoformat()}",
                    _signed(r.change),
                    str(r.threshold),
                    _verdict_short(r.verdict),
                )
            )
        blocks.append(
            Table(
                ("scale", "now", "compared with", "change", "minimal important change", "verdict"),
                tuple(rows),
                (2.8, 0.6, 3.0, 0.8, 1.4, 1.0),
                "No score changed beyond its minimal important change.",
            )
        )
        others = len(on_day) - len(counting)
        if others:
            blocks.append(
                Text(
                    f"{others} other score comparisons on that day are within their minimal important change "
                    "or have none published.",
                    "note",
                )
            )
    blocks += _nerve_blocks(result)
    return Section("Changes that count", tuple(blocks))


def _nerve_blocks(result: PatientResponse) -> list[Block]:
    frame = result.nerve_changes
    if frame.empty:
        return [Text("Nerve conduction: no earlier study to compare with this visit.")]
    counting = frame[frame["verdict"].isin(BEYOND)]
    blocks: list[Block] = [Heading("Nerve conduction changes beyond the smallest detectable change (SDC)")]
    if counting.empty:
        blocks.append(Text("No nerve conduction value changed beyond its smallest detectable change."))
    for (reference, day), part in counting.groupby(["reference", "reference_date"], sort=False):
        rows = tuple(
            (
                f"{words(str(r.nerve))} {r.side}",
                nerve_parameter_label(str(r.parameter)),
                words(_text(r.where)) or "—",
                f"{_number(r.reference_value)} → {_number(r.value)}",
                f"{_signed(r.change_pct, '%', 1)} ({_number(r.sdc, '%', 1)})",
                _verdict_short(r.verdict),
                _text(r.less_certain) or "—",
            )
            for r in part.itertuples(index=False)
        )
        blocks.append(
            Text(f"Compared {REFERENCE_LABELS.get(reference, words(reference))} ({day.isoformat()}):")
        )
        blocks.append(
            Table(
                (
                    "nerve",
                    "parameter",
                    "where",
                    "then → now",
                    "change (SDC)",
                    "verdict",
                    "less certain because",
                ),
                rows,
                (1.1, 2.0, 1.6, 1.3, 1.4, 0.9, 2.6),
            )
        )
    others = len(frame) - len(counting)
    if others:
        blocks.append(
            Text(
                f"{others} other comparisons are within the SDC, have no published SDC, or cannot be "
                "compared.",
                "note",
            )
        )
    if result.nerve_summary:
        rows = tuple(
            (
                REFERENCE_LABELS.get(s["reference"], words(s["reference"])),
                SUMMARY_LABELS.get(s["measure"], words(s["measure"])),
                _number(s["value"], decimals=1),
                str(s["nerves"]),
            )
            for s in result.nerve_summary
        )
        blocks.append(
            Table(("compared", "summary", "value", "nerves or comparisons"), rows, (2.2, 4.5, 0.8, 1.5))
        )
    s = result.settings
    blocks.append(
        Text(
            f"A change is less certain when the limb temperatures were more than {s.temperature_delta_c:g} "
            "°C apart, another low-frequency filter was used, or the distances differ by more than "
            f"{s.distance_delta_pct:g} % (settings; common practice, no source).",
            "note",
        )
    )
    return blocks


# ---------------------------------------------------------------------------------------------- figure


def _figure_scales(result: PatientResponse, recorded: set[str]) -> list[str]:
    wanted = []
    for rule in result.rule_set.rules:
        scale = "grip_kpa_weaker" if rule.scale == AFFECTED_GRIP else rule.scale
        if scale in recorded and scale not in wanted:
            wanted.append(scale)
    if not wanted:
        wanted = [s for s in FALLBACK_SCALES if s in recorded][:1]
    return wanted[:MAX_SCORE_PANELS]


def _figure(result: PatientResponse) -> TrendFigure:
    at = result.at
    scales = scale_table()
    scores = result.scores[result.scores["date"] <= at] if at is not None else result.scores.iloc[0:0]
    panels: list[str] = []
    series: list[Series] = []
    for scale in _figure_scales(result, set(scores["scale"])):
        info = scales.get(scale)
        panel = f"{info.label} ({info.unit}; {info.direction_words})" if info else words(scale)
        part = scores[scores["scale"] == scale].sort_values("date", kind="stable")
        panels.append(panel)
        series.append(
            Series(
                panel,
                info.label if info else words(scale),
                tuple(part["date"]),
                tuple(float(v) for v in part["value"]),
            )
        )
    values = result.nerve_values
    if len(values):
        part = values[
            (values["parameter"] == FIGURE_PARAMETER) & values["value"].notna() & (values["visit_date"] <= at)
        ]
        if len(part):
            panel = f"{nerve_parameter_label(FIGURE_PARAMETER)}, per motor nerve"
            panels.append(panel)
            for (nerve, side), nerve_part in part.groupby(["nerve", "side"], sort=True):
                nerve_part = nerve_part.sort_values("visit_date", kind="stable")
                series.append(
                    Series(
                        panel,
                        f"{words(str(nerve))} {side}",
                        tuple(nerve_part["visit_date"]),
                        tuple(float(v) for v in nerve_part["value"]),
                    )
                )
    spans = []
    for number, regimen in enumerate(result.regimens, start=1):
        end = (
            regimen.end_date
            if regimen.end_date is not None and (at is None or regimen.end_date <= at)
            else at
        )
        spans.append(
            Span(
                f"R{number}",
                regimen.start_date,
                end or regimen.start_date,
                f"{regimen.label()} ({regimen.start_date.isoformat()} → "
                f"{regimen.end_date.isoformat() if regimen.end_date else 'ongoing'})",
            )
        )
    shaded = "; ".join(f"{s.tag} = {s.label}" for s in spans) or "no treatment recorded"
    caption = (
        f"Course up to this visit (dashed line: {at.isoformat() if at else '—'}). Shaded: regimens — "
        f"{shaded}. Each nerve has its own marker shape."
    )
    alt = (
        "Trend figure: "
        + "; ".join(
            f"{s.name}: " + ", ".join(f"{d.isoformat()} {_number(v)}" for d, v in zip(s.dates, s.values))
            for s in series
        )
        if series
        else "Trend figure: no scores or nerve values recorded up to this visit."
    )
    return TrendFigure(tuple(panels), tuple(series), tuple(spans), at, caption, alt)
