"""From stored measurements to the per-nerve and per-path values the criteria compare.

Input frames (plain pandas, built by the service layer or by tests):

- ``visits``: ``visit_key``, ``age_years``, ``height_cm``, ``sex``, ``phenotype``.
- ``tests``: ``visit_key``, ``test_key``, ``nerve``, ``side``, ``modality``, ``temperature_c``, ``lff_hz``,
  ``f_latency_ms``, ``f_absent``, ``wrist_entrapment``.
- ``sites``: ``test_key``, ``site_order``, ``label``, ``distance_mm``, ``latency_ms``, ``peak_latency_ms``,
  ``amplitude`` (mV motor, µV sensory), ``duration_ms``, ``area_mvms``.

Outputs: ``nerves`` (one row per nerve test, with its normal limits attached) and ``paths`` (one row per
motor nerve test and proximal site: the change from the distal site, and the segment just below the site).
All arithmetic follows :mod:`tracker.domain.conduction` (the quantised comparison rule).
"""

from __future__ import annotations

import csv
from functools import cache
from importlib import resources

import numpy as np
import pandas as pd

from tracker.criteria import rules
from tracker.criteria.codes import distinct
from tracker.criteria.limits import attach_limits
from tracker.domain.catalogue import nerves as nerve_catalogue
from tracker.domain.conduction import quantise_array

PATH_COLUMNS = [
    "visit_key",
    "test_key",
    "nerve",
    "side",
    "limb",
    "site_order",
    "label",
    "distance_mm",
    "distal_amplitude",
    "amplitude_reduction_pct",
    "area_reduction_pct",
    "duration_increase_pct",
    "segment_distal_amplitude",
    "segment_amplitude_reduction_pct",
    "segment_area_reduction_pct",
    "segment_duration_increase_pct",
    "segment_velocity",
    "segment_kind",
    "long_segment",
    "segment",
    "path_outside_entrapment",
    "path_standard",
    "path",
]


@cache
def segment_kinds() -> dict[tuple[str, str, str], tuple[str, bool]]:
    """(nerve, distal site, proximal site) → (kind, long segment)."""
    text = resources.files("tracker.reference").joinpath("segments.csv").read_text(encoding="utf-8")
    return {
        (r["nerve"], r["distal_site"], r["proximal_site"]): (r["kind"], r["long_segment"] == "yes")
        for r in csv.DictReader(text.splitlines())
    }


@cache
def temperature_minimums() -> dict[str, tuple[float, str, str]]:
    """limb → (minimum °C, status, source)."""
    text = resources.files("tracker.criteria.tables").joinpath("temperature.csv").read_text(encoding="utf-8")
    return {
        r["limb"]: (float(r["minimum_c"]), r["status"], r["source"])
        for r in csv.DictReader(text.splitlines())
    }


def _pct_change(numerator: np.ndarray, denominator: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        result = np.where(denominator > 0, numerator / denominator * 100.0, np.nan)
    return quantise_array(result)


def build(
    visits: pd.DataFrame, tests: pd.DataFrame, sites: pd.DataFrame, limits: pd.DataFrame
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Return ``(nerves, paths)``; see the module docstring."""
    # Word columns become plain objects first, so that nothing below converts them back and forth.
    visits = _plain_text(visits[["visit_key", "age_years", "height_cm", "sex"]].copy(deep=False))
    tests = _plain_text(tests.copy(deep=False))
    sites = _plain_text(sites.sort_values(["test_key", "site_order"], kind="stable").reset_index(drop=True))
    first = sites.drop_duplicates("test_key", keep="first").set_index("test_key")
    nerves = tests.merge(visits, on="visit_key", how="left")
    catalogue = nerve_catalogue()
    nerve = nerves["nerve"].to_numpy(dtype=object)
    limbs = {n: info.limb for n, info in catalogue.items()}
    limb = rules.per_distinct(
        lambda name: limbs.get(name, np.nan) if isinstance(name, str) else np.nan, nerve
    )
    nerves["limb"] = _text(limb, nerves.index)
    distal = first.reindex(nerves["test_key"])
    nerves["distal_latency_ms"] = distal["latency_ms"].to_numpy(dtype=float)
    nerves["distal_amplitude"] = distal["amplitude"].to_numpy(dtype=float)
    nerves["distal_duration_ms"] = distal["duration_ms"].to_numpy(dtype=float)
    nerves["distal_label"] = _text(distal["label"].to_numpy(dtype=object), nerves.index)
    nerves["peak_latency_ms"] = distal["peak_latency_ms"].to_numpy(dtype=float)
    nerves["no_response"] = (nerves["distal_amplitude"] == 0) & nerves["distal_latency_ms"].isna()
    with np.errstate(invalid="ignore", divide="ignore"):
        sensory_cv = distal["distance_mm"].to_numpy(dtype=float) / distal["latency_ms"].to_numpy(dtype=float)
    nerves["sensory_cv"] = np.where(
        nerves["modality"].to_numpy(dtype=object) == "sensory", quantise_array(sensory_cv), np.nan
    )
    nerves["f_absent"] = nerves["f_absent"].fillna(False).astype(bool)
    minimums = {limb_name: value[0] for limb_name, value in temperature_minimums().items()}
    minimum = rules.per_distinct(
        lambda name: minimums.get(name, np.nan) if isinstance(name, str) else np.nan, limb
    ).astype(float)
    nerves["temperature_minimum_c"] = minimum
    with np.errstate(invalid="ignore"):
        nerves["cold"] = nerves["temperature_c"].to_numpy(dtype=float) < minimum
    nerves = attach_limits(nerves, limits)

    paths = _paths(sites, nerves)
    cv = paths[paths["segment_velocity"].notna()]
    nerves = nerves.set_index("test_key", drop=False)
    for name, rows in (
        ("standard", cv[cv["segment_kind"] == "standard"]),
        ("outside_entrapment", cv[cv["segment_kind"].isin(["standard", "proximal"])]),
    ):
        slowest = rows.sort_values(["test_key", "segment_velocity"]).drop_duplicates("test_key")
        slowest = slowest.set_index("test_key")
        nerves[f"cv_{name}"] = slowest["segment_velocity"].reindex(nerves.index)
        nerves[f"cv_{name}_segment"] = slowest["segment"].reindex(nerves.index)
    return _plain_text(nerves.reset_index(drop=True)), _plain_text(paths)


def _text(values: np.ndarray, index: pd.Index) -> pd.Series:
    """A word column as plain objects (assigning a bare object array would
    make pandas infer a string type)."""
    return pd.Series(values, index=index, dtype=object)


TEXT_COLUMNS = (
    "nerve",
    "side",
    "modality",
    "limb",
    "label",
    "distal_label",
    "segment_kind",
    "segment",
    "path",
    "sex",
    "recording_site",
)


def _plain_text(frame: pd.DataFrame) -> pd.DataFrame:
    """Word columns as plain Python objects: Arrow-backed text columns are slow to index row by row, and
    the rules filter and gather these frames many times."""
    for column in frame.columns:
        if frame[column].dtype == object:
            continue  # already plain (the limit columns are built that way)
        if column in TEXT_COLUMNS or column.endswith(("_source", "_status", "_stratum", "_segment")):
            values = _shared(frame[column].to_numpy(dtype=object))
            frame[column] = pd.Series(values, index=frame.index, dtype=object)
    return frame


def _shared(values: np.ndarray) -> np.ndarray:
    """``values`` (an object array, edited in place) with every text replaced by the first equal text object.

    Text read from Arrow comes as a new object per row: the rules group and compare these columns many times,
    and with one object per distinct word its hash is computed once and equality is identity."""
    if not len(values):
        return values
    codes, first = distinct(values)
    is_text = np.array([type(values[row]) is str for row in first], dtype=bool)
    text = is_text[codes]
    values[text] = values[first[codes[text]]]
    return values


def _paths(sites: pd.DataFrame, nerves: pd.DataFrame) -> pd.DataFrame:
    """One row per motor nerve test and proximal site (site_order ≥ 2), sites sorted distal first."""
    motor_tests = nerves.loc[
        nerves["modality"] == "motor", ["test_key", "visit_key", "nerve", "side", "limb"]
    ]
    motor = sites.merge(motor_tests, on="test_key", how="inner").sort_values(
        ["test_key", "site_order"], kind="stable"
    )
    motor = motor.reset_index(drop=True)
    if motor.empty:
        return pd.DataFrame(columns=PATH_COLUMNS).astype(
            {"site_order": int, "path_outside_entrapment": bool, "path_standard": bool}
        )
    keys = motor["test_key"].to_numpy()
    same = keys[1:] == keys[:-1]
    previous = np.r_[False, same]
    index = np.flatnonzero(previous)
    # Rows are sorted by nerve test: the position of each row's first site, and per column the first
    # non-missing value of the nerve test (what a groupby "first" gives), found with array arithmetic.
    starts = np.flatnonzero(np.r_[True, ~same])
    group = np.cumsum(np.r_[True, ~same]) - 1

    def first_present(values: np.ndarray, present: np.ndarray) -> np.ndarray:
        candidates = np.where(present, np.arange(len(values)), len(values))
        earliest = np.minimum.reduceat(candidates, starts)[group]
        found = earliest < len(values)
        out = np.full(len(values), np.nan, dtype=values.dtype if values.dtype == object else float)
        out[found] = values[earliest[found]]
        return out

    def shifted(values: np.ndarray) -> np.ndarray:
        out = np.empty_like(values, dtype=object if values.dtype == object else float)
        out[0] = None if values.dtype == object else np.nan
        out[1:] = values[:-1]
        return out

    amplitude = motor["amplitude"].to_numpy(dtype=float)
    area = motor["area_mvms"].to_numpy(dtype=float)
    duration = motor["duration_ms"].to_numpy(dtype=float)
    latency = motor["latency_ms"].to_numpy(dtype=float)
    labels = motor["label"].to_numpy(dtype=object)
    base_amplitude, base_area, base_duration = (
        first_present(v, ~np.isnan(v))[index] for v in (amplitude, area, duration)
    )
    base_label = first_present(labels, pd.notna(labels))[index]
    prev_amplitude, prev_area, prev_duration, prev_latency = (
        shifted(v)[index] for v in (amplitude, area, duration, latency)
    )
    prev_label = shifted(labels)[index]

    paths = motor.loc[
        previous, ["visit_key", "test_key", "nerve", "side", "limb", "site_order", "label", "distance_mm"]
    ].copy()
    paths["distal_amplitude"] = base_amplitude
    # Change from the distal site (site 1) to this site.
    paths["amplitude_reduction_pct"] = _pct_change(base_amplitude - amplitude[index], base_amplitude)
    paths["area_reduction_pct"] = _pct_change(base_area - area[index], base_area)
    paths["duration_increase_pct"] = _pct_change(duration[index] - base_duration, base_duration)
    # The segment just below this site (previous site → this site).
    paths["segment_distal_amplitude"] = prev_amplitude
    paths["segment_amplitude_reduction_pct"] = _pct_change(prev_amplitude - amplitude[index], prev_amplitude)
    paths["segment_area_reduction_pct"] = _pct_change(prev_area - area[index], prev_area)
    paths["segment_duration_increase_pct"] = _pct_change(duration[index] - prev_duration, prev_duration)
    with np.errstate(invalid="ignore", divide="ignore"):
        difference = quantise_array(latency[index] - prev_latency)
        velocity = np.where(difference > 0, paths["distance_mm"].to_numpy(dtype=float) / difference, np.nan)
    paths["segment_velocity"] = quantise_array(velocity)
    nerve = paths["nerve"].to_numpy(dtype=object)
    high = paths["label"].to_numpy(dtype=object)
    order = paths["site_order"].to_numpy().astype(int)
    table = segment_kinds()

    def segment(name, low_label, high_label, site):
        # Unlabelled sites: the first segment is taken to be the standard forearm/leg segment.
        if pd.isna(low_label) or pd.isna(high_label):
            kind, long_segment = ("standard", True) if site == 2 else ("unknown", False)
        else:
            kind, long_segment = table.get((name, low_label, high_label), ("unknown", False))
        low_name = f"site {site - 1}" if pd.isna(low_label) else low_label
        high_name = f"site {site}" if pd.isna(high_label) else high_label
        return kind, bool(long_segment), f"{low_name} → {high_name}"

    # Labels, nerves and site numbers repeat across a cohort: each combination is described once.
    described = rules.per_distinct(segment, nerve, prev_label, high, order)
    kind = np.array([d[0] for d in described], dtype=object)
    paths["segment_kind"] = _text(kind, paths.index)
    paths["long_segment"] = np.array([d[1] for d in described], dtype=bool)
    paths["segment"] = _text(np.array([d[2] for d in described], dtype=object), paths.index)
    # The path from the distal site avoids entrapment when no segment on it is an entrapment or unknown one.
    # Paths of one nerve test are consecutive rows: count the bad segments so far within each nerve test.
    bad = (~np.isin(kind, ["standard", "proximal"])).astype(np.int64)
    crossed = np.cumsum(bad)
    path_group = group[index]
    opens = np.r_[True, path_group[1:] != path_group[:-1]]
    opening = np.maximum.accumulate(np.where(opens, np.arange(len(path_group)), 0))
    paths["path_outside_entrapment"] = (crossed - (crossed[opening] - bad[opening])) == 0
    paths["path_standard"] = (order == 2) & (kind == "standard")
    paths["path"] = _text(
        rules.per_distinct(
            lambda first, site, high_label: (
                f"{'site 1' if pd.isna(first) else first} → "
                f"{f'site {site}' if pd.isna(high_label) else high_label}"
            ),
            base_label,
            order,
            high,
        ),
        paths.index,
    )
    return paths.reset_index(drop=True)[PATH_COLUMNS]
