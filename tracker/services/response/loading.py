"""Reading what the response analysis needs: treatments, scores and visit dates (one patient or all)."""

from __future__ import annotations

import pandas as pd
from sqlalchemy import String, cast, select
from sqlalchemy.orm import Session

from tracker.db.models import OutcomeScore, Patient, Treatment, Visit
from tracker.response.regimens import TreatmentPeriod


def treatment_periods(
    session: Session, patient_ids: list[int] | None = None
) -> dict[int, list[TreatmentPeriod]]:
    query = select(
        Treatment.patient_id,
        Treatment.therapy,
        Treatment.start_date,
        Treatment.end_date,
        Treatment.dose,
        Treatment.dose_unit,
        Treatment.interval_days,
    )
    if patient_ids is not None:
        query = query.where(Treatment.patient_id.in_(patient_ids))
    out: dict[int, list[TreatmentPeriod]] = {}
    for pid, therapy, start, end, dose, unit, interval in session.execute(query):
        out.setdefault(pid, []).append(TreatmentPeriod(therapy, start, end, dose, unit, interval))
    return out


def scores_frame(
    session: Session, patient_ids: list[int] | None = None, scales: list[str] | None = None
) -> pd.DataFrame:
    """Recorded scores: ``patient`` (the patient id), ``date``, ``scale``,
    ``value`` (only ``scales`` if given)."""
    # Dates as ISO text, parsed vectorised below: the per-row date conversion of the driver layer cost more
    # than the query itself on a 5,000-patient database.
    query = select(
        OutcomeScore.patient_id, cast(OutcomeScore.score_date, String), OutcomeScore.scale, OutcomeScore.value
    )
    if patient_ids is not None:
        query = query.where(OutcomeScore.patient_id.in_(patient_ids))
    if scales is not None:
        query = query.where(OutcomeScore.scale.in_(scales))
    frame = pd.read_sql(query, session.connection())
    frame.columns = ["patient", "date", "scale", "value"]
    frame["date"] = _dates(frame["date"])
    frame["value"] = frame["value"].astype(float)
    return frame


def visit_dates(session: Session, patient_ids: list[int] | None = None) -> pd.DataFrame:
    """``visit_key``, ``patient`` (id), ``visit_date``, sorted by patient and date."""
    query = select(Visit.id, Visit.patient_id, cast(Visit.visit_date, String)).order_by(
        Visit.patient_id, Visit.visit_date
    )
    if patient_ids is not None:
        query = query.where(Visit.patient_id.in_(patient_ids))
    frame = pd.read_sql(query, session.connection())
    frame.columns = ["visit_key", "patient", "visit_date"]
    frame["visit_date"] = _dates(frame["visit_date"])
    return frame


def _dates(column: pd.Series) -> pd.Series:
    """Python dates (SQLite hands back ISO text, PostgreSQL dates); an empty column stays empty."""
    if column.empty:
        return column.astype(object)
    return pd.Series(pd.to_datetime(column, format="ISO8601").dt.date, index=column.index, dtype=object)


def patients(session: Session, codes: list[str] | None = None) -> pd.DataFrame:
    """``patient`` (id), ``code``, ``diagnosis`` of every patient, or of those with these ``codes``."""
    query = select(Patient.id, Patient.code, Patient.diagnosis).order_by(Patient.code)
    if codes is not None:
        query = query.where(Patient.code.in_(codes))
    return pd.DataFrame(session.execute(query).all(), columns=["patient", "code", "diagnosis"])
