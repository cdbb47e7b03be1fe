"""Evaluate criteria sets over many visits at once, and derive the reports built on the findings:
temperature warnings, the closest miss of a set not met, and what changed since the previous visit."""

from __future__ import annotations

import importlib

import numpy as np
import pandas as pd

from tracker.criteria import features, memo
from tracker.criteria.model import MET, NOT_EVALUABLE, NOT_MET, UNDECIDED, SetResult, Settings

# Criteria id → module under tracker.criteria.sets (each has ID and evaluate()).
REGISTRY = {
    "efns-pns-2010-cidp": "efns_pns_2010_cidp",
    "ean-pns-2021-cidp": "ean_pns_2021_cidp",
    "aan-1991-cidp": "aan_1991_cidp",
    "efns-pns-2010-mmn": "efns_pns_2010_mmn",
    "hadden-1998-gbs": "hadden_1998_gbs",
    "rajabally-2015-gbs": "rajabally_2015_gbs",
}


def available() -> list[str]:
    """Criteria ids whose module exists in this installation."""
    found = []
    for criteria_id, module in REGISTRY.items():
        try:
            importlib.import_module(f"tracker.criteria.sets.{module}")
        except ModuleNotFoundError:
            continue
        found.append(criteria_id)
    return found


def evaluate(
    visits: pd.DataFrame,
    tests: pd.DataFrame,
    sites: pd.DataFrame,
    limits: pd.DataFrame,
    criteria_ids: list[str] | None = None,
    settings: Settings | None = None,
    *,
    built: tuple[pd.DataFrame, pd.DataFrame] | None = None,
) -> dict[str, SetResult]:
    """Every requested criteria set over every visit, in one vectorised pass per set.

    ``built``: the ``(nerves, paths)`` that :func:`features.build` gave for these same frames, when the
    caller needs them too (the research export), so that they are not built twice.
    """
    settings = settings or Settings()
    nerves, paths = built if built is not None else features.build(visits, tests, sites, limits)
    results = {}
    # The sets share derived frames (motor nerve tests, best paths…): each is computed once here.
    with memo.shared():
        for criteria_id in criteria_ids or available():
            if criteria_id not in REGISTRY:
                raise KeyError(f"Unknown criteria set {criteria_id!r}; known: {', '.join(REGISTRY)}")
            module = importlib.import_module(f"tracker.criteria.sets.{REGISTRY[criteria_id]}")
            results[criteria_id] = module.evaluate(nerves, paths, visits, settings)
    return results


def temperature_warnings(
    visits: pd.DataFrame,
    tests: pd.DataFrame,
    sites: pd.DataFrame,
    limits: pd.DataFrame,
    *,
    nerves: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """Nerve tests of ``visits`` recorded from a limb colder than the guideline minimum (no correction is
    applied). Tests of other visits in ``tests`` are ignored."""
    if nerves is None:
        tests = tests[tests["visit_key"].isin(visits["visit_key"])]
        nerves, _ = features.build(visits, tests, sites[sites["test_key"].isin(tests["test_key"])], limits)
    else:
        nerves = nerves[nerves["visit_key"].isin(visits["visit_key"])]
    cold = nerves[nerves["cold"].fillna(False).astype(bool)]
    minimums = features.temperature_minimums()

    def checked(limb: str) -> str:
        return "from memory, not verified" if minimums.get(limb, (0, ""))[1] == "memory" else "verified"

    return pd.DataFrame(
        {
            "visit_key": cold["visit_key"],
            "nerve": cold["nerve"],
            "side": cold["side"],
            "modality": cold["modality"],
            "temperature_c": cold["temperature_c"],
            "minimum_c": cold["temperature_minimum_c"],
            "message": [
                f"{n} {s} {m}: limb temperature {t:g} °C is below the guideline minimum of {mn:g} °C "
                f"({checked(limb)}); "
                "values kept, no correction applied"
                for n, s, m, t, mn, limb in zip(
                    cold["nerve"],
                    cold["side"],
                    cold["modality"],
                    cold["temperature_c"],
                    cold["temperature_minimum_c"],
                    cold["limb"],
                )
            ],
        }
    ).reset_index(drop=True)


def closest_miss(result: SetResult) -> pd.DataFrame:
    """For each visit where the set is not met (or undecided): the not-met finding nearest its threshold
    (relative), among the items that can change the outcome (``SetResult.outcome_items``)."""
    not_met_visits = result.outcomes.loc[result.outcomes["outcome"].isin(["not_met", UNDECIDED]), "visit_key"]
    findings = result.findings[
        (result.findings["status"] == NOT_MET) & result.findings["visit_key"].isin(not_met_visits)
    ]
    if result.outcome_items:
        findings = findings[findings["item"].isin(result.outcome_items)]
    # Only findings whose own value falls short (margin > 0): a value past its threshold that is not met
    # because another condition failed is no "near miss".
    findings = findings[
        findings["threshold"].notna() & (findings["margin"] > 0) & (findings["threshold"] != 0)
    ].copy()
    if findings.empty:
        return findings.assign(relative_margin=pd.Series(dtype=float), text=pd.Series(dtype=object))
    findings["relative_margin"] = (findings["margin"] / findings["threshold"].abs()).abs()
    best = findings.sort_values(["visit_key", "relative_margin"]).drop_duplicates("visit_key")
    best["text"] = [describe_miss(row) for row in best.itertuples()]
    return best.reset_index(drop=True)


def describe_miss(row) -> str:
    direction = "above" if row.comparator in ("le", "lt") else "below"
    where = f" ({row.segment})" if isinstance(row.segment, str) and row.segment else ""
    return (
        f"{row.nerve} {row.side} {row.parameter}{where} {row.value:.1f} {row.unit}, {abs(row.margin):.1f} "
        f"{row.unit} {direction} the {row.threshold:.1f} {row.unit} threshold ({row.item})"
    )


def changes_between_visits(visits: pd.DataFrame, result: SetResult) -> pd.DataFrame:
    """Findings that turned met or not met between consecutive visits of the same patient, and met findings
    that became not evaluable (or the reverse): a met finding lost for want of data is a change to report.

    ``visits`` needs ``visit_key``, ``patient``, ``visit_date``. Other changes involving not-evaluable or
    not-applicable findings are not reported.
    """
    order = visits[["visit_key", "patient", "visit_date"]].sort_values(["patient", "visit_date"])
    order["previous_key"] = order.groupby("patient")["visit_key"].shift(1)
    key = ["nerve", "side", "modality", "item"]
    findings = result.findings[["visit_key", *key, "status", "value", "unit", "parameter"]]
    pairs = order.dropna(subset=["previous_key"])
    current = findings.merge(pairs[["visit_key", "previous_key", "patient", "visit_date"]], on="visit_key")
    previous = findings.rename(
        columns={"visit_key": "previous_key", "status": "previous_status", "value": "previous_value"}
    )
    merged = current.merge(
        previous[["previous_key", *key, "previous_status", "previous_value"]], on=["previous_key", *key]
    )
    status, previous = merged["status"], merged["previous_status"]
    turned = merged[
        ((status == MET) & previous.isin([NOT_MET, NOT_EVALUABLE]))
        | (status.isin([NOT_MET, NOT_EVALUABLE]) & (previous == MET))
    ].copy()
    turned["change"] = np.select(
        [
            (turned["status"] == MET) & (turned["previous_status"] == NOT_MET),
            turned["status"] == MET,
            turned["status"] == NOT_MET,
        ],
        ["turned met", "turned met (was not evaluable)", "turned not met"],
        default="met → not evaluable (want of data)",
    )
    return turned.reset_index(drop=True)


def outcome_changes(visits: pd.DataFrame, result: SetResult) -> pd.DataFrame:
    """Per visit with a previous visit of the same patient whose outcome differs: ``visit_key``,
    ``previous_outcome``, ``outcome`` (e.g. definite → undecided)."""
    order = (
        visits[["visit_key", "patient", "visit_date"]]
        .drop_duplicates("visit_key")
        .sort_values(["patient", "visit_date"])
    )
    order["previous_key"] = order.groupby("patient")["visit_key"].shift(1)
    outcome = result.outcomes.drop_duplicates("visit_key").set_index("visit_key")["outcome"]
    pairs = order.dropna(subset=["previous_key"])
    frame = pd.DataFrame(
        {
            "visit_key": pairs["visit_key"].to_numpy(),
            "previous_outcome": outcome.reindex(
                pairs["previous_key"].astype(pairs["visit_key"].dtype)
            ).to_numpy(),
            "outcome": outcome.reindex(pairs["visit_key"]).to_numpy(),
        }
    )
    frame = frame.dropna()
    return frame[frame["previous_outcome"] != frame["outcome"]].reset_index(drop=True)
