"""Cohort export for research (``ncs-tracker export``): tidy tables at visit, nerve-test, segment or long
level, de-identified by default, with a data dictionary and a manifest beside every file.

- :func:`export_frame` returns the whole table as one pandas DataFrame (small cohorts, the dashboard, tests);
- :func:`write_export` streams it to CSV, Parquet or Excel chunk by chunk (bounded memory), writes the
  dictionary and the manifest, and records the export in the audit trail.

What is removed by default, and how ids, dates and ages are made, is in
:mod:`tracker.services.export.deidentify`; the columns and their meanings are in
:mod:`tracker.services.export.columns`; the tables are built in :mod:`tracker.services.export.tables`; files
are written by :mod:`tracker.services.export.files`.
"""

from __future__ import annotations

import dataclasses
import json
import os
import platform
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

import openpyxl
import pandas as pd
import pyarrow
import sqlalchemy
from sqlalchemy.orm import Session

from tracker import CAUTION, __version__
from tracker.errors import TrackerError
from tracker.services.access import audit
from tracker.services.access.permissions import Actor
from tracker.services.export import deidentify, reference
from tracker.services.export.columns import SCORE_WINDOW_DAYS, dictionary_frame, empty_frame
from tracker.services.export.files import (
    ExcelTable,
    open_table,
    output_paths,
    private_file,
    sha256_of,
    write_dictionary_csv,
)
from tracker.services.export.response import manifest_entry as response_manifest
from tracker.services.export.tables import ExportOptions, ExportPlan, prepare

REMOVED_FIELDS = [
    "patient code",
    "hospital record number",
    "name",
    "birth date",
    "birth year",
    "real visit dates",
    "examiner",
    "laboratory",
    "treatment notes and every other free-text note",
]


@dataclass(frozen=True)
class WrittenFile:
    """One file written by an export: where, its SHA-256, size in bytes, and rows (None for the manifest)."""

    role: str
    path: Path
    sha256: str
    size: int
    rows: int | None


@dataclass(frozen=True)
class ExportResult:
    """What an export wrote; ``summary``: in plain words, from the visits selected to the rows written."""

    files: list[WrittenFile]
    visits: int
    rows: int
    manifest: dict[str, Any]
    summary: str = ""


def export_frame(
    session: Session, options: ExportOptions, *, username: str, actor: Actor | None = None
) -> pd.DataFrame:
    """The whole export table as one DataFrame (columns and order as in the files; not neutralised for
    spreadsheets). An identified frame needs ``actor`` (authenticated, allowed ``export_identified``)."""
    plan = prepare(session, options, username=username, actor=actor)
    chunks = list(plan.frames(session))
    if not chunks:
        return empty_frame(plan.columns)
    return pd.concat(chunks, ignore_index=True)


def write_export(
    session: Session,
    options: ExportOptions,
    *,
    file_format: str,
    out: Path | str | None,
    username: str,
    actor: Actor | None = None,
    overwrite: bool = False,
    progress: Callable[[int, int], None] | None = None,
) -> ExportResult:
    """Write the export table, its dictionary and its manifest; audit the export; return what was written.

    Files are written under temporary names and renamed only when everything succeeded; on any error
    the partial files are removed. An identified export needs ``actor`` (authenticated, allowed
    ``export_identified``); refused by :func:`deidentify.require_identified_permission`, it writes nothing at
    all. ``file_format`` "fhir" writes FHIR R4 NDJSON resources instead (:mod:`tracker.services.export.fhir`).
    """
    if file_format == "fhir":
        from tracker.services.export.fhir import write_fhir

        return write_fhir(
            session, options, out=out, username=username, actor=actor, overwrite=overwrite, progress=progress
        )
    paths = output_paths(out, options.level, file_format)
    existing = [p for p in paths.values() if os.path.lexists(p)]  # a link of that name, dangling or not, too
    if existing and not overwrite:
        raise TrackerError(f"{existing[0]} already exists; choose another --out or add --overwrite.")
    plan = prepare(session, options, username=username, actor=actor)
    for path in paths.values():
        path.parent.mkdir(parents=True, exist_ok=True)
    partial: dict[str, Path] = {}

    def create(role: str) -> IO[bytes]:
        """A temporary file for ``role``, created exclusively beside its final name, mode 0600."""
        partial[role], handle = private_file(paths[role])
        return handle

    try:
        handle = create("data")
        table = open_table(file_format, partial["data"], plan.columns, handle)
        try:
            for frame in plan.frames(session, progress):
                table.append(frame)
        finally:
            dictionary = dictionary_frame(plan.columns, caution=CAUTION, notes=_notes(paths))
            if isinstance(table, ExcelTable):
                table.close(dictionary)
            else:
                table.close()
        written = [_file("data", partial["data"], paths["data"], table.rows)]
        if "dictionary" in paths:
            write_dictionary_csv(create("dictionary"), dictionary)
            written.append(_file("dictionary", partial["dictionary"], paths["dictionary"], len(dictionary)))
        for role, frame in _reference_tables(plan).items():
            write_dictionary_csv(create(role), frame)
            written.append(_file(role, partial[role], paths[role], len(frame)))
        summary = summary_text(plan, table.rows, len(written) + 1)
        manifest = build_manifest(plan, file_format, written, summary=summary)
        with create("manifest") as handle:
            handle.write((json.dumps(manifest, indent=2, ensure_ascii=False) + "\n").encode("utf-8"))
        _audit(session, plan, file_format, written, username)
        for role, path in paths.items():
            partial[role].replace(path)
    except BaseException:
        for path in partial.values():
            path.unlink(missing_ok=True)
        raise
    files = [WrittenFile(f.role, paths[f.role], f.sha256, f.size, f.rows) for f in written]
    files.append(
        WrittenFile(
            "manifest",
            paths["manifest"],
            sha256_of(paths["manifest"]),
            paths["manifest"].stat().st_size,
            None,
        )
    )
    return ExportResult(files, plan.visit_count, table.rows, manifest, summary)


def _reference_tables(plan: ExportPlan) -> dict[str, pd.DataFrame]:
    """The limits and criteria tables of this export (see :mod:`tracker.services.export.reference`)."""
    shown = {s.criteria for s in plan.sets}
    sets = [(s.criteria, s.version, s.alias if s.criteria in shown else None) for s in plan.evaluated_sets]
    return {
        "limits": reference.limits_table(plan.limits_info.name, plan.limits_info.version, plan.limits),
        "criteria": reference.criteria_table(sets),
    }


def _notes(paths: dict[str, Path]) -> list[tuple[str, str]]:
    """The dictionary's notes on the other files of the export folder (named as written beside the data)."""
    dictionary = (
        f"{paths['dictionary'].name} (this file)" if "dictionary" in paths else "the sheet 'dictionary'"
    )
    return [
        (
            "(files of this export)",
            f"{paths['data'].name}: the data. {dictionary}: what every column means. "
            f"{paths['limits'].name}: every normal limit of the limit set used (the limits table). "
            f"{paths['criteria'].name}: the version, publication and every threshold of each criteria set "
            "evaluated, and the limb temperature minimums (the criteria table; "
            f"{reference.CRITERIA_TABLE_WORDS}). {paths['manifest'].name}: versions, criteria settings, "
            "filters, response rule sets and settings, row counts and the SHA-256 of every other file.",
        ),
    ]


# Words for a row of each level, in the closing summary.
ROW_WORDS = {
    "visit": "one per visit",
    "nerve": "one per nerve test",
    "segment": "one per motor segment",
    "long": "one per value or recorded absence",
}


def _counted(number: int, word: str) -> str:
    return f"{number:,} {word}{'' if number == 1 else 's'}"


def summary_text(plan: ExportPlan, rows: int, files: int) -> str:
    """What the export wrote, in plain words: ``29 visits of 6 patients → 12 visits of 4 patients after the
    outcome filter (efns-pns-2010-cidp = definite) → 80 rows, one per nerve test, in 5 files``."""
    options, counts = plan.options, plan.counts
    chosen = []
    if options.diagnoses:
        chosen.append("diagnosis " + " or ".join(sorted(options.diagnoses)))
    if options.date_from or options.date_to:
        since = f"from {options.date_from.isoformat()} " if options.date_from else ""
        until = f"to {options.date_to.isoformat()}" if options.date_to else ""
        chosen.append(f"visits {since}{until}".strip())
    if options.patients:
        chosen.append(f"{_counted(len(set(options.patients)), 'patient')} named")
    selected = f"{_counted(plan.visit_count, 'visit')} of {_counted(plan.patient_count, 'patient')}"
    parts = [selected + (f" ({'; '.join(chosen)})" if chosen else "")]
    if options.outcomes:
        wanted = ", ".join(f"{c} = {v}" for c, v in sorted(options.outcomes))
        kept = len(counts.patients_kept)
        parts.append(
            f"{_counted(counts.visits_kept, 'visit')} of {_counted(kept, 'patient')} after the outcome "
            f"filter ({wanted})"
        )
    written = f"{_counted(rows, 'row')}, {ROW_WORDS[options.level]}, in {files} files"
    if counts.visits_without_rows:
        level = "a motor segment" if options.level == "segment" else "a nerve test"
        written += f" ({_counted(counts.visits_without_rows, 'visit')} without {level} gave no row)"
    parts.append(written)
    return " → ".join(parts)


def _file(role: str, written_path: Path, final_path: Path, rows: int) -> WrittenFile:
    return WrittenFile(role, final_path, sha256_of(written_path), written_path.stat().st_size, rows)


def _filters(plan: ExportPlan) -> dict[str, Any]:
    options = plan.options
    patients: dict[str, Any] | None = None
    if plan.patients_filter:
        # Patient codes are not written into a de-identified export, not even here: the export ids stand in.
        patients = {
            "count": len(plan.patients_filter),
            "export_ids": sorted(deidentify.export_id(plan.secret, c) for c in plan.patients_filter),
        }
        if options.identified:
            patients["codes"] = plan.patients_filter
    return {
        "diagnosis": sorted(options.diagnoses) or None,
        "from": options.date_from.isoformat() if options.date_from else None,
        "to": options.date_to.isoformat() if options.date_to else None,
        "outcome": [f"{c}={v}" for c, v in sorted(options.outcomes)] or None,
        "patients": patients,
    }


def build_manifest(
    plan: ExportPlan, file_format: str, written: list[WrittenFile], *, summary: str = ""
) -> dict[str, Any]:
    """The manifest: versions, what the values depend on, filters, row counts and file hashes. It holds no
    timestamp, so it is byte-identical too when the database and the options are the same."""
    options = plan.options
    filtering = {c for c, _ in options.outcomes}
    return {
        "tool": "ncs-tracker",
        "tool_version": __version__,
        "caution": CAUTION,
        "level": options.level,
        "format": file_format,
        "identified": options.identified,
        "de_identification": None
        if options.identified
        else {
            "export_id": (
                "HMAC-SHA256 of the patient code keyed by this database's secret export key, first 16 hex "
                "digits"
            ),
            "dates": (
                "visit_date_shifted: real date moved by a secret per-patient offset of 1 to 365 days "
                "(earlier or later), plus days_since_first_visit"
                if options.dates == "shifted"
                else "days_since_first_visit only"
            ),
            "ages": (
                "age_at_visit top-coded: ages over 89 given as 90 with age_top_coded true (HIPAA Safe "
                "Harbor, 45 CFR 164.514(b)(2)(i)(C))"
            ),
            "removed": REMOVED_FIELDS,
        },
        "criteria": [
            {
                "id": s.criteria,
                "version": s.version,
                "column_prefix": s.alias if s in plan.sets else None,
                "used_for": (["columns"] if s in plan.sets else [])
                + (["outcome filter"] if s.criteria in filtering else []),
            }
            for s in plan.evaluated_sets
        ],
        "criteria_settings": dataclasses.asdict(plan.settings),
        "criteria_settings_from": _settings_origin(options),
        "limits": {"name": plan.limits_info.name, "version": plan.limits_info.version},
        "scores_rule": (
            f"score on the visit date, else the nearest within ±{SCORE_WINDOW_DAYS} days (earlier on a tie)"
        ),
        "response": None if plan.response is None else response_manifest(plan.response),
        "filters": _filters(plan),
        "visits_selected": plan.visit_count,
        "patients_selected": plan.patient_count,
        "visits_exported": plan.counts.visits_kept,
        "patients_exported": len(plan.counts.patients_kept),
        "summary": summary,
        "chunk_visits": options.chunk_visits,
        "files": [
            {"role": f.role, "name": f.path.name, "sha256": f.sha256, "bytes": f.size, "rows": f.rows}
            for f in written
        ],
        "identity_promise": (
            "The same database, options and library versions give byte-identical data and dictionary files, "
            "and this manifest (it holds no timestamp). The manifest's own hash is not listed in it."
        ),
        "library_versions": {
            "python": platform.python_version(),
            "pandas": pd.__version__,
            "pyarrow": pyarrow.__version__,
            "openpyxl": openpyxl.__version__,
            "sqlalchemy": sqlalchemy.__version__,
        },
    }


def _settings_origin(options: ExportOptions) -> str:
    """Where the criteria settings of the manifest came from, in words."""
    if options.settings is not None:
        return "given by the program that asked for the export"
    database = "this database's settings (temperature policy and stored switches, as check uses them)"
    if not options.setting_overrides:
        return f"{database}, else the defaults"
    given = ", ".join(name for name, _ in options.setting_overrides)
    return f"options of this export: {given}; the others: {database}, else the defaults"


def _audit(
    session: Session, plan: ExportPlan, file_format: str, written: list[WrittenFile], username: str
) -> None:
    options = plan.options
    audit.record(
        session,
        username=username,
        action="export_identified" if options.identified else "export",
        entity="export",
        entity_key=f"{options.level} {file_format}",
        after={
            "identified": options.identified,
            "level": options.level,
            "format": file_format,
            "visits": plan.visit_count,
            "filters": _filters(plan),
            "files": {f.path.name: f.sha256 for f in written},
            "rows": {f.path.name: f.rows for f in written},
        },
        detail="identified research export" if options.identified else "de-identified research export",
    )
