"""Long files are imported in blocks of whole patients (bounded memory); the result, the counts, the
warnings and every refusal are those of the whole-file import. Data: invented (tracker.synthetic)."""

from __future__ import annotations

import csv
from pathlib import Path

import pytest
from sqlalchemy import select

from conftest import fingerprint, new_database
from tracker import synthetic
from tracker.db import migrate
from tracker.db.models import AuditEvent, NerveTest, OutcomeScore, Patient, StimulationSite, Treatment, Visit
from tracker.db.session import make_engine, make_session_factory
from tracker.errors import InputRejected
from tracker.services import tables
from tracker.services.importing import import_file


@pytest.fixture
def blocks(monkeypatch):
    """Read every file in blocks of about 20 kB (a few patients each); count the blocks given out."""
    given: list[int] = []
    original = tables.TableStream.blocks

    def counted(self):
        for block in original(self):
            given.append(len(block))
            yield block

    monkeypatch.setattr(tables, "STREAM_BYTES", 0)
    monkeypatch.setattr(tables, "BLOCK_BYTES", 20_000)
    monkeypatch.setattr(tables.TableStream, "blocks", counted)
    return given


def _files(folder: Path, count: int = 12) -> list[Path]:
    folder.mkdir(exist_ok=True)
    return synthetic.write_csv_files(folder, list(synthetic.cohort(count)))


def _content(url: str) -> dict[str, list[tuple]]:
    """Every clinical row by its natural key (ids and times left out: they depend on the order of writing)."""
    engine = make_engine(url)
    try:
        with engine.connect() as connection:
            code = {i: c for i, c in connection.execute(select(Patient.id, Patient.code))}
            visit = {
                r.id: (code[r.patient_id], r.visit_date)
                for r in connection.execute(select(Visit.id, Visit.patient_id, Visit.visit_date))
            }
            test = {
                r.id: (*visit[r.visit_id], r.nerve, r.side, r.modality)
                for r in connection.execute(select(NerveTest))
            }
            skip = {"id", "patient_id", "visit_id", "nerve_test_id", "created_at", "updated_at"}

            def rows(model, key) -> list[tuple]:
                columns = [c for c in model.__table__.columns if c.name not in skip]
                found = connection.execute(select(model.__table__)).mappings()
                return sorted((*key(r), *(repr(r[c.name]) for c in columns)) for r in found)

            return {
                "patients": rows(Patient, lambda r: ()),
                "visits": rows(Visit, lambda r: (code[r["patient_id"]],)),
                "tests": rows(NerveTest, lambda r: visit[r["visit_id"]]),
                "sites": rows(StimulationSite, lambda r: test[r["nerve_test_id"]]),
                "treatments": rows(Treatment, lambda r: (code[r["patient_id"]],)),
                "scores": rows(OutcomeScore, lambda r: (code[r["patient_id"]],)),
                "audit": sorted(
                    (e.action, repr(sorted(e.after.items())))
                    for e in connection.execute(select(AuditEvent.action, AuditEvent.after))
                ),
            }
    finally:
        engine.dispose()


def _import(url: str, files: list[Path], **options) -> list[str]:
    engine = make_engine(url)
    try:
        with make_session_factory(engine).begin() as session:
            return [import_file(session, path, username="tester", **options).summary() for path in files]
    finally:
        engine.dispose()


def _second_database(backend: str, tmp_path: Path):
    folder = tmp_path / "second"
    folder.mkdir()
    return new_database(backend, folder)


def test_a_file_imported_in_blocks_is_stored_as_when_imported_whole(db_url, backend, tmp_path, blocks):
    files = _files(tmp_path / "files")
    streamed = _import(db_url, files)
    assert len(blocks) >= 4 and sum(blocks) > 0  # several blocks of measurements, treatments, scores
    whole_databases = _second_database(backend, tmp_path)
    whole_url = next(whole_databases)
    try:
        migrate.upgrade(whole_url)
        tables.STREAM_BYTES = 1 << 40  # (restored by monkeypatch) every file read whole
        given = len(blocks)
        whole = _import(whole_url, files)
        assert len(blocks) == given
        assert streamed == whole
        assert _content(db_url) == _content(whole_url)
    finally:
        whole_databases.close()


def _rewrite(path: Path, change) -> None:
    with open(path, encoding="utf-8", newline="") as handle:
        rows = list(csv.reader(handle))
    rows = change(rows)
    with open(path, "w", encoding="utf-8", newline="") as handle:
        csv.writer(handle).writerows(rows)


def test_a_problem_in_a_late_block_writes_nothing_and_is_reported_as_for_the_whole_file(
    db_url, engine, tmp_path, blocks, monkeypatch
):
    measurements = _files(tmp_path / "files")[0]
    header = None

    def spoil(rows):
        nonlocal header
        header = rows[0]
        rows[-1][header.index("latency_ms")] = "4,5"  # a decimal comma on the file's last row
        rows[-40][header.index("nerve")] = "medain"  # and an unknown nerve a little before
        return rows

    _rewrite(measurements, spoil)
    before = fingerprint(engine)
    with pytest.raises(InputRejected) as streamed:
        _import(db_url, [measurements])
    assert len(blocks) >= 2  # blocks were read (and written) before a problem was found
    assert fingerprint(engine) == before
    monkeypatch.setattr(tables, "STREAM_BYTES", 1 << 40)
    with pytest.raises(InputRejected) as whole:
        _import(db_url, [measurements])
    assert streamed.value.summary == whole.value.summary
    assert streamed.value.problems == whole.value.problems
    columns = {p.column for p in streamed.value.problems}
    assert {"latency_ms", "nerve"} <= columns


def test_rows_of_a_patient_apart_in_the_file_are_imported_whole(db_url, backend, tmp_path, blocks):
    measurements = _files(tmp_path / "files")[0]

    def move_first_row_last(rows):
        return [rows[0], *rows[2:], rows[1]]  # the first patient's first row now ends the file

    _rewrite(measurements, move_first_row_last)
    streamed = _import(db_url, [measurements])
    whole_databases = _second_database(backend, tmp_path)
    whole_url = next(whole_databases)
    try:
        migrate.upgrade(whole_url)
        tables.STREAM_BYTES = 1 << 40
        assert _import(whole_url, [measurements]) == streamed
        assert _content(db_url) == _content(whole_url)
    finally:
        whole_databases.close()


def test_a_warning_of_each_block_is_listed_in_the_order_of_the_whole_file(db_url, engine, tmp_path, blocks):
    measurements = _files(tmp_path / "files", 20)[0]

    def single_nerve_visits(rows):
        # Keep one nerve of the first visit of two patients far apart in the file (invented rows).
        header, body = rows[0], rows[1:]
        nerve, patient, day = header.index("nerve"), header.index("patient"), header.index("visit_date")
        keep = []
        for code in (body[0][patient], body[-1][patient]):
            first = next(r for r in body if r[patient] == code)
            visit = (code, first[day])
            keep.append((visit, first[nerve]))
        dropped = {
            id(r)
            for r in body
            for (visit, kept) in keep
            if (r[patient], r[day]) == visit and r[nerve] != kept
        }
        return [header, *(r for r in body if id(r) not in dropped)]

    _rewrite(measurements, single_nerve_visits)
    engine_sessions = make_session_factory(engine)
    with engine_sessions.begin() as session:
        streamed = import_file(session, measurements, username="tester", dry_run=True)
    tables.STREAM_BYTES = 1 << 40
    with engine_sessions.begin() as session:
        whole = import_file(session, measurements, username="tester", dry_run=True)
    assert len([w for w in whole.warnings if w.column == "nerve"]) == 2
    assert [str(w) for w in streamed.warnings] == [str(w) for w in whole.warnings]
    assert streamed.summary() == whole.summary()


def test_a_file_the_block_reader_cannot_take_is_refused_with_the_whole_file_message(
    db_url, engine, tmp_path, blocks, monkeypatch
):
    """A NUL byte near the end: the block reader gives up (Arrow may have read ahead to it before the first
    block), nothing is written, and the refusal names the byte's row and column as the whole-file reader
    does."""
    measurements = _files(tmp_path / "files")[0]
    raw = measurements.read_bytes()
    at = raw.rindex(b",median,")
    measurements.write_bytes(raw[: at + 1] + b"med\x00ian" + raw[at + 7 :])
    before = fingerprint(engine)
    assert tables.open_stream(measurements) is not None  # the header is fine: the blocks are tried
    with pytest.raises(InputRejected) as streamed:
        _import(db_url, [measurements])
    assert fingerprint(engine) == before
    monkeypatch.setattr(tables, "STREAM_BYTES", 1 << 40)
    with pytest.raises(InputRejected) as whole:
        _import(db_url, [measurements])
    assert (streamed.value.summary, streamed.value.problems) == (whole.value.summary, whole.value.problems)
    assert "NUL" in streamed.value.summary
