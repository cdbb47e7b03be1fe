"""Reads of the stored patients and visits that a file names (by patient code, by patient id)."""

from __future__ import annotations

import pandas as pd
from sqlalchemy import select
from sqlalchemy.orm import Session

from tracker.db.models import Patient, Visit
from tracker.services.rows import chunks as _chunks

# Tables, not mapped classes, in the queries of every import: Core statements compile faster and need no
# mapper configuration (a cost paid again by every new process, such as each ncs-tracker command).
_PATIENTS = Patient.__table__
_VISITS = Visit.__table__


def _existing_patients(session: Session, codes: list[str]) -> pd.DataFrame:
    found = []
    for part in _chunks(codes):
        found += map(
            tuple,
            session.execute(
                select(_PATIENTS.c.id, _PATIENTS.c.code, _PATIENTS.c.sex, _PATIENTS.c.birth_year).where(
                    _PATIENTS.c.code.in_(part)
                )
            ),
        )
    return pd.DataFrame(found, columns=["patient_id", "patient", "db_sex", "db_birth_year"])


def _stored_codes(session: Session, codes: list[str]) -> list[str]:
    return _existing_patients(session, codes)["patient"].tolist()


def _existing_visits(session: Session, patient_ids: list[int]) -> pd.DataFrame:
    found = []
    for part in _chunks(patient_ids):
        found += map(
            tuple,
            session.execute(
                select(
                    _VISITS.c.id,
                    _VISITS.c.patient_id,
                    _VISITS.c.visit_date,
                    _VISITS.c.content_sha256,
                    _VISITS.c.status,
                    _VISITS.c.version,
                ).where(_VISITS.c.patient_id.in_(part))
            ),
        )
    return pd.DataFrame(
        found, columns=["visit_id", "patient_id", "visit_date", "db_fingerprint", "status", "version"]
    )
