"""Import against its floor, and import memory against the length of the files (issue 12, items 3 and 4).

Data: ``tracker.synthetic`` (deterministic, invented patients; measurements, treatments and scores files).
Measured in one run, each step in a fresh child process (this script with ``--child``), which times its
own work after its imports and reads its peak resident memory (``VmHWM``, reset at ``exec``):

* import: ``ncs-tracker import`` of the three files into a fresh database at the current schema;
* floor, SQLite: ``csv.reader`` and ``sqlite3.executemany`` of the same rows into one flat table per file
  (WAL, synchronous=NORMAL, as the tool); PostgreSQL: ``COPY … FROM STDIN (FORMAT csv)`` of the same
  files into one flat text table each — the floors of ``benchmarks/tool_benchmark.py``, copied;
* both ``--repeat`` times into fresh databases, best counts; the ratio import / floor (target ≤ 3);
* with ``--memory K``: the import of K × the patients, its peak memory against the best import's
  (target ≤ 1.5 for K = 10).

Run: ``.venv/bin/python benchmarks/import_benchmark.py --backend sqlite --patients 500 --memory 10``.
PostgreSQL: throwaway databases on ``--pg`` (default ``127.0.0.1:5432``, user postgres), dropped at the end.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

# The tool benchmark's floors, peak-memory reading and throwaway databases (one copy of each).
from benchmarks.tool_benchmark import (  # noqa: E402
    PG_ADMIN,
    Databases,
    _floor_copy,
    _floor_sqlite,
    _peak_mb,
)


def _import(url: str, files: list[str]) -> None:
    from tracker.cli import main

    out = io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(out):
        try:
            main(["--db", url, "import", *files])
            code = 0
        except SystemExit as done:
            code = int(done.code or 0)
    if code:
        raise SystemExit(f"ncs-tracker import failed ({code}):\n{out.getvalue()[-2000:]}")


def child(kind: str, target: str, files: list[str]) -> None:
    """One measured step; prints a JSON line: seconds of work (after the imports) and peak memory (MB)."""
    # Imported before the clock starts (a long-running clinic process has them loaded already), as the
    # children of benchmarks/tool_benchmark.py do, and Alembic, which every command's schema check imports.
    import pandas  # noqa: F401
    import sqlalchemy  # noqa: F401

    import tracker.cli  # noqa: F401
    import tracker.db.migrate  # noqa: F401  (the schema check's Alembic: 0.2–0.3 s to import, not import work)
    import tracker.services.evaluation  # noqa: F401
    import tracker.services.export  # noqa: F401
    import tracker.services.importing  # noqa: F401

    started = time.perf_counter()
    {"import": _import, "floor-sqlite": _floor_sqlite, "floor-copy": _floor_copy}[kind](target, files)
    print(json.dumps({"seconds": time.perf_counter() - started, "peak_mb": _peak_mb()}), flush=True)


def run_child(kind: str, target: str, files: list[str]) -> dict:
    command = [sys.executable, __file__, "--child", kind, target, *files]
    finished = subprocess.run(command, capture_output=True, text=True, cwd=ROOT)
    if finished.returncode != 0:
        raise SystemExit(f"step {kind} failed:\n{finished.stdout[-3000:]}{finished.stderr[-3000:]}")
    return json.loads(finished.stdout.strip().splitlines()[-1])


def _runs(reports: list[dict]) -> str:
    return ", ".join(f"{r['seconds']:.2f}" for r in reports)


def main() -> None:
    parser = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    parser.add_argument("--backend", choices=["sqlite", "postgresql"], default="sqlite")
    parser.add_argument("--patients", type=int, default=500, help="invented patients (default 500)")
    parser.add_argument("--repeat", type=int, default=3, help="imports and floors, best counts (default 3)")
    parser.add_argument("--memory", type=int, default=0, help="also import K × the patients (peak memory)")
    parser.add_argument("--pg", default=PG_ADMIN, help="PostgreSQL server (its maintenance database)")
    parser.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(args.child[0], args.child[1], args.child[2:])
        return
    from tracker import synthetic

    with tempfile.TemporaryDirectory(prefix="ncs-import-bench-") as scratch_name:
        scratch = Path(scratch_name)
        databases = Databases(args.backend, scratch, args.pg)
        try:
            files: dict[int, list[str]] = {}
            for count in [args.patients] + ([args.patients * args.memory] if args.memory else []):
                folder = scratch / f"files-{count}"
                folder.mkdir()
                written = synthetic.write_csv_files(folder, list(synthetic.cohort(count)))
                files[count] = [str(p) for p in written]
            size = sum(Path(f).stat().st_size for f in files[args.patients])
            imports, floors = [], []
            for _ in range(args.repeat):
                url = databases.migrated("import")
                imports.append(run_child("import", url, files[args.patients]))
                databases.drop(url)
                if args.backend == "sqlite":
                    floor_db = str(scratch / "floor.sqlite3")
                    floors.append(run_child("floor-sqlite", floor_db, files[args.patients]))
                    for leftover in (floor_db, floor_db + "-wal", floor_db + "-shm"):
                        Path(leftover).unlink(missing_ok=True)
                else:
                    floor_url = databases.new("floor")
                    floors.append(run_child("floor-copy", floor_url, files[args.patients]))
                    databases.drop(floor_url)
            best = min(imports, key=lambda r: r["seconds"])
            floor = min(f["seconds"] for f in floors)
            floor_name = "csv.reader + executemany" if args.backend == "sqlite" else "COPY (FORMAT csv)"
            print(
                f"import benchmark — {args.backend}, {args.patients:,} patients ({size / 1e6:.1f} MB of CSV)"
            )
            print(f"data: {synthetic.LABEL}")
            print(f"import: best {best['seconds']:.2f} s of {_runs(imports)}")
            print(f"floor ({floor_name}): best {floor:.2f} s of {_runs(floors)}")
            print(f"ratio import / floor: {best['seconds'] / floor:.2f} (target ≤ 3)")
            if args.memory:
                count = args.patients * args.memory
                url = databases.migrated("memory")
                large = run_child("import", url, files[count])
                databases.drop(url)
                print(
                    f"peak memory: {count:,} patients {large['peak_mb']:.0f} MB ({large['seconds']:.1f} s) "
                    f"against {args.patients:,} patients {best['peak_mb']:.0f} MB: ratio "
                    f"{large['peak_mb'] / best['peak_mb']:.2f} (target ≤ 1.5)"
                )
        finally:
            databases.drop_all()


if __name__ == "__main__":
    main()
