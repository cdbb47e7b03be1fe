"""Slope per year with its 95 % confidence interval (ordinary least squares).

Time is in years of 365.25 days from the first point; fewer than 3 points (or all on one day) give no slope.
The interval is slope ± t(0.975, n − 2) × standard error, the Student t quantile from SciPy
(:func:`scipy.special.stdtrit`, imported when first needed: ``scipy.stats`` costs most of a second to import
on every command); tests compare the result with :func:`scipy.stats.linregress`.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass

import numpy as np

MIN_POINTS = 3
DAYS_PER_YEAR = 365.25


@dataclass(frozen=True)
class Trend:
    """``slope`` and its 95 % CI (``low``, ``high``) in units per year; None
    with ``reason`` when not computed."""

    points: int
    first: dt.date | None
    last: dt.date | None
    slope: float | None
    low: float | None
    high: float | None
    reason: str = ""


def slope_per_year(dates: list[dt.date], values: list[float]) -> Trend:
    from scipy.special import stdtrit

    pairs = sorted((d, float(v)) for d, v in zip(dates, values) if v is not None and v == v)
    n = len(pairs)
    first, last = (pairs[0][0], pairs[-1][0]) if pairs else (None, None)
    if n < MIN_POINTS:
        return Trend(n, first, last, None, None, None, f"fewer than {MIN_POINTS} points ({n}): no slope")
    x = np.array([(d - pairs[0][0]).days / DAYS_PER_YEAR for d, _ in pairs])
    y = np.array([v for _, v in pairs])
    sxx = float(((x - x.mean()) ** 2).sum())
    if sxx == 0:
        return Trend(n, first, last, None, None, None, "all points on one day: no slope")
    slope = float(((x - x.mean()) * (y - y.mean())).sum() / sxx)
    residuals = y - (y.mean() + slope * (x - x.mean()))
    stderr = math.sqrt(float((residuals**2).sum()) / (n - 2) / sxx)
    half = float(stdtrit(n - 2, 0.975)) * stderr
    return Trend(n, first, last, slope, slope - half, slope + half)
