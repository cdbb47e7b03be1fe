"""Vectorised building blocks shared by the criteria sets: comparisons with the quantised rule,
findings with their trace, and the "in N nerves" / "one nerve plus another parameter in another nerve"
combinations."""

from __future__ import annotations

import numpy as np
import pandas as pd

from tracker.criteria.model import FINDING_COLUMNS, MET, NOT_EVALUABLE, NOT_MET, Settings
from tracker.criteria.thresholds import COMPARATORS
from tracker.domain.conduction import quantise_array


def compare(values: np.ndarray, thresholds: np.ndarray, comparator: str | np.ndarray) -> np.ndarray:
    """Element-wise comparison under the quantised rule; False where either side is NaN."""
    v = quantise_array(values)
    t = quantise_array(thresholds)
    comparators = np.broadcast_to(np.asarray(comparator, dtype=object), v.shape)
    with np.errstate(invalid="ignore"):
        result = np.select(
            [comparators == "ge", comparators == "gt", comparators == "le", comparators == "lt"],
            [v >= t, v > t, v <= t, v < t],
            default=False,
        )
    return result & ~np.isnan(v) & ~np.isnan(t)


def margin(values: np.ndarray, thresholds: np.ndarray, comparator: str | np.ndarray) -> np.ndarray:
    """How far a value is from meeting its threshold, in the parameter's unit (≤ 0 once met)."""
    v, t = np.asarray(values, dtype=float), np.asarray(thresholds, dtype=float)
    comparators = np.broadcast_to(np.asarray(comparator, dtype=object), v.shape)
    upward = np.isin(comparators, ["ge", "gt"])
    return quantise_array(np.where(upward, t - v, v - t))


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
) -> pd.DataFrame:
    """Findings for one item over the rows of ``frame`` (``visit_key``, ``nerve``, ``side``, ``modality``).

    Status, in order: ``not_evaluable`` where a ``blocked`` mask is true (its reason: excluded nerve,
    entrapment, cold limb, failed precondition…); ``not_evaluable`` where the value or the threshold is
    missing; otherwise ``met`` when the comparison holds (and ``requirement``, if given, is true),
    else ``not_met``.
    """
    n = len(frame)
    value = np.asarray(value, dtype=float)
    threshold = np.asarray(threshold, dtype=float)
    limit = np.asarray(limit, dtype=float)
    holds = compare(value, threshold, comparator)
    if requirement is not None:
        holds &= np.asarray(requirement, dtype=bool)
    status = np.where(holds, MET, NOT_MET).astype(object)
    reason = np.full(n, "", dtype=object)
    no_limit = np.isnan(threshold) & ~np.isnan(value)
    status[no_limit] = NOT_EVALUABLE
    reason[no_limit] = "no normal limit or threshold for this nerve"
    missing = np.isnan(value)
    status[missing] = NOT_EVALUABLE
    reason[missing] = "value missing"
    for mask, why in reversed(blocked or []):
        mask = np.asarray(mask, dtype=bool)
        status[mask] = NOT_EVALUABLE
        reason[mask] = why[mask] if isinstance(why, np.ndarray) else why
    def text(values) -> pd.Series:
        # Plain Python objects: letting pandas infer a string column for each of millions of findings
        # costs more than the rules themselves.
        if isinstance(values, pd.Series):
            values = values.to_numpy(dtype=object)
        if values is None or isinstance(values, str):
            array = np.empty(n, dtype=object)
            array[:] = values
            return pd.Series(array, dtype=object, copy=False)
        return pd.Series(np.asarray(values, dtype=object), dtype=object, copy=False)

    result = pd.DataFrame(
        {
            "visit_key": frame["visit_key"].to_numpy(),
            "criteria": text(criteria),
            "nerve": text(frame["nerve"]),
            "side": text(frame["side"]),
            "modality": text(frame["modality"] if "modality" in frame else "motor"),
            "item": text(item),
            "parameter": text(parameter),
            "segment": text(segment),
            "value": value,
            "unit": text(unit),
            "limit": limit,
            "limit_name": text(limit_name),
            "threshold": quantise_array(threshold),
            "comparator": text(comparator),
            "status": text(status),
            "reason": text(reason),
            "source": text(source),
            "source_status": text(source_status),
            "limit_source": text(limit_source),
            "limit_status": text(limit_status),
            "margin": margin(value, threshold, comparator),
        }
    )
    return result[FINDING_COLUMNS]


def common_blocks(nerves: pd.DataFrame, settings: Settings) -> list[tuple[np.ndarray, str]]:
    """Reasons that make every finding of a nerve not evaluable (cold limb excluded by setting)."""
    blocks = []
    if settings.cold_limbs == "exclude":
        blocks.append((nerves["cold"].fillna(False).to_numpy(dtype=bool), "cold limb excluded (setting)"))
    return blocks


def nerve_identity(findings: pd.DataFrame, settings: Settings) -> pd.Series:
    """What counts as "a nerve" for the combination rules: nerve and side, or the nerve name alone."""
    if settings.sides_are_separate_nerves:
        return findings["nerve"].astype(str) + " " + findings["side"].astype(str)
    return findings["nerve"].astype(str)


def met_sets(findings: pd.DataFrame, settings: Settings) -> pd.DataFrame:
    """Per visit and nerve (identity): which items are met — a boolean table indexed by
    (``visit_key``, ``identity``) with one column per item met anywhere."""
    met = findings[findings["status"] == MET]
    if met.empty:
        return pd.DataFrame(index=pd.MultiIndex.from_arrays([[], []], names=["visit_key", "identity"]))
    met = met.assign(identity=nerve_identity(met, settings).to_numpy())
    table = met.groupby(["visit_key", "identity", "item"]).size().unstack("item", fill_value=0) > 0
    return table


def _per_visit(values: pd.Series, visits: pd.Index) -> pd.Series:
    return values.groupby(level="visit_key").sum().reindex(visits, fill_value=0).astype(int)


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
