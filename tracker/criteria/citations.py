"""One table of the publications the shipped thresholds and normal limits come from.

``tracker/reference/citations.csv`` holds one row per publication, keyed by a short id: ``authors``,
``title``, ``published_in`` (journal with year, volume and pages, or the publisher of a book), ``year``,
``doi``, ``status`` (``verified``: the bibliographic data were read; ``memory``: not verified) and ``note``
(where they were read). The threshold tables (``tables/<set>.csv``) and the default limits refer to rows by
key in their ``citation`` column (several keys joined by ``|``) and keep only a short row-specific ``note``;
:func:`source_text` rebuilds the full text a trace shows.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from functools import cache
from importlib import resources

KEY_SEPARATOR = "|"


@dataclass(frozen=True)
class Citation:
    key: str
    authors: str
    title: str
    published_in: str
    year: int
    doi: str
    status: str
    note: str

    def text(self) -> str:
        """The full citation: authors, title, journal (or publisher) with year, DOI; marked if from memory."""
        title = self.title if self.title.endswith(("?", "!", ".")) else f"{self.title}."
        text = f"{short_authors(self.authors)}. {title} {self.published_in}"
        if self.doi:
            text += f", doi:{self.doi}"
        if self.status == "memory":
            text += " (citation from memory, not verified)"
        return text


def short_authors(authors: str, most: int = 6) -> str:
    """The author list as a reference list prints it: up to ``most`` names, else the first three and
    "et al." (a group named after ``;`` stays; a note in parentheses goes with the long list)."""
    names, group = authors, ""
    if "; " in names:
        names, group = names.split("; ", 1)
        group = f"; {group}"
    if " (" in names:
        names = names.split(" (", 1)[0]
    listed = [n for n in names.split(", ") if n]
    if len(listed) <= most:
        return authors
    return ", ".join(listed[:3]) + ", et al" + group


@cache
def citations() -> dict[str, Citation]:
    """Every publication of ``tracker/reference/citations.csv`` by key."""
    text = resources.files("tracker.reference").joinpath("citations.csv").read_text(encoding="utf-8")
    found: dict[str, Citation] = {}
    for row in csv.DictReader(text.splitlines()):
        if row["key"] in found:
            raise ValueError(f"citations.csv: key {row['key']!r} appears twice")
        found[row["key"]] = Citation(
            key=row["key"],
            authors=row["authors"],
            title=row["title"],
            published_in=row["published_in"],
            year=int(row["year"]),
            doi=row["doi"],
            status=row["status"],
            note=row["note"],
        )
    return found


def keys_of(field: str) -> tuple[str, ...]:
    """The keys named in a ``citation`` cell (``a|b``)."""
    return tuple(k.strip() for k in field.split(KEY_SEPARATOR) if k.strip())


def source_text(field: str, note: str = "") -> str:
    """The text a trace shows for a row citing ``field`` (keys joined by ``|``), with the row's ``note``.

    Raises ``KeyError`` naming an unknown key, so that a table citing a missing publication fails to load.
    """
    known = citations()
    parts = []
    for key in keys_of(field):
        if key not in known:
            raise KeyError(f"unknown citation key {key!r} (not in tracker/reference/citations.csv)")
        parts.append(known[key].text())
    text = "; ".join(parts)
    note = note.strip()
    if note:
        text = f"{text} — {note}" if text else note
    return text
