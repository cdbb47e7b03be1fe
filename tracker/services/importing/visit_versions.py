"""The visit version a measurements file was made from (its ``visit_version`` column, else the version
read before the write lock), and the stored visits that changed after it (refused unless ``force``)."""

from __future__ import annotations

import datetime as dt
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import select
from sqlalchemy.orm import Session

from tracker.db.models import Visit
from tracker.errors import Problem

# history as a module, its functions looked up when called: history imports measurements_check from
# this package, so importing history first runs this package while history is still half loaded.
from tracker.services import history
from tracker.services.importing.measurements_check import MeasurementBatch
from tracker.services.importing.measurements_columns import VISIT_KEY
from tracker.services.importing.stored import _existing_patients, _existing_visits
from tracker.services.rows import chunks as _chunks
from tracker.services.tables import ROW

# Optional measurements column: the version of the stored visit that the file's values were made from
# (``ncs-tracker show`` prints it). With it, --replace goes ahead only while the stored visit is still that
# version. Read here, not by the file validator: it says which stored visit the rows amend, not what was
# measured.
VERSION_COLUMN = "visit_version"


def _stated_versions(cells: pd.DataFrame) -> tuple[pd.DataFrame, pd.Series | None, list[Problem]]:
    """The cells without the ``visit_version`` column, the versions it states by file row (NaN where empty),
    and a problem for each cell that is not a whole number from 1."""
    if VERSION_COLUMN not in cells.columns:
        return cells, None, []
    raw = cells[VERSION_COLUMN].astype(str).str.strip()
    numbers = pd.to_numeric(raw.where(raw != ""), errors="coerce")
    valid = numbers.notna() & (numbers >= 1) & (numbers <= 2**31 - 1) & (numbers == numbers.round())
    bad = (raw != "") & ~valid
    problems = [
        Problem(
            int(row),
            VERSION_COLUMN,
            value[:20],
            "expected the stored visit's version as a whole number from 1 (ncs-tracker show prints it as "
            "'version N'), or an empty cell",
        )
        for row, value in zip(cells.loc[bad, ROW], raw[bad])
    ]
    stated = pd.Series(numbers.where(valid).to_numpy(), index=cells[ROW].to_numpy())
    return cells.drop(columns=[VERSION_COLUMN]), stated, problems


def _versions_by_visit(
    batch: MeasurementBatch, stated: pd.Series | None
) -> tuple[pd.DataFrame, list[Problem]]:
    """One ``file_version`` per visit that states one (empty cells are left out); a visit whose rows state
    different versions is a problem at its first disagreeing row."""
    if stated is None or batch.rows is None:
        return pd.DataFrame(columns=[*VISIT_KEY, "file_version"]), []
    rows = batch.rows[[ROW, *VISIT_KEY]].assign(file_version=batch.rows[ROW].map(stated))
    rows = rows[rows["file_version"].notna()].sort_values(ROW)
    first = rows.drop_duplicates(VISIT_KEY).set_index(VISIT_KEY)["file_version"]
    expected = rows.set_index(VISIT_KEY).index.map(first)
    differ = rows[rows["file_version"].to_numpy() != np.asarray(expected, dtype=float)]
    differ = differ.drop_duplicates(VISIT_KEY)
    problems = [
        Problem(
            int(getattr(r, ROW)),
            VERSION_COLUMN,
            None,
            f"the rows of the visit of {r.patient} on {r.visit_date.isoformat()} state different "
            f"versions ({int(first.loc[(r.patient, r.visit_date)])} and {int(r.file_version)}); a visit "
            "is made from one version",
        )
        for r in differ.itertuples()
    ]
    return first.astype(int).reset_index(), problems


def _version_conflicts(
    session: Session,
    visits: pd.DataFrame,
    replaced: pd.Series,
    base: dict[tuple[str, dt.date], int] | None,
    *,
    force: bool,
    forced: list[str],
    lock: bool,
) -> tuple[list[Problem], dict[int, dict[str, Any]]]:
    """The stored visits this import would replace although they changed after the file's base version.

    The base of a visit is its ``visit_version`` in the file, else the version this import read before it took
    the write lock (``base``; ``None`` in a dry run, where nothing is waited for). Refused, unless ``force``:
    then listed in ``forced`` (for the import's audit event) and returned by visit id (for the visit's own).
    ``lock``: read the stored versions as the writer, locking the rows (:func:`_locked_versions`).
    """
    rows = visits[replaced]
    if rows.empty:
        return [], {}
    current = _locked_versions(session, [int(v) for v in rows["visit_id"]]) if lock else {}
    late: list[tuple[Any, int, int | None, bool]] = []
    for row in rows.itertuples():
        stored = current.get(int(row.visit_id), int(row.version))
        if pd.notna(row.file_version):
            based_on, from_file = int(row.file_version), True
        elif base is not None:
            based_on, from_file = base.get((row.patient, row.visit_date)), False
        else:
            continue
        if based_on != stored:
            late.append((row, stored, based_on, from_file))
    if not late:
        return [], {}
    who = history.last_changes(session, [int(row.visit_id) for row, *_ in late])
    problems, overridden = [], {}
    for row, stored, based_on, from_file in late:
        visit = f"the visit of {row.patient} on {row.visit_date.isoformat()}"
        now = f"it is stored as version {stored}, {who.get(int(row.visit_id), 'changed by someone else')}"
        if from_file:
            what = f"{visit} changed after version {based_on}, the version this file was made from: {now}"
        elif based_on is None:
            what = f"{visit} was stored by another process while this import ran: {now}"
        else:
            what = (
                f"{visit} was changed by another process while this import ran (it read version "
                f"{based_on}): {now}"
            )
        if force:
            base_words = "no stored visit" if based_on is None else f"version {based_on}"
            forced.append(
                f"{row.patient}/{row.visit_date.isoformat()}: stored version {stored}, "
                f"file based on {base_words}"
            )
            overridden[int(row.visit_id)] = {
                "stored_version": stored,
                "based_on_version": based_on,
                "based_on": "visit_version column" if from_file else "read by this import",
            }
            continue
        problems.append(
            Problem(
                int(getattr(row, ROW)),
                VERSION_COLUMN if from_file else "visit_date",
                None,
                f"{what}; nothing was replaced — look at the stored values (ncs-tracker show "
                f"{row.patient} --visit {row.visit_date.isoformat()}), make the change on them, or "
                "import with --replace --force to overwrite them anyway",
            )
        )
    return problems, overridden


def _locked_versions(session: Session, visit_ids: list[int]) -> dict[int, int]:
    """The current version of each visit, read right before writing. PostgreSQL: the rows are locked for this
    transaction (FOR NO KEY UPDATE: others wait to change them; saving evaluations of them is not held up).
    SQLite: this transaction holds the database's write lock already."""
    found: dict[int, int] = {}
    for part in _chunks(visit_ids):
        query = select(Visit.id, Visit.version).where(Visit.id.in_(part)).with_for_update(key_share=True)
        found.update((int(i), int(v)) for i, v in session.execute(query))
    return found


def _base_versions(session: Session, batch: MeasurementBatch) -> dict[tuple[str, dt.date], int]:
    """(patient code, visit date) → stored version of the file's visits that are stored, read before the write
    lock: what this import starts from when the file states no ``visit_version``."""
    patients = _existing_patients(session, batch.patients["patient"].tolist())
    stored = _existing_visits(session, [int(i) for i in patients["patient_id"]])
    codes = patients.set_index("patient_id")["patient"]
    return {(codes[int(r.patient_id)], r.visit_date): int(r.version) for r in stored.itertuples()}
