"""Visit review: one visit's measurements, derived segments and the criteria trace nerve by nerve, with
warnings, the closest miss and what changed since the previous visit."""

from __future__ import annotations

import html

import pandas as pd
import streamlit as st

from tracker.dashboard import reads, style, tables
from tracker.dashboard.state import database_url, require, user, writing
from tracker.dashboard.widgets import CRITERIA_TITLES, criteria_title, limits_picker, patient_picker
from tracker.domain.labels import STATUS_LABELS, outcome_label, status_label, words
from tracker.services import preferences, review
from tracker.services.evaluation import check_visit, default_criteria

require("see_patient_codes")  # checked on the server whatever the navigation shows
st.title("Visit review")
url = database_url()
top = st.columns([1, 1, 2])
with top[0]:
    code = patient_picker(key="review_patient")
if code:
    record = reads.record(url, code)
    dates = [v.visit_date for v in record.visits]
    if not dates:
        st.info(f"{code} has no visits yet.")
        st.stop()
    visit_date = top[1].selectbox(
        "Visit", list(reversed(dates)), key="review_visit", format_func=lambda d: d.isoformat()
    )
    default, cold_limbs = reads.clinic_settings(url)
    chosen_default = default or default_criteria(
        record.diagnosis
    )  # as check does: clinic default, else by diagnosis
    if st.session_state.get("_review_default") != chosen_default:
        # Another patient whose diagnosis maps to another set (CIDP → MMN …): the
        # choice follows the new default.
        st.session_state["_review_default"] = chosen_default
        st.session_state["review_criteria"] = [chosen_default]
    with top[2]:
        criteria = st.multiselect(
            "Criteria sets", list(CRITERIA_TITLES), key="review_criteria", format_func=criteria_title
        )
    limits_name = limits_picker(key="review_limits")
    if not criteria:
        st.info("Choose at least one criteria set.")
        st.stop()
    with writing("read") as session:  # the evaluation is saved with its versions (a cache any reader fills)
        check = check_visit(
            session,
            code,
            visit_date=visit_date,
            criteria=criteria,
            limits_name=limits_name,
            settings=preferences.criteria_settings(session, cold_limbs=cold_limbs),
            username=user(),
        )
    st.info("Decision support only: every verdict below must be reviewed by a qualified clinician.")
    st.markdown(
        f"**{check.patient}** · visit **{check.visit_date.isoformat()}** · phenotype "
        f"{check.phenotype or 'not stated'} · normal limits {check.limits.name} v{check.limits.version}"
    )
    st.download_button(
        "Printable report (PDF)",
        reads.report_pdf(url, code, visit_date, tuple(criteria), limits_name, cold_limbs),
        file_name=f"{check.patient}_{check.visit_date.isoformat()}_report.pdf",
        mime="application/pdf",
        key="review_report_download",
        help="This visit with the criteria chosen here, the treatment response, the changes that count and a "
        "trend figure. It holds patient data (the pseudonymous code): keep it within the clinic.",
    )

    cards = st.columns(len(check.results))
    for card, (criteria_id, result) in zip(cards, check.results.items()):
        outcome = result.outcomes.iloc[0]
        group, shape, colour = style.outcome_group(str(outcome["outcome"]))
        extra = " · ".join(f"{words(k)}: {outcome_label(outcome[k])}" for k in result.extra_keys)
        card.markdown(
            f"<div class='ncs-badge' style='border-color:{colour}'>"
            f"{html.escape(criteria_title(criteria_id))}</div>"
            f"<h3 style='color:{colour};margin:0.2rem 0'>"
            f"{shape} {html.escape(outcome_label(outcome['outcome']))}</h3>"
            f"<small>{html.escape(tables.in_words(str(outcome.get('rule', '') or '')))}"
            f"{'<br>' + html.escape(extra) if extra else ''}</small>",
            unsafe_allow_html=True,
        )

    visit = next(v for v in record.visits if v.visit_date == visit_date)
    unusual = review.unusual_values(visit)
    if unusual:
        st.warning("**Unusual values** — " + "\n".join(f"\n- {tables.in_words(m)}" for m in unusual))
    if len(check.warnings):
        st.warning(
            "**Temperature** — " + "\n".join(f"\n- {tables.in_words(m)}" for m in check.warnings["message"])
        )
    for criteria_id in check.results:
        title = criteria_title(criteria_id)
        miss = check.closest.get(criteria_id)
        if miss is not None and len(miss):
            st.markdown(f"**Closest miss ({title}):** {tables.closest_miss_words(miss.iloc[0])}")
        changes = check.changes.get(criteria_id)
        if check.previous_date is None:
            st.caption(f"{title}: first visit, nothing to compare.")
        elif changes is not None and len(changes):
            st.markdown(f"**Changed since {check.previous_date.isoformat()} ({title})**")
            st.dataframe(
                tables.changes_table(changes),
                hide_index=True,
                width="content",
                key=f"review_changes_{criteria_id}",
            )
        else:
            st.caption(f"{title}: no finding changed since {check.previous_date.isoformat()}.")

    measured, segments = tables.measurement_display(*review.measurement_tables(visit))
    tab_trace, tab_measured = st.tabs(["Criteria trace", "Measurements and segments"])
    with tab_trace:
        for criteria_id, result in check.results.items():
            st.subheader(criteria_title(criteria_id))
            by_nerve, footnotes = tables.trace_tables(result.findings)
            for nerve_label, rows in by_nerve.items():
                st.markdown(f"**{nerve_label}**")
                st.dataframe(
                    rows.style.map(style.status_css, subset=["verdict"]),
                    hide_index=True,
                    width="stretch",
                    column_config={
                        "criterion": st.column_config.TextColumn(width="medium"),
                        "verdict": st.column_config.TextColumn(width="large"),
                        "source": st.column_config.TextColumn(width="small"),
                    },
                )
            if footnotes:
                st.caption(
                    "Sources: "
                    + " · ".join(
                        f"[{n}] {tables.in_words(text)}" for n, text in enumerate(footnotes, start=1)
                    )
                )
        st.caption(
            "Verdict: "
            + " · ".join(status_label(s) for s in STATUS_LABELS)
            + " (not evaluable = a measurement is missing, never read as normal; not applicable = an "
            "exclusion or a published precondition). * = value from memory, not verified against the "
            "publication."
        )
    with tab_measured:
        st.markdown("**Stimulation sites**")
        st.dataframe(measured, hide_index=True, width="stretch")
        st.markdown("**Segments (derived)**")
        st.dataframe(
            segments if len(segments) else pd.DataFrame({"segment": ["none (one site per nerve)"]}),
            hide_index=True,
            width="stretch",
        )
