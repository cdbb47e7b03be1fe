"""Constraints live in the database itself, not only in Python: CHECK, UNIQUE, foreign keys, cascades."""

from __future__ import annotations

import datetime as dt

import pytest
from sqlalchemy import delete, func, insert, select
from sqlalchemy.exc import IntegrityError

from tracker.db.models import NerveTest, Patient, StimulationSite, Visit, utc_now


def _visit(sessions) -> int:
    with sessions.begin() as session:
        patient_id = session.scalar(
            insert(Patient).returning(Patient.id), [{"code": "T-1", "created_at": utc_now()}]
        )
        return session.scalar(
            insert(Visit).returning(Visit.id),
            [
                {
                    "patient_id": patient_id,
                    "visit_date": dt.date(2024, 1, 2),
                    "status": "final",
                    "version": 1,
                    "created_at": utc_now(),
                }
            ],
        )


def _test(sessions, visit_id, **values) -> int:
    row = {
        "visit_id": visit_id,
        "nerve": "median",
        "side": "left",
        "modality": "motor",
        "f_absent": False,
    } | values
    with sessions.begin() as session:
        return session.scalar(insert(NerveTest).returning(NerveTest.id), [row])


@pytest.mark.parametrize(
    "values",
    [
        {"side": "both"},  # closed vocabulary
        {"modality": "mixed"},
        {"temperature_c": 55.0},  # physical range
        {"f_latency_ms": 30.0, "f_absent": True},  # contradictory F-wave
        {"modality": "sensory", "f_latency_ms": 30.0},  # F-waves are motor only
    ],
)
def test_nerve_test_checks(sessions, values):
    visit_id = _visit(sessions)
    with pytest.raises(IntegrityError):
        _test(sessions, visit_id, **values)


@pytest.mark.parametrize(
    "values",
    [
        {"distance_mm": 0.0},
        {"distance_mm": -70.0},
        {"latency_ms": -1.0},
        {"amplitude_mv": -0.1},
        {"amplitude_mv": 5.0, "amplitude_uv": 5.0},  # one unit per site
        {"latency_ms": None, "amplitude_mv": 3.0},  # a response needs a latency
    ],
)
def test_site_checks(sessions, values):
    test_id = _test(sessions, _visit(sessions))
    row = {
        "nerve_test_id": test_id,
        "site_order": 1,
        "distance_mm": 70.0,
        "latency_ms": 3.5,
        "amplitude_mv": 6.0,
    } | values
    with pytest.raises(IntegrityError):
        with sessions.begin() as session:
            session.execute(insert(StimulationSite), [row])


def test_one_nerve_side_modality_per_visit(sessions):
    visit_id = _visit(sessions)
    _test(sessions, visit_id)
    _test(sessions, visit_id, side="right")  # the other side is another nerve test
    with pytest.raises(IntegrityError):
        _test(sessions, visit_id)


def test_deleting_a_visit_cascades_to_tests_and_sites(sessions):
    visit_id = _visit(sessions)
    test_id = _test(sessions, visit_id)
    with sessions.begin() as session:
        session.execute(
            insert(StimulationSite),
            [
                {
                    "nerve_test_id": test_id,
                    "site_order": 1,
                    "distance_mm": 70.0,
                    "latency_ms": 3.5,
                    "amplitude_mv": 6.0,
                }
            ],
        )
    with sessions.begin() as session:
        session.execute(delete(Visit).where(Visit.id == visit_id))
    with sessions() as session:
        assert session.scalar(select(func.count()).select_from(NerveTest)) == 0
        assert session.scalar(select(func.count()).select_from(StimulationSite)) == 0


def test_a_site_needs_an_existing_nerve_test(sessions):
    with pytest.raises(IntegrityError):
        with sessions.begin() as session:
            session.execute(
                insert(StimulationSite),
                [
                    {
                        "nerve_test_id": 9999,
                        "site_order": 1,
                        "distance_mm": 70.0,
                        "latency_ms": 3.5,
                        "amplitude_mv": 6.0,
                    }
                ],
            )
