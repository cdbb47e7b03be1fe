"""Writing research-export tables to files, chunk by chunk: CSV (appended), Parquet (one row group per chunk),
Excel (a write-only workbook with a data sheet and a dictionary sheet).

Determinism: the same frames give byte-identical files. CSV is plain text; Parquet carries no timestamp;
an Excel file is a zip archive whose entry times and document dates would be "now", so both are set to a
fixed instant (:data:`FIXED_ZIP_TIME`) after openpyxl has written the workbook.

Safe creation: every file is written under a new temporary name in the target folder, created exclusively
(``tempfile.mkstemp``: ``O_CREAT | O_EXCL``, never through an existing name or link) and readable by its
owner only (mode 0600), and written through that open handle; the caller renames it into place.

Spreadsheet safety: a text cell that begins with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return
gets a leading apostrophe in CSV and Excel files, so that no spreadsheet evaluates it as a formula
(common practice for formula injection, no single source). Numbers are never altered.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import io
import math
import os
import re
import shutil
import tempfile
import zipfile
from pathlib import Path
from typing import IO, Any

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from tracker.errors import TrackerError
from tracker.services.export.columns import Column, arrow_schema

FORMATS = ("csv", "parquet", "xlsx", "fhir")  # fhir: NDJSON resources, written by export/fhir.py
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")
_FORMULA_PATTERN = r"[=+\-@\t\r]"
# Zip entries and document dates of Excel files: the earliest time a zip archive can hold.
FIXED_ZIP_TIME = (1980, 1, 1, 0, 0, 0)
FIXED_DOCUMENT_TIME = dt.datetime(1980, 1, 1)
# Excel's row limit (1,048,576 rows) less the header row.
EXCEL_MAX_DATA_ROWS = 1_048_575
COPY_BLOCK_BYTES = 1 << 20
CSV_LINE_END = "\r\n"


def private_file(final: Path) -> tuple[Path, IO[bytes]]:
    """A new, empty temporary file beside ``final`` and its open binary handle.

    Created with ``O_CREAT | O_EXCL`` under an unpredictable name (a planted file or link of that name makes
    the creation fail instead of being followed), mode 0600 whatever the umask: an export may identify
    patients, and even a de-identified one is for its owner to share.
    """
    handle, name = tempfile.mkstemp(prefix=f".{final.name}.", suffix=".partial", dir=final.parent)
    return Path(name), os.fdopen(handle, "w+b")


def neutralise_text(value: Any) -> Any:
    """``value`` with a leading apostrophe if it is text that a spreadsheet would read as a formula."""
    if isinstance(value, str) and value.startswith(FORMULA_STARTS):
        return "'" + value
    return value


def neutralise_frame(frame: pd.DataFrame, columns: list[Column]) -> pd.DataFrame:
    """A copy whose text columns are neutralised (vectorised); other columns are untouched."""
    out = frame.copy(deep=False)
    for column in columns:
        if column.kind != "text" or column.name not in out:
            continue
        values = out[column.name]
        risky = values.str.match(_FORMULA_PATTERN).fillna(False).astype(bool)
        if risky.any():
            out[column.name] = values.mask(risky, "'" + values)
    return out


class CsvTable:
    """UTF-8 CSV without byte-order mark, ISO dates, empty cells for missing values, and CRLF line ends as
    RFC 4180 has them: Python's CSV writer then quotes every cell that holds a line break or a carriage return
    (with bare ``\\n`` line ends a carriage return inside a cell would split the row for some readers)."""

    def __init__(self, path: Path, columns: list[Column], handle: IO[bytes]):
        self.path = path
        self.columns = columns
        self.rows = 0
        self._handle = io.TextIOWrapper(handle, encoding="utf-8", newline="")
        pd.DataFrame(columns=[c.name for c in columns]).to_csv(
            self._handle, index=False, lineterminator=CSV_LINE_END
        )

    def append(self, frame: pd.DataFrame) -> None:
        if frame.empty:
            return
        neutralise_frame(frame, self.columns).to_csv(
            self._handle, header=False, index=False, lineterminator=CSV_LINE_END
        )
        self.rows += len(frame)

    def close(self) -> None:
        self._handle.close()


class ParquetTable:
    """Parquet with the export's schema (float64, int32, bool, string, date32, string dictionaries) and
    pandas' note of each column's dtype; one row group per chunk."""

    def __init__(self, path: Path, columns: list[Column], handle: IO[bytes]):
        self.path = path
        self.columns = columns
        self.rows = 0
        self.schema = arrow_schema(columns)
        self._handle = handle
        self._writer = pq.ParquetWriter(handle, self.schema, compression="snappy")

    def append(self, frame: pd.DataFrame) -> None:
        if frame.empty:
            return
        table = pa.Table.from_pandas(frame, schema=self.schema, preserve_index=False)
        # Every row group with the schema's own pandas note (built once from the column list, not per chunk).
        self._writer.write_table(table.replace_schema_metadata(self.schema.metadata))
        self.rows += len(frame)

    def close(self) -> None:
        self._writer.close()
        self._handle.close()


def _excel_value(value: Any) -> Any:
    if value is None or value is pd.NA:
        return None
    if isinstance(value, float) and math.isnan(value):
        return None
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):  # numpy scalar → Python
        value = value.item()
        if isinstance(value, float) and math.isnan(value):
            return None
    return neutralise_text(value)


class ExcelTable:
    """An .xlsx workbook written in openpyxl's write-only mode: sheet ``data``, then sheet ``dictionary``."""

    def __init__(self, path: Path, columns: list[Column], handle: IO[bytes]):
        from openpyxl import Workbook

        self.path = path
        self._handle = handle
        self.columns = columns
        self.rows = 0
        self._book = Workbook(write_only=True)
        self._book.properties.creator = "ncs-tracker"
        self._book.properties.created = FIXED_DOCUMENT_TIME
        self._data = self._book.create_sheet("data")
        self._data.append([c.name for c in columns])

    def append(self, frame: pd.DataFrame) -> None:
        if frame.empty:
            return
        if self.rows + len(frame) > EXCEL_MAX_DATA_ROWS:
            raise TrackerError(
                f"The export has more than {EXCEL_MAX_DATA_ROWS:,} rows, the most one Excel sheet holds; "
                "use --format csv or parquet, or narrow the export with filters."
            )
        for row in frame.astype(object).itertuples(index=False, name=None):
            self._data.append([_excel_value(v) for v in row])
        self.rows += len(frame)

    def close(self, dictionary: pd.DataFrame | None = None) -> None:
        sheet = self._book.create_sheet("dictionary")
        if dictionary is not None:
            sheet.append(list(dictionary.columns))
            for row in dictionary.astype(object).itertuples(index=False, name=None):
                sheet.append([_excel_value(v) for v in row])
        with self._handle, tempfile.TemporaryFile(dir=self.path.parent) as raw:  # nameless: nothing to plant
            self._book.save(raw)
            raw.seek(0)
            fix_zip_times(raw, self._handle)


_CORE_DATES = re.compile(rb"(<dcterms:(created|modified)[^>]*>)[^<]*(</dcterms:\2>)")


def fix_zip_times(source: Path | IO[bytes], target: Path | IO[bytes]) -> None:
    """Copy the zip archive ``source`` to ``target`` (paths or open binary files) entry by entry with fixed
    times, and fixed document dates in ``docProps/core.xml``, streaming each entry (bounded memory)."""
    stamp = FIXED_DOCUMENT_TIME.strftime("%Y-%m-%dT%H:%M:%SZ").encode()
    with zipfile.ZipFile(source) as zin, zipfile.ZipFile(target, "w", zipfile.ZIP_DEFLATED) as zout:
        for entry in zin.infolist():
            info = zipfile.ZipInfo(entry.filename, date_time=FIXED_ZIP_TIME)
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            if entry.filename == "docProps/core.xml":
                zout.writestr(
                    info, _CORE_DATES.sub(lambda m: m.group(1) + stamp + m.group(3), zin.read(entry))
                )
                continue
            info.file_size = entry.file_size  # lets zipfile choose ZIP64 the same way every time
            with (
                zin.open(entry) as src,
                zout.open(info, "w", force_zip64=entry.file_size > 0x7FFF0000) as dst,
            ):
                shutil.copyfileobj(src, dst, COPY_BLOCK_BYTES)


def write_dictionary_csv(handle: IO[bytes], dictionary: pd.DataFrame) -> None:
    """The data dictionary (or another all-text table of the export: limits, criteria) as UTF-8 CSV, text
    neutralised as in the data file, into the open ``handle``."""
    safe = dictionary.map(neutralise_text)
    with io.TextIOWrapper(handle, encoding="utf-8", newline="") as text:
        safe.to_csv(text, index=False, lineterminator=CSV_LINE_END)


def open_table(
    file_format: str, path: Path, columns: list[Column], handle: IO[bytes]
) -> CsvTable | ParquetTable | ExcelTable:
    """A table writer for ``file_format`` writing into ``handle``, the open file at ``path``."""
    if file_format == "csv":
        return CsvTable(path, columns, handle)
    if file_format == "parquet":
        return ParquetTable(path, columns, handle)
    if file_format == "xlsx":
        return ExcelTable(path, columns, handle)
    raise TrackerError(f"Unknown export format {file_format!r}; choose one of {', '.join(FORMATS)}.")


def sha256_of(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(COPY_BLOCK_BYTES), b""):
            digest.update(block)
    return digest.hexdigest()


def output_paths(out: Path | str | None, level: str, file_format: str) -> dict[str, Path]:
    """Where the files go: ``out`` is a folder (existing, or given as text ending with a separator) or a file
    stem (a ``.csv``, ``.parquet`` or ``.xlsx`` suffix is dropped).

    Returns ``{"data": …, "dictionary": … (CSV and Parquet only), "limits": …, "criteria": …, "manifest": …}``
    as absolute paths, so that messages say where the files went.
    """
    default_stem = f"ncs-export-{level}"
    if out is None:
        stem = Path.cwd() / default_stem
    elif Path(out).is_dir() or (isinstance(out, str) and out.endswith((os.sep, "/"))):
        stem = Path(out) / default_stem
    else:
        out = Path(out)
        stem = out.with_suffix("") if out.suffix.lower() in (".csv", ".parquet", ".xlsx") else out
    # Sidecars carry the data file's full name, so exports of one level in two formats can share a folder.
    data = stem.absolute().with_name(f"{stem.name}.{file_format}")
    paths = {"data": data}
    if file_format != "xlsx":
        paths["dictionary"] = data.with_name(f"{data.name}.dictionary.csv")
    # The reference tables: every normal limit, criteria threshold and version the values depend on.
    paths["limits"] = data.with_name(f"{data.name}.limits.csv")
    paths["criteria"] = data.with_name(f"{data.name}.criteria.csv")
    paths["manifest"] = data.with_name(f"{data.name}.manifest.json")
    return paths
