"""Build the invented demo clinic's database from ``demo_data/``."""

from __future__ import annotations

from pathlib import Path

from sqlalchemy import Engine

from tracker.config import sqlite_url
from tracker.db import migrate
from tracker.db.session import make_engine, make_session_factory
from tracker.errors import TrackerError
from tracker.services.importing import ImportReport, import_file

DEMO_FILES = ("measurements.csv", "treatments.csv", "scores.csv")


def demo_data_dir() -> Path:
    """``demo_data/`` of a checkout, else the copy inside an installed wheel."""
    package = Path(__file__).resolve().parent.parent
    for candidate in (package.parent / "demo_data", package / "_demo_data"):
        if (candidate / DEMO_FILES[0]).is_file():
            return candidate
    raise TrackerError("The demo_data folder is missing from this installation; reinstall ncs-tracker.")


def build_demo_database(path: Path, *, username: str) -> tuple[Engine, list[ImportReport]]:
    """Create a fresh SQLite database at ``path`` (replacing an earlier demo file) holding the demo clinic."""
    path.parent.mkdir(parents=True, exist_ok=True)
    for leftover in (path, path.with_name(path.name + "-wal"), path.with_name(path.name + "-shm")):
        leftover.unlink(missing_ok=True)
    url = sqlite_url(path)
    migrate.upgrade(url)
    engine = make_engine(url)
    folder = demo_data_dir()
    with make_session_factory(engine).begin() as session:
        reports = [import_file(session, folder / name, username=username) for name in DEMO_FILES]
    return engine, reports
