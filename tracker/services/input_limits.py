"""What an input file may cost, and how much of a rejected cell a message may show.

Every import (command line, dashboard upload, the entry form) reads files through these limits, so that a
device, a sparse file, a zip bomb or a 10 MB cell is refused with a message instead of filling memory.
Each limit is a setting with a default; an environment variable overrides it for one process:

| limit | environment variable | default |
| --- | --- | --- |
| file size (bytes read from disk or upload) | ``NCS_TRACKER_MAX_FILE_MB`` | 64 MB |
| data rows below the header | ``NCS_TRACKER_MAX_ROWS`` | 500,000 |
| columns in the header | ``NCS_TRACKER_MAX_COLUMNS`` | 100 |
| characters in one cell | ``NCS_TRACKER_MAX_CELL_CHARS`` | 2,000 |
| an .xlsx workbook's parts, uncompressed | ``NCS_TRACKER_MAX_XLSX_MB`` | 256 MB |

A cell stored in a text column of bounded length (a recording site, say) must also fit that column: the
length comes from the database schema (:mod:`tracker.db.models`), so that the dry run and the import agree
on SQLite, which does not enforce lengths, and on PostgreSQL, which does.

Messages never repeat a whole rejected value from an identity-like column (patient code, names, record
numbers, examiner, birth date, free-text notes): they show at most its first few characters
(:func:`excerpt`).
"""

from __future__ import annotations

import os
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, fields, replace

from tracker.errors import Problem, TrackerError

MB = 1_000_000  # the unit of the size settings: a megabyte as disk tools print it

ENVIRONMENT = {
    "file_bytes": "NCS_TRACKER_MAX_FILE_MB",
    "rows": "NCS_TRACKER_MAX_ROWS",
    "columns": "NCS_TRACKER_MAX_COLUMNS",
    "cell_chars": "NCS_TRACKER_MAX_CELL_CHARS",
    "xlsx_expanded_bytes": "NCS_TRACKER_MAX_XLSX_MB",
}
SIZE_SETTINGS = ("file_bytes", "xlsx_expanded_bytes")  # given in MB in the environment, kept in bytes

# Columns whose cells may identify a person, by a word of the column name (words split at '_', so that
# 'recording_site' is not a 'record'). Their rejected values are shown only in part; a header name (row 1) is
# not a person's data and is shown as written. A birth year alone is shown whole (messages comparing the
# years of two rows need it); a birth date is not.
IDENTITY_WORDS = frozenset(
    {
        "patient",
        "code",
        "name",
        "surname",
        "record",
        "mrn",
        "examiner",
        "laboratory",
        "physician",
        "doctor",
        "referrer",
        "dob",
        "address",
        "phone",
        "email",
        "mail",
        "insurance",
        "note",
        "notes",
        "comment",
        "comments",
    }
)
BIRTH_DATE_WORDS = ({"birth", "date"}, {"birthdate"})
LONG_VALUE_CHARS = 40  # any other rejected value longer than this is cut (a 10 MB cell is not printed)


@dataclass(frozen=True)
class InputLimits:
    """Limits on one input file. Sizes in bytes, counts in rows, columns or characters."""

    file_bytes: int = 64 * MB
    rows: int = 500_000
    columns: int = 100
    cell_chars: int = 2_000
    xlsx_expanded_bytes: int = 256 * MB
    xlsx_parts: int = 1_000  # zip members of one workbook (a workbook of one sheet has about a dozen)
    shown_characters: int = 3  # of a rejected identity-like cell, at most, and never all of it

    def setting(self, name: str) -> str:
        """How a person changes the limit ``name``: its environment variable and current value."""
        value = getattr(self, name)
        shown = f"{value / MB:g}" if name in SIZE_SETTINGS else str(value)
        variable = ENVIRONMENT.get(name)
        return f"{variable}={shown}" if variable else f"{name}={shown}"


DEFAULTS = InputLimits()


def from_environment(environ: Mapping[str, str] | None = None) -> InputLimits:
    """The limits in force: the defaults, each overridden by its environment variable when set.

    Raises :class:`~tracker.errors.TrackerError` naming the variable when a value is not a positive number.
    """
    environ = os.environ if environ is None else environ
    changes: dict[str, int] = {}
    for name, variable in ENVIRONMENT.items():
        text = environ.get(variable, "").strip()
        if not text:
            continue
        try:
            number = float(text) if name in SIZE_SETTINGS else int(text)
        except ValueError:
            number = -1
        if not number > 0 or number != number:
            kind = "a number of megabytes above 0" if name in SIZE_SETTINGS else "a whole number above 0"
            raise TrackerError(f"{variable} must be {kind}; it is {text[:20]!r}.")
        changes[name] = int(number * MB) if name in SIZE_SETTINGS else int(number)
    return replace(DEFAULTS, **changes) if changes else DEFAULTS


def megabytes(size: int) -> str:
    """A byte count for a message: ``'420.3 MB'``."""
    return f"{size / MB:,.1f} MB"


def identity_like(column: str | None) -> bool:
    """Whether cells of ``column`` may identify a person (see :data:`IDENTITY_WORDS`)."""
    if column is None:
        return False
    words = set(column.lower().replace("-", "_").replace(" ", "_").split("_"))
    return bool(words & IDENTITY_WORDS) or any(group <= words for group in BIRTH_DATE_WORDS)


def excerpt(
    column: str | None, value: str | None, limits: InputLimits = DEFAULTS, *, header: bool = False
) -> str | None:
    """What a message may show of the rejected ``value`` of ``column``.

    Identity-like columns: at most ``limits.shown_characters`` leading characters and never the whole value
    (``'Mül…'``). Other columns: the value, cut after :data:`LONG_VALUE_CHARS` characters. ``header``: the
    value is a header name, shown as any other value.
    """
    if value is None:
        return None
    value = str(value)
    if identity_like(column) and not header:
        keep = min(limits.shown_characters, len(value) // 2)
        return value[:keep] + "…"
    if len(value) > LONG_VALUE_CHARS:
        return value[:LONG_VALUE_CHARS] + f"… ({len(value):,} characters)"
    return value


def guarded(problems: Iterable[Problem], limits: InputLimits = DEFAULTS) -> list[Problem]:
    """``problems`` with every shown value passed through :func:`excerpt` (header row values as headers)."""
    return [
        p
        if p.value is None
        else Problem(p.row, p.column, excerpt(p.column, p.value, limits, header=p.row == 1), p.message)
        for p in problems
    ]


def names() -> list[str]:
    """The settings a person may change, by their field names (for documentation and tests)."""
    return [f.name for f in fields(InputLimits) if f.name in ENVIRONMENT]
