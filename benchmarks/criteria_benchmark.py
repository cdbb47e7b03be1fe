"""Criteria engine throughput: every criteria set over 10,000 visits × 8 nerves in one vectorised pass,
against the time to load the same rows from SQLite into DataFrames. Target: evaluation ≤ 2 × load.

The study data are invented (a fixed random generator), written as a measurements CSV and imported with
the tool's own importer (not timed). Then, in one run:

1. load: ``tracker.services.evaluation.load_frames`` (three SELECTs read with pandas) — best of 3;
2. evaluate: ``tracker.criteria.engine.evaluate`` with every available criteria set — best of 3.

Run: ``python benchmarks/criteria_benchmark.py [--patients 2000 --visits 5]``.
"""

from __future__ import annotations

import argparse
import csv
import random
import tempfile
import time
from pathlib import Path

from tracker.criteria import engine, limits
from tracker.db import migrate
from tracker.db.session import make_engine, make_session_factory
from tracker.services.evaluation import load_frames
from tracker.services.importing import import_file

MOTOR = {  # nerve: (site labels, distal distance, segment distances, distal latency, CV, CMAP, F)
    "median": (("wrist", "elbow"), 70, (230,), 3.6, 55, 8.0, 28),
    "ulnar": (("wrist", "below_elbow", "above_elbow"), 70, (210, 100), 2.9, 57, 9.0, 29),
    "fibular": (("ankle", "below_fibular_head", "popliteal_fossa"), 90, (320, 100), 4.8, 47, 5.0, 50),
    "tibial": (("ankle", "popliteal_fossa"), 90, (400,), 4.5, 46, 10.0, 50),
}
SENSORY = {"median": (130, 55, 30), "ulnar": (110, 55, 25), "radial": (100, 55, 25), "sural": (140, 48, 15)}
HEADER = [
    "patient",
    "visit_date",
    "nerve",
    "side",
    "modality",
    "site_order",
    "site",
    "distance_mm",
    "latency_ms",
    "amplitude_mv",
    "amplitude_uv",
    "duration_ms",
    "area_mvms",
    "temperature_c",
    "lff_hz",
    "f_latency_ms",
    "height_cm",
    "sex",
    "birth_year",
    "diagnosis",
    "phenotype",
]


def write_file(path: Path, patients: int, visits: int) -> int:
    rng = random.Random(5)
    rows = 0
    with open(path, "w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(HEADER)
        for p in range(patients):
            code, sex, born, height = (
                f"C{p:05d}",
                rng.choice(["female", "male"]),
                rng.randint(1940, 1995),
                rng.randint(150, 195),
            )
            severity = rng.uniform(0, 1)
            for v in range(visits):
                date = f"{2020 + v}-{rng.randint(1, 12):02d}-{rng.randint(1, 28):02d}"
                common = [height, sex, born, "cidp", "typical"]
                for nerve, (labels, first, gaps, dml, cv, amp, f) in MOTOR.items():
                    slow = 1 - 0.6 * severity * rng.uniform(0.5, 1)
                    latency, amplitude, duration = dml / slow, amp * rng.uniform(0.4, 1.1), 5.5 / slow
                    distances, temperature = (first, *gaps), f"{rng.uniform(31, 35):.1f}"
                    for order, label in enumerate(labels):
                        if order:
                            latency += distances[order] / (cv * slow)
                            amplitude *= rng.uniform(0.4 if severity > 0.6 else 0.8, 0.98)
                            duration *= rng.uniform(1.0, 1.5)
                        writer.writerow(
                            [
                                code,
                                date,
                                nerve,
                                "right",
                                "motor",
                                order + 1,
                                label,
                                distances[order],
                                f"{latency:.2f}",
                                f"{amplitude:.1f}",
                                "",
                                f"{duration:.1f}",
                                f"{amplitude * 2.4:.1f}",
                                temperature,
                                2,
                                f"{f / slow:.1f}",
                                *common,
                            ]
                        )
                        rows += 1
                for nerve, (distance, cv, amp) in SENSORY.items():
                    snap = amp * rng.uniform(0.2, 1.3)
                    latency = distance / (cv * (1 - 0.4 * severity * rng.uniform(0.5, 1)))
                    writer.writerow(
                        [
                            code,
                            date,
                            nerve,
                            "right",
                            "sensory",
                            1,
                            "",
                            distance,
                            f"{latency:.2f}",
                            "",
                            f"{snap:.1f}",
                            "",
                            "",
                            f"{rng.uniform(31, 35):.1f}",
                            20,
                            "",
                            *common,
                        ]
                    )
                    rows += 1
    return rows


def best(function, repeat: int) -> tuple[float, object]:
    times, value = [], None
    for _ in range(repeat):
        start = time.perf_counter()
        value = function()
        times.append(time.perf_counter() - start)
    return min(times), value


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--patients", type=int, default=2000)
    parser.add_argument("--visits", type=int, default=5)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as folder:
        folder = Path(folder)
        csv_path = folder / "cohort.csv"
        rows = write_file(csv_path, args.patients, args.visits)
        url = f"sqlite:///{folder / 'cohort.sqlite3'}"
        migrate.upgrade(url)
        database = make_engine(url)
        sessions = make_session_factory(database)
        with sessions.begin() as session:
            import_file(session, csv_path, username="benchmark")
        criteria = engine.available()
        with sessions() as session:
            load_seconds, (visits, tests, sites) = best(lambda: load_frames(session), args.repeat)
        limit_rows = limits.default_limits()
        evaluate_seconds, results = best(
            lambda: engine.evaluate(visits, tests, sites, limit_rows, criteria), args.repeat
        )
        database.dispose()
    findings = sum(len(r.findings) for r in results.values())
    print(
        f"cohort: {len(visits):,} visits, {len(tests):,} nerve tests, {len(sites):,} stimulation sites "
        f"({rows:,} file rows)"
    )
    print(f"criteria sets: {', '.join(criteria)} — {findings:,} findings")
    print(f"load from SQLite into DataFrames: best {load_seconds:.2f} s of {args.repeat}")
    print(f"evaluate every set, one vectorised pass: best {evaluate_seconds:.2f} s of {args.repeat}")
    print(f"ratio evaluate / load: {evaluate_seconds / load_seconds:.2f} (target ≤ 2)")


if __name__ == "__main__":
    main()
