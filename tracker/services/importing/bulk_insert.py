"""Writing many rows at once: primary keys drawn ahead (:func:`_allocate_ids`) and bulk inserts
(:func:`_bulk_insert`: ``COPY`` on PostgreSQL, the driver's executemany on SQLite)."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
from sqlalchemy import Date, DateTime, func, select, text, update
from sqlalchemy.orm import Session


def _records(frame: pd.DataFrame, columns: list[str]) -> list[dict[str, Any]]:
    """Rows as dicts of Python values (None for missing), ready for an executemany."""
    data = frame[columns].astype(object)
    return data.where(frame[columns].notna(), None).to_dict("records")


def _allocate_ids(session: Session, table, count: int) -> list[int]:
    """Primary keys for ``count`` new rows of ``table``, which no concurrent writer can take.

    PostgreSQL: drawn from the table's own sequence. SQLite: the next integers after the largest key, read
    after a no-op UPDATE has taken SQLite's single write lock for this transaction.
    """
    connection = session.connection()
    if connection.dialect.name == "postgresql":
        drawn = connection.execute(
            text(
                "SELECT array_agg(nextval(pg_get_serial_sequence(:table, 'id'))) "
                "FROM generate_series(1, :count)"
            ),
            {"table": table.name, "count": count},
        ).scalar_one()
        return list(drawn or [])
    connection.execute(update(table).where(text("0 = 1")).values(id=table.c.id))
    start = connection.execute(select(func.coalesce(func.max(table.c.id), 0))).scalar_one() + 1
    return list(range(start, start + count))


def _bulk_insert(session: Session, table, frame: pd.DataFrame, columns: list[str]) -> None:
    """Insert many rows in bulk (tens of thousands of sites): ``COPY … FROM STDIN`` through psycopg 3 on
    PostgreSQL, the driver's own executemany on SQLite.

    Dates and times are converted exactly as SQLAlchemy would (its bind processors: ISO text on SQLite),
    once per distinct value; numbers, text and booleans are passed to the driver as they are, missing
    values as NULL.
    """
    if frame.empty:
        return
    connection = session.connection()
    dialect = connection.dialect
    if dialect.name == "postgresql":
        payload = _copy_text(frame, columns)
        if payload is not None:
            quote = dialect.identifier_preparer.quote
            copy_sql = f"COPY {quote(table.name)} ({', '.join(quote(c) for c in columns)}) FROM STDIN"
            cursor = connection.connection.driver_connection.cursor()
            try:
                with cursor.copy(copy_sql) as copy:
                    copy.write(payload)
            finally:
                cursor.close()
            return
    marker = "?" if dialect.paramstyle == "qmark" else "%s"
    quote = dialect.identifier_preparer.quote
    sql = (
        f"INSERT INTO {quote(table.name)} ({', '.join(quote(c) for c in columns)}) "
        f"VALUES ({', '.join([marker] * len(columns))})"
    )
    cells_by_column = []
    for column in columns:
        series = frame[column]
        if series.dtype == np.float64 and dialect.name == "sqlite":
            cells = series.tolist()  # SQLite stores a bound NaN as NULL: no per-cell conversion needed
        else:
            cells = series.astype(object).where(series.notna(), None).tolist()
        if isinstance(table.c[column].type, (Date, DateTime)):
            process = table.c[column].type.bind_processor(dialect) or (lambda value: value)
            converted = {
                v: process(v.to_pydatetime() if isinstance(v, pd.Timestamp) else v)
                for v in set(cells)
                if v is not None
            }
            cells = [None if v is None else converted[v] for v in cells]
        cells_by_column.append(cells)
    cursor = connection.connection.driver_connection.cursor()
    try:
        if dialect.name == "postgresql":
            # COPY: one statement streams every row (executemany sends them one by one, even pipelined).
            copy_sql = f"COPY {quote(table.name)} ({', '.join(quote(c) for c in columns)}) FROM STDIN"
            with cursor.copy(copy_sql) as copy:
                for row in zip(*cells_by_column, strict=True):
                    copy.write_row(row)
        else:
            cursor.executemany(sql, zip(*cells_by_column, strict=True))
    finally:
        cursor.close()


# Arrow types whose text (Arrow's cast to string) PostgreSQL reads back as the same value: numbers in their
# shortest exact form, booleans as true/false, text as it is (escaped below).
_COPY_TEXT_TYPES = (
    pa.types.is_floating,
    pa.types.is_integer,
    pa.types.is_boolean,
    pa.types.is_string,
    pa.types.is_null,  # a column with no value stated
)
_COPY_ESCAPES = (("\\", "\\\\"), ("\t", "\\t"), ("\n", "\\n"), ("\r", "\\r"))


def _copy_text(frame: pd.DataFrame, columns: list[str]) -> bytes | None:
    """The rows in ``COPY … FROM STDIN`` text format, built column by column by Arrow (instead of one
    ``write_row`` call per row, which cost more than everything else of the write); ``None`` when a column
    holds values of another kind (dates, times: they go row by row, formatted by psycopg).

    Missing values (NaN, None) become ``\\N`` (NULL); text is escaped as the format requires.
    """
    texts = []
    for column in columns:
        try:
            values = pa.Array.from_pandas(frame[column])  # NaN and None are nulls
        except (pa.ArrowInvalid, pa.ArrowTypeError):
            return None
        if isinstance(values, pa.ChunkedArray):
            values = values.combine_chunks()
        if pa.types.is_large_string(values.type):
            values = values.cast(pa.string())
        if not any(is_type(values.type) for is_type in _COPY_TEXT_TYPES):
            return None
        text_values = pc.cast(values, pa.large_string())
        if pa.types.is_string(values.type):
            for plain, escaped in _COPY_ESCAPES:
                text_values = pc.replace_substring(text_values, plain, escaped)
        texts.append(pc.fill_null(text_values, "\\N"))
    lines = pc.binary_join_element_wise(*texts, pa.scalar("\t", pa.large_string()))
    ending = pa.array([""] * len(frame), pa.large_string())  # joined with "\n": a newline after each row
    lines = pc.binary_join_element_wise(lines, ending, pa.scalar("\n", pa.large_string()))
    offsets = np.frombuffer(lines.buffers()[1], dtype=np.int64)[lines.offset : lines.offset + len(lines) + 1]
    return lines.buffers()[2].to_pybytes()[int(offsets[0]) : int(offsets[-1])]
