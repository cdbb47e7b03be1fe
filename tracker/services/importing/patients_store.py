"""Store a validated patients file: onset date (and sex, birth year) on the pseudonymous record, identity
fields only in ``patient_identities``; messages and the audit trail name identity fields, never values."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from typing import Any

import pandas as pd
from sqlalchemy import func, insert, select, update
from sqlalchemy.orm import Session

from tracker.db.locking import take_write_lock
from tracker.db.models import Patient, PatientIdentity, Visit
from tracker.errors import InputRejected, Problem

# history as a module, its functions looked up when called: history imports measurements_check from
# this package, so importing history first runs this package while history is still half loaded.
from tracker.services import history
from tracker.services.access import audit
from tracker.services.importing.clinical_store import _jsonable
from tracker.services.importing.patients_check import IDENTITY_VALUES, RECORD_VALUES
from tracker.services.importing.report import ImportReport
from tracker.services.input_limits import guarded
from tracker.services.rows import chunks as _chunks
from tracker.services.rows import clean as _clean
from tracker.services.tables import ROW

RECORD_WORDS = {"sex": "sex", "birth_year": "birth year", "onset_date": "onset date"}
IDENTITY_WORDS = {"full_name": "name", "record_number": "record number", "birth_date": "birth date"}


@dataclass
class _PatientChange:
    """What one row of a patients file changes: values of the pseudonymous record (with the stored ones they
    replace) and identity fields (whose values are never audited or printed)."""

    row: int
    code: str
    patient_id: int
    record: dict[str, Any] = field(default_factory=dict)
    record_before: dict[str, Any] = field(default_factory=dict)
    identity: dict[str, Any] = field(default_factory=dict)
    identity_replaced: list[str] = field(default_factory=list)
    identity_stored: bool = False
    replaced: bool = False


def _store_patients(
    session: Session, frame: pd.DataFrame, *, username: str, dry_run: bool, replace: bool
) -> ImportReport:
    """Fill empty values of stored patients and their identities; a value that differs from a stored one is
    refused unless ``replace`` (as sex and birth year in a measurements file). Identity fields go to
    ``patient_identities`` only, and messages and the audit trail name the fields, never their values."""
    report = ImportReport(kind="patients", rows=0, dry_run=dry_run)
    if not dry_run:  # read as the writer: a value stored meanwhile by another import is compared, not lost
        take_write_lock(session, serialise="import")
    codes = sorted(frame["patient"].unique())
    record: dict[str, dict[str, Any]] = {}
    ids: dict[str, int] = {}
    for part in _chunks(codes):
        for row in session.execute(
            select(Patient.id, Patient.code, *[getattr(Patient, c) for c in RECORD_VALUES]).where(
                Patient.code.in_(part)
            )
        ):
            ids[row.code] = int(row.id)
            record[row.code] = {c: getattr(row, c) for c in RECORD_VALUES}
    unknown = frame[~frame["patient"].isin(list(ids))]
    if len(unknown):  # validated without ``known_patients``: still refuse, row by row
        raise InputRejected(
            "The patients file was refused",
            guarded(
                [
                    Problem(int(r), "patient", p, "unknown patient; import the patient's measurements first")
                    for r, p in zip(unknown[ROW], unknown["patient"])
                ]
            ),
        )
    identities: dict[int, dict[str, Any]] = {}
    for part in _chunks(sorted(ids.values())):
        for row in session.execute(
            select(PatientIdentity.patient_id, *[getattr(PatientIdentity, c) for c in IDENTITY_VALUES]).where(
                PatientIdentity.patient_id.in_(part)
            )
        ):
            identities[int(row.patient_id)] = {c: getattr(row, c) for c in IDENTITY_VALUES}

    changes, conflicts = [], []
    for r in frame.to_dict("records"):
        code = r["patient"]
        change = _PatientChange(row=int(r[ROW]), code=code, patient_id=ids[code])
        stored_identity = identities.get(change.patient_id)
        change.identity_stored = stored_identity is not None
        for column in RECORD_VALUES + IDENTITY_VALUES:
            given = _clean(r[column])
            if given is None:  # an empty cell keeps the stored value
                continue
            given = int(given) if column == "birth_year" else given
            is_identity = column in IDENTITY_VALUES
            stored = (stored_identity or {}).get(column) if is_identity else record[code][column]
            if stored == given:
                continue
            if stored is not None and not replace:
                if is_identity:  # neither value is shown: a name or record number is not for a message
                    message = (
                        f"patient {code} is stored with another {IDENTITY_WORDS[column]}; import with "
                        "--replace to replace it"
                    )
                else:
                    message = (
                        f"patient {code} is stored with {RECORD_WORDS[column]} "
                        f"{history.shown_value(stored)}, the file gives {history.shown_value(given)}; "
                        "import with --replace to replace it"
                    )
                conflicts.append(Problem(change.row, column, None, message))
                continue
            change.replaced = change.replaced or stored is not None
            if is_identity:
                change.identity[column] = given
                if stored is not None:
                    change.identity_replaced.append(column)
            else:
                change.record[column] = given
                change.record_before[column] = _jsonable(stored)
        changes.append(change)
    if conflicts:
        raise InputRejected(
            "The file conflicts with stored data", sorted(conflicts, key=lambda p: p.row or 0)
        )
    report.replaced = sum(c.replaced for c in changes)
    report.added = sum(bool(c.record or c.identity) and not c.replaced for c in changes)
    report.unchanged = sum(not (c.record or c.identity) for c in changes)
    report.identities = sum(bool(c.identity) for c in changes)
    report.warnings = _onsets_after_visits(session, changes)
    if dry_run:
        return report
    for change in changes:
        if change.record:
            session.execute(update(Patient).where(Patient.id == change.patient_id).values(**change.record))
            audit.record(
                session,
                username=username,
                action="update_patient",
                entity="patients",
                entity_key=change.code,
                before=change.record_before,
                after={k: _jsonable(v) for k, v in change.record.items()},
            )
        if change.identity:
            if change.identity_stored:
                session.execute(
                    update(PatientIdentity)
                    .where(PatientIdentity.patient_id == change.patient_id)
                    .values(**change.identity)
                )
            else:
                session.execute(
                    insert(PatientIdentity).values(patient_id=change.patient_id, **change.identity)
                )
            # The fields, never their values: the audit trail is read by people who may not see identities.
            audit.record(
                session,
                username=username,
                action="update_patient_identity",
                entity="patient_identities",
                entity_key=change.code,
                after={
                    "fields_set": sorted(change.identity),
                    "fields_replaced": sorted(change.identity_replaced),
                },
            )
    return report


def _onsets_after_visits(session: Session, changes: list[_PatientChange]) -> list[Problem]:
    """A new onset date after the patient's first stored visit is stored, with a warning: that visit's
    ``days_since_onset`` would be negative, which is more often a typing slip than a study before symptoms."""
    onsets = {c.patient_id: c for c in changes if "onset_date" in c.record}
    first: dict[int, dt.date] = {}
    for part in _chunks(sorted(onsets)):
        first.update(
            (int(pid), day)
            for pid, day in session.execute(
                select(Visit.patient_id, func.min(Visit.visit_date))
                .where(Visit.patient_id.in_(part))
                .group_by(Visit.patient_id)
            )
        )
    warnings = []
    for pid, change in onsets.items():
        onset, visit = change.record["onset_date"], first.get(pid)
        if visit is not None and onset > visit:
            warnings.append(
                Problem(
                    change.row,
                    "onset_date",
                    None,
                    f"the onset of {change.code} ({onset.isoformat()}) is after their first visit "
                    f"({visit.isoformat()}): days_since_onset of that visit is negative — check the date",
                )
            )
    return sorted(warnings, key=lambda p: p.row or 0)
