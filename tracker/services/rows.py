"""Small helpers for moving rows between pandas and the database driver."""

from __future__ import annotations

import math
from collections.abc import Iterable
from typing import Any

import pandas as pd

CHUNK = 500  # keys per IN (...) list: well under every backend's parameter limit


def chunks(values: list[Any], size: int = CHUNK) -> Iterable[list[Any]]:
    for start in range(0, len(values), size):
        yield values[start : start + size]


def clean(value: Any) -> Any:
    """NaN → None; numpy scalars → Python scalars (for the database driver)."""
    if value is None:
        return None
    if isinstance(value, float) and math.isnan(value):
        return None
    if hasattr(value, "item"):
        value = value.item()
        if isinstance(value, float) and math.isnan(value):
            return None
    if value is pd.NaT:
        return None
    return value
