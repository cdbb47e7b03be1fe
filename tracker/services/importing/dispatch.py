"""One table (a whole file, or one block of a long one): checked and stored by its kind; and the import's
own audit event."""

from __future__ import annotations

import datetime as dt

import pandas as pd
from sqlalchemy.orm import Session

from tracker.db.locking import checkpoint
from tracker.errors import InputRejected
from tracker.services.access import audit
from tracker.services.importing.clinical_check import validate_scores, validate_treatments
from tracker.services.importing.clinical_store import _store_records
from tracker.services.importing.measurements_check import MeasurementBatch, validate_measurements
from tracker.services.importing.measurements_store import _store_measurements
from tracker.services.importing.patients_check import validate_patients
from tracker.services.importing.patients_store import _store_patients
from tracker.services.importing.report import ImportReport
from tracker.services.importing.stored import _stored_codes
from tracker.services.importing.visit_versions import _stated_versions, _versions_by_visit
from tracker.services.tables import InputTable


def _check_and_store(
    session: Session,
    table: InputTable,
    *,
    username: str,
    dry_run: bool,
    replace: bool,
    force: bool,
    allow_unusual: bool,
    today: dt.date | None,
    forced: list[str],
) -> ImportReport:
    """Validate a table and store it (nothing of the import's own audit event); raises on any problem."""
    if table.kind == "measurements":
        batch, file_versions = _check_measurements(table.cells, allow_unusual=allow_unusual, today=today)
        report = _store_measurements(
            session,
            batch,
            username=username,
            dry_run=dry_run,
            replace=replace,
            force=force,
            file_versions=file_versions,
            forced=forced,
        )
    elif table.kind == "patients":
        frame = validate_patients(
            table.cells, today=today, known_patients=lambda codes: _stored_codes(session, codes)
        )
        report = _store_patients(session, frame, username=username, dry_run=dry_run, replace=replace)
    elif table.kind == "treatments":
        frame = validate_treatments(
            table.cells, today=today, known_patients=lambda codes: _stored_codes(session, codes)
        )
        report = _store_records(
            session, frame, kind="treatments", username=username, dry_run=dry_run, replace=replace
        )
    else:
        frame = validate_scores(
            table.cells, today=today, known_patients=lambda codes: _stored_codes(session, codes)
        )
        report = _store_records(
            session, frame, kind="scores", username=username, dry_run=dry_run, replace=replace
        )
    return report


def _check_measurements(
    cells: pd.DataFrame, *, allow_unusual: bool, today: dt.date | None
) -> tuple[MeasurementBatch, pd.DataFrame]:
    """Validate measurement cells: the batch and the ``visit_version`` stated per visit (no database
    read); raises on any problem."""
    cells, stated, version_problems = _stated_versions(cells)
    try:
        batch = validate_measurements(cells, allow_unusual=allow_unusual, today=today)
    except InputRejected as error:
        if not version_problems:
            raise
        merged = sorted(error.problems + version_problems, key=lambda p: p.row or 0)
        raise InputRejected(error.summary, merged) from None
    file_versions, disagreements = _versions_by_visit(batch, stated)
    if version_problems or disagreements:
        raise InputRejected(
            "The measurements file was refused",
            sorted(version_problems + disagreements, key=lambda p: p.row or 0),
        )
    return batch, file_versions


def _record_import(
    session: Session,
    kind: str,
    sha256: str,
    report: ImportReport,
    *,
    username: str,
    replace: bool,
    force: bool,
    allow_unusual: bool,
    forced: list[str],
) -> None:
    """The import's audit event (file digest, counts, options, accepted values, warnings)."""
    audit.record(
        session,
        username=username,
        action=f"import_{kind}",
        entity="file",
        entity_key=f"sha256:{sha256[:16]}",
        after={
            "file_sha256": sha256,
            "rows": report.rows,
            "added": report.added,
            "replaced": report.replaced,
            "unchanged": report.unchanged,
            "patients_added": report.patients_added,
            **({"identities": report.identities} if kind == "patients" else {}),
            "replace": replace,
            "allow_unusual": allow_unusual,
            "unusual_values_accepted": [str(p) for p in report.unusual],
            "warnings": [str(p) for p in report.warnings],
            **({"force": True, "forced_over": forced} if force else {}),
        },
    )
    checkpoint("import-written")
