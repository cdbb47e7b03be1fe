"""Follow-up: one panel per nerve and side over visit dates, with normal limits, the criteria threshold,
treatment periods, clinical scores and the outcome of every criteria set per visit."""

from __future__ import annotations

import streamlit as st

from tracker.dashboard import figures, reads
from tracker.dashboard.state import database_url
from tracker.dashboard.widgets import criteria_picker, criteria_title, limits_picker, patient_picker
from tracker.services.follow_up import PARAMETERS

st.title("Follow-up")
url = database_url()
top = st.columns([1, 2, 2])
with top[0]:
    code = patient_picker(key="follow_patient")
if code:
    with top[1]:
        criteria = criteria_picker("Thresholds of", key="follow_criteria")
    with top[2]:
        limits_name = limits_picker(key="follow_limits")
    parameter = st.radio(
        "Parameter", list(PARAMETERS), key="follow_parameter", horizontal=True, format_func=lambda p: f"{PARAMETERS[p].label} ({PARAMETERS[p].unit})"
    )
    _, cold_limbs = reads.clinic_settings(url)
    fu = reads.trend(url, code, parameter, criteria, limits_name, cold_limbs)
    running = fu.treatments[fu.treatments["end_date"].isna()]["label"].tolist() if len(fu.treatments) else []
    st.markdown(
        f"**{fu.patient}** · diagnosis **{fu.diagnosis or 'not stated'}** · {len(fu.visit_dates)} visits"
        + (f" · ongoing: {', '.join(running)}" if running else "")
    )
    st.plotly_chart(figures.outcome_strip(fu), key="follow_strip", width="stretch")
    st.plotly_chart(figures.trend_figure(fu), key="follow_trend", width="stretch")
    has_threshold = (fu.references["kind"] == "criteria threshold").any()
    has_limit = (fu.references["kind"] == "normal limit").any()
    st.caption(
        (f"Dashed green: normal limit ({fu.limits.name} v{fu.limits.version}). " if has_limit else "No normal limit applies to this parameter. ")
        + (f"Dotted vermillion: threshold of {criteria_title(fu.criteria)} (version {fu.criteria_version}). " if has_threshold
           else f"{criteria_title(fu.criteria)} sets no threshold on this parameter. ")
        + f"Open circles with a dot: limb colder than the guideline minimum (policy: {cold_limbs}). Shaded: treatment periods."
    )
    if len(fu.scores):
        st.plotly_chart(figures.scores_figure(fu), key="follow_scores", width="stretch")
    else:
        st.caption("No clinical scores recorded.")
    with st.expander("Values plotted", expanded=False):
        shown = fu.points.assign(cold=fu.points["cold"].map({True: "cold", False: ""}))
        st.dataframe(
            shown[["visit_date", "panel", "series", "value", "unit", "temperature_c", "cold", "note"]],
            hide_index=True, width="stretch", key="follow_values",
            column_config={"value": st.column_config.NumberColumn(format="%.2f"), "visit_date": st.column_config.DateColumn("visit")},
        )
