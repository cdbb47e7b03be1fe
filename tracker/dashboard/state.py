"""What every page shares: the database (one cached engine per URL, a new session per action), the acting
user and what they may do, the current patient, cached reads (cleared after every write) and a guard that
keeps tracebacks — which may hold patient data — off the screen and out of the log.

Who acts. With sign-in (``ncs-tracker serve --sign-in``, required on any address but loopback) the signed-in
account; without it the login that started the dashboard (one person on their own machine). Either way the
role is read from the database on every run, so a deactivated account loses access at its next click, and
every write goes through :func:`writing` with the permission it needs (checked here, on the server).
"""

from __future__ import annotations

import logging
import os
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import TypeVar

import streamlit as st
from sqlalchemy import Engine
from sqlalchemy.orm import Session

from tracker.config import ENV_SIGN_IN, resolve_database_url
from tracker.db.schema_check import require_current_schema
from tracker.db.session import make_engine, make_session_factory
from tracker.errors import TrackerError
from tracker.services.access import accounts
from tracker.services.access.permissions import PERMISSION_WORDS, PRIVILEGED, Actor, NotPermitted
from tracker.serving import is_loopback

log = logging.getLogger("ncs_tracker.dashboard")

# A signed-in session ends after this long without a click, and in any case after MAX_SESSION_HOURS
# (common practice for clinical workstations, no single source).
IDLE_MINUTES = 30
MAX_SESSION_HOURS = 12
ACCOUNT_KEY = "ncs_account"
NOTICE_KEY = "ncs_sign_in_notice"
PATIENT_KEY = "ncs_patient"  # the patient chosen on any page, kept across pages
VISIT_KEY = "ncs_visit"
T = TypeVar("T")


def database_url() -> str:
    return resolve_database_url(None)[0]


def _release(engine: Engine) -> None:
    engine.dispose()  # close pooled connections when the cache lets go of the engine


@st.cache_resource(show_spinner=False, on_release=_release)
def _engine(url: str) -> Engine:
    engine = make_engine(url)
    require_current_schema(engine)
    return engine


def engine() -> Engine:
    return _engine(database_url())


@contextmanager
def reading() -> Iterator[Session]:
    """A short read-only session."""
    with make_session_factory(engine())() as session:
        yield session


@contextmanager
def writing(permission: str = "write_clinical") -> Iterator[Session]:
    """A transaction for an actor allowed ``permission`` (else :class:`NotPermitted`, nothing opened):
    committed on success, rolled back on any error; cached reads are cleared after."""
    require(permission)
    with make_session_factory(engine()).begin() as session:
        yield session
    st.cache_data.clear()


def sign_in_required() -> bool:
    """Required when ``serve --sign-in`` asked for it, and also whenever this server listens beyond loopback
    (``streamlit run`` started by hand, without ``serve``'s check): visitors then never act as the login
    that started it. Streamlit binds every address when none is given; only its test harness, which
    listens nowhere, runs without one."""
    if os.environ.get(ENV_SIGN_IN) == "required":
        return True
    from streamlit import config  # the live options (``st.get_option`` is bound at import, tests patch this)

    address = config.get_option("server.address")
    if address:
        return not is_loopback(str(address))
    return not config.get_option("global.appTest")


def actor() -> Actor | None:
    """Who acts now, with the role read from the database; ``None`` when sign-in is required and nobody is
    signed in (or the session expired, or the account was deactivated)."""
    if not sign_in_required():
        with reading() as session:
            return accounts.system_actor(session)
    held = st.session_state.get(ACCOUNT_KEY)
    if held is None:
        return None
    now = time.monotonic()
    if now - held["last_seen"] > IDLE_MINUTES * 60:
        sign_out(f"Your session ended after {IDLE_MINUTES} minutes without activity; please sign in again.")
        return None
    if now - held["signed_in"] > MAX_SESSION_HOURS * 3600:
        sign_out(f"Your session ended: it may last at most {MAX_SESSION_HOURS} hours; please sign in again.")
        return None
    with reading() as session:
        current = accounts.actor_for(session, held["name"], "sign-in", authenticated=True)
    if current.role is None:
        sign_out("This account is no longer active; ask an administrator.")
        return None
    held["last_seen"] = now
    return current


def sign_in(username: str, password: str) -> Actor:
    """Check the password (failures are committed: they count towards lock-out) and keep the account in
    this browser session. Raises :class:`accounts.SignInRefused`."""
    refused: accounts.SignInRefused | None = None
    with make_session_factory(engine()).begin() as session:
        try:
            signed = accounts.authenticate(session, username, password, via="sign-in")
        except accounts.SignInRefused as error:
            refused = error
    if refused is not None:
        raise refused
    now = time.monotonic()
    st.session_state[ACCOUNT_KEY] = {"name": signed.name, "signed_in": now, "last_seen": now}
    st.session_state.pop(NOTICE_KEY, None)
    return signed


def sign_out(notice: str | None = None) -> None:
    st.session_state.pop(ACCOUNT_KEY, None)
    for key in (PATIENT_KEY, VISIT_KEY):
        st.session_state.pop(key, None)
    if notice:
        st.session_state[NOTICE_KEY] = notice


def require(permission: str) -> Actor:
    """The actor, if allowed ``permission``; else :class:`NotPermitted` (shown by :func:`guarded`)."""
    current = actor()
    if current is None:
        raise NotPermitted("Please sign in.")
    current.require(permission)
    if permission in PRIVILEGED and not current.single_user and not current.authenticated:
        # As on the command line, a privileged change needs the account's password: here, a sign-in.
        raise NotPermitted(
            f"To {PERMISSION_WORDS[permission]} here, start the dashboard with sign-in "
            "(ncs-tracker serve --sign-in) and sign in with your password."
        )
    return current


def may(permission: str) -> bool:
    current = actor()
    return current is not None and current.may(permission)


def user() -> str:
    """The acting account's name, for the audit trail."""
    return require("read").name


def current_patient() -> str | None:
    return st.session_state.get(PATIENT_KEY)


def choose_patient(code: str | None) -> None:
    st.session_state[PATIENT_KEY] = code


def guarded(render: Callable[[], T]) -> T | None:
    """Run a page: a refused action shows its message; anything else shows a generic message only."""
    try:
        return render()
    except TrackerError as error:
        st.error(str(error))
    except Exception as error:  # a bug: no details on screen or in the log (they may name a patient)
        log.error("dashboard page failed: %s", type(error).__name__)
        st.error(
            f"Something went wrong ({type(error).__name__}); nothing was saved by this step. Please report "
            "it with the time it happened."
        )
    return None
