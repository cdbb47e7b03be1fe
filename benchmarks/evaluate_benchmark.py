"""Time `evaluate` (saving every visit's evaluation against every criteria set) on a generated cohort.

Invented data from the criteria benchmark's generator. Run: `.venv/bin/python
benchmarks/evaluate_benchmark.py` (`--patients N --visits M`). Prints the first evaluation
(everything computed and saved) and a second one (nothing changed: fingerprints compared
only), and the mean size of a saved trace.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from sqlalchemy import func, select  # noqa: E402

from benchmarks.criteria_benchmark import write_file  # noqa: E402
from tracker.db import migrate  # noqa: E402
from tracker.db.models import Evaluation  # noqa: E402
from tracker.db.session import make_engine, make_session_factory  # noqa: E402
from tracker.services.evaluation import refresh_evaluations  # noqa: E402
from tracker.services.importing import import_file  # noqa: E402


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--patients", type=int, default=1000)
    parser.add_argument("--visits", type=int, default=5)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "cohort.csv"
        write_file(path, args.patients, args.visits)
        url = f"sqlite:///{Path(folder) / 'cohort.sqlite3'}"
        migrate.upgrade(url)
        engine = make_engine(url)
        sessions = make_session_factory(engine)
        with sessions.begin() as session:
            import_file(session, path, username="benchmark")
        for label in ("first evaluate (compute and save all)", "second evaluate (nothing changed)"):
            started = time.perf_counter()
            with sessions.begin() as session:
                counts = refresh_evaluations(session, username="benchmark")
            print(
                f"{label}: {time.perf_counter() - started:.1f} s — {counts['visits']:,} visits, "
                f"{counts['recomputed']:,} saved, {counts['unchanged']:,} unchanged"
            )
        with sessions() as session:
            size = session.scalar(select(func.avg(func.length(Evaluation.result))))
        print(f"mean saved trace: {size / 1000:.1f} kB")
        engine.dispose()


if __name__ == "__main__":
    main()
