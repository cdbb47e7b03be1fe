"""Patients: find a patient by code, filter by diagnosis and by the latest visit's outcome of a criteria set;
each patient's course (improving / stable / worsening / not assessable) under a response rule set."""

from __future__ import annotations

import streamlit as st

from tracker.dashboard import reads, tables
from tracker.dashboard.state import choose_patient, database_url, may, require, user, writing
from tracker.dashboard.widgets import criteria_picker, criteria_title, limits_picker, rule_set_picker
from tracker.domain.labels import DIAGNOSIS_SHORT, outcome_label
from tracker.domain.vocabulary import DIAGNOSES
from tracker.services import preferences
from tracker.services.cohort import NOT_EVALUATED
from tracker.services.evaluation import refresh_evaluations
from tracker.services.response import with_course

PAGE_ROWS = 50

require("see_patient_codes")  # checked on the server whatever the navigation shows
st.title("Patients")
url = database_url()
left, middle, right = st.columns([2, 1, 2])
search = left.text_input("Search by code", key="patients_search", placeholder="e.g. DEMO-0")
diagnosis = middle.selectbox(
    "Diagnosis",
    [None, *DIAGNOSES],
    key="patients_diagnosis",
    format_func=lambda d: "all" if d is None else DIAGNOSIS_SHORT.get(d, d),
)
with right:
    # None: each patient's latest visit judged by the set its diagnosis maps to (as check and evaluate do).
    criteria = criteria_picker("Outcome column: criteria set", key="patients_criteria")
below = st.columns(2)
with below[0]:
    limits_name = limits_picker(key="patients_limits")
with below[1]:
    rules_id = rule_set_picker(
        "Course column: response rule set",
        key="patients_rules",
        help="The running regimen of each patient, classified by this rule set at the latest visit or score.",
    )
# The database filters, counts and cuts the list into pages: a page costs the same for 10 or 5,000 patients.
outcome = st.session_state.get("patients_outcome")
page = int(st.session_state.get("patients_page") or 1)
listing = reads.patient_page(url, criteria, limits_name, search, diagnosis, outcome, page, PAGE_ROWS)
if outcome is not None and outcome not in listing.outcomes:  # e.g. after another criteria set was chosen
    st.session_state["patients_outcome"] = outcome = None
    listing = reads.patient_page(url, criteria, limits_name, search, diagnosis, None, page, PAGE_ROWS)
pages = max(1, -(-listing.total // PAGE_ROWS))
if page > pages:
    st.session_state["patients_page"] = page = pages
    listing = reads.patient_page(url, criteria, limits_name, search, diagnosis, outcome, page, PAGE_ROWS)
st.selectbox(
    "Latest outcome",
    [None, *listing.outcomes],
    key="patients_outcome",
    format_func=lambda o: "any" if o is None else outcome_label(o),
)
if pages > 1:
    st.number_input(
        f"Page (of {pages}, {PAGE_ROWS} patients each)",
        min_value=1,
        max_value=pages,
        step=1,
        key="patients_page",
    )
total = listing.total
table = listing.rows.copy()
table = with_course(table, reads.course(url, rules_id, tuple(table["patient"])))
st.caption(
    f"{total} patients{f' (page {int(page)} of {pages})' if pages > 1 else ''} · latest outcome = "
    f"{criteria_title(criteria) if criteria else 'the criteria set of each patient’s diagnosis'} at the "
    "latest visit, from saved evaluations · course = the regimen running at (or last before) the latest "
    "visit or score, judged by the response rule set (decision support: the classification defers to the "
    "treating clinician)"
)
st.dataframe(
    tables.patient_rows(table),
    hide_index=True,
    width="stretch",
    column_config={
        "first visit": st.column_config.DateColumn("first visit"),
        "last visit": st.column_config.DateColumn("last visit"),
    },
)
if NOT_EVALUATED in listing.outcomes:
    st.warning(
        "Some latest visits have no saved evaluation with these normal limits; they are shown as “not "
        "evaluated”, never as normal."
    )
    if st.button("Evaluate all visits now", key="patients_evaluate", disabled=not may("write_clinical")):
        with st.spinner("Evaluating every visit against every criteria set…"), writing() as session:
            counts = refresh_evaluations(
                session,
                limits_name=limits_name,
                username=user(),
                settings=preferences.criteria_settings(session),
            )
        st.success(f"{counts['recomputed']} evaluations computed, {counts['unchanged']} already current.")
        st.rerun()

if len(table):
    chosen = st.selectbox(
        "Open a patient (this page; search by code for others)", list(table["patient"]), key="patients_open"
    )
    if st.button("Show follow-up", key="patients_go", type="primary"):
        choose_patient(chosen)
        st.switch_page("views/follow_up.py")
st.caption(f"Signed in as {user()}.")
