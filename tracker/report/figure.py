"""The report's trend figure as PNG bytes (matplotlib, Agg, no pyplot, no network).

Deterministic: the same :class:`~tracker.report.content.TrendFigure` gives the same bytes (no software or
date stamp in the PNG). One panel per score or nerve parameter on a shared time axis; regimens shaded in two
alternating fills and tagged R1, R2 … (the caption names them); a dashed line on the reported visit.
Colours: Okabe & Ito (2002) colour-blind-safe palette; every nerve also has its own marker shape.
"""

from __future__ import annotations

import datetime as dt
import io
import threading

from matplotlib import dates as mdates
from matplotlib.figure import Figure

from tracker.report.content import TrendFigure

COLOURS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000")
MARKERS = ("o", "s", "^", "D", "v", "P", "X")
FILLS = ("#56B4E9", "#E69F00")
INK = "#1f2d3a"
DPI = 150
WIDTH_IN = 7.2
_LOCK = threading.Lock()  # matplotlib's text and font caches are shared; the dashboard renders from threads


def png(figure: TrendFigure) -> bytes:
    """The figure as PNG bytes."""
    with _LOCK:
        return _draw(figure)


def _draw(spec: TrendFigure) -> bytes:
    panels = list(spec.panels) or ["no scores or nerve values recorded"]
    height = 0.75 + 1.85 * len(panels)
    legends = any(sum(1 for s in spec.series if s.panel == p) > 1 for p in panels)
    fig = Figure(figsize=(WIDTH_IN, height), dpi=DPI)
    # Fixed margins (in inches turned into fractions): quicker than a layout engine, and as predictable.
    fig.subplots_adjust(
        left=0.6 / WIDTH_IN,
        right=1 - (1.35 if legends else 0.2) / WIDTH_IN,
        top=1 - 0.3 / height,
        bottom=0.4 / height,
        hspace=0.45,
    )
    axes = fig.subplots(len(panels), 1, sharex=True, squeeze=False)[:, 0]
    days = (
        [d for s in spec.series for d in s.dates]
        + [s.start for s in spec.spans]
        + ([spec.visit] if spec.visit else [])
    )
    low, high = (min(days), max(days)) if days else (dt.date(2000, 1, 1), dt.date(2000, 12, 31))
    pad = dt.timedelta(days=max(14, (high - low).days // 25))
    for axis, panel in zip(axes, panels):
        for index, span in enumerate(spec.spans):
            end = span.end if span.end > span.start else span.start + dt.timedelta(days=1)
            axis.axvspan(span.start, end, color=FILLS[index % 2], alpha=0.18, linewidth=0)
        if spec.visit:
            axis.axvline(spec.visit, color=INK, linestyle="--", linewidth=0.9)
        lines = [s for s in spec.series if s.panel == panel]
        for index, line in enumerate(lines):
            axis.plot(
                line.dates,
                line.values,
                color=COLOURS[index % len(COLOURS)],
                marker=MARKERS[index % len(MARKERS)],
                markersize=4,
                linewidth=1.3,
                label=line.name,
            )
        axis.set_title(panel, fontsize=8.5, loc="left", color=INK)
        axis.tick_params(labelsize=7.5, colors=INK)
        axis.grid(True, color="#dde3e1", linewidth=0.6)
        for side in ("top", "right"):
            axis.spines[side].set_visible(False)
        if len(lines) > 1:
            axis.legend(fontsize=6.5, loc="center left", bbox_to_anchor=(1.0, 0.5), frameon=False)
        if not lines:
            axis.set_yticks([])
    top = axes[0]
    for span in spec.spans:
        middle = span.start + (max(span.end, span.start) - span.start) / 2
        top.annotate(
            span.tag,
            xy=(middle, 1.0),
            xycoords=("data", "axes fraction"),
            xytext=(0, -2),
            textcoords="offset points",
            ha="center",
            va="top",
            fontsize=7,
            color=INK,
            fontweight="bold",
        )
    axes[-1].set_xlim(low - pad, high + pad)
    locator = mdates.AutoDateLocator(minticks=3, maxticks=8)
    axes[-1].xaxis.set_major_locator(locator)
    axes[-1].xaxis.set_major_formatter(mdates.DateFormatter("%Y-%m"))
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=DPI, metadata={"Software": None}, facecolor="white")
    return buffer.getvalue()
