"""What an input may cost (issue 11): each reproduced attack on the importer is refused, quickly, with a
message that names the file, row and column, and leaves the database as it was — on SQLite and PostgreSQL.

Attacks, each a regression test below: ``/dev/zero`` (grew to 11 GB before failing), a 1 GB sparse file
(used 8.5 GB), a 2 MB .xlsx expanding to 420 MB (ran for minutes), a 10 MB cell in a 60-character column
(stored on SQLite, failed only at write time on PostgreSQL after the dry run said OK), .xlsx formula cells
without a saved result (imported as empty, exit 0); and a normal-limit set with a velocity limit of 500 m/s.
Rejected values of identity-like columns are never echoed whole.

Every file is generated small in ``tmp_path``; the sparse file takes no disk space and the zip bomb is built
in memory. All patient codes, names, dates and measurements are invented.
"""

from __future__ import annotations

import io
import os
import stat
import struct
import threading
import time
import tracemalloc
import zipfile
from pathlib import Path

import openpyxl
import pytest
from sqlalchemy import select

from conftest import fingerprint, run_cli
from tracker.db.models import LimitSet, NerveTest
from tracker.errors import InputRejected, TrackerError
from tracker.services import input_limits
from tracker.services.importing.measurements_check import RECORDING_SITE_CHARS
from tracker.services.input_limits import InputLimits, excerpt, from_environment
from tracker.services.limit_sets import import_limit_set, validate_limits
from tracker.services.tables import parse_table, read_bounded, read_table

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
    "recording_site",
]
# An invented right median motor study of an invented patient: velocities 230/4.3 ≈ 53 and 120/2.2 ≈ 55 m/s.
ROWS = [
    [
        "T-700",
        "2024-03-12",
        "median",
        "right",
        "motor",
        "1",
        "wrist",
        "70",
        "3.6",
        "8.1",
        "abductor_pollicis_brevis",
    ],
    [
        "T-700",
        "2024-03-12",
        "median",
        "right",
        "motor",
        "2",
        "elbow",
        "230",
        "7.9",
        "7.7",
        "abductor_pollicis_brevis",
    ],
    [
        "T-700",
        "2024-03-12",
        "median",
        "right",
        "motor",
        "3",
        "axilla",
        "120",
        "10.1",
        "7.5",
        "abductor_pollicis_brevis",
    ],
]
ENV_NAMES = list(input_limits.ENVIRONMENT.values())


@pytest.fixture(autouse=True)
def default_limits(monkeypatch):
    """Each test starts from the shipped defaults, whatever the environment of the run holds."""
    for name in ENV_NAMES:
        monkeypatch.delenv(name, raising=False)


def csv_text(rows: list[list[str]], header: list[str] = HEADER) -> str:
    return "\n".join(",".join(r) for r in [header, *rows]) + "\n"


def write_csv(path: Path, rows: list[list[str]], header: list[str] = HEADER) -> Path:
    path.write_text(csv_text(rows, header), encoding="utf-8")
    return path


def workbook_bytes(rows: list[list[object]], header: list[str] = HEADER) -> bytes:
    book = openpyxl.Workbook()
    sheet = book.active
    sheet.append(header)
    for row in rows:
        sheet.append(row)
    buffer = io.BytesIO()
    book.save(buffer)
    return buffer.getvalue()


def refused_by_cli(capsys, url: str, engine, path: Path, *options: str) -> str:
    """Import ``path`` with the real command; assert exit 1, no traceback and an unchanged database."""
    before = fingerprint(engine)
    code, _out, err = run_cli(capsys, "--db", url, "import", str(path), *options)
    assert code == 1, err
    assert "Traceback" not in err and "unexpected" not in err, err
    assert fingerprint(engine) == before, "the database changed although the file was refused"
    return err


# ------------------------------------------------------------------------------------------------------------
# File size and kind: refused before reading
# ------------------------------------------------------------------------------------------------------------


def test_dev_zero_is_refused_unread_on_both_backends(db_url, engine, capsys):
    """Finding: importing /dev/zero grew to 11 GB before failing. A device is not a regular file."""
    if not os.path.exists("/dev/zero"):
        pytest.skip("no /dev/zero on this system")
    started = time.monotonic()
    err = refused_by_cli(capsys, db_url, engine, Path("/dev/zero"))
    assert time.monotonic() - started < 10
    assert "zero" in err and "it is a device; only regular .csv or .xlsx files are imported" in err


def test_sparse_gigabyte_file_is_refused_by_its_size_without_reading_it(db_url, engine, tmp_path, capsys):
    """Finding: a 1 GB sparse file used 8.5 GB of memory. Its apparent size is checked before reading."""
    path = tmp_path / "sparse.csv"
    with open(path, "wb") as handle:
        handle.write(csv_text(ROWS).encode())
        handle.truncate(1_000_000_000)  # a hole: no disk space used
    tracemalloc.start()
    try:
        with pytest.raises(InputRejected) as refused:
            read_table(path)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 5_000_000, f"{peak:,} bytes allocated while refusing the file"
    assert "sparse.csv" in refused.value.summary
    assert "it is 1,000.0 MB; at most 64.0 MB are read (NCS_TRACKER_MAX_FILE_MB=64)" in str(refused.value)
    err = refused_by_cli(capsys, db_url, engine, path)
    assert "sparse.csv" in err and "NCS_TRACKER_MAX_FILE_MB" in err


def test_a_pipe_is_refused_without_waiting_for_a_writer(tmp_path):
    """A FIFO named like a CSV file would block a reader forever; it is refused from its kind, unopened."""
    fifo = tmp_path / "pipe.csv"
    os.mkfifo(fifo)
    outcome: list[BaseException | None] = []

    def attempt() -> None:
        try:
            read_table(fifo)
            outcome.append(None)
        except BaseException as error:  # noqa: BLE001 - handed to the test thread
            outcome.append(error)

    worker = threading.Thread(target=attempt, daemon=True)
    worker.start()
    worker.join(timeout=10)
    if worker.is_alive():  # release the blocked reader before failing
        with open(fifo, "wb"):
            pass
        worker.join(timeout=10)
        pytest.fail("reading a FIFO blocked waiting for a writer")
    assert isinstance(outcome[0], InputRejected) and "it is a pipe" in str(outcome[0])


def test_a_folder_is_refused_by_its_kind(tmp_path):
    folder = tmp_path / "folder.csv"
    folder.mkdir()
    with pytest.raises(InputRejected, match="it is a folder"):
        read_table(folder)


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs /proc (Linux)")
def test_reading_is_bounded_even_when_stat_reports_a_small_size():
    """/proc files report size 0 but hold text: the bounded read stops one byte past the limit."""
    assert stat.S_ISREG(os.stat("/proc/self/status").st_mode) and os.stat("/proc/self/status").st_size == 0
    with pytest.raises(InputRejected, match="it grew past 0.0 MB while it was read"):
        read_bounded(Path("/proc/self/status"), InputLimits(file_bytes=10))


def test_file_size_limit_is_a_setting_from_the_environment(tmp_path, monkeypatch):
    path = write_csv(tmp_path / "small.csv", ROWS)
    assert len(read_table(path).cells) == 3  # well under the default
    monkeypatch.setenv("NCS_TRACKER_MAX_FILE_MB", "0.0001")  # 100 bytes
    with pytest.raises(InputRejected) as refused:
        read_table(path)
    assert "small.csv" in str(refused.value) and "NCS_TRACKER_MAX_FILE_MB=0.0001" in str(refused.value)
    with pytest.raises(InputRejected, match="at most 0.0 MB are read"):  # an upload's bytes: the same limit
        parse_table(path.read_bytes(), ".csv", name="upload.csv")


@pytest.mark.parametrize("text", ["ten", "0", "-5", "nan"])
def test_a_bad_limit_setting_is_named(monkeypatch, text):
    monkeypatch.setenv("NCS_TRACKER_MAX_ROWS", text)
    with pytest.raises(TrackerError, match="NCS_TRACKER_MAX_ROWS must be a whole number above 0"):
        from_environment()


def test_defaults_are_the_documented_ones():
    limits = from_environment({})
    assert (
        limits.file_bytes,
        limits.rows,
        limits.columns,
        limits.cell_chars,
        limits.xlsx_expanded_bytes,
    ) == (64_000_000, 500_000, 100, 2_000, 256_000_000)
    readme = (Path(__file__).resolve().parent.parent / "README.md").read_text(encoding="utf-8")
    for name in ENV_NAMES:
        assert name in readme, f"{name} is not documented in the README"


# ------------------------------------------------------------------------------------------------------------
# Rows, columns, cells
# ------------------------------------------------------------------------------------------------------------


def test_row_limit_counts_rows_as_a_spreadsheet_does(tmp_path, monkeypatch):
    monkeypatch.setenv("NCS_TRACKER_MAX_ROWS", "3")
    assert len(read_table(write_csv(tmp_path / "three.csv", ROWS)).cells) == 3
    # A quoted line break inside a cell is one row, not two.
    quoted = [r[:-1] + ['"abductor\npollicis"'] for r in ROWS]
    assert len(read_table(write_csv(tmp_path / "quoted.csv", quoted)).cells) == 3
    four = ROWS + [ROWS[0]]
    with pytest.raises(InputRejected) as refused:
        read_table(write_csv(tmp_path / "four.csv", four))
    assert "four.csv" in str(refused.value) and "at most 3 data rows" in str(refused.value)
    assert "NCS_TRACKER_MAX_ROWS=3" in str(refused.value)
    with pytest.raises(InputRejected, match="at most 3 data rows"):
        parse_table(workbook_bytes(four), ".xlsx", name="four.xlsx")
    assert len(parse_table(workbook_bytes(ROWS), ".xlsx").cells) == 3


def test_a_workbook_cell_far_down_is_refused_by_the_row_limit_quickly(monkeypatch):
    """A sheet whose only data cell sits in Excel's last row is not expanded into a million rows."""
    monkeypatch.setenv("NCS_TRACKER_MAX_ROWS", "1000")
    book = openpyxl.Workbook()
    book.active.append(HEADER)
    book.active.cell(row=1_048_576, column=1, value="T-700")
    buffer = io.BytesIO()
    book.save(buffer)
    started = time.monotonic()
    with pytest.raises(InputRejected, match="at most 1,000 data rows"):
        parse_table(buffer.getvalue(), ".xlsx")
    assert time.monotonic() - started < 20


def test_column_limit(tmp_path):
    header = HEADER + [f"extra_{i}" for i in range(100)]
    path = write_csv(tmp_path / "wide.csv", [r + [""] * 100 for r in ROWS], header)
    with pytest.raises(InputRejected, match="the header has more than 100 columns"):
        read_table(path)
    with pytest.raises(InputRejected, match="the header has more than 100 columns"):
        parse_table(workbook_bytes([r + [None] * 100 for r in ROWS], header), ".xlsx")


def test_a_ten_megabyte_cell_is_refused_in_validation_on_both_backends(db_url, engine, tmp_path, capsys):
    """Finding: a 10 MB cell went into a 60-character column on SQLite and failed only at write time on
    PostgreSQL after the dry run said OK. Now the dry run and the import refuse it alike, by row and column,
    and the message shows only the cell's beginning."""
    rows = [list(r) for r in ROWS]
    rows[1][HEADER.index("recording_site")] = "x" * 10_000_000
    path = write_csv(tmp_path / "huge-cell.csv", rows)
    for options in (("--dry-run",), ()):
        err = refused_by_cli(capsys, db_url, engine, path, *options)
        assert (
            "row 3, column 'recording_site': the cell holds 10,000,000 characters; at most 2,000 are accepted"
            in err
        )
        assert "NCS_TRACKER_MAX_CELL_CHARS=2000" in err and "huge-cell.csv" in err
        assert len(err) < 2_000, "the rejected cell was echoed"


def test_a_recording_site_longer_than_its_column_is_refused_in_validation(
    db_url, engine, sessions, tmp_path, capsys
):
    """Within the general cell limit but longer than the database column: refused by the dry run as by the
    import on both backends (SQLite would have stored it); the longest allowed value is stored whole."""
    assert RECORDING_SITE_CHARS == NerveTest.__table__.c.recording_site.type.length == 60
    rows = [list(r) for r in ROWS]
    for row in rows:
        row[HEADER.index("recording_site")] = "m" * 61
    path = write_csv(tmp_path / "long-site.csv", rows)
    for options in (("--dry-run",), ()):
        err = refused_by_cli(capsys, db_url, engine, path, *options)
        assert "row 2, column 'recording_site': a recording site has at most 60 characters" in err
    for row in rows:
        row[HEADER.index("recording_site")] = "m" * 60
    code, _out, err = run_cli(capsys, "--db", db_url, "import", str(write_csv(tmp_path / "fits.csv", rows)))
    assert code == 0, err
    with sessions() as session:
        assert session.scalars(select(NerveTest.recording_site)).all() == ["m" * 60]


def test_nul_bytes_are_refused_by_row_and_column(db_url, engine, tmp_path, capsys):
    rows = [list(r) for r in ROWS]
    path = tmp_path / "nul.csv"
    path.write_bytes(csv_text(rows).replace("elbow", "elb\x00ow").encode())
    err = refused_by_cli(capsys, db_url, engine, path)
    assert "row 3, column 'site': byte 0x00" in err and "nul.csv" in err
    utf16 = tmp_path / "utf16.csv"
    utf16.write_bytes(csv_text(ROWS).encode("utf-16"))
    with pytest.raises(InputRejected, match="the file looks like UTF-16: save the file as 'CSV UTF-8'"):
        read_table(utf16)


# ------------------------------------------------------------------------------------------------------------
# .xlsx: expansion and formulas
# ------------------------------------------------------------------------------------------------------------


def _bomb(expanded_rows_bytes: int, *, stream: bool = True) -> bytes:
    """A valid two-row workbook whose worksheet is padded with ``expanded_rows_bytes`` of repeated rows
    (``stream``: written block by block as a ZIP64 part; else in one piece, with plain 32-bit size fields)."""
    source = zipfile.ZipFile(io.BytesIO(workbook_bytes(ROWS[:1])))
    row = b'<row><c t="inlineStr"><is><t>T-700</t></is></c></row>'
    block = row * (1_000_000 // len(row))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED, compresslevel=9) as archive:
        for info in source.infolist():
            data = source.read(info)
            if info.filename != "xl/worksheets/sheet1.xml":
                archive.writestr(info, data)
                continue
            head, tail = data.split(b"</sheetData>")
            member = zipfile.ZipInfo(info.filename)
            member.compress_type = zipfile.ZIP_DEFLATED
            if not stream:
                archive.writestr(
                    member, head + block * (expanded_rows_bytes // len(block)) + b"</sheetData>" + tail
                )
                continue
            with archive.open(member, "w", force_zip64=True) as handle:
                handle.write(head)
                for _ in range(expanded_rows_bytes // len(block)):
                    handle.write(block)
                handle.write(b"</sheetData>" + tail)
    return out.getvalue()


@pytest.fixture(scope="module")
def bomb() -> bytes:
    """About 1.5 MB of .xlsx that expands to 420 MB (the finding's proportions)."""
    return _bomb(420_000_000)


def test_xlsx_zip_bomb_is_refused_quickly_on_both_backends(db_url, engine, bomb, tmp_path, capsys):
    """Finding: a 2 MB .xlsx expanding to 420 MB ran for minutes. Declared sizes are checked first."""
    assert len(bomb) < 3_000_000
    path = tmp_path / "bomb.xlsx"
    path.write_bytes(bomb)
    started = time.monotonic()
    err = refused_by_cli(capsys, db_url, engine, path)
    assert time.monotonic() - started < 10
    assert "bomb.xlsx" in err and "its parts would expand to 420.0 MB; at most 256.0 MB are read" in err


def _lie_about_size(raw: bytes, name: str, size: int) -> bytes:
    """``raw`` with member ``name``'s uncompressed size written as ``size`` in both zip headers."""
    data = bytearray(raw)
    info = zipfile.ZipFile(io.BytesIO(raw)).getinfo(name)
    encoded = name.encode()
    local = info.header_offset
    assert data[local : local + 4] == b"PK\x03\x04" and info.file_size < 0xFFFFFFFF  # 32-bit size fields
    struct.pack_into("<I", data, local + 22, size)
    central = data.find(b"PK\x01\x02")
    while central >= 0:
        length = struct.unpack_from("<H", data, central + 28)[0]
        if data[central + 46 : central + 46 + length] == encoded:
            struct.pack_into("<I", data, central + 24, size)
            break
        central = data.find(b"PK\x01\x02", central + 4)
    return bytes(data)


def test_xlsx_with_understated_sizes_is_refused_too(monkeypatch):
    """Declared sizes may lie: what actually expands is bounded as well (the read stops at the declared size
    and the part is then refused as damaged, never expanded further)."""
    raw = _bomb(20_000_000, stream=False)
    liar = _lie_about_size(raw, "xl/worksheets/sheet1.xml", 5_000)
    assert sum(i.file_size for i in zipfile.ZipFile(io.BytesIO(liar)).infolist()) < 100_000
    started = time.monotonic()
    with pytest.raises(InputRejected, match="damaged"):
        parse_table(liar, ".xlsx", name="liar.xlsx")
    assert time.monotonic() - started < 10
    monkeypatch.setenv("NCS_TRACKER_MAX_XLSX_MB", "5")  # the honest workbook: over an actual 5 MB limit
    with pytest.raises(InputRejected, match="would expand to 20.0 MB; at most 5.0 MB are read"):
        parse_table(raw, ".xlsx")


def test_formula_without_a_saved_result_is_refused_by_row_and_column(db_url, engine, tmp_path, capsys):
    """Finding: formula cells without a cached result imported as empty with exit 0."""
    rows = [list(r) for r in ROWS]
    rows[1][HEADER.index("latency_ms")] = "=3.6+4.3"  # openpyxl saves a formula without a result
    path = tmp_path / "formula.xlsx"
    path.write_bytes(workbook_bytes(rows))
    for options in (("--dry-run",), ()):
        err = refused_by_cli(capsys, db_url, engine, path, *options)
        assert "row 3, column 'latency_ms': cell I3 holds a formula whose result was not saved" in err
        assert "formula.xlsx" in err


def test_formula_with_a_saved_result_imports_its_result(tmp_path):
    """A workbook saved by a spreadsheet program keeps each formula's result: that result is the value."""
    rows = [list(r) for r in ROWS]
    rows[1][HEADER.index("latency_ms")] = "=3.6+4.3"
    archive = zipfile.ZipFile(io.BytesIO(workbook_bytes(rows)))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as target:
        for info in archive.infolist():
            data = archive.read(info)
            if info.filename == "xl/worksheets/sheet1.xml":
                assert b"<f>3.6+4.3</f><v />" in data
                data = data.replace(b"<f>3.6+4.3</f><v />", b"<f>3.6+4.3</f><v>7.9</v>")
            target.writestr(info, data)
    cells = parse_table(out.getvalue(), ".xlsx").cells
    assert cells.loc[1, "latency_ms"] == "7.9"


def test_a_workbook_part_declaring_entities_is_refused():
    archive = zipfile.ZipFile(io.BytesIO(workbook_bytes(ROWS)))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as target:
        for info in archive.infolist():
            data = archive.read(info)
            if info.filename == "xl/worksheets/sheet1.xml":
                data = b'<?xml version="1.0"?><!DOCTYPE worksheet [<!ENTITY a "aaaa">]>' + data
            target.writestr(info, data)
    with pytest.raises(InputRejected, match="damaged or is not a workbook"):
        parse_table(out.getvalue(), ".xlsx")


# ------------------------------------------------------------------------------------------------------------
# No identifying data echoed
# ------------------------------------------------------------------------------------------------------------


def test_a_rejected_patient_code_is_shown_only_in_part(db_url, engine, tmp_path, capsys):
    name = "Gwendolyn Farthingale-Oduya"  # invented, a name typed where the code belongs
    rows = [[name] + r[1:] for r in ROWS]
    err = refused_by_cli(capsys, db_url, engine, write_csv(tmp_path / "named.csv", rows))
    assert "row 2, column 'patient': not a valid patient code" in err
    assert "(value 'Gwe…')" in err
    assert "Gwendolyn" not in err and "Farthingale" not in err


def test_identity_like_values_are_cut_in_every_message(tmp_path):
    note = "phoned Mr Quillbrook Astaire-Venn on 0311 555 0199 " * 60  # invented, over the cell limit
    header = ["patient", "therapy", "start_date", "note"]
    path = write_csv(tmp_path / "notes.csv", [["T-700", "ivig", "2024-03-01", note]], header)
    with pytest.raises(InputRejected) as refused:
        read_table(path, ("treatments",))
    text = str(refused.value)
    assert "row 2, column 'note': the cell holds 3,059 characters" in text  # trailing space trimmed
    assert "Quillbrook" not in text and "(value 'pho…')" in text


@pytest.mark.parametrize(
    ("column", "value", "shown"),
    [
        ("patient", "Hans Müller", "Han…"),
        ("full_name", "Ada", "A…"),  # never the whole value, however short
        ("record_number", "MRN-1", "MR…"),
        ("examiner", "Dr Q", "Dr…"),
        ("note", "x", "…"),
        ("latency_ms", "3,6", "3,6"),  # a measurement is shown as written
        ("recording_site", "y" * 100, "y" * 40 + "… (100 characters)"),
    ],
)
def test_excerpt_rules(column, value, shown):
    assert excerpt(column, value) == shown


def test_header_names_are_shown_as_headers():
    problems = input_limits.guarded(
        [input_limits.Problem(1, "patient_name", "patient_name", "unknown column")]
    )
    assert problems[0].value == "patient_name"


# ------------------------------------------------------------------------------------------------------------
# Normal-limit sets: plausibility ranges as for measurements
# ------------------------------------------------------------------------------------------------------------

LIMIT_HEADER = ["nerve", "modality", "parameter", "bound", "value", "age_min", "age_max", "source"]


def test_implausible_normal_limits_are_refused_by_row_and_field(db_url, engine, sessions, tmp_path):
    """A velocity lower limit of 500 m/s (a unit slip) and other values no normal limit can take. The ranges
    are those of tracker/reference/plausibility.csv: physical limits, common practice, no source (as stated
    there); the age band's upper bound of 120 years likewise."""
    rows = [
        ["median", "motor", "cv_ms", "lln", "500", "", "", "invented"],  # velocity ≥ 10 and ≤ 100 m/s
        ["median", "motor", "distal_latency_ms", "uln", "440", "", "", "invented"],  # latency ≤ 100 ms
        ["sural", "sensory", "amplitude", "lln", "600", "", "", "invented"],  # SNAP ≤ 300 µV
        ["ulnar", "motor", "amplitude", "lln", "60", "", "", "invented"],  # CMAP ≤ 50 mV
        ["ulnar", "motor", "f_latency_ms", "uln", "32", "0", "250", "invented"],  # an age band to 250 years
    ]
    path = write_csv(tmp_path / "lab.csv", rows, LIMIT_HEADER)
    before = fingerprint(engine)
    with pytest.raises(InputRejected) as refused, sessions.begin() as session:
        import_limit_set(session, path, name="lab", username="tester")
    text = str(refused.value)
    plausible = "limit is outside the plausible range; expected"
    assert f"row 2, column 'value': a motor cv_ms {plausible} ≥ 10 and ≤ 100 m/s" in text
    assert f"row 3, column 'value': a distal_latency_ms {plausible} > 0 and ≤ 100 ms" in text
    assert f"row 4, column 'value': a sensory amplitude {plausible} ≥ 0 and ≤ 300 µV" in text
    assert f"row 5, column 'value': a motor amplitude {plausible} ≥ 0 and ≤ 50 mV" in text
    assert "row 6, column 'age_max': outside the plausible range of an age or height band" in text
    assert fingerprint(engine) == before


def test_plausible_normal_limits_are_imported(sessions, tmp_path):
    """Values of the shipped default set (Preston & Shapiro appendix, as in limits_default.csv)."""
    rows = [
        ["median", "motor", "cv_ms", "lln", "49", "", "", "Preston & Shapiro appendix"],
        ["median", "motor", "distal_latency_ms", "uln", "4.4", "", "", "Preston & Shapiro appendix"],
        ["median", "sensory", "amplitude", "lln", "20", "", "", "Preston & Shapiro appendix"],
    ]
    with sessions.begin() as session:
        info = import_limit_set(
            session, write_csv(tmp_path / "lab.csv", rows, LIMIT_HEADER), name="lab", username="tester"
        )
    assert info.rows == 3


def test_limits_file_with_crowded_strata_is_refused_quickly():
    """The overlap check is pairwise; more than 100 strata of one limit are refused before it runs."""
    rows = [["median", "motor", "cv_ms", "lln", "49", str(age), str(age + 1), ""] for age in range(0, 101)]
    cells = parse_table(csv_text(rows, LIMIT_HEADER).encode(), ".csv", ("limits",)).cells
    started = time.monotonic()
    with pytest.raises(
        InputRejected, match="more than 100 rows give the lln cv_ms of the motor median nerve"
    ):
        validate_limits(cells)
    assert time.monotonic() - started < 5


def test_limit_set_name_is_checked_against_its_column(sessions, tmp_path):
    rows = [["median", "motor", "cv_ms", "lln", "49", "", "", ""]]
    path = write_csv(tmp_path / "lab.csv", rows, LIMIT_HEADER)
    length = LimitSet.__table__.c.name.type.length
    with (
        pytest.raises(InputRejected, match=f"a set's name has at most {length} characters"),
        sessions.begin() as session,
    ):
        import_limit_set(session, path, name="n" * (length + 1), username="tester")
    with sessions.begin() as session:
        assert import_limit_set(session, path, name="n" * length, username="tester").name == "n" * length
