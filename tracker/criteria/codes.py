"""Small integer codes for the distinct values of a column, the building block of work done once per distinct
value (:func:`tracker.criteria.rules.per_distinct`, the threshold and limit lookups)."""

from __future__ import annotations

import numpy as np
import pandas as pd

try:  # Python-object hash table (pandas internals, present in pandas 2.2 and 3): see codes_of()
    from pandas._libs.hashtable import PyObjectHashTable as _ObjectTable
except ImportError:  # pragma: no cover - a pandas without it takes the public path
    _ObjectTable = None


def codes_of(values: np.ndarray) -> tuple[np.ndarray, int]:
    """Small integer codes telling apart the distinct values of ``values`` (missing values share one code),
    and how many codes there are. Float values are told apart by their bits (``-0.0`` apart from ``0.0``).

    Text columns go through Python's own hash and equality (a hash is computed once per string object and
    kept; the same object is equal at once): pandas' factorize hashes every character of every row again,
    which for the long citation texts of a cohort costs more than the rules themselves."""
    if values.dtype.kind == "f":
        values = values.astype(np.float64).view(np.int64)
    elif values.dtype == object and _ObjectTable is not None:
        try:
            uniques, codes = _ObjectTable(max(16, min(len(values), 1024))).factorize(values, na_sentinel=-1)
        except (TypeError, ValueError):  # a private pandas interface that changed: the public path below
            pass
        else:
            codes = np.asarray(codes, dtype=np.int64)
            codes[codes < 0] = len(uniques)  # every missing value (None, NaN, pd.NA) as one more value
            return codes, len(uniques) + 1
    codes, uniques = pd.factorize(values, use_na_sentinel=False)
    return np.asarray(codes, dtype=np.int64), len(uniques)


def distinct(*columns: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``(codes, first)``: per row, the code of its combination of values across ``columns`` (equal-length
    arrays), counting up in order of first appearance; and per code, the row where it first appears."""
    n = len(columns[0]) if columns else 0
    combined = np.zeros(n, dtype=np.int64)
    for values in columns:
        codes, count = codes_of(values)
        # Keep the combined codes small: renumber (by first appearance) after each column.
        combined, _ = pd.factorize(combined * count + codes)
    # Codes count up in order of first appearance, so a code first appears where the running maximum grows.
    first = (
        np.flatnonzero(np.r_[True, combined[1:] > np.maximum.accumulate(combined)[:-1]])
        if n
        else np.zeros(0, dtype=np.int64)
    )
    return combined, first
