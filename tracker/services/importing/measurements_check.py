"""Validate a measurements table (DESIGN.md §4.1) into typed visits, nerve tests and stimulation sites.

Everything is checked before anything is written: every problem is collected with its row and column.
Plausibility ranges come from ``reference/plausibility.csv``; the velocity range may be waived with
``allow_unusual`` (the waived findings are returned so that the import records them).
"""

from __future__ import annotations

import datetime as dt
import hashlib
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from tracker.db.models import NerveTest
from tracker.domain import catalogue
from tracker.domain.conduction import quantise_array
from tracker.domain.plausibility import ranges
from tracker.domain.vocabulary import ABSENT_WORDS, DIAGNOSES, PHENOTYPES, SEXES, SIDE_ALIASES, YES_NO
from tracker.errors import InputRejected, Problem
from tracker.services import checks
from tracker.services.checks import Collector
from tracker.services.importing.clinical_check import python_dates
from tracker.services.input_limits import guarded
from tracker.services.tables import ROW

REQUIRED = ["patient", "visit_date", "nerve", "side", "modality", "site_order", "distance_mm", "latency_ms"]
AMPLITUDES = ["amplitude_mv", "amplitude_uv"]
OPTIONAL = [
    "site",
    "peak_latency_ms",
    "duration_ms",
    "area_mvms",
    "temperature_c",
    "lff_hz",
    "f_latency_ms",
    "f_persistence_pct",
    "recording_site",
    "height_cm",
    "sex",
    "birth_year",
    "diagnosis",
    "phenotype",
    "wrist_entrapment",
]
KNOWN = REQUIRED + AMPLITUDES + OPTIONAL
NERVE_LEVEL = [
    "temperature_c",
    "lff_hz",
    "f_latency_ms",
    "f_absent",
    "f_persistence_pct",
    "recording_site",
    "wrist_entrapment",
]
VISIT_LEVEL = ["height_cm", "diagnosis", "phenotype"]
PATIENT_LEVEL = ["sex", "birth_year"]
TEST_KEY = ["patient", "visit_date", "nerve", "side", "modality"]
VISIT_KEY = ["patient", "visit_date"]
SITE_VALUES = [
    "site_order",
    "label",
    "distance_mm",
    "latency_ms",
    "peak_latency_ms",
    "amplitude_mv",
    "amplitude_uv",
    "duration_ms",
    "area_mvms",
]
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


def _sorted(frame: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    """``frame`` sorted by ``keys`` (ascending, stable), like ``sort_values`` but on integer codes."""
    codes = [pd.factorize(frame[k], sort=True)[0] for k in keys]
    order = np.lexsort(codes[::-1])
    return frame.iloc[order].reset_index(drop=True)


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
