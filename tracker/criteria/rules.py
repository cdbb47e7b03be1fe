"""Vectorised building blocks shared by the criteria sets: comparisons with the quantised rule,
findings with their trace, and the "in N nerves" / "one nerve plus another parameter in another nerve"
combinations."""

from __future__ import annotations

import numpy as np
import pandas as pd

from tracker.criteria import memo
from tracker.criteria.codes import distinct
from tracker.criteria.model import (
    FINDING_COLUMNS,
    MET,
    NOT_APPLICABLE,
    NOT_EVALUABLE,
    NOT_MET,
    UNDECIDED,
    Settings,
)
from tracker.criteria.thresholds import COMPARATORS
from tracker.domain.conduction import quantise_array

_OPERATORS = {"ge": np.greater_equal, "gt": np.greater, "le": np.less_equal, "lt": np.less}


def _uniform(comparator: str | np.ndarray, shape: tuple[int, ...]):
    """The comparator shared by every row (a scalar), or the broadcast array when rows differ.

    Most items compare every nerve the same way; one scalar comparison is then far cheaper than testing
    each row's comparator."""
    if isinstance(comparator, str):
        return comparator
    comparators = np.asarray(comparator, dtype=object)
    if comparators.ndim == 0:
        return comparators.item()
    # A broadcast view is read-only even over a writable array: only a read-only column (the threshold
    # lookups', shared within an evaluation) may have its scan remembered.
    shared = not comparators.flags.writeable
    comparators = np.broadcast_to(comparators, shape)
    if comparators.size:
        head = comparators.flat[0]

        def same() -> bool:
            return bool((comparators == head).all())

        if isinstance(head, str) and (memo.by_content("uniform", (comparators,), same) if shared else same()):
            return head
    return comparators


def _objects(values: list) -> np.ndarray:
    """A 1-D object array of exactly these values (``np.array`` would unpack tuples or nested lists)."""
    array = np.empty(len(values), dtype=object)
    for position, value in enumerate(values):
        array[position] = value
    return array


def compare(values: np.ndarray, thresholds: np.ndarray, comparator: str | np.ndarray) -> np.ndarray:
    """Element-wise comparison under the quantised rule; False where either side is NaN."""
    v = quantise_array(values)
    t = quantise_array(thresholds)
    comparators = _uniform(comparator, v.shape)
    with np.errstate(invalid="ignore"):
        if isinstance(comparators, np.ndarray):
            result = np.select(
                [comparators == "ge", comparators == "gt", comparators == "le", comparators == "lt"],
                [v >= t, v > t, v <= t, v < t],
                default=False,
            )
        elif comparators in _OPERATORS:
            result = _OPERATORS[comparators](v, t)
        else:
            result = np.zeros(np.broadcast_shapes(v.shape, t.shape), dtype=bool)
    return result & ~np.isnan(v) & ~np.isnan(t)


def margin(values: np.ndarray, thresholds: np.ndarray, comparator: str | np.ndarray) -> np.ndarray:
    """How far a value is from meeting its threshold, in the parameter's unit (≤ 0 once met)."""
    v, t = np.asarray(values, dtype=float), np.asarray(thresholds, dtype=float)
    comparators = _uniform(comparator, v.shape)
    if isinstance(comparators, np.ndarray):
        shared = isinstance(comparator, np.ndarray) and not comparator.flags.writeable  # as in _uniform

        def up() -> np.ndarray:
            return np.isin(comparators, ["ge", "gt"])

        upward = memo.by_content("upward", (comparators,), up) if shared else up()
        return quantise_array(np.where(upward, t - v, v - t))
    return quantise_array(t - v if comparators in ("ge", "gt") else v - t)


def _filled(value: str | None, n: int) -> np.ndarray:
    """An object array of ``n`` times ``value``."""
    array = np.empty(n, dtype=object)
    array[:] = value
    return array


def item_findings(
    frame: pd.DataFrame,
    *,
    criteria: str,
    item: str,
    parameter: str,
    unit: str,
    value: np.ndarray,
    threshold: np.ndarray,
    comparator: str | np.ndarray,
    limit: np.ndarray,
    limit_name: str | np.ndarray,
    source: pd.Series | np.ndarray | str,
    source_status: pd.Series | np.ndarray | str,
    segment: np.ndarray | None = None,
    requirement: np.ndarray | None = None,
    blocked: list[tuple[np.ndarray, str | np.ndarray]] | None = None,
    limit_source: pd.Series | np.ndarray | str | None = None,
    limit_status: pd.Series | np.ndarray | str | None = None,
    inapplicable: list[tuple[np.ndarray, str | np.ndarray]] | None = None,
) -> pd.DataFrame:
    """Findings for one item over the rows of ``frame`` (``visit_key``, ``nerve``, ``side``, ``modality``).

    Status, in order: ``not_applicable`` where an ``inapplicable`` mask is true (its reason: excluded
    nerve, entrapment, failed published precondition, not part of the pattern, no recordable response);
    ``not_evaluable`` where a ``blocked`` mask is true (want of usable data: value or limit missing, cold
    limb excluded…); ``not_evaluable`` where the value or the threshold is missing; otherwise ``met`` when
    the comparison holds (and ``requirement``, if given, is true), else ``not_met``. In each list the first
    mask that holds gives the reason.
    """
    n = len(frame)
    # Copies: these arrays become columns of the findings frame as they are (see the end).
    value = np.array(value, dtype=float)
    threshold = np.asarray(threshold, dtype=float)
    limit = np.array(limit, dtype=float)
    holds = compare(value, threshold, comparator)
    if requirement is not None:
        holds &= np.asarray(requirement, dtype=bool)
    # Status and reason as small integer codes into the few distinct words, turned into text once at the
    # end (assigning strings into object arrays mask by mask costs more than the comparisons).
    words = [MET, NOT_MET, NOT_EVALUABLE, NOT_APPLICABLE]
    status_code = np.where(holds, 0, 1).astype(np.int8)
    reasons = ["", "no normal limit or threshold for this nerve", "value missing"]
    reason_code = np.zeros(n, dtype=np.int32)
    no_limit = np.isnan(threshold) & ~np.isnan(value)
    status_code[no_limit] = 2
    reason_code[no_limit] = 1
    missing = np.isnan(value)
    status_code[missing] = 2
    reason_code[missing] = 2
    # Reasons given row by row (an array): code -1, the text kept aside.
    own_reason: np.ndarray | None = None
    # Inapplicable masks last, so that they override every want of data.
    masks = [(mask, why, 2) for mask, why in reversed(blocked or [])] + [
        (mask, why, 3) for mask, why in reversed(inapplicable or [])
    ]
    for mask, why, code in masks:
        mask = np.asarray(mask, dtype=bool)
        status_code[mask] = code
        if isinstance(why, np.ndarray):
            if own_reason is None:
                own_reason = np.empty(n, dtype=object)
            own_reason[mask] = why[mask]
            reason_code[mask] = -1
        else:
            reasons.append(why)
            reason_code[mask] = len(reasons) - 1
    status = _objects(words)[status_code]
    reason = _objects(reasons + [None])[reason_code]
    if own_reason is not None:
        own = reason_code == -1
        reason[own] = own_reason[own]

    index = pd.RangeIndex(n)

    def text(values, *, owned: bool = False, edited: bool = False) -> pd.Series:
        # Plain Python objects: letting pandas infer a string column for each of millions of findings
        # costs more than the rules themselves.
        # A caller's writable array is copied (the caller could still change it); a read-only column of a
        # frame is taken as it is: nobody can write through it, and the sets edit only the status, reason
        # and item columns of findings, which are always new arrays (``owned``: made here).
        if isinstance(values, pd.Series):
            values = values.to_numpy(dtype=object)
        if values is None or isinstance(values, str):
            # One word on every row: within an evaluation the items share one read-only array per word and
            # length (the parts are stacked into new arrays at the end); a column the sets edit is its own.
            array = (
                _filled(values, n)
                if edited
                else memo.once(("filled", values, n), (), lambda: _filled(values, n))
            )
        elif owned or (
            isinstance(values, np.ndarray) and values.dtype == object and not values.flags.writeable
        ):
            array = values
        else:
            array = np.array(values, dtype=object)
        # One shared index: the frame below then needs no alignment.
        return pd.Series(array, index=index, dtype=object, copy=False)

    columns = {
        "visit_key": frame["visit_key"].to_numpy(),  # read-only: never edited
        "criteria": text(criteria),
        "nerve": text(frame["nerve"]),
        "side": text(frame["side"]),
        "modality": text(frame["modality"] if "modality" in frame else "motor"),
        "item": text(item, edited=True),  # the EFNS/PNS 2010 set renames some (sural_normal)
        "parameter": text(parameter),
        "segment": text(segment),
        "value": value,
        "unit": text(unit),
        "limit": limit,
        "limit_name": text(limit_name),
        "threshold": quantise_array(threshold),
        "comparator": text(comparator),
        "status": text(status, owned=True),
        "reason": text(reason, owned=True),
        "source": text(source),
        "source_status": text(source_status),
        "limit_source": text(limit_source),
        "limit_status": text(limit_status),
        "margin": margin(value, threshold, comparator),
    }
    # Every array above is new and owned here, so the frame takes them without a copy: copying and
    # consolidating the text columns of every item cost more than the comparisons themselves.
    return pd.DataFrame({column: columns[column] for column in FINDING_COLUMNS}, index=index, copy=False)


def per_distinct(function, *columns, shared: bool = False) -> np.ndarray:
    """``function(*values)`` for every row of ``columns`` (equal-length arrays), called once per distinct
    combination of values and spread over the rows (an object array).

    Texts built row by row cost far more than the comparisons, and a cohort has few distinct label, nerve
    or reason combinations. Float columns are told apart by their bits (``-0.0`` stays apart from ``0.0``);
    in text columns ``None`` and NaN fall together, so ``function`` must treat every missing value alike.
    ``shared``: the columns are read-only columns of frames nobody edits in place (the nerve tests), so their
    codes may be reused within one evaluation (:func:`tracker.criteria.memo.by_content`).
    """
    arrays = [c.to_numpy() if isinstance(c, pd.Series) else np.asarray(c) for c in columns]
    if (
        shared
    ):  # columns of the nerve tests (or their subsets), asked for again and again: see memo.by_content
        combined, first = memo.by_content("distinct", tuple(arrays), lambda: distinct(*arrays))
    else:
        combined, first = distinct(*arrays)
    results = np.empty(len(first), dtype=object)
    for position, row in enumerate(first):
        results[position] = function(*(a[row] for a in arrays))  # one by one: a result may be a tuple
    return results[combined]


def per_code(function, codes: np.ndarray, *columns) -> np.ndarray:
    """``function(*values)`` for every row of ``columns``, called once per code of ``codes`` and spread over
    the rows (an object array), as :func:`per_distinct` but without grouping the values: the caller knows
    that rows with one code hold the same values in every column (the ``lookup`` codes of
    :meth:`tracker.criteria.thresholds.ThresholdTable.per_nerve`)."""
    codes = np.asarray(codes, dtype=np.int64)
    arrays = [c.to_numpy() if isinstance(c, pd.Series) else np.asarray(c) for c in columns]
    if not len(codes):
        return np.empty(0, dtype=object)
    count = int(codes.max()) + 1
    # Codes counting up in order of first appearance: a code first appears where the running maximum grows.
    first = np.flatnonzero(np.r_[True, codes[1:] > np.maximum.accumulate(codes)[:-1]])
    if len(first) != count or codes[0] != 0:  # any other order (a subset of the rows): find them by sorting
        present, first = np.unique(codes, return_index=True)
        codes = np.searchsorted(present, codes)
    results = np.empty(len(first), dtype=object)
    for position, row in enumerate(first):
        results[position] = function(*(a[row] for a in arrays))  # one by one: a result may be a tuple
    return results[codes]


def common_blocks(nerves: pd.DataFrame, settings: Settings) -> list[tuple[np.ndarray, str]]:
    """Reasons that make every finding of a nerve not evaluable (cold limb excluded by setting)."""
    blocks = []
    if settings.cold_limbs == "exclude":
        blocks.append((nerves["cold"].fillna(False).to_numpy(dtype=bool), "cold limb excluded (setting)"))
    return blocks


def nerve_identity(findings: pd.DataFrame, settings: Settings) -> pd.Series:
    """What counts as "a nerve" for the combination rules: nerve and side, or the nerve name alone.

    Plain objects (text, NaN where the nerve or its side is missing), built once per distinct nerve and
    side: a string-typed column costs far more to build and to group by than the rules themselves."""
    nerve = findings["nerve"].to_numpy(dtype=object)
    if settings.sides_are_separate_nerves:
        side = findings["side"].to_numpy(dtype=object)
        identity = per_distinct(lambda n, s: np.nan if pd.isna(n) or pd.isna(s) else f"{n} {s}", nerve, side)
    else:
        identity = per_distinct(lambda n: np.nan if pd.isna(n) else str(n), nerve)
    return pd.Series(identity, index=findings.index, dtype=object, copy=False)


def met_sets(findings: pd.DataFrame, settings: Settings) -> pd.DataFrame:
    """Per visit and nerve (identity): which items are met — a boolean table indexed by
    (``visit_key``, ``identity``) with one column per item met anywhere."""
    # Only the four columns the table needs: filtering every column of millions of findings is wasted.
    met = findings.loc[
        findings["status"].to_numpy(dtype=object) == MET, ["visit_key", "nerve", "side", "item"]
    ]
    if met.empty:
        return pd.DataFrame(index=pd.MultiIndex.from_arrays([[], []], names=["visit_key", "identity"]))
    met = met.assign(identity=nerve_identity(met, settings))  # a Series: stays plain objects
    table = met.groupby(["visit_key", "identity", "item"]).size().unstack("item", fill_value=0) > 0
    return table


def count_per_visit(mask: pd.Series, keys: pd.Index) -> pd.Series:
    """Per visit of ``keys``: how many rows of ``mask`` are true (0 for visits without rows). ``mask``:
    booleans indexed by ``visit_key`` (and the nerve identity)."""
    # Each row's position in ``keys`` is found once per index: a group-by for every count cost more than the
    # rules.
    position = memo.once(
        "visit_positions",
        (mask.index, keys),
        lambda: keys.get_indexer(mask.index.get_level_values("visit_key")),
    )
    chosen = position[(position >= 0) & mask.to_numpy(dtype=bool)]
    return pd.Series(np.bincount(chosen, minlength=len(keys)).astype(np.int64), index=keys, name=mask.name)


def _per_visit(values: pd.Series, visits: pd.Index) -> pd.Series:
    return count_per_visit(values, visits)


def count_nerves(sets: pd.DataFrame, item: str, visits: pd.Index) -> pd.Series:
    """Number of nerves meeting ``item`` per visit (0 where none)."""
    if item not in sets:
        return pd.Series(0, index=visits)
    return _per_visit(sets[item], visits)


def count_any(sets: pd.DataFrame, items: list[str], visits: pd.Index) -> pd.Series:
    """Number of nerves meeting at least one of ``items`` per visit."""
    present = [i for i in items if i in sets]
    if not present:
        return pd.Series(0, index=visits)
    return _per_visit(sets[present].any(axis=1), visits)


def union(sets: pd.DataFrame, items: list[str], visits: pd.Index) -> pd.Series:
    """Per visit, the set of nerves meeting any of ``items`` (prefer :func:`count_any` for counts)."""
    present = [i for i in items if i in sets]
    empty = pd.Series([frozenset()] * len(visits), index=visits, dtype=object)
    if not present:
        return empty
    hits = sets[present].any(axis=1)
    hits = hits[hits].reset_index()
    grouped = hits.groupby("visit_key")["identity"].agg(frozenset)
    return grouped.reindex(visits).where(lambda s: s.notna(), frozenset()).astype(object).combine_first(empty)


def one_plus_other(sets: pd.DataFrame, item: str, others: list[str], visits: pd.Index) -> pd.Series:
    """True where ``item`` is met in one nerve and any of ``others`` in a different nerve.

    With A the nerves meeting ``item`` and B those meeting any of ``others``, some a ∈ A and b ∈ B differ
    unless A and B are the same single nerve.
    """
    present = [i for i in others if i in sets]
    if item not in sets or not present:
        return pd.Series(False, index=visits)
    a = sets[item]
    b = sets[present].any(axis=1)
    n_a, n_b, n_ab = _per_visit(a, visits), _per_visit(b, visits), _per_visit(a & b, visits)
    return (n_a >= 1) & (n_b >= 1) & ~((n_a == 1) & (n_b == 1) & (n_ab == 1))


def other_outside(sets: pd.DataFrame, item: str, others: list[str], visits: pd.Index) -> pd.Series:
    """True where some nerve that does not meet ``item`` meets any of ``others`` ("… plus another
    parameter in another nerve" when ``item`` itself must be met in two nerves)."""
    present = [i for i in others if i in sets]
    if not present:
        return pd.Series(False, index=visits)
    outside = sets[present].any(axis=1)
    if item in sets:
        outside &= ~sets[item]
    return _per_visit(outside, visits) >= 1


def describe(comparator: str) -> str:
    return COMPARATORS[comparator]


# ---------------------------------------------------------------- undecided outcomes


def with_status(findings: pd.DataFrame, mask: np.ndarray, status: str) -> pd.DataFrame:
    """A copy of ``findings`` whose status is ``status`` where ``mask`` holds (a what-if of missing data)."""
    changed = findings.copy(deep=False)
    statuses = findings["status"].to_numpy(dtype=object, copy=True)
    statuses[np.asarray(mask, dtype=bool)] = status
    changed["status"] = pd.Series(statuses, index=findings.index, dtype=object)
    return changed


def wanting(findings: pd.DataFrame) -> np.ndarray:
    """Findings not evaluable for want of data (not-applicable findings are settled)."""
    return findings["status"].to_numpy(dtype=object) == NOT_EVALUABLE


ITEM_FIELDS = ("nerve", "side", "modality", "item", "parameter", "segment", "reason")
# What :func:`settle` reads of its candidates (taking only these is cheaper than every finding column).
OPEN_COLUMNS = ["visit_key", *ITEM_FIELDS]


def open_items(findings: pd.DataFrame, keys: pd.Index) -> pd.Series:
    """Per visit (``keys``): a tuple of plain dicts, one per finding of ``findings`` (empty where none)."""
    empty = pd.Series([()] * len(keys), index=keys, dtype=object)
    if findings.empty:
        return empty
    columns = [
        findings[c].to_numpy(dtype=object) if c in findings else np.full(len(findings), None, dtype=object)
        for c in ITEM_FIELDS
    ]
    rows = [
        {
            field: (value if isinstance(value, str) and value else None)
            for field, value in zip(ITEM_FIELDS, values)
        }
        for values in zip(*columns)
    ]
    grouped = (
        pd.Series(rows, index=findings["visit_key"].to_numpy(), dtype=object).groupby(level=0).agg(tuple)
    )
    return grouped.reindex(keys).where(lambda s: s.notna(), None).combine_first(empty).astype(object)


def settle(
    outcome: pd.Series,
    rule: pd.Series,
    best: pd.Series,
    ranks: dict[str, int],
    candidates: pd.DataFrame,
    keys: pd.Index,
    *,
    note: bool = True,
) -> tuple[pd.Series, pd.Series, pd.Series]:
    """Where ``best`` (the outcome if missing data turned out favourable) ranks above ``outcome``: a not-met
    outcome becomes ``undecided`` and a reached level stays; the not-evaluable ``candidates`` of those visits
    are listed (and, with ``note``, named in the rule). Elsewhere nothing changes and nothing is listed.

    Returns (outcome, rule, undecided_items) over ``keys``.
    """
    actual = outcome.map(lambda o: ranks.get(o, 0)).to_numpy(dtype=int)
    possible = best.reindex(keys).map(lambda o: ranks.get(o, 0)).to_numpy(dtype=int)
    raised = pd.Series(possible > actual, index=keys)
    outcome, rule = outcome.copy(), rule.copy()
    lowest = min(ranks, key=ranks.get)
    outcome[raised & (outcome == lowest)] = UNDECIDED
    chosen = candidates[candidates["visit_key"].isin(keys[raised.to_numpy()])]
    items = open_items(chosen, keys)
    if note and raised.any():

        def words(found: tuple) -> str:
            names = [" ".join(str(f[k]) for k in ("nerve", "side", "item") if f.get(k)) for f in found]
            shown = ", ".join(names[:6]) + (f" and {len(names) - 6} more" if len(names) > 6 else "")
            return (
                f"; undecided: {len(names)} finding{'s' if len(names) != 1 else ''} not evaluable for want "
                f"of data could change the outcome ({shown})"
            )

        where = raised.to_numpy() & (items.map(len).to_numpy() > 0)
        rule[where] = rule[where].astype(str) + items[where].map(words)
    return outcome, rule, items


def stack(frames: list[pd.DataFrame]) -> pd.DataFrame:
    """``pd.concat(frames, ignore_index=True)`` for findings parts: when every part has the same columns with
    the same NumPy dtypes (the rule), one ``np.concatenate`` per column — pandas' block concatenation of
    many text columns costs more than the rules. Anything else goes to ``pd.concat`` itself."""
    frames = list(frames)
    if not frames:
        return pd.concat(frames, ignore_index=True)
    columns = list(frames[0].columns)
    dtypes = list(frames[0].dtypes)
    plain = len(set(columns)) == len(columns) and all(isinstance(d, np.dtype) for d in dtypes)
    plain = plain and all(list(f.columns) == columns and list(f.dtypes) == dtypes for f in frames[1:])
    if not plain:
        return pd.concat(frames, ignore_index=True)
    index = pd.RangeIndex(sum(len(f) for f in frames))
    data = {}
    for column, dtype in zip(columns, dtypes):
        values = np.concatenate([f[column].to_numpy() for f in frames])
        data[column] = pd.Series(values, index=index, dtype=dtype, copy=False) if dtype == object else values
    return pd.DataFrame(data, index=index, columns=columns, copy=False)
