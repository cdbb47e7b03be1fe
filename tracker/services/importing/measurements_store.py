"""Store a validated measurements batch: classify its visits against the database (new / unchanged /
changed), refuse conflicts, then write patients, visits (replaced ones kept in their history first),
nerve tests and sites."""

from __future__ import annotations

from typing import Any

import pandas as pd
from sqlalchemy import delete, select, update
from sqlalchemy.orm import Session

from tracker.db.locking import checkpoint, is_unique_violation, take_write_lock
from tracker.db.models import NerveTest, Patient, Visit, utc_now
from tracker.errors import InputRejected, Problem

# history as a module, its functions looked up when called: history imports measurements_check from
# this package, so importing history first runs this package while history is still half loaded.
from tracker.services import history
from tracker.services.access import audit
from tracker.services.importing.bulk_insert import _allocate_ids, _bulk_insert, _records
from tracker.services.importing.measurements_check import MeasurementBatch
from tracker.services.importing.measurements_columns import VISIT_KEY
from tracker.services.importing.nerve_tests import _insert_nerve_tests
from tracker.services.importing.report import ImportReport
from tracker.services.importing.stored import _PATIENTS, _VISITS, _existing_patients, _existing_visits
from tracker.services.importing.visit_versions import _base_versions, _version_conflicts
from tracker.services.importing.visit_warnings import (
    _date_slips,
    _single_nerve_visits,
    _versions_of_new_visits,
)
from tracker.services.rows import chunks as _chunks
from tracker.services.rows import clean as _clean
from tracker.services.tables import ROW


def _patient_conflicts(patients: pd.DataFrame) -> list[Problem]:
    problems = []
    for row in patients.itertuples():
        for column, stored in (("sex", row.db_sex), ("birth_year", row.db_birth_year)):
            given = getattr(row, column)
            if given is None or pd.isna(given) or stored is None or pd.isna(stored):
                continue
            if (float(given) != float(stored)) if column == "birth_year" else given != stored:
                problems.append(
                    Problem(
                        int(getattr(row, ROW)),
                        column,
                        str(given if column == "sex" else int(given)),
                        f"patient {row.patient} is stored with {column} {stored!r}; import with --replace to "
                        "change it",
                    )
                )
    return problems


def _store_measurements(
    session: Session,
    batch: MeasurementBatch,
    *,
    username: str,
    dry_run: bool,
    replace: bool,
    force: bool = False,
    file_versions: pd.DataFrame | None = None,
    forced: list[str] | None = None,
) -> ImportReport:
    report = ImportReport(kind="measurements", rows=0, dry_run=dry_run, unusual=batch.unusual)
    forced = [] if forced is None else forced
    # What this import starts from, read before it waits for the write lock; then everything is read again
    # as the writer, so that another import's visits are seen (as unchanged, or as conflicts) and a visit
    # replaced meanwhile is noticed.
    base = _base_versions(session, batch) if replace and not dry_run else None
    checkpoint("import-read")
    if not dry_run:
        take_write_lock(session, serialise="import")
    checkpoint("import-locked")
    codes = batch.patients["patient"].tolist()
    patients = batch.patients.merge(_existing_patients(session, codes), on="patient", how="left")
    conflicts = _patient_conflicts(patients[patients["patient_id"].notna()])

    known_ids = [int(i) for i in patients["patient_id"].dropna()]
    stored = _existing_visits(session, known_ids)
    visits = batch.visits.merge(patients[["patient", "patient_id"]], on="patient", how="left")
    visits = visits.merge(stored, on=["patient_id", "visit_date"], how="left")
    if file_versions is None:
        file_versions = pd.DataFrame(columns=[*VISIT_KEY, "file_version"])
    visits = visits.merge(file_versions, on=VISIT_KEY, how="left")
    is_stored = visits["visit_id"].notna()
    unknown = is_stored & (visits["db_fingerprint"] == "")
    if unknown.any():  # stored before fingerprints existed (or after a downgrade): compute from the rows
        recomputed = history.stored_fingerprints(session, [int(v) for v in visits.loc[unknown, "visit_id"]])
        visits.loc[unknown, "db_fingerprint"] = visits.loc[unknown, "visit_id"].map(recomputed)
    unchanged = is_stored & (visits["db_fingerprint"] == visits["fingerprint"])
    changed = is_stored & ~unchanged
    forced_visits: dict[int, dict[str, Any]] = {}
    if not replace:
        conflicts += history.describe_changes(session, visits[changed], batch)
    else:
        late, forced_visits = _version_conflicts(
            session, visits, changed, base, force=force, forced=forced, lock=not dry_run
        )
        conflicts += late
    if conflicts:
        raise InputRejected(
            "The file conflicts with stored data", sorted(conflicts, key=lambda p: p.row or 0)
        )  # stable: a visit's line first

    new_patients = patients[patients["patient_id"].isna()]
    report.patients_added = len(new_patients)
    report.unchanged = int(unchanged.sum())
    report.replaced = int(changed.sum())
    report.added = int((~is_stored).sum())
    written = ~unchanged
    stored_dates = stored.assign(
        patient=stored["patient_id"].map(patients.set_index("patient_id")["patient"].to_dict())
    )
    keyed = [
        (number, *key, problem)
        for number, found in enumerate(
            (
                _single_nerve_visits(batch, visits[written]),
                _date_slips(visits[written], batch.visits, stored_dates),
                _versions_of_new_visits(visits[~is_stored]),
            )
        )
        for key, problem in found
    ]
    report.warnings = [problem for *_, problem in keyed]
    report.warning_keys = [(number, patient, day) for number, patient, day, _ in keyed]
    if dry_run:
        return report
    try:
        _write_measurements(
            session,
            batch,
            patients,
            new_patients,
            visits,
            is_stored,
            unchanged,
            changed,
            username=username,
            replace=replace,
            forced_visits=forced_visits,
        )
    except Exception as error:
        if not is_unique_violation(error):
            raise
        raise _stored_meanwhile(visits[~unchanged]) from None
    return report


def _write_measurements(
    session: Session,
    batch: MeasurementBatch,
    patients: pd.DataFrame,
    new_patients: pd.DataFrame,
    visits: pd.DataFrame,
    is_stored: pd.Series,
    unchanged: pd.Series,
    changed: pd.Series,
    *,
    username: str,
    replace: bool,
    forced_visits: dict[int, dict[str, Any]],
) -> None:
    """Write what :func:`_store_measurements` decided: new patients and visits, replaced visits (kept in
    their history first), nerve tests and sites."""
    if len(new_patients):
        latest = _latest_stated(batch.visits)
        new_patients = new_patients.assign(
            id=_allocate_ids(session, Patient.__table__, len(new_patients)),
            code=new_patients["patient"],
            birth_year=new_patients["birth_year"].astype("Int64"),
            diagnosis=new_patients["patient"].map(latest["diagnosis"]),
            phenotype=new_patients["patient"].map(latest["phenotype"]),
            created_at=utc_now(),
        )
        columns = ["id", "code", "sex", "birth_year", "diagnosis", "phenotype", "created_at"]
        _bulk_insert(session, Patient.__table__, new_patients, columns)
        patients.loc[new_patients.index, "patient_id"] = new_patients["id"]
    _fill_or_replace_patients(session, patients.drop(new_patients.index), username=username, replace=replace)
    visits["patient_id"] = visits["patient"].map(patients.set_index("patient")["patient_id"]).astype(int)

    replaced_ids = [int(v) for v in visits.loc[changed, "visit_id"]]
    if replaced_ids:
        history.keep_history(session, visits[changed], username=username, forced=forced_visits)
        for part in _chunks(replaced_ids):
            session.execute(delete(NerveTest).where(NerveTest.visit_id.in_(part)))
        columns = [
            "visit_id",
            "patient",
            "visit_date",
            "height_cm",
            "diagnosis",
            "phenotype",
            "fingerprint",
            "version",
        ]
        for row in _records(visits[changed], columns):
            done = session.execute(
                update(Visit)
                .where(Visit.id == row["visit_id"], Visit.version == int(row["version"]))
                .values(
                    height_cm=row["height_cm"],
                    diagnosis=row["diagnosis"],
                    phenotype=row["phenotype"],
                    content_sha256=row["fingerprint"],
                    version=int(row["version"]) + 1,
                    updated_at=utc_now(),
                )
            )
            if done.rowcount != 1:  # read as the writer: only a writer outside these rules gets here
                raise InputRejected(
                    "The file conflicts with stored data",
                    [
                        Problem(
                            None,
                            "visit_date",
                            None,
                            f"the visit of {row['patient']} on {row['visit_date'].isoformat()} changed while "
                            "it was being replaced (its version moved on); nothing was written — import "
                            "again",
                        )
                    ],
                )

    new_visits = visits[~is_stored].copy()
    if len(new_visits):
        now = utc_now()
        new_visits = new_visits.assign(
            id=_allocate_ids(session, Visit.__table__, len(new_visits)),
            content_sha256=new_visits["fingerprint"],
            status="final",
            version=1,
            created_at=now,
        )
        columns = [
            "id",
            "patient_id",
            "visit_date",
            "height_cm",
            "diagnosis",
            "phenotype",
            "content_sha256",
            "status",
            "version",
            "created_at",
        ]
        _bulk_insert(session, Visit.__table__, new_visits, columns)
        visits.loc[~is_stored, "visit_id"] = new_visits["id"].to_numpy()
    checkpoint("import-visits-written")

    written = visits[~unchanged][["patient", "visit_date", "visit_id"]]
    _insert_nerve_tests(session, batch, written)
    known = patients.drop(new_patients.index)["patient_id"]
    _refresh_patient_diagnosis(session, [int(i) for i in known])


def _stored_meanwhile(written: pd.DataFrame) -> InputRejected:
    """The refusal when a UNIQUE constraint stopped this import: another writer stored or replaced one of its
    visits (or added one of its patients) between this import's reading and writing. Names the visits it was
    writing."""
    named = [f"the visit of {r.patient} on {r.visit_date.isoformat()}" for r in written.head(10).itertuples()]
    more = f" and {len(written) - len(named)} more" if len(written) > len(named) else ""
    return InputRejected(
        "Another process wrote some of the same visits at the same time",
        [
            Problem(
                None,
                "visit_date",
                None,
                f"{', '.join(named)}{more}: stored or replaced by another import while this one ran; "
                "nothing of this file was written — import it again (visits now stored the same are "
                "reported as unchanged, changed ones are listed)",
            )
        ],
    )


def _latest_stated(visits: pd.DataFrame) -> dict[str, pd.Series]:
    """Per patient code: diagnosis and phenotype of their latest visit that states a diagnosis."""
    ordered = visits[visits["diagnosis"].notna()].sort_values(["patient", "visit_date"])
    latest = ordered.drop_duplicates("patient", keep="last").set_index("patient")
    return {column: latest[column] for column in ("diagnosis", "phenotype")}


def _fill_or_replace_patients(session: Session, known: pd.DataFrame, *, username: str, replace: bool) -> None:
    """Fill empty sex / birth year of stored patients; overwrite differing ones only with ``replace``."""
    for row in known.itertuples():
        changes = {}
        for column, stored in (("sex", row.db_sex), ("birth_year", row.db_birth_year)):
            given = getattr(row, column)
            if given is None or pd.isna(given):
                continue
            given = int(given) if column == "birth_year" else given
            if stored is None or pd.isna(stored) or (replace and given != stored):
                changes[column] = given
        if changes:
            before = {k: _clean(getattr(row, f"db_{k}")) for k in changes}
            session.execute(update(Patient).where(Patient.id == int(row.patient_id)).values(**changes))
            audit.record(
                session,
                username=username,
                action="update_patient",
                entity="patients",
                entity_key=row.patient,
                before=before,
                after=changes,
            )


def _refresh_patient_diagnosis(session: Session, patient_ids: list[int]) -> None:
    """A patient's current diagnosis and phenotype are those of their latest visit that states a diagnosis."""
    for column in ("diagnosis", "phenotype"):
        latest = (
            select(_VISITS.c[column])
            .where(_VISITS.c.patient_id == _PATIENTS.c.id, _VISITS.c.diagnosis.is_not(None))
            .order_by(_VISITS.c.visit_date.desc())
            .limit(1)
            .scalar_subquery()
        )
        for part in _chunks(patient_ids):
            session.execute(update(_PATIENTS).where(_PATIENTS.c.id.in_(part)).values({column: latest}))
