"""Plotly figures as pure functions of service results (testable without Streamlit).

Every trace carries ``meta = {"panel": …, "kind": …}`` (kind: ``measured``, ``normal limit``,
``criteria threshold``, ``score``, ``outcome``) so that tests and readers can find what a line stands for.
"""

from __future__ import annotations

import datetime as dt
import math

import pandas as pd
import plotly.graph_objects as go
from plotly.subplots import make_subplots

from tracker.dashboard import style
from tracker.services.follow_up import FollowUp

COMPARATOR_WORDS = {"le": "≤", "lt": "<", "ge": "≥", "gt": ">"}
OUTCOME_SYMBOLS = {"positive": "triangle-up", "other finding": "diamond", "negative": "circle-open", "not evaluable": "square-open"}


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


def trend_figure(fu: FollowUp, *, columns: int = 2) -> go.Figure:
    """Small multiples, one panel per nerve and side: the chosen parameter over visit dates, with the normal
    limit (dashed) and the chosen criteria set's threshold (dotted) drawn on every panel, and treatment
    periods shaded across all panels."""
    points, references = fu.points, fu.references
    panels = sorted(set(points["panel"]) | set(references["panel"]))
    unit = fu.parameter.unit
    if not panels:
        figure = go.Figure()
        figure.update_layout(title=f"No {fu.parameter.label.lower()} recorded for {fu.patient}", template="plotly_white", height=240)
        return figure
    columns = max(1, min(columns, len(panels)))
    rows = math.ceil(len(panels) / columns)
    figure = make_subplots(
        rows=rows, cols=columns, subplot_titles=[p.capitalize() for p in panels], shared_xaxes="all",
        vertical_spacing=min(0.12, 0.5 / rows), horizontal_spacing=0.07,
    )
    series_colour: dict[str, str] = {}
    shown_in_legend: set[str] = set()
    for index, panel in enumerate(panels):
        row, col = index // columns + 1, index % columns + 1
        for series, group in points[points["panel"] == panel].groupby("series", sort=True):
            colour = series_colour.setdefault(series, style.SERIES[len(series_colour) % len(style.SERIES)])
            group = group.sort_values("visit_date")
            plotted = group[group["value"].notna()]
            custom = [
                [d.isoformat(), f"{v:.2f}", unit, _temperature_text(r), series, r.note or ""]
                for d, v, r in zip(plotted["visit_date"], plotted["value"], plotted.itertuples())
            ]
            figure.add_trace(
                go.Scatter(
                    x=list(plotted["visit_date"]), y=[float(v) for v in plotted["value"]], mode="lines+markers", name=str(series),
                    legendgroup=str(series), showlegend=series not in shown_in_legend,
                    line={"color": colour, "width": 2},
                    marker={"size": 9, "color": colour, "symbol": ["circle-open-dot" if c else "circle" for c in plotted["cold"]], "line": {"width": 2, "color": colour}},
                    customdata=custom,
                    hovertemplate="<b>%{customdata[0]}</b><br>%{customdata[4]}: %{customdata[1]} %{customdata[2]}<br>%{customdata[3]}<extra>" + panel + "</extra>",
                    meta={"panel": panel, "kind": "measured", "series": str(series)},
                ),
                row=row, col=col,
            )
            shown_in_legend.add(series)
        for kind, dash, colour in (("normal limit", "dash", style.LIMIT_COLOUR), ("criteria threshold", "dot", style.THRESHOLD_COLOUR)):
            lines = references[(references["panel"] == panel) & (references["kind"] == kind)].sort_values("visit_date")
            if lines.empty:
                continue
            first = lines.iloc[0]
            name = (
                f"{first['label']} (normal limit)" if kind == "normal limit"
                else f"{fu.criteria}: {COMPARATOR_WORDS.get(first['comparator'], '')} {first['label']}".strip()
            )
            x, y = list(lines["visit_date"]), [float(v) for v in lines["value"]]
            if len(x) == 1:  # one visit: draw the line a little either side so it is visible
                x, y = [x[0] - dt.timedelta(days=20), x[0] + dt.timedelta(days=20)], y * 2
            figure.add_trace(
                go.Scatter(
                    x=x, y=y, mode="lines", line={"color": colour, "dash": dash, "width": 1.6, "shape": "hv"}, name=name,
                    legendgroup=kind, showlegend=kind not in shown_in_legend,
                    hovertemplate=f"{name}: %{{y:.2f}} {unit}<extra>{panel}</extra>",
                    meta={"panel": panel, "kind": kind},
                ),
                row=row, col=col,
            )
            shown_in_legend.add(kind)
        figure.update_yaxes(title_text=unit, row=row, col=col, gridcolor=style.GRID)
    _shade_treatments(figure, fu)
    window = time_range(fu)
    figure.update_xaxes(range=list(window) if window else None, gridcolor=style.GRID, type="date")
    treatments = len(fu.treatments)
    figure.update_layout(
        template="plotly_white", height=250 * rows + 120 + 14 * min(treatments, 3), font={"color": style.INK}, hovermode="closest",
        margin={"l": 50, "r": 20, "t": 90, "b": 50 + 14 * min(treatments, 3)},
        legend={"orientation": "h", "yanchor": "bottom", "y": 1.0 + 60 / (250 * rows), "x": 0},
        meta={"patient": fu.patient, "parameter": fu.parameter.key, "criteria": fu.criteria},
    )
    return figure


def _shade_treatments(figure: go.Figure, fu: FollowUp) -> None:
    if fu.treatments.empty:
        return
    window = time_range(fu)
    for number, t in enumerate(fu.treatments.itertuples()):
        end = t.end_date if t.end_date is not None and not pd.isna(t.end_date) else (window[1] if window else t.start_date)
        if end == t.start_date:
            end = t.start_date + dt.timedelta(days=1)
        figure.add_vrect(
            x0=t.start_date, x1=end, fillcolor=style.TREATMENT_FILL, line_width=0, layer="below", row="all", col="all",
        )
        # The label once, under the bottom axis, staggered so that close starts do not overlap.
        figure.add_annotation(
            x=t.start_date, y=0, xref="x", yref="paper", text=f"▸ {t.label}", showarrow=False, xanchor="left", yanchor="top",
            font={"size": 10, "color": style.ACCENT}, yshift=-24 - 13 * (number % 3),
        )


def scores_figure(fu: FollowUp) -> go.Figure:
    """Clinical scores over time on the same time axis as the trends (one line per scale)."""
    figure = go.Figure()
    for scale, group in fu.scores.groupby("scale", sort=True):
        figure.add_trace(
            go.Scatter(
                x=list(group["score_date"]), y=[float(v) for v in group["value"]], mode="lines+markers", name=str(scale),
                hovertemplate="%{x|%Y-%m-%d}: %{y}<extra>" + str(scale) + "</extra>", meta={"panel": "scores", "kind": "score", "scale": str(scale)},
            )
        )
    window = time_range(fu)
    figure.update_xaxes(range=list(window) if window else None, type="date", gridcolor=style.GRID)
    figure.update_layout(
        template="plotly_white", height=260, margin={"l": 50, "r": 20, "t": 40, "b": 30}, title={"text": "Clinical scores", "x": 0, "font": {"size": 14}},
        legend={"orientation": "h", "y": -0.25},
    )
    return figure


def outcome_strip(fu: FollowUp) -> go.Figure:
    """Per visit, the outcome of each criteria set: a word, a shape and a colour."""
    figure = go.Figure()
    outcomes = fu.outcomes
    groups = outcomes.assign(group=[style.outcome_group(o)[0] for o in outcomes["outcome"]]) if len(outcomes) else outcomes.assign(group=[])
    for group_name, group in groups.groupby("group", sort=False):
        colour = style.OUTCOME_GROUPS[group_name][2]
        figure.add_trace(
            go.Scatter(
                x=list(group["visit_date"]), y=list(group["criteria"]), mode="markers+text", name=group_name,
                text=[o.replace("_", " ") for o in group["outcome"]], textposition="top center", textfont={"size": 10},
                marker={"symbol": OUTCOME_SYMBOLS[group_name], "size": 12, "color": colour, "line": {"width": 2, "color": colour}},
                hovertemplate="%{x|%Y-%m-%d} — %{y}: %{text}<extra></extra>", meta={"panel": "outcomes", "kind": "outcome"},
            )
        )
    window = time_range(fu)
    figure.update_xaxes(range=list(window) if window else None, type="date", gridcolor=style.GRID)
    figure.update_yaxes(categoryorder="array", categoryarray=sorted(set(outcomes["criteria"]), reverse=True))
    figure.update_layout(
        template="plotly_white", height=90 + 42 * max(1, outcomes["criteria"].nunique()), margin={"l": 150, "r": 20, "t": 40, "b": 30},
        title={"text": "Outcome of each criteria set per visit", "x": 0, "font": {"size": 14}}, legend={"orientation": "h", "y": -0.3},
    )
    return figure


def outcome_share_figure(shares: pd.DataFrame) -> go.Figure:
    """Share of visits per outcome, one bar per criteria set (stacked by outcome group)."""
    figure = go.Figure()
    if shares.empty:
        figure.update_layout(title="No saved evaluations yet", template="plotly_white", height=200)
        return figure
    shares = shares.assign(group=[style.outcome_group(o)[0] for o in shares["outcome"]])
    patterns = {"positive": "/", "negative": "", "other finding": "x", "not evaluable": "."}
    legend_shown: set[str] = set()
    # One trace per outcome value (each segment names its outcome), coloured and patterned by group.
    for (group_name, outcome_value), group in shares.groupby(["group", "outcome"], sort=True):
        word = str(outcome_value).replace("_", " ")
        figure.add_trace(
            go.Bar(
                y=list(group["criteria"]), x=[float(v) for v in group["share_pct"]], orientation="h", name=group_name,
                legendgroup=group_name, showlegend=group_name not in legend_shown, text=[word] * len(group), textposition="inside",
                insidetextanchor="middle", textfont={"color": "white", "size": 11},
                marker={"color": style.OUTCOME_GROUPS[group_name][2], "pattern": {"shape": patterns[group_name]}, "line": {"color": "white", "width": 1}},
                customdata=list(group["visits"]), hovertemplate="%{y}: " + word + " %{x:.1f} % (%{customdata} visits)<extra></extra>",
                meta={"panel": "cohort", "kind": "share", "outcome": str(outcome_value)},
            )
        )
        legend_shown.add(group_name)
    figure.update_layout(barmode="stack", template="plotly_white", height=120 + 40 * shares["criteria"].nunique(), xaxis_title="% of visits", margin={"l": 160, "r": 20, "t": 30, "b": 40})
    return figure
