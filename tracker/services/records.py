"""Read one patient's record as plain data: visits, nerve tests, stimulation sites, derived segments."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

from sqlalchemy import select
from sqlalchemy.orm import Session

from tracker.db.models import NerveTest, OutcomeScore, Patient, StimulationSite, Treatment, Visit
from tracker.domain.catalogue import suggest
from tracker.domain.conduction import NerveSummary, Site, summarise_nerve
from tracker.errors import NotFound


@dataclass(frozen=True)
class NerveRecord:
    nerve: str
    side: str
    modality: str
    recording_site: str | None
    temperature_c: float | None
    lff_hz: float | None
    f_latency_ms: float | None
    f_absent: bool
    f_persistence_pct: float | None
    wrist_entrapment: bool | None
    sites: tuple[Site, ...]
    summary: NerveSummary


@dataclass(frozen=True)
class VisitRecord:
    visit_date: dt.date
    status: str
    version: int
    height_cm: float | None
    diagnosis: str | None
    phenotype: str | None
    nerves: tuple[NerveRecord, ...]


@dataclass(frozen=True)
class TreatmentRecord:
    therapy: str
    start_date: dt.date
    end_date: dt.date | None
    dose: float | None
    dose_unit: str | None
    interval_days: int | None


@dataclass(frozen=True)
class PatientRecord:
    code: str
    sex: str | None
    birth_year: int | None
    diagnosis: str | None
    phenotype: str | None
    visits: tuple[VisitRecord, ...]
    treatments: tuple[TreatmentRecord, ...]
    scores: tuple[tuple[dt.date, str, float], ...]


NERVE_ORDER = {"motor": 0, "sensory": 1}


def find_patient(session: Session, code: str) -> Patient:
    """The patient with this pseudonymous code, or :class:`NotFound` with a "did you mean" hint."""
    patient = session.scalar(select(Patient).where(Patient.code == code))
    if patient is not None:
        return patient
    codes = session.scalars(select(Patient.code)).all()
    hint = suggest(code, codes)
    raise NotFound(f"No patient with code {code!r}" + (f"; did you mean {hint!r}?" if hint else "."))


def patient_record(session: Session, code: str, *, visit_date: dt.date | None = None) -> PatientRecord:
    """The patient's record (all visits, or the one on ``visit_date``). Raises :class:`NotFound`."""
    patient = find_patient(session, code)
    query = select(Visit).where(Visit.patient_id == patient.id).order_by(Visit.visit_date)
    if visit_date is not None:
        query = query.where(Visit.visit_date == visit_date)
    visits = session.scalars(query).all()
    if visit_date is not None and not visits:
        dates = ", ".join(
            d.isoformat()
            for d in session.scalars(
                select(Visit.visit_date).where(Visit.patient_id == patient.id).order_by(Visit.visit_date)
            )
        )
        raise NotFound(f"Patient {code} has no visit on {visit_date.isoformat()}; visits: {dates or 'none'}")
    visit_ids = [v.id for v in visits]
    tests = (
        session.scalars(select(NerveTest).where(NerveTest.visit_id.in_(visit_ids))).all() if visit_ids else []
    )
    test_ids = [t.id for t in tests]
    sites: dict[int, list[Site]] = {t: [] for t in test_ids}
    if test_ids:
        for s in session.scalars(
            select(StimulationSite)
            .where(StimulationSite.nerve_test_id.in_(test_ids))
            .order_by(StimulationSite.site_order)
        ):
            sites[s.nerve_test_id].append(
                Site(
                    order=s.site_order,
                    label=s.label,
                    distance_mm=s.distance_mm,
                    latency_ms=s.latency_ms,
                    amplitude=s.amplitude_mv if s.amplitude_mv is not None else s.amplitude_uv,
                    duration_ms=s.duration_ms,
                    area_mvms=s.area_mvms,
                    peak_latency_ms=s.peak_latency_ms,
                )
            )
    by_visit: dict[int, list[NerveRecord]] = {v: [] for v in visit_ids}
    for t in tests:
        by_visit[t.visit_id].append(
            NerveRecord(
                nerve=t.nerve,
                side=t.side,
                modality=t.modality,
                recording_site=t.recording_site,
                temperature_c=t.temperature_c,
                lff_hz=t.lff_hz,
                f_latency_ms=t.f_latency_ms,
                f_absent=bool(t.f_absent),
                f_persistence_pct=t.f_persistence_pct,
                wrist_entrapment=t.wrist_entrapment,
                sites=tuple(sites[t.id]),
                summary=summarise_nerve(t.modality, sites[t.id]),
            )
        )
    visit_records = tuple(
        VisitRecord(
            visit_date=v.visit_date,
            status=v.status,
            version=v.version,
            height_cm=v.height_cm,
            diagnosis=v.diagnosis,
            phenotype=v.phenotype,
            nerves=tuple(sorted(by_visit[v.id], key=lambda n: (NERVE_ORDER[n.modality], n.nerve, n.side))),
        )
        for v in visits
    )
    treatments = tuple(
        TreatmentRecord(t.therapy, t.start_date, t.end_date, t.dose, t.dose_unit, t.interval_days)
        for t in session.scalars(
            select(Treatment).where(Treatment.patient_id == patient.id).order_by(Treatment.start_date)
        )
    )
    scores = tuple(
        (s.score_date, s.scale, s.value)
        for s in session.scalars(
            select(OutcomeScore)
            .where(OutcomeScore.patient_id == patient.id)
            .order_by(OutcomeScore.score_date, OutcomeScore.scale)
        )
    )
    return PatientRecord(
        code=patient.code,
        sex=patient.sex,
        birth_year=patient.birth_year,
        diagnosis=patient.diagnosis,
        phenotype=patient.phenotype,
        visits=visit_records,
        treatments=treatments,
        scores=scores,
    )


def patient_codes(session: Session) -> list[str]:
    return list(session.scalars(select(Patient.code).order_by(Patient.code)))
