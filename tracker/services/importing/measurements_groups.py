"""Checks of a measurements table across rows: duplicate sites, site order without gaps, nerve-, visit-
and patient-level values that agree on every row, latencies that grow proximally, plausible conduction
velocities (m/s) and F-wave latencies (ms). Problems are collected, never raised midway.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from tracker.domain.conduction import quantise_array
from tracker.errors import Problem
from tracker.services.checks import Collector
from tracker.services.importing.measurements_columns import (
    NERVE_LEVEL,
    PATIENT_LEVEL,
    TEST_KEY,
    VISIT_KEY,
    VISIT_LEVEL,
)
from tracker.services.tables import ROW


def _plain(value: object) -> str:
    """A value as a person would write it: 33 not np.float64(33.0), absent not True."""
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (float, np.floating)):
        return f"{float(value):g}"
    return str(value)


def _consistency(
    collect: Collector, frame: pd.DataFrame, group: np.ndarray, columns: list[str], level: str
) -> None:
    """Values of a nerve-, visit- or patient-level column must agree on every row that states them."""
    all_counts = frame[columns].groupby(group).nunique(dropna=True)
    for column in columns:
        series = frame[column]
        counts = all_counts[column]
        for group_id in counts.index[counts.to_numpy() > 1]:
            members = np.flatnonzero(group == group_id)
            stated = members[series.iloc[members].notna().to_numpy()]
            shown = ", ".join(f"row {collect.rows[i]}: {_plain(series.iloc[i])}" for i in stated)
            source_column = "f_latency_ms" if column == "f_absent" else column
            collect.add_one(
                int(collect.rows[stated[-1]]),
                source_column,
                None,
                f"rows of the same {level} disagree ({shown}); a {level}-level value must be the same on "
                "every row",
            )


def _f_wave_words_and_numbers(collect: Collector, frame: pd.DataFrame, group: np.ndarray) -> None:
    """'absent' on one row of a nerve test and a minimal F-wave latency on another also disagree."""
    number = frame["f_latency_ms"].notna().to_numpy()
    word = frame["f_absent"].notna().to_numpy()
    has_number = pd.Series(number).groupby(group).transform("any").to_numpy()
    has_word = pd.Series(word).groupby(group).transform("any").to_numpy()
    for group_id in np.unique(group[has_number & has_word]):
        stated = np.flatnonzero((group == group_id) & (number | word))
        shown = ", ".join(
            f"row {collect.rows[i]}: {'absent' if word[i] else _plain(frame['f_latency_ms'].iloc[i])}"
            for i in stated
        )
        collect.add_one(
            int(collect.rows[stated[-1]]),
            "f_latency_ms",
            None,
            f"rows of the same nerve test disagree ({shown}); a nerve test-level value must be the same on "
            "every row",
        )


def _group_ids(frame: pd.DataFrame, keys: list[str]) -> np.ndarray:
    return frame.groupby(keys, sort=False, dropna=False).ngroup().to_numpy()


def _group_checks(
    collect: Collector, frame: pd.DataFrame, keys_ok: np.ndarray, allow_unusual: bool, limits
) -> None:
    """Checks that involve several rows: duplicates, site sequence, agreement, latencies, velocities."""
    if keys_ok.all():  # the usual case: no copy of the table
        valid, sub = frame, Collector(collect.cells)
    else:
        valid = frame[keys_ok]
        offset = np.flatnonzero(keys_ok)  # position in the full table
        sub = Collector(collect.cells.iloc[offset].reset_index(drop=True))  # shows the cells as written
    sub.problems = collect.problems

    test_group = _group_ids(valid, TEST_KEY)
    site_key = pd.DataFrame({"test": test_group, "order": valid["site_order"].to_numpy()})
    duplicated = site_key.duplicated(keep=False).to_numpy()
    if duplicated.any():
        dup = valid[duplicated]
        for _, rows in dup.groupby(TEST_KEY + ["site_order"], sort=False)[ROW]:
            listed = ", ".join(str(r) for r in rows)
            collect.add_one(
                int(rows.iloc[-1]),
                "site_order",
                None,
                f"the same nerve test and site_order appear on rows {listed}",
            )

    orders = valid.groupby(test_group)["site_order"]
    expected = orders.transform("count").to_numpy()
    highest = orders.transform("max").to_numpy()
    gap = (highest != expected) & ~duplicated
    sub.add(
        gap & (valid["site_order"].to_numpy() == highest),
        "site_order",
        "site orders of this nerve test are not 1, 2, 3… without gaps",
    )

    _consistency(sub, valid, test_group, NERVE_LEVEL, "nerve test")
    _f_wave_words_and_numbers(sub, valid, test_group)
    _consistency(sub, valid, _group_ids(valid, VISIT_KEY), VISIT_LEVEL, "visit")
    _consistency(sub, valid, _group_ids(valid, ["patient"]), PATIENT_LEVEL, "patient")

    # Consecutive sites of one nerve test: latencies grow proximally; velocities are plausible.
    order = np.lexsort((valid["site_order"].to_numpy(), test_group))
    g = test_group[order]
    latency = valid["latency_ms"].to_numpy()[order]
    distance = valid["distance_mm"].to_numpy()[order]
    same_test = np.r_[False, g[1:] == g[:-1]]
    previous_latency = np.r_[np.nan, latency[:-1]]
    with np.errstate(invalid="ignore", divide="ignore"):
        difference = quantise_array(latency - previous_latency)
        not_growing = same_test & (difference <= 0)
        velocity = quantise_array(np.where(same_test & (difference > 0), distance / difference, np.nan))
    mask = np.zeros(len(valid), dtype=bool)
    mask[order[not_growing]] = True
    sub.add(
        mask,
        "latency_ms",
        "the latency is not longer than at the previous (more distal) site; latencies grow proximally",
    )

    modality = valid["modality"].to_numpy()[order]
    sensory_first = (modality == "sensory") & ~same_test
    with np.errstate(invalid="ignore", divide="ignore"):
        sensory_velocity = quantise_array(np.where(sensory_first, distance / latency, np.nan))
    for values, rule_name, what in (
        (velocity, "motor_velocity_m_per_s", "segment conduction velocity"),
        (sensory_velocity, "sensory_velocity_m_per_s", "sensory conduction velocity"),
    ):
        rule = limits[rule_name]
        distance_ok = ~limits["distance_mm"].outside(distance) & ~np.isnan(distance)
        outside = rule.outside(values) & distance_ok
        if not outside.any():
            continue
        mask = np.zeros(len(valid), dtype=bool)
        mask[order[outside]] = True
        message = (
            f"{what} would be {{v}} m/s, outside {rule.describe()}: most likely a distance unit error "
            "(cm written instead of mm?) or a wrong latency"
        )
        velocities = np.round(values[np.argsort(order)], 1)
        written = sub.cells["distance_mm"].to_numpy()
        target = sub.problems if not allow_unusual else collect.__dict__.setdefault("unusual", [])
        for index in np.flatnonzero(mask):
            target.append(
                Problem(
                    int(sub.rows[index]),
                    "distance_mm",
                    str(written[index]),
                    message.format(v=f"{velocities[index]:g}")
                    + ("" if allow_unusual else "; if the value is real, import with --allow-unusual"),
                )
            )

    # F-wave minimal latency must exceed the distal (site 1) motor latency of the same nerve test.
    f_latency = valid.groupby(test_group)["f_latency_ms"].transform("first").to_numpy()
    distal = valid["site_order"].to_numpy() == 1
    with np.errstate(invalid="ignore"):
        too_short = distal & (f_latency <= valid["latency_ms"].to_numpy())
    if too_short.any():
        shown = pd.Series(np.where(np.isnan(f_latency), "", f_latency.astype(str)))
        sub.add(
            too_short,
            "f_latency_ms",
            "the minimal F-wave latency is not longer than the distal motor latency",
            values=shown,
        )
