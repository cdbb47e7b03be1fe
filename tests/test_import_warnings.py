"""Warnings that do not refuse an import: a visit of a single nerve, and a visit close to another one of the
same patient whose day and month swapped would be a real date (a likely date-entry slip).

The rule and its 14-day window are those of issue 10, item 16 (common practice, no source). Each warning is
printed, the import proceeds and exits 0. Both backends. All patient codes, dates and measurements are
invented for testing; none describes a person.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

from sqlalchemy import func, select

from conftest import fingerprint, run_cli
from tracker.db.models import AuditEvent, Visit

HEADER = [
    "patient",
    "visit_date",
    "nerve",
    "side",
    "modality",
    "site_order",
    "distance_mm",
    "latency_ms",
    "amplitude_mv",
]


def _visit(patient: str, day: str, nerves: tuple[str, ...] = ("median", "ulnar")) -> list[list[str]]:
    """An invented right-sided motor study: two sites per nerve, ordinary values (velocity ≈ 53 m/s)."""
    rows = []
    for nerve in nerves:
        rows.append([patient, day, nerve, "right", "motor", "1", "70", "3.6", "8.1"])
        rows.append([patient, day, nerve, "right", "motor", "2", "230", "7.9", "7.6"])
    return rows


def _write(folder: Path, name: str, rows: list[list[str]]) -> Path:
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(HEADER)
    writer.writerows(rows)
    path = folder / name
    path.write_text(buffer.getvalue(), encoding="utf-8")
    return path


def _import(capsys, db_url: str, *paths: Path, options: tuple[str, ...] = ()) -> tuple[str, list[str]]:
    code, out, err = run_cli(capsys, "--db", db_url, "import", *options, *map(str, paths))
    assert code == 0, err
    return out, [line[len("  warning: ") :] for line in err.splitlines() if line.startswith("  warning: ")]


def _visits(engine) -> int:
    with engine.connect() as connection:
        return connection.scalar(select(func.count()).select_from(Visit))


def test_single_nerve_visit_is_imported_with_a_warning(db_url, engine, tmp_path, capsys):
    path = _write(tmp_path, "one.csv", _visit("T-1", "2024-03-20", ("median",)) + _visit("T-2", "2024-03-20"))
    out, warnings = _import(capsys, db_url, path)
    assert "added 2 visits" in out, out
    assert _visits(engine) == 2
    # T-1 (rows 2–3) has a single nerve; T-2 (rows 4–7) has two and gets no warning
    assert len(warnings) == 1, warnings
    assert warnings[0].startswith(
        "row 2, column 'nerve': the visit of T-1 on 2024-03-20 holds a single nerve (median right)"
    ), warnings
    with engine.connect() as connection:
        recorded = connection.execute(
            select(AuditEvent.after).where(AuditEvent.action == "import_measurements")
        ).scalar_one()
    assert recorded["warnings"] == warnings


def test_motor_and_sensory_of_one_nerve_are_one_nerve(db_url, tmp_path, capsys):
    rows = _visit("T-1", "2024-03-20", ("median",))
    header_extra = ["amplitude_uv"]
    rows = [row + [""] for row in rows] + [
        ["T-1", "2024-03-20", "median", "right", "sensory", "1", "130", "2.9", "", "22"]
    ]
    path = tmp_path / "both.csv"
    path.write_text(
        ",".join(HEADER + header_extra) + "\n" + "\n".join(",".join(r) for r in rows) + "\n", encoding="utf-8"
    )
    _out, warnings = _import(capsys, db_url, path)
    assert [w for w in warnings if "single nerve (median right)" in w], warnings


def test_close_visit_with_swappable_date_is_imported_with_a_warning(db_url, engine, tmp_path, capsys):
    """2024-02-12 is 7 days after the stored 2024-02-05; swapped it would be 2024-12-02."""
    _out, warnings = _import(capsys, db_url, _write(tmp_path, "first.csv", _visit("T-1", "2024-02-05")))
    assert warnings == []  # day 5 and month 2 swap to a real date, but no other visit is near
    before = _visits(engine)
    out, warnings = _import(capsys, db_url, _write(tmp_path, "second.csv", _visit("T-1", "2024-02-12")))
    assert "added 1 visits" in out and _visits(engine) == before + 1, out
    assert warnings == [
        "row 2, column 'visit_date': the visit of T-1 on 2024-02-12 is 7 days from their visit on "
        "2024-02-05; with day and month swapped it would be 2024-12-02 — check the date for an entry slip"
    ], warnings


def test_close_visits_in_one_file_warn_for_each_swappable_date(db_url, tmp_path, capsys):
    rows = _visit("T-1", "2024-03-04") + _visit("T-1", "2024-03-10")
    _out, warnings = _import(capsys, db_url, _write(tmp_path, "pair.csv", rows))
    assert len(warnings) == 2, warnings
    assert (
        "2024-03-04 is 6 days from their visit on 2024-03-10" in warnings[0] and "2024-04-03" in warnings[0]
    ), warnings
    assert (
        "2024-03-10 is 6 days from their visit on 2024-03-04" in warnings[1] and "2024-10-03" in warnings[1]
    ), warnings


def test_date_warning_only_within_14_days_and_for_a_real_swapped_date(db_url, engine, tmp_path, capsys):
    rows = _visit("T-1", "2024-02-13") + _visit(
        "T-1", "2024-02-27"
    )  # 14 days apart; days 13 and 27 are no month
    rows += _visit("T-2", "2024-02-05") + _visit("T-2", "2024-02-20")  # 15 days apart
    rows += _visit("T-3", "2024-03-03") + _visit(
        "T-3", "2024-03-10"
    )  # 2024-03-03 swaps to itself; day 10 does swap
    rows += _visit("T-4", "2024-03-01") + _visit(
        "T-4", "2024-03-15"
    )  # 14 days apart: the boundary still warns
    before = fingerprint(engine)
    _out, warnings = _import(capsys, db_url, _write(tmp_path, "far.csv", rows))
    assert fingerprint(engine) != before
    assert len(warnings) == 2, warnings
    assert "T-3 on 2024-03-10 is 7 days" in warnings[0] and "T-4 on 2024-03-01 is 14 days" in warnings[1], (
        warnings
    )


def test_unchanged_reimport_repeats_no_warning(db_url, tmp_path, capsys):
    path = _write(tmp_path, "one.csv", _visit("T-1", "2024-03-20", ("median",)))
    assert len(_import(capsys, db_url, path)[1]) == 1
    out, warnings = _import(capsys, db_url, path)
    assert "1 unchanged" in out and warnings == [], (out, warnings)


def test_dry_run_shows_the_warnings_and_writes_nothing(db_url, engine, tmp_path, capsys):
    path = _write(tmp_path, "one.csv", _visit("T-1", "2024-03-20", ("median",)))
    before = fingerprint(engine)
    out, warnings = _import(capsys, db_url, path, options=("--dry-run",))
    assert "dry run" in out and len(warnings) == 1, (out, warnings)
    assert fingerprint(engine) == before
