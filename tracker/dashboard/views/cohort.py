"""Cohort: patients and visits by diagnosis, the share of visits per outcome of each criteria set, and the
filtered visit table with a download."""

from __future__ import annotations

import datetime as dt

import streamlit as st

from tracker.criteria import engine
from tracker.dashboard import figures, reads, tables
from tracker.dashboard.state import database_url, may, require, user, writing
from tracker.dashboard.widgets import criteria_title, limits_picker
from tracker.domain.labels import DIAGNOSIS_SHORT
from tracker.domain.vocabulary import DIAGNOSES
from tracker.services.cohort import counts_by_diagnosis, csv_bytes, outcome_shares
from tracker.services.export import deidentify

require("read")  # checked on the server whatever the navigation shows
st.title("Cohort")
url = database_url()
cols = st.columns([1, 1, 1, 2])
diagnosis = cols[0].selectbox(
    "Diagnosis",
    [None, *DIAGNOSES],
    key="cohort_diagnosis",
    format_func=lambda d: "all" if d is None else DIAGNOSIS_SHORT.get(d, d),
)
start = cols[1].date_input("Visits from", value=None, key="cohort_start", format="YYYY-MM-DD")
end = cols[2].date_input(
    "Visits to", value=None, key="cohort_end", format="YYYY-MM-DD", max_value=dt.date.today()
)
with cols[3]:
    limits_name = limits_picker(key="cohort_limits")
criteria = st.multiselect(
    "Criteria sets",
    engine.available(),
    default=engine.available(),
    key="cohort_criteria",
    format_func=criteria_title,
)
visits = reads.visits(url, tuple(criteria), limits_name, diagnosis, start, end)
codes_shown = may("see_patient_codes")
if not codes_shown:  # a research coordinator sees export ids (as in the research export), never clinic codes
    with writing("export") as session:  # the export secret is created on first use
        secret = deidentify.export_secret(session, username=user())
    visits = visits.assign(patient=[deidentify.export_id(secret, c) for c in visits["patient"]])
# The counts need the "patient" column (codes or export ids); the visit table and its file name it as it is.
listed = visits if codes_shown else visits.rename(columns={"patient": "export_id"})

left, right = st.columns([1, 2])
with left:
    st.subheader("By diagnosis")
    st.dataframe(
        tables.cohort_visits(counts_by_diagnosis(visits)),
        hide_index=True,
        width="stretch",
        key="cohort_counts",
    )
with right:
    st.subheader("Outcome per criteria set (share of visits)")
    shares = outcome_shares(visits, criteria)
    st.plotly_chart(figures.outcome_share_figure(shares), key="cohort_shares", width="stretch")
    st.caption(
        "From saved evaluations; “not evaluated” visits have none yet (Patients page → Evaluate all visits)."
    )

st.subheader(f"Visits ({len(visits)})")
st.dataframe(tables.cohort_visits(listed), hide_index=True, width="stretch", key="cohort_visits")
st.download_button(
    "Download this table (CSV; clinic use: contains patient codes)"
    if codes_shown
    else "Download this table (CSV with export ids and real visit dates)",
    csv_bytes(listed),
    file_name="cohort_visits.csv",
    mime="text/csv",
    key="cohort_download",
)
st.caption(
    "For research, use the de-identified export: `ncs-tracker export` (export ids instead of codes, shifted "
    "dates, a data dictionary and a manifest)."
)
