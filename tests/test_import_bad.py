"""Bad input for ``ncs-tracker import FILE``: every defect is refused,
located and leaves the database as it was.

Each case mutates a small valid file and checks, on SQLite and on PostgreSQL:

1. exit code 1 (DESIGN.md §5: "1 bad input or a refused action");
2. a problem line on stderr that names the spreadsheet row (header = row 1) and the column, and says what was
   expected (DESIGN.md §4.1: "a list of every problem with row number ... and column");
3. the database fingerprint unchanged, byte for byte (DESIGN.md §4.1: "the database exactly as before").

All patient codes, dates and measurements in this file are invented for testing; none describes a person.
The shared database per backend holds the invented demo clinic (``demo_data/``), imported once per module.
"""

from __future__ import annotations

import copy
import csv
import datetime as dt
import io
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import pytest
from sqlalchemy import select

from conftest import BACKENDS, DEMO, fingerprint, new_database, run_cli
from tracker.db import migrate
from tracker.db.models import AuditEvent
from tracker.db.session import make_engine, make_session_factory
from tracker.services.importing import import_file
from tracker.services.tables import ROW

# ------------------------------------------------------------------------------------------------------------
# Valid bases (invented data)
# ------------------------------------------------------------------------------------------------------------

NEW_PATIENT = "T-100"  # invented code, not in the demo clinic
KNOWN_PATIENT = "DEMO-01"  # invented demo patient, stored in the shared database
VISIT = "2024-03-12"  # invented, in the past

MEASUREMENT_COLUMNS = [
    "patient",
    "visit_date",
    "nerve",
    "side",
    "modality",
    "site_order",
    "site",
    "distance_mm",
    "latency_ms",
    "peak_latency_ms",
    "amplitude_mv",
    "amplitude_uv",
    "temperature_c",
    "f_latency_ms",
    "height_cm",
    "sex",
    "birth_year",
    "diagnosis",
    "phenotype",
    "wrist_entrapment",
]


def measurement_base() -> list[dict[str, str]]:
    """Invented right median study of a new patient: 3 motor sites (rows 2–4) and 1 sensory site (row 5).

    Velocities: elbow segment 230 mm / 4.3 ms ≈ 53 m/s, axilla segment 120 mm / 2.2 ms ≈ 55 m/s,
    sensory 130 mm / 2.9 ms ≈ 45 m/s — all ordinary, so every refusal below is caused by the mutation.
    """
    common = {
        "patient": NEW_PATIENT,
        "visit_date": VISIT,
        "nerve": "median",
        "side": "right",
        "temperature_c": "33",
        "height_cm": "168",
        "sex": "female",
        "birth_year": "1970",
        "diagnosis": "cidp",
        "phenotype": "typical",
        "wrist_entrapment": "no",
    }
    motor = {"modality": "motor", "peak_latency_ms": "", "amplitude_uv": "", "f_latency_ms": "29.5"}
    sites = [
        {
            **common,
            **motor,
            "site_order": "1",
            "site": "wrist",
            "distance_mm": "70",
            "latency_ms": "3.6",
            "amplitude_mv": "8.1",
        },
        {
            **common,
            **motor,
            "site_order": "2",
            "site": "elbow",
            "distance_mm": "230",
            "latency_ms": "7.9",
            "amplitude_mv": "7.6",
        },
        {
            **common,
            **motor,
            "site_order": "3",
            "site": "axilla",
            "distance_mm": "120",
            "latency_ms": "10.1",
            "amplitude_mv": "7.3",
        },
        {
            **common,
            "modality": "sensory",
            "site_order": "1",
            "site": "wrist",
            "distance_mm": "130",
            "latency_ms": "2.9",
            "peak_latency_ms": "3.5",
            "amplitude_mv": "",
            "amplitude_uv": "22",
            "f_latency_ms": "",
        },
    ]
    return [{c: row[c] for c in MEASUREMENT_COLUMNS} for row in sites]


TREATMENT_COLUMNS = [
    "patient",
    "therapy",
    "start_date",
    "end_date",
    "dose",
    "dose_unit",
    "interval_days",
    "note",
]
SCORE_COLUMNS = ["patient", "date", "scale", "value"]


def treatment_base() -> list[dict[str, str]]:
    """Invented new treatment period of a stored demo patient (row 2)."""
    return [
        {
            "patient": KNOWN_PATIENT,
            "therapy": "corticosteroid",
            "start_date": "2024-06-03",
            "end_date": "2024-09-01",
            "dose": "1",
            "dose_unit": "mg/kg",
            "interval_days": "1",
            "note": "invented course",
        },
    ]


def score_base() -> list[dict[str, str]]:
    """Invented new scores of a stored demo patient on one day (rows 2–4)."""
    return [
        {"patient": KNOWN_PATIENT, "date": "2024-06-03", "scale": "incat", "value": "3"},
        {"patient": KNOWN_PATIENT, "date": "2024-06-03", "scale": "mrc_sum", "value": "52"},
        {"patient": KNOWN_PATIENT, "date": "2024-06-03", "scale": "i_rods", "value": "58"},
    ]


def _demo_rows(name: str, keep: Callable[[dict[str, str]], bool]) -> tuple[list[str], list[dict[str, str]]]:
    with (DEMO / name).open(encoding="utf-8", newline="") as handle:
        reader = csv.DictReader(handle)
        return list(reader.fieldnames or []), [row for row in reader if keep(row)]


def demo_visit_base() -> tuple[list[str], list[dict[str, str]]]:
    """The stored (invented) first visit of DEMO-01, exactly as in demo_data/measurements.csv."""
    return _demo_rows(
        "measurements.csv", lambda r: r["patient"] == "DEMO-01" and r["visit_date"] == "2023-02-14"
    )


def demo_treatment_base() -> tuple[list[str], list[dict[str, str]]]:
    """The stored (invented) maintenance period of DEMO-01 that starts on 2023-03-17."""
    return _demo_rows(
        "treatments.csv", lambda r: r["patient"] == "DEMO-01" and r["start_date"] == "2023-03-17"
    )


def demo_score_base() -> tuple[list[str], list[dict[str, str]]]:
    """The stored (invented) INCAT score of DEMO-01 on 2023-02-14."""
    return _demo_rows(
        "scores.csv",
        lambda r: r["patient"] == "DEMO-01" and r["date"] == "2023-02-14" and r["scale"] == "incat",
    )


BASES: dict[str, Callable[[], tuple[list[str], list[dict[str, str]]]]] = {
    "measurements": lambda: (list(MEASUREMENT_COLUMNS), measurement_base()),
    "treatments": lambda: (list(TREATMENT_COLUMNS), treatment_base()),
    "scores": lambda: (list(SCORE_COLUMNS), score_base()),
    "demo_visit": demo_visit_base,
    "demo_treatment": demo_treatment_base,
    "demo_score": demo_score_base,
}


# ------------------------------------------------------------------------------------------------------------
# A file under construction, and mutations of it
# ------------------------------------------------------------------------------------------------------------


@dataclass
class Sheet:
    """Rows keyed by column key; ``headers`` holds the text written for each
    key (renames change only that)."""

    keys: list[str]
    rows: list[dict[str, str]]
    headers: dict[str, str] = field(default_factory=dict)
    suffix: str = ".csv"
    encoding: str = "utf-8"
    raw: bytes | None = None

    @classmethod
    def from_base(cls, name: str) -> Sheet:
        keys, rows = BASES[name]()
        return cls(keys=list(keys), rows=copy.deepcopy(rows), headers={k: k for k in keys})

    def write(self, folder: Path, stem: str = "input") -> Path:
        path = folder / f"{stem}{self.suffix}"
        if self.raw is not None:
            path.write_bytes(self.raw)
        elif self.suffix == ".xlsx":
            import openpyxl

            book = openpyxl.Workbook()
            sheet = book.active
            sheet.append([self.headers[k] for k in self.keys])
            for row in self.rows:
                sheet.append([row.get(k, "") for k in self.keys])
            book.save(path)
        else:
            buffer = io.StringIO(newline="")
            writer = csv.writer(buffer, lineterminator="\n")
            writer.writerow([self.headers[k] for k in self.keys])
            for row in self.rows:
                writer.writerow([row.get(k, "") for k in self.keys])
            path.write_bytes(buffer.getvalue().encode(self.encoding))
        return path


Mutation = Callable[[Sheet], None]
ALL = "all"  # every data row


def cell(rows: int | tuple[int, ...] | str, column: str, value: str) -> Mutation:
    """Set ``column`` on spreadsheet ``rows`` (2 = first data row), or on every row with ``ALL``."""

    def apply(sheet: Sheet) -> None:
        numbers = (
            range(2, len(sheet.rows) + 2) if rows == ALL else ((rows,) if isinstance(rows, int) else rows)
        )
        for number in numbers:
            sheet.rows[number - 2][column] = value

    return apply


def rename(column: str, header: str) -> Mutation:
    def apply(sheet: Sheet) -> None:
        sheet.headers[column] = header

    return apply


def drop(*columns: str) -> Mutation:
    def apply(sheet: Sheet) -> None:
        sheet.keys = [k for k in sheet.keys if k not in columns]

    return apply


def no_data_rows(sheet: Sheet) -> None:
    sheet.rows = []


def suffix(extension: str) -> Mutation:
    def apply(sheet: Sheet) -> None:
        sheet.suffix = extension

    return apply


def encoding(name: str) -> Mutation:
    def apply(sheet: Sheet) -> None:
        sheet.encoding = name

    return apply


def raw(content: bytes) -> Mutation:
    def apply(sheet: Sheet) -> None:
        sheet.raw = content

    return apply


def both(*mutations: Mutation) -> Mutation:
    def apply(sheet: Sheet) -> None:
        for mutation in mutations:
            mutation(sheet)

    return apply


def future_day() -> str:
    return (dt.date.today() + dt.timedelta(days=30)).isoformat()


def cell_future(rows, column: str) -> Mutation:
    """Set a date 30 days ahead, computed when the case runs (a fixed date would stop being in the future)."""

    def apply(sheet: Sheet) -> None:
        cell(rows, column, future_day())(sheet)

    return apply


# ------------------------------------------------------------------------------------------------------------
# The cases: id, base, mutation, expected row, expected column, expected message substring
# (row/column None: a file-level problem that has no single cell)
# ------------------------------------------------------------------------------------------------------------


def case(case_id, base, mutation, row, column, expected, *, marks=()):
    return pytest.param(base, mutation, row, column, expected, id=case_id, marks=marks)


M, TR, SC = "measurements", "treatments", "scores"

CASES = [
    # --- file and header level ------------------------------------------------------------------------------
    # DESIGN.md §4.1: header names matched ignoring case/spaces; unknown names
    # refused (suggestion: product rule)
    case(
        "unknown-column-did-you-mean",
        M,
        rename("temperature_c", "temprature_c"),
        1,
        "temprature_c",
        "did you mean 'temperature_c'?",
    ),
    # DESIGN.md §4.1: required columns
    case(
        "missing-required-column",
        M,
        drop("latency_ms"),
        1,
        "latency_ms",
        "required column is missing from the header row",
    ),
    # DESIGN.md §4.1: amplitude_mv / amplitude_uv is required (one of them)
    case(
        "missing-both-amplitude-columns",
        M,
        drop("amplitude_mv", "amplitude_uv"),
        1,
        "amplitude_mv",
        "needs amplitude_mv (motor) and/or amplitude_uv",
    ),
    # DESIGN.md §4.1 (header matching ignores case and surrounding spaces, so ' Side ' repeats 'side')
    case(
        "duplicate-header-ignoring-case-and-spaces",
        M,
        rename("sex", " Side "),
        1,
        "side",
        "appears more than once",
    ),
    # the product keeps a spreadsheet row number under this name, so a file may not use it
    case("reserved-column-name", M, rename("wrist_entrapment", ROW.upper()), 1, ROW, "reserved"),
    case("header-only-file", M, no_data_rows, None, None, "has a header but no data rows"),
    # DESIGN.md §4.1: "a file that is not UTF-8 is refused with a message that says so"
    case(
        "not-utf8-latin1",
        M,
        both(cell(2, "site", "poignet é"), encoding("latin-1")),
        None,
        None,
        "is not valid UTF-8",
    ),
    case(
        "not-utf8-names-row-and-column",
        M,
        both(cell(2, "site", "poignet é"), encoding("latin-1")),
        2,
        "site",
        "not valid UTF-8",
    ),
    case(
        "unsupported-extension",
        M,
        suffix(".ods"),
        None,
        None,
        "expected a .csv (UTF-8, comma-separated) or .xlsx file",
    ),
    case("empty-file", M, raw(b""), None, None, "no header row and no data"),
    case(
        "damaged-xlsx",
        M,
        both(suffix(".xlsx"), raw(b"this is not a workbook")),
        None,
        None,
        "damaged or is not a workbook",
    ),
    case(
        "header-of-unknown-kind",
        M,
        raw(b"code,when,what\nT-100,2024-03-12,x\n"),
        1,
        None,
        "expected measurements (with a 'nerve' column)",
    ),
    # --- vocabularies (DESIGN.md §4.1) ----------------------------------------------------------------------
    case("unknown-nerve-did-you-mean", M, cell(5, "nerve", "medain"), 5, "nerve", "did you mean 'median'?"),
    case(
        "unknown-nerve-in-xlsx",
        M,
        both(suffix(".xlsx"), cell(5, "nerve", "medain")),
        5,
        "nerve",
        "did you mean 'median'?",
    ),
    # site labels per nerve: tracker/reference/sites.csv
    case("unknown-site-did-you-mean", M, cell(3, "site", "elbw"), 3, "site", "did you mean 'elbow'?"),
    # without a close match the message still reads as sentences and lists the known names
    case(
        "unknown-nerve-without-hint",
        M,
        cell(5, "nerve", "xq"),
        5,
        "nerve",
        "unknown nerve. Known nerves: axillary, dorsal_ulnar_cutaneous",
    ),
    case(
        "unknown-site-without-hint",
        M,
        cell(3, "site", "xq"),
        3,
        "site",
        "unknown stimulation site for the motor median nerve. Known sites: axilla, elbow, erb, wrist",
    ),
    case("bad-side", M, cell(5, "side", "both"), 5, "side", "expected one of left, right, L, R"),
    case(
        "missing-side",
        M,
        cell(5, "side", ""),
        5,
        "side",
        "required value is missing; expected one of left, right",
    ),
    case(
        "bad-modality-did-you-mean",
        M,
        cell(5, "modality", "sensroy"),
        5,
        "modality",
        "did you mean 'sensory'?",
    ),
    # tracker/reference/nerves.csv: the sural nerve is studied as a sensory nerve only
    case(
        "sural-motor",
        M,
        both(cell(5, "nerve", "sural"), cell(5, "modality", "motor"), cell(5, "site", "")),
        5,
        "modality",
        "not studied in this modality",
    ),
    case("bad-sex-did-you-mean", M, cell(ALL, "sex", "femal"), 2, "sex", "did you mean 'female'?"),
    case(
        "bad-diagnosis-did-you-mean",
        M,
        cell(ALL, "diagnosis", "cipd"),
        2,
        "diagnosis",
        "did you mean 'cidp'?",
    ),
    case(
        "bad-wrist-entrapment-word",
        M,
        cell(2, "wrist_entrapment", "maybe"),
        2,
        "wrist_entrapment",
        "expected one of yes, no",
    ),
    # --- numbers --------------------------------------------------------------------------------------------
    case(
        "latency-with-unit-text",
        M,
        cell(3, "latency_ms", "7.9 ms"),
        3,
        "latency_ms",
        "not a number; expected a number in ms",
    ),
    case(
        "decimal-comma",
        M,
        cell(2, "latency_ms", "3,6"),
        2,
        "latency_ms",
        "with a point as the decimal separator",
    ),
    case(
        "site-order-not-whole",
        M,
        cell(3, "site_order", "1.5"),
        3,
        "site_order",
        "expected a whole number from 1",
    ),
    case(
        "missing-distance",
        M,
        cell(3, "distance_mm", ""),
        3,
        "distance_mm",
        "required value is missing; expected a number in mm",
    ),
    # tracker/reference/plausibility.csv (common practice, no source): distance > 0 mm
    case(
        "negative-distance",
        M,
        cell(3, "distance_mm", "-230"),
        3,
        "distance_mm",
        "outside the plausible range; expected > 0",
    ),
    case(
        "zero-distance",
        M,
        cell(2, "distance_mm", "0"),
        2,
        "distance_mm",
        "outside the plausible range; expected > 0",
    ),
    # plausibility.csv (common practice, no source): onset latency ≤ 100 ms
    case(
        "latency-over-100-ms", M, cell(4, "latency_ms", "101"), 4, "latency_ms", "expected > 0 and ≤ 100 ms"
    ),
    # plausibility.csv (common practice, no source): amplitude ≥ 0
    case(
        "negative-amplitude",
        M,
        cell(3, "amplitude_mv", "-7.6"),
        3,
        "amplitude_mv",
        "outside the plausible range; expected ≥ 0",
    ),
    # plausibility.csv (common practice, no source): 20–40 °C; 91.4 is a Fahrenheit reading
    case(
        "temperature-fahrenheit",
        M,
        cell((2, 3, 4), "temperature_c", "91.4"),
        2,
        "temperature_c",
        "expected ≥ 20 and ≤ 40 °C",
    ),
    # plausibility.csv (common practice, no source): 50–250 cm; 1.68 is metres
    case("height-in-metres", M, cell(ALL, "height_cm", "1.68"), 2, "height_cm", "expected ≥ 50 and ≤ 250 cm"),
    # --- dates (DESIGN.md §4.1: ISO dates) ------------------------------------------------------------------
    case(
        "impossible-date",
        M,
        cell(ALL, "visit_date", "2024-02-30"),
        2,
        "visit_date",
        "not a real date; expected YYYY-MM-DD",
    ),
    case("non-iso-date", M, cell(ALL, "visit_date", "12/03/2024"), 2, "visit_date", "expected YYYY-MM-DD"),
    case("future-date", M, cell_future(ALL, "visit_date"), 2, "visit_date", "date is in the future"),
    case(
        "birth-year-after-visit",
        M,
        cell(ALL, "birth_year", "2025"),
        2,
        "birth_year",
        "the birth year is after the visit date",
    ),
    # --- patient codes (pseudonymous codes only: DESIGN.md §3) ----------------------------------------------
    case(
        "patient-code-with-space", M, cell(ALL, "patient", "T 100"), 2, "patient", "not a valid patient code"
    ),
    # invented name-like text, as a clerk might type by mistake
    case(
        "patient-code-name-like",
        M,
        cell(ALL, "patient", "Anna Example"),
        2,
        "patient",
        "never a name or record number",
    ),
    case("patient-code-missing", M, cell(4, "patient", ""), 4, "patient", "required patient code is missing"),
    # the message names the characters that are not allowed and the allowed ones (issue 10, item 16)
    case(
        "patient-code-accented-letter",
        M,
        cell(ALL, "patient", "MÖ-1"),
        2,
        "patient",
        "'Ö' is not allowed; a patient code has 1–40 characters: letters A–Z or a–z (without accents), "
        "digits 0–9, '.', '_' or '-'",
    ),
    case(
        "patient-code-space-named",
        M,
        cell(ALL, "patient", "T 100"),
        2,
        "patient",
        "' ' (a space) is not allowed",
    ),
    case("patient-code-leading-hyphen", M, cell(ALL, "patient", "-T100"), 2, "patient", "it begins with '-'"),
    case("patient-code-too-long", M, cell(ALL, "patient", "T" * 41), 2, "patient", "it has 41 characters"),
    case(
        "treatment-patient-code-accented",
        TR,
        cell(2, "patient", "DEMO-Ö1"),
        2,
        "patient",
        "'Ö' is not allowed",
    ),
    # --- amplitudes and responses (DESIGN.md §4.1: mV motor, µV sensory; no response = amplitude 0) ---------
    case(
        "motor-row-with-amplitude-uv",
        M,
        both(cell(2, "amplitude_mv", ""), cell(2, "amplitude_uv", "8.1")),
        2,
        "amplitude_uv",
        "a motor row gives its amplitude in amplitude_mv",
    ),
    case(
        "sensory-row-with-amplitude-mv",
        M,
        both(cell(5, "amplitude_uv", ""), cell(5, "amplitude_mv", "22")),
        5,
        "amplitude_mv",
        "a sensory row gives its amplitude in amplitude_uv",
    ),
    case(
        "motor-row-without-amplitude",
        M,
        cell(3, "amplitude_mv", ""),
        3,
        "amplitude_mv",
        "a motor row needs the CMAP amplitude in mV",
    ),
    case(
        "no-response-with-latency",
        M,
        cell(5, "amplitude_uv", "0"),
        5,
        "latency_ms",
        "amplitude 0 records no response",
    ),
    case(
        "response-without-latency",
        M,
        cell(3, "latency_ms", ""),
        3,
        "latency_ms",
        "a recorded response needs its onset latency",
    ),
    case(
        "absent-latency-with-amplitude",
        M,
        cell(5, "latency_ms", "absent"),
        5,
        "latency_ms",
        "write amplitude 0 for no response",
    ),
    case(
        "peak-before-onset",
        M,
        cell(5, "peak_latency_ms", "2.5"),
        5,
        "peak_latency_ms",
        "the peak latency is earlier than the onset latency",
    ),
    # --- F-waves --------------------------------------------------------------------------------------------
    # physiology: the F-wave travels to the cord and back, so it is later than the distal M response
    case(
        "f-wave-shorter-than-distal-latency",
        M,
        cell((2, 3, 4), "f_latency_ms", "3.0"),
        2,
        "f_latency_ms",
        "not longer than the distal motor latency",
    ),
    case(
        "f-wave-on-sensory-row",
        M,
        cell(5, "f_latency_ms", "28"),
        5,
        "f_latency_ms",
        "F-waves belong to motor nerve tests",
    ),
    # --- site sequence (DESIGN.md §4.1: 1 = most distal, then 2, 3 … proximally) ----------------------------
    case(
        "latency-not-growing-proximally",
        M,
        cell(4, "latency_ms", "7.5"),
        4,
        "latency_ms",
        "latencies grow proximally",
    ),
    case(
        "duplicate-site-order",
        M,
        cell(4, "site_order", "2"),
        4,
        "site_order",
        "the same nerve test and site_order appear on rows 3, 4",
    ),
    case("gap-in-site-orders", M, cell(4, "site_order", "4"), 4, "site_order", "not 1, 2, 3… without gaps"),
    case(
        "sensory-site-order-2",
        M,
        cell(5, "site_order", "2"),
        5,
        "site_order",
        "a sensory test has one stimulation site",
    ),
    # DESIGN.md §4.1: outside 10–100 m/s refused as a probable unit error unless
    # --allow-unusual (23 cm for 230 mm)
    case(
        "motor-velocity-distance-in-cm",
        M,
        cell(3, "distance_mm", "23"),
        3,
        "distance_mm",
        "distance unit error",
    ),
    case(
        "motor-velocity-mentions-override",
        M,
        cell(3, "distance_mm", "23"),
        3,
        "distance_mm",
        "import with --allow-unusual",
    ),
    case(
        "motor-velocity-shows-value-as-written",
        M,
        cell(3, "distance_mm", "23"),
        3,
        "distance_mm",
        "(value '23')",
    ),
    case(
        "sensory-velocity-distance-in-cm",
        M,
        cell(5, "distance_mm", "13"),
        5,
        "distance_mm",
        "sensory conduction velocity would be",
    ),
    # --- agreement between rows (DESIGN.md §4.1: "rows that disagree are an error") -------------------------
    case(
        "nerve-level-disagreement",
        M,
        cell(4, "temperature_c", "31"),
        4,
        "temperature_c",
        "rows of the same nerve test disagree",
    ),
    # 'absent' on one row and a latency on another: the same disagreement, in words and numbers
    case(
        "f-wave-absent-and-latency-disagree",
        M,
        cell(3, "f_latency_ms", "absent"),
        4,
        "f_latency_ms",
        "(row 2: 29.5, row 3: absent, row 4: 29.5)",
    ),
    case(
        "visit-level-disagreement",
        M,
        cell(5, "height_cm", "175"),
        5,
        "height_cm",
        "rows of the same visit disagree",
    ),
    case(
        "patient-level-disagreement", M, cell(5, "sex", "male"), 5, "sex", "rows of the same patient disagree"
    ),
    # DESIGN.md §4.1: phenotype "for CIDP"
    case(
        "phenotype-on-non-cidp",
        M,
        cell(ALL, "diagnosis", "mmn"),
        2,
        "phenotype",
        "a phenotype is recorded for CIDP only",
    ),
    # DESIGN.md §4.1: wrist_entrapment "on a median row"
    case(
        "wrist-entrapment-on-ulnar",
        M,
        cell(5, "nerve", "ulnar"),
        5,
        "wrist_entrapment",
        "stated on median nerve rows only",
    ),
    # --- conflicts with stored data (DESIGN.md §4.1: refused unless --replace) ------------------------------
    case(
        "changed-stored-visit",
        "demo_visit",
        cell(2, "latency_ms", "7.15"),
        2,
        "visit_date",
        "import with --replace",
    ),
    case(
        "changed-stored-patient-sex",
        "demo_visit",
        cell(ALL, "sex", "male"),
        2,
        "sex",
        "import with --replace",
    ),
    # --- treatments (DESIGN.md §4.2) ------------------------------------------------------------------------
    case("treatment-unknown-therapy", TR, cell(2, "therapy", "ivgi"), 2, "therapy", "did you mean 'ivig'?"),
    case(
        "treatment-end-before-start",
        TR,
        cell(2, "end_date", "2024-05-01"),
        2,
        "end_date",
        "the treatment ends before it starts",
    ),
    case("treatment-unknown-patient", TR, cell(2, "patient", "T-999"), 2, "patient", "unknown patient"),
    case(
        "treatment-missing-start-column",
        TR,
        drop("start_date"),
        1,
        "start_date",
        "required column is missing",
    ),
    case("treatment-unknown-column", TR, rename("dose", "dosis"), 1, "dosis", "did you mean 'dose'?"),
    case("treatment-zero-dose", TR, cell(2, "dose", "0"), 2, "dose", "a dose must be above 0"),
    case(
        "treatment-dose-without-unit", TR, cell(2, "dose_unit", ""), 2, "dose_unit", "a dose needs its unit"
    ),
    case(
        "treatment-fractional-interval",
        TR,
        cell(2, "interval_days", "2.5"),
        2,
        "interval_days",
        "expected a whole number of days",
    ),
    case(
        "treatment-future-start",
        TR,
        both(cell_future(2, "start_date"), cell(2, "end_date", "")),
        2,
        "start_date",
        "date is in the future",
    ),
    case(
        "treatment-changed-end-date",
        "demo_treatment",
        cell(2, "end_date", "2023-09-01"),
        2,
        "end_date",
        "import with --replace",
    ),
    case(
        "treatment-changed-interval",
        "demo_treatment",
        cell(2, "interval_days", "28"),
        2,
        "interval_days",
        "import with --replace",
    ),
    # --- scores (DESIGN.md §4.2 and tracker/reference/scales.csv) -------------------------------------------
    case(
        "score-incat-11", SC, cell(2, "value", "11"), 2, "value", "outside the incat range; expected 0–10"
    ),  # DESIGN.md §4.2: INCAT 0–10
    case(
        "score-i-rods-101",
        SC,
        cell(4, "value", "101"),
        4,
        "value",
        "outside the i_rods range; expected 0–100",
    ),  # DESIGN.md §4.2
    case(
        "score-fractional-mrc", SC, cell(3, "value", "48.5"), 3, "value", "mrc_sum takes whole numbers"
    ),  # scales.csv: MRC sum integer
    case("score-unknown-scale", SC, cell(2, "scale", "incta"), 2, "scale", "did you mean 'incat'?"),
    case("score-unknown-patient", SC, cell(ALL, "patient", "T-999"), 2, "patient", "unknown patient"),
    case("score-not-a-number", SC, cell(3, "value", "fifty"), 3, "value", "not a number"),
    case(
        "score-duplicate",
        SC,
        cell(3, "scale", "incat"),
        3,
        "scale",
        "the same patient, date and scale appears on rows 2, 3",
    ),
    case(
        "score-changed-stored-value", "demo_score", cell(2, "value", "6"), 2, "value", "import with --replace"
    ),
]


# ------------------------------------------------------------------------------------------------------------
# Fixtures
# ------------------------------------------------------------------------------------------------------------


@pytest.fixture(scope="module", params=BACKENDS)
def shared(request, tmp_path_factory):
    """A migrated database per backend holding the invented demo clinic; the cases must never change it."""
    urls = new_database(request.param, tmp_path_factory.mktemp(f"bad-import-{request.param}"))
    url = next(urls)
    migrate.upgrade(url)
    engine = make_engine(url)
    with make_session_factory(engine).begin() as session:
        for name in ("measurements.csv", "treatments.csv", "scores.csv"):
            import_file(session, DEMO / name, username="test")
    yield url, engine
    engine.dispose()
    urls.close()


def problem_lines(stderr: str) -> list[str]:
    """The listed problems, without the leading '  - '."""
    return [line[4:] for line in stderr.splitlines() if line.startswith("  - ")]


def assert_reported(stderr: str, row: int | None, column: str | None, expected: str) -> None:
    assert "Traceback" not in stderr and "unexpected" not in stderr, stderr
    if row is None and column is None:
        assert expected in stderr, stderr
        return
    prefix = f"row {row}, column '{column}': " if column else f"row {row}: "
    located = [line for line in problem_lines(stderr) if line.startswith(prefix)]
    assert located, f"no problem at {prefix!r} in:\n{stderr}"
    assert any(expected in line for line in located), f"{expected!r} not said at {prefix!r} in:\n{stderr}"


def refused(capsys, url: str, engine, path: Path, *options: str) -> str:
    """Import ``path``; assert exit 1 and an unchanged database; return stderr."""
    before = fingerprint(engine)
    code, _out, err = run_cli(capsys, "--db", url, "import", str(path), *options)
    assert code == 1, f"exit {code}, stderr:\n{err}"
    assert fingerprint(engine) == before, "the database changed although the file was refused"
    return err


# ------------------------------------------------------------------------------------------------------------
# Tests
# ------------------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("base", "mutation", "row", "column", "expected"), CASES)
def test_defect_is_refused_located_and_changes_nothing(
    shared, tmp_path, capsys, base, mutation, row, column, expected
):
    url, engine = shared
    sheet = Sheet.from_base(base)
    mutation(sheet)
    err = refused(capsys, url, engine, sheet.write(tmp_path))
    assert_reported(err, row, column, expected)


def test_every_problem_of_a_file_is_listed(shared, tmp_path, capsys):
    url, engine = shared
    sheet = Sheet.from_base(M)
    defects = [  # (row, column, value): seven invented defects, each in a different cell
        (2, "latency_ms", "3,6"),
        (2, "height_cm", "1.68"),
        (3, "site", "elbw"),
        (3, "amplitude_mv", "-7.6"),
        (4, "temperature_c", "91.4"),
        (5, "nerve", "medain"),
        (5, "peak_latency_ms", "2.0"),
    ]
    for number, column, value in defects:
        cell(number, column, value)(sheet)
    err = refused(capsys, url, engine, sheet.write(tmp_path))
    lines = [line for line in err.splitlines() if line.startswith("  - row")]
    assert len(lines) >= len(defects), err
    for number, column, _value in defects:
        assert any(line.startswith(f"row {number}, column '{column}': ") for line in problem_lines(err)), (
            number,
            column,
            err,
        )


def test_several_files_are_all_or_nothing(shared, tmp_path, capsys):
    """A valid file followed by a bad one in the same command: nothing of the valid one is written."""
    url, engine = shared
    good = Sheet.from_base(M).write(tmp_path, "good")
    bad_sheet = Sheet.from_base(SC)
    cell(2, "value", "11")(bad_sheet)
    bad = bad_sheet.write(tmp_path, "bad")
    before = fingerprint(engine)
    code, _out, err = run_cli(capsys, "--db", url, "import", str(good), str(bad))
    assert code == 1, err
    assert_reported(err, 2, "value", "outside the incat range")
    assert fingerprint(engine) == before


# --- positive controls, each in its own fresh database (conftest's db_url: migrated, empty) -----------------


def test_unmutated_bases_import(db_url, tmp_path, capsys):
    """Without a mutation every base is accepted: the refusals above come from the mutations alone."""
    files = [DEMO / "measurements.csv", DEMO / "treatments.csv", DEMO / "scores.csv"]
    files += [
        Sheet.from_base(name).write(tmp_path, name)
        for name in ("measurements", "treatments", "scores", "demo_visit", "demo_treatment", "demo_score")
    ]
    engine = make_engine(db_url)
    try:
        before = fingerprint(engine)
        code, out, err = run_cli(capsys, "--db", db_url, "import", *map(str, files))
        assert code == 0, err
        assert fingerprint(engine) != before
    finally:
        engine.dispose()
    lines = out.splitlines()
    assert "measurements: 4 rows checked; added 1 visits, replaced 0, 0 unchanged; 1 new patients" in lines, (
        out
    )
    assert "treatments: 1 rows checked; added 1 treatment periods, replaced 0, 0 unchanged" in lines, out
    assert "scores: 3 rows checked; added 3 scores, replaced 0, 0 unchanged" in lines, out
    # the stored demo rows, imported again unchanged, are accepted and change nothing
    assert sum(line.endswith(", 1 unchanged; 0 new patients") for line in lines) == 1, out


def test_unusual_velocity_is_accepted_with_allow_unusual(db_url, tmp_path, capsys):
    """DESIGN.md §4.1: the velocity rule may be overridden with --allow-unusual,
    and the override is recorded."""
    sheet = Sheet.from_base(M)
    cell(3, "distance_mm", "23")(sheet)  # 23 mm / 4.3 ms ≈ 5.3 m/s
    path = sheet.write(tmp_path)
    engine = make_engine(db_url)
    try:
        err = refused(capsys, db_url, engine, path)
        assert_reported(err, 3, "distance_mm", "--allow-unusual")
        code, out, err = run_cli(capsys, "--db", db_url, "import", str(path), "--allow-unusual")
        assert code == 0, err
        assert "added 1 visits" in out, out
        assert "accepted: row 3, column 'distance_mm'" in out, out
        with engine.connect() as connection:
            recorded = (
                connection.execute(select(AuditEvent.after).where(AuditEvent.action == "import_measurements"))
                .scalars()
                .all()
            )
        assert len(recorded) == 1 and recorded[0]["allow_unusual"] is True, recorded
        assert any("distance_mm" in text for text in recorded[0]["unusual_values_accepted"]), recorded
    finally:
        engine.dispose()


# --- messages must not mislead (regressions of defects this suite found) -----------------------------------


def _refused_base(shared, tmp_path, capsys, base: str, mutation: Mutation) -> list[str]:
    url, engine = shared
    sheet = Sheet.from_base(base)
    mutation(sheet)
    return problem_lines(refused(capsys, url, engine, sheet.write(tmp_path)))


def test_disagreement_message_shows_plain_values(shared, tmp_path, capsys):
    lines = _refused_base(shared, tmp_path, capsys, M, cell(4, "temperature_c", "31"))
    located = [
        line
        for line in lines
        if line.startswith("row 4, column 'temperature_c': rows of the same nerve test disagree")
    ]
    assert located, lines
    assert "np.float64" not in located[0], located[0]
    assert "row 3: " in located[0] and "row 4: " in located[0], located[0]


def test_score_that_is_not_a_number_gets_one_message(shared, tmp_path, capsys):
    lines = _refused_base(shared, tmp_path, capsys, SC, cell(3, "value", "fifty"))
    at_value = [line for line in lines if line.startswith("row 3, column 'value': ")]
    assert any("not a number" in line for line in at_value), lines
    assert not any("takes whole numbers" in line for line in at_value), lines


def test_misspelt_nerve_is_not_blamed_on_other_columns(shared, tmp_path, capsys):
    lines = _refused_base(shared, tmp_path, capsys, M, cell(5, "nerve", "medain"))
    assert any(line.startswith("row 5, column 'nerve': ") for line in lines), lines
    assert not any(line.startswith("row 5, column 'wrist_entrapment': ") for line in lines), lines


# --- every problem of a treatments or scores file is listed, unknown patients included (issue 10, item 16) --


def _add_row(copy_of: int, **values: str) -> Mutation:
    """Append a copy of spreadsheet row ``copy_of`` with some cells changed (invented values)."""

    def apply(sheet: Sheet) -> None:
        sheet.rows.append({**sheet.rows[copy_of - 2], **values})

    return apply


@pytest.mark.parametrize(
    ("base", "mutation", "expected"),
    [
        pytest.param(
            TR,
            both(
                _add_row(2, patient="T-999", start_date="2024-07-01"),
                _add_row(2, patient="T-998", dose="0", start_date="2024-08-01"),
                cell(2, "therapy", "ivgi"),
            ),
            [
                (2, "therapy", "did you mean 'ivig'?"),
                (3, "patient", "unknown patient"),
                (4, "patient", "unknown patient"),
                (4, "dose", "above 0"),
            ],
            id="treatments",
        ),
        pytest.param(
            SC,
            both(
                cell(2, "value", "11"),
                cell(3, "patient", "T-999"),
                cell(4, "patient", "T-999"),
                cell(4, "value", "101"),
            ),
            [
                (2, "value", "outside the incat range"),
                (3, "patient", "unknown patient"),
                (4, "patient", "unknown patient"),
                (4, "value", "outside the i_rods range"),
            ],
            id="scores",
        ),
    ],
)
def test_unknown_patients_are_listed_with_every_other_problem(
    shared, tmp_path, capsys, base, mutation, expected
):
    """DESIGN.md §4.1 (import is all-or-nothing with "a list of every problem"), applied to §4.2 files: an
    unknown patient is reported beside the file's other defects, not only when it is the sole problem."""
    url, engine = shared
    sheet = Sheet.from_base(base)
    mutation(sheet)
    err = refused(capsys, url, engine, sheet.write(tmp_path))
    for row, column, words in expected:
        assert_reported(err, row, column, words)
    assert len(problem_lines(err)) == len(expected), err


# --- a refused re-import names what it would change (issue 10, item 16) -------------------------------------


def _demo_row(sheet: Sheet, nerve: str, modality: str, site_order: str) -> int:
    """Spreadsheet row of one site of the stored demo visit (header = row 1)."""
    for index, row in enumerate(sheet.rows):
        if (row["nerve"], row["modality"], row["site_order"]) == (nerve, modality, site_order):
            return index + 2
    raise AssertionError((nerve, modality, site_order))


def test_refused_reimport_names_each_changed_value(shared, tmp_path, capsys):
    """DESIGN.md §4.1 ("a file that changes values of a stored visit is refused unless --replace"): the
    refusal names every value that differs, old → new with its unit, at the row and column that hold it. The
    stored visit is the invented demo visit of DEMO-01 on 2023-02-14 (fibular site 1 amplitude 1.9 mV, height
    164 cm, median motor site 1 latency 7.05 ms, a sural test)."""
    url, engine = shared
    sheet = Sheet.from_base("demo_visit")
    fibular = _demo_row(sheet, "fibular", "motor", "1")
    median = _demo_row(sheet, "median", "motor", "1")
    tibial_2 = _demo_row(sheet, "tibial", "motor", "2")
    cell(fibular, "amplitude_mv", "2.3")(sheet)
    cell(median, "latency_ms", "7.15")(sheet)
    cell(ALL, "height_cm", "165")(sheet)
    sheet.rows = [
        row
        for row in sheet.rows
        if row["nerve"] != "sural" and not (row["nerve"] == "tibial" and row["site_order"] == "2")
    ]
    err = refused(capsys, url, engine, sheet.write(tmp_path))
    assert_reported(
        err, 2, "visit_date", "already stored with different values (5 listed); import with --replace"
    )
    assert_reported(err, fibular, "amplitude_mv", "fibular right site 1 amplitude 1.9 → 2.3 mV")
    assert_reported(err, median, "latency_ms", "median right motor site 1 latency 7.05 → 7.15 ms")
    assert_reported(err, 2, "height_cm", "height 164 → 165 cm")
    assert_reported(err, 2, "nerve", "the sural right nerve test is stored but not in the file")
    assert_reported(err, tibial_2 - 1, "site_order", "tibial right site 2 is stored but not in the file")
    assert len(problem_lines(err)) == 6, err


def test_refused_reimport_names_a_new_nerve_test_and_a_changed_nerve_value(shared, tmp_path, capsys):
    """As above: a nerve test the stored visit lacks, and a nerve-level value
    (temperature) stated on one row."""
    url, engine = shared
    sheet = Sheet.from_base("demo_visit")
    ulnar = _demo_row(sheet, "ulnar", "motor", "1")
    sheet.rows.append({**sheet.rows[ulnar - 2], "side": "left"})  # an invented left ulnar study, row 15
    for number in range(ulnar, ulnar + 3):
        cell(number, "temperature_c", "32.0")(sheet)
    err = refused(capsys, url, engine, sheet.write(tmp_path))
    assert_reported(
        err, len(sheet.rows) + 1, "nerve", "the ulnar left motor nerve test is not in the stored visit"
    )
    assert_reported(err, ulnar, "temperature_c", "ulnar right motor temperature 33.5 → 32 °C")


@pytest.mark.parametrize(
    ("base", "mutation", "column", "expected"),
    [
        pytest.param(
            "demo_treatment",
            cell(2, "interval_days", "28"),
            "interval_days",
            "differs from the stored treatment of DEMO-01 (ivig from 2023-03-17): interval days 21 → 28 "
            "days; import with --replace",
            id="treatment-interval",
        ),
        pytest.param(
            "demo_treatment",
            cell(2, "end_date", "2023-09-01"),
            "end_date",
            "differs from the stored treatment of DEMO-01 (ivig from 2023-03-17): end date empty → "
            "2023-09-01",
            id="treatment-end-date",
        ),
        pytest.param(
            "demo_score",
            cell(2, "value", "6"),
            "value",
            "differs from the stored score of DEMO-01 (incat on 2023-02-14): value 5 → 6; import with "
            "--replace",
            id="score-value",
        ),
    ],
)
def test_refused_treatment_or_score_names_the_stored_and_the_new_value(
    shared, tmp_path, capsys, base, mutation, column, expected
):
    """DESIGN.md §4.1–4.2 (changed stored values refused unless --replace), as for visits: old → new.
    The stored rows are the invented demo ones: DEMO-01's IVIg period from 2023-03-17 (every 21 days,
    no end date) and INCAT 5 on 2023-02-14."""
    lines = _refused_base(shared, tmp_path, capsys, base, mutation)
    assert [line for line in lines if line.startswith(f"row 2, column '{column}': ") and expected in line], (
        lines
    )
