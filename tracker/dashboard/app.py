"""Entry point of the dashboard: ``streamlit run tracker/dashboard/app.py`` (``ncs-tracker serve`` does it).

Routes with ``st.navigation`` to the pages in ``views/``; shows the title, the database and the clinical
caution on every page.
"""

from __future__ import annotations

from pathlib import Path

import streamlit as st

from tracker import __version__
from tracker.dashboard import state, style
from tracker.dashboard.state import guarded
from tracker.errors import TrackerError
from tracker.services.access.permissions import Actor

VIEWS = Path(__file__).resolve().parent / "views"

st.set_page_config(
    page_title=f"{style.TITLE} — {style.SUBTITLE}", layout="wide", initial_sidebar_state="expanded"
)
st.markdown(style.CSS, unsafe_allow_html=True)


def _sign_in_form() -> None:
    """The only thing shown until someone signs in (when sign-in is required)."""
    st.title(style.TITLE)
    notice = st.session_state.get(state.NOTICE_KEY)
    if notice:
        st.info(notice)
    with st.form("sign_in", clear_on_submit=True):
        username = st.text_input("User name", key="sign_in_user", autocomplete="username")
        password = st.text_input(
            "Password", type="password", key="sign_in_password", autocomplete="current-password"
        )
        submitted = st.form_submit_button("Sign in", type="primary")
    if submitted:
        # The browser clears both fields, but the server would keep what was typed (a password, or one
        # typed as the name) in the session's widget state until the next run: drop it now, whatever follows.
        for key in ("sign_in_user", "sign_in_password"):
            del st.session_state[key]
        try:
            state.sign_in(username.strip(), password)
        except TrackerError as error:
            st.error(str(error))
        else:
            st.rerun()


def _pages(actor: Actor) -> dict[str, list]:
    """The pages this actor may open; each page and each write checks again on the server."""
    clinic = []
    if actor.may("see_patient_codes"):
        clinic += [
            st.Page(VIEWS / "patients.py", title="Patients", default=True),  # the root address
            st.Page(VIEWS / "follow_up.py", title="Follow-up", url_path="follow-up"),
            st.Page(VIEWS / "visit_review.py", title="Visit review", url_path="visit-review"),
        ]
    if actor.may("write_clinical"):
        clinic.append(st.Page(VIEWS / "visit_entry.py", title="New study", url_path="new-study"))
    research = [st.Page(VIEWS / "cohort.py", title="Cohort", url_path="cohort", default=not clinic)]
    research.append(st.Page(VIEWS / "settings.py", title="Settings", url_path="settings"))
    if actor.may("read_audit"):
        research.append(st.Page(VIEWS / "audit.py", title="Audit trail", url_path="audit"))
    pages = {"Research and set-up": research}
    return {"Clinic": clinic, **pages} if clinic else pages


def main() -> None:
    actor = guarded(state.actor)
    if actor is None:
        if state.sign_in_required():
            _sign_in_form()
        st.markdown(style.CAUTION_HTML, unsafe_allow_html=True)
        return
    page = st.navigation(_pages(actor))
    with st.sidebar:
        st.markdown(f"### {style.TITLE}\n{style.SUBTITLE}")
        who = f"{actor.name} ({actor.role})" if actor.role else actor.name
        if actor.single_user:
            who += " · single-user mode"
        st.caption(
            f"Version {__version__} · {'signed in as' if state.sign_in_required() else 'working as'} {who}"
        )
        if state.sign_in_required() and st.button("Sign out", key="sign_out"):
            state.sign_out("Signed out.")
            st.rerun()
    guarded(page.run)
    st.markdown(style.CAUTION_HTML, unsafe_allow_html=True)


main()
