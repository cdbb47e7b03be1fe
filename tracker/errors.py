"""Domain errors. Each carries a message meant for the user; the CLI prints it without a traceback."""

from __future__ import annotations

from dataclasses import dataclass


class TrackerError(Exception):
    """Base class of every error the user may see. ``exit_code`` follows DESIGN.md §5."""

    exit_code = 1


class SchemaNotReady(TrackerError):
    """The database has no schema, or an outdated one."""


class NotFound(TrackerError):
    """A patient, visit or set asked for does not exist."""


@dataclass(frozen=True, slots=True)
class Problem:
    """One defect found in an input file.

    ``row`` is the row number as a spreadsheet shows it (the header is
    row 1); ``None`` for file-level problems.
    """

    row: int | None
    column: str | None
    value: str | None
    message: str

    def __str__(self) -> str:
        where = []
        if self.row is not None:
            where.append(f"row {self.row}")
        if self.column:
            where.append(f"column '{self.column}'")
        prefix = ", ".join(where)
        shown = "" if self.value is None else f" (value {self.value!r})"
        return f"{prefix}: {self.message}{shown}" if prefix else f"{self.message}{shown}"


class InputRejected(TrackerError):
    """A file was refused; ``problems`` lists every defect found."""

    def __init__(self, summary: str, problems: list[Problem]):
        self.summary = summary
        self.problems = problems
        super().__init__(summary)

    def __str__(self) -> str:
        lines = [f"{self.summary} ({len(self.problems)} problem{'s' if len(self.problems) != 1 else ''}):"]
        lines += [f"  - {p}" for p in self.problems]
        lines.append("Nothing was written; the database is unchanged.")
        return "\n".join(lines)
