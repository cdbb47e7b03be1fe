"""Two real processes on one database, on both backends: an import during a long evaluate, duplicate imports,
racing --replace, --force, and imports killed with SIGKILL at several points.

Each process is ``python -m tracker`` as a user runs it. The interleavings are made certain with the test hook
``tracker.db.locking.checkpoint``: a process holds at a named point while the file ``NAME.hold`` exists in the
folder named by ``NCS_TRACKER_TEST_CHECKPOINTS`` (it writes ``NAME.reached.PID`` on arrival). Without that
variable the hook does nothing.

The clinical data are the invented demo clinic's (demo_data/), copied under invented patient codes; no
clinical result is checked here, only what is stored and what the processes say.
"""

from __future__ import annotations

import csv
import datetime as dt
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from sqlalchemy import func, select

from conftest import DEMO, ROOT, fingerprint, run_cli
from tracker.db.locking import BUSY_MESSAGE, CHECKPOINT_ENV, LOCK_WAIT_MS
from tracker.db.models import (
    AuditEvent,
    Evaluation,
    NerveTest,
    Patient,
    StimulationSite,
    Visit,
    VisitRevision,
)

CLI_TIMEOUT_S = 180
LOCK_WAIT_S = LOCK_WAIT_MS / 1000
# The demo clinic's first visit (invented data): 13 rows, motor and sensory nerves of both arms and legs.
SOURCE_PATIENT, SOURCE_DATE = "DEMO-01", "2023-02-14"
PATIENT, DATE = "INV-RACE-01", "2023-02-14"


def _source_rows() -> list[dict[str, str]]:
    with open(DEMO / "measurements.csv", encoding="utf-8", newline="") as handle:
        rows = [
            r
            for r in csv.DictReader(handle)
            if r["patient"] == SOURCE_PATIENT and r["visit_date"] == SOURCE_DATE
        ]
    assert len(rows) == 13
    return rows


def _write(path: Path, rows: list[dict[str, str]]) -> Path:
    fields = list(rows[0])
    with open(path, "w", encoding="utf-8", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=fields)
        writer.writeheader()
        writer.writerows(rows)
    return path


def _visit_file(
    path: Path,
    *,
    patient: str = PATIENT,
    date: str = DATE,
    amplitude: str | None = None,
    version: int | None = None,
) -> Path:
    """One visit (invented): the demo visit under another code; ``amplitude`` replaces the first motor site's
    CMAP amplitude (mV); ``version`` adds the visit_version column."""
    rows = [dict(r, patient=patient, visit_date=date) for r in _source_rows()]
    if amplitude is not None:
        rows[0]["amplitude_mv"] = amplitude
    if version is not None:
        rows = [dict(r, visit_version=str(version)) for r in rows]
    return _write(path, rows)


def _cohort_file(path: Path, patients: int) -> Path:
    """``patients`` × 2 invented visits, copies of the demo visit (the second one year later)."""
    rows = []
    for p in range(patients):
        for date in ("2023-02-14", "2024-02-14"):
            rows += [dict(r, patient=f"INV-C{p:03d}", visit_date=date) for r in _source_rows()]
    return _write(path, rows)


class Holds:
    """The checkpoint folder shared with the processes under test."""

    def __init__(self, folder: Path):
        self.folder = folder
        folder.mkdir(exist_ok=True)

    def hold(self, name: str) -> None:
        (self.folder / f"{name}.hold").touch()

    def release(self, name: str) -> None:
        (self.folder / f"{name}.hold").unlink(missing_ok=True)

    def reached(self, name: str) -> list[int]:
        return [int(p.name.rsplit(".", 1)[1]) for p in self.folder.glob(f"{name}.reached.*")]

    def wait(
        self, name: str, processes: list[subprocess.Popen], count: int = 1, timeout: float = CLI_TIMEOUT_S
    ) -> None:
        deadline = time.monotonic() + timeout
        while len(self.reached(name)) < count:
            for process in processes:
                if process.poll() is not None:
                    out, err = process.communicate()
                    pytest.fail(
                        f"a process ended before reaching {name}: exit {process.returncode}\n{out}\n{err}"
                    )
            if time.monotonic() > deadline:
                pytest.fail(f"{name} not reached by {count} processes in {timeout} s")
            time.sleep(0.02)

    def env(self) -> dict[str, str]:
        env = {k: v for k, v in os.environ.items() if k != "NCS_TRACKER_USER"}
        return {**env, CHECKPOINT_ENV: str(self.folder)}


@pytest.fixture
def holds(tmp_path) -> Holds:
    return Holds(tmp_path / "checkpoints")


def _start(holds: Holds, url: str, *args: str) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "tracker", "--db", url, *args],
        cwd=ROOT,
        env=holds.env(),
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )


def _finish(process: subprocess.Popen) -> tuple[int, str, str]:
    out, err = process.communicate(timeout=CLI_TIMEOUT_S)
    return process.returncode, out, err


def _run(holds: Holds, url: str, *args: str) -> tuple[int, str, str]:
    return _finish(_start(holds, url, *args))


def _import_in_process(sessions, path: Path) -> None:
    from tracker.services.importing import import_file

    with sessions.begin() as session:
        import_file(session, path, username="invented-test-user")


def _stored_visit(sessions, patient: str = PATIENT, date: str = DATE) -> tuple[int, float] | None:
    """(version, first motor site's amplitude in mV) of the stored visit, or None."""
    with sessions() as session:
        visit = session.scalar(
            select(Visit)
            .join(Patient)
            .where(Patient.code == patient, Visit.visit_date == dt.date.fromisoformat(date))
        )
        if visit is None:
            return None
        amplitude = session.scalar(
            select(StimulationSite.amplitude_mv)
            .join(NerveTest)
            .where(
                NerveTest.visit_id == visit.id,
                NerveTest.nerve == "median",
                NerveTest.side == "right",
                NerveTest.modality == "motor",
                StimulationSite.site_order == 1,
            )
        )
        return visit.version, amplitude


def _no_partial_visits(sessions) -> None:
    """Every stored visit has its nerve tests and every nerve test its sites (nothing half written)."""
    with sessions() as session:
        bare_visits = session.scalar(select(func.count()).select_from(Visit).where(~Visit.nerve_tests.any()))
        bare_tests = session.scalar(
            select(func.count())
            .select_from(NerveTest)
            .where(~select(StimulationSite.id).where(StimulationSite.nerve_test_id == NerveTest.id).exists())
        )
    assert (bare_visits, bare_tests) == (0, 0)


def _source_amplitude() -> float:
    return float(_source_rows()[0]["amplitude_mv"])


# -- an import while evaluate runs --------------------------------------------------------------------------


@pytest.fixture
def cohort(db_url, sessions, tmp_path) -> int:
    """30 stored invented visits, and the shipped normal limits stored (as the first evaluate would); returns
    the number of visits."""
    from tracker.services.limit_sets import ensure_default

    _import_in_process(sessions, _cohort_file(tmp_path / "cohort.csv", 15))
    with sessions.begin() as session:
        ensure_default(session)
    return 30


def test_import_goes_through_between_chunks_and_evaluate_continues(db_url, sessions, cohort, holds, tmp_path):
    """An import while evaluate runs succeeds at once between chunks (each chunk is its own transaction); the
    evaluate goes on, shows its progress and audits every chunk."""
    holds.hold("evaluate-chunk-committed")
    evaluate = _start(holds, db_url, "evaluate", "--chunk-visits", "10")
    holds.wait("evaluate-chunk-committed", [evaluate])
    # The evaluate stays held until the import has ended: the import cannot have waited for it to finish.
    code, out, err = _run(holds, db_url, "import", str(_visit_file(tmp_path / "new.csv")))
    assert code == 0, err
    assert "added 1 visits" in out
    holds.release("evaluate-chunk-committed")
    code, out, err = _finish(evaluate)
    assert code == 0, err
    assert "10 of 30 visits evaluated" in err and "30 of 30 visits evaluated" in err
    assert "30 visits:" in out
    with sessions() as session:
        assert session.scalar(select(func.count(func.distinct(Evaluation.visit_id)))) == cohort
        parts = [
            e.after.get("part")
            for e in session.scalars(select(AuditEvent).where(AuditEvent.action == "save_evaluations"))
        ]
    assert parts == ["1 of 3", "2 of 3", "3 of 3"]


def test_import_waits_for_a_chunk_being_written_and_then_succeeds(db_url, sessions, cohort, holds, tmp_path):
    """While evaluate writes a chunk (it holds the database's write lock on SQLite, the audit trail's lock on
    PostgreSQL), an import waits; when the chunk is committed within the bounded wait, the import succeeds."""
    holds.hold("evaluate-chunk-written")
    evaluate = _start(holds, db_url, "evaluate", "--chunk-visits", "10")
    holds.wait("evaluate-chunk-written", [evaluate])
    importing = _start(holds, db_url, "import", str(_visit_file(tmp_path / "new.csv")))
    time.sleep(LOCK_WAIT_S / 3)
    assert importing.poll() is None  # waiting (or still starting): not failed
    holds.release("evaluate-chunk-written")
    code, out, err = _finish(importing)
    assert code == 0, err
    assert "added 1 visits" in out
    assert _finish(evaluate)[0] == 0
    assert _stored_visit(sessions) == (1, _source_amplitude())


def test_import_blocked_longer_than_the_bound_is_told_why_in_words(db_url, sessions, cohort, holds, tmp_path):
    """Held longer than the bounded wait, the import gives up with a sentence, not a driver's exception, and
    writes nothing; the evaluate then finishes."""
    holds.hold("evaluate-chunk-written")
    evaluate = _start(holds, db_url, "evaluate", "--chunk-visits", "10")
    holds.wait("evaluate-chunk-written", [evaluate])
    started = time.monotonic()
    code, out, err = _run(holds, db_url, "import", str(_visit_file(tmp_path / "new.csv")))
    waited = time.monotonic() - started
    holds.release("evaluate-chunk-written")
    assert code == 1
    assert BUSY_MESSAGE in err
    assert "unexpected" not in err and "OperationalError" not in err
    assert LOCK_WAIT_S - 1 <= waited < LOCK_WAIT_S + 60  # waited the bound (plus start-up), then stopped
    assert _finish(evaluate)[0] == 0
    assert _stored_visit(sessions) is None


def test_evaluate_blocked_by_a_long_import_says_how_far_it_got(db_url, sessions, cohort, holds, tmp_path):
    """The other way round: an import holds the database; evaluate tries each chunk a bounded number of
    times, then stops in words, saying how many visits it saved (none here) and that a rerun continues."""
    holds.hold("import-written")
    importing = _start(holds, db_url, "import", str(_visit_file(tmp_path / "new.csv")))
    holds.wait("import-written", [importing])
    started = time.monotonic()
    code, out, err = _run(holds, db_url, "evaluate", "--chunk-visits", "10")
    waited = time.monotonic() - started
    holds.release("import-written")
    assert code == 1
    assert (
        BUSY_MESSAGE in err
        and "0 of 30 visits were evaluated and saved; run evaluate again to continue" in err
    )
    assert "unexpected" not in err
    assert 3 * LOCK_WAIT_S - 1 <= waited < 3 * LOCK_WAIT_S + 60  # three attempts of the bounded wait
    assert _finish(importing)[0] == 0
    with sessions() as session:
        assert session.scalar(select(func.count()).select_from(Evaluation)) == 0


def test_an_interrupted_evaluate_keeps_its_finished_chunks_and_a_rerun_continues(
    db_url, sessions, cohort, holds
):
    holds.hold("evaluate-chunk-committed")
    evaluate = _start(holds, db_url, "evaluate", "--chunk-visits", "10")
    holds.wait("evaluate-chunk-committed", [evaluate])
    evaluate.send_signal(signal.SIGKILL)
    evaluate.communicate(timeout=CLI_TIMEOUT_S)
    holds.release("evaluate-chunk-committed")
    with sessions() as session:
        assert session.scalar(select(func.count(func.distinct(Evaluation.visit_id)))) == 10
        kept = session.scalar(select(func.count()).select_from(Evaluation))
    code, out, err = _run(holds, db_url, "evaluate", "--chunk-visits", "10")
    assert code == 0, err
    with sessions() as session:
        total = session.scalar(select(func.count()).select_from(Evaluation))
        assert session.scalar(select(func.count(func.distinct(Evaluation.visit_id)))) == cohort
    assert f"30 visits: {total - kept} evaluations recomputed, {kept} unchanged." in out


# -- imports that race --------------------------------------------------------------------------------------


def test_two_imports_of_the_same_new_visit(db_url, sessions, holds, tmp_path):
    """Both read "not stored" before either writes: one adds the visit, the other then finds it unchanged."""
    path = _visit_file(tmp_path / "same.csv")
    holds.hold("import-read")
    first, second = (_start(holds, db_url, "import", str(path)) for _ in range(2))
    holds.wait("import-read", [first, second], count=2)
    holds.release("import-read")
    results = [_finish(first), _finish(second)]
    assert [code for code, *_ in results] == [0, 0], results
    outs = sorted(out for _, out, _ in results)
    assert "added 0 visits, replaced 0, 1 unchanged" in outs[0]
    assert "added 1 visits, replaced 0, 0 unchanged" in outs[1]
    assert all("unexpected" not in err for *_, err in results)
    with sessions() as session:
        assert session.scalar(select(func.count()).select_from(Visit)) == 1
    _no_partial_visits(sessions)


@pytest.mark.parametrize("with_version", [False, True], ids=["no-version-column", "visit-version-column"])
def test_racing_replaces_one_wins_the_other_is_refused(db_url, sessions, holds, tmp_path, with_version):
    """Two people replace the same visit with different edits at the same moment: exactly one wins; the other
    is refused, naming the visit, its stored version and who changed it; no value is overwritten unseen."""
    _import_in_process(sessions, _visit_file(tmp_path / "base.csv"))
    version = 1 if with_version else None
    edits = {
        "4.4": _visit_file(tmp_path / "a.csv", amplitude="4.4", version=version),
        "4.6": _visit_file(tmp_path / "b.csv", amplitude="4.6", version=version),
    }
    holds.hold("import-read")
    processes = {
        value: _start(holds, db_url, "import", "--replace", str(path)) for value, path in edits.items()
    }
    holds.wait("import-read", list(processes.values()), count=2)
    holds.release("import-read")
    results = {value: _finish(process) for value, process in processes.items()}
    winners = [value for value, (code, *_) in results.items() if code == 0]
    assert len(winners) == 1, results
    loser = next(value for value in results if value not in winners)
    code, out, err = results[loser]
    assert code == 1
    assert f"the visit of {PATIENT} on {DATE}" in err and "stored as version 2" in err
    assert "changed by " in err and "(import --replace)" in err
    assert "--force" in err and "unexpected" not in err
    assert _stored_visit(sessions) == (2, float(winners[0]))
    with sessions() as session:
        assert session.scalars(select(VisitRevision.revision)).all() == [
            1
        ]  # only the winner replaced anything
    _no_partial_visits(sessions)


def test_visit_version_column_force_and_show(db_url, sessions, engine, tmp_path, capsys):
    """A file made from version 1 cannot replace version 2 unless --force (audited); the dry run says the
    same; show prints the version to fill in."""
    assert run_cli(capsys, "--db", db_url, "import", str(_visit_file(tmp_path / "base.csv")))[0] == 0
    code, out, _ = run_cli(capsys, "--db", db_url, "show", PATIENT)
    assert f"Visit {DATE} (final, version 1)" in out
    code, _, err = run_cli(
        capsys,
        "--db",
        db_url,
        "import",
        "--replace",
        str(_visit_file(tmp_path / "a.csv", amplitude="4.4", version=1)),
    )
    assert code == 0, err
    stale = _visit_file(tmp_path / "b.csv", amplitude="4.6", version=1)
    before = fingerprint(engine)
    for dry in ([], ["--dry-run"]):
        code, _, err = run_cli(capsys, "--db", db_url, "import", "--replace", *dry, str(stale))
        assert code == 1
        assert (
            f"column 'visit_version': the visit of {PATIENT} on {DATE} changed after version 1, the version "
            "this file was made from: it is stored as version 2, changed by "
        ) in err
        assert fingerprint(engine) == before
    code, _, err = run_cli(capsys, "--db", db_url, "import", "--force", str(stale))
    assert code == 2 and "--force only applies with --replace" in err
    code, out, err = run_cli(capsys, "--db", db_url, "import", "--replace", "--force", str(stale))
    assert code == 0, err
    assert "replaced 1" in out
    assert _stored_visit(sessions) == (3, 4.6)
    with sessions() as session:
        replaced = session.scalars(
            select(AuditEvent).where(AuditEvent.action == "replace_visit").order_by(AuditEvent.id)
        ).all()
        imported = session.scalars(
            select(AuditEvent).where(AuditEvent.action == "import_measurements").order_by(AuditEvent.id)
        ).all()
    assert "forced" not in replaced[0].after
    assert replaced[1].after["forced"] == {
        "stored_version": 2,
        "based_on_version": 1,
        "based_on": "visit_version column",
    }
    assert imported[-1].after["force"] is True and imported[-1].after["forced_over"] == [
        f"{PATIENT}/{DATE}: stored version 2, file based on version 1"
    ]
    code, out, _ = run_cli(capsys, "--db", db_url, "show", PATIENT)
    assert f"Visit {DATE} (final, version 3)" in out
    # The stored version stated again: the replace goes ahead without --force.
    code, out, err = run_cli(
        capsys,
        "--db",
        db_url,
        "import",
        "--replace",
        str(_visit_file(tmp_path / "c.csv", amplitude="4.5", version=3)),
    )
    assert code == 0, err
    assert _stored_visit(sessions) == (4, 4.5)


def test_visit_version_cells_are_checked(db_url, sessions, engine, tmp_path, capsys):
    assert run_cli(capsys, "--db", db_url, "import", str(_visit_file(tmp_path / "base.csv")))[0] == 0
    rows = [dict(r, patient=PATIENT, visit_date=DATE, visit_version="1") for r in _source_rows()]
    rows[2]["visit_version"] = "two"
    rows[3]["visit_version"] = "1.5"
    rows[4]["visit_version"] = "2"
    before = fingerprint(engine)
    code, _, err = run_cli(
        capsys, "--db", db_url, "import", "--replace", str(_write(tmp_path / "bad.csv", rows))
    )
    assert code == 1
    assert (
        "row 4, column 'visit_version': expected the stored visit's version as a whole number from 1" in err
    )
    assert "row 5, column 'visit_version': expected" in err
    assert fingerprint(engine) == before
    rows[2]["visit_version"] = rows[3]["visit_version"] = "1"
    code, _, err = run_cli(
        capsys, "--db", db_url, "import", "--replace", str(_write(tmp_path / "bad.csv", rows))
    )
    assert code == 1
    assert (
        f"row 6, column 'visit_version': the rows of the visit of {PATIENT} on {DATE} state different "
        "versions (1 and 2)" in err
    )
    # A version stated for a visit that is not stored: added as a new visit, with a warning.
    code, out, err = run_cli(
        capsys,
        "--db",
        db_url,
        "import",
        str(_visit_file(tmp_path / "other.csv", date="2023-03-01", version=4)),
    )
    assert code == 0, err
    assert "visit_version 4 is stated but no visit of" in err and "added 1 visits" in out


# -- killed imports -----------------------------------------------------------------------------------------


@pytest.mark.parametrize("point", ["import-read", "import-locked", "import-visits-written", "import-written"])
def test_an_import_killed_at_any_point_leaves_no_partial_visit(
    db_url, engine, sessions, holds, tmp_path, point
):
    """SIGKILL while an import adds two visits and replaces a third: the database is as before."""
    _import_in_process(sessions, _visit_file(tmp_path / "base.csv"))
    rows = [dict(r, patient=PATIENT, visit_date=DATE) for r in _source_rows()]
    rows[0]["amplitude_mv"] = "4.9"
    for patient, date in (("INV-KILL-01", "2023-05-02"), (PATIENT, "2024-01-09")):
        rows += [dict(r, patient=patient, visit_date=date) for r in _source_rows()]
    path = _write(tmp_path / "mixed.csv", rows)
    before = fingerprint(engine)
    holds.hold(point)
    process = _start(holds, db_url, "import", "--replace", str(path))
    holds.wait(point, [process])
    process.send_signal(signal.SIGKILL)
    process.communicate(timeout=CLI_TIMEOUT_S)
    holds.release(point)
    assert process.returncode == -signal.SIGKILL
    assert fingerprint(engine) == before
    assert _stored_visit(sessions) == (1, _source_amplitude())
    _no_partial_visits(sessions)
    # The same import afterwards goes through whole.
    code, out, err = _run(holds, db_url, "import", "--replace", str(path))
    assert code == 0, err
    assert "added 2 visits, replaced 1, 0 unchanged" in out
    _no_partial_visits(sessions)


def test_a_writer_that_skips_the_lock_meets_a_refusal_naming_the_visit(
    db_url, sessions, tmp_path, monkeypatch
):
    """The last line of defence: should another writer store the same visit between this import's reading and
    writing (here: the write lock is switched off and a second import runs in between), the UNIQUE constraint
    refusal is turned into a message naming the visit, and nothing of the file is written."""
    from tracker.db.session import make_engine, make_session_factory
    from tracker.errors import InputRejected
    from tracker.services.importing import measurements_store

    path = _visit_file(tmp_path / "same.csv")
    # Patched where _store_measurements looks them up when it runs.
    monkeypatch.setattr(measurements_store, "take_write_lock", lambda session, **_: None)
    original = measurements_store._write_measurements

    def other_import_first(*args, **kwargs):
        # the other import writes as usual
        monkeypatch.setattr(measurements_store, "_write_measurements", original)
        other = make_engine(db_url)
        try:
            _import_in_process(make_session_factory(other), path)
        finally:
            other.dispose()
        return original(*args, **kwargs)

    monkeypatch.setattr(measurements_store, "_write_measurements", other_import_first)
    with pytest.raises(InputRejected) as refused:
        _import_in_process(sessions, path)
    assert (
        f"the visit of {PATIENT} on {DATE}: stored or replaced by another import while this one ran"
        in str(refused.value)
    )
    with sessions() as session:
        assert session.scalar(select(func.count()).select_from(Visit)) == 1
    _no_partial_visits(sessions)
