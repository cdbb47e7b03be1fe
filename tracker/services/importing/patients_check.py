"""Validate a patients table: one row per stored patient, with the symptom-onset date and, optionally, the
identifying fields that are kept apart from the pseudonymous record (``patient_identities``).

The pseudonymous record takes ``sex``, ``birth_year`` and ``onset_date``; the identities table takes
``full_name``, ``record_number`` and ``birth_date``, which only an identified export shows. Messages never
repeat an identifying value: rejected cells are cut by :func:`tracker.services.input_limits.guarded`, and no
message built here quotes a name, record number or birth date.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

from tracker.db.models import PatientIdentity
from tracker.domain.plausibility import ranges
from tracker.domain.vocabulary import SEXES
from tracker.errors import InputRejected
from tracker.services import checks
from tracker.services.checks import Collector
from tracker.services.importing.clinical_check import (
    KnownPatients,
    duplicates,
    python_dates,
    unknown_patients,
)
from tracker.services.input_limits import guarded
from tracker.services.tables import ROW

PATIENT_REQUIRED = ["patient"]
RECORD_VALUES = ["sex", "birth_year", "onset_date"]  # the pseudonymous record (table ``patients``)
IDENTITY_VALUES = ["full_name", "record_number", "birth_date"]  # table ``patient_identities`` only
PATIENT_VALUES = RECORD_VALUES + IDENTITY_VALUES
# Lengths of the identity columns, from the schema, checked here so that a dry run and the import agree on
# SQLite (which stores any length) and PostgreSQL (which refuses).
IDENTITY_CHARS: dict[str, int] = {
    column: PatientIdentity.__table__.c[column].type.length for column in ("full_name", "record_number")
}
IDENTITY_WORDS = {"full_name": "name", "record_number": "record number", "birth_date": "birth date"}


def validate_patients(
    cells: pd.DataFrame, *, today: dt.date | None = None, known_patients: KnownPatients | None = None
) -> pd.DataFrame:
    """Return one typed row per patient (``ROW``, ``patient`` and :data:`PATIENT_VALUES`, missing where the
    cell is empty), or raise :class:`InputRejected` with every problem.

    Dates are ``YYYY-MM-DD`` and not after ``today``; a birth date lies in the plausible birth-year range and
    agrees with a ``birth_year`` on the same row; the onset is not before the birth date. ``known_patients``:
    as for :func:`tracker.services.importing.clinical_check.validate_treatments` (a patients file adds no
    patient).
    """
    today = today or dt.date.today()
    collect = Collector(cells)
    checks.unknown_columns(collect, PATIENT_REQUIRED + PATIENT_VALUES)
    if checks.missing_columns(collect, PATIENT_REQUIRED) or len(cells) == 0:
        if len(cells) == 0:
            collect.add_one(None, None, None, "the file has a header but no data rows")
        raise InputRejected("The patients file was refused", guarded(collect.sorted_problems()))
    limits = ranges()
    patient = checks.patient_codes(collect)
    unknown_patients(collect, patient, known_patients)
    sex = checks.vocabulary(collect, "sex", {s: s for s in SEXES})
    birth_year, _ = checks.number(collect, "birth_year", unit="years")
    with np.errstate(invalid="ignore"):
        collect.add(
            ~np.isnan(birth_year) & (birth_year != np.floor(birth_year)),
            "birth_year",
            "expected a whole year such as 1961",
        )
    checks.in_range(collect, "birth_year", birth_year, limits["birth_year"])
    onset = checks.iso_dates(collect, "onset_date", required=False, not_after=today)
    birth_date = checks.iso_dates(collect, "birth_date", required=False, not_after=today)
    born = birth_date.dt.year.to_numpy(dtype=float, na_value=np.nan)
    collect.add(
        limits["birth_year"].outside(born),
        "birth_date",
        f"the year of birth is outside the plausible range; expected {limits['birth_year'].describe()}",
    )
    with np.errstate(invalid="ignore"):
        collect.add(
            ~np.isnan(birth_year) & ~np.isnan(born) & (born != birth_year),
            "birth_date",
            "the birth date's year differs from birth_year on the same row",
        )
    collect.add(
        (onset < birth_date).to_numpy(dtype=bool), "onset_date", "the symptom onset is before the birth date"
    )
    identity_text = {}
    for column, most in IDENTITY_CHARS.items():
        value = checks.text(cells, column)
        collect.add(
            (value.str.len() > most).to_numpy(dtype=bool),
            column,
            f"a {IDENTITY_WORDS[column]} has at most {most} characters",
        )
        identity_text[column] = value.replace("", None)
    frame = pd.DataFrame(
        {
            ROW: cells[ROW].to_numpy(),
            "patient": patient.to_numpy(),
            "sex": sex.to_numpy(),
            "birth_year": birth_year,
            "onset_date": python_dates(onset),
            "full_name": identity_text["full_name"].to_numpy(),
            "record_number": identity_text["record_number"].to_numpy(),
            "birth_date": python_dates(birth_date),
        }
    )
    duplicates(collect, frame[frame["patient"] != ""], ["patient"], "patient")
    if collect.problems:
        raise InputRejected("The patients file was refused", guarded(collect.sorted_problems()))
    return frame
