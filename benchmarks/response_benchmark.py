"""Treatment-response benchmark (issue 9, "Performance"), printed in one run:

1. Response for every patient of the 5,000-patient database against the time to load those patients'
   scores, treatments and measurements (target ≤ 2 ×). "Response" is ``cohort_response``: every patient's
   regimens classified by the default rule set, and the nerve conduction changes of each patient's latest
   study against the previous one (features of every nerve test, SDC verdicts, less-certain marks). It loads
   its own data, so the ratio includes the load itself.
2. The Patients page with its course column (AppTest, cold caches), 5,000 vs 10 patients (target ≤ 1.5 ×).
3. One printable report (PDF) of the demo patient DEMO-02, wall time in-process after imports (target ≤ 3 s).

The databases are the dashboard benchmark's invented cohorts (``benchmarks/dashboard_benchmark.py``, which
takes them from :mod:`tracker.synthetic`, the generator shared with the tests and the tool benchmark: codes
``SYN-…``, no identifiers), built once with ``--evaluate latest`` and cached.

Run: ``.venv/bin/python benchmarks/response_benchmark.py`` (``--repeat N``, ``--large
N``). Progress on stderr, results on stdout.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))

import dashboard_benchmark as bench  # noqa: E402  (its cached databases of tracker.synthetic cohorts)

APP = ROOT / "tracker" / "dashboard" / "app.py"


def load_seconds(url: str) -> float:
    """Read every patient's scores, treatments and measurements as the response analysis needs them."""
    from tracker.db.session import make_engine, make_session_factory
    from tracker.services.evaluation import load_frames
    from tracker.services.response.loading import scores_frame, treatment_periods, visit_dates

    engine = make_engine(url)
    try:
        with make_session_factory(engine)() as session:
            start = time.perf_counter()
            scores_frame(session)
            treatment_periods(session)
            visit_dates(session)
            load_frames(session)
            return time.perf_counter() - start
    finally:
        engine.dispose()


def response_seconds(url: str) -> tuple[float, str]:
    from tracker.db.session import make_engine, make_session_factory
    from tracker.services.response import cohort_response

    engine = make_engine(url)
    try:
        with make_session_factory(engine)() as session:
            start = time.perf_counter()
            course, changes = cohort_response(session)
            elapsed = time.perf_counter() - start
    finally:
        engine.dispose()
    counts = course["course"].value_counts().to_dict()
    return elapsed, f"{len(course):,} patients: " + ", ".join(
        f"{k} {v:,}" for k, v in sorted(counts.items())
    ) + f"; {len(changes):,} nerve changes"


def patients_page_seconds(url: str) -> float:
    """One cold run of the Patients page (the default page); raises if it failed or shows no course column."""
    import streamlit as st
    from streamlit.testing.v1 import AppTest

    from tracker.dashboard import state

    bench.quiet_streamlit()
    os.environ["NCS_TRACKER_DB"] = url
    at = AppTest.from_file(str(APP), default_timeout=300)
    at.run()
    bench.quiet_streamlit()
    st.cache_data.clear()
    st.cache_resource.clear()
    state._engine(url)
    start = time.perf_counter()
    at.run()
    elapsed = time.perf_counter() - start
    if len(at.exception):
        raise RuntimeError(f"patients page raised: {at.exception[0].message}")
    frames = [f.value for f in at.dataframe]
    if not any(any("course" in str(c).lower() for c in frame.columns) for frame in frames):
        raise RuntimeError("the patients page shows no course column")
    return elapsed


def report_seconds() -> float:
    from tracker.db import migrate
    from tracker.db.session import make_engine, make_session_factory
    from tracker.report import build, render, write_private  # the printable report (issue 9, point 6)
    from tracker.services.importing import import_file

    def write_report(
        session, code: str, out: Path
    ) -> None:  # what `ncs-tracker report CODE --out FILE.pdf` does
        write_private(out, render(build(session, code), "pdf"), overwrite=False)

    with tempfile.TemporaryDirectory(prefix="ncs-bench-report-") as scratch:
        url = f"sqlite:///{scratch}/demo.sqlite3"
        migrate.upgrade(url)
        engine = make_engine(url)
        sessions = make_session_factory(engine)
        with sessions.begin() as session:
            for name in ("measurements.csv", "treatments.csv", "scores.csv"):
                import_file(session, ROOT / "demo_data" / name, username="benchmark")
        times = []
        for attempt in range(4):
            out = Path(scratch) / f"report{attempt}.pdf"
            start = time.perf_counter()
            with sessions.begin() as session:
                write_report(session, "DEMO-02", out)
            times.append(time.perf_counter() - start)
        engine.dispose()
    bench.progress(
        f"[report] first (imports included) {times[0]:.2f} s; then {', '.join(f'{t:.2f}' for t in times[1:])}"
    )
    return statistics.median(times[1:])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--large", type=int, default=bench.LARGE_PATIENTS)
    parser.add_argument("--skip-page", action="store_true")
    parser.add_argument("--skip-report", action="store_true")
    args = parser.parse_args()
    urls = {
        # Named as the dashboard benchmark names them (size and evaluation mode), so the two share a cache
        # and a database with only the latest visits evaluated never stands in for a fully evaluated one.
        name: bench.build_database(f"{name}-{count}-eval-latest", count, evaluate="latest", rebuild=False)
        for name, count in (("small", bench.SMALL_PATIENTS), ("large", args.large))
    }
    from tracker.db import migrate

    for url in urls.values():  # a cached database from an earlier schema is brought up to date first
        migrate.upgrade(url)
    lines = []
    load_seconds(urls["large"])  # warm the file cache and the imports once, untimed
    load = [load_seconds(urls["large"]) for _ in range(args.repeat)]
    response = []
    for _ in range(args.repeat):
        elapsed, summary = response_seconds(urls["large"])
        response.append(elapsed)
    ratio = statistics.median(response) / statistics.median(load)
    lines.append(f"response for every patient (large database, {summary})")
    lines.append(
        f"  load scores + treatments + measurements: median {statistics.median(load):.2f} s (runs "
        f"{', '.join(f'{t:.2f}' for t in load)})"
    )
    lines.append(
        f"  cohort response (load included):         median {statistics.median(response):.2f} s (runs "
        f"{', '.join(f'{t:.2f}' for t in response)})"
    )
    lines.append(f"  ratio response / load: {ratio:.2f} (target ≤ 2)")
    if not args.skip_page:
        for name in urls:
            bench.progress(f"[page] warm-up on {name}: {patients_page_seconds(urls[name]):.2f} s")
        pages: dict[str, list[float]] = {name: [] for name in urls}
        for attempt in range(args.repeat):
            for name in list(urls) if attempt % 2 == 0 else list(reversed(urls)):
                pages[name].append(patients_page_seconds(urls[name]))
        small, large = statistics.median(pages["small"]), statistics.median(pages["large"])
        lines.append(
            f"patients page with the course column (AppTest, cold caches): small {small:.2f} s (runs "
            f"{', '.join(f'{t:.2f}' for t in pages['small'])}); large {large:.2f} s (runs "
            f"{', '.join(f'{t:.2f}' for t in pages['large'])})"
        )
        lines.append(f"  ratio large / small: {large / small:.2f} (target ≤ 1.5)")
    if not args.skip_report:
        lines.append(
            f"one report (PDF, DEMO-02, in-process, median of 3 after a first run): {report_seconds():.2f} s "
            "(target ≤ 3 s)"
        )
    print("\n".join(lines))


if __name__ == "__main__":
    main()
