"""Plotly figures as pure functions of service results (testable without Streamlit).

Every trace carries ``meta = {"panel": …, "kind": …}`` (kind: ``measured``, ``normal limit``, ``criteria
threshold``, ``change beyond SDC``, ``score``, ``mic band``, ``baseline``, ``outcome``) so that tests and
readers can find what a line stands for. Treatment spans are layout shapes named ``regimen: <words>``.
"""

from __future__ import annotations

import datetime as dt
import math

import pandas as pd
import plotly.graph_objects as go
from plotly.subplots import make_subplots

from tracker.dashboard import style
from tracker.domain.labels import PRECISION, SDC_STEP_LABELS, criteria_title, outcome_label, segment_words
from tracker.response.regimens import Regimen
from tracker.services.follow_up import FollowUp
from tracker.services.response import ResponseView

OUTCOME_SYMBOLS = {
    "positive": "triangle-up",
    "other finding": "diamond",
    "negative": "circle-open",
    "not evaluable": "square-open",
    "undecided": "diamond-open",
}
SCALE_PAD = 0.05  # share of a scale's range added above and below, so points at its ends stay visible


def time_range(fu: FollowUp) -> tuple[dt.date, dt.date] | None:
    """The shared time axis: every visit, treatment and score, with a small margin."""
    dates: list[dt.date] = list(fu.visit_dates)
    dates += [d for d in fu.treatments.get("start_date", []) if d is not None]
    dates += [d for d in fu.treatments.get("end_date", []) if d is not None and not pd.isna(d)]
    dates += list(fu.scores.get("score_date", []))
    if not dates:
        return None
    low, high = min(dates), max(dates)
    margin = dt.timedelta(days=max(14, (high - low).days // 30))
    return low - margin, high + margin


def _temperature_text(row) -> str:
    if row.temperature_c is None or pd.isna(row.temperature_c):
        return "limb temperature not recorded"
    text = f"limb temperature {row.temperature_c:.1f} °C"
    if row.cold:
        text += f" — COLD (below {row.temperature_minimum_c:.0f} °C): slowing may be artefact"
    return text


def trend_figure(
    fu: FollowUp,
    *,
    regimens: list[Regimen] | None = None,
    steps: pd.DataFrame | None = None,
    columns: int = 2,
) -> go.Figure:
    """Small multiples, one panel per nerve and side: the chosen parameter over visit dates, with the normal
    limit (dashed) and the chosen criteria set's threshold (dotted) drawn on every panel, and treatment
    periods shaded across all panels — one span per regimen when ``regimens`` are given (the response
    analysis's), else one per stored treatment row.

    ``steps``: :data:`tracker.services.response.STEP_COLUMNS` rows; a plotted point whose change since the
    previous study is beyond the smallest detectable change gets an open triangle around it (down: worse,
    up: better) and the words in its hover."""
    points, references = fu.points, fu.references
    panels = sorted(set(points["panel"]) | set(references["panel"]))
    unit = fu.parameter.unit
    if not panels:
        figure = go.Figure()
        figure.update_layout(
            title=f"No {fu.parameter.label.lower()} recorded for {fu.patient}",
            template="plotly_white",
            height=240,
        )
        return figure
    columns = max(1, min(columns, len(panels)))
    rows = math.ceil(len(panels) / columns)
    figure = make_subplots(
        rows=rows,
        cols=columns,
        subplot_titles=[p.capitalize() for p in panels],
        shared_xaxes="all",
        vertical_spacing=min(0.12, 0.5 / rows),
        horizontal_spacing=0.07,
    )
    series_colour: dict[str, str] = {}
    shown_in_legend: set[str] = set()
    step_of = _steps_by_point(steps, fu.parameter.key)
    for index, panel in enumerate(panels):
        row, col = index // columns + 1, index % columns + 1
        beyond: dict[str, list[tuple]] = {}
        for series, group in points[points["panel"] == panel].groupby("series", sort=True):
            colour = series_colour.setdefault(series, style.SERIES[len(series_colour) % len(style.SERIES)])
            group = group.sort_values("visit_date")
            plotted = group[group["value"].notna()]
            custom = []
            for d, v, r in zip(plotted["visit_date"], plotted["value"], plotted.itertuples()):
                step = _step_of(step_of, panel, str(series), d, float(v))
                if step is not None:
                    beyond.setdefault(step["verdict"], []).append((d, float(v), step["words"]))
                change = f"<br>{step['words']}" if step is not None else ""
                custom.append(
                    [
                        d.isoformat(),
                        f"{v:.{PRECISION.get(unit, 2)}f}",
                        unit,
                        _temperature_text(r),
                        segment_words(series),
                        r.note or "",
                        change,
                    ]
                )
            figure.add_trace(
                go.Scatter(
                    x=list(plotted["visit_date"]),
                    y=[float(v) for v in plotted["value"]],
                    mode="lines+markers",
                    name=segment_words(series),
                    legendgroup=str(series),
                    showlegend=series not in shown_in_legend,
                    line={"color": colour, "width": 2},
                    marker={
                        "size": 9,
                        "color": colour,
                        "symbol": ["circle-open-dot" if c else "circle" for c in plotted["cold"]],
                        "line": {"width": 2, "color": colour},
                    },
                    customdata=custom,
                    hovertemplate=(
                        "<b>%{customdata[0]}</b><br>%{customdata[4]}: %{customdata[1]} "
                        "%{customdata[2]}<br>%{customdata[3]}%{customdata[6]}<extra>"
                    )
                    + panel
                    + "</extra>",
                    meta={"panel": panel, "kind": "measured", "series": str(series)},
                ),
                row=row,
                col=col,
            )
            shown_in_legend.add(series)
        for verdict, marks in sorted(beyond.items()):
            symbol, colour = style.SDC_MARKERS[verdict]
            figure.add_trace(
                go.Scatter(
                    x=[m[0] for m in marks],
                    y=[m[1] for m in marks],
                    mode="markers",
                    name=SDC_STEP_LABELS[verdict],
                    legendgroup=f"sdc-{verdict}",
                    showlegend=f"sdc-{verdict}" not in shown_in_legend,
                    marker={
                        "symbol": symbol,
                        "size": 19,
                        "color": colour,
                        "line": {"width": 2.4, "color": colour},
                    },
                    customdata=[m[2] for m in marks],
                    hovertemplate="%{x|%Y-%m-%d}<br>%{customdata}<extra>" + panel + "</extra>",
                    meta={"panel": panel, "kind": "change beyond SDC", "verdict": verdict},
                ),
                row=row,
                col=col,
            )
            shown_in_legend.add(f"sdc-{verdict}")
        for kind, dash, colour in (
            ("normal limit", "dash", style.LIMIT_COLOUR),
            ("criteria threshold", "dot", style.THRESHOLD_COLOUR),
        ):
            lines = references[(references["panel"] == panel) & (references["kind"] == kind)].sort_values(
                "visit_date"
            )
            if lines.empty:
                continue
            first = lines.iloc[0]
            name = (
                f"{first['label']} (normal limit)"
                if kind == "normal limit"
                else f"{criteria_title(fu.criteria)}: {first['label']}"
            )
            x, y = list(lines["visit_date"]), [float(v) for v in lines["value"]]
            if len(x) == 1:  # one visit: draw the line a little either side so it is visible
                x, y = [x[0] - dt.timedelta(days=20), x[0] + dt.timedelta(days=20)], y * 2
            figure.add_trace(
                go.Scatter(
                    x=x,
                    y=y,
                    mode="lines",
                    line={"color": colour, "dash": dash, "width": 1.6, "shape": "hv"},
                    name=name,
                    legendgroup=kind,
                    showlegend=kind not in shown_in_legend,
                    hovertemplate=f"{name}: %{{y:.2f}} {unit}<extra>{panel}</extra>",
                    meta={"panel": panel, "kind": kind},
                ),
                row=row,
                col=col,
            )
            shown_in_legend.add(kind)
        figure.update_yaxes(title_text=unit, row=row, col=col, gridcolor=style.GRID)
    window = time_range(fu)
    spans = _regimen_spans(regimens, window) if regimens is not None else _treatment_spans(fu, window)
    _shade(figure, spans)
    figure.update_xaxes(range=list(window) if window else None, gridcolor=style.GRID, type="date")
    treatments = len(spans)
    figure.update_layout(
        template="plotly_white",
        height=250 * rows + 150 + 14 * min(treatments, 3),
        font={"color": style.INK},
        hovermode="closest",
        margin={"l": 50, "r": 20, "t": 120, "b": 50 + 14 * min(treatments, 3)},
        title={
            "text": f"{fu.parameter.label} ({unit})",
            "x": 0,
            "y": 0.995,
            "yanchor": "top",
            "font": {"size": 14},
        },
        legend={"orientation": "h", "yanchor": "bottom", "y": 1.0 + 60 / (250 * rows), "x": 0},
        meta={
            "patient": fu.patient,
            "parameter": fu.parameter.key,
            "criteria": fu.criteria,
            "label": fu.parameter.label,
        },
    )
    return figure


def _steps_by_point(steps: pd.DataFrame | None, parameter: str) -> dict[tuple, list[dict]]:
    if steps is None or steps.empty:
        return {}
    out: dict[tuple, list[dict]] = {}
    for step in steps[(steps["follow_parameter"] == parameter) & (steps["words"] != "")].to_dict("records"):
        series = step["series"] if isinstance(step["series"], str) else None
        out.setdefault((step["panel"], series, step["visit_date"]), []).append(step)
    return out


def _step_of(
    step_of: dict[tuple, list[dict]], panel: str, series: str, day: dt.date, value: float
) -> dict | None:
    """The step of a plotted point: same panel, day (and segment where it has one), and the same value — a
    mark never lands on a number the change was not computed from."""
    for step in step_of.get((panel, series, day), []) + step_of.get((panel, None, day), []):
        if step["value"] is not None and abs(float(step["value"]) - value) <= 1e-6 * max(1.0, abs(value)):
            return step
    return None


def _treatment_spans(fu: FollowUp, window) -> list[tuple[dt.date, dt.date, str]]:
    spans = []
    for t in fu.treatments.itertuples():
        end = (
            t.end_date
            if t.end_date is not None and not pd.isna(t.end_date)
            else (window[1] if window else t.start_date)
        )
        spans.append((t.start_date, end, t.label))
    return spans


def _regimen_spans(regimens: list[Regimen], window) -> list[tuple[dt.date, dt.date, str]]:
    """(start, end, words) per regimen; a running regimen reaches the end of the time axis."""
    return [
        (r.start_date, r.end_date or (window[1] if window else r.start_date), r.label()) for r in regimens
    ]


def _shade(figure: go.Figure, spans: list[tuple[dt.date, dt.date, str]]) -> None:
    """One shaded span per treatment period or regimen, consecutive ones in alternating fills, each labelled
    in words once under the bottom axis (staggered so that close starts do not overlap)."""
    for number, (start, end, label) in enumerate(spans):
        if end <= start:
            end = start + dt.timedelta(days=1)
        figure.add_vrect(
            x0=start,
            x1=end,
            fillcolor=style.REGIMEN_FILLS[number % len(style.REGIMEN_FILLS)],
            line_width=0,
            layer="below",
            row="all",
            col="all",
            name=f"regimen: {label}",
        )
        figure.add_annotation(
            x=start,
            y=0,
            xref="x",
            yref="paper",
            text=f"▸ {label}",
            showarrow=False,
            xanchor="left",
            yanchor="top",
            font={"size": 10, "color": style.ACCENT},
            yshift=-24 - 13 * (number % 3),
        )


def scores_figure(
    view: ResponseView, *, window: tuple[dt.date, dt.date] | None = None, columns: int = 3
) -> go.Figure:
    """Clinical scores, one panel per scale on its own scale range (``scales.csv``), titled with label, unit
    and direction; for scales with a minimal important change, the band baseline ± MIC around the running
    regimen's baseline; every regimen shaded and labelled, on the same time axis as the trends."""
    panels, scores = view.panels, view.points
    if panels.empty:
        figure = go.Figure()
        figure.update_layout(title="No clinical scores recorded", template="plotly_white", height=200)
        return figure
    columns = max(1, min(columns, len(panels)))
    rows = math.ceil(len(panels) / columns)
    figure = make_subplots(
        rows=rows,
        cols=columns,
        subplot_titles=list(panels["title"]),
        shared_xaxes="all",
        vertical_spacing=min(0.16, 0.6 / rows),
        horizontal_spacing=0.06,
    )
    legend: set[str] = set()
    for index, panel in enumerate(panels.itertuples(index=False)):
        row, col = index // columns + 1, index % columns + 1
        group = scores[scores["scale"] == panel.scale].sort_values("date", kind="stable")
        unit = panel.unit if isinstance(panel.unit, str) else ""
        if pd.notna(panel.band_low):
            x0, x1 = panel.band_start, panel.band_end
            band = (
                f"minimal important change {panel.mic_words} around the regimen baseline "
                f"{panel.baseline_value:g} ({panel.baseline_date.isoformat()})"
            )
            figure.add_trace(
                go.Scatter(
                    x=[x0, x1, x1, x0, x0],
                    y=[panel.band_low, panel.band_low, panel.band_high, panel.band_high, panel.band_low],
                    mode="lines",
                    fill="toself",
                    fillcolor=style.MIC_FILL,
                    line={"width": 0},
                    hoveron="fills",
                    name="± minimal important change around the regimen baseline",
                    legendgroup="mic",
                    showlegend="mic" not in legend,
                    text=band + f"; source: {panel.mic_source}",
                    hoverinfo="text",
                    meta={"panel": panel.scale, "kind": "mic band", "baseline": float(panel.baseline_value)},
                ),
                row=row,
                col=col,
            )
            figure.add_trace(
                go.Scatter(
                    x=[x0, x1],
                    y=[panel.baseline_value] * 2,
                    mode="lines",
                    line={"color": style.LIMIT_COLOUR, "dash": "dot", "width": 1.4},
                    name="regimen baseline",
                    legendgroup="baseline",
                    showlegend="baseline" not in legend,
                    hovertemplate=(
                        f"regimen baseline {panel.baseline_value:g} {unit} "
                        f"({panel.baseline_date.isoformat()})<extra>{panel.label}</extra>"
                    ),
                    meta={"panel": panel.scale, "kind": "baseline"},
                ),
                row=row,
                col=col,
            )
            legend.update({"mic", "baseline"})
        computed = group["computed"].astype(bool).tolist()
        figure.add_trace(
            go.Scatter(
                x=list(group["date"]),
                y=[float(v) for v in group["value"]],
                mode="lines+markers",
                name=panel.label,
                showlegend=False,
                line={"color": style.SCORE_COLOUR, "width": 2},
                marker={
                    "size": 8,
                    "color": style.SCORE_COLOUR,
                    "symbol": ["diamond-open" if c else "circle" for c in computed],
                    "line": {"width": 2, "color": style.SCORE_COLOUR},
                },
                customdata=[
                    [unit, f" ({n})" if n else "", f"<br>{w}" if w else ""]
                    for n, w in zip(group["note"], group["change_words"])
                ],
                hovertemplate="%{x|%Y-%m-%d}: %{y:g} %{customdata[0]}%{customdata[1]}%{customdata[2]}<extra>"
                + panel.label
                + "</extra>",
                meta={"panel": panel.scale, "kind": "score", "scale": panel.scale},
            ),
            row=row,
            col=col,
        )
        if pd.notna(panel.minimum) and pd.notna(panel.maximum):
            pad = (panel.maximum - panel.minimum) * SCALE_PAD
            figure.update_yaxes(range=[panel.minimum - pad, panel.maximum + pad], row=row, col=col)
        figure.update_yaxes(gridcolor=style.GRID, row=row, col=col)
    _shade(figure, _regimen_spans(view.response.regimens, window))
    figure.update_xaxes(range=list(window) if window else None, type="date", gridcolor=style.GRID)
    figure.update_annotations(
        font_size=11, selector={"yref": "paper", "showarrow": False, "xanchor": "center"}
    )
    spans = len(view.response.regimens)
    figure.update_layout(
        template="plotly_white",
        height=210 * rows + 110 + 14 * min(spans, 3),
        font={"color": style.INK},
        hovermode="closest",
        margin={"l": 50, "r": 20, "t": 80, "b": 50 + 14 * min(spans, 3)},
        title={"text": "Clinical scores", "x": 0, "font": {"size": 14}},
        legend={"orientation": "h", "yanchor": "bottom", "y": 1.0 + 40 / (210 * rows), "x": 0.2},
        meta={"patient": view.response.patient, "panels": list(panels["scale"])},
    )
    return figure


def outcome_strip(fu: FollowUp) -> go.Figure:
    """Per visit, the outcome of each criteria set: a word, a shape and a colour."""
    figure = go.Figure()
    outcomes = fu.outcomes
    groups = (
        outcomes.assign(group=[style.outcome_group(o)[0] for o in outcomes["outcome"]])
        if len(outcomes)
        else outcomes.assign(group=[])
    )
    for group_name, group in groups.groupby("group", sort=False):
        colour = style.OUTCOME_GROUPS[group_name][2]
        figure.add_trace(
            go.Scatter(
                x=list(group["visit_date"]),
                y=[criteria_title(c) for c in group["criteria"]],
                mode="markers+text",
                name=group_name,
                text=[outcome_label(o) for o in group["outcome"]],
                textposition="top center",
                textfont={"size": 10},
                marker={
                    "symbol": OUTCOME_SYMBOLS[group_name],
                    "size": 12,
                    "color": colour,
                    "line": {"width": 2, "color": colour},
                },
                hovertemplate="%{x|%Y-%m-%d} — %{y}: %{text}<extra></extra>",
                meta={"panel": "outcomes", "kind": "outcome"},
            )
        )
    window = time_range(fu)
    figure.update_xaxes(range=list(window) if window else None, type="date", gridcolor=style.GRID)
    figure.update_yaxes(
        categoryorder="array",
        categoryarray=[criteria_title(c) for c in sorted(set(outcomes["criteria"]), reverse=True)],
    )
    figure.update_layout(
        template="plotly_white",
        height=90 + 42 * max(1, outcomes["criteria"].nunique()),
        margin={"l": 270, "r": 20, "t": 40, "b": 30},
        title={"text": "Outcome of each criteria set per visit", "x": 0, "font": {"size": 14}},
        legend={"orientation": "h", "y": -0.3},
    )
    return figure


def outcome_share_figure(shares: pd.DataFrame) -> go.Figure:
    """Share of visits per outcome, one bar per criteria set (stacked by outcome group)."""
    figure = go.Figure()
    if shares.empty:
        figure.update_layout(title="No saved evaluations yet", template="plotly_white", height=200)
        return figure
    shares = shares.assign(group=[style.outcome_group(o)[0] for o in shares["outcome"]])
    patterns = {"positive": "/", "negative": "", "other finding": "x", "not evaluable": ".", "undecided": "-"}
    legend_shown: set[str] = set()
    # One trace per outcome value (each segment names its outcome), coloured and patterned by group.
    for (group_name, outcome_value), group in shares.groupby(["group", "outcome"], sort=True):
        word = outcome_label(outcome_value)
        figure.add_trace(
            go.Bar(
                y=[criteria_title(c) for c in group["criteria"]],
                x=[float(v) for v in group["share_pct"]],
                orientation="h",
                name=group_name,
                legendgroup=group_name,
                showlegend=group_name not in legend_shown,
                text=[word] * len(group),
                textposition="inside",
                insidetextanchor="middle",
                textfont={"color": "white", "size": 11},
                marker={
                    "color": style.OUTCOME_GROUPS[group_name][2],
                    "pattern": {"shape": patterns[group_name]},
                    "line": {"color": "white", "width": 1},
                },
                customdata=list(group["visits"]),
                hovertemplate="%{y}: " + word + " %{x:.1f} % (%{customdata} visits)<extra></extra>",
                meta={
                    "panel": "cohort",
                    "kind": "share",
                    "outcome": str(outcome_value),
                    "criteria": list(group["criteria"]),
                },
            )
        )
        legend_shown.add(group_name)
    figure.update_layout(
        barmode="stack",
        template="plotly_white",
        height=120 + 40 * shares["criteria"].nunique(),
        xaxis_title="% of visits",
        margin={"l": 270, "r": 20, "t": 30, "b": 40},
    )
    return figure
