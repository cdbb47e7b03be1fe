"""Helpers for the dashboard tests: a demo database (invented clinic) on either backend, with saved
evaluations, as a clinic would have it after ``ncs-tracker demo``."""

from __future__ import annotations

from pathlib import Path

from tracker.db import migrate
from tracker.db.session import make_engine, make_session_factory
from tracker.services.demo import DEMO_FILES, demo_data_dir
from tracker.services.evaluation import refresh_evaluations
from tracker.services.importing import import_file


def fill_demo(url: str) -> None:
    """Migrate ``url`` and load the invented demo clinic into it, then save every evaluation."""
    migrate.upgrade(url)
    engine = make_engine(url)
    try:
        with make_session_factory(engine).begin() as session:
            for name in DEMO_FILES:
                import_file(session, demo_data_dir() / name, username="test")
            refresh_evaluations(session, username="invented-test-user")
    finally:
        engine.dispose()


def demo_csv_rows(
    patient: str, visit_date: str, nerve: str, side: str, modality: str
) -> list[dict[str, str]]:
    """The demo file's rows of one nerve test (invented data), as text cells."""
    import csv

    path: Path = demo_data_dir() / "measurements.csv"
    with path.open(encoding="utf-8") as handle:
        return [
            row
            for row in csv.DictReader(handle)
            if (row["patient"], row["visit_date"], row["nerve"], row["side"], row["modality"])
            == (patient, visit_date, nerve, side, modality)
        ]
