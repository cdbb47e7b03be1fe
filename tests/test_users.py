"""Users and roles from the command line, on both backends: the way to grant an identified export."""

from __future__ import annotations

from sqlalchemy import select

from conftest import run_cli
from tracker.db.models import AuditEvent


def test_grant_change_and_withdraw_a_role(db_url, sessions, capsys):
    code, out, _ = run_cli(capsys, "--db", db_url, "--user", "admin-invented", "users", "list")
    assert code == 0 and "No users registered" in out
    code, out, _ = run_cli(capsys, "--db", db_url, "--user", "admin-invented", "users", "add", "coord-invented", "--role", "viewer")
    assert code == 0 and "role viewer (added)" in out
    code, out, _ = run_cli(capsys, "--db", db_url, "--user", "admin-invented", "users", "add", "coord-invented", "--role", "coordinator")
    assert "role coordinator (changed)" in out
    code, out, _ = run_cli(capsys, "--db", db_url, "--user", "admin-invented", "users", "add", "coord-invented", "--role", "coordinator")
    assert "(unchanged)" in out
    code, out, _ = run_cli(capsys, "--db", db_url, "users", "list")
    assert "coord-invented" in out and "coordinator" in out and "active" in out
    code, out, _ = run_cli(capsys, "--db", db_url, "--user", "admin-invented", "users", "deactivate", "coord-invented")
    assert code == 0 and "inactive" in out
    with sessions() as session:
        events = session.execute(select(AuditEvent.action, AuditEvent.username, AuditEvent.entity_key).where(AuditEvent.entity == "user").order_by(AuditEvent.id)).all()
    assert [tuple(e) for e in events] == [
        ("add", "admin-invented", "coord-invented"),
        ("change", "admin-invented", "coord-invented"),
        ("deactivate", "admin-invented", "coord-invented"),
    ]


def test_bad_role_and_unknown_user_are_refused(db_url, capsys):
    code, _, err = run_cli(capsys, "--db", db_url, "users", "add", "someone", "--role", "superuser")
    assert code == 2 and "superuser" in err
    code, _, err = run_cli(capsys, "--db", db_url, "users", "deactivate", "nobody-invented")
    assert code == 1 and "No user 'nobody-invented'" in err and "Traceback" not in err


def test_a_granted_coordinator_may_export_identified(db_url, tmp_path, capsys):
    from dashboard_support import fill_demo

    fill_demo(db_url)
    out_dir = tmp_path / "out"
    code, _, err = run_cli(capsys, "--db", db_url, "--user", "coord-invented", "export", "--identified", "--out", f"{out_dir}/")
    assert code == 1 and "ncs-tracker users add coord-invented --role coordinator" in err
    assert not out_dir.exists() or not any(out_dir.iterdir())
    run_cli(capsys, "--db", db_url, "--user", "admin-invented", "users", "add", "coord-invented", "--role", "coordinator")
    code, out, err = run_cli(capsys, "--db", db_url, "--user", "coord-invented", "export", "--identified", "--out", f"{out_dir}/")
    assert code == 0, err
    assert any(p.suffix == ".csv" for p in out_dir.iterdir())
