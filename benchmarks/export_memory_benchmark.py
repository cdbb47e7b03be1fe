"""Peak memory of the research export: 10 × the patients (about 100,000 visits) against 1 × (about 10,000
visits); target ratio ≤ 1.5.

Two SQLite databases of invented patients (:mod:`tracker.synthetic`, the generator shared with the tests and
the other benchmarks: 3–8 visits per patient, 7 nerve tests per visit) are built with the tool's own
importer, in a process of their own, and cached in a temporary folder (``$TMPDIR/ncs-export-benchmark-v2``;
delete it to rebuild).
Then a lean measuring process (it imports neither pandas nor the tool: on Linux a child's max RSS starts
from its parent's RSS at fork time) runs each export in a fresh child (``ncs-tracker``'s service, every
criteria set, default chunk size) and reads that child's peak resident memory (max RSS) from ``os.wait4``;
``resource.getrusage(RUSAGE_CHILDREN)`` of the measuring process (the largest of its children, which are
only the exports) is printed beside it. The children also report the peak of Python-level allocations
traced by ``tracemalloc`` when ``--tracemalloc`` is given (it slows the export down several-fold, so it is
off by default).

Run: ``python benchmarks/export_memory_benchmark.py [--patients 1800] [--level nerve] [--format parquet]
[--tracemalloc]``.
The benchmark is not part of the test suite; its figures are printed as measured.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

PATIENTS = 1_800  # the small cohort (about 10,000 visits); the large one has 10 × as many patients
ROOT = Path(__file__).resolve().parent.parent
# v2: tracker.synthetic cohorts (v1 used the import benchmark's generator); a new folder, never the old files.
CACHE = Path(tempfile.gettempdir()) / "ncs-export-benchmark-v2"


def database_for(patients: int) -> Path:
    """The cached database of the first ``patients`` invented patients, built on first use."""
    sys.path.insert(0, str(ROOT))
    from tracker import synthetic
    from tracker.db import migrate
    from tracker.db.session import make_engine, make_session_factory
    from tracker.services.importing import import_file

    CACHE.mkdir(parents=True, exist_ok=True)
    path = CACHE / f"patients{patients}.sqlite3"
    done = path.with_suffix(".complete")
    if path.exists() and done.exists():
        return path
    for leftover in (path, path.with_name(path.name + "-wal"), path.with_name(path.name + "-shm")):
        leftover.unlink(missing_ok=True)
    started = time.perf_counter()
    folder = CACHE / f"files{patients}"
    folder.mkdir(exist_ok=True)
    files = synthetic.write_csv_files(folder, list(synthetic.cohort(patients)))
    url = f"sqlite:///{path}"
    migrate.upgrade(url)
    engine = make_engine(url)
    with make_session_factory(engine).begin() as session:
        for file in files:
            import_file(session, file, username="benchmark")
    engine.dispose()
    for file in files:
        file.unlink()
    folder.rmdir()
    done.write_text(f"{patients} patients\n", encoding="utf-8")
    print(f"built {path.name}: {patients:,} patients in {time.perf_counter() - started:.0f} s", flush=True)
    return path


def child(database: Path, out: Path, level: str, file_format: str, trace: bool) -> None:
    """Run one export and print a JSON line with what it wrote (runs in a fresh process)."""
    if trace:
        import tracemalloc

        tracemalloc.start()
    from tracker.db.session import make_engine, make_session_factory
    from tracker.services.export import write_export
    from tracker.services.export.tables import ExportOptions

    started = time.perf_counter()
    engine = make_engine(f"sqlite:///{database}")
    with make_session_factory(engine).begin() as session:
        result = write_export(
            session,
            ExportOptions(level=level),
            file_format=file_format,
            out=f"{out}/",
            username="benchmark",
            overwrite=True,
        )
    engine.dispose()
    report = {
        "visits": result.visits,
        "rows": result.rows,
        "seconds": time.perf_counter() - started,
        "bytes": result.files[0].size,
        "chunk_visits": result.manifest["chunk_visits"],
    }
    if trace:
        report["tracemalloc_peak_mb"] = tracemalloc.get_traced_memory()[1] / 2**20
    print(json.dumps(report), flush=True)


def measure(database: Path, level: str, file_format: str, trace: bool) -> dict:
    out = CACHE / f"out-{database.stem}"
    command = [sys.executable, __file__, "--child", str(database), str(out), level, file_format] + (
        ["--tracemalloc"] if trace else []
    )
    process = subprocess.Popen(command, stdout=subprocess.PIPE, text=True)
    output = process.stdout.read()
    _, status, usage = os.wait4(process.pid, 0)
    process.returncode = os.waitstatus_to_exitcode(status)
    if process.returncode != 0:
        raise SystemExit(f"export of {database.name} failed with exit code {process.returncode}")
    report = json.loads(output.strip().splitlines()[-1])
    report["max_rss_mb"] = usage.ru_maxrss / 1024  # Linux: kilobytes
    return report


def _run(arguments: list[str]) -> None:
    """Run this script again with ``arguments`` in a fresh process; stop if it fails."""
    finished = subprocess.run([sys.executable, __file__, *arguments])
    if finished.returncode != 0:
        raise SystemExit(f"{' '.join(arguments)} failed with exit code {finished.returncode}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--level", default="nerve", choices=["visit", "nerve", "segment", "long"])
    parser.add_argument("--format", dest="file_format", default="parquet", choices=["csv", "parquet", "xlsx"])
    parser.add_argument(
        "--tracemalloc", action="store_true", help="also trace Python allocations in the children (slow)"
    )
    parser.add_argument(
        "--patients",
        type=int,
        default=PATIENTS,
        help=f"patients of the small database; the large one has 10 × as many (default {PATIENTS:,})",
    )
    parser.add_argument("--build", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--measure", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument(
        "--child", nargs=4, metavar=("DATABASE", "OUT", "LEVEL", "FORMAT"), help=argparse.SUPPRESS
    )
    args = parser.parse_args()
    if args.patients < 1:
        parser.error("--patients must be at least 1")
    sizes = (args.patients, 10 * args.patients)
    if args.child:
        database, out, level, file_format = args.child
        child(Path(database), Path(out), level, file_format, args.tracemalloc)
        return
    if args.build:
        for size in sizes:
            database_for(size)
        return
    if not args.measure:
        _run(["--build", "--patients", str(args.patients)])
        _run(
            [
                "--measure",
                "--patients",
                str(args.patients),
                "--level",
                args.level,
                "--format",
                args.file_format,
            ]
            + (["--tracemalloc"] if args.tracemalloc else [])
        )
        return
    databases = {size: CACHE / f"patients{size}.sqlite3" for size in sizes}
    print(
        "measuring process max RSS before the exports: "
        f"{resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB",
        flush=True,
    )
    results = {}
    for size, database in databases.items():
        report = measure(database, args.level, args.file_format, args.tracemalloc)
        results[size] = report
        traced = (
            f", tracemalloc peak {report['tracemalloc_peak_mb']:.0f} MB"
            if "tracemalloc_peak_mb" in report
            else ""
        )
        print(
            f"{size:>7,} patients, {report['visits']:,} visits: level {args.level}, {args.file_format}, "
            f"{report['rows']:,} rows, "
            f"{report['bytes'] / 1e6:.1f} MB written in {report['seconds']:.1f} s (chunks of "
            f"{report['chunk_visits']:,} visits); child max RSS {report['max_rss_mb']:.0f} MB{traced}",
            flush=True,
        )
    children = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    print(f"getrusage(RUSAGE_CHILDREN).ru_maxrss (largest child): {children:.0f} MB")
    small, large = (results[size] for size in sizes)
    print(f"ratio max RSS 10 × / 1 ×: {large['max_rss_mb'] / small['max_rss_mb']:.2f} (target ≤ 1.5)")
    if "tracemalloc_peak_mb" in small:
        print(
            "ratio tracemalloc peak 10 × / 1 ×: "
            f"{large['tracemalloc_peak_mb'] / small['tracemalloc_peak_mb']:.2f}"
        )


if __name__ == "__main__":
    main()
