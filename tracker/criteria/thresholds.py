"""Threshold tables: one CSV per criteria set in ``tracker/criteria/tables/``, every row with its source.

Columns: ``item`` (the set's own item code), ``parameter``, ``nerve`` (``*`` for any), ``lff_hz`` (empty
for any filter), ``derived_lff_hz`` (the low-frequency filter, Hz, at which a fixed cut-off was derived
when the publication gives one set of cut-offs; empty otherwise) with ``derived_lff_status`` (``verified``
or ``memory``), ``comparator`` (``ge``, ``gt``, ``le``, ``lt``), ``reference`` (``uln`` or ``lln``: the
value is a factor of that normal limit; ``percent`` or ``absolute``: the value is the threshold itself),
``value``, ``unit``, ``excluded_nerves`` (``|``-separated), ``description``, ``citation`` (keys of
``tracker/reference/citations.csv``, ``|``-separated), ``note`` (what this row adds: where the value was
read, or that it is from memory), ``status`` (``verified`` or ``memory``), ``version``. The loader resolves
``citation`` and ``note`` into the ``source`` text every trace shows.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from functools import cache
from importlib import resources

import numpy as np
import pandas as pd

from tracker.criteria import memo
from tracker.criteria.citations import keys_of, source_text
from tracker.criteria.codes import distinct

COMPARATORS = {"ge": "≥", "gt": ">", "le": "≤", "lt": "<"}


@dataclass(frozen=True)
class Threshold:
    item: str
    parameter: str
    nerve: str
    lff_hz: float | None
    comparator: str
    reference: str
    value: float
    unit: str
    excluded_nerves: tuple[str, ...]
    description: str
    source: str  # the full citation text with the row's note, as traces show it
    status: str
    version: str
    citations: tuple[str, ...] = ()  # keys of tracker/reference/citations.csv
    derived_lff_hz: float | None = None  # filter (Hz) at which a fixed cut-off was derived, when known
    derived_lff_status: str = ""  # verified / memory


class ThresholdTable:
    """All thresholds of one criteria set, looked up by item (and nerve, and filter setting)."""

    def __init__(self, criteria_id: str, rows: list[Threshold]):
        self.criteria_id = criteria_id
        self.rows = rows
        self.version = rows[0].version if rows else ""

    def items(self) -> list[str]:
        return sorted({r.item for r in self.rows})

    def one(self, item: str) -> Threshold:
        """The single row of an item that does not vary by nerve or filter."""
        rows = [r for r in self.rows if r.item == item]
        if len(rows) != 1:
            raise KeyError(f"{self.criteria_id}: expected one threshold row for {item!r}, found {len(rows)}")
        return rows[0]

    def per_nerve(self, item: str, nerves: pd.Series, lff_hz: pd.Series | None = None) -> pd.DataFrame:
        """Vectorised lookup: for each nerve (and filter setting), the matching row's value and source.

        Returns a frame aligned with ``nerves`` with ``value`` (NaN where no row applies), ``source``,
        ``status``, ``description``, ``comparator``, ``reference``, and ``lookup``: the code of the row's
        (nerve, filter) pair, counting up in order of first appearance — rows with one code share every other
        column (:func:`tracker.criteria.rules.per_code`). A nerve-specific row wins over ``*``;
        a row with ``lff_hz`` applies only to that filter setting.
        """
        rows = [r for r in self.rows if r.item == item]
        if not rows:
            raise KeyError(f"{self.criteria_id}: no threshold rows for {item!r}")
        # Decide each distinct (nerve, filter) pair once, then spread the answers over the rows.
        names = nerves.to_numpy(dtype=object)
        # The sets look up many items over the same nerve tests: the pairs are found once per column.
        if lff_hz is None or all(r.lff_hz is None for r in rows):
            # The filter setting only matters to rows that name one.
            filters = np.full(len(names), np.nan)
            inverse, first = memo.by_content("distinct", (names,), lambda: distinct(names))
        else:
            filters = np.asarray(lff_hz, dtype=float)
            inverse, first = memo.by_content("distinct", (names, filters), lambda: distinct(names, filters))
        decided = [self._decide(rows, names[row], filters[row]) for row in first]
        if not len(decided):
            decided = [self._decide(rows, None, np.nan)]
        columns = {
            "value": np.array([d[0] for d in decided], dtype=float)[inverse],
            "lookup": np.asarray(inverse, dtype=np.int64),
        }
        for position, column in enumerate(
            ("source", "status", "description", "comparator", "reference"), start=1
        ):
            words = tuple(d[position] for d in decided)
            columns[column] = pd.Series(
                memo.by_content(("spread", words), (inverse,), lambda: _spread(words, inverse)),
                index=nerves.index,
                dtype=object,
                copy=False,
            )
        return pd.DataFrame(columns, index=nerves.index, copy=False)

    @staticmethod
    def _decide(rows: list[Threshold], nerve, lff: float) -> tuple:
        """(value, source, status, description, comparator, reference) for one nerve and filter setting:
        generic rows first, then specific rows overwrite them; NaN where no row applies."""
        found = (np.nan, np.nan, np.nan, np.nan, np.nan, np.nan)
        for row in sorted(rows, key=lambda r: (r.nerve != "*", r.lff_hz is not None)):
            applies = row.nerve == "*" or (isinstance(nerve, str) and nerve == row.nerve)
            if row.lff_hz is not None:
                applies = applies and bool(np.isclose(float(lff), row.lff_hz))
            if not applies:
                continue
            found = (row.value, row.source, row.status, row.description, row.comparator, row.reference)
            if row.excluded_nerves and nerve in row.excluded_nerves:
                # An excluded nerve has no threshold, but the trace still cites the rule that excludes it.
                found = (np.nan, *found[1:])
        return found


def _spread(words: tuple, inverse: np.ndarray) -> np.ndarray:
    """``words[code]`` for every code of ``inverse`` (an object array).

    Many items of a set give every nerve the same comparator, reference or status: within one evaluation the
    spread array is then built once per nerve column and shared read-only (``memo.by_content``)."""
    column_values = np.empty(len(words), dtype=object)
    column_values[:] = words
    return column_values[inverse]


@cache
def load(criteria_id: str) -> ThresholdTable:
    """The threshold table of ``criteria_id`` (file ``tables/<criteria_id>.csv``)."""
    text = (
        resources.files("tracker.criteria.tables").joinpath(f"{criteria_id}.csv").read_text(encoding="utf-8")
    )
    return parse(criteria_id, text)


def parse(criteria_id: str, text: str) -> ThresholdTable:
    """A threshold table from its CSV text (``#`` lines are comments). Malformed quoting and rows with the
    wrong number of fields are refused (``csv.Error`` / ``ValueError``), as is an unknown citation key
    (``KeyError``)."""
    rows = []
    # strict: text after a closing quote is an error, not silently glued to the field
    for raw in csv.DictReader((line for line in text.splitlines() if not line.startswith("#")), strict=True):
        if None in raw or None in raw.values():
            raise ValueError(f"tables/{criteria_id}.csv: a row has the wrong number of fields: {raw}")
        rows.append(
            Threshold(
                item=raw["item"],
                parameter=raw["parameter"],
                nerve=raw["nerve"] or "*",
                lff_hz=float(raw["lff_hz"]) if raw["lff_hz"] else None,
                comparator=raw["comparator"],
                reference=raw["reference"],
                value=float(raw["value"]),
                unit=raw["unit"],
                excluded_nerves=tuple(n for n in raw["excluded_nerves"].split("|") if n),
                description=raw["description"],
                source=source_text(raw["citation"], raw["note"]),
                status=raw["status"],
                version=raw["version"],
                citations=keys_of(raw["citation"]),
                derived_lff_hz=float(raw["derived_lff_hz"]) if raw.get("derived_lff_hz") else None,
                derived_lff_status=raw.get("derived_lff_status") or "",
            )
        )
    return ThresholdTable(criteria_id, rows)
