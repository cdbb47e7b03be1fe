"""Follow-up: the treatment response of each regimen, then one panel per nerve and side over visit dates
(normal limits, the criteria threshold, regimens, changes beyond the smallest detectable change), one panel
per clinical score (minimal-important-change band) and the outcome of every criteria set per visit."""

from __future__ import annotations

import html

import streamlit as st

from tracker.dashboard import figures, reads, style, tables
from tracker.dashboard.state import database_url, require
from tracker.dashboard.widgets import (
    criteria_picker,
    criteria_title,
    limits_picker,
    patient_picker,
    rule_set_picker,
)
from tracker.domain.labels import DIAGNOSIS_SHORT
from tracker.services.follow_up import PARAMETERS
from tracker.services.response import RegimenCard, sdc_words


def regimen_card(card: RegimenCard) -> None:
    """A regimen's classification: word and shape in the Okabe–Ito colour, then the evidence in words."""
    _, colour = style.CLASSIFICATION[card.classification]
    st.markdown(
        f'<span style="color:{colour}; font-weight:700; font-size:1.05rem">{html.escape(card.word)}</span>'
        f" — {html.escape(card.regimen)} · {html.escape(card.period)}",
        unsafe_allow_html=True,
    )
    if len(card.evidence):
        st.dataframe(card.evidence, hide_index=True, width="stretch")
    for missing in card.missing:
        st.markdown(f"**Missing data:** {missing}")
    for note in card.notes:
        st.caption(f"Note: {note}")
    if card.compared:
        st.caption("Scores compared: " + ", ".join(d.isoformat() for d in card.compared))


require("see_patient_codes")  # checked on the server whatever the navigation shows
st.title("Follow-up")
url = database_url()
top = st.columns([1, 2, 2, 2])
with top[0]:
    code = patient_picker(key="follow_patient")
if code:
    with top[1]:
        criteria = criteria_picker("Thresholds of", key="follow_criteria")
    with top[2]:
        limits_name = limits_picker(key="follow_limits")
    with top[3]:
        rules_id = rule_set_picker(
            "Response rule set",
            key="follow_rules",
            help="Which published thresholds classify each regimen as improved, stable or worsened.",
        )
    _, cold_limbs = reads.clinic_settings(url)
    view = reads.response(url, code, rules_id, limits_name)
    running = [c for c in view.cards if c.ongoing]
    diagnosis = view.response.diagnosis
    fu_line = (
        f"**{code}** · diagnosis "
        f"**{DIAGNOSIS_SHORT.get(diagnosis, diagnosis) if diagnosis else 'not stated'}** · "
        f"{len(view.response.visit_dates)} visits"
    )
    if running:
        fu_line += f" · ongoing: {running[0].regimen} · course: **{running[0].word}**"
    st.markdown(fu_line)

    st.subheader("Treatment response")
    st.caption(
        f"{view.defers} Rule set: {view.rules_title} ({view.rules_id}, version {view.rules_version}); "
        f"as seen on {view.response.at.isoformat() if view.response.at else '—'}."
    )
    if not view.cards:
        st.info("No treatment recorded on or before the latest visit: no regimen to classify.")
    for number, card in enumerate(view.cards):
        if number == 0:
            with st.container(border=True):
                regimen_card(card)
        else:
            with st.expander(f"{card.word} — {card.regimen} · {card.period}", expanded=False):
                regimen_card(card)

    parameter = st.radio(
        "Parameter",
        list(PARAMETERS),
        key="follow_parameter",
        horizontal=True,
        format_func=lambda p: f"{PARAMETERS[p].label} ({PARAMETERS[p].unit})",
    )
    fu = reads.trend(url, code, parameter, criteria, limits_name, cold_limbs)
    st.plotly_chart(figures.outcome_strip(fu), key="follow_strip", width="stretch")
    st.plotly_chart(
        figures.trend_figure(fu, regimens=view.response.regimens, steps=view.steps),
        key="follow_trend",
        width="stretch",
    )
    has_threshold = (fu.references["kind"] == "criteria threshold").any()
    has_limit = (fu.references["kind"] == "normal limit").any()
    st.caption(
        (
            f"Dashed green: normal limit ({fu.limits.name} v{fu.limits.version}). "
            if has_limit
            else "No normal limit applies to this parameter. "
        )
        + (
            f"Dotted vermillion: threshold of {criteria_title(fu.criteria)} (version {fu.criteria_version}). "
            if has_threshold
            else f"{criteria_title(fu.criteria)} sets no threshold on this parameter. "
        )
        + f"Open circles with a dot: limb colder than the guideline minimum (policy: {cold_limbs}). "
        + (
            "Open triangles: change since the previous study beyond the smallest detectable change "
            "(▼ worse, ▲ better; "
        )
        + f"hover for the numbers). {sdc_words(view, parameter)} Shaded: regimens, labelled below the axis."
    )
    if len(view.panels):
        st.plotly_chart(
            figures.scores_figure(view, window=figures.time_range(fu)), key="follow_scores", width="stretch"
        )
        st.caption(
            "One panel per scale, each on its own range. Green band: ± the scale's minimal important change "
            "around the baseline of the running regimen (dotted line); a score outside it changed by at "
            "least that much. Open diamonds: computed scores. Shaded: regimens, labelled below the axis."
            + (
                ""
                if view.response.current
                else " No regimen runs at the latest visit or score: no band is drawn."
            )
        )
    else:
        st.caption("No clinical scores recorded.")
    with st.expander("Values plotted", expanded=False):
        st.dataframe(
            tables.plotted_values(fu),
            hide_index=True,
            width="stretch",
            key="follow_values",
            column_config={"visit date": st.column_config.DateColumn("visit date")},
        )
