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
    result = pd.DataFrame(
        {
            "visit_key": frame["visit_key"].to_numpy(),
            "criteria": criteria,
            "nerve": frame["nerve"].to_numpy(),
            "side": frame["side"].to_numpy(),
            "modality": frame["modality"].to_numpy() if "modality" in frame else "motor",
            "item": item,
            "parameter": parameter,
            "segment": segment if segment is not None else None,
            "value": value,
            "unit": unit,
            "limit": limit,
            "limit_name": limit_name,
            "threshold": quantise_array(threshold),
            "comparator": comparator,
            "status": status,
            "reason": reason,
            "source": source.to_numpy() if isinstance(source, pd.Series) else source,
            "source_status": source_status.to_numpy() if isinstance(source_status, pd.Series) else source_status,
            "limit_source": limit_source.to_numpy() if isinstance(limit_source, pd.Series) else limit_source,
            "limit_status": limit_status.to_numpy() if isinstance(limit_status, pd.Series) else limit_status,
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
    """Per visit and item: the set of nerves (identities) where the item is met."""
    met = findings[findings["status"] == MET].assign(identity=lambda f: nerve_identity(f, settings))
    return met.groupby(["visit_key", "item"])["identity"].agg(frozenset).unstack("item")


def count_nerves(sets: pd.DataFrame, item: str, visits: pd.Index) -> pd.Series:
    """Number of nerves meeting ``item`` per visit (0 where none)."""
    if item not in sets:
        return pd.Series(0, index=visits)
    return sets[item].reindex(visits).map(lambda s: len(s) if isinstance(s, frozenset) else 0)


def union(sets: pd.DataFrame, items: list[str], visits: pd.Index) -> pd.Series:
    """Per visit, the nerves meeting any of ``items``."""
    present = [i for i in items if i in sets]
    empty = frozenset()
    if not present:
        return pd.Series([empty] * len(visits), index=visits, dtype=object)
    table = sets[present].reindex(visits)
    return table.apply(lambda row: frozenset().union(*[s for s in row if isinstance(s, frozenset)]), axis=1)


def one_plus_other(sets: pd.DataFrame, item: str, others: list[str], visits: pd.Index) -> pd.Series:
    """True where ``item`` is met in one nerve and any of ``others`` in a different nerve."""
    first = sets[item].reindex(visits) if item in sets else pd.Series([None] * len(visits), index=visits)
    rest = union(sets, others, visits)
    return pd.Series(
        [
            isinstance(a, frozenset) and any(x != y for x in a for y in b)
            for a, b in zip(first, rest)
        ],
        index=visits,
    )


def describe(comparator: str) -> str:
    return COMPARATORS[comparator]
