"""Store validated treatments or scores: new records added, identical ones left, changed ones refused
unless ``replace`` (each replacement audited)."""

from __future__ import annotations

import datetime as dt
from typing import Any

import pandas as pd
from sqlalchemy import select, update
from sqlalchemy.orm import Session

from tracker.db.locking import take_write_lock
from tracker.db.models import OutcomeScore, Treatment
from tracker.errors import InputRejected, Problem

# history as a module, its functions looked up when called: history imports measurements_check from
# this package, so importing history first runs this package while history is still half loaded.
from tracker.services import history
from tracker.services.access import audit
from tracker.services.importing.bulk_insert import _bulk_insert
from tracker.services.importing.clinical_check import SCORE_KEY, TREATMENT_KEY
from tracker.services.importing.report import ImportReport
from tracker.services.importing.stored import _existing_patients
from tracker.services.rows import chunks as _chunks
from tracker.services.rows import clean as _clean
from tracker.services.tables import ROW


def _store_records(
    session: Session, frame: pd.DataFrame, *, kind: str, username: str, dry_run: bool, replace: bool
) -> ImportReport:
    report = ImportReport(kind=kind, rows=0, dry_run=dry_run)
    model = Treatment if kind == "treatments" else OutcomeScore
    key = TREATMENT_KEY if kind == "treatments" else SCORE_KEY
    value_columns = (
        ["end_date", "dose", "dose_unit", "interval_days", "note"] if kind == "treatments" else ["value"]
    )
    date_column = "start_date" if kind == "treatments" else "score_date"
    frame = frame.rename(columns={"date": "score_date"}) if kind == "scores" else frame
    key = [date_column if k == "date" else k for k in key]

    if not dry_run:  # read as the writer: a record another import adds meanwhile is seen, not inserted twice
        take_write_lock(session, serialise="import")
    codes = sorted(frame["patient"].unique())
    ids = _existing_patients(session, codes).set_index("patient")["patient_id"]
    unknown = frame[~frame["patient"].isin(ids.index)]
    if len(unknown):  # validated without ``known_patients``: still refuse, row by row
        problems = [
            Problem(int(r), "patient", p, "unknown patient; import the patient's measurements first")
            for r, p in zip(unknown[ROW], unknown["patient"])
        ]
        raise InputRejected(f"The {kind} file was refused", problems)
    frame = frame.assign(patient_id=frame["patient"].map(ids).astype(int))
    key_db = ["patient_id"] + key[1:]

    stored_rows = []
    for part in _chunks([int(i) for i in ids]):
        records = model.__table__
        stored_rows += map(
            tuple,
            session.execute(
                select(records.c.id, *[records.c[c] for c in key_db + value_columns]).where(
                    records.c.patient_id.in_(part)
                )
            ),
        )
    stored = pd.DataFrame(stored_rows, columns=["record_id"] + key_db + [f"db_{c}" for c in value_columns])
    merged = frame.merge(stored, on=key_db, how="left")
    is_stored = merged["record_id"].notna()
    same = pd.Series(True, index=merged.index)
    for column in value_columns:
        a, b = merged[column], merged[f"db_{column}"]
        same &= (a.isna() & b.isna()) | (a.astype(object) == b.astype(object))
    unchanged = is_stored & same
    changed = is_stored & ~same
    if changed.any() and not replace:
        problems = []
        for r in merged[changed].to_dict("records"):
            for column in value_columns:
                given, stored = _jsonable(r[column]), _jsonable(r[f"db_{column}"])
                if given != stored:
                    record = (
                        f"{r['therapy'].replace('_', ' ')} from {r['start_date'].isoformat()}"
                        if kind == "treatments"
                        else f"{r['scale']} on {r['score_date'].isoformat()}"
                    )
                    unit = " days" if column == "interval_days" else ""
                    problems.append(
                        Problem(
                            int(r[ROW]),
                            column,
                            None,
                            f"differs from the stored {kind[:-1]} of {r['patient']} ({record}): "
                            f"{column.replace('_', ' ')} {history.shown_value(stored)} → "
                            f"{history.shown_value(given)}{unit}; "
                            "import with --replace to replace it",
                        )
                    )
        raise InputRejected("The file conflicts with stored data", problems)
    report.added, report.replaced, report.unchanged = (
        int((~is_stored).sum()),
        int(changed.sum()),
        int(unchanged.sum()),
    )
    if dry_run:
        return report
    if (~is_stored).any():
        added = merged[~is_stored]
        if "interval_days" in added:  # whole days, validated; stored as an integer
            added = added.assign(interval_days=added["interval_days"].astype("Int64"))
        _bulk_insert(session, model.__table__, added, key_db + value_columns)
    for r in merged[changed].itertuples():
        before = {c: _jsonable(getattr(r, f"db_{c}")) for c in value_columns}
        after = {c: _jsonable(getattr(r, c)) for c in value_columns}
        values = {c: _clean(getattr(r, c)) for c in value_columns}
        if "interval_days" in values and values["interval_days"] is not None:
            values["interval_days"] = int(values["interval_days"])
        session.execute(update(model).where(model.id == int(r.record_id)).values(**values))
        audit.record(
            session,
            username=username,
            action=f"replace_{kind[:-1]}",
            entity=model.__tablename__,
            entity_key=f"{r.patient}/{getattr(r, key[1])}/{getattr(r, key[-1])}",
            before=before,
            after=after,
        )
    return report


def _jsonable(value: Any) -> Any:
    value = _clean(value)
    return value.isoformat() if isinstance(value, dt.date) else value
