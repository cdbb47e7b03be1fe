"""Entry point of the dashboard: ``streamlit run tracker/dashboard/app.py`` (``ncs-tracker serve`` does it).

Routes with ``st.navigation`` to the pages in ``views/``; shows the title, the database and the clinical
caution on every page.
"""

from __future__ import annotations

from pathlib import Path

import streamlit as st

from tracker import __version__
from tracker.dashboard import style
from tracker.dashboard.state import guarded, user

VIEWS = Path(__file__).resolve().parent / "views"

st.set_page_config(page_title=f"{style.TITLE} — {style.SUBTITLE}", layout="wide", initial_sidebar_state="expanded")
st.markdown(style.CSS, unsafe_allow_html=True)

PAGES = {
    "Clinic": [
        st.Page(VIEWS / "patients.py", title="Patients", default=True),  # the root address
        st.Page(VIEWS / "follow_up.py", title="Follow-up", url_path="follow-up"),
        st.Page(VIEWS / "visit_review.py", title="Visit review", url_path="visit-review"),
        st.Page(VIEWS / "visit_entry.py", title="New study", url_path="new-study"),
    ],
    "Research and set-up": [
        st.Page(VIEWS / "cohort.py", title="Cohort", url_path="cohort"),
        st.Page(VIEWS / "settings.py", title="Settings", url_path="settings"),
    ],
}
page = st.navigation(PAGES)

with st.sidebar:
    st.markdown(f"### {style.TITLE}\n{style.SUBTITLE}")
    st.caption(f"Version {__version__} · signed in as {user()}")

guarded(page.run)
st.markdown(style.CAUTION_HTML, unsafe_allow_html=True)
