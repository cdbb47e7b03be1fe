"""Plain-text rendering of a patient's treatment response (interface
layer; no rules here). Fits 120 columns."""

from __future__ import annotations

import textwrap

from tracker.domain.labels import (
    CHANGE_VERDICT_LABELS,
    CHANGE_VERDICT_SHAPES,
    CLASSIFICATION_LABELS,
    CLASSIFICATION_SHAPES,
    NERVE_PARAMETER_SHORT,
    REFERENCE_LABELS,
    SUMMARY_LABELS,
    words,
)
from tracker.response.scales import scale_table
from tracker.services.response import PatientResponse

WIDTH = 120
COMPARED_SHORT = {
    "regimen_baseline": "baseline",
    "previous": "previous",
    "previous = regimen_baseline": "previous=baseline",
}


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
    lines = [
        f"Treatment response of {result.patient} as seen on {result.at.isoformat() if result.at else '—'}"
    ]
    lines += _wrap(
        f"Rule set: {result.rule_set.title} [{result.rule_set.id}, version {result.rule_set.version}]", ""
    )
    lines.append("")
    if not result.classifications:
        lines.append("No treatment recorded on or before this day: no regimen to classify.")
    for c in result.classifications:
        shape = CLASSIFICATION_SHAPES[c.classification]
        span = (
            f"{c.regimen.start_date.isoformat()} → "
            f"{c.regimen.end_date.isoformat() if c.regimen.end_date else 'ongoing'}"
        )
        lines += _wrap(
            f"{shape} {CLASSIFICATION_LABELS[c.classification].upper()} — {c.regimen.label()}, {span}", ""
        )
        for e in c.evidence:
            verdict = CHANGE_VERDICT_LABELS.get(e["verdict"], e["verdict"])
            star = "" if e["status"] == "verified" else " *"
            lines += _wrap(
                f"{e['label']} ({e['unit']}, {e['direction']}): {_number(e['baseline_value'])} on "
                f"{e['baseline_date'].isoformat()} → {_number(e['value'])} on {e['date'].isoformat()}, "
                f"change {_signed(e['change'])}; threshold {e['threshold']}: {verdict}{star}"
            )
            lines += _wrap(f"source: {e['source']}", "      ")
        for missing in c.missing:
            lines += _wrap(f"missing — {missing}")
        for note in c.notes:
            lines += _wrap(f"note — {note}")
        if c.compared:
            lines += _wrap("visits compared: " + ", ".join(d.isoformat() for d in c.compared))
        lines.append("")
    if any(e["status"] != "verified" for c in result.classifications for e in c.evidence):
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
        f"Less certain changes: limb temperature more than {result.settings.temperature_delta_c:g} °C apart, "
        f"another low-frequency filter, or distances more than {result.settings.distance_delta_pct:g} % "
        "apart (settings; common practice, no source).",
        "",
    )
    lines += _wrap(result.caution, "")
    return "\n".join(lines)


def _score_lines(result: PatientResponse, scales, all_changes: bool) -> list[str]:
    at = result.at
    frame = result.score_changes
    if frame.empty:
        return ["Clinical scores: none recorded up to this day.", ""]
    days = sorted(frame["date"].unique()) if all_changes else [frame["date"].max()]
    lines = []
    for day in days:
        part = frame[frame["date"] == day]
        lines.append(
            f"Clinical score changes on {day.isoformat()}"
            + (" (the latest scored day)" if day != at and not all_changes else "")
            + " — ▲ better / ▼ worse beyond the minimal important change, · within it"
        )
        header = [
            "scale (unit)",
            "direction",
            "now",
            "vs regimen baseline",
            "vs previous",
            "vs best earlier",
            "threshold",
        ]
        rows = []
        for scale, group in part.groupby("scale", sort=True):
            info = scales.get(scale)
            label = f"{info.label} ({info.unit})" if info else scale
            direction = ("higher better" if info.higher_is_better else "higher worse") if info else ""
            cells = {
                r.reference: (
                    f"{_signed(r.change)} {CHANGE_VERDICT_SHAPES.get(r.verdict, '')} from "
                    f"{_number(r.reference_value)}"
                )
                for r in group.itertuples(index=False)
            }
            star = "" if info is None or info.mic_status == "verified" else " *"
            rows.append(
                [
                    label,
                    direction,
                    _number(group["value"].iloc[0]),
                    cells.get("regimen_baseline", "—"),
                    cells.get("previous", "—"),
                    cells.get("best", "—"),
                    group["threshold"].iloc[0] + star,
                ]
            )
        lines += _table(header, rows) + [""]
    if any(info.mic_status != "verified" for info in scales.values() if info.name in set(frame["scale"])):
        lines += ["  * minimal important change from memory, not verified against the publication", ""]
    return lines


def _nerve_lines(result: PatientResponse, all_changes: bool) -> list[str]:
    frame = result.nerve_changes
    if frame.empty:
        return ["Nerve conduction changes: no study on this day with an earlier study to compare.", ""]
    lines = _wrap(
        f"Nerve conduction changes at {result.at.isoformat()} against the smallest detectable change (SDC): "
        "▲ better / ▼ worse beyond the SDC, · within it, – no published figure; ? less certain (see below)",
        "",
    )
    shown = frame if all_changes else frame[frame["verdict"].isin(["improved", "worsened"])]
    hidden = len(frame) - len(shown)
    header = [
        "nerve (side L/R)",
        "parameter",
        "where",
        "compared with",
        "then",
        "now",
        "change",
        "SDC",
        "",
        "",
    ]
    rows, doubts = [], []
    for r in shown.itertuples(index=False):
        sdc = "—" if r.sdc is None or r.sdc != r.sdc else f"{_number(r.sdc)} %"
        change_text = (
            f"{_signed(r.change_pct)} %" if r.change_pct is not None and r.change_pct == r.change_pct else "—"
        )
        rows.append(
            [
                f"{words(r.nerve)} {r.side[:1].upper()} {r.modality}",
                NERVE_PARAMETER_SHORT.get(r.parameter, r.parameter),
                words(r.where) or "—",
                f"{COMPARED_SHORT.get(r.reference, r.reference)} {r.reference_date.isoformat()}",
                "absent" if r.reference_absent else _number(r.reference_value, 2),
                "absent" if r.absent else _number(r.value, 2),
                change_text,
                sdc,
                CHANGE_VERDICT_SHAPES.get(r.verdict, ""),
                "?" if r.less_certain else "",
            ]
        )
        if r.less_certain:
            place = " ".join(
                part
                for part in (
                    words(r.nerve),
                    r.side,
                    NERVE_PARAMETER_SHORT.get(r.parameter, r.parameter),
                    words(r.where),
                )
                if part
            )
            doubts.append(f"{place}: less certain — {r.less_certain}")
    if rows:
        lines += _table(header, rows)
    for doubt in doubts:
        lines += _wrap(doubt)
    if hidden:
        lines.append(
            f"  … and {hidden} changes within the SDC or without a published figure (--all-changes lists "
            "them)"
        )
    for s in result.nerve_summary:
        unit = (
            ("nerve" if s["nerves"] == 1 else "nerves")
            if s["measure"].startswith("mean")
            else ("comparison" if s["nerves"] == 1 else "comparisons")
        )
        lines += _wrap(
            f"{REFERENCE_LABELS.get(s['reference'], s['reference'])}: "
            f"{SUMMARY_LABELS.get(s['measure'], s['measure'])}: {_number(s['value'])} over {s['nerves']} "
            f"{unit}"
        )
    return lines + [""]


def _trend_lines(result: PatientResponse, scales) -> list[str]:
    if not result.trends or result.window is None:
        return []
    lo, hi = result.window
    lines = [
        f"Trends per year, {lo.isoformat()} → {hi.isoformat()} (95 % confidence interval; ordinary least "
        "squares)"
    ]
    rows = []
    for t in result.trends:
        if t.kind == "score":
            name = scales[t.name].label if t.name in scales else t.name
        else:
            name = (
                f"{words(t.nerve)} {t.side} {NERVE_PARAMETER_SHORT.get(t.name, t.name)} {words(t.where)}"
            ).strip()
        if t.trend.slope is None:
            rows.append([name, str(t.trend.points), t.trend.reason, "", ""])
        else:
            unit = "percentage points" if t.unit == "%" else t.unit  # a change of a percentage is in points
            rows.append(
                [
                    name,
                    str(t.trend.points),
                    f"{_signed(t.trend.slope, 2)} {unit}/year",
                    _signed(t.trend.low, 2),
                    _signed(t.trend.high, 2),
                ]
            )
    return lines + _table(["what", "points", "slope", "95 % CI low", "high"], rows) + [""]


def _table(header: list[str], rows: list[list[str]], indent: str = "  ") -> list[str]:
    # Long free-text cells (sources, reasons) are cut to keep the table within 120 columns.
    widths = [
        min(max(len(header[i]), *(len(r[i]) for r in rows)) if rows else len(header[i]), 60)
        for i in range(len(header))
    ]
    while sum(widths) + 2 * len(widths) + len(indent) > WIDTH and max(widths) > 12:
        widths[widths.index(max(widths))] -= 1

    def cell(text: str, width: int) -> str:
        return text if len(text) <= width else text[: width - 1] + "…"

    line = lambda cells: (indent + "  ".join(cell(c, w).ljust(w) for c, w in zip(cells, widths))).rstrip()
    return [line(header), indent + "  ".join("-" * w for w in widths)] + [line(r) for r in rows]
