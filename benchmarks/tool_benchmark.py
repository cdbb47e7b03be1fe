"""One benchmark for the whole tool (issue 12): every step on a database of N invented patients, each as a
ratio against its floor or against the same step on a small database, printed as one table.

Data: ``tracker.synthetic`` (deterministic, invented, codes ``SYN-…``; shared with the tests). The large
cohort has ``--patients`` patients, the small one ``--small`` (default 10); both hold the followed patient
``SYN-TARGET`` (30 visits) and are imported and evaluated with the tool's own commands.

Measured in one run (progress on stderr, the table on stdout):

* import: ``ncs-tracker import`` of measurements, treatments and scores into a fresh database at the
  current schema, against a floor that stores the same rows without any checking: on SQLite ``csv.reader``
  and ``sqlite3.executemany`` into one flat table per file (WAL, synchronous=NORMAL, as the tool), on
  PostgreSQL ``COPY … FROM STDIN (FORMAT csv)`` of the same files into one flat table per file. Best of
  ``--repeat`` (fresh databases each time) — as ``benchmarks/import_benchmark.py``;
* evaluate: ``ncs-tracker evaluate`` (every criteria set, every visit, saved: the engine, the stored
  traces, the writes and the audit) against loading the rows the engine reads (``load_frames`` of every
  visit), for information — as ``benchmarks/evaluate_benchmark.py``;
* the follow-up page (the followed patient) and the patients page: Streamlit ``AppTest``, cold caches,
  the engine created untimed, large against small database; medians of ``--runs`` alternating runs — as
  ``benchmarks/dashboard_benchmark.py`` and ``benchmarks/response_benchmark.py``;
* ``ncs-tracker check SYN-TARGET`` (one visit, saved) against ``ncs-tracker show SYN-TARGET``: wall
  time of the whole command as a subprocess, medians of ``--runs`` alternating runs;
* the criteria engine alone: all six sets over every visit in one pass, in memory, against loading the
  rows it reads (``load_frames``) in the same process — as ``benchmarks/criteria_benchmark.py``; both with
  their user and system CPU time (system time: mostly the kernel handing the process fresh memory pages);
* export (``--level nerve --format csv``) and response (``cohort_response``: every patient): time per
  visit or patient, large against small — as
  ``benchmarks/export_memory_benchmark.py`` and ``benchmarks/response_benchmark.py``;
* peak memory of import, evaluate, export and response: the large cohort against a tenth of it (its
  first ``--patients / 10`` patients, in a database of its own), i.e. for ten times the data;
* storage: database bytes per visit, and database bytes against the bytes of the CSV files imported (SQLite:
  the file; PostgreSQL: ``pg_total_relation_size`` summed over the tables, indexes and TOAST included).

Import, evaluate, load, export and response run in a fresh child process each (this script with
``--child``); a child times its own work after its imports and reads its peak resident memory (``VmHWM``,
which starts afresh at ``exec``). PostgreSQL: throwaway databases on ``--pg`` (default
``127.0.0.1:5432``, user postgres), dropped at the end, also on errors.

Run: ``.venv/bin/python benchmarks/tool_benchmark.py --backend sqlite --patients 500``. ``--smoke`` (CI):
no warm-up runs and one run per comparison — it checks that every step works, its figures mean nothing.
"""

from __future__ import annotations

import argparse
import contextlib
import csv
import io
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

APP = ROOT / "tracker" / "dashboard" / "app.py"
PG_ADMIN = "postgresql+psycopg://postgres@127.0.0.1:5432/postgres"
EXPORT_ARGS = ["--level", "nerve", "--format", "csv"]


def progress(text: str) -> None:
    print(f"[{time.strftime('%H:%M:%S')}] {text}", file=sys.stderr, flush=True)


# -- children: one measured step in a fresh process ----------------------------------------------------------


def _peak_mb() -> float:
    """This process's peak resident memory (MB): VmHWM, reset at exec (ru_maxrss would include the parent)."""
    with contextlib.suppress(OSError):
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _cpu() -> tuple[float, float]:
    """(user, system) CPU seconds of this process so far."""
    import resource

    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime, usage.ru_stime


def _cpu_since(start: tuple[float, float]) -> dict[str, float]:
    """User and system CPU seconds since ``start``. System time here is mostly the kernel giving the process
    new memory pages (first touch), which grows with the memory a step allocates, not with its Python work."""
    user, system = _cpu()
    return {"user": user - start[0], "system": system - start[1]}


def cpu_text(cpu: dict[str, float]) -> str:
    """User and system CPU seconds of :func:`_cpu_since`, in words."""
    return f"user {cpu['user']:.2f} + system {cpu['system']:.2f} s"


def _cli(args: list[str]) -> None:
    """Run the ncs-tracker command line in this process; stop with its output if it fails."""
    from tracker.cli import main

    out = io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(out):
        try:
            main(args)
            code = 0
        except SystemExit as done:
            code = int(done.code or 0)
    if code:
        raise SystemExit(f"ncs-tracker {' '.join(args[2:])} failed ({code}):\n{out.getvalue()[-2000:]}")


def _flat_columns(path: Path) -> list[str]:
    with open(path, encoding="utf-8", newline="") as handle:
        return next(csv.reader(handle))


def _floor_sqlite(database: str, files: list[str]) -> None:
    import sqlite3

    connection = sqlite3.connect(database)
    connection.execute("PRAGMA journal_mode=WAL")
    connection.execute("PRAGMA synchronous=NORMAL")
    for number, name in enumerate(files):
        columns = _flat_columns(Path(name))
        connection.execute(f"CREATE TABLE flat{number} ({', '.join(columns)})")
        with open(name, encoding="utf-8", newline="") as handle:
            reader = csv.reader(handle)
            next(reader)
            marks = ", ".join("?" * len(columns))
            connection.executemany(f"INSERT INTO flat{number} VALUES ({marks})", reader)
    connection.commit()
    connection.close()


def _floor_copy(url: str, files: list[str]) -> None:
    import psycopg
    from sqlalchemy.engine import make_url

    parsed = make_url(url)
    with psycopg.connect(
        host=parsed.host, port=parsed.port, user=parsed.username, dbname=parsed.database
    ) as connection:
        with connection.cursor() as cursor:
            for number, name in enumerate(files):
                columns = _flat_columns(Path(name))
                cursor.execute(f"CREATE TABLE flat{number} ({', '.join(c + ' text' for c in columns)})")
                with cursor.copy(f"COPY flat{number} FROM STDIN (FORMAT csv, HEADER true)") as copy:
                    with open(name, "rb") as handle:
                        while block := handle.read(1 << 20):
                            copy.write(block)
        connection.commit()


def _load(url: str, with_engine: bool) -> dict:
    """Load the rows the engine reads (every visit); with ``with_engine``, then run all six criteria sets
    over them in one pass, in memory (nothing saved), and time that too."""
    from tracker.criteria import engine as criteria_engine
    from tracker.db.session import make_engine, make_session_factory
    from tracker.services.evaluation import load_frames
    from tracker.services.limit_sets import resolve

    engine = make_engine(url)
    try:
        with make_session_factory(engine)() as session:
            _info, limits = resolve(session, None)
            started, cpu = time.perf_counter(), _cpu()
            visits, tests, sites = load_frames(session)
            report = {"seconds": time.perf_counter() - started, "visits": len(visits), "sites": len(sites)}
            report["cpu"] = _cpu_since(cpu)
        if with_engine:
            started, cpu = time.perf_counter(), _cpu()
            results = criteria_engine.evaluate(visits, tests, sites, limits)
            report["engine_seconds"] = time.perf_counter() - started
            report["engine_cpu"] = _cpu_since(cpu)
            report["sets"] = len(results)
        return report
    finally:
        engine.dispose()


def _response(url: str) -> dict:
    from tracker.db.session import make_engine, make_session_factory
    from tracker.services.response import cohort_response

    engine = make_engine(url)
    try:
        with make_session_factory(engine)() as session:
            started = time.perf_counter()
            course, _changes = cohort_response(session)
            return {"seconds": time.perf_counter() - started, "patients": len(course)}
    finally:
        engine.dispose()


def child(kind: str, target: str, rest: list[str]) -> None:
    """One measured step; prints a JSON line: seconds of work (after the imports) and peak memory."""
    # Imported before the clock starts: a long-running clinic process has them loaded already.
    import pandas  # noqa: F401
    import sqlalchemy  # noqa: F401

    import tracker.cli  # noqa: F401
    import tracker.services.evaluation  # noqa: F401
    import tracker.services.export  # noqa: F401
    import tracker.services.importing  # noqa: F401

    report: dict = {}
    started = time.perf_counter()
    if kind == "import":
        _cli(["--db", target, "import", *rest])
    elif kind == "evaluate":
        _cli(["--db", target, "evaluate"])
    elif kind == "export":
        _cli(["--db", target, "export", *EXPORT_ARGS, "--out", rest[0] + "/", "--overwrite"])
    elif kind == "floor-sqlite":
        _floor_sqlite(target, rest)
    elif kind == "floor-copy":
        _floor_copy(target, rest)
    elif kind == "load":
        report = _load(target, with_engine=False)
    elif kind == "engine":
        report = _load(target, with_engine=True)
    elif kind == "response":
        report = _response(target)
    else:
        raise SystemExit(f"unknown child step {kind!r}")
    report.setdefault("seconds", time.perf_counter() - started)
    report["peak_mb"] = _peak_mb()
    print(json.dumps(report), flush=True)


def run_child(kind: str, target: str, *rest: str) -> dict:
    command = [sys.executable, __file__, "--child", kind, target, *rest]
    finished = subprocess.run(command, capture_output=True, text=True, cwd=ROOT)
    if finished.returncode != 0:
        raise SystemExit(
            f"step {kind} failed ({finished.returncode}):\n{finished.stdout[-3000:]}{finished.stderr[-3000:]}"
        )
    return json.loads(finished.stdout.strip().splitlines()[-1])


# -- databases -----------------------------------------------------------------------------------------------


class Databases:
    """Throwaway databases of one backend, all removed by :meth:`drop_all`."""

    def __init__(self, backend: str, folder: Path, pg_admin: str) -> None:
        self.backend, self.folder, self.pg_admin = backend, folder, pg_admin
        self.made: list[str] = []

    def new(self, label: str) -> str:
        if self.backend == "sqlite":
            url = f"sqlite:///{self.folder / f'{label}-{len(self.made)}.sqlite3'}"
        else:
            from sqlalchemy import create_engine, text
            from sqlalchemy.engine import make_url

            name = f"ncs_bench_{label}_{uuid.uuid4().hex[:8]}"
            admin = create_engine(self.pg_admin, isolation_level="AUTOCOMMIT")
            try:
                with admin.connect() as connection:
                    connection.execute(text(f'CREATE DATABASE "{name}"'))
            finally:
                admin.dispose()
            url = make_url(self.pg_admin).set(database=name).render_as_string(hide_password=False)
        self.made.append(url)
        return url

    def drop(self, url: str) -> None:
        if url not in self.made:
            return
        self.made.remove(url)
        if self.backend == "sqlite":
            path = Path(url.removeprefix("sqlite:///"))
            for leftover in (path, Path(f"{path}-wal"), Path(f"{path}-shm")):
                leftover.unlink(missing_ok=True)
            return
        from sqlalchemy import create_engine, text
        from sqlalchemy.engine import make_url

        admin = create_engine(self.pg_admin, isolation_level="AUTOCOMMIT")
        try:
            with admin.connect() as connection:
                connection.execute(text(f'DROP DATABASE IF EXISTS "{make_url(url).database}" WITH (FORCE)'))
        finally:
            admin.dispose()

    def drop_all(self) -> None:
        for url in list(self.made):
            with contextlib.suppress(Exception):
                self.drop(url)

    def migrated(self, label: str) -> str:
        from tracker.db import migrate

        url = self.new(label)
        migrate.upgrade(url)
        return url

    def size_bytes(self, url: str) -> int:
        """SQLite: the file (and its WAL, if any); PostgreSQL: every table with its indexes and TOAST."""
        if self.backend == "sqlite":
            path = Path(url.removeprefix("sqlite:///"))
            return sum(p.stat().st_size for p in (path, Path(f"{path}-wal")) if p.exists())
        from sqlalchemy import text

        from tracker.db.session import make_engine

        engine = make_engine(url)
        try:
            with engine.connect() as connection:
                return int(
                    connection.scalar(
                        text(
                            "SELECT sum(pg_total_relation_size(c.oid)) FROM pg_class c "
                            "JOIN pg_namespace n ON n.oid = c.relnamespace "
                            "WHERE n.nspname = 'public' AND c.relkind IN ('r', 'p')"
                        )
                    )
                )
        finally:
            engine.dispose()


def counts(url: str) -> dict[str, int]:
    from sqlalchemy import func, select

    from tracker.db.models import Evaluation, Patient, StimulationSite, Visit
    from tracker.db.session import make_engine

    engine = make_engine(url)
    try:
        with engine.connect() as connection:
            return {
                label: int(connection.scalar(select(func.count()).select_from(model)))
                for label, model in (
                    ("patients", Patient),
                    ("visits", Visit),
                    ("sites", StimulationSite),
                    ("evaluations", Evaluation),
                )
            }
    finally:
        engine.dispose()


# -- pages and commands --------------------------------------------------------------------------------------


def _quiet_streamlit() -> None:
    from streamlit import logger

    logger.set_log_level("error")


def page_seconds(url: str, page: str) -> float:
    """One cold run of a dashboard page (``follow_up`` for the followed patient, or ``patients``)."""
    import streamlit as st
    from streamlit.testing.v1 import AppTest

    from tracker.dashboard import state
    from tracker.synthetic import TARGET, TARGET_VISITS

    _quiet_streamlit()
    os.environ["NCS_TRACKER_DB"] = url
    at = AppTest.from_file(str(APP), default_timeout=300)
    at.session_state[state.PATIENT_KEY] = TARGET
    at.run()
    if page == "follow_up":
        at.switch_page("views/follow_up.py")
    _quiet_streamlit()  # the first run reads Streamlit's configuration, which resets the level
    st.cache_data.clear()
    st.cache_resource.clear()
    state._engine(url)  # engine and schema check untimed: a fixed cost per process, not page work
    started = time.perf_counter()
    at.run()
    elapsed = time.perf_counter() - started
    if len(at.exception):
        raise RuntimeError(f"{page} page raised: {at.exception[0].message}")
    if len(at.error):
        raise RuntimeError(f"{page} page showed an error: {at.error[0].value}")
    if page == "follow_up":
        markdown = " ".join(str(m.value) for m in at.markdown)
        if not at.get("plotly_chart") or TARGET not in markdown or f"{TARGET_VISITS} visits" not in markdown:
            raise RuntimeError(
                "the follow-up page does not show the followed patient's 30 visits with a chart"
            )
    elif not any("patient" in frame.value.columns and len(frame.value) for frame in at.dataframe):
        raise RuntimeError("the patients page shows no list of patients")
    return elapsed


def command_seconds(url: str, *args: str) -> float:
    """Wall time of one ncs-tracker command as a subprocess (start-up and imports included)."""
    started = time.perf_counter()
    finished = subprocess.run(
        [sys.executable, "-m", "tracker", "--db", url, *args], capture_output=True, text=True, cwd=ROOT
    )
    elapsed = time.perf_counter() - started
    if finished.returncode != 0:
        raise SystemExit(
            f"ncs-tracker {' '.join(args)} failed:\n{finished.stdout[-2000:]}{finished.stderr[-2000:]}"
        )
    return elapsed


def alternate(
    pair: dict[str, Callable[[], float]], runs: int, warm_up: bool, label: str
) -> dict[str, list[float]]:
    """Run both sides ``runs`` times, alternating the order; one untimed warm-up each first."""
    times: dict[str, list[float]] = {name: [] for name in pair}
    if warm_up:
        for name, call in pair.items():
            progress(f"{label}: warm-up {name} {call():.2f} s")
    for attempt in range(runs):
        for name in list(pair) if attempt % 2 == 0 else list(reversed(pair)):
            times[name].append(pair[name]())
            progress(f"{label}: run {attempt + 1}/{runs} {name} {times[name][-1]:.2f} s")
    return times


# -- the table -----------------------------------------------------------------------------------------------


@dataclass
class Row:
    step: str
    measured: str
    against: str
    ratio: float
    target: float | None  # None: for information

    def cells(self) -> list[str]:
        if self.target is None:
            verdict = "info"
        else:
            verdict = "ok" if self.ratio <= self.target else "MISSED"
        target = "—" if self.target is None else f"≤ {self.target:g}"
        return [self.step, self.measured, self.against, f"{self.ratio:.2f}", target, verdict]


def table(rows: list[Row]) -> str:
    header = ["step", "measured", "against (floor or small database)", "ratio", "target", ""]
    cells = [header] + [row.cells() for row in rows]
    widths = [max(len(line[i]) for line in cells) for i in range(len(header))]
    lines = []
    for number, line in enumerate(cells):
        lines.append("  ".join(cell.ljust(width) for cell, width in zip(line, widths)).rstrip())
        if number == 0:
            lines.append("  ".join("-" * width for width in widths))
    return "\n".join(lines)


def median(values: list[float]) -> float:
    return statistics.median(values)


def all_runs(reports: list[dict]) -> str:
    return ", ".join(f"{r['seconds']:.2f}" for r in reports)


def runs_text(values: list[float]) -> str:
    return f"{median(values):.2f} s" + (
        f" (runs {', '.join(f'{v:.2f}' for v in values)})" if len(values) > 1 else ""
    )


# -- main ----------------------------------------------------------------------------------------------------


def main() -> None:
    parser = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    parser.add_argument("--backend", choices=["sqlite", "postgresql"], default="sqlite")
    parser.add_argument(
        "--patients", type=int, default=500, help="patients in the large database (default 500)"
    )
    parser.add_argument("--small", type=int, default=10, help="patients in the small database (default 10)")
    parser.add_argument("--runs", type=int, default=3, help="timed runs per page and command (default 3)")
    parser.add_argument("--repeat", type=int, default=1, help="imports into fresh databases, best counts")
    parser.add_argument("--pg", default=PG_ADMIN, help="PostgreSQL server (its maintenance database)")
    parser.add_argument(
        "--smoke", action="store_true", help="CI: no warm-ups, one run each (figures meaningless)"
    )
    parser.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(args.child[0], args.child[1], args.child[2:])
        return
    if args.patients < 1 or args.small < 1:
        parser.error("--patients and --small must be at least 1")
    runs, warm_up = (1, False) if args.smoke else (args.runs, True)
    started = time.perf_counter()
    from tracker import synthetic

    with tempfile.TemporaryDirectory(prefix="ncs-tool-bench-") as scratch_name:
        scratch = Path(scratch_name)
        databases = Databases(args.backend, scratch, args.pg)
        try:
            rows, facts = measure(args, databases, scratch, runs, warm_up, synthetic)
        finally:
            databases.drop_all()
    print(f"ncs-tracker tool benchmark — {args.backend}, {facts}")
    print(f"data: {synthetic.LABEL}")
    print(table(rows))
    print(
        f"whole benchmark: {time.perf_counter() - started:.0f} s on {os.cpu_count()} cores"
        f"{' (smoke run: figures not meaningful)' if args.smoke else ''}"
    )


def measure(
    args, databases: Databases, scratch: Path, runs: int, warm_up: bool, synthetic
) -> tuple[list[Row], str]:
    files: dict[str, list[str]] = {}
    tenth_patients = max(1, args.patients // 10)
    for name, count in (("small", args.small), ("tenth", tenth_patients), ("large", args.patients)):
        folder = scratch / f"files-{name}"
        folder.mkdir()
        files[name] = [str(p) for p in synthetic.write_csv_files(folder, list(synthetic.cohort(count)))]
    csv_bytes = sum(Path(f).stat().st_size for f in files["large"])
    progress(f"files written: large {csv_bytes / 1e6:.1f} MB of CSV")

    # Small database: the reference of the page, export and response comparisons.
    small = databases.migrated("small")
    run_child("import", small, *files["small"])
    run_child("evaluate", small)
    progress("small database imported and evaluated")
    # A tenth of the large cohort: the reference of the peak-memory comparisons (10 × the data).
    tenth = databases.migrated("tenth")
    tenth_runs = {
        "import": run_child("import", tenth, *files["tenth"]),
        "evaluate": run_child("evaluate", tenth),
    }
    (scratch / "export-tenth").mkdir()
    tenth_runs["export"] = run_child("export", tenth, str(scratch / "export-tenth"))
    tenth_runs["response"] = run_child("response", tenth)
    tenth_count = counts(tenth)
    databases.drop(tenth)
    progress(f"tenth database ({tenth_count['visits']:,} visits) imported, evaluated, exported")

    # Import: best of --repeat into fresh databases, against the floor.
    imports, floors, large = [], [], ""
    for attempt in range(args.repeat):
        if large:
            databases.drop(large)
        large = databases.migrated("large")
        imports.append(run_child("import", large, *files["large"]))
        progress(f"import {attempt + 1}/{args.repeat}: {imports[-1]['seconds']:.2f} s")
        if args.backend == "sqlite":
            floor_db = str(scratch / f"floor{attempt}.sqlite3")
            floors.append(run_child("floor-sqlite", floor_db, *files["large"]))
            for leftover in (floor_db, floor_db + "-wal", floor_db + "-shm"):
                Path(leftover).unlink(missing_ok=True)
        else:
            floor_db = databases.new("floor")
            floors.append(run_child("floor-copy", floor_db, *files["large"]))
            databases.drop(floor_db)
        progress(f"floor {attempt + 1}/{args.repeat}: {floors[-1]['seconds']:.2f} s")
    best_import = min(imports, key=lambda r: r["seconds"])
    best_floor = min(f["seconds"] for f in floors)

    load = run_child("load", large)
    progress(f"load: {load['seconds']:.2f} s ({load['visits']:,} visits)")
    in_memory = run_child("engine", large)
    progress(
        f"engine: load {in_memory['seconds']:.2f} s ({cpu_text(in_memory['cpu'])}), "
        f"six sets {in_memory['engine_seconds']:.2f} s ({cpu_text(in_memory['engine_cpu'])})"
    )
    evaluate = run_child("evaluate", large)
    progress(f"evaluate: {evaluate['seconds']:.2f} s")
    size = databases.size_bytes(large)
    count = counts(large)
    progress(f"database: {size / 1e6:.1f} MB, {count}")

    exports = {}
    for name, url in (("small", small), ("large", large)):
        (scratch / f"export-{name}").mkdir()
        exports[name] = run_child("export", url, str(scratch / f"export-{name}"))
    responses = {name: run_child("response", url) for name, url in (("small", small), ("large", large))}
    small_count = counts(small)
    progress("export and response done")

    pages = {}
    for page in ("follow_up", "patients"):
        pages[page] = alternate(
            {"small": lambda p=page: page_seconds(small, p), "large": lambda p=page: page_seconds(large, p)},
            runs,
            warm_up,
            page,
        )
    target = synthetic.TARGET
    commands = alternate(
        {
            "show": lambda: command_seconds(large, "show", target),
            "check": lambda: command_seconds(large, "check", target),
        },
        runs,
        warm_up,
        "commands",
    )

    floor_name = "executemany" if args.backend == "sqlite" else "COPY"
    per_visit = {
        name: exports[name]["seconds"] / (count if name == "large" else small_count)["visits"]
        for name in exports
    }
    per_patient = {
        name: responses[name]["seconds"] / max(1, responses[name]["patients"]) for name in responses
    }
    rows = [
        Row(
            "import (3 files)",
            f"{best_import['seconds']:.2f} s" + (f" best of {all_runs(imports)}" if len(imports) > 1 else ""),
            f"{floor_name} of the same rows {best_floor:.2f} s",
            best_import["seconds"] / best_floor,
            3,
        ),
        Row(
            "criteria engine (6 sets, in memory)",
            f"{in_memory['engine_seconds']:.2f} s (CPU {cpu_text(in_memory['engine_cpu'])})",
            f"load the rows {in_memory['seconds']:.2f} s (CPU {cpu_text(in_memory['cpu'])})",
            in_memory["engine_seconds"] / in_memory["seconds"],
            2,
        ),
        Row(
            "evaluate command (6 sets, saved)",
            f"{evaluate['seconds']:.2f} s",
            f"load the rows {load['seconds']:.2f} s",
            evaluate["seconds"] / load["seconds"],
            None,
        ),
        Row(
            "follow-up page (AppTest)",
            f"large {runs_text(pages['follow_up']['large'])}",
            f"small {runs_text(pages['follow_up']['small'])}",
            median(pages["follow_up"]["large"]) / median(pages["follow_up"]["small"]),
            1.5,
        ),
        Row(
            "patients page (AppTest)",
            f"large {runs_text(pages['patients']['large'])}",
            f"small {runs_text(pages['patients']['small'])}",
            median(pages["patients"]["large"]) / median(pages["patients"]["small"]),
            1.5,
        ),
        Row(
            "check one visit (wall)",
            f"check {runs_text(commands['check'])}",
            f"show {runs_text(commands['show'])}",
            median(commands["check"]) / median(commands["show"]),
            1.3,
        ),
        Row(
            "export per visit (nerve, csv)",
            f"large {per_visit['large'] * 1e3:.2f} ms ({exports['large']['seconds']:.1f} s)",
            f"small {per_visit['small'] * 1e3:.2f} ms",
            per_visit["large"] / per_visit["small"],
            None,
        ),
        Row(
            "response per patient",
            f"large {per_patient['large'] * 1e3:.2f} ms ({responses['large']['seconds']:.1f} s)",
            f"small {per_patient['small'] * 1e3:.2f} ms",
            per_patient["large"] / per_patient["small"],
            None,
        ),
    ]
    for label, large_run, target in (
        ("import", best_import, 1.5),
        ("evaluate", evaluate, 1.5),
        ("export", exports["large"], 1.5),
        ("response", responses["large"], None),
    ):
        rows.append(
            Row(
                f"peak memory: {label} (10 × data)",
                f"large {large_run['peak_mb']:.0f} MB",
                f"a tenth {tenth_runs[label]['peak_mb']:.0f} MB",
                large_run["peak_mb"] / tenth_runs[label]["peak_mb"],
                target,
            )
        )
    visits = count["visits"]
    rows.append(
        Row(
            "database bytes per visit",
            f"{size / visits / 1e3:.1f} kB ({size / 1e6:.1f} MB)",
            f"CSV {csv_bytes / visits / 1e3:.2f} kB ({csv_bytes / 1e6:.1f} MB)",
            size / csv_bytes,
            10,
        )
    )
    facts = (
        f"{count['patients']:,} invented patients ({visits:,} visits, {count['sites']:,} stimulation sites, "
        f"{count['evaluations']:,} saved evaluations) against {small_count['patients']:,} "
        f"({small_count['visits']:,} visits); peak memory against a tenth: {tenth_count['patients']:,} "
        f"({tenth_count['visits']:,} visits)"
    )
    return rows, facts


if __name__ == "__main__":
    main()
