"""The rows the criteria engine reads, loaded from the database as DataFrames (one SELECT per table)."""

from __future__ import annotations

import pandas as pd
from sqlalchemy import select
from sqlalchemy.orm import Session

from tracker.db.models import NerveTest, Patient, StimulationSite, Visit


def _visit_query(visit_ids: list[int] | None):
    query = select(
        Visit.id.label("visit_key"),
        Patient.code.label("patient"),
        Visit.visit_date,
        Visit.height_cm,
        Patient.sex,
        Patient.birth_year,
        Visit.phenotype,
        Visit.diagnosis,
        Visit.content_sha256,
    ).join(Patient, Patient.id == Visit.patient_id)
    return query if visit_ids is None else query.where(Visit.id.in_(visit_ids))


def load_frames(
    session: Session, visit_ids: list[int] | None = None
) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """(visits, tests, sites) as the engine expects them, for the given visits (all when ``None``)."""
    test_query = select(
        NerveTest.id.label("test_key"),
        NerveTest.visit_id.label("visit_key"),
        NerveTest.nerve,
        NerveTest.side,
        NerveTest.modality,
        NerveTest.temperature_c,
        NerveTest.lff_hz,
        NerveTest.f_latency_ms,
        NerveTest.f_absent,
        NerveTest.wrist_entrapment,
    )
    site_query = select(
        StimulationSite.nerve_test_id.label("test_key"),
        StimulationSite.site_order,
        StimulationSite.label,
        StimulationSite.distance_mm,
        StimulationSite.latency_ms,
        StimulationSite.peak_latency_ms,
        StimulationSite.amplitude_mv,
        StimulationSite.amplitude_uv,
        StimulationSite.duration_ms,
        StimulationSite.area_mvms,
    ).join(NerveTest, NerveTest.id == StimulationSite.nerve_test_id)
    if visit_ids is not None:
        test_query = test_query.where(NerveTest.visit_id.in_(visit_ids))
        site_query = site_query.where(NerveTest.visit_id.in_(visit_ids))
    connection = session.connection()
    visits = pd.read_sql(_visit_query(visit_ids), connection)
    tests = pd.read_sql(test_query, connection)
    sites = pd.read_sql(site_query, connection)
    return _typed(visits, tests, sites)


def _typed_visits(visits: pd.DataFrame) -> pd.DataFrame:
    visits["visit_date"] = pd.to_datetime(visits["visit_date"]).dt.date
    # Age at the visit from the birth year: exact to within a year (the full birth date is kept apart).
    visits["age_years"] = pd.to_datetime(visits["visit_date"]).dt.year - visits["birth_year"].astype(float)
    visits["height_cm"] = visits["height_cm"].astype(float)
    return visits


def _typed(
    visits: pd.DataFrame, tests: pd.DataFrame, sites: pd.DataFrame
) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    visits = _typed_visits(visits)
    tests["f_absent"] = tests["f_absent"].fillna(False).astype(bool)
    for column in ("temperature_c", "lff_hz", "f_latency_ms"):
        tests[column] = tests[column].astype(float)
    sites["amplitude"] = sites["amplitude_mv"].astype(float).fillna(sites["amplitude_uv"].astype(float))
    sites = sites.drop(columns=["amplitude_mv", "amplitude_uv"])
    for column in ("distance_mm", "latency_ms", "peak_latency_ms", "duration_ms", "area_mvms"):
        sites[column] = sites[column].astype(float)
    return visits, tests, sites
