"""Slope per year with its 95 % confidence interval (ordinary least squares, :func:`scipy.stats.linregress`).

Time is in years of 365.25 days from the first point; fewer than 3 points (or all on one day) give no slope.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import numpy as np
from scipy import stats

MIN_POINTS = 3
DAYS_PER_YEAR = 365.25


@dataclass(frozen=True)
class Trend:
    """``slope`` and its 95 % CI (``low``, ``high``) in units per year; None with ``reason`` when not computed."""

    points: int
    first: dt.date | None
    last: dt.date | None
    slope: float | None
    low: float | None
    high: float | None
    reason: str = ""


def slope_per_year(dates: list[dt.date], values: list[float]) -> Trend:
    pairs = sorted((d, float(v)) for d, v in zip(dates, values) if v is not None and v == v)
    n = len(pairs)
    first, last = (pairs[0][0], pairs[-1][0]) if pairs else (None, None)
    if n < MIN_POINTS:
        return Trend(n, first, last, None, None, None, f"fewer than {MIN_POINTS} points ({n}): no slope")
    x = np.array([(d - pairs[0][0]).days / DAYS_PER_YEAR for d, _ in pairs])
    y = np.array([v for _, v in pairs])
    if np.ptp(x) == 0:
        return Trend(n, first, last, None, None, None, "all points on one day: no slope")
    fit = stats.linregress(x, y)
    half = float(stats.t.ppf(0.975, n - 2) * fit.stderr)
    return Trend(n, first, last, float(fit.slope), float(fit.slope) - half, float(fit.slope) + half)
