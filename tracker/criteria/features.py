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

from tracker.criteria.limits import attach_limits
from tracker.domain.catalogue import nerves as nerve_catalogue
from tracker.domain.conduction import quantise_array

PATH_COLUMNS = [
    "visit_key", "test_key", "nerve", "side", "limb", "site_order", "label", "distance_mm", "distal_amplitude",
    "amplitude_reduction_pct", "area_reduction_pct", "duration_increase_pct", "segment_distal_amplitude",
    "segment_amplitude_reduction_pct", "segment_area_reduction_pct", "segment_duration_increase_pct",
    "segment_velocity", "segment_kind", "long_segment", "segment", "path_outside_entrapment", "path_standard", "path",
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
    return {r["limb"]: (float(r["minimum_c"]), r["status"], r["source"]) for r in csv.DictReader(text.splitlines())}


def _pct_change(numerator: np.ndarray, denominator: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        result = np.where(denominator > 0, numerator / denominator * 100.0, np.nan)
    return quantise_array(result)


def build(visits: pd.DataFrame, tests: pd.DataFrame, sites: pd.DataFrame, limits: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Return ``(nerves, paths)``; see the module docstring."""
    sites = sites.sort_values(["test_key", "site_order"], kind="stable").reset_index(drop=True)
    first = sites.drop_duplicates("test_key", keep="first").set_index("test_key")
    nerves = tests.merge(visits[["visit_key", "age_years", "height_cm", "sex"]], on="visit_key", how="left")
    catalogue = nerve_catalogue()
    nerves["limb"] = nerves["nerve"].map({n: info.limb for n, info in catalogue.items()})
    distal = first.reindex(nerves["test_key"])
    nerves["distal_latency_ms"] = distal["latency_ms"].to_numpy(dtype=float)
    nerves["distal_amplitude"] = distal["amplitude"].to_numpy(dtype=float)
    nerves["distal_duration_ms"] = distal["duration_ms"].to_numpy(dtype=float)
    nerves["distal_label"] = distal["label"].to_numpy(dtype=object)
    nerves["peak_latency_ms"] = distal["peak_latency_ms"].to_numpy(dtype=float)
    nerves["no_response"] = (nerves["distal_amplitude"] == 0) & nerves["distal_latency_ms"].isna()
    with np.errstate(invalid="ignore", divide="ignore"):
        sensory_cv = distal["distance_mm"].to_numpy(dtype=float) / distal["latency_ms"].to_numpy(dtype=float)
    nerves["sensory_cv"] = np.where(nerves["modality"] == "sensory", quantise_array(sensory_cv), np.nan)
    nerves["f_absent"] = nerves["f_absent"].fillna(False).astype(bool)
    minimums = temperature_minimums()
    minimum = nerves["limb"].map({limb: value[0] for limb, value in minimums.items()}).astype(float)
    nerves["temperature_minimum_c"] = minimum
    nerves["cold"] = nerves["temperature_c"].astype(float) < minimum
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


TEXT_COLUMNS = ("nerve", "side", "modality", "limb", "label", "distal_label", "segment_kind", "segment", "path", "sex", "recording_site")


def _plain_text(frame: pd.DataFrame) -> pd.DataFrame:
    """Word columns as plain Python objects: Arrow-backed text columns are slow to index row by row, and
    the rules filter and gather these frames many times."""
    for column in frame.columns:
        if column in TEXT_COLUMNS or column.endswith(("_source", "_status", "_stratum", "_segment")):
            frame[column] = pd.Series(frame[column].to_numpy(dtype=object), index=frame.index, dtype=object)
    return frame


def _paths(sites: pd.DataFrame, nerves: pd.DataFrame) -> pd.DataFrame:
    """One row per motor nerve test and proximal site (site_order ≥ 2), sites sorted distal first."""
    motor_tests = nerves.loc[nerves["modality"] == "motor", ["test_key", "visit_key", "nerve", "side", "limb"]]
    motor = sites.merge(motor_tests, on="test_key", how="inner").sort_values(["test_key", "site_order"], kind="stable")
    motor = motor.reset_index(drop=True)
    if motor.empty:
        return pd.DataFrame(columns=PATH_COLUMNS).astype({"site_order": int, "path_outside_entrapment": bool, "path_standard": bool})
    same = motor["test_key"].to_numpy()[1:] == motor["test_key"].to_numpy()[:-1]
    previous = np.r_[False, same]
    base = motor[["test_key"]].join(motor.groupby("test_key")[["amplitude", "area_mvms", "duration_ms", "label"]].transform("first"))

    def shifted(column: str) -> np.ndarray:
        values = motor[column].to_numpy()
        out = np.empty_like(values, dtype=object if values.dtype == object else float)
        out[0] = None if values.dtype == object else np.nan
        out[1:] = values[:-1]
        return out

    paths = motor.loc[previous, ["visit_key", "test_key", "nerve", "side", "limb", "site_order", "label", "distance_mm"]].copy()
    index = np.flatnonzero(previous)
    amplitude = motor["amplitude"].to_numpy(dtype=float)
    area = motor["area_mvms"].to_numpy(dtype=float)
    duration = motor["duration_ms"].to_numpy(dtype=float)
    latency = motor["latency_ms"].to_numpy(dtype=float)
    prev_amplitude, prev_area, prev_duration, prev_latency = (shifted(c)[index] for c in ("amplitude", "area_mvms", "duration_ms", "latency_ms"))
    prev_label = shifted("label")[index]
    base = base.iloc[index]
    paths["distal_amplitude"] = base["amplitude"].to_numpy(dtype=float)
    # Change from the distal site (site 1) to this site.
    paths["amplitude_reduction_pct"] = _pct_change(base["amplitude"].to_numpy(dtype=float) - amplitude[index], base["amplitude"].to_numpy(dtype=float))
    paths["area_reduction_pct"] = _pct_change(base["area_mvms"].to_numpy(dtype=float) - area[index], base["area_mvms"].to_numpy(dtype=float))
    paths["duration_increase_pct"] = _pct_change(duration[index] - base["duration_ms"].to_numpy(dtype=float), base["duration_ms"].to_numpy(dtype=float))
    # The segment just below this site (previous site → this site).
    paths["segment_distal_amplitude"] = prev_amplitude
    paths["segment_amplitude_reduction_pct"] = _pct_change(prev_amplitude - amplitude[index], prev_amplitude)
    paths["segment_area_reduction_pct"] = _pct_change(prev_area - area[index], prev_area)
    paths["segment_duration_increase_pct"] = _pct_change(duration[index] - prev_duration, prev_duration)
    with np.errstate(invalid="ignore", divide="ignore"):
        difference = quantise_array(latency[index] - prev_latency)
        velocity = np.where(difference > 0, paths["distance_mm"].to_numpy(dtype=float) / difference, np.nan)
    paths["segment_velocity"] = quantise_array(velocity)
    low = pd.Series(prev_label, index=paths.index, dtype=object)
    high = paths["label"].astype(object)
    order = paths["site_order"].astype(int)
    kinds = pd.DataFrame(
        [(n, d, p, k, lg) for (n, d, p), (k, lg) in segment_kinds().items()],
        columns=["nerve", "low", "high", "segment_kind", "long_segment"],
    )
    keyed = pd.DataFrame({"nerve": paths["nerve"].astype(object).to_numpy(), "low": low.to_numpy(), "high": high.to_numpy()})
    found = keyed.merge(kinds, on=["nerve", "low", "high"], how="left")
    unlabelled = (low.isna() | high.isna()).to_numpy()
    # Unlabelled sites: the first segment is taken to be the standard forearm/leg segment.
    kind = np.where(unlabelled, np.where(order.to_numpy() == 2, "standard", "unknown"), found["segment_kind"].fillna("unknown").to_numpy())
    long_segment = np.where(unlabelled, order.to_numpy() == 2, found["long_segment"].fillna(False).to_numpy(dtype=bool))
    paths["segment_kind"] = kind
    paths["long_segment"] = long_segment.astype(bool)
    low_name = low.where(low.notna(), "site " + (order - 1).astype(str))
    high_name = high.where(high.notna(), "site " + order.astype(str))
    paths["segment"] = (low_name + " → " + high_name).to_numpy(dtype=object)
    # The path from the distal site avoids entrapment when no segment on it is an entrapment or unknown one.
    bad = (~paths["segment_kind"].isin(["standard", "proximal"])).astype(int)
    paths["path_outside_entrapment"] = bad.groupby(paths["test_key"]).cumsum().to_numpy() == 0
    paths["path_standard"] = (paths["site_order"] == 2) & (paths["segment_kind"] == "standard")
    base_label = pd.Series(base["label"].to_numpy(dtype=object), index=paths.index)
    paths["path"] = (base_label.where(base_label.notna(), "site 1") + " → " + high_name).to_numpy(dtype=object)
    return paths.reset_index(drop=True)[PATH_COLUMNS]
