"""The content fingerprint of a visit: SHA-256 over its measured values, computed alike for a validated
file (:func:`_fingerprints`) and for stored visits read back (:func:`fingerprints_of`, used by
:func:`tracker.services.history.stored_fingerprints`), so that the import classes each visit as new,
unchanged or changed.
"""

from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd

from tracker.services.importing.measurements_columns import NERVE_LEVEL, SITE_VALUES, TEST_KEY, VISIT_KEY


def fingerprints_of(sites: pd.DataFrame, nerve_tests: pd.DataFrame, visits: pd.DataFrame) -> list[str]:
    """Fingerprints of visits given as tables shaped like :class:`MeasurementBatch` (e.g. read back from the
    database), in the order of ``visits``."""
    sites = sites.sort_values(TEST_KEY + ["site_order"], kind="stable").reset_index(drop=True)
    nerve_tests = nerve_tests.sort_values(TEST_KEY, kind="stable").reset_index(drop=True)
    return _fingerprints(sites, nerve_tests, visits)


SITE_TEXT = ["nerve", "side", "modality", "label"]
SITE_NUMBERS = [c for c in SITE_VALUES if c != "label"]
TEST_TEXT = ["nerve", "side", "modality", "recording_site"]
TEST_NUMBERS = [c for c in NERVE_LEVEL if c != "recording_site"]
VISIT_TEXT = ["diagnosis", "phenotype"]
VISIT_NUMBERS = ["height_cm"]


def _number_matrix(frame: pd.DataFrame, columns: list[str]) -> np.ndarray:
    """Columns as little-endian float64 (booleans 1/0), NaN replaced by 0 with a separate missing mask."""
    values = np.empty((len(frame), len(columns)), dtype="<f8")
    for index, column in enumerate(columns):
        series = frame[column]
        if series.dtype.kind in "iuf":
            values[:, index] = series.to_numpy(dtype=float)
            continue
        if series.dtype == object or series.dtype == bool:
            series = (
                series.map({True: 1.0, False: 0.0}) if column in ("f_absent", "wrist_entrapment") else series
            )
        values[:, index] = pd.to_numeric(series, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    missing = np.isnan(values)
    values[missing] = 0.0
    return np.concatenate([values, missing.astype("<f8")], axis=1)


def _text_lines(frame: pd.DataFrame, columns: list[str]) -> list[str]:
    """Each row's words joined by ``|`` (built once per distinct combination: files repeat them)."""
    if frame.empty:
        return []
    codes = frame.groupby(columns, sort=False, dropna=False).ngroup().to_numpy()
    first_rows = pd.Series(np.arange(len(frame))).groupby(codes).first().to_numpy()
    table = frame[columns].iloc[first_rows].astype(object).to_numpy()
    words = np.array(["|".join("" if pd.isna(v) else str(v) for v in row) for row in table], dtype=object)
    return words[codes].tolist()


def _fingerprints(frame: pd.DataFrame, nerve_tests: pd.DataFrame, visits: pd.DataFrame) -> list[str]:
    """SHA-256 of each visit's measured content, independent of row order and of which row held a
    nerve- or visit-level value. Numbers enter as their exact IEEE-754 bytes, words as UTF-8 text.

    ``frame`` must be sorted by nerve test and site order, ``nerve_tests`` by nerve test, ``visits`` by
    visit: then each visit's rows are contiguous in all three.
    """
    site_numbers = _number_matrix(frame, SITE_NUMBERS)
    site_text = _text_lines(frame, SITE_TEXT)
    test_numbers = _number_matrix(nerve_tests, TEST_NUMBERS)
    test_text = _text_lines(nerve_tests, TEST_TEXT)
    visit_numbers = _number_matrix(visits, VISIT_NUMBERS)
    visit_text = _text_lines(visits, VISIT_TEXT)
    site_counts = frame.groupby(VISIT_KEY, sort=True).size().to_numpy()
    test_counts = nerve_tests.groupby(VISIT_KEY, sort=True).size().to_numpy()
    result = []
    site_at = test_at = 0
    for index in range(len(visits)):
        sites, tests = int(site_counts[index]), int(test_counts[index])
        digest = hashlib.sha256(visit_text[index].encode("utf-8"))
        digest.update(visit_numbers[index].tobytes())
        digest.update("\n".join(test_text[test_at : test_at + tests]).encode("utf-8"))
        digest.update(test_numbers[test_at : test_at + tests].tobytes())
        digest.update("\n".join(site_text[site_at : site_at + sites]).encode("utf-8"))
        digest.update(site_numbers[site_at : site_at + sites].tobytes())
        result.append(digest.hexdigest())
        site_at, test_at = site_at + sites, test_at + tests
    return result
