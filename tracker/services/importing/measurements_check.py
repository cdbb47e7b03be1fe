"""Validate a measurements table (DESIGN.md §4.1) into typed visits, nerve tests and stimulation sites.

Everything is checked before anything is written: every problem is collected with its row and column.
Plausibility ranges come from ``reference/plausibility.csv``; the velocity range may be waived with
``allow_unusual`` (the waived findings are returned so that the import records them).

Cells are checked here; the checks across rows are in :mod:`.measurements_groups`, the column names in
:mod:`.measurements_columns`, the visit fingerprint in :mod:`.fingerprints`.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from tracker.db.models import NerveTest
from tracker.domain import catalogue
from tracker.domain.plausibility import ranges
from tracker.domain.vocabulary import ABSENT_WORDS, DIAGNOSES, PHENOTYPES, SEXES, SIDE_ALIASES, YES_NO
from tracker.errors import InputRejected, Problem
from tracker.services import checks
from tracker.services.checks import Collector
from tracker.services.importing.clinical_check import python_dates
from tracker.services.importing.fingerprints import _fingerprints
from tracker.services.importing.measurements_columns import (
    AMPLITUDES,
    KNOWN,
    NERVE_LEVEL,
    PATIENT_LEVEL,
    REQUIRED,
    SITE_VALUES,
    TEST_KEY,
    VISIT_KEY,
    VISIT_LEVEL,
)
from tracker.services.importing.measurements_groups import _group_checks
from tracker.services.input_limits import guarded
from tracker.services.tables import ROW

# Free text stored in a column of bounded length is checked against that length here, in validation, so that
# a dry run and the import agree on SQLite (which stores any length) and PostgreSQL (which refuses).
RECORDING_SITE_CHARS: int = NerveTest.__table__.c.recording_site.type.length


@dataclass
class MeasurementBatch:
    """Validated content of a measurements file, in canonical units and names.

    ``sites``: one row per stimulation site (keys + site values). ``nerve_tests``: one row per nerve test
    (keys + nerve-level values). ``visits``: one row per visit (keys + visit-level values + ``fingerprint``).
    ``patients``: one row per patient code (``sex``, ``birth_year``, possibly missing).
    """

    sites: pd.DataFrame
    nerve_tests: pd.DataFrame
    visits: pd.DataFrame
    patients: pd.DataFrame
    unusual: list[Problem] = field(default_factory=list)
    rows: pd.DataFrame | None = None  # every validated row (keys, all values, ``ROW``): to locate a value
    # Positions, so that the importer links rows without merging on their text keys: the nerve test (row of
    # ``nerve_tests``) of each site, and the visit (row of ``visits``) of each nerve test.
    site_test: np.ndarray | None = None
    test_visit: np.ndarray | None = None


def _word_map(words) -> dict[str, str]:
    return {w: w for w in words}


def _nerve_mapping(collect: Collector) -> pd.Series:
    raw = checks.text(collect.cells, "nerve")
    words = checks.map_unique(raw, catalogue.normalise_word)
    uniques = pd.unique(words)
    canonical = {w: catalogue.canonical_nerve(w) for w in uniques if w}
    mapped = words.map(canonical)
    unknown = (raw != "").to_numpy() & mapped.isna().to_numpy()
    for word in pd.unique(words[unknown]):
        hint = catalogue.suggest(word, catalogue.known_nerve_words())
        hint_text = f"; did you mean {catalogue.canonical_nerve(hint)!r}?" if hint else "."
        collect.add(
            unknown & (words == word).to_numpy(),
            "nerve",
            f"unknown nerve{hint_text} Known nerves: {', '.join(sorted(catalogue.nerves()))}",
        )
    collect.add((raw == "").to_numpy(), "nerve", "required nerve name is missing")
    return mapped


def _site_labels(collect: Collector, nerve: pd.Series, modality: pd.Series) -> pd.Series:
    raw = checks.text(collect.cells, "site")
    result = pd.Series([None] * len(raw), index=raw.index, dtype=object)
    present = (raw != "").to_numpy() & nerve.notna().to_numpy() & modality.notna().to_numpy()
    if not present.any():
        return result
    frame = pd.DataFrame(
        {
            "n": nerve[present],
            "m": modality[present],
            "w": checks.map_unique(raw[present], catalogue.normalise_word),
        }
    )
    for (n, m, w), index in frame.groupby(["n", "m", "w"]).groups.items():
        label = catalogue.canonical_site(n, m, w)
        if label is not None:
            result.loc[index] = label
            continue
        known = catalogue.known_site_words(n, m)
        hint = catalogue.suggest(w, known)
        hint_text = f"; did you mean {catalogue.canonical_site(n, m, hint)!r}?" if hint else "."
        mask = np.zeros(len(raw), dtype=bool)
        mask[collect.cells.index.get_indexer(index)] = True
        collect.add(
            mask,
            "site",
            f"unknown stimulation site for the {m} {n} nerve{hint_text} Known sites: "
            + (", ".join(sorted({catalogue.canonical_site(n, m, k) for k in known})) or "none listed"),
        )
    return result


def validate_measurements(
    cells: pd.DataFrame, *, allow_unusual: bool = False, today: dt.date | None = None
) -> MeasurementBatch:
    """Check every cell and every group of rows; raise :class:`InputRejected` listing all problems."""
    today = today or dt.date.today()
    limits = ranges()
    collect = Collector(cells)
    checks.unknown_columns(collect, KNOWN)
    missing = checks.missing_columns(collect, REQUIRED)
    if not any(c in cells.columns for c in AMPLITUDES):
        collect.add_one(
            1, "amplitude_mv", None, "the header needs amplitude_mv (motor) and/or amplitude_uv (sensory)"
        )
        missing = True
    if missing or len(cells) == 0:
        if len(cells) == 0 and not missing:
            collect.add_one(None, None, None, "the file has a header but no data rows")
        raise InputRejected("The measurements file was refused", guarded(collect.sorted_problems()))

    patient = checks.patient_codes(collect)
    visit_date = checks.iso_dates(collect, "visit_date", required=True, not_after=today)
    nerve = _nerve_mapping(collect)
    side = checks.vocabulary(
        collect, "side", SIDE_ALIASES, required=True, shown_choices=["left", "right", "L", "R"]
    )
    modality = checks.vocabulary(collect, "modality", _word_map(("motor", "sensory")), required=True)
    motor = (modality == "motor").to_numpy()
    sensory = (modality == "sensory").to_numpy()

    # A nerve must be studied in a modality it has.
    pairs = nerve.fillna("") + "|" + modality.fillna("")
    known_pair = checks.map_unique(
        pairs,
        lambda p: "" in p.split("|") or p.split("|")[1] in catalogue.nerves()[p.split("|")[0]].modalities,
    ).to_numpy(dtype=bool)
    collect.add(
        ~known_pair,
        "modality",
        "this nerve is not studied in this modality here (see tracker/reference/nerves.csv and the README's "
        "nerve table)",
    )

    site_order, _ = checks.number(collect, "site_order", required=True)
    bad_order = ~np.isnan(site_order) & (
        (site_order < 1) | (site_order != np.floor(site_order)) | (site_order > 20)
    )
    collect.add(bad_order, "site_order", "expected a whole number from 1 (most distal) to 20")
    collect.add(
        sensory & ~np.isnan(site_order) & (site_order != 1),
        "site_order",
        "a sensory test has one stimulation site: site_order must be 1",
    )

    distance, _ = checks.number(collect, "distance_mm", required=True, unit="mm")
    checks.in_range(collect, "distance_mm", distance, limits["distance_mm"])

    amplitude_mv, _ = checks.number(collect, "amplitude_mv", unit="mV")
    amplitude_uv, _ = checks.number(collect, "amplitude_uv", unit="µV")
    checks.in_range(collect, "amplitude_mv", amplitude_mv, limits["amplitude_mv"])
    checks.in_range(collect, "amplitude_uv", amplitude_uv, limits["amplitude_uv"])
    collect.add(
        motor & np.isnan(amplitude_mv),
        "amplitude_mv",
        "a motor row needs the CMAP amplitude in mV (0 for no response)",
    )
    collect.add(
        motor & ~np.isnan(amplitude_uv),
        "amplitude_uv",
        "a motor row gives its amplitude in amplitude_mv, not µV",
    )
    collect.add(
        sensory & np.isnan(amplitude_uv),
        "amplitude_uv",
        "a sensory row needs the SNAP amplitude in µV (0 for no response)",
    )
    collect.add(
        sensory & ~np.isnan(amplitude_mv),
        "amplitude_mv",
        "a sensory row gives its amplitude in amplitude_uv, not mV",
    )
    amplitude = np.where(motor, amplitude_mv, amplitude_uv)

    latency, latency_absent = checks.number(collect, "latency_ms", words=ABSENT_WORDS, unit="ms")
    checks.in_range(collect, "latency_ms", latency, limits["latency_ms"])
    no_response = amplitude == 0
    has_amplitude = ~np.isnan(amplitude) & (amplitude > 0)
    collect.add(
        no_response & ~np.isnan(latency),
        "latency_ms",
        "amplitude 0 records no response: leave latency_ms empty (or write 'absent')",
    )
    latency_text = checks.text(cells, "latency_ms")
    collect.add(
        has_amplitude & np.isnan(latency) & ~latency_absent & (latency_text == "").to_numpy(),
        "latency_ms",
        "a recorded response needs its onset latency in ms",
    )
    collect.add(
        has_amplitude & latency_absent,
        "latency_ms",
        "latency says 'absent' but the amplitude is above 0; write amplitude 0 for no response",
    )

    peak_latency, _ = checks.number(collect, "peak_latency_ms", unit="ms")
    checks.in_range(collect, "peak_latency_ms", peak_latency, limits["peak_latency_ms"])
    with np.errstate(invalid="ignore"):
        collect.add(
            peak_latency < latency,
            "peak_latency_ms",
            "the peak latency is earlier than the onset latency of the same response",
        )
    duration, _ = checks.number(collect, "duration_ms", unit="ms")
    checks.in_range(collect, "duration_ms", duration, limits["duration_ms"])
    area, _ = checks.number(collect, "area_mvms", unit="mV·ms")
    checks.in_range(collect, "area_mvms", area, limits["area_mvms"])

    temperature, _ = checks.number(collect, "temperature_c", unit="°C")
    checks.in_range(collect, "temperature_c", temperature, limits["temperature_c"])
    lff, _ = checks.number(collect, "lff_hz", unit="Hz")
    checks.in_range(collect, "lff_hz", lff, limits["lff_hz"])
    f_latency, f_absent = checks.number(collect, "f_latency_ms", words=ABSENT_WORDS, unit="ms")
    checks.in_range(collect, "f_latency_ms", f_latency, limits["f_latency_ms"])
    f_persistence, _ = checks.number(collect, "f_persistence_pct", unit="%")
    checks.in_range(collect, "f_persistence_pct", f_persistence, limits["f_persistence_pct"])
    collect.add(
        sensory & (~np.isnan(f_latency) | f_absent), "f_latency_ms", "F-waves belong to motor nerve tests"
    )
    collect.add(
        sensory & ~np.isnan(f_persistence), "f_persistence_pct", "F-waves belong to motor nerve tests"
    )
    recording = checks.map_unique(checks.text(cells, "recording_site"), catalogue.normalise_word).replace(
        "", None
    )
    collect.add(
        recording.str.len().gt(RECORDING_SITE_CHARS).to_numpy(dtype=bool),
        "recording_site",
        f"a recording site has at most {RECORDING_SITE_CHARS} characters",
    )

    height, _ = checks.number(collect, "height_cm", unit="cm")
    checks.in_range(collect, "height_cm", height, limits["height_cm"])
    sex = checks.vocabulary(collect, "sex", _word_map(SEXES))
    birth_year, _ = checks.number(collect, "birth_year", unit="years")
    with np.errstate(invalid="ignore"):
        collect.add(
            ~np.isnan(birth_year) & (birth_year != np.floor(birth_year)),
            "birth_year",
            "expected a whole year such as 1961",
        )
    checks.in_range(collect, "birth_year", birth_year, limits["birth_year"])
    visit_year = visit_date.dt.year.to_numpy(dtype=float, na_value=np.nan)
    with np.errstate(invalid="ignore"):
        collect.add(birth_year > visit_year, "birth_year", "the birth year is after the visit date")
    diagnosis = checks.vocabulary(collect, "diagnosis", _word_map(DIAGNOSES))
    phenotype = checks.vocabulary(collect, "phenotype", _word_map(PHENOTYPES))
    collect.add(
        phenotype.notna().to_numpy() & diagnosis.notna().to_numpy() & (diagnosis != "cidp").to_numpy(),
        "phenotype",
        "a phenotype is recorded for CIDP only",
    )
    entrapment = checks.vocabulary(
        collect,
        "wrist_entrapment",
        {k: ("yes" if v else "no") for k, v in YES_NO.items()},
        shown_choices=["yes", "no"],
    )
    collect.add(
        entrapment.notna().to_numpy() & nerve.notna().to_numpy() & (nerve != "median").to_numpy(),
        "wrist_entrapment",
        "wrist_entrapment is stated on median nerve rows only",
    )
    site_label = _site_labels(collect, nerve, modality)

    frame = pd.DataFrame(
        {
            ROW: cells[ROW].to_numpy(),
            "patient": patient.to_numpy(),
            "visit_date": python_dates(visit_date),
            "nerve": nerve.to_numpy(),
            "side": side.to_numpy(),
            "modality": modality.to_numpy(),
            "site_order": site_order,
            "label": site_label.to_numpy(),
            "distance_mm": distance,
            "latency_ms": latency,
            "peak_latency_ms": peak_latency,
            "amplitude_mv": np.where(motor, amplitude_mv, np.nan),
            "amplitude_uv": np.where(sensory, amplitude_uv, np.nan),
            "duration_ms": duration,
            "area_mvms": area,
            "temperature_c": temperature,
            "lff_hz": lff,
            "f_latency_ms": f_latency,
            "f_absent": np.where(f_absent, True, None),
            "f_persistence_pct": f_persistence,
            "recording_site": recording.to_numpy(),
            "wrist_entrapment": entrapment.map({"yes": True, "no": False}).to_numpy(),
            "height_cm": height,
            "diagnosis": diagnosis.to_numpy(),
            "phenotype": phenotype.to_numpy(),
            "sex": sex.to_numpy(),
            "birth_year": birth_year,
        }
    )
    keys_ok = frame[TEST_KEY].notna().all(axis=1).to_numpy() & ~np.isnan(site_order)
    if keys_ok.any():
        _group_checks(collect, frame, keys_ok, allow_unusual, limits)
    unusual = getattr(collect, "unusual", [])
    if collect.problems:
        raise InputRejected("The measurements file was refused", guarded(collect.sorted_problems()))
    return _assemble(frame, unusual)


def _first(frame: pd.DataFrame, keys: list[str], columns: list[str]) -> pd.DataFrame:
    """One row per group: the first stated value of each column, and the group's first file row."""
    grouped = frame.groupby(keys, sort=True, dropna=False)
    result = grouped[columns].first()
    result[ROW] = grouped[ROW].min()
    return result.reset_index()


def _assemble(frame: pd.DataFrame, unusual: list[Problem]) -> MeasurementBatch:
    """Sort sites by nerve test and site order, and gather one row per nerve test, visit and patient."""
    test_code = frame.groupby(TEST_KEY, sort=True).ngroup().to_numpy()
    order = np.lexsort((frame["site_order"].to_numpy(), test_code))
    frame = frame.iloc[order].reset_index(drop=True)
    test_code = test_code[order]
    frame["site_order"] = frame["site_order"].astype(int)
    nerve_tests = _first_by_code(frame, test_code, TEST_KEY, NERVE_LEVEL)
    nerve_tests["f_absent"] = nerve_tests["f_absent"].fillna(False).astype(bool)
    visit_code = frame.groupby(VISIT_KEY, sort=True).ngroup().to_numpy()
    visits = _first_by_code(frame, visit_code, VISIT_KEY, VISIT_LEVEL)
    patients = _first(frame, ["patient"], PATIENT_LEVEL)
    visits["fingerprint"] = _fingerprints(frame, nerve_tests, visits)
    # Both codes number their groups 0, 1, 2… in the order of the sorted rows, which are the rows of
    # ``nerve_tests`` and ``visits``.
    test_starts = np.flatnonzero(np.r_[True, test_code[1:] != test_code[:-1]])
    return MeasurementBatch(
        sites=frame[TEST_KEY + SITE_VALUES],
        nerve_tests=nerve_tests,
        visits=visits,
        patients=patients,
        unusual=unusual,
        rows=frame,
        site_test=test_code,
        test_visit=visit_code[test_starts],
    )


def _first_by_code(
    frame: pd.DataFrame, code: np.ndarray, keys: list[str], columns: list[str]
) -> pd.DataFrame:
    """Like :func:`_first` for rows already sorted so that each group (integer ``code``) is contiguous."""
    starts = np.flatnonzero(np.r_[True, code[1:] != code[:-1]])
    result = frame[keys].iloc[starts].reset_index(drop=True)
    values = frame[columns].groupby(code, sort=True).first().reset_index(drop=True)
    result[columns] = values
    result[ROW] = frame[ROW].groupby(code, sort=True).min().to_numpy()
    return result
