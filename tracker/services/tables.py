"""Reading interchange files (CSV, .xlsx) into a table of text cells with spreadsheet row numbers."""

from __future__ import annotations

import csv
import datetime as dt
import hashlib
import io
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as arrow_csv

from tracker.domain.catalogue import normalise_word
from tracker.errors import InputRejected, Problem

ROW = "file_row"  # spreadsheet row number column (header = row 1); a reserved name


@dataclass(frozen=True)
class InputTable:
    """A file's cells as trimmed text (``""`` for empty), columns named in canonical lower case."""

    cells: pd.DataFrame
    sha256: str
    kind: str  # "measurements", "treatments", "scores", "limits"


KIND_MARKERS = (("bound", "limits"), ("nerve", "measurements"), ("therapy", "treatments"), ("scale", "scores"))


def _decode(raw: bytes) -> str:
    if raw.startswith(b"\xef\xbb\xbf"):
        raw = raw[3:]
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as error:
        row, column = _locate(raw, error.start)
        raise InputRejected(
            "The file is not UTF-8 text",
            [
                Problem(
                    row,
                    column,
                    None,
                    f"byte 0x{raw[error.start]:02x} (offset {error.start}) is not valid UTF-8; "
                    "save the file as 'CSV UTF-8' and import it again",
                )
            ],
        ) from None


def _locate(raw: bytes, offset: int) -> tuple[int, str | None]:
    """Spreadsheet row and header name of the cell holding byte ``offset`` (quoted newlines aside)."""
    row = raw.count(b"\n", 0, offset) + 1
    line_start = raw.rfind(b"\n", 0, offset) + 1
    index = raw.count(b",", line_start, offset)
    header = raw.split(b"\n", 1)[0].decode("utf-8", errors="replace").strip().lstrip("\ufeff").split(",")
    column = normalise_word(header[index]) if index < len(header) else None
    return row, column


def _xlsx_cell(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, dt.datetime):
        return value.date().isoformat() if value.time() == dt.time() else value.isoformat()
    if isinstance(value, dt.date):
        return value.isoformat()
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def _read_xlsx(raw: bytes) -> pd.DataFrame:
    import openpyxl

    try:
        book = openpyxl.load_workbook(io.BytesIO(raw), read_only=True, data_only=True)
    except Exception:
        raise InputRejected(
            "The file could not be read as an Excel workbook",
            [Problem(None, None, None, "the .xlsx file is damaged or is not a workbook")],
        ) from None
    sheet = book.worksheets[0]
    rows = [[_xlsx_cell(v) for v in row] for row in sheet.iter_rows(values_only=True)]
    book.close()
    if not rows:
        return pd.DataFrame()
    header, body = rows[0], rows[1:]
    width = len(header)
    body = [(r + [""] * width)[:width] for r in body]
    return pd.DataFrame(body, columns=header, dtype=object)


def _read_csv_fast(text: str) -> pd.DataFrame | None:
    """Arrow's multi-threaded reader for large, regular files; ``None`` sends the file to the careful
    reader (blank lines, ragged rows, anything unusual), which numbers rows exactly as a spreadsheet does."""
    names = next(csv.reader([text.split("\n", 1)[0].rstrip("\r")]))
    placeholders = [f"column_{i}" for i in range(len(names))]
    irregular: list[object] = []

    def note(row: object) -> str:
        irregular.append(row)
        return "skip"

    try:
        table = arrow_csv.read_csv(
            io.BytesIO(text.encode("utf-8")),
            read_options=arrow_csv.ReadOptions(column_names=placeholders, skip_rows=1),
            parse_options=arrow_csv.ParseOptions(invalid_row_handler=note, ignore_empty_lines=False),
            convert_options=arrow_csv.ConvertOptions(
                column_types={p: pa.string() for p in placeholders},
                strings_can_be_null=False,
                quoted_strings_can_be_null=False,
            ),
        )
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return None
    if irregular:
        return None
    columns = {p: pc.utf8_trim_whitespace(table.column(p)).to_pandas() for p in placeholders}
    frame = pd.DataFrame(columns)
    frame.columns = names
    return frame


def read_table(path: Path, allowed_kinds: tuple[str, ...] = ("measurements", "treatments", "scores")) -> InputTable:
    """Read ``path`` (``.csv`` or ``.xlsx``); refuse anything else with a clear message."""
    try:
        raw = path.read_bytes()
    except OSError as error:
        raise InputRejected("The file could not be read", [Problem(None, None, str(path), error.strerror or "unreadable")]) from None
    return parse_table(raw, path.suffix, allowed_kinds)


def parse_table(raw: bytes, suffix: str, allowed_kinds: tuple[str, ...] = ("measurements", "treatments", "scores")) -> InputTable:
    """Parse a file's bytes (an upload, say); ``suffix`` is its extension (``.csv``, ``.xlsx``)."""
    sha = hashlib.sha256(raw).hexdigest()
    suffix = suffix.lower()
    trimmed = False
    if suffix == ".xlsx":
        frame = _read_xlsx(raw)
    elif suffix in (".csv", ".txt"):
        text = _decode(raw)
        if not text.strip():
            raise InputRejected("The file is empty", [Problem(None, None, None, "no header row and no data")])
        frame = _read_csv_fast(text)
        trimmed = frame is not None
        if frame is None:
            try:
                frame = pd.read_csv(
                    io.StringIO(text), dtype=str, keep_default_na=False, skip_blank_lines=False, na_filter=False
                )
            except pd.errors.ParserError as error:
                raise InputRejected("The file is not valid CSV", [Problem(None, None, None, str(error))]) from None
    else:
        raise InputRejected(
            "Unsupported file type",
            [Problem(None, None, suffix, "expected a .csv (UTF-8, comma-separated) or .xlsx file")],
        )
    headers = [normalise_word(str(h)) if h is not None else "" for h in frame.columns]
    problems = [
        Problem(1, str(h), str(h), "this header appears more than once (ignoring case and spaces)")
        for h in sorted({h for h in headers if headers.count(h) > 1})
    ]
    if ROW in headers:
        problems.append(Problem(1, ROW, ROW, "this column name is reserved by ncs-tracker; rename the column"))
    if problems:
        raise InputRejected("The header row has duplicate or reserved columns", problems)
    frame.columns = headers
    if not trimmed:
        frame = frame.astype(str).apply(lambda column: column.str.strip()) if len(frame) else frame.astype(str)
    frame[ROW] = range(2, len(frame) + 2)
    # Rows where every cell is empty (trailing spreadsheet rows) carry no data.
    data_columns = [c for c in frame.columns if c != ROW]
    if data_columns and len(frame):
        frame = frame[(frame[data_columns] != "").any(axis=1)]
    kind = next((k for marker, k in KIND_MARKERS if marker in headers), None)
    if kind is None:
        raise InputRejected(
            "The file type could not be recognised from its header",
            [
                Problem(
                    1,
                    None,
                    ", ".join(h for h in headers if h) or "(empty)",
                    "expected measurements (with a 'nerve' column), treatments ('therapy') or scores ('scale')",
                )
            ],
        )
    if kind not in allowed_kinds:
        hint = "import it with: ncs-tracker limits import FILE --name NAME" if kind == "limits" else f"expected {' or '.join(allowed_kinds)}"
        raise InputRejected("This file is of another kind", [Problem(1, None, kind, f"the header is that of a {kind} file; {hint}")])
    return InputTable(cells=frame.reset_index(drop=True), sha256=sha, kind=kind)
