"""Tables for reviewing one visit: its measurements, derived segments and the criteria trace."""

from __future__ import annotations

import pandas as pd

from tracker.criteria.thresholds import COMPARATORS
from tracker.domain.plausibility import ranges
from tracker.services.records import VisitRecord

STATUS_WORDS = {
    "met": "▲ met",
    "not_met": "○ not met",
    "not_evaluable": "? not evaluable",
    "not_applicable": "– not applicable",
}


def measurement_tables(visit: VisitRecord) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(sites, segments) of one visit: one row per stimulation site; one row per derived segment."""
    sites, segments = [], []
    for nerve in visit.nerves:
        name = f"{nerve.nerve} {nerve.side} ({nerve.modality})"
        unit = "mV" if nerve.modality == "motor" else "µV"
        for s in nerve.sites:
            sites.append(
                {
                    "nerve": name,
                    "site": f"{s.order} {s.label or ''}".strip(),
                    "distance_mm": s.distance_mm,
                    "latency_ms": s.latency_ms,
                    "amplitude": s.amplitude,
                    "unit": unit,
                    "duration_ms": s.duration_ms,
                    "area_mVms": s.area_mvms,
                    "temperature_c": nerve.temperature_c,
                    "f_latency_ms": "absent"
                    if nerve.f_absent
                    else ("" if nerve.f_latency_ms is None else f"{nerve.f_latency_ms:g}"),
                }
            )
        for g in nerve.summary.segments:
            segments.append(
                {
                    "nerve": name,
                    "segment": g.name,
                    "distance_mm": g.distance_mm,
                    "velocity_m_s": g.velocity_m_per_s,
                    "amplitude_reduction_pct": g.amplitude_reduction_pct,
                    "area_reduction_pct": g.area_reduction_pct,
                    "duration_increase_pct": g.duration_increase_pct,
                }
            )
        if nerve.summary.sensory_velocity_m_per_s is not None:
            segments.append(
                {
                    "nerve": name,
                    "segment": "stimulation → recording",
                    "velocity_m_s": nerve.summary.sensory_velocity_m_per_s,
                }
            )
    return pd.DataFrame(sites), pd.DataFrame(segments)


def _number(value) -> str:
    return "" if value is None or pd.isna(value) else f"{value:.2f}"


def trace_table(findings: pd.DataFrame) -> pd.DataFrame:
    """The criteria trace in words: nerve, item, parameter, value, normal limit, threshold, status, source."""
    rows = []
    for f in findings.itertuples():
        memory = f.source_status != "verified" or f.limit_status == "memory"
        limit = (
            f"{f.limit_name} ({_number(f.limit)})"
            if isinstance(f.limit_name, str) and f.limit_name and not pd.isna(f.limit)
            else (f.limit_name or "—")
        )
        rows.append(
            {
                "nerve": f"{f.nerve} {f.side} ({f.modality})",
                "item": f.item,
                "parameter": f.parameter
                + (f" [{f.segment}]" if isinstance(f.segment, str) and f.segment else ""),
                "value": f"{_number(f.value)} {f.unit}".strip() if not pd.isna(f.value) else "—",
                "normal limit": limit if isinstance(limit, str) else "—",
                "threshold": (
                    f"{COMPARATORS.get(f.comparator, '') if isinstance(f.comparator, str) else ''} "
                    f"{_number(f.threshold)} {f.unit}"
                ).strip(),
                "status": STATUS_WORDS.get(f.status, f.status)
                + (f" — {f.reason}" if isinstance(f.reason, str) and f.reason else ""),
                "source": ("* " if memory else "")
                + (f.source if isinstance(f.source, str) else "")
                + (
                    f" | limit: {f.limit_source}"
                    if isinstance(f.limit_source, str) and f.limit_source
                    else ""
                ),
            }
        )
    return pd.DataFrame(
        rows, columns=["nerve", "item", "parameter", "value", "normal limit", "threshold", "status", "source"]
    )


def unusual_values(visit: VisitRecord) -> list[str]:
    """Stored values outside the plausibility ranges that an import may waive (``--allow-unusual``): they
    were accepted on purpose, and a reviewer should know."""
    limits = ranges()
    messages = []
    for nerve in visit.nerves:
        name = f"{nerve.nerve} {nerve.side} {nerve.modality}"
        checks = [
            ("motor_velocity_m_per_s", g.name, g.velocity_m_per_s)
            for g in nerve.summary.segments
            if nerve.modality == "motor"
        ]
        if nerve.summary.sensory_velocity_m_per_s is not None:
            checks.append(
                (
                    "sensory_velocity_m_per_s",
                    "stimulation → recording",
                    nerve.summary.sensory_velocity_m_per_s,
                )
            )
        for quantity, where, value in checks:
            rule = limits[quantity]
            if value is not None and rule.outside([value])[0]:
                messages.append(
                    f"{name} {where}: {value:.1f} m/s is outside {rule.describe()} — accepted as an unusual "
                    "value at import; check distance and latency"
                )
    return messages
