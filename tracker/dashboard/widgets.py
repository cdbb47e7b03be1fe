"""Selectors shared by several pages, with stable keys (widgets that come and go upset AppTest)."""

from __future__ import annotations

import streamlit as st

from tracker.criteria import engine
from tracker.dashboard import reads
from tracker.dashboard.state import PATIENT_KEY, choose_patient, current_patient, database_url
from tracker.domain.labels import CRITERIA_TITLES, criteria_title  # noqa: F401 (pages import them from here)
from tracker.services.response import rule_set_choices


def patient_picker(label: str = "Patient", *, key: str) -> str | None:
    """Choose a patient by code; the choice is shared with the other pages."""
    codes = reads.codes(database_url())
    if not codes:
        st.info("No patients yet. Enter a study on the **New study** page, or import files.")
        return None
    current = current_patient()
    linked = st.query_params.get("patient")  # a link such as /follow-up?patient=DEMO-04
    if linked in codes and linked != st.session_state.get("_linked_patient"):
        st.session_state["_linked_patient"] = current = linked
        choose_patient(linked)
    index = codes.index(current) if current in codes else 0
    code = st.selectbox(label, codes, index=index, key=key, help="The clinic's pseudonymous patient code.")
    if code != st.session_state.get(PATIENT_KEY):
        choose_patient(code)
    return code


def criteria_picker(
    label: str, *, key: str, diagnosis: str | None = None, allow_auto: bool = True
) -> str | None:
    """A criteria set; ``None`` means "by the patient's diagnosis" (or the clinic's default)."""
    default, _ = reads.clinic_settings(database_url())
    options = ([None] if allow_auto else []) + engine.available()
    auto_label = "by diagnosis" if not default else f"clinic default ({criteria_title(default)})"
    index = 0 if allow_auto else (options.index(default) if default in options else 0)
    choice = st.selectbox(
        label,
        options,
        index=index,
        key=key,
        format_func=lambda c: auto_label if c is None else criteria_title(c),
    )
    return default if choice is None and default else choice


def limits_picker(*, key: str) -> str | None:
    sets = reads.limit_sets(database_url())
    names = sorted({s.name for s in sets})
    default = next((s.name for s in sets if s.is_default), None)
    options = [None] + [n for n in names]
    return st.selectbox(
        "Normal limits",
        options,
        index=0,
        key=key,
        format_func=lambda n: f"default set ({default})" if n is None else n,
        help="Every laboratory should use its own normal values (Settings → normal-limit sets).",
    )


def rule_set_picker(label: str, *, key: str, help: str) -> str:
    """A response rule set by its title (the shipped default first); returns its id."""
    choices = rule_set_choices()
    return st.selectbox(label, list(choices), index=0, key=key, format_func=lambda r: choices[r], help=help)
