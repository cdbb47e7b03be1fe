"""The audit trail: readable in words, append-only, and a hash chain that shows tampering (both backends).

Each test is one way a hostile user could try to rewrite history, or one write the trail must not miss.
"""

from __future__ import annotations

import pytest
from sqlalchemy import text
from sqlalchemy.exc import DBAPIError

from access_support import login
from conftest import DEMO, run_cli
from tracker.db.session import is_sqlite, make_engine


@pytest.fixture
def trail(db_url, capsys):
    """A database with a few audited writes: an import, a check (saves evaluations), an annotation."""
    assert run_cli(capsys, "--db", db_url, "import", str(DEMO / "measurements.csv"))[0] == 0
    assert run_cli(capsys, "--db", db_url, "check", "DEMO-01", "--criteria", "all")[0] == 0
    code, _, err = run_cli(
        capsys, "--db", db_url, "annotate", "DEMO-01", "--visit", "2023-02-14", "--phenotype", "distal"
    )
    assert code == 0, err
    return db_url


def _verify(capsys, url):
    return run_cli(capsys, "--db", url, "audit", "verify")


def test_an_untouched_trail_verifies(trail, capsys):
    code, out, _ = _verify(capsys, trail)
    assert code == 0 and "intact" in out


@pytest.mark.parametrize(
    "statement",
    [
        "UPDATE audit_events SET username = 'someone-else' WHERE id = 1",
        "DELETE FROM audit_events WHERE id = 2",
    ],
)
def test_the_triggers_refuse_changing_or_deleting_a_row_even_for_the_owner(trail, statement):
    engine = make_engine(trail)
    with pytest.raises(DBAPIError, match="append-only"):
        with engine.begin() as connection:
            connection.execute(text(statement))
    engine.dispose()


def test_an_application_login_cannot_change_audit_rows_on_postgresql(trail, monkeypatch):
    if is_sqlite(trail):
        pytest.skip("PostgreSQL roles only")
    with login(monkeypatch, trail, "app-invented") as (url, _):
        engine = make_engine(url)
        for statement in (
            "UPDATE audit_events SET detail = 'x'",
            "DELETE FROM audit_events",
            "TRUNCATE audit_events",
        ):
            with pytest.raises(DBAPIError):
                with engine.begin() as connection:
                    connection.execute(text(statement))
        engine.dispose()


def _without_triggers(url: str, statement: str) -> None:
    """What someone with the owner's rights could do: drop the triggers, then change the rows."""
    engine = make_engine(url)
    with engine.begin() as connection:
        if is_sqlite(url):
            connection.execute(text("DROP TRIGGER audit_events_append_only_update"))
            connection.execute(text("DROP TRIGGER audit_events_append_only_delete"))
        else:
            connection.execute(text("DROP TRIGGER audit_events_append_only ON audit_events"))
        connection.execute(text(statement))
    engine.dispose()


@pytest.mark.parametrize(
    ("statement", "problem"),
    [
        ("UPDATE audit_events SET username = 'someone-else' WHERE id = 2", "content was changed"),
        ("DELETE FROM audit_events WHERE id = 2", "link to the previous row does not match"),
        ("UPDATE audit_events SET after = NULL WHERE id = 1", "content was changed"),
    ],
)
def test_verify_names_the_first_broken_link(trail, capsys, statement, problem):
    _without_triggers(trail, statement)
    code, _, err = _verify(capsys, trail)
    assert code == 1 and "altered" in err and problem in err
    broken = 3 if "DELETE" in statement else int(statement.rsplit("= ", 1)[1])
    assert f"event {broken}:" in err


def test_a_row_inserted_by_hand_is_found(trail, capsys):
    engine = make_engine(trail)
    with engine.begin() as connection:
        connection.execute(
            text(
                "INSERT INTO audit_events (occurred_at, username, action, entity) "
                "VALUES (CURRENT_TIMESTAMP, 'forger-invented', 'add', 'user')"
            )
        )
    engine.dispose()
    code, _, err = _verify(capsys, trail)
    assert code == 1 and "never sealed" in err


def test_check_and_evaluate_and_annotate_are_in_the_trail_in_words(trail, capsys):
    code, out, err = run_cli(capsys, "--db", trail, "audit", "--patient", "DEMO-01")
    assert code == 0, err
    assert "saved criteria evaluations — DEMO-01/" in out
    assert "changed a visit's clinician inputs — DEMO-01/2023-02-14" in out
    # The outcome of each set after the check, in the words of the change column.
    assert "efns-pns-2010-cidp" in out and "limits: default" in out
    code, out, _ = run_cli(capsys, "--db", trail, "evaluate")
    assert code == 0
    code, out, _ = run_cli(capsys, "--db", trail, "audit", "--limit", "1")
    assert "saved criteria evaluations" in out and "evaluations:" in out
    code, out, _ = run_cli(capsys, "--db", trail, "audit", "--user", "nobody-invented")
    assert code == 0 and "No audit events match." in out
    code, out, _ = run_cli(capsys, "--db", trail, "audit", "--since", "2999-01-01")
    assert "No audit events match." in out
    assert "_" not in out


def test_a_second_check_records_the_outcome_before_and_after(trail, capsys):
    """Checking a visit again after its phenotype changed: the audit row
    shows the outcome before and after."""
    for phenotype in ("distal", "typical"):
        assert (
            run_cli(
                capsys,
                "--db",
                trail,
                "annotate",
                "DEMO-01",
                "--visit",
                "2023-02-14",
                "--phenotype",
                phenotype,
            )[0]
            == 0
        )
        assert (
            run_cli(
                capsys,
                "--db",
                trail,
                "check",
                "DEMO-01",
                "--visit",
                "2023-02-14",
                "--criteria",
                "ean-pns-2021-cidp",
            )[0]
            == 0
        )
    code, out, _ = run_cli(capsys, "--db", trail, "audit", "--limit", "1")
    assert code == 0 and "saved criteria evaluations — DEMO-01/2023-02-14" in out
    # Before and after: the outcome either changed (a → b) or is marked unchanged; never left out.
    [outcome_words] = [part for part in out.split("; ") if "ean-pns-2021-cidp:" in part]
    assert "→" in outcome_words or "(unchanged)" in outcome_words


def test_choosing_the_default_limits_records_before_and_after(trail, capsys, tmp_path):
    """The issue's finding: "choose default limits" recorded no before/after."""
    limits = tmp_path / "lab.csv"
    limits.write_text(
        "nerve,modality,parameter,bound,value,source\n"
        "median,motor,distal_latency_ms,uln,4.5,invented laboratory limits for this test\n",
        encoding="utf-8",
    )
    code, _, err = run_cli(capsys, "--db", trail, "limits", "import", str(limits), "--name", "lab-invented")
    assert code == 0, err
    code, _, err = run_cli(capsys, "--db", trail, "limits", "default", "lab-invented")
    assert code == 0, err
    code, out, _ = run_cli(capsys, "--db", trail, "audit", "--limit", "1")
    assert "chose the default normal limits — lab-invented v1" in out
    assert "default: default v2 → lab-invented v1" in out
