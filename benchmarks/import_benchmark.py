"""Import throughput against a plain-sqlite3 floor, measured in one run.

Generates a valid measurements file of 2,000 patients × 5 visits × 4 motor nerves × 3 sites (120,000
stimulation-site rows; invented values), then:

1. ``ncs-tracker`` import (read, validate every cell and group, classify against the database, write the
   normalised tables, audit) into a fresh SQLite database, committed;
2. the floor: read the same CSV with the ``csv`` module and insert every row with ``sqlite3.executemany``
   into one flat table of a fresh SQLite file, committed. The executemany alone is printed too, for a
   stricter reading of "floor".

Both databases use the tool's SQLite settings (WAL journal, synchronous=NORMAL), so the comparison is like
with like. Each side runs ``--repeat`` times into fresh files and the best time counts (the usual way to
remove disk and scheduler noise). Prints both times and their ratio (target: import ≤ 3 × floor).

Run: ``python benchmarks/import_benchmark.py``.
"""

from __future__ import annotations

import argparse
import csv
import random
import sqlite3
import tempfile
import time
from pathlib import Path

from tracker.db import migrate
from tracker.db.session import make_engine, make_session_factory
from tracker.services.importing import import_file

# nerve: (site labels, distal distance mm, segment distances mm, distal latency ms, CV m/s, CMAP mV)
NERVES = {
    "median": (("wrist", "elbow", "axilla"), 70, (230, 120), 3.6, 55, 8.0),
    "ulnar": (("wrist", "below_elbow", "above_elbow"), 70, (210, 100), 2.9, 57, 9.0),
    "fibular": (("ankle", "below_fibular_head", "popliteal_fossa"), 90, (320, 100), 4.8, 47, 5.0),
    "tibial": (("ankle", "popliteal_fossa"), 90, (400,), 4.5, 46, 10.0),
}
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
    "duration_ms",
    "area_mvms",
    "temperature_c",
    "lff_hz",
    "f_latency_ms",
    "height_cm",
    "sex",
    "birth_year",
    "diagnosis",
]


def write_file(path: Path, patients: int, visits: int) -> int:
    rng = random.Random(7)  # fixed: every run measures the same file
    rows = 0
    with open(path, "w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(HEADER)
        for p in range(patients):
            code, sex, born, height = (
                f"B{p:05d}",
                rng.choice(["female", "male"]),
                rng.randint(1940, 1995),
                rng.randint(150, 195),
            )
            for v in range(visits):
                date = f"{2020 + v}-{rng.randint(1, 12):02d}-{rng.randint(1, 28):02d}"
                for nerve, (labels, first, gaps, dml, cv, amp) in NERVES.items():
                    # tibial has two standard sites; a third (ankle → knee → thigh) keeps 3 sites per nerve
                    labels = labels if len(labels) == 3 else labels + ("popliteal_fossa",)
                    distances = (first, *gaps, 150)[:3]
                    latency, amplitude = dml * rng.uniform(0.9, 1.6), amp * rng.uniform(0.5, 1.1)
                    f_wave = round(latency * 6 + 20, 1)
                    for order in range(3):
                        if order:
                            latency += distances[order] / (cv * rng.uniform(0.55, 1.05))
                            amplitude *= rng.uniform(0.8, 0.98)
                        label = labels[order] if nerve != "tibial" or order < 2 else ""
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
                                f"{5.5 * (1 + 0.1 * order):.1f}",
                                f"{amplitude * 2.5:.1f}",
                                33.0 if nerve in ("median", "ulnar") else 31.5,
                                2,
                                f_wave,
                                height,
                                sex,
                                born,
                                "cidp",
                            ]
                        )
                        rows += 1
    return rows


def _flat_table(database: Path) -> sqlite3.Connection:
    connection = sqlite3.connect(database)
    connection.execute("PRAGMA journal_mode=WAL")
    connection.execute("PRAGMA synchronous=NORMAL")
    connection.execute(f"CREATE TABLE sites ({', '.join(HEADER)})")
    return connection


def floor_seconds(csv_path: Path, database: Path) -> float:
    """Read the file with csv.reader and stream its rows into executemany, committed."""
    start = time.perf_counter()
    connection = _flat_table(database)
    with open(csv_path, encoding="utf-8", newline="") as handle:
        reader = csv.reader(handle)
        next(reader)
        connection.executemany(f"INSERT INTO sites VALUES ({', '.join('?' * len(HEADER))})", reader)
    connection.commit()
    connection.close()
    return time.perf_counter() - start


def insert_only_seconds(csv_path: Path, database: Path) -> float:
    """The executemany alone, from rows already in memory, committed."""
    with open(csv_path, encoding="utf-8", newline="") as handle:
        rows = list(csv.reader(handle))[1:]
    connection = _flat_table(database)
    start = time.perf_counter()
    connection.executemany(f"INSERT INTO sites VALUES ({', '.join('?' * len(HEADER))})", rows)
    connection.commit()
    elapsed = time.perf_counter() - start
    connection.close()
    return elapsed


def import_seconds(csv_path: Path, database: Path) -> tuple[float, str]:
    url = f"sqlite:///{database}"
    migrate.upgrade(url)  # schema creation is not part of an import
    engine = make_engine(url)
    start = time.perf_counter()
    with make_session_factory(engine).begin() as session:
        report = import_file(session, csv_path, username="benchmark")
    elapsed = time.perf_counter() - start
    engine.dispose()
    return elapsed, report.summary()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--patients", type=int, default=2000)
    parser.add_argument("--visits", type=int, default=5)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as folder:
        folder = Path(folder)
        csv_path = folder / "measurements.csv"
        rows = write_file(csv_path, args.patients, args.visits)
        print(f"file: {rows:,} stimulation-site rows ({csv_path.stat().st_size / 1e6:.1f} MB)")
        floors, inserts, imports = [], [], []
        for attempt in range(args.repeat):
            floors.append(floor_seconds(csv_path, folder / f"floor{attempt}.sqlite3"))
            inserts.append(insert_only_seconds(csv_path, folder / f"insert{attempt}.sqlite3"))
            seconds, summary = import_seconds(csv_path, folder / f"tracker{attempt}.sqlite3")
            imports.append(seconds)
        floor, seconds = min(floors), min(imports)
        print(
            f"ncs-tracker import: best {seconds:.2f} s of {', '.join(f'{t:.2f}' for t in imports)} — "
            f"{summary}"
        )
        insert = min(inserts)
        print(
            f"floor (csv.reader + sqlite3 executemany, one flat table): best {floor:.2f} s of "
            f"{', '.join(f'{t:.2f}' for t in floors)}"
        )
        print(
            f"executemany alone (rows already in memory): best {insert:.2f} s of "
            f"{', '.join(f'{t:.2f}' for t in inserts)}"
        )
        print(f"ratio import / floor: {seconds / floor:.2f} (target ≤ 3)")
        print(f"ratio import / executemany alone: {seconds / insert:.2f}")


if __name__ == "__main__":
    main()
