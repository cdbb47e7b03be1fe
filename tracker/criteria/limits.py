"""Normal limits: the shipped default set, and choosing the stratum that fits a visit.

A limit row applies to a nerve, modality and parameter, optionally only within an age band (years, lower
bound inclusive, upper exclusive), a height band (cm, same convention) and a sex. For each nerve test the
engine takes, per parameter and bound, the applicable row with the most stratum conditions; two applicable
rows equally specific are an error of the limit set (refused at import).
"""

from __future__ import annotations

import csv
from functools import cache
from importlib import resources

import numpy as np
import pandas as pd

from tracker.criteria.citations import source_text
from tracker.criteria.codes import distinct

LIMIT_COLUMNS = [
    "nerve",
    "modality",
    "parameter",
    "bound",
    "value",
    "age_min",
    "age_max",
    "height_min_cm",
    "height_max_cm",
    "sex",
    "source",
    "status",
]
DEFAULT_NAME = "default"
# Bump with every change to reference/limits_default.csv: saved evaluations name the set and its version, and
# the evaluation fingerprint includes it, so saved evaluations are recomputed with the new set.
# 2: minimal F-wave latency limits by height band (Buschbacher 1999 F-wave series, values from memory).
DEFAULT_VERSION = 2
DEFAULT_DESCRIPTION = (
    "Shipped adult limits, Preston & Shapiro appendix, with F-wave limits by height band "
    "(each row marked verified or from memory)"
)
# (parameter, bound) → the column name the criteria use.
LIMIT_FIELDS = {
    ("distal_latency_ms", "uln"): "uln_distal_latency_ms",
    ("amplitude", "lln"): "lln_amplitude",
    ("cv_ms", "lln"): "lln_cv",
    ("f_latency_ms", "uln"): "uln_f_latency_ms",
    ("peak_latency_ms", "uln"): "uln_peak_latency_ms",
    ("distal_duration_ms", "uln"): "uln_distal_duration_ms",
}


@cache
def default_limits() -> pd.DataFrame:
    """The shipped default limit rows (``tracker/reference/limits_default.csv``).

    Each row names its publication by key (``citation``, see :mod:`tracker.criteria.citations`) with a short
    ``note``; the returned ``source`` is the full citation text with that note, as traces show it.
    """
    text = resources.files("tracker.reference").joinpath("limits_default.csv").read_text(encoding="utf-8")
    rows = list(csv.DictReader(text.splitlines(), strict=True))
    for row in rows:
        if None in row or None in row.values():
            raise ValueError(f"limits_default.csv: a row has the wrong number of fields: {row}")
        row["source"] = source_text(row.pop("citation"), row.pop("note"))
    return normalise(pd.DataFrame(rows))


def normalise(frame: pd.DataFrame) -> pd.DataFrame:
    """Typed limit rows with every column of ``LIMIT_COLUMNS`` (empty strata as NaN / None)."""
    frame = frame.copy()
    for column in LIMIT_COLUMNS:
        if column not in frame:
            frame[column] = None
    for column in ("value", "age_min", "age_max", "height_min_cm", "height_max_cm"):
        frame[column] = pd.to_numeric(frame[column].replace("", None), errors="coerce").astype(float)
    for column in ("sex", "source", "status"):
        frame[column] = frame[column].replace("", None).astype(object)
    return frame[LIMIT_COLUMNS].reset_index(drop=True)


def overlapping_strata(frame: pd.DataFrame) -> list[tuple[int, int]]:
    """Pairs of row positions that could both apply to one person with the same specificity."""
    pairs = []
    limits = normalise(frame)
    for _, group in limits.groupby(["nerve", "modality", "parameter", "bound"], sort=False):
        rows = list(group.itertuples())
        for i, a in enumerate(rows):
            for b in rows[i + 1 :]:
                if _specificity(a) == _specificity(b) and _bands_overlap(a, b):
                    pairs.append((a.Index, b.Index))
    return pairs


def _specificity(row) -> int:
    return sum(
        not _missing(v) for v in (row.age_min, row.age_max, row.height_min_cm, row.height_max_cm, row.sex)
    )


def _missing(value) -> bool:
    return value is None or (isinstance(value, float) and np.isnan(value))


def _bands_overlap(a, b) -> bool:
    def overlap(lo1, hi1, lo2, hi2) -> bool:
        lo1 = -np.inf if _missing(lo1) else lo1
        lo2 = -np.inf if _missing(lo2) else lo2
        hi1 = np.inf if _missing(hi1) else hi1
        hi2 = np.inf if _missing(hi2) else hi2
        return lo1 < hi2 and lo2 < hi1

    sexes_overlap = _missing(a.sex) or _missing(b.sex) or a.sex == b.sex
    return (
        overlap(a.age_min, a.age_max, b.age_min, b.age_max)
        and overlap(a.height_min_cm, a.height_max_cm, b.height_min_cm, b.height_max_cm)
        and sexes_overlap
    )


def attach_limits(nerves: pd.DataFrame, limits: pd.DataFrame) -> pd.DataFrame:
    """Add one column per limit (``LIMIT_FIELDS``) and ``limit_sources`` / ``limit_strata`` to ``nerves``.

    ``nerves`` needs ``nerve``, ``modality``, ``age_years``, ``height_cm``, ``sex``. A stratum condition on a
    value the visit lacks (unknown age, say) does not apply; the unconditioned row does.
    """
    limits = normalise(limits)
    # Described once per limit row (a handful), not once per nerve test.
    strata = [_describe_stratum(row) for row in limits.rename(columns={"sex": "sex_limit"}).itertuples()]
    n = len(nerves)
    # Which (nerve, modality) each nerve test has, as small integer codes the limit rows can be matched on.
    # (Codes of plain object columns: a MultiIndex of them would first turn each into a string column.)
    nerve_names = nerves["nerve"].to_numpy(dtype=object)
    modalities = nerves["modality"].to_numpy(dtype=object)
    pair_codes, first = distinct(nerve_names, modalities)
    pair_code = {(nerve_names[row], modalities[row]): code for code, row in enumerate(first)}
    age = nerves["age_years"].to_numpy(dtype=float)
    height = nerves["height_cm"].to_numpy(dtype=float)
    sex_codes, sex_values = pd.factorize(
        nerves["sex"].to_numpy(dtype=object)
    )  # unknown sex: -1, matches no row
    sex_code = {value: code for code, value in enumerate(sex_values)}

    def within(values: np.ndarray, low: float, high: float) -> np.ndarray | bool:
        ok = True
        with np.errstate(invalid="ignore"):
            if not _missing(low):
                ok = ok & (values >= low)
            if not _missing(high):
                ok = ok & (values < high)
        return ok

    result = nerves.copy()
    for (parameter, bound), column in LIMIT_FIELDS.items():
        # Per nerve test, the applicable row with the most stratum conditions; among equally specific rows
        # the later one in the limit set (refused at import anyway).
        chosen = np.full(n, -1, dtype=np.int64)
        best = np.full(n, -1, dtype=np.int64)
        for position, row in enumerate(limits.itertuples(index=False)):
            if row.parameter != parameter or row.bound != bound or (row.nerve, row.modality) not in pair_code:
                continue
            applies = pair_codes == pair_code[(row.nerve, row.modality)]
            applies = (
                applies
                & within(age, row.age_min, row.age_max)
                & within(height, row.height_min_cm, row.height_max_cm)
            )
            if not _missing(row.sex):
                applies = applies & (sex_codes == sex_code.get(row.sex, -2))
            specificity = sum(
                not _missing(v)
                for v in (row.age_min, row.age_max, row.height_min_cm, row.height_max_cm, row.sex)
            )
            take = applies & (specificity >= best)
            chosen[take] = position
            best[take] = specificity
        found = chosen >= 0
        value = np.full(n, np.nan)
        value[found] = limits["value"].to_numpy(dtype=float)[chosen[found]]
        result[column] = pd.Series(value, index=result.index)
        for suffix, values in (
            ("source", limits["source"]),
            ("status", limits["status"]),
            ("stratum", strata),
        ):
            text = np.full(n, np.nan, dtype=object)
            text[found] = np.asarray(values, dtype=object)[chosen[found]]
            result[f"{column}_{suffix}"] = pd.Series(text, index=result.index, dtype=object)
    return result


def _band(name: str, low, high, unit: str) -> str:
    """``"height 160–170 cm"``, ``"height below 160 cm"``, ``"height 180 cm or more"`` (lower bound
    inclusive)."""
    if _missing(low):
        return f"{name} below {high:g} {unit}"
    if _missing(high):
        return f"{name} {low:g} {unit} or more"
    return f"{name} {low:g}–{high:g} {unit}"


def _describe_stratum(row) -> str:
    parts = []
    if not (_missing(row.age_min) and _missing(row.age_max)):
        parts.append(_band("age", row.age_min, row.age_max, "y"))
    if not (_missing(row.height_min_cm) and _missing(row.height_max_cm)):
        parts.append(_band("height", row.height_min_cm, row.height_max_cm, "cm"))
    if not _missing(row.sex_limit):
        parts.append(str(row.sex_limit))
    return ", ".join(parts) or "all adults"
