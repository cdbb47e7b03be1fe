"""Audit trail: who changed what, before → after, in words; and a check of the hash chain."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from tracker.dashboard.state import engine, reading, require
from tracker.services.access.audit import event_lines, verify

require("read_audit")  # checked on the server whatever the navigation shows
st.title("Audit trail")
cols = st.columns([1, 1, 1])
patient = cols[0].text_input("Patient code", key="audit_patient").strip() or None
since = cols[1].date_input("From (UTC)", value=None, key="audit_since", format="YYYY-MM-DD")
who = cols[2].text_input("User", key="audit_user").strip() or None
with reading() as session:
    lines = event_lines(session, patient=patient, since=since, username=who, limit=500)
st.dataframe(
    pd.DataFrame(
        [{"when (UTC)": x.when, "who": x.who, "what": x.what, "before → after": x.change} for x in lines],
        columns=["when (UTC)", "who", "what", "before → after"],
    ),
    hide_index=True,
    width="stretch",
    key="audit_table",
)
st.caption(f"The newest {len(lines)} events that match (at most 500).")
if st.button("Check the chain", key="audit_verify"):
    with engine().connect() as connection:
        report = verify(connection)
    if report.intact:
        st.success(f"The audit trail is intact: {report.rows} events, every link checked.")
    else:
        st.error(f"The audit trail was altered at event {report.broken_at}: {report.problem}.")
