"""Entering a study by hand or by upload, through the importer's own checks and storage.

The entry form's cells are written as a measurements table in the interchange format (DESIGN.md §4.1) and
imported exactly as a file would be: the same validation, the same all-or-nothing rule, the same audit.
Problems name the row by the site grid's own number (the editor's index, 1 = its first row, spare empty rows
counted as the grid counts them) and the field, instead of a file row.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
from dataclasses import dataclass, field
from typing import Any

import pandas as pd
from sqlalchemy.orm import Session

from tracker.errors import InputRejected, Problem
from tracker.services.importing import ImportReport, import_table
from tracker.services.records import patient_record
from tracker.services.measurement_file import AMPLITUDES, OPTIONAL, REQUIRED
from tracker.services.tables import parse_table

# Fields asked once per visit (above the table) and columns of the site table (one row per stimulation site).
VISIT_FIELDS = ["patient", "visit_date", "height_cm", "sex", "birth_year", "diagnosis", "phenotype"]
SITE_COLUMNS = [
    "nerve", "side", "modality", "site_order", "site", "distance_mm", "latency_ms", "amplitude_mv", "amplitude_uv",
    "duration_ms", "area_mvms", "peak_latency_ms", "temperature_c", "lff_hz", "f_latency_ms", "f_persistence_pct",
]
assert set(VISIT_FIELDS + SITE_COLUMNS) <= set(REQUIRED + AMPLITUDES + OPTIONAL)


@dataclass
class EntryResult:
    """``report`` when saved; otherwise the problems by form place (``visit`` fields or site ``rows``)."""

    report: ImportReport | None
    visit_problems: dict[str, list[str]] = field(default_factory=dict)
    row_problems: list[tuple[int, str, str]] = field(default_factory=list)  # (grid row, column, message)
    other_problems: list[str] = field(default_factory=list)

    @property
    def saved(self) -> bool:
        return self.report is not None and not self.report.dry_run


def _cell(value: Any) -> str:
    if value is None or (isinstance(value, float) and pd.isna(value)) or value is pd.NA:
        return ""
    if isinstance(value, dt.date):
        return value.isoformat()
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value).strip()


def entry_csv(visit: dict[str, Any], sites: pd.DataFrame) -> bytes:
    """The form as a measurements CSV (UTF-8): the visit fields repeated on every site row."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(VISIT_FIELDS + SITE_COLUMNS)
    site_rows = sites.reindex(columns=SITE_COLUMNS)
    # Rows the user left entirely empty (the editor's spare rows) are not data.
    site_rows = site_rows[[any(_cell(v) for v in row) for row in site_rows.itertuples(index=False)]]
    for row in site_rows.itertuples(index=False):
        writer.writerow([_cell(visit.get(f)) for f in VISIT_FIELDS] + [_cell(v) for v in row])
    return buffer.getvalue().encode("utf-8")


def enter_visit(
    session: Session, visit: dict[str, Any], sites: pd.DataFrame, *, username: str, replace: bool = False, allow_unusual: bool = False, today: dt.date | None = None
) -> EntryResult:
    """Validate and store one visit from the entry form; nothing is written unless everything is valid."""
    if not _cell(visit.get("patient")):
        return EntryResult(None, visit_problems={"patient": ["a patient code is required"]})
    raw = entry_csv(visit, sites)
    if raw.count(b"\n") < 2:
        return EntryResult(None, other_problems=["Add at least one stimulation-site row (nerve, side, modality, site order, distance, latency, amplitude)."])
    # The grid's number of each row written to the table (empty spare rows are skipped by entry_csv).
    filled = sites.reindex(columns=SITE_COLUMNS)
    grid_rows = [label for label, row in zip(sites.index, filled.itertuples(index=False)) if any(_cell(v) for v in row)]
    try:
        report = import_table(session, parse_table(raw, ".csv"), username=username, replace=replace, allow_unusual=allow_unusual, today=today)
    except InputRejected as error:
        return _placed(error.problems, grid_rows)
    return EntryResult(report)


def patient_details(session: Session, code: str) -> dict[str, Any]:
    """The visit fields of a patient's latest visit (code, sex, birth year, diagnosis, phenotype, height), to
    start the next study from; raises NotFound."""
    record = patient_record(session, code)
    latest = record.visits[-1] if record.visits else None
    return {
        "patient": record.code, "sex": record.sex, "birth_year": record.birth_year, "diagnosis": record.diagnosis,
        "phenotype": record.phenotype, "height_cm": latest.height_cm if latest is not None else None,
    }


def _placed(problems: list[Problem], grid_rows: list | None = None) -> EntryResult:
    result = EntryResult(None)
    for problem in problems:
        text = problem.message + ("" if problem.value in (None, "") else f" (you entered {problem.value!r})")
        if problem.column in VISIT_FIELDS:
            result.visit_problems.setdefault(problem.column, [])
            if text not in result.visit_problems[problem.column]:
                result.visit_problems[problem.column].append(text)
        elif problem.row is not None and problem.row >= 2:
            written = problem.row - 2  # the table's header is row 1
            row = grid_rows[written] if grid_rows is not None and written < len(grid_rows) else written + 1
            result.row_problems.append((row, problem.column or "", text))
        else:
            result.other_problems.append(str(problem))
    return result


def import_upload(
    session: Session, raw: bytes, filename: str, *, username: str, dry_run: bool = False, replace: bool = False, allow_unusual: bool = False
) -> ImportReport:
    """Import an uploaded file (CSV or .xlsx) with the importer; raises :class:`InputRejected`."""
    suffix = "." + filename.rsplit(".", 1)[-1] if "." in filename else ""
    return import_table(session, parse_table(raw, suffix), username=username, dry_run=dry_run, replace=replace, allow_unusual=allow_unusual)


def layout_from_latest_visit(session: Session, code: str) -> pd.DataFrame:
    """The site table of the patient's latest visit with the layout kept (nerve, side, modality, site order,
    label, distance) and the measured values emptied, to start the next study from. Raises NotFound."""
    record = patient_record(session, code)
    rows = []
    if record.visits:
        for nerve in record.visits[-1].nerves:
            for site in nerve.sites:
                rows.append({"nerve": nerve.nerve, "side": nerve.side, "modality": nerve.modality, "site_order": site.order, "site": site.label, "distance_mm": site.distance_mm})
    frame = pd.DataFrame(rows).reindex(columns=SITE_COLUMNS)
    for column in SITE_COLUMNS:
        if column not in ("nerve", "side", "modality", "site", "site_order"):
            frame[column] = frame[column].astype(float)
    for column in ("nerve", "side", "modality", "site"):
        frame[column] = frame[column].astype(object)
    return frame
