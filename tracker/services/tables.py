"""Reading interchange files (CSV, .xlsx) into a table of text cells with spreadsheet row numbers.

Every file is read within the limits of :mod:`tracker.services.input_limits`: regular files only, its size
checked before and while reading, rows, columns and cell lengths counted, an .xlsx workbook's parts
measured before they are expanded, NUL bytes and formulas without a saved result refused.
"""

from __future__ import annotations

import csv
import datetime as dt
import hashlib
import io
import os
import re
import stat
import zipfile
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as arrow_csv

from tracker.domain.catalogue import normalise_word
from tracker.errors import InputRejected, Problem
from tracker.services.input_limits import InputLimits, from_environment, guarded, megabytes

ROW = "file_row"  # spreadsheet row number column (header = row 1); a reserved name


@dataclass(frozen=True)
class InputTable:
    """A file's cells as trimmed text (``""`` for empty), columns named in canonical lower case."""

    cells: pd.DataFrame
    sha256: str
    kind: str  # "measurements", "treatments", "scores", "patients", "limits"


KIND_MARKERS = (
    ("bound", "limits"),
    ("nerve", "measurements"),
    ("therapy", "treatments"),
    ("scale", "scores"),
    ("onset_date", "patients"),
    ("full_name", "patients"),
    ("record_number", "patients"),
    ("birth_date", "patients"),
)
IMPORT_KINDS = ("measurements", "treatments", "scores", "patients")


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


XLSX_COMPRESSION = (zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED)  # what Excel writes; others expand unbounded
_FORMULA_TAG = re.compile(rb"<(?:\w+:)?f[\s>/]")  # a worksheet's formula element, with or without a prefix
_DOCTYPE = b"<!DOCTYPE"  # no part of a workbook declares entities; a declaration is refused, not expanded
_BLOCK = 1 << 20


def _xlsx_parts(raw: bytes, limits: InputLimits) -> bool:
    """Measure a workbook's zip parts before openpyxl expands them; ``True`` when a worksheet holds formulas.

    Refused: more than ``limits.xlsx_parts`` parts, a compression Excel does not use, a declared or an
    actual uncompressed total above ``limits.xlsx_expanded_bytes``, a damaged part, an XML entity
    declaration. The declared sizes are checked first, so a zip bomb is refused without expanding it.
    """
    damaged = InputRejected(
        "The file could not be read as an Excel workbook",
        [Problem(None, None, None, "the .xlsx file is damaged or is not a workbook")],
    )
    try:
        archive = zipfile.ZipFile(io.BytesIO(raw))
        parts = archive.infolist()
    except (zipfile.BadZipFile, zipfile.LargeZipFile, ValueError, EOFError):
        raise damaged from None

    def refuse(message: str) -> InputRejected:
        return InputRejected("The workbook is larger than allowed", [Problem(None, None, None, message)])

    if len(parts) > limits.xlsx_parts:
        raise refuse(f"it has {len(parts):,} parts; a workbook of one sheet has about a dozen")
    if any(p.compress_type not in XLSX_COMPRESSION for p in parts):
        raise damaged
    declared = sum(p.file_size for p in parts)
    limit = limits.xlsx_expanded_bytes
    limit_words = f"at most {megabytes(limit)} are read ({limits.setting('xlsx_expanded_bytes')})"
    if declared > limit:
        raise refuse(f"its parts would expand to {megabytes(declared)}; {limit_words}")
    expanded = 0
    formulas = False
    try:
        for part in parts:
            worksheet = part.filename.startswith("xl/worksheets/")
            tail = b""
            with archive.open(part) as handle:
                while block := handle.read(_BLOCK):
                    expanded += len(block)
                    if expanded > limit:
                        raise refuse(f"its parts expand to more than {megabytes(expanded)}; {limit_words}")
                    window = tail + block  # a tag split between two blocks is still found
                    if _DOCTYPE in window:
                        raise damaged
                    formulas = formulas or (worksheet and _FORMULA_TAG.search(window) is not None)
                    tail = block[-16:]
    except (zipfile.BadZipFile, EOFError, OSError, ValueError, RuntimeError):
        raise damaged from None
    return formulas


def _sheet_rows(
    raw: bytes, limits: InputLimits, *, data_only: bool
) -> tuple[list[str], list[int], list[list]]:
    """The first sheet's header and its non-empty rows with their spreadsheet numbers, read row by row
    within the column and row limits (a declared sheet size is ignored: it may be false)."""
    import openpyxl

    try:
        book = openpyxl.load_workbook(io.BytesIO(raw), read_only=True, data_only=data_only)
        sheet = book.worksheets[0]
    except Exception:
        raise InputRejected(
            "The file could not be read as an Excel workbook",
            [Problem(None, None, None, "the .xlsx file is damaged or is not a workbook")],
        ) from None
    sheet.reset_dimensions()
    header: list = []
    numbers: list[int] = []
    body: list[list] = []
    try:
        first = sheet.iter_rows(min_row=1, max_row=1, min_col=1, max_col=limits.columns + 1, values_only=True)
        for values in first:
            header = list(values)
        while header and header[-1] in (None, ""):
            header.pop()
        if len(header) > limits.columns:
            raise _too_many_columns(limits)
        # Data rows as wide as the header (cells beyond it carry no named value); empty rows are skipped, so
        # a far-away cell costs iterating the rows between, never storing them.
        rows = sheet.iter_rows(min_row=2, min_col=1, max_col=len(header), values_only=True) if header else ()
        for number, values in enumerate(rows, start=2):
            if all(v is None or v == "" for v in values):
                continue
            if number > limits.rows + 1:
                raise _too_many_rows(limits)
            numbers.append(number)
            body.append(list(values))
    except InputRejected:
        raise
    except Exception:
        raise InputRejected(
            "The file could not be read as an Excel workbook",
            [Problem(None, None, None, "the first sheet is damaged")],
        ) from None
    finally:
        book.close()
    return header, numbers, body


def _column_letter(index: int) -> str:
    from openpyxl.utils import get_column_letter

    return get_column_letter(index + 1)


def _read_xlsx(raw: bytes, limits: InputLimits) -> tuple[pd.DataFrame, list[int]]:
    """The first sheet as text cells, and each row's spreadsheet number (empty rows left out)."""
    formulas = _xlsx_parts(raw, limits)
    header, numbers, body = _sheet_rows(raw, limits, data_only=True)
    if formulas:  # a formula's saved result is read; a formula saved without one is refused by cell
        written_header, written_numbers, written_body = _sheet_rows(raw, limits, data_only=False)
        cached = dict(zip(numbers, body))
        cached[1] = header
        problems = []
        for number, values in [(1, written_header), *zip(written_numbers, written_body)]:
            saved = cached.get(number, [])
            for index, value in enumerate(values):
                result = saved[index] if index < len(saved) else None
                if isinstance(value, str) and value.startswith("=") and result is None:
                    name = header[index] if number > 1 and index < len(header) and header[index] else None
                    problems.append(
                        Problem(
                            number,
                            normalise_word(str(name)) if name is not None else None,
                            None,
                            f"cell {_column_letter(index)}{number} holds a formula whose result was not "
                            "saved with the workbook; open it in a spreadsheet program, let it calculate and "
                            "save it again, or paste the values",
                        )
                    )
        if problems:
            raise InputRejected("The workbook has formulas without a saved result", problems)
    if not header:
        return pd.DataFrame(), []
    width = len(header)
    cells = [[_xlsx_cell(v) for v in (row + [None] * width)[:width]] for row in body]
    return pd.DataFrame(cells, columns=[_xlsx_cell(h) or None for h in header], dtype=object), numbers


def _too_many_rows(limits: InputLimits) -> InputRejected:
    return InputRejected(
        "The file has more rows than allowed",
        [
            Problem(
                None,
                None,
                None,
                f"at most {limits.rows:,} data rows below the header are read ({limits.setting('rows')}); "
                "split the file",
            )
        ],
    )


def _too_many_columns(limits: InputLimits) -> InputRejected:
    return InputRejected(
        "The file has more columns than allowed",
        [
            Problem(
                1,
                None,
                None,
                f"the header has more than {limits.columns:,} columns ({limits.setting('columns')})",
            )
        ],
    )


def _read_csv_fast(text: str) -> pd.DataFrame | None:
    """Arrow's multi-threaded reader for large, regular files; ``None`` sends the file to the careful
    reader (blank lines, ragged rows, anything unusual), which numbers rows exactly as a spreadsheet does."""
    try:
        names = next(csv.reader([text.split("\n", 1)[0].rstrip("\r")]))
    except csv.Error:  # a header cell beyond the csv module's field limit: the careful reader has none
        return None
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


FILE_KINDS = (  # what ``stat`` says a path is, in words, for the refusal of anything but a regular file
    (stat.S_ISDIR, "a folder"),
    (stat.S_ISCHR, "a device"),
    (stat.S_ISBLK, "a device"),
    (stat.S_ISFIFO, "a pipe"),
    (stat.S_ISSOCK, "a socket"),
)


def _not_regular(mode: int) -> str | None:
    if stat.S_ISREG(mode):
        return None
    return next((words for test, words in FILE_KINDS if test(mode)), "not a regular file")


def read_bounded(path: Path, limits: InputLimits | None = None) -> bytes:
    """The bytes of the regular file ``path``, refused unread when it is too large or not a regular file.

    The size is checked by ``stat`` before opening (a sparse file's apparent size counts), again on the opened
    file, and by reading at most one byte more than the limit (a file that grows while read). A pipe is never
    opened for reading, so nothing waits for a writer.
    """
    limits = limits or from_environment()

    def refuse(message: str) -> InputRejected:
        return InputRejected(f"The file was not read: {path.name}", [Problem(None, None, None, message)])

    def check(info: os.stat_result) -> None:
        kind = _not_regular(info.st_mode)
        if kind is not None:
            raise refuse(f"it is {kind}; only regular .csv or .xlsx files are imported")
        if info.st_size > limits.file_bytes:
            raise refuse(
                f"it is {megabytes(info.st_size)}; at most {megabytes(limits.file_bytes)} are read "
                f"({limits.setting('file_bytes')}); split the file"
            )

    try:
        check(os.stat(path))
        handle = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_NOCTTY", 0))
    except OSError as error:
        raise refuse(error.strerror or "unreadable") from None
    try:
        check(os.fstat(handle))  # the file opened is the file checked (the path may have changed since)
        blocks, size = [], 0
        while block := os.read(handle, min(_BLOCK, limits.file_bytes + 1 - size)):
            blocks.append(block)
            size += len(block)
            if size > limits.file_bytes:
                raise refuse(
                    f"it grew past {megabytes(limits.file_bytes)} while it was read "
                    f"({limits.setting('file_bytes')})"
                )
    except OSError as error:
        raise refuse(error.strerror or "unreadable") from None
    finally:
        os.close(handle)
    return b"".join(blocks)


def read_table(
    path: Path,
    allowed_kinds: tuple[str, ...] = IMPORT_KINDS,
    *,
    limits: InputLimits | None = None,
) -> InputTable:
    """Read ``path`` (``.csv`` or ``.xlsx``) within ``limits`` (default: the settings in force); refuse
    anything else with a clear message that names the file."""
    limits = limits or from_environment()
    return parse_table(read_bounded(path, limits), path.suffix, allowed_kinds, name=path.name, limits=limits)


def parse_table(
    raw: bytes,
    suffix: str,
    allowed_kinds: tuple[str, ...] = IMPORT_KINDS,
    *,
    name: str | None = None,
    limits: InputLimits | None = None,
) -> InputTable:
    """Parse a file's bytes (an upload, say); ``suffix`` is its extension (``.csv``, ``.xlsx``), ``name``
    the file's name for messages. Refusals list every problem found, rejected values shown in part."""
    limits = limits or from_environment()
    try:
        return _parse(raw, suffix, allowed_kinds, limits)
    except InputRejected as error:
        summary = f"{error.summary}: {name}" if name and name not in error.summary else error.summary
        raise InputRejected(summary, guarded(error.problems, limits)) from None


def _csv_rows(text: str, limits: InputLimits) -> None:
    """Refuse a CSV text with more than ``limits.rows`` rows below the header (blank rows between data rows
    count, as a spreadsheet numbers them; trailing blank lines do not)."""
    body = text.rstrip("\r\n")
    if body.count("\n") <= limits.rows:  # lines bound records from above: nothing to count
        return
    try:
        for count, _ in enumerate(csv.reader(io.StringIO(body)), start=0):
            if count > limits.rows:
                raise _too_many_rows(limits)
    except csv.Error:  # a cell beyond the csv module's field limit: count lines instead (an upper bound)
        raise _too_many_rows(limits) from None


def _nul_bytes(raw: bytes) -> None:
    """Refuse a text file holding NUL bytes, naming the first one's row and column."""
    offset = raw.find(b"\x00")
    if offset < 0:
        return
    utf16 = raw.startswith((b"\xff\xfe", b"\xfe\xff")) or raw[1:2] == b"\x00"
    row, column = _locate(raw, offset) if not utf16 else (None, None)
    raise InputRejected(
        "The file holds NUL bytes",
        [
            Problem(
                row,
                column,
                None,
                f"byte 0x00 (offset {offset}) is not text"
                + ("; the file looks like UTF-16" if utf16 else "")
                + ": save the file as 'CSV UTF-8' and import it again",
            )
        ],
    )


def _cell_problems(frame: pd.DataFrame, rows: pd.Series, limits: InputLimits) -> list[Problem]:
    """Cells longer than ``limits.cell_chars`` or holding a NUL character, each by row and column."""
    problems = []
    for column in frame.columns:
        if column == ROW:
            continue
        values = frame[column].astype(str)
        lengths = values.str.len().to_numpy()
        long = lengths > limits.cell_chars
        nul = values.str.contains("\x00", regex=False).to_numpy(dtype=bool)
        for index in (long | nul).nonzero()[0]:
            value = values.iloc[index]
            if long[index]:
                message = (
                    f"the cell holds {int(lengths[index]):,} characters; at most {limits.cell_chars:,} are "
                    f"accepted ({limits.setting('cell_chars')})"
                )
            else:
                message = "the cell holds a NUL character, which is not text"
            problems.append(Problem(int(rows.iloc[index]), str(column), value, message))  # cut by the caller
    return problems


def _parse(raw: bytes, suffix: str, allowed_kinds: tuple[str, ...], limits: InputLimits) -> InputTable:
    if len(raw) > limits.file_bytes:
        raise InputRejected(
            "The file is larger than allowed",
            [
                Problem(
                    None,
                    None,
                    None,
                    f"it is {megabytes(len(raw))}; at most {megabytes(limits.file_bytes)} are read "
                    f"({limits.setting('file_bytes')}); split the file",
                )
            ],
        )
    sha = hashlib.sha256(raw).hexdigest()
    suffix = suffix.lower()
    trimmed = False
    numbers: list[int] | None = None
    if suffix == ".xlsx":
        frame, numbers = _read_xlsx(raw, limits)
    elif suffix in (".csv", ".txt"):
        _nul_bytes(raw)
        text = _decode(raw)
        if not text.strip():
            raise InputRejected("The file is empty", [Problem(None, None, None, "no header row and no data")])
        if text.split("\n", 1)[0].count(",") >= limits.columns:  # commas bound the header's cells from above
            try:
                many = len(next(csv.reader([text.split("\n", 1)[0]]))) > limits.columns
            except csv.Error:
                many = True
            if many:
                raise _too_many_columns(limits)
        _csv_rows(text, limits)
        frame = _read_csv_fast(text)
        trimmed = frame is not None
        if frame is None:
            try:
                frame = pd.read_csv(
                    io.StringIO(text),
                    dtype=str,
                    keep_default_na=False,
                    skip_blank_lines=False,
                    na_filter=False,
                )
            except pd.errors.ParserError as error:
                raise InputRejected(
                    "The file is not valid CSV", [Problem(None, None, None, str(error))]
                ) from None
    else:
        raise InputRejected(
            "Unsupported file type",
            [Problem(None, None, suffix, "expected a .csv (UTF-8, comma-separated) or .xlsx file")],
        )
    if len(frame.columns) > limits.columns:
        raise _too_many_columns(limits)
    long_headers = [str(h) for h in frame.columns if h is not None and len(str(h)) > limits.cell_chars]
    if long_headers:
        raise InputRejected(
            "The header row has cells longer than allowed",
            [
                Problem(
                    1,
                    None,
                    h,
                    f"the header cell holds {len(h):,} characters; at most {limits.cell_chars:,} are "
                    f"accepted ({limits.setting('cell_chars')})",
                )
                for h in long_headers
            ],
        )
    headers = [normalise_word(str(h)) if h is not None else "" for h in frame.columns]
    problems = [
        Problem(1, str(h), str(h), "this header appears more than once (ignoring case and spaces)")
        for h in sorted({h for h in headers if headers.count(h) > 1})
    ]
    if ROW in headers:
        problems.append(
            Problem(1, ROW, ROW, "this column name is reserved by ncs-tracker; rename the column")
        )
    if problems:
        raise InputRejected("The header row has duplicate or reserved columns", problems)
    frame.columns = headers
    if not trimmed:
        frame = (
            frame.astype(str).apply(lambda column: column.str.strip()) if len(frame) else frame.astype(str)
        )
    frame[ROW] = numbers if numbers is not None else range(2, len(frame) + 2)
    # Rows where every cell is empty (trailing spreadsheet rows) carry no data.
    data_columns = [c for c in frame.columns if c != ROW]
    if data_columns and len(frame):
        frame = frame[(frame[data_columns] != "").any(axis=1)]
    cells = _cell_problems(frame, frame[ROW], limits)
    if cells:
        raise InputRejected("Cells are longer than allowed or are not text", cells)
    kind = next((k for marker, k in KIND_MARKERS if marker in headers), None)
    if kind is None:
        raise InputRejected(
            "The file type could not be recognised from its header",
            [
                Problem(
                    1,
                    None,
                    ", ".join(h for h in headers if h) or "(empty)",
                    "expected measurements (with a 'nerve' column), treatments ('therapy'), scores ('scale') "
                    "or patients ('onset_date', 'full_name', 'record_number' or 'birth_date')",
                )
            ],
        )
    if kind not in allowed_kinds:
        hint = (
            "import it with: ncs-tracker limits import FILE --name NAME"
            if kind == "limits"
            else f"expected {' or '.join(allowed_kinds)}"
        )
        raise InputRejected(
            "This file is of another kind",
            [Problem(1, None, kind, f"the header is that of a {kind} file; {hint}")],
        )
    return InputTable(cells=frame.reset_index(drop=True), sha256=sha, kind=kind)


# -- long files: read in blocks of whole patients ------------------------------------------------------------

STREAM_BYTES = 8 * 1_000_000  # a CSV file larger than this is read in blocks (smaller ones are read whole)
BLOCK_BYTES = 4 * 1_000_000  # about this much of the file is held as cells at a time
STREAM_KINDS = ("measurements", "treatments", "scores")


class _Watched(io.RawIOBase):
    """The file as Arrow reads it, hashed on the way and watched for what the whole-file reader refuses
    (NUL bytes, growing past the size limit)."""

    def __init__(self, handle, limit: int) -> None:
        self.handle, self.limit = handle, limit
        self.sha = hashlib.sha256()
        self.size = 0
        self.unusual = False

    def readable(self) -> bool:
        return True

    def read(self, size: int = -1) -> bytes:
        data = self.handle.read(size)
        self.sha.update(data)
        self.size += len(data)
        if b"\x00" in data or self.size > self.limit:
            self.unusual = True
        return data


class TableStream:
    """A long, regular CSV file read in blocks: each block is a table of cells as :func:`parse_table` makes
    them (trimmed text, canonical column names, spreadsheet row numbers, empty rows left out) and holds every
    row of its patients, provided the file keeps each patient's rows together.

    Anything the whole-file reader would refuse or read differently (a NUL byte, text that is not UTF-8,
    ragged or blank rows, cells too long, too many rows, a patient whose rows are apart) sets
    :attr:`unusual` and ends the blocks: the caller then reads the file whole, which gives its exact
    messages. :attr:`sha256` is the file's digest once every block was read.
    """

    def __init__(self, path: Path, kind: str, names: list[str], headers: list[str], limits: InputLimits):
        self.path, self.kind, self.limits = path, kind, limits
        self.names, self.headers = names, headers
        self.unusual = False
        self.sha256 = ""

    def blocks(self) -> Iterator[pd.DataFrame]:
        placeholders = [f"column_{i}" for i in range(len(self.names))]
        irregular: list[object] = []

        def note(row: object) -> str:
            irregular.append(row)
            return "skip"

        seen: set[str] = set()  # patients of the blocks given out: none may come back later
        carry: pd.DataFrame | None = None
        next_row = 2
        with open(self.path, "rb") as handle:
            watched = _Watched(handle, self.limits.file_bytes)
            try:
                reader = arrow_csv.open_csv(
                    watched,
                    read_options=arrow_csv.ReadOptions(
                        column_names=placeholders, skip_rows=1, block_size=BLOCK_BYTES
                    ),
                    parse_options=arrow_csv.ParseOptions(invalid_row_handler=note, ignore_empty_lines=False),
                    convert_options=arrow_csv.ConvertOptions(
                        column_types={p: pa.string() for p in placeholders},
                        strings_can_be_null=False,
                        quoted_strings_can_be_null=False,
                    ),
                )
                for batch in reader:
                    if irregular or watched.unusual:
                        break
                    frame = pd.DataFrame(
                        {
                            h: pc.utf8_trim_whitespace(batch.column(i)).to_pandas()
                            for i, h in enumerate(self.headers)
                        }
                    )
                    frame[ROW] = range(next_row, next_row + len(frame))
                    next_row += len(frame)
                    if next_row - 2 > self.limits.rows:
                        break
                    frame = frame[(frame[self.headers] != "").any(axis=1)]
                    if _cell_problems(frame, frame[ROW], self.limits):
                        break
                    if carry is not None:
                        frame = pd.concat([carry, frame], ignore_index=True)
                    codes = frame["patient"].to_numpy()
                    if len(codes) == 0:
                        carry = frame
                        continue
                    # The last patient's rows may go on in the next block: they wait for it.
                    change = np.flatnonzero(codes[1:] != codes[:-1])
                    cut = int(change[-1]) + 1 if len(change) else 0
                    carry = frame.iloc[cut:]
                    if cut == 0:
                        continue
                    block = frame.iloc[:cut].reset_index(drop=True)
                    if not self._new_patients(block, seen):
                        break
                    yield block
                else:
                    if not (irregular or watched.unusual):
                        if carry is not None and len(carry):
                            block = carry.reset_index(drop=True)
                            if self._new_patients(block, seen):
                                yield block
                            else:
                                return
                        self.sha256 = watched.sha.hexdigest()
                        return
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError, OSError):
                pass
        self.unusual = True

    def _new_patients(self, block: pd.DataFrame, seen: set[str]) -> bool:
        """Whether no patient of ``block`` was in an earlier block (else :attr:`unusual` is set)."""
        codes = set(block["patient"].unique())
        if codes & seen:
            self.unusual = True
            return False
        seen.update(codes)
        return True


def open_stream(
    path: Path, allowed_kinds: tuple[str, ...] = IMPORT_KINDS, *, limits: InputLimits | None = None
) -> TableStream | None:
    """A :class:`TableStream` of ``path`` when it is a long CSV file of a kind read in blocks (measurements,
    treatments, scores) with a plain header; ``None`` when the file is to be read whole by
    :func:`read_table` (which also gives every refusal its message)."""
    limits = limits or from_environment()
    if path.suffix.lower() not in (".csv", ".txt"):
        return None
    try:
        info = os.stat(path)
        if not stat.S_ISREG(info.st_mode) or not STREAM_BYTES < info.st_size <= limits.file_bytes:
            return None
        with open(path, "rb") as handle:
            first = handle.readline(1 << 20)
    except OSError:
        return None
    if first.startswith(b"\xef\xbb\xbf"):
        first = first[3:]
    try:
        line = first.decode("utf-8").rstrip("\r\n")
    except UnicodeDecodeError:
        return None
    if not line or '"' in line or "\x00" in line:
        return None
    names = line.split(",")
    if len(names) > limits.columns or any(len(n) > limits.cell_chars for n in names):
        return None
    headers = [normalise_word(n) for n in names]
    if len(set(headers)) != len(headers) or ROW in headers or "patient" not in headers or "" in headers:
        return None
    kind = next((k for marker, k in KIND_MARKERS if marker in headers), None)
    if kind not in STREAM_KINDS or kind not in allowed_kinds:
        return None
    return TableStream(path, kind, names, headers, limits)
