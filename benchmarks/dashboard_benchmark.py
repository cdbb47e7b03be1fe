"""Dashboard benchmark: does the follow-up page scale with the size of the database, and how fast does a
browser draw it? Two measurements, printed in one run (issue 4, "Performance").

1. Follow-up page time against database size. Two SQLite databases are built: "small" (10 patients) and
   "large" (5,000 patients) of invented patients from :mod:`tracker.synthetic` (the generator shared with
   the tests and the tool benchmark). In both, the followed patient ``SYN-TARGET`` has the same 30 visits
   (about every 3 months; 7 motor and sensory nerve tests per visit: median, ulnar, fibular and tibial motor
   with 2–3 stimulation sites, median, ulnar and sural sensory with one) plus treatments and clinical
   scores; every other patient has 3–8 visits with the same nerve layout. The data are written as
   interchange CSV files (DESIGN.md §4.1–4.2), loaded with the tool's importer and evaluated against every
   criteria set (``refresh_evaluations``), as in a clinic database. Both databases are cached under the
   temporary folder, keyed by :data:`VERSION`, so a second run starts at once. The first build of the large
   one takes many minutes on 2 cores, nearly all of it the evaluations (``--evaluate latest`` saves only the
   target's and each patient's latest visit: a quick build).

   The page is timed with Streamlit's ``AppTest``: a fresh app for each run, the patient chosen in the
   shared session state, one run of the default page, ``switch_page`` to the follow-up page, then every
   ``st.cache_data`` and ``st.cache_resource`` entry is cleared and the database engine alone is created
   again, untimed (engine creation and the schema check are a fixed cost per process, not page work),
   and the follow-up ``run()`` is timed: a cold page for that patient. A timing counts only when the page
   raised no exception, showed no error, drew a Plotly chart and names the target with its 30 visits.
   Runs alternate small/large to spread machine noise; the medians and their ratio are printed (target:
   large / small ≤ 1.5). For information, the services the page calls are also timed directly on both
   databases, to show where any difference comes from.

2. Browser draw time. The demo database is built from ``demo_data/``, ``ncs-tracker serve`` is started on
   a free local port, and Debian's Chromium (``/usr/bin/chromium``, driven by Playwright; never a downloaded
   browser) opens ``/follow-up`` for the demo patient: the time from ``goto`` to the first drawn Plotly line
   is measured, one warm-up load then 5 timed loads, each in a new browser context (target: under 3 s).
   The server is stopped by its process id at the end, also on errors.

All patients, visits and values are invented (:mod:`tracker.synthetic`: every patient's random generator
starts from its code); codes are artificial (``SYN-00001`` …) and no names or identifiers appear anywhere.

Run: ``.venv/bin/python benchmarks/dashboard_benchmark.py`` (options: ``--repeat``, ``--large``,
``--evaluate``, ``--skip-browser``, ``--rebuild``). Progress goes to stderr, results to stdout; the last
lines are a summary to paste into a note.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import itertools
import os
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
from collections.abc import Callable
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from tracker import synthetic  # noqa: E402  (the invented cohort shared with the tests and other benchmarks)

APP = ROOT / "tracker" / "dashboard" / "app.py"
# Change it whenever the data change (v4: tracker.synthetic instead of this script's own generator): the
# cached databases of an older version are then never reused.
VERSION = "dashboard-bench-v4"
CACHE = Path(tempfile.gettempdir()) / f"ncs-tracker-benchmark-{VERSION}"
TARGET = synthetic.TARGET
TARGET_VISITS = synthetic.TARGET_VISITS
SMALL_PATIENTS, LARGE_PATIENTS = 10, 5000
CHUNK = 250  # patients per imported file (progress, and memory of one all-or-nothing import)
DEMO_PATIENT = "DEMO-01"
CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
    "--disable-quic",
]
PLOT_LINE = ".js-plotly-plot .scatterlayer path.js-line"

# -- building the databases ----------------------------------------------------------------------------------


def progress(text: str) -> None:
    print(text, file=sys.stderr, flush=True)


def database_path(name: str) -> Path:
    return CACHE / f"{name}.sqlite3"


def build_database(name: str, patients_total: int, *, evaluate: str, rebuild: bool) -> str:
    """The cached database of ``patients_total`` patients (the target and ``patients_total − 1`` others).

    ``evaluate``: ``all`` saves the evaluation of every visit against every criteria set (what
    ``ncs-tracker evaluate`` leaves in a clinic database); ``latest`` only the target's visits and each
    other patient's latest visit (what the patient list shows), a much quicker first build.
    """
    from sqlalchemy import select

    from tracker.db import migrate
    from tracker.db.models import Visit
    from tracker.db.session import make_engine, make_session_factory
    from tracker.services.evaluation import refresh_evaluations
    from tracker.services.importing import import_file
    from tracker.services.records import find_patient

    path = database_path(name)
    done = path.with_suffix(".complete")
    url = f"sqlite:///{path}"
    if done.exists() and path.exists() and not rebuild:
        progress(f"[{name}] cached database: {path}")
        return url
    CACHE.mkdir(parents=True, exist_ok=True)
    for leftover in (done, path, path.with_name(path.name + "-wal"), path.with_name(path.name + "-shm")):
        leftover.unlink(missing_ok=True)
    started = time.perf_counter()
    progress(
        f"[{name}] building {patients_total:,} invented patients into {path} (evaluations: {evaluate} visits)"
    )
    migrate.upgrade(url)
    engine = make_engine(url)
    sessions = make_session_factory(engine)
    # Every patient's values depend only on its code (tracker.synthetic), so the small database is a
    # prefix of the large one and the target is the same in both.
    patients = synthetic.cohort(patients_total)
    imported = 0
    with tempfile.TemporaryDirectory(prefix="ncs-bench-files-") as scratch:
        for number in itertools.count(1):
            group = list(itertools.islice(patients, CHUNK))
            if not group:
                break
            folder = Path(scratch) / f"part{number:03d}"
            folder.mkdir()
            files = synthetic.write_csv_files(folder, group)
            with sessions.begin() as session:
                for file in files:
                    import_file(session, file, username="benchmark")
            imported += len(group)
            progress(
                f"[{name}] imported {imported:,}/{patients_total:,} patients "
                f"({time.perf_counter() - started:.0f} s)"
            )
    with sessions() as session:
        visits = session.execute(
            select(Visit.id, Visit.patient_id, Visit.visit_date).order_by(Visit.id)
        ).all()
        target_id = find_patient(session, TARGET).id
    if evaluate == "latest":
        latest = {v.patient_id: v for v in sorted(visits, key=lambda v: v.visit_date)}
        visit_ids = sorted(
            {v.id for v in visits if v.patient_id == target_id} | {v.id for v in latest.values()}
        )
    else:
        visit_ids = [v.id for v in visits]
    step = 500
    for start in range(0, len(visit_ids), step):
        with sessions.begin() as session:
            refresh_evaluations(session, visit_ids=visit_ids[start : start + step], username="benchmark")
        progress(
            f"[{name}] evaluated {min(start + step, len(visit_ids)):,}/{len(visit_ids):,} visits "
            f"({time.perf_counter() - started:.0f} s)"
        )
    engine.dispose()
    done.write_text(
        f"{VERSION}, evaluations of {evaluate} visits, built in {time.perf_counter() - started:.0f} s\n",
        encoding="utf-8",
    )
    return url


def database_counts(url: str) -> dict[str, int]:
    from sqlalchemy import func, select

    from tracker.db.models import (
        Evaluation,
        NerveTest,
        OutcomeScore,
        StimulationSite,
        Treatment,
        Visit,
    )
    from tracker.db.models import (
        Patient as PatientRow,
    )
    from tracker.db.session import make_engine, make_session_factory

    engine = make_engine(url)
    try:
        with make_session_factory(engine)() as session:
            tables = {
                "patients": PatientRow,
                "visits": Visit,
                "nerve tests": NerveTest,
                "stimulation sites": StimulationSite,
                "treatments": Treatment,
                "scores": OutcomeScore,
                "saved evaluations": Evaluation,
            }
            return {
                label: int(session.scalar(select(func.count()).select_from(model)))
                for label, model in tables.items()
            }
    finally:
        engine.dispose()


def target_fingerprint(url: str) -> tuple:
    """The target's stored values (to check they are the same in both databases)."""
    from tracker.db.session import make_engine, make_session_factory
    from tracker.services.records import patient_record

    engine = make_engine(url)
    try:
        with make_session_factory(engine)() as session:
            record = patient_record(session, TARGET)
            return (record.visits, record.treatments, record.scores)
    finally:
        engine.dispose()


# -- 1. the follow-up page with AppTest ----------------------------------------------------------------------


def quiet_streamlit() -> None:
    """AppTest outside ``streamlit run`` warns about the missing runtime whenever this script itself calls a
    cached function (the untimed engine); those warnings are not results. Errors still show."""
    from streamlit import logger

    logger.set_log_level("error")


def follow_up_seconds(url: str) -> float:
    """One cold run of the follow-up page for the target patient; raises if the page failed."""
    import streamlit as st
    from streamlit.testing.v1 import AppTest

    from tracker.dashboard import state

    quiet_streamlit()
    os.environ["NCS_TRACKER_DB"] = url
    at = AppTest.from_file(str(APP), default_timeout=120)
    at.session_state[state.PATIENT_KEY] = TARGET
    at.run()
    at.switch_page("views/follow_up.py")
    quiet_streamlit()  # after a run: the first run reads Streamlit's configuration, which resets the level
    st.cache_data.clear()
    st.cache_resource.clear()
    state._engine(url)  # the engine (and its schema check) again, untimed: page work only below
    start = time.perf_counter()
    at.run()
    elapsed = time.perf_counter() - start
    if len(at.exception):
        raise RuntimeError(f"follow-up page raised: {at.exception[0].message}")
    if len(at.error):
        raise RuntimeError(f"follow-up page showed an error: {at.error[0].value}")
    if not at.get("plotly_chart"):
        raise RuntimeError("follow-up page drew no Plotly chart")
    markdown = " ".join(str(m.value) for m in at.markdown)
    if TARGET not in markdown or f"{TARGET_VISITS} visits" not in markdown:
        raise RuntimeError("follow-up page does not show the target patient's 30 visits")
    return elapsed


def median_text(times: list[float]) -> str:
    return f"median {statistics.median(times):.2f} s (runs {', '.join(f'{t:.2f}' for t in times)})"


def page_benchmark(urls: dict[str, str], repeat: int) -> dict[str, list[float]]:
    times: dict[str, list[float]] = {name: [] for name in urls}
    for name, url in urls.items():
        progress(
            f"[page] warm-up (imports, not counted) on the {name} database: {follow_up_seconds(url):.2f} s"
        )
    for attempt in range(repeat):
        for name in list(urls) if attempt % 2 == 0 else list(reversed(urls)):
            times[name].append(follow_up_seconds(urls[name]))
            progress(f"[page] run {attempt + 1}/{repeat} {name}: {times[name][-1]:.2f} s")
    return times


def timed(function: Callable[[], object], repeat: int = 3) -> float:
    samples = []
    for _ in range(repeat):
        start = time.perf_counter()
        function()
        samples.append(time.perf_counter() - start)
    return statistics.median(samples)


def service_breakdown(urls: dict[str, str]) -> list[tuple[str, dict[str, float]]]:
    """The reads the follow-up page makes, called directly (median of 3 each), on every database."""
    from sqlalchemy import select

    from tracker.criteria.model import Settings
    from tracker.db.models import Visit
    from tracker.db.session import make_engine, make_session_factory
    from tracker.services import preferences
    from tracker.services.evaluation import load_frames
    from tracker.services.follow_up import follow_up
    from tracker.services.limit_sets import list_limit_sets
    from tracker.services.records import find_patient, patient_codes

    rows: dict[str, dict[str, float]] = {}
    for name, url in urls.items():
        engine = make_engine(url)
        try:
            with make_session_factory(engine)() as session:
                patient = find_patient(session, TARGET)
                visit_ids = list(session.scalars(select(Visit.id).where(Visit.patient_id == patient.id)))
                calls: dict[str, Callable[[], object]] = {
                    "records.patient_codes (patient picker)": lambda: patient_codes(session),
                    "limit_sets.list_limit_sets (limits picker)": lambda: list_limit_sets(session),
                    "preferences (clinic settings)": lambda: (
                        preferences.default_criteria(session),
                        preferences.cold_limbs(session),
                    ),
                    "evaluation.load_frames (target's visits)": lambda: load_frames(session, visit_ids),
                    "follow_up.follow_up (whole service)": lambda: follow_up(
                        session, TARGET, parameter="cv", settings=Settings()
                    ),
                }
                for label, call in calls.items():
                    rows.setdefault(label, {})[name] = timed(call)
                session.rollback()
        finally:
            engine.dispose()
    return list(rows.items())


# -- 2. the browser ------------------------------------------------------------------------------------------


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def wait_healthy(port: int, process: subprocess.Popen, timeout: float = 90) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError(f"the dashboard server stopped early with exit code {process.returncode}")
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{port}/_stcore/health", timeout=2) as answer:
                if answer.read().decode().strip() == "ok":
                    return
        except OSError:
            pass
        time.sleep(0.3)
    raise RuntimeError(f"the dashboard did not answer on port {port} within {timeout:.0f} s")


def stop_server(process: subprocess.Popen) -> None:
    """Stop the server we started: its own process group (``ncs-tracker serve`` and the Streamlit child)."""
    if process.poll() is None or _group_alive(process.pid):
        for sent, wait in ((signal.SIGINT, 10), (signal.SIGTERM, 5), (signal.SIGKILL, 5)):
            with contextlib.suppress(ProcessLookupError):
                os.killpg(process.pid, sent)
            try:
                process.wait(wait)
            except subprocess.TimeoutExpired:
                continue
            deadline = time.monotonic() + wait
            while _group_alive(process.pid) and time.monotonic() < deadline:
                time.sleep(0.2)
            if not _group_alive(process.pid):
                break


def _group_alive(group: int) -> bool:
    try:
        os.killpg(group, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def browser_benchmark(repeat: int) -> tuple[list[float] | None, str]:
    """(timed loads or None, a line saying what was done or why it was skipped)."""
    if not CHROMIUM.exists():
        return None, f"browser part skipped: {CHROMIUM} is absent (install Debian's chromium package)"
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        return None, "browser part skipped: the playwright package is not installed in this environment"
    from tracker.db.session import make_session_factory
    from tracker.services.demo import build_demo_database
    from tracker.services.evaluation import refresh_evaluations

    with tempfile.TemporaryDirectory(prefix="ncs-bench-demo-") as folder:
        path = Path(folder) / "demo.sqlite3"
        engine, _ = build_demo_database(path, username="benchmark")
        with make_session_factory(engine).begin() as session:
            refresh_evaluations(session, username="benchmark")
        engine.dispose()
        url, port = f"sqlite:///{path}", free_port()
        command = [sys.executable, "-m", "tracker", "--db", url, "serve", "--port", str(port)]
        log = Path(folder) / "server.log"
        with open(log, "wb") as output:
            process = subprocess.Popen(
                command, cwd=ROOT, stdout=output, stderr=subprocess.STDOUT, start_new_session=True
            )
        try:
            wait_healthy(port, process)
            progress(f"[browser] server up on port {port} (pid {process.pid})")
            address = f"http://127.0.0.1:{port}/follow-up"
            times: list[float] = []
            with sync_playwright() as p:
                browser = p.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
                version = browser.version
                try:
                    for attempt in range(repeat + 1):
                        context = browser.new_context(viewport={"width": 1400, "height": 1000})
                        page = context.new_page()
                        start = time.perf_counter()
                        page.goto(address)
                        page.locator(PLOT_LINE).first.wait_for(state="visible", timeout=60_000)
                        elapsed = time.perf_counter() - start
                        if DEMO_PATIENT not in page.inner_text("body"):
                            raise RuntimeError(f"the follow-up page does not show {DEMO_PATIENT}")
                        context.close()
                        if attempt == 0:
                            progress(f"[browser] warm-up load (not counted): {elapsed:.2f} s")
                        else:
                            times.append(elapsed)
                            progress(f"[browser] load {attempt}/{repeat}: {elapsed:.2f} s")
                finally:
                    browser.close()
        except Exception:
            progress(f"[browser] server log:\n{log.read_text(encoding='utf-8', errors='replace')[-3000:]}")
            raise
        finally:
            stop_server(process)
    return times, f"browser (Debian chromium {version}, Playwright, demo patient {DEMO_PATIENT})"


# -- main ----------------------------------------------------------------------------------------------------


def main() -> None:
    parser = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    parser.add_argument(
        "--repeat", type=int, default=5, help="timed runs per database and browser loads (default 5)"
    )
    parser.add_argument(
        "--large",
        type=int,
        default=LARGE_PATIENTS,
        help=f"patients in the large database (default {LARGE_PATIENTS})",
    )
    parser.add_argument("--skip-browser", action="store_true", help="measure the AppTest part only")
    parser.add_argument("--rebuild", action="store_true", help="rebuild the cached databases")
    parser.add_argument(
        "--evaluate",
        choices=["all", "latest"],
        default="all",
        help="saved evaluations in the generated databases: of every visit (default; the first build of the "
        "large database then takes long) or of the target's visits and each patient's latest visit only",
    )
    args = parser.parse_args()
    started = time.perf_counter()

    names = {"small": SMALL_PATIENTS, "large": args.large}
    urls = {
        name: build_database(
            f"{name}-{count}-eval-{args.evaluate}", count, evaluate=args.evaluate, rebuild=args.rebuild
        )
        for name, count in names.items()
    }
    if target_fingerprint(urls["small"]) != target_fingerprint(urls["large"]):
        raise SystemExit(f"{TARGET} differs between the two databases; rebuild with --rebuild")
    counts = database_counts(urls["large"])

    times = page_benchmark(urls, args.repeat)
    breakdown = service_breakdown(urls)
    if args.skip_browser:
        browser_times, browser_line = None, "browser part skipped: --skip-browser was given"
    else:
        browser_times, browser_line = browser_benchmark(args.repeat)

    small, large = (statistics.median(times[name]) for name in ("small", "large"))
    ratio = large / small
    out = io.StringIO()
    size = Path(urls["large"].removeprefix("sqlite:///")).stat().st_size / 1e9
    print(
        "large database (for information): "
        f"{', '.join(f'{value:,} {label}' for label, value in counts.items())}; file {size:.2f} GB",
        file=out,
    )
    print(
        f"target patient {TARGET}: {TARGET_VISITS} visits × {synthetic.NERVE_TESTS_PER_VISIT} nerve tests, "
        "identical in both databases",
        file=out,
    )
    print("services called by the follow-up page, timed directly (median of 3):", file=out)
    for label, by_db in breakdown:
        print(
            f"  {label:<46} small {by_db['small'] * 1000:8.1f} ms   large {by_db['large'] * 1000:8.1f} ms",
            file=out,
        )
    print("--- summary ---", file=out)
    print(
        "follow-up page (AppTest, cold caches, engine created untimed): "
        f"small db {names['small']:,} patients: {median_text(times['small'])}; "
        f"large db {names['large']:,} patients: {median_text(times['large'])}",
        file=out,
    )
    print(f"ratio large/small: {ratio:.2f} (target ≤ 1.5){'' if ratio <= 1.5 else ' — MISSED'}", file=out)
    if browser_times:
        verdict = "" if statistics.median(browser_times) < 3 else " — MISSED"
        print(
            f"{browser_line}: page to plot drawn {median_text(browser_times)} (target < 3 s){verdict}",
            file=out,
        )
    else:
        print(browser_line, file=out)
    print(f"whole benchmark: {time.perf_counter() - started:.0f} s on {os.cpu_count()} cores", file=out)
    print(out.getvalue(), end="")


if __name__ == "__main__":
    main()
