"""Plain-text rendering of a patient's treatment response (interface layer; no rules here). Fits 120 columns."""

from __future__ import annotations

import textwrap

from tracker.domain.labels import (
    CHANGE_VERDICT_LABELS, CHANGE_VERDICT_SHAPES, CLASSIFICATION_LABELS, CLASSIFICATION_SHAPES, REFERENCE_LABELS,
    SUMMARY_LABELS, nerve_parameter_label, words,
)
from tracker.response.scales import scale_table
from tracker.services.response import PatientResponse

WIDTH = 120


def _wrap(text: str, indent: str = "  ") -> list[str]:
    return textwrap.wrap(text, WIDTH, initial_indent=indent, subsequent_indent=indent + "  ") or [indent]


def _number(value, decimals: int = 1) -> str:
    if value is None or value != value:
        return "—"
    return f"{value:.{decimals}f}".rstrip("0").rstrip(".") if decimals else f"{value:.0f}"


def _signed(value, decimals: int = 1) -> str:
    if value is None or value != value:
        return "—"
    return ("+" if value > 0 else "") + _number(value, decimals)


def text(result: PatientResponse, *, all_changes: bool = False) -> str:
    """The response report: regimens and their classification with evidence, changes that count, trends."""
    scales = scale_table()
    lines = [f"Treatment response of {result.patient} as seen on {result.at.isoformat() if result.at else '—'}"]
    lines += _wrap(f"Rule set: {result.rule_set.title} [{result.rule_set.id}, version {result.rule_set.version}]", "")
    lines.append("")
    if not result.classifications:
        lines.append("No treatment recorded on or before this day: no regimen to classify.")
    for c in result.classifications:
        shape = CLASSIFICATION_SHAPES[c.classification]
        span = f"{c.regimen.start_date.isoformat()} → {c.regimen.end_date.isoformat() if c.regimen.end_date else 'ongoing'}"
        lines += _wrap(f"{shape} {CLASSIFICATION_LABELS[c.classification].upper()} — {c.regimen.label()}, {span}", "")
        for e in c.evidence:
            verdict = CHANGE_VERDICT_LABELS.get(e["verdict"], e["verdict"])
            star = "" if e["status"] == "verified" else " *"
            lines += _wrap(
                f"{e['label']} ({e['unit']}, {e['direction']}): {_number(e['baseline_value'])} on {e['baseline_date'].isoformat()} → "
                f"{_number(e['value'])} on {e['date'].isoformat()}, change {_signed(e['change'])}; threshold {e['threshold']}: {verdict}{star}"
            )
            lines += _wrap(f"source: {e['source']}", "      ")
        for missing in c.missing:
            lines += _wrap(f"missing — {missing}")
        for note in c.notes:
            lines += _wrap(f"note — {note}")
        if c.compared:
            lines += _wrap("visits compared: " + ", ".join(d.isoformat() for d in c.compared))
        lines.append("")
    lines.append("* from memory, not verified against the publication")
    lines.append("")
    lines += _score_lines(result, scales, all_changes)
    lines += _nerve_lines(result, all_changes)
    lines += _trend_lines(result, scales)
    if result.notes:
        lines.append("Notes on the scores")
        for note in result.notes:
            lines += _wrap(note)
        lines.append("")
    lines += _wrap(
        "Less certain changes: limb temperature more than "
        f"{result.settings.temperature_delta_c:g} °C apart, another low-frequency filter, or distances more than "
        f"{result.settings.distance_delta_pct:g} % apart (settings; common practice, no source).", "")
    lines += _wrap(result.caution, "")
    return "\n".join(lines)


def _score_lines(result: PatientResponse, scales, all_changes: bool) -> list[str]:
    at = result.at
    frame = result.score_changes
    if frame.empty:
        return ["Clinical scores: none recorded up to this day.", ""]
    last_day = frame["date"].max()
    frame = frame if all_changes else frame[frame["date"] == last_day]
    lines = [f"Clinical score changes on {last_day.isoformat()}" + (" (the latest scored day)" if last_day != at else "")]
    header = ["scale", "value", "compared", "with", "change", "threshold", "verdict"]
    rows = []
    for r in frame.itertuples(index=False):
        info = scales.get(r.scale)
        label = f"{info.label} ({info.unit})" if info else r.scale
        rows.append([label, _number(r.value), REFERENCE_LABELS.get(r.reference, r.reference), f"{_number(r.reference_value)} ({r.reference_date.isoformat()})",
                     _signed(r.change), r.threshold, f"{CHANGE_VERDICT_SHAPES.get(r.verdict, '')} {CHANGE_VERDICT_LABELS.get(r.verdict, r.verdict)}"])
    return lines + _table(header, rows) + [""]


def _nerve_lines(result: PatientResponse, all_changes: bool) -> list[str]:
    frame = result.nerve_changes
    if frame.empty:
        return ["Nerve conduction changes: no study on this day with an earlier study to compare.", ""]
    lines = [f"Nerve conduction changes at {result.at.isoformat()} against the smallest detectable change (SDC)"]
    shown = frame if all_changes else frame[frame["verdict"].isin(["improved", "worsened"]) | (frame["less_certain"] != "")]
    hidden = len(frame) - len(shown)
    header = ["nerve", "parameter", "where", "compared", "then", "now", "change %", "SDC %", "verdict", "less certain because"]
    rows = []
    for r in shown.itertuples(index=False):
        rows.append([
            f"{words(r.nerve)} {r.side}", nerve_parameter_label(r.parameter), words(r.where) or "—", REFERENCE_LABELS.get(r.reference, r.reference),
            _number(r.reference_value, 2), _number(r.value, 2), _signed(r.change_pct), _number(r.sdc) if r.sdc == r.sdc and r.sdc is not None else "—",
            f"{CHANGE_VERDICT_SHAPES.get(r.verdict, '')} {CHANGE_VERDICT_LABELS.get(r.verdict, r.verdict)}", r.less_certain or "",
        ])
    if rows:
        lines += _table(header, rows)
    if hidden:
        lines.append(f"  … and {hidden} changes within the SDC or without a threshold (--all-changes lists them)")
    for s in result.nerve_summary:
        lines.append(f"  {REFERENCE_LABELS.get(s['reference'], s['reference'])}: {SUMMARY_LABELS.get(s['measure'], s['measure'])}: "
                     f"{_number(s['value'])} over {s['nerves']} {'nerves' if s['measure'].startswith('mean') else 'comparisons'}")
    return lines + [""]


def _trend_lines(result: PatientResponse, scales) -> list[str]:
    if not result.trends or result.window is None:
        return []
    lo, hi = result.window
    lines = [f"Trends per year, {lo.isoformat()} → {hi.isoformat()} (95 % confidence interval; ordinary least squares)"]
    rows = []
    for t in result.trends:
        if t.kind == "score":
            name = scales[t.name].label if t.name in scales else t.name
        else:
            name = f"{words(t.nerve)} {t.side} {nerve_parameter_label(t.parameter if hasattr(t, 'parameter') else t.name)} {words(t.where)}".strip()
        if t.trend.slope is None:
            rows.append([name, str(t.trend.points), t.trend.reason, "", ""])
        else:
            rows.append([name, str(t.trend.points), f"{_signed(t.trend.slope, 2)} {t.unit}/year", _signed(t.trend.low, 2), _signed(t.trend.high, 2)])
    return lines + _table(["what", "points", "slope", "95 % CI low", "high"], rows) + [""]


def _table(header: list[str], rows: list[list[str]], indent: str = "  ") -> list[str]:
    # Long free-text cells (sources, reasons) are cut to keep the table within 120 columns.
    widths = [min(max(len(header[i]), *(len(r[i]) for r in rows)) if rows else len(header[i]), 44) for i in range(len(header))]
    while sum(widths) + 2 * len(widths) + len(indent) > WIDTH and max(widths) > 12:
        widths[widths.index(max(widths))] -= 1

    def cell(text: str, width: int) -> str:
        return text if len(text) <= width else text[: width - 1] + "…"

    line = lambda cells: (indent + "  ".join(cell(c, w).ljust(w) for c, w in zip(cells, widths))).rstrip()
    return [line(header), indent + "  ".join("-" * w for w in widths)] + [line(r) for r in rows]
