"""Evaluation traces: the interchange shape of one visit's evaluation (DESIGN.md §5, :func:`to_json`) and
the compact forms in which saved evaluations keep it (:func:`stored_traces`, read back by
:func:`expand_trace`).

Stored format 3 (column blocks; written since issue 12): a document per visit and criteria set holding the
outcome fields as in the trace, then

* ``words``: the distinct texts of this trace (nerve names, items, units, statuses, reasons, citations…);
* ``nerves``: ``[nerve, side, modality, number of findings]`` per nerve, the texts as positions in ``words``;
* ``findings``: one list per field of ``FINDING_FIELDS`` (in that order), one entry per finding in nerve
  order; text fields hold positions in ``words`` (``-1``: no text), number fields the number or ``null``.

It is built for a whole chunk of visits with array operations (no dictionary per finding), and the full
trace is rebuilt from it exactly: :func:`to_json` itself goes through it, so that what is shown and what
is saved cannot drift apart. Format 2 (one dictionary per finding, citations by position) and plain traces
of earlier revisions are still read.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from tracker.criteria.model import SetResult


def _plain(value: Any) -> Any:
    if value is None:
        return None
    if isinstance(value, (float, np.floating)):
        return None if np.isnan(value) else round(float(value), 6)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.bool_,)):
        return bool(value)
    return value


def to_json(result: SetResult, visit_key: int) -> dict[str, Any]:
    """The evaluation of one visit in the interchange shape of DESIGN.md §5 (without patient and date)."""
    return to_json_many(result, [visit_key])[visit_key]


def to_json_many(result: SetResult, visit_keys: list[int]) -> dict[int, dict[str, Any]]:
    """:func:`to_json` of many visits in one pass over the findings (the stored form, expanded)."""
    return {key: expand_trace(document) for key, document in stored_traces(result, visit_keys).items()}


# The fields of a finding, in the order of the trace.
FINDING_FIELDS = (
    "parameter",
    "item",
    "segment",
    "value",
    "unit",
    "limit",
    "limit_name",
    "threshold",
    "comparator",
    "status",
    "reason",
    "source",
    "source_status",
    "limit_source",
    "limit_status",
)
_NUMBER_FIELDS = frozenset({"value", "limit", "threshold"})
# Given as they are; the other text fields give no text (null) for an empty string.
_AS_GIVEN = frozenset({"nerve", "side", "modality", "parameter", "item", "status"})
_NERVE_FIELDS = ("nerve", "side", "modality")
_TEXT_FIELDS = _NERVE_FIELDS + tuple(f for f in FINDING_FIELDS if f not in _NUMBER_FIELDS)
BLOCK_FORMAT = 3


def _numbers(values: pd.Series) -> list[float | None]:
    """Numbers as the trace gives them: rounded to 6 decimals by Python's ``round``, missing as ``None``.

    ``round`` is slow, and most values have a few decimals: a value ``x`` equal to ``k / 10**6`` for the
    integer ``k = rint(x * 10**6)`` is the double nearest that decimal, so ``round(x, 6)`` gives ``x`` back
    and is not called."""
    array = pd.to_numeric(values, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    with np.errstate(invalid="ignore", over="ignore"):
        exact = np.rint(array * 1e6) / 1e6 == array
    listed = array.tolist()
    return [
        x if settled else (None if x != x else round(x, 6))
        for x, settled in zip(listed, exact.tolist(), strict=True)
    ]


def _payload(result: SetResult, outcome: dict[str, Any]) -> dict[str, Any]:
    """The fields of a trace before its nerves: outcome, deciding rule, the set's own keys."""
    rule = outcome.get("rule")
    payload = {
        "criteria": result.criteria,
        "criteria_version": result.version,
        "outcome": outcome["outcome"],
        "rule": rule if isinstance(rule, str) else None,
    }
    for extra in result.extra_keys:
        payload[extra] = _json_safe(outcome[extra])
    if "undecided_items" in outcome:  # the CIDP and MMN sets (DESIGN.md §5)
        items = outcome["undecided_items"]
        payload["undecided_items"] = _json_safe(list(items)) if isinstance(items, (tuple, list)) else []
    return payload


def stored_traces(result: SetResult, visit_keys: list[int]) -> dict[int, dict[str, Any]]:
    """The stored form (format 3, see the module) of the traces of ``visit_keys`` that have an outcome.

    Texts are numbered once for the whole chunk (``pandas.factorize``); each document then keeps only the
    texts it uses, so that it can be read on its own.
    """
    wanted = {int(k) for k in visit_keys}
    findings = result.findings[result.findings["visit_key"].isin(wanted)]
    # Nerves sorted as groupby(sort=True) would; findings keep their order within a nerve.
    findings = findings.sort_values(["visit_key", "nerve", "side", "modality"], kind="stable")
    words: dict[str, int] = {}
    codes = np.empty((len(findings), len(_TEXT_FIELDS)), dtype=np.int64)
    for column, name in enumerate(_TEXT_FIELDS):
        local, uniques = pd.factorize(findings[name].to_numpy(dtype=object), use_na_sentinel=True)
        given = name in _AS_GIVEN
        mapping = np.array(
            [words.setdefault(u, len(words)) if isinstance(u, str) and (given or u) else -1 for u in uniques]
            + [-1],
            dtype=np.int64,
        )
        codes[:, column] = mapping[local]  # -1 (missing) takes the last entry: no text
    word_list = np.array(list(words) + [""], dtype=object)
    numbers = {name: _numbers(findings[name]) for name in _NUMBER_FIELDS}
    keys = findings["visit_key"].to_numpy(dtype=np.int64)
    n = len(keys)
    # Where a visit's findings start and end, and where a new nerve starts (sorted above).
    new_visit = np.concatenate([[True], keys[1:] != keys[:-1]]) if n else np.zeros(0, dtype=bool)
    nerve_cut = new_visit | np.concatenate([[True], (codes[1:, :3] != codes[:-1, :3]).any(axis=1)])[:n]
    visit_starts = np.flatnonzero(new_visit)
    visit_ends = np.append(visit_starts[1:], n)
    span = {int(keys[s]): (int(s), int(e)) for s, e in zip(visit_starts.tolist(), visit_ends.tolist())}
    text_column = {name: position for position, name in enumerate(_TEXT_FIELDS)}
    # A text's position in one document: its rank among the texts that document uses (a presence table
    # over the chunk's texts is cheaper than sorting each block); the last entry stands for "no text".
    present = np.zeros(len(word_list), dtype=bool)
    documents: dict[int, dict[str, Any]] = {}
    for outcome in result.outcomes[result.outcomes["visit_key"].isin(wanted)].to_dict("records"):
        key = int(outcome["visit_key"])
        document = _payload(result, outcome)
        start, end = span.get(key, (0, 0))
        block = codes[start:end]
        present[:] = False
        present[block.ravel()] = True
        present[-1] = False
        used = np.flatnonzero(present)
        rank = np.cumsum(present) - 1
        rank[-1] = -1
        positions = rank[block]
        cuts = np.flatnonzero(nerve_cut[start:end])
        sizes = np.diff(np.append(cuts, end - start))
        document["stored_format"] = BLOCK_FORMAT
        document["words"] = word_list[used].tolist()
        document["nerves"] = np.column_stack([positions[cuts, :3], sizes]).tolist()
        document["findings"] = [
            numbers[name][start:end] if name in _NUMBER_FIELDS else positions[:, text_column[name]].tolist()
            for name in FINDING_FIELDS
        ]
        documents[key] = document
    return documents


def _expand_blocks(stored: dict[str, Any]) -> dict[str, Any]:
    words = stored["words"]

    def texts(codes: list[int]) -> list[str | None]:
        return [words[c] if c >= 0 else None for c in codes]

    columns = [
        values if name in _NUMBER_FIELDS else texts(values)
        for name, values in zip(FINDING_FIELDS, stored["findings"], strict=True)
    ]
    rows = zip(*columns, strict=True)
    nerves = []
    for nerve, side, modality, count in stored["nerves"]:
        findings = [dict(zip(FINDING_FIELDS, next(rows), strict=True)) for _ in range(count)]
        nerves.append(
            {
                "nerve": words[nerve] if nerve >= 0 else None,
                "side": words[side] if side >= 0 else None,
                "modality": words[modality] if modality >= 0 else None,
                "findings": findings,
            }
        )
    payload = {k: v for k, v in stored.items() if k not in ("stored_format", "words", "nerves", "findings")}
    payload["nerves"] = nerves
    return payload


STORED_FORMAT = 2
_SOURCE_FIELDS = ("source", "limit_source")


def compact_trace(payload: dict[str, Any]) -> dict[str, Any]:
    """Stored format 2 (written before format 3; still read, and made here for the tests that read it):
    the same content as the trace, each citation written once.

    Citations are long and repeated on every finding (about half of a trace's bytes); the stored form keeps
    them in ``sources`` and refers to them by position. :func:`expand_trace` gives back the full shape.
    """
    sources: dict[str, int] = {}
    nerves = []
    for nerve in payload["nerves"]:
        findings = []
        for finding in nerve["findings"]:
            item = dict(finding)
            for name in _SOURCE_FIELDS:
                text = item.pop(name)
                item[f"{name}_ref"] = None if text is None else sources.setdefault(text, len(sources))
            findings.append(item)
        nerves.append({**nerve, "findings": findings})
    return {**payload, "stored_format": STORED_FORMAT, "sources": list(sources), "nerves": nerves}


def expand_trace(stored: dict[str, Any]) -> dict[str, Any]:
    """The full trace (the shape of :func:`to_json`) from its stored form (format 3 or 2, or a full trace)."""
    if stored.get("stored_format") == BLOCK_FORMAT:
        return _expand_blocks(stored)
    if stored.get("stored_format") != STORED_FORMAT:
        return stored
    sources = stored["sources"]
    nerves = []
    for nerve in stored["nerves"]:
        findings = []
        for finding in nerve["findings"]:
            item = {k: v for k, v in finding.items() if not k.endswith("_ref")}
            for name in _SOURCE_FIELDS:
                ref = finding[f"{name}_ref"]
                item[name] = None if ref is None else sources[ref]
            findings.append(item)
        nerves.append({**nerve, "findings": findings})
    payload = {k: v for k, v in stored.items() if k not in ("stored_format", "sources", "nerves")}
    payload["nerves"] = nerves
    return payload


def _json_safe(value: Any) -> Any:
    """Plain JSON values only: NaN becomes null (PostgreSQL's JSON refuses NaN), numpy scalars Python."""
    if isinstance(value, dict):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    if isinstance(value, str) or value is None or isinstance(value, bool):
        return value
    return _plain(value) if not (isinstance(value, float) and np.isnan(value)) else None
