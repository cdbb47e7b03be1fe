"""Accounts and roles, tried the way a hostile user would, on both backends (issue: sign-in and roles that
cannot be self-granted). Each test names the way around a permission that it tries.

On SQLite the acting login is the operating-system account, on PostgreSQL the database login; see
``access_support.login`` for how a test acts as someone else. Every name and password here is invented.
"""

from __future__ import annotations

import os
import subprocess
import sys

import pytest
from sqlalchemy import select

from access_support import PASSWORD, again, login, typed
from conftest import DEMO, fingerprint, run_cli
from tracker.db.models import AuditEvent, User

OTHER_PASSWORD = "another invented pass 2"


def _audit(sessions, **where):
    with sessions() as session:
        query = select(AuditEvent).order_by(AuditEvent.id)
        for key, value in where.items():
            query = query.where(getattr(AuditEvent, key) == value)
        return session.scalars(query).all()


def _init_admin(monkeypatch, capsys, url):
    typed(monkeypatch, PASSWORD, PASSWORD)
    code, out, err = run_cli(capsys, "--db", url, "users", "init")
    assert code == 0, err
    return out


def _add(monkeypatch, capsys, url, name, role, admin_password=PASSWORD):
    typed(monkeypatch, admin_password, PASSWORD, PASSWORD)
    return run_cli(capsys, "--db", url, "users", "add", name, "--role", role)


@pytest.fixture
def admin(monkeypatch, db_url, capsys):
    """A database whose first administrator is the login ``admin-invented``; yields (url, admin login)."""
    with login(monkeypatch, db_url, "admin-invented") as (url, name):
        _init_admin(monkeypatch, capsys, url)
        yield url, name


def test_users_init_only_once_only_on_an_empty_table_and_only_for_ones_own_login(
    monkeypatch, db_url, sessions, capsys
):
    with login(monkeypatch, db_url, "first-invented") as (url, name):
        typed(monkeypatch, PASSWORD, PASSWORD)
        code, _, err = run_cli(capsys, "--db", url, "users", "init", "somebody-else")
        assert code == 1 and f"act as the login {name!r}" in err
        out = _init_admin(monkeypatch, capsys, url)
        assert f"User {name}: role admin" in out
        typed(monkeypatch, PASSWORD, PASSWORD)
        code, _, err = run_cli(capsys, "--db", url, "users", "init")
        assert code == 1 and "not empty" in err
    with sessions() as session:
        [user] = session.scalars(select(User)).all()
    # OWASP Password Storage Cheat Sheet (2023): argon2id, m = 19 MiB, t = 2, p = 1.
    assert user.password_hash.startswith("$argon2id$v=19$m=19456,t=2,p=1$")
    assert PASSWORD not in user.password_hash


def test_mallory_cannot_grant_herself_admin_by_naming_another_user(monkeypatch, admin, sessions, capsys):
    url, _ = admin
    before = fingerprint_of(url)
    with login(monkeypatch, url, "mallory-invented") as (mallory_url, _):
        code, _, err = run_cli(
            capsys,
            "--db",
            mallory_url,
            "--user",
            "admin-invented",
            "users",
            "add",
            "mallory-invented",
            "--role",
            "admin",
        )
        assert code == 1 and "cannot choose who acts" in err
        monkeypatch.setenv("NCS_TRACKER_USER", "admin-invented")
        code, _, err = run_cli(capsys, "--db", mallory_url, "users", "list")
        assert code == 1 and "cannot choose who acts" in err
        monkeypatch.delenv("NCS_TRACKER_USER")
        # Her own login, with no account: refused before any password is asked.
        typed(monkeypatch, PASSWORD)
        code, _, err = run_cli(
            capsys, "--db", mallory_url, "users", "add", "mallory-invented", "--role", "admin"
        )
        assert code == 1 and "may not manage accounts" in err and "no active account" in err
    assert fingerprint_of(url) == before


def test_a_viewer_cannot_import_export_identified_change_roles_or_limits(
    monkeypatch, admin, capsys, tmp_path
):
    url, admin_name = admin
    with login(monkeypatch, url, "viewer-invented") as (viewer_url, viewer):
        with again(monkeypatch, url, admin_name) as admin_url:
            code, _, err = _add(monkeypatch, capsys, admin_url, viewer, "viewer")
            assert code == 0, err
        before = fingerprint_of(url)
        code, _, err = run_cli(capsys, "--db", viewer_url, "import", str(DEMO / "measurements.csv"))
        assert code == 1 and "may not enter, import or annotate studies" in err
        typed(monkeypatch, PASSWORD)
        code, _, err = run_cli(
            capsys, "--db", viewer_url, "export", "--identified", "--out", f"{tmp_path}/out/"
        )
        assert code == 1 and "coordinator or admin" in err
        typed(monkeypatch, PASSWORD)
        code, _, err = run_cli(capsys, "--db", viewer_url, "users", "add", viewer, "--role", "admin")
        assert code == 1 and "may not manage accounts" in err
        typed(monkeypatch, PASSWORD)
        code, _, err = run_cli(capsys, "--db", viewer_url, "limits", "default", "default")
        assert code == 1 and "normal-limit" in err
        # Reading stays open to an account holder.
        code, _, err = run_cli(capsys, "--db", viewer_url, "import", "--dry-run", str(DEMO / "scores.csv"))
        assert code == 1 or code == 0  # an unknown patient is a file problem, not a permission problem
        assert "may not" not in err
        assert fingerprint_of(url) == before
        assert not (tmp_path / "out").exists()


def test_nobody_changes_their_own_role_or_deactivates_the_last_admin(monkeypatch, admin, sessions, capsys):
    url, name = admin
    typed(monkeypatch, PASSWORD)
    code, _, err = run_cli(capsys, "--db", url, "users", "add", name, "--role", "viewer")
    assert code == 1 and "Nobody changes their own role" in err
    typed(monkeypatch, PASSWORD)
    code, _, err = run_cli(capsys, "--db", url, "users", "deactivate", name)
    assert code == 1 and "own account" in err
    with sessions() as session:
        assert session.scalar(select(User.role).where(User.username == name)) == "admin"


def test_a_deactivated_admin_cannot_regrant_herself(monkeypatch, admin, sessions, capsys):
    url, first = admin
    with login(monkeypatch, url, "second-admin-invented") as (second_url, second):
        with again(monkeypatch, url, first) as first_url:
            code, _, err = _add(monkeypatch, capsys, first_url, second, "admin")
        assert code == 0, err
        # The second admin withdraws the first; the first, now inactive, tries to take her role back.
        typed(monkeypatch, PASSWORD)
        code, _, err = run_cli(capsys, "--db", second_url, "users", "deactivate", first)
        assert code == 0, err
    typed(monkeypatch, PASSWORD)
    code, _, err = run_cli(capsys, "--db", url, "users", "add", first, "--role", "admin")
    assert code == 1 and "no active account" in err
    with sessions() as session:
        assert session.scalar(select(User.active).where(User.username == first)) is False


def test_a_wrong_password_is_refused_counted_audited_and_locks_after_five(
    monkeypatch, admin, sessions, capsys
):
    url, name = admin
    for attempt in range(5):
        typed(monkeypatch, f"wrong guess {attempt}")
        code, _, err = run_cli(capsys, "--db", url, "users", "list")
        assert code == 1 and "Sign-in refused" in err
    # Locked now: even the right password is refused (common practice, no source; see accounts.py).
    typed(monkeypatch, PASSWORD)
    code, _, err = run_cli(capsys, "--db", url, "users", "list")
    assert code == 1 and "too many failed attempts" in err
    refusals = _audit(sessions, action="sign_in_refused")
    assert len(refusals) == 6 and all(e.username == name for e in refusals)
    assert not any("wrong guess" in str(e.before) + str(e.after) + str(e.detail) for e in _audit(sessions))


def test_a_coordinator_with_her_password_receives_an_identified_export_and_it_is_audited(
    monkeypatch, admin, sessions, capsys, tmp_path
):
    url, _ = admin
    code, _, err = run_cli(capsys, "--db", url, "import", str(DEMO / "measurements.csv"))
    assert code == 0, err
    with login(monkeypatch, url, "coordinator-invented") as (coordinator_url, coordinator):
        with again(monkeypatch, url, admin[1]) as admin_url:
            assert _add(monkeypatch, capsys, admin_url, coordinator, "coordinator")[0] == 0
        typed(monkeypatch, "not her password")
        code, _, err = run_cli(
            capsys, "--db", coordinator_url, "export", "--identified", "--out", f"{tmp_path}/a/"
        )
        assert code == 1 and "Sign-in refused" in err and not (tmp_path / "a").exists()
        typed(monkeypatch, PASSWORD)
        code, out, err = run_cli(
            capsys,
            "--db",
            coordinator_url,
            "export",
            "--identified",
            "--patients",
            "DEMO-03",
            "--criteria",
            "aan-1991-cidp",
            "--out",
            str(tmp_path / "cohort.csv"),
        )
        assert code == 0, err
        assert "IDENTIFIED" in out and "DEMO-03" in (tmp_path / "cohort.csv").read_text(encoding="utf-8")
        # A de-identified export needs no password, only the role.
        code, _, err = run_cli(capsys, "--db", coordinator_url, "export", "--out", f"{tmp_path}/b/")
        assert code == 0, err
    assert [(e.action, e.username) for e in _audit(sessions, entity="export")] == [
        ("export_identified", coordinator),
        ("export", coordinator),
    ]


def test_single_user_mode_imports_but_never_exports_identified(db_url, capsys, tmp_path):
    code, _, err = run_cli(capsys, "--db", db_url, "import", str(DEMO / "measurements.csv"))
    assert code == 0, err
    code, _, err = run_cli(capsys, "--db", db_url, "export", "--identified", "--out", f"{tmp_path}/x/")
    assert code == 1 and "users init" in err
    assert not (tmp_path / "x").exists()


def test_environment_variables_do_not_change_the_login_on_sqlite(tmp_path, capsys, monkeypatch):
    """LOGNAME and USER are what getpass reads first; anyone can set them, so they must not name the actor."""
    from tracker.db import migrate
    from tracker.db.session import make_engine, make_session_factory
    from tracker.services.access import accounts

    url = f"sqlite:///{tmp_path / 'env.sqlite3'}"
    migrate.upgrade(url)
    engine = make_engine(url)
    with make_session_factory(engine).begin() as session:
        accounts.init_first_admin(session, "boss-invented", PASSWORD, identity="boss-invented")
    engine.dispose()
    real = accounts.os_login()
    env = {**os.environ, "LOGNAME": "boss-invented", "USER": "boss-invented", "USERNAME": "boss-invented"}
    result = subprocess.run(
        [sys.executable, "-m", "tracker", "--db", url, "users", "list"],
        input=PASSWORD + "\n",
        capture_output=True,
        text=True,
        env=env,
        timeout=120,
    )
    assert result.returncode == 1
    assert f"{real} may not manage accounts" in result.stderr


# Every command that needs a permission, with a harmless argument list, and who may run it. The refusal
# must come before anything is written; the allowed role must get past the permission check.
COMMANDS = [
    ("write_clinical", ["import", str(DEMO / "scores.csv")], ("clinician", "admin")),
    (
        "write_clinical",
        ["annotate", "DEMO-01", "--visit", "2023-02-14", "--phenotype", "distal"],
        ("clinician", "admin"),
    ),
    ("write_clinical", ["evaluate"], ("clinician", "admin")),
    ("read_audit", ["audit"], ("clinician", "admin")),
    ("read_audit", ["audit", "verify"], ("clinician", "admin")),
    ("limits", ["limits", "default", "default"], ("admin",)),
    ("manage_users", ["users", "list"], ("admin",)),
    ("manage_users", ["users", "deactivate", "someone-invented"], ("admin",)),
    ("export", ["export", "--out", "{tmp}/deidentified/"], ("clinician", "coordinator", "admin")),
    ("export_identified", ["export", "--identified", "--out", "{tmp}/identified/"], ("coordinator", "admin")),
]


@pytest.fixture(scope="module")
def staffed(tmp_path_factory):
    """One SQLite database for the whole matrix (the permission rules do not depend on the backend; who the
    login is does, and the tests above check that on both): demo measurements and a first admin."""
    from tracker.db import migrate
    from tracker.db.session import make_engine, make_session_factory
    from tracker.services.access import accounts
    from tracker.services.importing import import_file

    url = f"sqlite:///{tmp_path_factory.mktemp('matrix') / 'ncs.sqlite3'}"
    migrate.upgrade(url)
    engine = make_engine(url)
    with make_session_factory(engine).begin() as session:
        import_file(session, DEMO / "measurements.csv", username="boss-invented")
        accounts.init_first_admin(session, "boss-invented", PASSWORD, identity="boss-invented")
    engine.dispose()
    _grant(url, "boss-invented", "someone-invented", "viewer")
    return url, "boss-invented"


def _grant(url: str, boss: str, name: str, role: str) -> None:
    from tracker.db.session import make_engine, make_session_factory
    from tracker.services.access import accounts
    from tracker.services.access.permissions import Actor

    engine = make_engine(url)
    with make_session_factory(engine).begin() as session:
        accounts.set_user(
            session,
            name,
            role=role,
            acting=Actor(boss, "admin", "os-login", authenticated=True),
            password=PASSWORD,
        )
    engine.dispose()


@pytest.mark.parametrize(
    ("permission", "args", "allowed"), COMMANDS, ids=[" ".join(c[1][:2]) for c in COMMANDS]
)
@pytest.mark.parametrize("role", ["viewer", "clinician", "coordinator", "admin"])
def test_every_permission_holds_for_every_role(
    monkeypatch, staffed, capsys, tmp_path, role, permission, args, allowed
):
    url, boss = staffed
    out = tmp_path / "exports"
    args = [a.replace("{tmp}", str(out)) for a in args]
    acting = again(monkeypatch, url, boss) if role == "admin" else login(monkeypatch, url, f"{role}-invented")
    with acting as entered:
        role_url, name = (entered, boss) if role == "admin" else entered
        if role != "admin":
            _grant(url, boss, name, role)  # the same role each time: unchanged after the first
        before = fingerprint_of(url)
        typed(monkeypatch, PASSWORD)
        code, _, err = run_cli(capsys, "--db", role_url, *args)
    if role in allowed:
        assert "may not" not in err and "Sign-in refused" not in err, err
    else:
        assert code == 1 and f"{name} may not" in err, err
        assert fingerprint_of(url) == before
        assert not out.exists()


def fingerprint_of(url: str) -> str:
    from tracker.db.session import make_engine

    engine = make_engine(url)
    try:
        return fingerprint(engine)
    finally:
        engine.dispose()
