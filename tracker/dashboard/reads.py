"""Cached reads for the pages: hashable arguments in, plain data out (never ORM objects).

Each takes the database URL first so that two databases never share a cache entry; every write goes
through :func:`tracker.dashboard.state.writing`, which clears these caches.
"""

from __future__ import annotations

import dataclasses

import pandas as pd
import streamlit as st

from tracker.dashboard.state import reading
from tracker.services import cohort, preferences
from tracker.services.follow_up import FollowUp, follow_up, outcome_history
from tracker.services.limit_sets import LimitSetInfo, list_limit_sets
from tracker.services.records import PatientRecord, patient_codes, patient_record
from tracker.services.response import ResponseView, cohort_course, response_view

TTL = 600  # s: another user's writes show up at the latest after this


@st.cache_data(ttl=TTL, show_spinner=False)
def codes(url: str) -> list[str]:
    with reading() as session:
        return patient_codes(session)


@st.cache_data(ttl=TTL, show_spinner=False)
def record(url: str, code: str) -> PatientRecord:
    with reading() as session:
        return patient_record(session, code)


@st.cache_data(ttl=TTL, show_spinner="Computing the follow-up…")
def trend(
    url: str, code: str, parameter: str, criteria: str | None, limits_name: str | None, cold_limbs: str
) -> FollowUp:
    with reading() as session:
        settings = preferences.criteria_settings(session, cold_limbs=cold_limbs)
        fu = follow_up(
            session,
            code,
            parameter=parameter,
            criteria=criteria,
            limits_name=limits_name,
            settings=settings,
            strip_criteria=[],
        )
    # The outcome strip does not depend on the parameter: cached on its own, so a parameter switch is quick.
    return dataclasses.replace(fu, outcomes=strip(url, code, limits_name, cold_limbs))


@st.cache_data(ttl=TTL, show_spinner=False)
def strip(url: str, code: str, limits_name: str | None, cold_limbs: str) -> pd.DataFrame:
    with reading() as session:
        settings = preferences.criteria_settings(session, cold_limbs=cold_limbs)
        return outcome_history(session, code, limits_name=limits_name, settings=settings)


@st.cache_data(ttl=TTL, show_spinner=False)
def patients(
    url: str, criteria: str, limits_name: str | None, search: str, diagnosis: str | None, outcome: str | None
) -> pd.DataFrame:
    with reading() as session:
        return cohort.patient_list(
            session,
            criteria=criteria,
            limits_name=limits_name,
            search=search,
            diagnosis=diagnosis,
            outcome=outcome,
        )


@st.cache_data(ttl=TTL, show_spinner=False)
def patient_page(
    url: str,
    criteria: str,
    limits_name: str | None,
    search: str,
    diagnosis: str | None,
    outcome: str | None,
    page: int,
    page_rows: int,
) -> cohort.PatientPage:
    with reading() as session:
        return cohort.patient_page(
            session,
            criteria=criteria,
            limits_name=limits_name,
            search=search,
            diagnosis=diagnosis,
            outcome=outcome,
            page=page,
            page_rows=page_rows,
        )


@st.cache_data(ttl=TTL, show_spinner=False)
def visits(
    url: str, criteria: tuple[str, ...], limits_name: str | None, diagnosis: str | None, start, end
) -> pd.DataFrame:
    with reading() as session:
        return cohort.visit_table(
            session,
            criteria=list(criteria),
            limits_name=limits_name,
            diagnosis=diagnosis,
            start=start,
            end=end,
        )


@st.cache_data(ttl=TTL, show_spinner=False)
def limit_sets(url: str) -> list[LimitSetInfo]:
    with reading() as session:
        sets = list_limit_sets(session)
        session.commit()  # the shipped default set is stored on first use
        return sets


@st.cache_data(ttl=TTL, show_spinner=False)
def clinic_settings(url: str) -> tuple[str | None, str]:
    """(default criteria set or None, temperature policy)."""
    with reading() as session:
        return preferences.default_criteria(session) or None, preferences.cold_limbs(session)


@st.cache_data(ttl=TTL, show_spinner=False)
def criteria_switches(url: str) -> dict[str, bool]:
    """The stored criteria switches (``Settings`` field → on), off where never set."""
    with reading() as session:
        fields = preferences.CRITERIA_SWITCHES.values()
        return {field: preferences.criteria_switch(session, field) for field in fields}


@st.cache_data(ttl=TTL, show_spinner="Judging the treatment response…")
def response(url: str, code: str, rules_id: str | None, limits_name: str | None) -> ResponseView:
    """One patient's treatment response under one rule set (follow-up page)."""
    with reading() as session:
        return response_view(session, code, rules_id=rules_id, limits_name=limits_name)


@st.cache_data(ttl=TTL, show_spinner=False)
def course(url: str, rules_id: str | None, codes: tuple[str, ...]) -> pd.DataFrame:
    """The course of these patients (one page of the patient list) under one rule set."""
    with reading() as session:
        return cohort_course(session, rules_id=rules_id, codes=list(codes))


@st.cache_data(ttl=TTL, show_spinner="Preparing the printable report…")
def report_pdf(
    url: str, code: str, visit_date, criteria: tuple[str, ...], limits_name: str | None, cold_limbs: str
) -> bytes:
    """The printable follow-up report of one visit as PDF bytes (Visit review download); nothing is saved."""
    from tracker import report

    with reading() as session:  # the evaluation the report runs is rolled back: the page has saved it already
        content = report.build(
            session,
            code,
            visit_date=visit_date,
            criteria=list(criteria),
            limits_name=limits_name,
            cold_limbs=cold_limbs,
        )
    return report.render(content, "pdf")
