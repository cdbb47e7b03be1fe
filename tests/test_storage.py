"""Saved evaluations stored compressed (tracker.db.types, migration 0006): the value read back is the value
written, a migrated database keeps every saved evaluation, and ``db upgrade`` gives the space back — on both
backends. Data: the invented demo clinic and an invented generated cohort (tracker.synthetic)."""

from __future__ import annotations

import datetime as dt
import json

import pytest
import sqlalchemy as sa
from sqlalchemy import inspect, select, text

from tracker.criteria import engine as criteria_engine
from tracker.criteria.model import Settings
from tracker.db import migrate, types
from tracker.db.models import Evaluation
from tracker.db.session import is_sqlite, make_engine, make_session_factory, sqlite_file
from tracker.services.demo import DEMO_FILES, demo_data_dir
from tracker.services.evaluation import (
    compact_trace,
    expand_trace,
    load_frames,
    refresh_evaluations,
    to_json_many,
)
from tracker.services.evaluation.traces import stored_traces
from tracker.services.importing import import_file
from tracker.services.limit_sets import resolve
from tracker.synthetic import cohort, write_csv_files

BEFORE_COMPRESSION = "0005"
GENERATED_PATIENTS = 25  # with the demo clinic: more saved evaluations than one conversion chunk

# The evaluations table as revision 0005 left it (the trace in a JSON column).
LEGACY = sa.Table(
    "evaluations",
    sa.MetaData(),
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("visit_id", sa.Integer),
    sa.Column("criteria_id", sa.String(40)),
    sa.Column("criteria_version", sa.String(20)),
    sa.Column("limit_set_id", sa.Integer),
    sa.Column("limit_set_version", sa.Integer),
    sa.Column("input_sha256", sa.String(64)),
    sa.Column("outcome", sa.String(32)),
    sa.Column("result", sa.JSON),
    sa.Column("computed_at", sa.DateTime(timezone=True)),
)
OTHER_COLUMNS = [c.name for c in LEGACY.columns if c.name != "result"]

ODD_DOCUMENTS = [
    {},
    {"nerves": [], "unit": "µV", "arrow": "wrist → elbow", "quote": 'a "b" \\ c', "tab": "a\tb"},
    {"numbers": [0.1, -0.0, 1e-7, 12345678901234567890, 2.5e300, -3], "flags": [True, False, None]},
    {"deep": [[[{"k": [1, {"z": "ü"}]}]]], "order": {"b": 1, "a": 2}},
]


# -- the column type ----------------------------------------------------------------------------------------


@pytest.mark.parametrize("value", ODD_DOCUMENTS + [[1, 2, "x"], "text"])
def test_compressed_value_reads_back_equal_and_in_the_same_key_order(value):
    stored = types.encode_json(value)
    assert stored[0] == types.CURRENT_FORMAT
    assert types.decode_json(stored) == value
    assert json.dumps(types.decode_json(stored)) == json.dumps(value)  # key order kept, as the JSON column
    assert types.encode_json(value) == stored  # canonical: the same value gives the same bytes


def test_json_text_of_earlier_revisions_is_still_read():
    document = {"criteria": "x", "nerves": [{"nerve": "median", "findings": []}], "unit": "µV"}
    assert types.decode_json(json.dumps(document)) == document
    assert types.decode_json(json.dumps(document).encode()) == document
    assert types.decode_json(b'  {"a": 1}') == {"a": 1}


def test_damaged_or_unknown_values_are_refused_not_misread():
    stored = types.encode_json({"a": "b" * 500})
    with pytest.raises(types.StoredValueError, match="cut short"):
        types.decode_json(stored[: len(stored) // 2])
    with pytest.raises(types.StoredValueError, match="unknown stored format"):
        types.decode_json(b"\x7f" + stored[1:])
    with pytest.raises(types.StoredValueError):
        types.decode_json(b"")


def test_the_preset_dictionary_is_frozen(monkeypatch):
    assert len(types.preset_dictionary(types.CURRENT_FORMAT)) == 32768  # zlib's largest useful dictionary
    name, _ = types.DICTIONARY_FORMATS[types.CURRENT_FORMAT]
    monkeypatch.setitem(types.DICTIONARY_FORMATS, types.CURRENT_FORMAT, (name, "0" * 64))
    types.preset_dictionary.cache_clear()
    try:
        with pytest.raises(types.StoredValueError, match="has been changed"):
            types.preset_dictionary(types.CURRENT_FORMAT)
    finally:
        monkeypatch.undo()
        types.preset_dictionary.cache_clear()


def test_progress_goes_to_stderr_every_n_rows(capsys):
    report = migrate.stderr_progress(every=10)
    for done in (4, 8, 12, 16, 21, 25):
        report("converting", done, 25)
    migrate.stderr_progress(every=10)("converting", 5, 5)  # a short run prints nothing
    assert capsys.readouterr().err.splitlines() == ["converting: 12 of 25 rows", "converting: 25 of 25 rows"]


# -- a database with saved evaluations ----------------------------------------------------------------------


def _fill(url: str, folder) -> None:
    """The demo clinic and a generated cohort (both invented), imported into ``url`` at its current schema."""
    generated = folder / "generated"
    generated.mkdir()
    files = [demo_data_dir() / name for name in DEMO_FILES]
    files += write_csv_files(generated, list(cohort(GENERATED_PATIENTS)))
    engine = make_engine(url)
    try:
        with make_session_factory(engine).begin() as session:
            for path in files:
                import_file(session, path, username="invented-test-user")
    finally:
        engine.dispose()


def _legacy_rows(url: str) -> list[dict]:
    """Every visit × criteria set as revision 0005 saved it (compact trace in the JSON column), and a few odd
    documents (a trace of the older uncompacted shape, Unicode, extreme numbers) with no limit set."""
    engine = make_engine(url)
    try:
        with make_session_factory(engine).begin() as session:
            info, limits = resolve(session, None)
            visits, tests, sites = load_frames(session)
            results = criteria_engine.evaluate(
                visits, tests, sites, limits, criteria_engine.available(), Settings()
            )
        rows = []
        for criteria_id, result in results.items():
            payloads = to_json_many(result, [int(k) for k in visits["visit_key"]])
            for key, payload in payloads.items():
                rows.append(
                    dict(
                        visit_id=key,
                        criteria_id=criteria_id,
                        criteria_version=result.version,
                        limit_set_id=info.id,
                        limit_set_version=info.version,
                        input_sha256="f" * 64,
                        outcome=payload["outcome"],
                        result=compact_trace(payload),
                    )
                )
        first = rows[0]["visit_id"]
        uncompacted = to_json_many(results["efns-pns-2010-cidp"], [first])[first]
        for number, document in enumerate(ODD_DOCUMENTS + [uncompacted]):
            rows.append(
                dict(
                    visit_id=first,
                    criteria_id=f"odd-{number}",
                    criteria_version="1",
                    limit_set_id=None,
                    limit_set_version=None,
                    input_sha256="0" * 64,
                    outcome="n/a",
                    result=document,
                )
            )
        stamp = dt.datetime(2026, 1, 2, 3, 4, 5, 678901, tzinfo=dt.UTC)
        with engine.begin() as connection:
            connection.execute(LEGACY.insert(), [dict(r, computed_at=stamp) for r in rows])
        return rows
    finally:
        engine.dispose()


def _read_legacy(url: str) -> dict[int, dict]:
    engine = make_engine(url)
    try:
        with engine.connect() as connection:
            return {row.id: row._asdict() for row in connection.execute(select(LEGACY).order_by(LEGACY.c.id))}
    finally:
        engine.dispose()


def _read_current(url: str) -> dict[int, dict]:
    engine = make_engine(url)
    try:
        with make_session_factory(engine)() as session:
            return {
                e.id: {"result": e.result, **{name: getattr(e, name) for name in OTHER_COLUMNS}}
                for e in session.scalars(select(Evaluation).order_by(Evaluation.id))
            }
    finally:
        engine.dispose()


def _space(url: str) -> int:
    """SQLite: the file's bytes; PostgreSQL: the evaluations table with its indexes and TOAST."""
    engine = make_engine(url)
    try:
        if is_sqlite(engine):
            return sqlite_file(url).stat().st_size
        with engine.connect() as connection:
            return int(connection.scalar(text("SELECT pg_total_relation_size('evaluations')")))
    finally:
        engine.dispose()


def _raw_results(url: str) -> list:
    engine = make_engine(url)
    try:
        with engine.connect() as connection:
            return [r for (r,) in connection.execute(text("SELECT result FROM evaluations"))]
    finally:
        engine.dispose()


def test_migration_keeps_every_saved_evaluation_and_reclaims_the_space(empty_url, tmp_path):
    migrate.upgrade(empty_url, BEFORE_COMPRESSION)
    _fill(empty_url, tmp_path)
    written = _legacy_rows(empty_url)
    before = _read_legacy(empty_url)
    assert len(before) == len(written) > 1000  # more than one chunk of the conversion
    space_before = _space(empty_url)
    if is_sqlite(empty_url):  # the WAL is folded into the file first, so the sizes compare like with like
        engine = make_engine(empty_url)
        with engine.connect() as connection:
            connection.exec_driver_sql("PRAGMA wal_checkpoint(TRUNCATE)")
        engine.dispose()
        space_before = _space(empty_url)

    calls: list[tuple[str, int, int]] = []
    migrate.upgrade(empty_url, progress=lambda what, done, total: calls.append((what, done, total)))

    after = _read_current(empty_url)
    assert after.keys() == before.keys()
    for key, row in before.items():
        for name in OTHER_COLUMNS:
            assert after[key][name] == row[name], (key, name)
        assert after[key]["result"] == row["result"], key
        assert json.dumps(after[key]["result"]) == json.dumps(row["result"]), key  # same key order
    # Stored compressed, in a binary column.
    raw = _raw_results(empty_url)
    assert all(isinstance(value, bytes) and value[0] == types.CURRENT_FORMAT for value in raw)
    engine = make_engine(empty_url)
    kind = {c["name"]: c["type"] for c in inspect(engine).get_columns("evaluations")}["result"]
    engine.dispose()
    assert isinstance(kind, sa.LargeBinary), kind
    # Progress after every chunk, ending at the total.
    assert len(calls) >= 2 and calls[-1][1:] == (len(before), len(before))
    # The space is given back: VACUUM (SQLite) / VACUUM FULL (PostgreSQL) after the conversion.
    assert _space(empty_url) < space_before / 3
    if is_sqlite(empty_url):
        engine = make_engine(empty_url)
        with engine.connect() as connection:
            assert connection.exec_driver_sql("PRAGMA freelist_count").scalar() == 0
            assert connection.exec_driver_sql("PRAGMA foreign_key_check").fetchall() == []
        engine.dispose()

    # Down to the JSON column and up again: still the same documents.
    migrate.downgrade(empty_url, BEFORE_COMPRESSION)
    assert _read_legacy(empty_url) == before
    migrate.upgrade(empty_url)
    assert _read_current(empty_url) == after


def test_evaluations_are_saved_compressed_and_read_back_as_computed(db_url, tmp_path):
    _fill(db_url, tmp_path)
    engine = make_engine(db_url)
    try:
        with make_session_factory(engine).begin() as session:
            refresh_evaluations(session, username="invented-test-user")
        with make_session_factory(engine)() as session:
            info, limits = resolve(session, None)
            visits, tests, sites = load_frames(session)
            stored = {(e.visit_id, e.criteria_id): e.result for e in session.scalars(select(Evaluation))}
        results = criteria_engine.evaluate(
            visits, tests, sites, limits, criteria_engine.available(), Settings()
        )
    finally:
        engine.dispose()
    keys = [int(k) for k in visits["visit_key"]]
    expected = {
        (key, criteria_id): document
        for criteria_id, result in results.items()
        for key, document in stored_traces(result, keys).items()
    }
    assert stored.keys() == expected.keys()
    assert all(stored[key] == expected[key] for key in expected)
    # Read back, the stored form is the full trace as shown (DESIGN.md §5).
    shown = {
        (key, criteria_id): payload
        for criteria_id, result in results.items()
        for key, payload in to_json_many(result, keys).items()
    }
    assert all(expand_trace(stored[key]) == shown[key] for key in shown)
    raw = _raw_results(db_url)
    assert all(isinstance(value, bytes) and value[0] == types.CURRENT_FORMAT for value in raw)
    text_bytes = sum(len(json.dumps(value).encode()) for value in shown.values())
    # Measured about 1/18 of the JSON text on this data; a tenth leaves room for other traces.
    assert sum(len(value) for value in raw) < text_bytes / 10
