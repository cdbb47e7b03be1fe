"""Entering a study by hand or by upload, through the importer's own checks and storage.

The entry form has visit fields, a grid of nerve tests (values measured once per nerve test: limb
temperature, filter setting, F-waves, recording site, wrist entrapment) and a grid of stimulation sites.
Its cells are written as a measurements table in the interchange format (DESIGN.md §4.1) — each nerve
test's values repeated on every site row of that nerve test, as the format wants — and imported exactly as
a file would be: the same validation, the same all-or-nothing rule, the same audit.

Problems and warnings name the place on the form, never a row of the table written behind it: a visit field,
or a grid and that grid's own row number (the editor's index, 1 = its first row, spare empty rows counted as
the grid counts them), with the field in words. Import warnings (a visit of a single nerve, a possible
day/month slip, …) are returned before anything is saved: saving then needs those warnings accepted.

Entry points: :func:`enter_visit`, :func:`import_upload`, :func:`layout_from_latest_visit`,
:func:`patient_details`, :func:`upload_notes`.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import re
from collections.abc import Collection
from dataclasses import dataclass, field
from functools import cache
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy.orm import Session

from tracker.domain import catalogue
from tracker.domain.labels import column_label, nerve_words, words
from tracker.domain.vocabulary import SIDE_ALIASES
from tracker.errors import InputRejected, Problem
from tracker.services.importing import ImportReport, import_table
from tracker.services.importing.measurements_columns import AMPLITUDES, OPTIONAL, REQUIRED
from tracker.services.records import patient_record
from tracker.services.tables import parse_table

# Fields asked once per visit (above the grids).
VISIT_FIELDS = ["patient", "visit_date", "height_cm", "sex", "birth_year", "diagnosis", "phenotype"]
NERVE_KEY = ["nerve", "side", "modality"]
# The nerve-test grid: one row per nerve test; its values apply to every stimulation site of that test.
NERVE_VALUES = [
    "recording_site",
    "temperature_c",
    "lff_hz",
    "f_latency_ms",
    "f_persistence_pct",
    "wrist_entrapment",
]
NERVE_COLUMNS = NERVE_KEY + NERVE_VALUES
# The site grid: one row per stimulation site.
SITE_COLUMNS = NERVE_KEY + [
    "site_order",
    "site",
    "distance_mm",
    "latency_ms",
    "amplitude_mv",
    "amplitude_uv",
    "duration_ms",
    "area_mvms",
    "peak_latency_ms",
]
KNOWN_COLUMNS = frozenset(REQUIRED + AMPLITUDES + OPTIONAL)
assert set(VISIT_FIELDS + NERVE_COLUMNS + SITE_COLUMNS) <= KNOWN_COLUMNS

NERVES, SITES = "nerves", "sites"
GRID_TITLES = {NERVES: "nerve tests", SITES: "stimulation sites"}  # the grids' headings on the form
# The page's names for the importer's command-line options that its messages suggest.
OPTION_WORDS = {
    "allow-unusual": "“Accept unusual values”",
    "replace": "“Replace changed visits” (Upload a file)",
}


@dataclass(frozen=True)
class Note:
    """A problem or warning placed on the form: a grid's row (``grid`` and ``row``, the grid's own number),
    a visit field (``grid`` None, ``field`` set) or the whole form (all None). ``message`` is in words."""

    grid: str | None
    row: int | None
    field: str | None
    message: str

    @property
    def where(self) -> str:
        """``stimulation sites, row 2, onset latency (ms)``; ``visit date``; empty for the whole form."""
        parts = [f"{GRID_TITLES[self.grid]}, row {self.row}"] if self.grid else []
        return ", ".join(parts + ([column_label(self.field)] if self.field else []))

    @property
    def text(self) -> str:
        return f"{self.where}: {self.message}" if self.where else self.message


@dataclass
class EntryResult:
    """What the form's check found, and whether the visit was saved.

    ``report`` is set when every check passed (a dry run's report unless saved). ``visit_problems`` are by
    visit field; ``row_problems`` by grid row; ``warnings`` are the importer's warnings (saving needs them
    accepted); ``unusual`` the unusual values accepted on request (recorded with the visit).
    """

    report: ImportReport | None
    visit_problems: dict[str, list[str]] = field(default_factory=dict)
    row_problems: list[Note] = field(default_factory=list)
    other_problems: list[str] = field(default_factory=list)
    warnings: list[Note] = field(default_factory=list)
    unusual: list[Note] = field(default_factory=list)

    @property
    def saved(self) -> bool:
        return self.report is not None and not self.report.dry_run

    @property
    def valid(self) -> bool:
        """Every check passed (saved, or would be saved once the warnings are accepted)."""
        return self.report is not None


@dataclass(frozen=True)
class Place:
    """Where a written table row came from: the site grid's row and its nerve test's grid row (if any)."""

    site_row: Any
    nerve_row: Any | None


def _cell(value: Any) -> str:
    if value is None or value is pd.NA or (isinstance(value, float) and pd.isna(value)):
        return ""
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else ""  # a ticked box states "yes"; an unticked one states nothing
    if isinstance(value, dt.date):
        return value.isoformat()
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value).strip()


def _key(row: dict[str, Any]) -> tuple[str, str, str]:
    """A nerve test's key as the importer will read it (alias- and case-insensitive), to match the grids."""
    nerve, side, modality = (_cell(row.get(c)).lower() for c in NERVE_KEY)
    return (
        catalogue.canonical_nerve(nerve) or catalogue.normalise_word(nerve),
        SIDE_ALIASES.get(side, side),
        modality,
    )


def _number(label: Any) -> Any:
    """A grid's row label as a plain int where it is one (the editor's index may hold numpy integers)."""
    return int(label) if isinstance(label, (int, np.integer)) else label


def _filled(frame: pd.DataFrame | None, columns: list[str]) -> list[tuple[Any, dict[str, Any]]]:
    """(grid row number, cells) of the rows with anything in them; the editor's spare empty rows are not
    data."""
    if frame is None:
        return []
    cells = frame.reindex(columns=columns)
    rows = [
        (_number(label), dict(zip(columns, values)))
        for label, values in zip(frame.index, cells.itertuples(index=False))
    ]
    return [(label, row) for label, row in rows if any(_cell(v) for v in row.values())]


def _nerve_values(
    nerves: pd.DataFrame | None, used: set[tuple]
) -> tuple[dict[tuple, tuple[Any, dict]], list[Note]]:
    """The nerve-test grid by key, and its own problems (a row without its key, a nerve test twice, a nerve
    test with no site row; ``used`` holds the keys of the site rows)."""
    by_key: dict[tuple, tuple[Any, dict]] = {}
    problems = []
    for label, row in _filled(nerves, NERVE_COLUMNS):
        if not any(_cell(row[c]) for c in NERVE_VALUES):
            continue  # a key without values (e.g. left from a copied layout) changes nothing
        missing = [c for c in NERVE_KEY if not _cell(row[c])]
        if missing:
            problems.append(
                Note(
                    NERVES,
                    label,
                    missing[0],
                    "say which nerve test this row is for (nerve, side and modality)",
                )
            )
            continue
        key = _key(row)
        if key in by_key:
            problems.append(
                Note(
                    NERVES, label, "nerve", f"this nerve test is already on row {by_key[key][0]} of this grid"
                )
            )
            continue
        by_key[key] = (label, row)
        if key not in used:
            what = nerve_words(*(_cell(row[c]) for c in NERVE_KEY))
            problems.append(
                Note(
                    NERVES,
                    label,
                    "nerve",
                    f"no stimulation-site row is for {what}; add its sites or clear this row",
                )
            )
    return by_key, problems


def entry_table(
    visit: dict[str, Any], sites: pd.DataFrame, nerves: pd.DataFrame | None = None
) -> tuple[bytes, list[Place], list[Note]]:
    """The form as a measurements CSV (UTF-8): the visit fields and the nerve test's values repeated on every
    site row. Returns the bytes, where each written row came from, and the problems of the nerve-test grid."""
    site_rows = _filled(sites, SITE_COLUMNS)
    by_key, problems = _nerve_values(nerves, {_key(row) for _, row in site_rows})
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(VISIT_FIELDS + SITE_COLUMNS + NERVE_VALUES)
    places = []
    for label, row in site_rows:
        nerve_row, values = by_key.get(_key(row), (None, {}))
        writer.writerow(
            [_cell(visit.get(f)) for f in VISIT_FIELDS]
            + [_cell(row[c]) for c in SITE_COLUMNS]
            + [_cell(values.get(c)) for c in NERVE_VALUES]
        )
        places.append(Place(label, nerve_row))
    return buffer.getvalue().encode("utf-8"), places, problems


def enter_visit(
    session: Session,
    visit: dict[str, Any],
    sites: pd.DataFrame,
    nerves: pd.DataFrame | None = None,
    *,
    username: str,
    replace: bool = False,
    allow_unusual: bool = False,
    dry_run: bool = False,
    accepted_warnings: Collection[str] = (),
    today: dt.date | None = None,
) -> EntryResult:
    """Check one visit from the entry form and store it; nothing is written unless everything is valid.

    The importer runs first as a dry run. With ``dry_run``, or when it warns of something not in
    ``accepted_warnings`` (compared by :attr:`Note.text`), nothing is saved and the result carries the
    warnings for the user to read; otherwise the visit is stored.
    """
    code = _cell(visit.get("patient"))
    if not code:
        return EntryResult(None, visit_problems={"patient": ["a patient code is required"]})
    raw, places, grid_problems = entry_table(visit, sites, nerves)
    if not places:
        return EntryResult(
            None,
            row_problems=grid_problems,
            other_problems=[
                "Add at least one stimulation-site row (nerve, side, modality, site order, distance, "
                "latency, amplitude)."
            ],
        )
    table = parse_table(raw, ".csv")
    options = {"username": username, "replace": replace, "allow_unusual": allow_unusual, "today": today}
    try:
        report = import_table(session, table, dry_run=True, **options)
    except InputRejected as error:
        result = _placed(error.problems, places, code)
        # Every problem at once, in the form's order: the nerve-test grid first, then the site grid, by row.
        result.row_problems = sorted(grid_problems + result.row_problems, key=_form_order)
        return result
    if grid_problems:
        return EntryResult(None, row_problems=grid_problems)
    warnings = _unique(_note(p, places, code) for p in report.warnings)
    if not dry_run and all(w.text in accepted_warnings for w in warnings):
        report = import_table(session, table, dry_run=False, **options)
        warnings = _unique(_note(p, places, code) for p in report.warnings)
    return EntryResult(
        report, warnings=warnings, unusual=_unique(_note(p, places, code) for p in report.unusual)
    )


def _form_order(note: Note) -> tuple[bool, int]:
    return note.grid != NERVES, note.row if isinstance(note.row, int) else 0


def _unique(notes) -> list[Note]:
    return list(dict.fromkeys(notes))


@cache
def _catalogue_words() -> frozenset[str]:
    """Nerve and site identifiers (with their aliases) that a message may name: shown in words."""
    found = set(catalogue.known_nerve_words())
    for name, info in catalogue.nerves().items():
        for modality in info.modalities:
            found.update(catalogue.known_site_words(name, modality))
    return frozenset(found)


def _identifier_words(token: str, code: str) -> str:
    """A column identifier by its label (quoted), a nerve or site identifier in words; anything else (a
    patient code may hold underscores) as it is."""
    if token == code:
        return token
    if token in KNOWN_COLUMNS:
        return f"“{column_label(token)}”"
    return words(token) if token in _catalogue_words() else token


def _worded(message: str, code: str = "", places: list[Place] | None = None) -> str:
    """An importer message for the form: column identifiers by their labels, the command-line option by the
    form's checkbox, other identifiers (``below_elbow``) in words, and table rows by the site grid's
    number."""
    options = "|".join(OPTION_WORDS)
    message = re.sub(rf"import with --({options})\b", lambda m: f"tick {OPTION_WORDS[m.group(1)]}", message)
    message = re.sub(rf"--({options})\b", lambda m: OPTION_WORDS[m.group(1)], message)
    message = re.sub(r"\b[a-z]+(?:_[a-z]+)+\b", lambda m: _identifier_words(m.group(0), code), message)
    if places is not None:

        def grid_row(number: re.Match) -> str:
            index = int(number.group(0)) - 2  # the written table's header is row 1
            return str(places[index].site_row) if 0 <= index < len(places) else number.group(0)

        message = re.sub(
            r"\brows? \d+(?:(?:, | and )\d+)*", lambda m: re.sub(r"\d+", grid_row, m.group(0)), message
        )
    return message


def _note(problem: Problem, places: list[Place], code: str) -> Note:
    """Where on the form a problem of the written table belongs, in the grid's own numbering."""
    text = _worded(problem.message, code, places)
    if problem.value not in (None, ""):
        text += f" (you entered {problem.value!r})"
    if problem.column in VISIT_FIELDS:
        return Note(None, None, problem.column, text)
    index = problem.row - 2 if problem.row is not None else -1  # the written table's header is row 1
    if not 0 <= index < len(places):
        return Note(None, None, None, _worded(str(problem), code))
    place = places[index]
    if problem.column in NERVE_VALUES and place.nerve_row is not None:
        return Note(NERVES, place.nerve_row, problem.column, text)
    return Note(SITES, place.site_row, problem.column, text)


def _placed(problems: list[Problem], places: list[Place], code: str) -> EntryResult:
    result = EntryResult(None)
    for note in _unique(_note(p, places, code) for p in problems):
        if note.grid is not None:
            result.row_problems.append(note)  # a nerve test's value: stated once, so reported once
        elif note.field is not None:
            result.visit_problems.setdefault(note.field, []).append(note.message)
        else:
            result.other_problems.append(note.message)
    return result


def patient_details(session: Session, code: str) -> dict[str, Any]:
    """The visit fields of a patient's latest visit (code, sex, birth year, diagnosis, phenotype, height), to
    start the next study from; raises NotFound."""
    record = patient_record(session, code)
    latest = record.visits[-1] if record.visits else None
    return {
        "patient": record.code,
        "sex": record.sex,
        "birth_year": record.birth_year,
        "diagnosis": record.diagnosis,
        "phenotype": record.phenotype,
        "height_cm": latest.height_cm if latest is not None else None,
    }


def import_upload(
    session: Session,
    raw: bytes,
    filename: str,
    *,
    username: str,
    dry_run: bool = False,
    replace: bool = False,
    allow_unusual: bool = False,
) -> ImportReport:
    """Import an uploaded file (CSV or .xlsx) with the importer; raises :class:`InputRejected`."""
    suffix = "." + filename.rsplit(".", 1)[-1] if "." in filename else ""
    return import_table(
        session,
        parse_table(raw, suffix),
        username=username,
        dry_run=dry_run,
        replace=replace,
        allow_unusual=allow_unusual,
    )


def upload_notes(problems: list[Problem], heading: str = "problem") -> pd.DataFrame:
    """Problems or warnings of an uploaded file as a table for people: the file's row (as a spreadsheet
    shows it, header = row 1), the column by its label, the message in words."""
    return pd.DataFrame(
        [
            {
                "row": p.row,
                "column": column_label(p.column) if p.column else "",
                "value": p.value or "",
                heading: _worded(p.message),
            }
            for p in problems
        ],
        columns=["row", "column", "value", heading],
    )


@dataclass(frozen=True)
class Layout:
    """A study's layout to start the next one from: the nerve-test grid and the site grid."""

    nerves: pd.DataFrame
    sites: pd.DataFrame


def empty_layout(nerves: list[dict[str, Any]], sites: list[dict[str, Any]]) -> Layout:
    """Grids with the given layout cells and every measured value empty, with the dtypes the editors want."""
    nerve_frame = pd.DataFrame(nerves).reindex(columns=NERVE_COLUMNS)
    site_frame = pd.DataFrame(sites).reindex(columns=SITE_COLUMNS)
    for frame in (nerve_frame, site_frame):
        for column in frame.columns:
            text = column in NERVE_KEY + [
                "site",
                "recording_site",
                "f_latency_ms",
            ]  # F-waves: a number or "absent"
            frame[column] = frame[column].astype(object if text else float)
    nerve_frame["wrist_entrapment"] = nerve_frame["wrist_entrapment"].astype("boolean")
    return Layout(nerve_frame, site_frame)


def layout_from_latest_visit(session: Session, code: str) -> Layout:
    """The nerve tests and sites of the patient's latest visit with the layout kept (nerve, side, modality,
    recording site; site order, label, distance) in words, and the measured values emptied.
    Raises NotFound."""
    record = patient_record(session, code)
    nerves, sites = [], []
    for nerve in record.visits[-1].nerves if record.visits else ():
        key = {"nerve": words(nerve.nerve), "side": nerve.side, "modality": nerve.modality}
        nerves.append(
            {**key, "recording_site": words(nerve.recording_site) if nerve.recording_site else None}
        )
        for site in nerve.sites:
            sites.append(
                {
                    **key,
                    "site_order": site.order,
                    "site": words(site.label) if site.label else None,
                    "distance_mm": site.distance_mm,
                }
            )
    return empty_layout(nerves, sites)
