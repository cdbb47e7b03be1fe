"""Where the time of the slow steps goes (issue 12): profiler output for import and the criteria engine, and
what the database's own schema costs to fill, on a database of N invented patients.

Steps (``--step``, all by default):

* ``import``: ``ncs-tracker import`` of the measurements, treatments and scores files under ``cProfile``
  into a fresh database at the current schema (the modules it loads on first use loaded before). Prints
  wall and CPU time, then our functions by cumulative time and all functions by own time.
* ``engine``: all six criteria sets over every visit of that database in one pass, in memory, under
  ``cProfile``, after loading the rows (``load_frames``); the same two listings, with the user and system
  CPU time and the page faults of the load and of the engine (system time there is mostly fresh memory).
* ``schema``: the stored nerve tests and stimulation sites written again into new tables of growing shape —
  plain columns; with the check constraints; with the primary key and unique constraint; with the foreign
  key — by ``executemany`` (SQLite) or ``COPY`` (PostgreSQL). This separates what the schema's integrity
  costs from what our code costs: the import floor of ``tool_benchmark.py`` writes plain tables.

Data: ``tracker.synthetic`` (invented, deterministic). PostgreSQL: throwaway databases on ``--pg`` (default
127.0.0.1:5432, user postgres), dropped at the end. Profiling slows Python code down (about 1.5 × here), so
compare the listings with each other, not with the benchmark's timings.

Run: ``.venv/bin/python benchmarks/profile_steps.py --backend sqlite --patients 5000``.
"""

from __future__ import annotations

import argparse
import contextlib
import cProfile
import io
import os
import pstats
import resource
import sys
import tempfile
import time
from pathlib import Path

import tool_benchmark as bench

import tracker

# Our code: files under the installed ``tracker`` package (a plain "/tracker/" would also match a checkout
# that lives in a folder of that name, and with it every library of its virtual environment).
OURS = os.path.dirname(tracker.__file__) + os.sep  # as profiled code names its files


def _usage() -> tuple[float, float, int]:
    """(user CPU s, system CPU s, minor page faults) of this process so far."""
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime, usage.ru_stime, usage.ru_minflt


def _since(start: tuple[float, float, int], wall: float) -> str:
    """Wall time, CPU time and page faults since ``start`` (from :func:`_usage`), in words."""
    user, system, faults = _usage()
    return (
        f"wall {wall:.2f} s, CPU user {user - start[0]:.2f} s + system {system - start[1]:.2f} s, "
        f"{faults - start[2]:,} page faults"
    )


def _short(function: tuple[str, int, str]) -> str:
    """A profiled function as ``tracker/module.py:line name``, or ``file.py:line name`` for a library."""
    path, line, name = function
    if path.startswith(OURS):
        return f"tracker/{path[len(OURS) :]}:{line} {name}"
    if path == "~":
        return name
    return f"{Path(path).name}:{line} {name}"


def report(profile: cProfile.Profile, top: int) -> str:
    """Two listings: our functions by cumulative time (what each step of ours costs, callees included),
    and all functions by own time (where the processor actually is: often pandas or NumPy internals)."""
    table = pstats.Stats(profile).stats  # type: ignore[attr-defined]
    lines = ["", f"  our functions by cumulative time (top {top}; calls, own s, cumulative s):"]
    ours = sorted((i for i in table.items() if i[0][0].startswith(OURS)), key=lambda i: -i[1][3])[:top]
    lines += [f"    {p:>9,}  {own:7.3f}  {cum:7.3f}  {_short(f)}" for f, (_c, p, own, cum, _) in ours]
    lines += ["", f"  all functions by own time (top {top}; calls, own s, cumulative s):"]
    ranked = sorted(table.items(), key=lambda item: -item[1][2])[:top]
    lines += [f"    {p:>9,}  {own:7.3f}  {cum:7.3f}  {_short(f)}" for f, (_c, p, own, cum, _) in ranked]
    return "\n".join(lines)


def profile_import(url: str, files: list[str], top: int) -> str:
    """``ncs-tracker import`` of ``files`` into ``url`` under cProfile: timings and the two listings."""
    from tracker.cli import main

    profile = cProfile.Profile()
    out = io.StringIO()
    start, started = _usage(), time.perf_counter()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(out):
        profile.enable()
        try:
            main(["--db", url, "import", *files])
        except SystemExit as done:
            if done.code:
                raise SystemExit(f"import failed:\n{out.getvalue()[-2000:]}") from None
        finally:
            profile.disable()
    return f"import under cProfile: {_since(start, time.perf_counter() - started)}" + report(profile, top)


def profile_engine(url: str, top: int) -> str:
    """Load every visit of ``url``, then all six criteria sets over them under cProfile (nothing saved)."""
    from tracker.criteria import engine as criteria_engine
    from tracker.db.session import make_engine, make_session_factory
    from tracker.services.evaluation import load_frames
    from tracker.services.limit_sets import resolve

    engine = make_engine(url)
    try:
        with make_session_factory(engine)() as session:
            _info, limits = resolve(session, None)
            start, started = _usage(), time.perf_counter()
            visits, tests, sites = load_frames(session)
            loaded = f"load_frames ({len(visits):,} visits): {_since(start, time.perf_counter() - started)}"
    finally:
        engine.dispose()
    profile = cProfile.Profile()
    start, started = _usage(), time.perf_counter()
    profile.enable()
    criteria_engine.evaluate(visits, tests, sites, limits)
    profile.disable()
    ran = f"engine, six sets under cProfile: {_since(start, time.perf_counter() - started)}"
    return f"{loaded}\n{ran}" + report(profile, top)


PG_SHAPES = (
    ("plain columns", ""),
    ("+ check constraints", " INCLUDING CONSTRAINTS"),
    ("+ primary key and unique", " INCLUDING ALL"),
    ("+ foreign key (the real table)", " INCLUDING ALL"),
)
PG_KEYS = {
    "nerve_tests": "FOREIGN KEY (visit_id) REFERENCES visits (id) ON DELETE CASCADE",
    "stimulation_sites": "FOREIGN KEY (nerve_test_id) REFERENCES nerve_tests (id) ON DELETE CASCADE",
}


def schema_cost_postgresql(url: str) -> str:
    """Server time of ``COPY`` of the stored nerve tests and sites into new tables of growing shape."""
    import psycopg
    from sqlalchemy.engine import make_url

    parsed = make_url(url)
    lines = ["COPY of the stored rows into new tables of growing shape (best of 2):"]
    with psycopg.connect(
        host=parsed.host,
        port=parsed.port,
        user=parsed.username,
        password=parsed.password,
        dbname=parsed.database,
    ) as connection:
        for table, key in PG_KEYS.items():
            buffer = io.BytesIO()
            with connection.cursor().copy(f"COPY {table} TO STDOUT") as copy:
                for block in copy:
                    buffer.write(block)
            data = buffer.getvalue()
            rows = data.count(b"\n")
            for number, (label, including) in enumerate(PG_SHAPES):
                best = float("inf")
                for attempt in range(2):
                    target = f"shape_{table}_{number}_{attempt}"
                    with connection.cursor() as cursor:
                        cursor.execute(f"CREATE TABLE {target} (LIKE {table}{including})")
                        if number == len(PG_SHAPES) - 1:
                            cursor.execute(f"ALTER TABLE {target} ADD {key}")
                        started = time.perf_counter()
                        with cursor.copy(f"COPY {target} FROM STDIN") as copy:
                            copy.write(data)
                        best = min(best, time.perf_counter() - started)
                        cursor.execute(f"DROP TABLE {target}")
                lines.append(f"  {table:18s} {rows:>9,} rows  {label:32s} {best:6.2f} s")
        connection.rollback()
    return "\n".join(lines)


def schema_cost_sqlite(url: str, scratch: Path) -> str:
    """Time of ``executemany`` of the stored nerve tests and sites into new tables of growing shape."""
    import sqlite3

    source = sqlite3.connect(url.removeprefix("sqlite:///"))
    lines = ["executemany of the stored rows into new tables (best of 2):"]
    stored = {}
    for table in ("nerve_tests", "stimulation_sites"):
        ddl = source.execute("SELECT sql FROM sqlite_master WHERE name = ?", (table,)).fetchone()[0]
        columns = [row[1] for row in source.execute(f"PRAGMA table_info({table})")]
        stored[table] = (ddl, columns, source.execute(f"SELECT * FROM {table}").fetchall())
    source.close()
    plain = {t: f"CREATE TABLE {t} ({', '.join(stored[t][1])})" for t in stored}
    shapes = [
        ("plain columns", plain, False),
        ("+ keys, checks, unique (FK off)", {t: stored[t][0] for t in stored}, False),
        ("+ foreign keys on (the real tables)", {t: stored[t][0] for t in stored}, True),
    ]
    for label, ddl, keys_on in shapes:
        best = float("inf")
        for attempt in range(2):
            path = scratch / f"shape{attempt}.sqlite3"
            connection = sqlite3.connect(path)
            connection.execute("PRAGMA journal_mode=WAL")
            connection.execute("PRAGMA synchronous=NORMAL")
            connection.execute(f"PRAGMA foreign_keys={'ON' if keys_on else 'OFF'}")
            connection.execute("CREATE TABLE visits (id INTEGER PRIMARY KEY)")
            visit_ids = {row[stored["nerve_tests"][1].index("visit_id")] for row in stored["nerve_tests"][2]}
            connection.executemany("INSERT INTO visits VALUES (?)", [(v,) for v in visit_ids])
            for table in stored:
                connection.execute(ddl[table])
            connection.commit()
            started = time.perf_counter()
            for table, (_ddl, columns, rows) in stored.items():
                marks = ", ".join("?" * len(columns))
                connection.executemany(f"INSERT INTO {table} VALUES ({marks})", rows)
            connection.commit()
            best = min(best, time.perf_counter() - started)
            connection.close()
            for leftover in (path, Path(f"{path}-wal"), Path(f"{path}-shm")):
                leftover.unlink(missing_ok=True)
        counts = ", ".join(f"{len(stored[t][2]):,} {t}" for t in stored)
        lines.append(f"  {label:38s} {best:6.2f} s  ({counts})")
    return "\n".join(lines)


def main() -> None:
    """Generate the invented cohort, run the chosen steps, print their listings; drop every database."""
    parser = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    parser.add_argument("--backend", choices=["sqlite", "postgresql"], default="sqlite")
    parser.add_argument("--patients", type=int, default=500)
    parser.add_argument("--step", choices=["import", "engine", "schema"], action="append")
    parser.add_argument("--top", type=int, default=25, help="lines per listing (default 25)")
    parser.add_argument("--pg", default=bench.PG_ADMIN, help="PostgreSQL server (its maintenance database)")
    args = parser.parse_args()
    steps = args.step or ["import", "engine", "schema"]
    from tracker import synthetic

    with tempfile.TemporaryDirectory(prefix="ncs-profile-") as folder:
        scratch = Path(folder)
        databases = bench.Databases(args.backend, scratch, args.pg)
        try:
            files = [
                str(p) for p in synthetic.write_csv_files(scratch, list(synthetic.cohort(args.patients)))
            ]
            print(
                f"ncs-tracker step profiles — {args.backend}, {args.patients:,} invented patients "
                "(invented data)"
            )
            url = databases.migrated("profile")
            if "import" in steps:  # modules the command loads on first use: loaded before profiling
                (scratch / "warm").mkdir()
                warm = databases.migrated("warm")
                bench._cli(
                    [
                        "--db",
                        warm,
                        "import",
                        *map(str, synthetic.write_csv_files(scratch / "warm", list(synthetic.cohort(2)))),
                    ]
                )
                databases.drop(warm)
                print("\n" + profile_import(url, files, args.top))
            else:  # the other steps need the rows, imported without the profiler
                bench._cli(["--db", url, "import", *files])
            if "engine" in steps:
                print("\n" + profile_engine(url, args.top))
            if "schema" in steps:
                cost = (
                    schema_cost_sqlite(url, scratch)
                    if args.backend == "sqlite"
                    else schema_cost_postgresql(url)
                )
                print("\n" + cost)
        finally:
            databases.drop_all()
    sys.stdout.flush()


if __name__ == "__main__":
    main()
