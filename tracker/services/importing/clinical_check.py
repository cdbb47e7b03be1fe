"""Validate treatment and outcome-score tables (DESIGN.md §4.2)."""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Iterable

import numpy as np
import pandas as pd

from tracker.domain.catalogue import suggest
from tracker.domain.plausibility import scales
from tracker.domain.vocabulary import THERAPIES
from tracker.errors import InputRejected
from tracker.services import checks
from tracker.services.checks import Collector
from tracker.services.input_limits import guarded
from tracker.services.tables import ROW

TREATMENT_REQUIRED = ["patient", "therapy", "start_date"]
TREATMENT_OPTIONAL = ["end_date", "dose", "dose_unit", "interval_days", "note"]
TREATMENT_KEY = ["patient", "therapy", "start_date"]
SCORE_REQUIRED = ["patient", "date", "scale", "value"]
SCORE_KEY = ["patient", "date", "scale"]
DOSE_UNITS = ("g/kg", "mg/kg", "g", "mg", "ml", "mL/kg", "exchanges", "mg/m2", "other")


def python_dates(parsed: pd.Series) -> np.ndarray:
    """``parsed.dt.date.to_numpy()`` (dates, NaT where missing), converting each distinct day once: a file
    repeats its dates on thousands of rows."""
    codes, uniques = pd.factorize(parsed, use_na_sentinel=True)
    days = np.empty(len(uniques) + 1, dtype=object)
    days[:-1] = [day.date() for day in uniques]
    days[-1] = pd.NaT  # code -1: a missing date
    return days[codes]


KnownPatients = Callable[[list[str]], Iterable[str]]
"""Given patient codes, the ones that are stored (a database look-up supplied by the importer)."""


def unknown_patients(collect: Collector, patient: pd.Series, known_patients: KnownPatients | None) -> None:
    """Every row whose (well-formed) patient code is not stored, listed with
    the other problems of the file."""
    if known_patients is None:
        return
    valid = patient[patient.str.match(checks.CODE).to_numpy(dtype=bool)]
    codes = sorted(set(valid))
    known = set(known_patients(codes)) if codes else set()
    unknown = sorted(set(codes) - known)
    for code in unknown:
        hint = suggest(code, sorted(known))
        collect.add(
            (patient == code).to_numpy(),
            "patient",
            "unknown patient; import the patient's measurements first"
            + (f" (did you mean {hint!r}?)" if hint else " (or check the code)"),
        )


def duplicates(collect: Collector, frame: pd.DataFrame, key: list[str], what: str) -> None:
    dup = frame[frame.duplicated(key, keep=False)]
    for _, rows in dup.groupby(key, sort=False)[ROW]:
        listed = ", ".join(str(r) for r in rows)
        collect.add_one(int(rows.iloc[-1]), key[-1], None, f"the same {what} appears on rows {listed}")


def validate_treatments(
    cells: pd.DataFrame, *, today: dt.date | None = None, known_patients: KnownPatients | None = None
) -> pd.DataFrame:
    """Return one typed row per treatment period, or raise :class:`InputRejected` with every problem.

    ``known_patients`` (codes → the stored ones) adds a problem for every row of a patient not stored yet.
    """
    today = today or dt.date.today()
    collect = Collector(cells)
    checks.unknown_columns(collect, TREATMENT_REQUIRED + TREATMENT_OPTIONAL)
    if checks.missing_columns(collect, TREATMENT_REQUIRED) or len(cells) == 0:
        if len(cells) == 0:
            collect.add_one(None, None, None, "the file has a header but no data rows")
        raise InputRejected("The treatments file was refused", guarded(collect.sorted_problems()))
    patient = checks.patient_codes(collect)
    unknown_patients(collect, patient, known_patients)
    therapy = checks.vocabulary(collect, "therapy", {t: t for t in THERAPIES}, required=True)
    start = checks.iso_dates(collect, "start_date", required=True, not_after=today)
    end = checks.iso_dates(collect, "end_date", required=False, not_after=None)
    collect.add((end < start).to_numpy(dtype=bool), "end_date", "the treatment ends before it starts")
    dose, _ = checks.number(collect, "dose")
    with np.errstate(invalid="ignore"):
        collect.add(dose <= 0, "dose", "a dose must be above 0")
    unit_map = {u.lower(): u for u in DOSE_UNITS}
    dose_unit = checks.vocabulary(collect, "dose_unit", unit_map)
    collect.add(
        ~np.isnan(dose) & dose_unit.isna().to_numpy() & (checks.text(cells, "dose_unit") == "").to_numpy(),
        "dose_unit",
        "a dose needs its unit (e.g. g/kg)",
    )
    interval, _ = checks.number(collect, "interval_days", unit="days")
    with np.errstate(invalid="ignore"):
        collect.add(
            ~np.isnan(interval) & ((interval <= 0) | (interval != np.floor(interval)) | (interval > 3660)),
            "interval_days",
            "expected a whole number of days from 1 to 3660",
        )
    note = checks.text(cells, "note")
    frame = pd.DataFrame(
        {
            ROW: cells[ROW].to_numpy(),
            "patient": patient.to_numpy(),
            "therapy": therapy.to_numpy(),
            "start_date": python_dates(start),
            "end_date": python_dates(end),
            "dose": dose,
            "dose_unit": dose_unit.to_numpy(),
            "interval_days": interval,
            "note": note.replace("", None).to_numpy(),
        }
    )
    ok = frame[TREATMENT_KEY].notna().all(axis=1)
    duplicates(collect, frame[ok], TREATMENT_KEY, "patient, therapy and start date")
    if collect.problems:
        raise InputRejected("The treatments file was refused", guarded(collect.sorted_problems()))
    return frame


def validate_scores(
    cells: pd.DataFrame, *, today: dt.date | None = None, known_patients: KnownPatients | None = None
) -> pd.DataFrame:
    """Return one typed row per score, or raise :class:`InputRejected` with every problem (``known_patients``:
    as for :func:`validate_treatments`)."""
    today = today or dt.date.today()
    collect = Collector(cells)
    checks.unknown_columns(collect, SCORE_REQUIRED)
    if checks.missing_columns(collect, SCORE_REQUIRED) or len(cells) == 0:
        if len(cells) == 0:
            collect.add_one(None, None, None, "the file has a header but no data rows")
        raise InputRejected("The scores file was refused", guarded(collect.sorted_problems()))
    known = scales()
    patient = checks.patient_codes(collect)
    unknown_patients(collect, patient, known_patients)
    date = checks.iso_dates(collect, "date", required=True, not_after=today)
    scale = checks.vocabulary(collect, "scale", {s: s for s in known}, required=True)
    value, _ = checks.number(collect, "value", required=True)
    for name, info in known.items():
        rows = (scale == name).to_numpy()
        with np.errstate(invalid="ignore"):
            outside = rows & ((value < info.minimum) | (value > info.maximum))
            fractional = rows & info.integer & ~np.isnan(value) & (value != np.floor(value))
        collect.add(
            outside,
            "value",
            f"outside the {name} range; expected {info.minimum:g}–{info.maximum:g} {info.unit}",
        )
        collect.add(fractional & ~outside, "value", f"{name} takes whole numbers")
    frame = pd.DataFrame(
        {
            ROW: cells[ROW].to_numpy(),
            "patient": patient.to_numpy(),
            "date": python_dates(date),
            "scale": scale.to_numpy(),
            "value": value,
        }
    )
    ok = frame[SCORE_KEY].notna().all(axis=1)
    duplicates(collect, frame[ok], SCORE_KEY, "patient, date and scale")
    if collect.problems:
        raise InputRejected("The scores file was refused", guarded(collect.sorted_problems()))
    return frame
