"""What every page shares: the database (one cached engine per URL, a new session per action), the acting
user, the current patient, cached reads (cleared after every write) and a guard that keeps tracebacks —
which may hold patient data — off the screen and out of the log."""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import TypeVar

import streamlit as st
from sqlalchemy import Engine
from sqlalchemy.orm import Session

from tracker.config import acting_user, resolve_database_url
from tracker.db.migrate import require_current_schema
from tracker.db.session import make_engine, make_session_factory
from tracker.errors import TrackerError

log = logging.getLogger("ncs_tracker.dashboard")

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
def writing() -> Iterator[Session]:
    """A transaction: committed on success, rolled back on any error; cached reads are cleared after."""
    with make_session_factory(engine()).begin() as session:
        yield session
    st.cache_data.clear()


def user() -> str:
    return acting_user(None)


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
        st.error(f"Something went wrong ({type(error).__name__}); nothing was saved by this step. Please report it with the time it happened.")
    return None
