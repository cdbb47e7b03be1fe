"""Dashboard sign-in, tried the way a hostile visitor would, on both backends, through Streamlit's testing
API (AppTest) with ``NCS_TRACKER_SIGN_IN=required`` (what ``serve --sign-in`` sets).

Each test names the way around sign-in or a role that it tries: looking at pages before signing in, guessing
passwords, finding which of name or password was wrong, reading a password back from the page, the audit or
the logs, opening a page or a write the role does not allow, a coordinator reading clinic codes, an idle or
withdrawn session. Every account, name and password here is invented; the patients are the invented demo
clinic.
"""

from __future__ import annotations

import logging
import time
from pathlib import Path
from types import SimpleNamespace

import pytest
import streamlit as st
from sqlalchemy import select, text
from streamlit.testing.v1 import AppTest

from conftest import BACKENDS, fingerprint, new_database
from dashboard_support import fill_demo
from tracker.db.models import AuditEvent, Base, User
from tracker.db.session import make_engine, make_session_factory
from tracker.services import preferences
from tracker.services.access import accounts
from tracker.services.access.permissions import Actor

APP = Path(__file__).resolve().parent.parent / "tracker" / "dashboard" / "app.py"
VIEWS = APP.parent / "views"
PASSWORD = "invented sign-in pass 1"  # test accounts only
WRONG = "invented wrong guess 9"  # never anyone's password
ROLES = {
    "viewer-invented": "viewer",
    "clinician-invented": "clinician",
    "coordinator-invented": "coordinator",
    "admin-invented": "admin",
    "second-admin-invented": "admin",
}
CLINIC_PAGES = ["Patients", "Follow-up", "Visit review"]


def _add_accounts(url: str, roles: dict[str, str]) -> None:
    engine = make_engine(url)
    try:
        with make_session_factory(engine).begin() as session:
            for name, role in roles.items():
                session.add(
                    User(
                        username=name,
                        role=role,
                        active=True,
                        failed_sign_ins=0,
                        password_hash=accounts.hash_password(PASSWORD),
                    )
                )
    finally:
        engine.dispose()


@pytest.fixture(scope="module", params=BACKENDS)
def clinic(request, tmp_path_factory):
    """The invented demo clinic with one account per role (password ``PASSWORD``); yields its URL."""
    generator = new_database(request.param, tmp_path_factory.mktemp("sign_in"))
    url = next(generator)
    fill_demo(url)
    _add_accounts(url, ROLES)
    yield url
    next(generator, None)


@pytest.fixture
def url(clinic, monkeypatch):
    """The clinic's URL, with the dashboard told to ask for sign-in (as ``serve --sign-in`` does)."""
    monkeypatch.setenv("NCS_TRACKER_DB", clinic)
    monkeypatch.setenv("NCS_TRACKER_SIGN_IN", "required")
    return clinic


@pytest.fixture(autouse=True)
def clean_streamlit():
    st.cache_data.clear()
    st.cache_resource.clear()
    yield
    st.cache_data.clear()
    st.cache_resource.clear()


# --- helpers ---------------------------------------------------------------------------------------------


def start(script: Path = APP) -> AppTest:
    at = AppTest.from_file(str(script), default_timeout=120)
    at.run()
    return at


def sign_in(at: AppTest, name: str, password: str) -> AppTest:
    at.text_input(key="sign_in_user").input(name)
    at.text_input(key="sign_in_password").input(password)
    next(b for b in at.button if b.label == "Sign in").click()
    return at.run()


def signed_in(name: str) -> AppTest:
    at = sign_in(start(), name, PASSWORD)
    assert not at.exception, [e.message for e in at.exception]
    assert not at.error, [e.value for e in at.error]
    return at


def rendered(at: AppTest) -> str:
    """Everything the browser would receive for this run: every element's message, tables included."""
    parts: list[str] = []

    def walk(node) -> None:
        proto = getattr(node, "proto", None)
        if proto is not None:
            parts.append(str(proto))
        for child in getattr(node, "children", {}).values():
            walk(child)

    walk(at._tree)
    parts += [frame.value.to_csv() for frame in at.dataframe]
    return "\n".join(parts)


def page_titles(at: AppTest) -> list[str]:
    """The pages the navigation offers this session (none when st.navigation was not called)."""
    return [info["page_name"] for info in at._registered_pages.values() if "url_pathname" in info]


def shows_sign_in_form(at: AppTest) -> bool:
    keys = {t.key for t in at.text_input}
    return {"sign_in_user", "sign_in_password"} <= keys


def caution_shown(at: AppTest) -> bool:
    return any("must be reviewed by a qualified clinician" in m.value for m in at.markdown)


def everything_stored(url: str) -> str:
    """Every row of every table as text: what anyone with the database file (or a backup) could read."""
    engine = make_engine(url)
    try:
        with engine.connect() as connection:
            return "\n".join(
                repr(tuple(row))
                for table in Base.metadata.sorted_tables
                for row in connection.execute(select(table))
            )
    finally:
        engine.dispose()


def audit_rows(url: str, **where) -> list[AuditEvent]:
    engine = make_engine(url)
    try:
        with make_session_factory(engine)() as session:
            query = select(AuditEvent).order_by(AuditEvent.id)
            for key, value in where.items():
                query = query.where(getattr(AuditEvent, key) == value)
            return session.scalars(query).all()
    finally:
        engine.dispose()


def database_fingerprint(url: str) -> str:
    engine = make_engine(url)
    try:
        return fingerprint(engine)
    finally:
        engine.dispose()


def with_account(url: str, name: str, role: str, **values) -> None:
    """A fresh account of this test's own (so tests that lock or withdraw accounts do not touch others)."""
    _add_accounts(url, {name: role})
    if values:
        engine = make_engine(url)
        try:
            with make_session_factory(engine).begin() as session:
                user = session.scalar(select(User).where(User.username == name))
                for key, value in values.items():
                    setattr(user, key, value)
        finally:
            engine.dispose()


def as_admin(url: str, change) -> None:
    """Run ``change(session, admin)`` as an authenticated administrator (what the users commands do)."""
    engine = make_engine(url)
    try:
        with make_session_factory(engine).begin() as session:
            change(session, Actor("admin-invented", "admin", "sign-in", authenticated=True))
    finally:
        engine.dispose()


class Clock:
    """Replaces the dashboard's monotonic clock: real time plus a shift the test moves forward (seconds)."""

    def __init__(self) -> None:
        self.shift = 0.0

    def monotonic(self) -> float:
        return time.monotonic() + self.shift


# --- before signing in -----------------------------------------------------------------------------------


def test_nobody_signed_in_sees_only_the_form_and_the_caution(url):
    at = start()
    assert not at.exception, [e.message for e in at.exception]
    assert shows_sign_in_form(at) and caution_shown(at)
    assert page_titles(at) == []  # no navigation at all: no page can be routed to
    assert not at.dataframe and "DEMO-" not in rendered(at)
    assert [t.value for t in at.title] == ["ncs-tracker"]

    # Way around: a deep link with a patient in the address, or a page chosen before signing in.
    at = AppTest.from_file(str(APP), default_timeout=120)
    at.query_params["patient"] = "DEMO-04"
    at.run()
    at.switch_page("views/follow_up.py").run()
    assert shows_sign_in_form(at) and not at.dataframe and "DEMO-" not in rendered(at)
    assert not at.get("plotly_chart")


def test_a_page_file_run_without_signing_in_refuses_before_showing_a_code(url):
    # Way around: a page's own script reached without the app's navigation (as if routing were bypassed).
    for page in ("patients.py", "follow_up.py", "visit_review.py", "cohort.py", "audit.py"):
        at = start(VIEWS / page)
        assert "Please sign in" in " ".join(e.message for e in at.exception), page
        assert not at.dataframe and "DEMO-" not in rendered(at), page


# --- guessing and leaking passwords ----------------------------------------------------------------------


def test_wrong_password_is_refused_without_saying_which_and_never_echoed(url, caplog, capfd):
    caplog.set_level(logging.DEBUG)
    refusals = []
    # A real name with a wrong password, a name that does not exist, and the password typed as the name.
    for name, password in (("viewer-invented", WRONG), ("nobody-invented", WRONG), (WRONG, WRONG)):
        at = sign_in(start(), name, password)
        assert not at.exception, [e.message for e in at.exception]
        [error] = at.error
        refusals.append(error.value)
        assert shows_sign_in_form(at) and page_titles(at) == []
        assert "DEMO-" not in rendered(at)
        assert WRONG not in rendered(at)
        assert "sign_in_password" not in at.session_state  # not even kept in the server's memory
        assert all(WRONG not in repr(at.session_state[key]) for key in at.session_state)
    # The same words whether the name or the password was wrong.
    assert len(set(refusals)) == 1 and "user name or the password" in refusals[0]

    assert WRONG not in everything_stored(url)  # audit trail included
    refused = audit_rows(url, action="sign_in_refused")
    assert {e.username for e in refused} >= {"viewer-invented", "(unknown)"}
    captured = capfd.readouterr()
    assert WRONG not in caplog.text and WRONG not in captured.out and WRONG not in captured.err


def test_the_right_password_is_not_kept_shown_stored_or_logged(url, caplog, capfd):
    caplog.set_level(logging.DEBUG)
    at = signed_in("viewer-invented")
    assert page_titles(at)  # signed in
    assert PASSWORD not in rendered(at)
    assert all(PASSWORD not in repr(at.session_state[key]) for key in at.session_state)
    assert PASSWORD not in everything_stored(url)
    captured = capfd.readouterr()
    assert PASSWORD not in caplog.text and PASSWORD not in captured.out and PASSWORD not in captured.err


def test_five_failures_lock_the_account_even_for_the_right_password(url):
    with_account(url, "locked-invented", "viewer")
    for _ in range(accounts.MAX_FAILED_SIGN_INS):
        at = sign_in(start(), "locked-invented", WRONG)
        assert "user name or the password" in at.error[0].value
    # Way around: a fresh browser session (a new AppTest) with the right password. The count is on the server.
    at = sign_in(start(), "locked-invented", PASSWORD)
    [error] = at.error
    assert "too many failed attempts" in error.value
    assert shows_sign_in_form(at) and page_titles(at) == [] and "DEMO-" not in rendered(at)
    assert [e.detail for e in audit_rows(url, entity_key="locked-invented")][-1] == "account locked"


def test_failures_below_the_limit_do_not_lock_and_a_success_starts_the_count_again(url):
    with_account(url, "careless-invented", "viewer")
    for _ in range(2):
        for _ in range(accounts.MAX_FAILED_SIGN_INS - 1):
            sign_in(start(), "careless-invented", WRONG)
        at = sign_in(start(), "careless-invented", PASSWORD)
        assert not at.error and page_titles(at), [e.value for e in at.error]


def test_an_account_without_a_password_or_an_inactive_one_cannot_sign_in(url):
    with_account(url, "nopass-invented", "admin", password_hash=None)
    with_account(url, "gone-invented", "admin", active=False)
    messages = set()
    for name in ("nopass-invented", "gone-invented"):
        at = sign_in(start(), name, PASSWORD)
        messages.add(at.error[0].value)
        assert shows_sign_in_form(at) and page_titles(at) == []
    assert messages == {"Sign-in refused: the user name or the password is not right."}


# --- pages and writes by role ----------------------------------------------------------------------------


def test_viewer_reads_the_clinic_pages_and_nothing_else(url):
    at = signed_in("viewer-invented")
    assert page_titles(at) == [*CLINIC_PAGES, "Cohort", "Settings"]
    assert [t.value for t in at.title] == ["Patients"]
    assert "DEMO-01" in set(at.dataframe[0].value["patient"])
    assert "signed in as viewer-invented (viewer)" in " ".join(c.value for c in at.sidebar.caption)
    # Way around: switching to a page the navigation does not offer.
    for page in ("views/visit_entry.py", "views/audit.py"):
        with pytest.raises(ValueError, match="Could not find a navigation page"):
            at.switch_page(page)


def test_viewer_write_is_refused_on_the_server_even_from_the_page_itself(url):
    signed_in("viewer-invented")  # a real sign-in first (audited), as the session below would have had
    before = database_fingerprint(url)
    # Way around: the New study page's own script, run with a viewer's signed-in session, saving a study.
    at = AppTest.from_file(str(VIEWS / "visit_entry.py"), default_timeout=120)
    now = time.monotonic()
    at.session_state["ncs_account"] = {"name": "viewer-invented", "signed_in": now, "last_seen": now}
    at.run()
    assert not at.exception, [e.message for e in at.exception]
    for label in ("Check only (nothing saved)", "Check and save"):
        next(b for b in at.button if b.label == label).click()
        at.run()
        messages = " ".join(e.message for e in at.exception)
        assert "viewer-invented may not enter, import or annotate studies" in messages, label
    assert database_fingerprint(url) == before


def test_viewer_and_coordinator_cannot_change_settings(url):
    for name in ("viewer-invented", "coordinator-invented"):
        at = signed_in(name)
        at.switch_page("views/settings.py").run()
        before = database_fingerprint(url)
        at.button(key="settings_make_default").click().run()
        assert "may not" in " ".join(e.value for e in at.error), name
        assert database_fingerprint(url) == before, name


def test_clinician_cannot_choose_the_default_limits_on_the_dashboard(url):
    at = signed_in("clinician-invented")
    at.switch_page("views/settings.py").run()
    before = database_fingerprint(url)
    at.button(key="settings_make_default").click().run()
    assert "may not" in " ".join(e.value for e in at.error)
    assert database_fingerprint(url) == before


def test_clinician_gets_new_study_and_the_audit_trail(url):
    at = signed_in("clinician-invented")
    assert page_titles(at) == [*CLINIC_PAGES, "New study", "Cohort", "Settings", "Audit trail"]
    at.switch_page("views/visit_entry.py").run()
    assert not at.exception and [t.value for t in at.title] == ["New study"]


def test_coordinator_sees_export_ids_never_clinic_codes(url):
    at = signed_in("coordinator-invented")
    assert page_titles(at) == ["Cohort", "Settings"]
    assert [t.value for t in at.title] == ["Cohort"]
    assert not at.exception, [e.message for e in at.exception]
    assert "DEMO-" not in rendered(at)
    engine = make_engine(url)
    try:
        with make_session_factory(engine)() as session:
            secret = bytes.fromhex(preferences.get(session, preferences.EXPORT_SECRET_KEY))
            codes = session.scalars(text("SELECT code FROM patients")).all()
    finally:
        engine.dispose()
    from tracker.services.export.deidentify import export_id

    [_, visits] = [frame.value for frame in at.dataframe]  # counts by diagnosis, then the visits
    [column] = [c for c in visits.columns if c.replace("_", " ") == "export id"]
    assert "patient" not in visits.columns
    assert set(visits[column]) == {export_id(secret, code) for code in codes}
    # Way around: a clinic page switched to, or its script run with the coordinator's session.
    with pytest.raises(ValueError, match="Could not find a navigation page"):
        at.switch_page("views/patients.py")
    page = AppTest.from_file(str(VIEWS / "patients.py"), default_timeout=120)
    now = time.monotonic()
    page.session_state["ncs_account"] = {"name": "coordinator-invented", "signed_in": now, "last_seen": now}
    page.run()
    assert "coordinator-invented may not see patient codes" in " ".join(e.message for e in page.exception)
    assert not page.dataframe and "DEMO-" not in rendered(page)


def test_admin_reads_the_audit_trail_in_words(url):
    sign_in(start(), "admin-invented", WRONG)
    at = signed_in("admin-invented")
    assert "Audit trail" in page_titles(at)
    at.switch_page("views/audit.py").run()
    assert not at.exception, [e.message for e in at.exception]
    [table] = [frame.value for frame in at.dataframe]
    mine = table[table["who"] == "admin-invented"]
    assert "signed in" in set(mine["what"].str.split(" — ").str[0])
    assert "was refused sign-in" in set(mine["what"].str.split(" — ").str[0])
    assert mine["before → after"].str.contains("wrong password").any()
    assert PASSWORD not in rendered(at) and WRONG not in rendered(at)


# --- sessions that end -----------------------------------------------------------------------------------


def test_an_idle_session_ends_and_shows_the_sign_in_form(url, monkeypatch):
    from tracker.dashboard import state

    clock = Clock()
    monkeypatch.setattr(state, "time", SimpleNamespace(monotonic=clock.monotonic))
    at = signed_in("viewer-invented")
    clock.shift += state.IDLE_MINUTES * 60 - 60  # a click just before the limit keeps the session
    at.run()
    assert [t.value for t in at.title] == ["Patients"]
    clock.shift += state.IDLE_MINUTES * 60 - 60
    at.run()
    assert [t.value for t in at.title] == ["Patients"]
    clock.shift += state.IDLE_MINUTES * 60 + 1
    at.run()
    assert shows_sign_in_form(at) and page_titles(at) == []
    assert "DEMO-" not in rendered(at) and not at.dataframe
    assert f"after {state.IDLE_MINUTES} minutes without activity" in " ".join(i.value for i in at.info)


def test_a_busy_session_still_ends_after_the_longest_session(url, monkeypatch):
    from tracker.dashboard import state

    clock = Clock()
    monkeypatch.setattr(state, "time", SimpleNamespace(monotonic=clock.monotonic))
    monkeypatch.setattr(state, "MAX_SESSION_HOURS", 1)  # a shorter day, so that a few clicks cross it
    at = signed_in("viewer-invented")
    step = state.IDLE_MINUTES * 60 - 60
    clicks = 0
    while clock.shift + step < state.MAX_SESSION_HOURS * 3600:  # a click every few minutes…
        clock.shift += step
        at.run()
        clicks += 1
        assert [t.value for t in at.title] == ["Patients"], clock.shift
    assert clicks >= 2
    clock.shift += step  # …until the longest session is over
    at.run()
    assert shows_sign_in_form(at) and not at.dataframe and "DEMO-" not in rendered(at)
    assert f"at most {state.MAX_SESSION_HOURS} hours" in " ".join(i.value for i in at.info)


def test_a_deactivated_account_is_signed_out_at_its_next_run(url):
    with_account(url, "leaving-invented", "clinician")
    at = signed_in("leaving-invented")
    assert "New study" in page_titles(at)
    as_admin(url, lambda session, admin: accounts.deactivate_user(session, "leaving-invented", acting=admin))
    at.run()
    assert shows_sign_in_form(at) and page_titles(at) == [] and "DEMO-" not in rendered(at)
    assert "no longer active" in " ".join(i.value for i in at.info)
    # Way around: signing in again with the same, still right, password.
    sign_in(at, "leaving-invented", PASSWORD)
    assert shows_sign_in_form(at) and page_titles(at) == []


def test_a_demoted_clinician_loses_new_study_at_the_next_run(url):
    with_account(url, "demoted-invented", "clinician")
    at = signed_in("demoted-invented")
    at.switch_page("views/visit_entry.py").run()
    assert [t.value for t in at.title] == ["New study"]
    as_admin(
        url,
        lambda session, admin: accounts.set_user(session, "demoted-invented", role="viewer", acting=admin),
    )
    before = database_fingerprint(url)
    # Way around: pressing the button of the page that is still open in the browser.
    next(b for b in at.button if b.label == "Check and save").click()
    at.run()
    assert not at.exception, [e.message for e in at.exception]
    assert "New study" not in page_titles(at)
    assert [t.value for t in at.title] == ["Patients"]
    assert database_fingerprint(url) == before


def test_signing_out_forgets_the_account_and_the_patient(url):
    at = signed_in("viewer-invented")
    at.session_state["ncs_patient"] = "DEMO-01"
    at.sidebar.button(key="sign_out").click().run()
    assert shows_sign_in_form(at) and not at.dataframe and "DEMO-" not in rendered(at)
    assert "Signed out." in [i.value for i in at.info]
    assert "ncs_patient" not in at.session_state and "ncs_account" not in at.session_state


def test_a_dashboard_started_by_hand_beyond_loopback_asks_for_sign_in(clinic, monkeypatch):
    # Way around: ``streamlit run app.py --server.address 0.0.0.0`` instead of ``serve`` (no exposure check,
    # no NCS_TRACKER_SIGN_IN): visitors must not act as the login that started it.
    from streamlit.testing.v1.util import patch_config_options

    monkeypatch.setenv("NCS_TRACKER_DB", clinic)
    monkeypatch.delenv("NCS_TRACKER_SIGN_IN", raising=False)
    for address, asks in (("0.0.0.0", True), ("192.168.1.20", True), ("::", True), ("127.0.0.1", False)):
        at = AppTest.from_file(str(APP), default_timeout=120)
        with patch_config_options({"server.address": address}):
            at.run()
        assert shows_sign_in_form(at) is asks, address
        assert ("DEMO-" in rendered(at)) is not asks, address


# --- serve: where it may listen --------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("host", "loopback"),
    [
        ("127.0.0.1", True),
        ("::1", True),
        ("localhost", True),
        ("127.0.0.2", True),
        ("0.0.0.0", False),
        ("::", False),
        ("", False),
        ("192.168.1.20", False),
        ("10.0.0.5", False),
        ("fe80::1", False),
        ("my-workstation.example", False),
        (" 127.0.0.1", False),
        ("[::1]", False),
    ],
)
def test_check_exposure_lets_only_loopback_serve_without_sign_in(host, loopback):
    from tracker.errors import TrackerError
    from tracker.serving import check_exposure

    check_exposure(host, sign_in=True)  # with sign-in any address may serve
    if loopback:
        check_exposure(host, sign_in=False)
    else:
        with pytest.raises(TrackerError, match="Refusing to serve on .* without sign-in"):
            check_exposure(host, sign_in=False)


class _Started:
    """Stands in for the Streamlit child: records how it would have been started, then 'stops' at once."""

    def __init__(self) -> None:
        self.calls: list[tuple[list[str], dict[str, str]]] = []

    def Popen(self, command, env, **_):  # noqa: N802 (the name serving calls)
        self.calls.append((command, env))
        return SimpleNamespace(wait=lambda *a: 0, poll=lambda: 0, terminate=lambda: None, kill=lambda: None)


@pytest.fixture
def started(monkeypatch):
    import subprocess

    from tracker import serving

    recorder = _Started()
    monkeypatch.setattr(
        serving,
        "subprocess",
        SimpleNamespace(
            Popen=recorder.Popen, DEVNULL=subprocess.DEVNULL, TimeoutExpired=subprocess.TimeoutExpired
        ),
    )
    return recorder


def test_serve_beyond_loopback_without_sign_in_exits_1_and_starts_nothing(
    db_url, started, capsys, monkeypatch
):
    from conftest import run_cli

    monkeypatch.delenv("NCS_TRACKER_SIGN_IN", raising=False)
    for host in ("0.0.0.0", "::", "", "192.168.1.20"):
        code, out, err = run_cli(capsys, "--db", db_url, "serve", "--host", host)
        assert code == 1, (host, out, err)
        assert f"Refusing to serve on {host} without sign-in" in err and "--sign-in" in err
        assert "Dashboard:" not in out
    # Way around: the variable the dashboard reads, set by hand instead of --sign-in.
    monkeypatch.setenv("NCS_TRACKER_SIGN_IN", "required")
    code, _, err = run_cli(capsys, "--db", db_url, "serve", "--host", "0.0.0.0")
    assert code == 1 and "Refusing to serve" in err
    assert started.calls == []


def test_serve_with_sign_in_needs_an_active_account_with_a_password(db_url, started, capsys):
    from conftest import run_cli

    def serve() -> tuple[int, str, str]:
        return run_cli(capsys, "--db", db_url, "serve", "--host", "0.0.0.0", "--sign-in", "--port", "18650")

    code, _, err = serve()  # no accounts at all
    assert code == 1 and "needs at least one active account with a password" in err
    with_account(db_url, "nopass-invented", "admin", password_hash=None)
    with_account(db_url, "gone-invented", "admin", active=False)
    code, _, err = serve()
    assert code == 1 and "needs at least one active account with a password" in err
    assert started.calls == []

    with_account(db_url, "viewer-invented", "viewer")
    code, out, err = serve()
    assert code == 0, err
    [(command, environment)] = started.calls
    assert command[command.index("--server.address") + 1] == "0.0.0.0"
    assert command[command.index("--browser.gatherUsageStats") + 1] == "false"
    assert environment["NCS_TRACKER_SIGN_IN"] == "required"
    assert environment["STREAMLIT_BROWSER_GATHER_USAGE_STATS"] == "false"
    assert "Dashboard: http://0.0.0.0:" in out


def test_serve_on_loopback_without_sign_in_does_not_pass_a_stray_sign_in_setting(
    db_url, started, capsys, monkeypatch
):
    from conftest import run_cli

    monkeypatch.setenv("NCS_TRACKER_SIGN_IN", "no")
    code, _, err = run_cli(capsys, "--db", db_url, "serve", "--port", "18660")
    assert code == 0, err
    [(command, environment)] = started.calls
    assert command[command.index("--server.address") + 1] == "127.0.0.1"
    assert "NCS_TRACKER_SIGN_IN" not in environment
    assert command[command.index("--browser.gatherUsageStats") + 1] == "false"


def test_serve_on_ipv6_loopback_needs_no_sign_in_and_announces_a_usable_address(db_url, started, capsys):
    # ::1 is loopback (check_exposure lets it serve alone); the free-port probe must use IPv6 for it.
    from conftest import run_cli

    code, out, err = run_cli(capsys, "--db", db_url, "serve", "--host", "::1", "--port", "18670")
    assert code == 0, err
    [(command, environment)] = started.calls
    assert (
        command[command.index("--server.address") + 1] == "::1" and "NCS_TRACKER_SIGN_IN" not in environment
    )
    assert "Dashboard: http://[::1]:" in out


def test_no_outside_lookups_answers_without_any_network(monkeypatch):
    import socket

    import requests
    from streamlit import net_util
    from streamlit.web.server import server_util

    from tracker.dashboard.launch import no_outside_lookups

    for name in ("get_external_ip", "get_internal_ip", "_external_ip", "_internal_ip"):
        monkeypatch.setattr(net_util, name, getattr(net_util, name))  # restored after the test
    monkeypatch.setattr(net_util, "_external_ip", None)
    monkeypatch.setattr(net_util, "_internal_ip", None)
    reached: list[str] = []

    class NoSocket:
        def __init__(self, *args, **kwargs) -> None:
            reached.append("socket")

        def __enter__(self):
            return self

        def __exit__(self, *exc) -> None:
            return None

        def connect(self, address) -> None:
            raise OSError("no network in this test")

    def no_request(url, *args, **kwargs):
        reached.append(url)
        raise OSError("no network in this test")

    monkeypatch.setattr(socket, "socket", NoSocket)
    monkeypatch.setattr(requests, "get", no_request)
    # Without the switch Streamlit does reach out (so this test can see it), and would again next time.
    net_util.get_internal_ip()
    net_util.get_external_ip()
    assert "socket" in reached and any(url.startswith("http") for url in reached)
    monkeypatch.setattr(net_util, "_external_ip", None)
    monkeypatch.setattr(net_util, "_internal_ip", None)
    reached.clear()

    no_outside_lookups()
    assert net_util.get_external_ip() is None and net_util.get_internal_ip() is None
    # The check Streamlit makes on every browser connection when it judges an origin.
    assert server_util.is_url_from_allowed_origins("http://visitor.example:8501") is False
    assert reached == []
