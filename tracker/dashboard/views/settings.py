"""Settings: normal-limit sets (list, import, default), the default criteria set, the temperature policy and
the switches for project rules that change a publication's literal result (off: the publication's reading)."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from tracker.criteria import engine
from tracker.dashboard import reads
from tracker.dashboard.state import database_url, user, writing
from tracker.dashboard.widgets import criteria_title
from tracker.domain.labels import CRITERIA_SWITCH_LABELS
from tracker.errors import InputRejected
from tracker.services import preferences
from tracker.services.limit_sets import import_limit_table, set_default
from tracker.services.tables import parse_table

st.title("Settings")
url = database_url()
st.caption(f"Changes apply to everyone using this database and are recorded in the audit trail as {user()}.")

st.subheader("Normal-limit sets")
sets = reads.limit_sets(url)
st.dataframe(
    pd.DataFrame(
        [
            {
                "name": s.name,
                "version": s.version,
                "rows": s.rows,
                "default": "yes" if s.is_default else "",
                "description": s.description,
            }
            for s in sets
        ]
    ),
    hide_index=True,
    width="stretch",
    key="settings_sets",
)
names = sorted({s.name for s in sets})
current = next((s.name for s in sets if s.is_default), names[0] if names else None)
cols = st.columns([2, 1])
chosen = cols[0].selectbox(
    "Default normal-limit set",
    names,
    index=names.index(current) if current in names else 0,
    key="settings_default_set",
)
if cols[1].button("Make default", key="settings_make_default") and chosen:
    with writing("limits") as session:
        info = set_default(session, chosen, username=user())
    st.success(f"Default normal limits: {info.name} v{info.version}.")
    st.rerun()

with st.expander(
    "Import a laboratory's own limits (CSV: nerve, modality, parameter, bound, value, optional strata and "
    "source)"
):
    upload = st.file_uploader("Limits file", type=["csv", "xlsx"], key="settings_limits_file")
    name = st.text_input(
        "Name of the set", key="settings_limits_name", help="An existing name gets a new version."
    )
    if upload is not None and st.button("Import limits", key="settings_limits_go"):
        try:
            with writing("limits") as session:
                table = parse_table(upload.getvalue(), "." + upload.name.rsplit(".", 1)[-1], ("limits",))
                info = import_limit_table(session, table, name=name, username=user())
            st.success(f"Imported {info.name} v{info.version} ({info.rows} rows).")
        except InputRejected as error:
            st.error(f"{error.summary} — nothing was imported.")
            st.dataframe(
                pd.DataFrame(
                    [
                        {"row": p.row, "column": p.column, "value": p.value, "problem": p.message}
                        for p in error.problems
                    ]
                ),
                hide_index=True,
            )

st.subheader("Criteria")
default, cold_limbs = reads.clinic_settings(url)
options = [""] + engine.available()
picked = st.selectbox(
    "Default criteria set",
    options,
    index=options.index(default) if default in options else 0,
    key="settings_criteria",
    format_func=lambda c: (
        "by each visit's diagnosis (CIDP → EAN/PNS 2021, MMN → EFNS/PNS 2010, GBS → Hadden 1998)"
        if c == ""
        else criteria_title(c)
    ),
)
policy = st.radio(
    "Limbs colder than the guideline minimum",
    preferences.COLD_LIMB_POLICIES,
    index=preferences.COLD_LIMB_POLICIES.index(cold_limbs),
    key="settings_cold",
    horizontal=True,
    format_func=lambda p: {
        "warn": "keep the values and warn",
        "exclude": "treat the nerve's findings as not evaluable",
    }[p],
)
st.caption(
    "Project rules that change a publication's literal result: off keeps the publication's reading; "
    "the trace of each check says which applied."
)
stored = reads.criteria_switches(url)
switches = {}
for field, (label, explanation) in CRITERIA_SWITCH_LABELS.items():
    switches[field] = st.toggle(label, value=stored.get(field, False), key=f"settings_{field}")
    st.caption(explanation)
if st.button("Save criteria settings", key="settings_save", type="primary"):
    with writing("settings") as session:
        preferences.set_default_criteria(session, picked or None, username=user())
        preferences.set_cold_limbs(session, policy, username=user())
        for field, on in switches.items():
            preferences.set_criteria_switch(session, field, on, username=user())
    st.success("Saved.")
    st.rerun()
