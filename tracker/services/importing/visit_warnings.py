"""Warnings of a measurements import (imported all the same; worth a look): a visit of a single nerve, a
possible day/month slip in a visit date, a ``visit_version`` stated for a visit that is not stored."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

from tracker.errors import Problem
from tracker.services.importing.measurements_check import MeasurementBatch
from tracker.services.importing.nerve_tests import _written_positions
from tracker.services.importing.visit_versions import VERSION_COLUMN
from tracker.services.tables import ROW

Keyed = list[tuple[tuple[str, dt.date], Problem]]  # warnings with their visit (patient code, visit date)


def _versions_of_new_visits(new_visits: pd.DataFrame) -> Keyed:
    """A ``visit_version`` stated for a visit that is not stored (another database, a changed date?): the
    visit is added as version 1, with a warning."""
    stated = new_visits[new_visits["file_version"].notna()]
    return [
        (
            (r.patient, r.visit_date),
            Problem(
                int(getattr(r, ROW)),
                VERSION_COLUMN,
                None,
                f"visit_version {int(r.file_version)} is stated but no visit of {r.patient} on "
                f"{r.visit_date.isoformat()} is stored here: it is added as a new visit (version 1) — check "
                "the date if it was meant to amend one",
            ),
        )
        for r in stated.itertuples()
    ]


SLIP_WINDOW_DAYS = 14


def _single_nerve_visits(batch: MeasurementBatch, written: pd.DataFrame) -> Keyed:
    """A visit of one nerve (one side of one nerve, motor and/or sensory) is imported, with a warning: the
    criteria sets need several nerves, so it may be part of a study exported in pieces."""
    positions = _written_positions(batch, written)
    if positions is not None and batch.test_visit is not None:
        # By position: the distinct (nerve, side) pairs of each visit, counted on integer codes.
        tests = batch.nerve_tests
        nerve_codes, nerve_words = pd.factorize(tests["nerve"])
        side_codes, side_words = pd.factorize(tests["side"])
        pair = nerve_codes.astype(np.int64) * max(len(side_words), 1) + side_codes
        width = max(len(nerve_words), 1) * max(len(side_words), 1)
        distinct = np.unique(batch.test_visit.astype(np.int64) * width + pair)
        counts = np.bincount(distinct // width, minlength=len(batch.visits))
        first_test = np.full(len(batch.visits), -1, dtype=np.int64)
        seen, first_at = np.unique(batch.test_visit, return_index=True)
        first_test[seen] = first_at
        chosen = counts[positions] == 1
        tested = first_test[positions[chosen]]
        single = written[chosen].assign(
            nerve=tests["nerve"].to_numpy()[tested], side=tests["side"].to_numpy()[tested]
        )
    else:
        nerves = batch.nerve_tests.drop_duplicates(["patient", "visit_date", "nerve", "side"])
        counts = nerves.groupby(["patient", "visit_date"]).agg(
            count=("nerve", "size"), nerve=("nerve", "first"), side=("side", "first")
        )
        single = written.merge(
            counts[counts["count"] == 1].reset_index(), on=["patient", "visit_date"], how="inner"
        )
    return [
        (
            (row.patient, row.visit_date),
            Problem(
                int(getattr(row, ROW)),
                "nerve",
                None,
                f"the visit of {row.patient} on {row.visit_date.isoformat()} holds a single nerve "
                f"({row.nerve.replace('_', ' ')} {row.side}); the criteria need several nerves — check that "
                "the whole study is in the file",
            ),
        )
        for row in single.itertuples()
    ]


def _swapped(day: dt.date) -> dt.date | None:
    """The date with day and month exchanged, when that is another real date (2024-02-12 → 2024-12-02)."""
    if day.day == day.month or day.day > 12:
        return None
    try:
        return dt.date(day.year, day.day, day.month)
    except ValueError:
        return None


def _date_slips(written: pd.DataFrame, file_visits: pd.DataFrame, stored: pd.DataFrame) -> Keyed:
    """A visit within 14 days of another visit of the same patient, whose day and month swapped would be a
    real date, may carry a date-entry slip: imported, with a warning naming both dates."""
    days = written["visit_date"].tolist()
    swapped_of = {day: _swapped(day) for day in set(days)}  # once per distinct date
    could_slip = np.array([swapped_of[day] is not None for day in days], dtype=bool)
    candidates = [(row, swapped_of[row.visit_date]) for row in written[could_slip].itertuples()]
    if not candidates:
        return []
    dates: dict[str, set[dt.date]] = {}
    for frame in (file_visits, stored):
        for patient, day in zip(frame["patient"], frame["visit_date"]):
            if isinstance(patient, str):
                dates.setdefault(patient, set()).add(day)
    warnings = []
    for row, swapped in candidates:
        near = sorted(
            d for d in dates.get(row.patient, ()) if 0 < abs((d - row.visit_date).days) <= SLIP_WINDOW_DAYS
        )
        if not near:
            continue
        other = min(near, key=lambda d: abs((d - row.visit_date).days))
        gap = abs((other - row.visit_date).days)
        warnings.append(
            (
                (row.patient, row.visit_date),
                Problem(
                    int(getattr(row, ROW)),
                    "visit_date",
                    None,
                    f"the visit of {row.patient} on {row.visit_date.isoformat()} is {gap} "
                    f"day{'s' if gap != 1 else ''} from their visit on {other.isoformat()}; with day and "
                    f"month swapped it would be {swapped.isoformat()} — check the date for an entry slip",
                ),
            )
        )
    return warnings
