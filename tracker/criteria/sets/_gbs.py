"""Building blocks shared by the two Guillain–Barré classification sets (``hadden-1998-gbs`` and
``rajabally-2015-gbs``).

- per-nerve items whose threshold switches with the distal CMAP amplitude (:func:`switched`);
- the proximal/distal amplitude item (:func:`block`), read as the percentage fall from the distal CMAP
  (ratio p/d < 0.5 ⇔ fall > 50 %), so that the engine's quantised arithmetic decides the exact edge;
- the distal-CMAP items behind the axonal, inexcitable and one-nerve rules, and the "all values within
  normal limits" items (:func:`class_findings`);
- the class decision: demyelinating / inexcitable / axonal / normal / equivocal (:func:`classify`).

Numbers live in the sets' tables (``tables/<id>.csv``); this module holds comparison and combination logic
only. Choices on open questions are marked "Decision" where they are applied.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from tracker.criteria import memo, rules
from tracker.criteria import parameters as p
from tracker.criteria.model import MET, NOT_APPLICABLE, NOT_EVALUABLE, NOT_MET, Settings
from tracker.criteria.thresholds import COMPARATORS, ThresholdTable

OUTCOMES = ("demyelinating", "axonal", "inexcitable", "equivocal", "normal")
NORMAL_ITEMS = ("normal_dml", "normal_cv", "normal_f", "normal_dcmap", "normal_pcmap", "normal_ratio")
LOW_CMAP, VERY_LOW_CMAP, ONE_NERVE_FLOOR = "axonal_low_cmap", "very_low_cmap", "one_nerve_floor"
# Decision: the classes that speak about "all nerves" (normal, inexcitable) need at least this many motor
# nerves; a one-nerve study is equivocal (not classifiable) rather than "normal" or "inexcitable".
MIN_NERVES = 2
LIMIT_NAMES = {"uln": "ULN", "lln": "LLN"}
ITEM_PREFIX = "item:"

NO_RESPONSE = "no recordable response at the distal site"
SWITCH_UNKNOWN = "distal CMAP amplitude or its LLN missing: the threshold cannot be chosen"
NO_PATH = "no proximal stimulation on an eligible path"
NO_PATH_OUTSIDE_ENTRAPMENT = "no proximal stimulation outside entrapment sites"
PRECONDITION_UNKNOWN = (
    "distal CMAP amplitude or its LLN missing: the amplitude precondition cannot be checked"
)
WRIST = "median distal latency not counted: neuropathy at the wrist judged by the clinician"
# Reasons that mean "a value was not measured or has no limit" (as opposed to a precondition or a setting).
MISSING_DATA = (
    "value missing",
    "no normal limit or threshold for this nerve",
    "F-waves not recorded",
    SWITCH_UNKNOWN,
    NO_PATH,
    PRECONDITION_UNKNOWN,
)


def cv_column(settings: Settings) -> str:
    return "cv_standard" if settings.cv_segments == "standard" else "cv_outside_entrapment"


def eligible_paths(paths: pd.DataFrame, settings: Settings) -> pd.Series:
    return p.eligible_paths(paths, settings.block_path)


def limit_text(reference: str, factor: float) -> str:
    return f"{factor * 100:g} % of {LIMIT_NAMES[reference]}" if reference in LIMIT_NAMES else "fixed"


def rule_text(table: ThresholdTable, item: str) -> str:
    """``"< 10 % of LLN"`` for an item of the table (used in the outcome's rule wording)."""
    row = table.one(item)
    if row.reference in LIMIT_NAMES:
        return f"{COMPARATORS[row.comparator]} {row.value * 100:g} % of {LIMIT_NAMES[row.reference]}"
    return f"{COMPARATORS[row.comparator]} {row.value:g} {row.unit}"


def _scaled(
    table: ThresholdTable, item: str, frame: pd.DataFrame, limit: np.ndarray | None
) -> tuple[pd.DataFrame, np.ndarray]:
    rows = table.per_nerve(item, frame["nerve"], frame.get("lff_hz"))
    factor = rows["value"].to_numpy(dtype=float)
    if limit is None:
        return rows, factor
    reference = rows["reference"].to_numpy(dtype=object)
    relative = memo.by_content(
        ("of_limit", tuple(LIMIT_NAMES)), (reference,), lambda: np.isin(reference, list(LIMIT_NAMES))
    )
    return rows, np.where(relative, factor * limit, factor)


def _names(rows: pd.DataFrame) -> np.ndarray:
    """``"110 % of ULN"`` per row of a threshold lookup, built once per nerve."""
    return rules.per_code(
        lambda ref, value: "" if pd.isna(ref) or np.isnan(value) else limit_text(ref, value),
        rows["lookup"].to_numpy(),
        rows["reference"].to_numpy(dtype=object),
        rows["value"].to_numpy(dtype=float),
    )


def switched(
    frame: pd.DataFrame,
    table: ThresholdTable,
    item: str,
    *,
    criteria: str,
    parameter: str,
    unit: str,
    value,
    limit,
    settings: Settings,
    low_item: str | None = None,
    switch_item: str | None = None,
    segment=None,
    blocked: list | None = None,
    block_no_response: bool = True,
    inapplicable: list | None = None,
) -> pd.DataFrame:
    """One per-nerve item over the motor nerve tests in ``frame``.

    With ``low_item``/``switch_item`` the threshold of ``low_item`` applies where the distal CMAP meets the
    ``switch_item`` condition. Where the distal CMAP (or its LLN) is unknown, the finding is still decided
    when both thresholds give the same verdict, and is not evaluable otherwise. ``blocked``: masks of want of
    data (not evaluable); ``inapplicable``: masks where the item does not apply (exclusion, a feature judged
    by another item) — with ``block_no_response`` a nerve without a recordable response is one of them.
    """
    value = np.asarray(value, dtype=float)
    limit = np.full(len(frame), np.nan) if limit is None else np.asarray(limit, dtype=float)
    rows, threshold = _scaled(table, item, frame, limit)
    comparator = rows["comparator"].to_numpy(dtype=object)
    names = _names(rows)
    blocks = rules.common_blocks(frame, settings)
    blocks += list(blocked or [])
    # An inexcitable nerve is a finding, not a gap: its latency and velocity items do not apply.
    not_applicable = [(frame["no_response"].to_numpy(dtype=bool), NO_RESPONSE)] if block_no_response else []
    not_applicable += list(inapplicable or [])
    if low_item is not None:
        low_rows, low_threshold = _scaled(table, low_item, frame, limit)
        low_comparator = low_rows["comparator"].to_numpy(dtype=object)
        low, known = p.amplitude_switch(frame, table, switch_item)
        use_low = low & known
        met_normal = rules.compare(value, threshold, comparator)
        met_low = rules.compare(value, low_threshold, low_comparator)
        switch_words = rule_text(table, switch_item)
        undecided = ~known & (met_normal != met_low) & ~np.isnan(value)

        def limit_name(normal_name: str, low_name: str, is_low: bool, is_known: bool, unsure: bool) -> str:
            name = low_name + f" (distal CMAP {switch_words})" if is_low else normal_name
            if is_known:
                return name
            return name + (
                " (distal CMAP unknown)" if unsure else " (distal CMAP unknown: both thresholds agree)"
            )

        # Written once per distinct combination (a cohort has few), not once per nerve test.
        names = rules.per_distinct(limit_name, names, _names(low_rows), use_low, known, undecided)
        threshold = np.where(use_low, low_threshold, threshold)
        comparator = np.where(use_low, low_comparator, comparator)
        blocks.append((undecided, SWITCH_UNKNOWN))
    return rules.item_findings(
        frame,
        criteria=criteria,
        item=item,
        parameter=parameter,
        unit=unit,
        value=value,
        threshold=threshold,
        comparator=comparator,
        limit=limit,
        limit_name=names,
        source=rows["source"],
        source_status=rows["status"],
        segment=None if segment is None else np.asarray(segment, dtype=object),
        blocked=blocks,
        inapplicable=not_applicable,
    )


def rows_of(table: ThresholdTable, item: str):
    return [r for r in table.rows if r.item == item]


def wrist_block(frame: pd.DataFrame) -> tuple[np.ndarray, str]:
    """Median distal latency not counted where the clinician judged it
    explained by neuropathy at the wrist."""
    mask = (frame["nerve"] == "median").to_numpy() & frame["wrist_entrapment"].fillna(False).astype(
        bool
    ).to_numpy()
    return mask, WRIST


def _excluded(frame: pd.DataFrame, table: ThresholdTable, item: str) -> tuple[np.ndarray, str]:
    excluded = sorted({n for r in rows_of(table, item) for n in r.excluded_nerves})
    mask = frame["nerve"].isin(excluded).to_numpy()
    return mask, f"{', '.join(excluded)} nerve excluded by this criterion" if excluded else ""


def best_reduction(nerves: pd.DataFrame, paths: pd.DataFrame, settings: Settings) -> pd.DataFrame:
    """Per motor nerve test, the eligible path with the largest amplitude fall (the lowest proximal CMAP)."""
    return p.best_eligible_path(nerves, paths, "amplitude_reduction_pct", settings.block_path)


def block(
    nerves: pd.DataFrame,
    paths: pd.DataFrame,
    table: ThresholdTable,
    item: str,
    settings: Settings,
    *,
    criteria: str,
    precondition_item: str | None = None,
) -> pd.DataFrame:
    """Proximal versus distal CMAP amplitude over the eligible paths (largest fall), as percent fall.

    ``precondition_item`` (a fraction of the amplitude LLN) gates the item; excluded nerves come from the
    table's ``excluded_nerves``. Without a precondition row the item has no amplitude floor.
    """
    frame = p.motor(nerves)
    best = best_reduction(nerves, paths, settings)
    rows, threshold = _scaled(table, item, frame, None)
    value = best["amplitude_reduction_pct"].to_numpy(dtype=float)
    no_response = frame["no_response"].to_numpy(dtype=bool)
    excluded, why = _excluded(frame, table, item)
    # Proximal sites recorded, but every path to them crosses an entrapment (or unlabelled) segment: the item
    # does not apply there (as in the CIDP sets); no proximal site at all is want of data.
    any_site = frame["test_key"].isin(paths["test_key"].unique()).to_numpy()
    eligible_keys = paths.loc[eligible_paths(paths, settings), "test_key"].unique()
    eligible_site = frame["test_key"].isin(eligible_keys).to_numpy()
    entrapment_only = np.isnan(value) & ~no_response & any_site & ~eligible_site
    path_words = settings.block_path.replace("_", " ")
    blocks = rules.common_blocks(frame, settings) + [
        (np.isnan(value) & ~no_response & ~entrapment_only, f"{NO_PATH} ({path_words})"),
    ]
    not_applicable = [
        (excluded, why),
        (no_response, NO_RESPONSE),
        (entrapment_only, f"{NO_PATH_OUTSIDE_ENTRAPMENT} ({path_words})"),
    ]
    if precondition_item is not None:
        lln = frame["lln_amplitude"].to_numpy(dtype=float)
        pre_rows, pre_threshold = _scaled(table, precondition_item, frame, lln)
        pre_comparator = pre_rows["comparator"].to_numpy(dtype=object)
        amplitude = frame["distal_amplitude"].to_numpy(dtype=float)
        unknown = np.isnan(amplitude) | np.isnan(pre_threshold)
        failed = ~rules.compare(amplitude, pre_threshold, pre_comparator) & ~unknown
        reasons = np.full(len(frame), "", dtype=object)
        factor, shown = pre_rows["value"].to_numpy(dtype=float), np.round(pre_threshold, 6)
        for i in np.flatnonzero(failed):
            reasons[i] = (
                f"amplitude precondition failed: distal CMAP {amplitude[i]:g} mV is not "
                f"{COMPARATORS[pre_comparator[i]]} {factor[i] * 100:g} % of LLN ({shown[i]:g} mV)"
            )
        # A published precondition not fulfilled: the item does not apply (not want of data).
        not_applicable.append((failed & ~no_response, reasons))
        blocks.append((unknown & ~no_response, PRECONDITION_UNKNOWN))
    # Excluded nerves get no row from the table lookup; the exclusion still cites the item's source.
    first = rows_of(table, item)[0]
    source = rows["source"].where(rows["source"].notna(), first.source)
    source_status = rows["status"].where(rows["status"].notna(), first.status)
    return rules.item_findings(
        frame,
        criteria=criteria,
        item=item,
        parameter="conduction block (amplitude fall from distal)",
        unit="%",
        value=value,
        threshold=threshold,
        comparator=rows["comparator"].to_numpy(dtype=object),
        limit=np.full(len(frame), np.nan),
        limit_name="fixed",
        source=source,
        source_status=source_status,
        segment=best["path"].to_numpy(dtype=object),
        blocked=blocks,
        inapplicable=not_applicable,
    )


def class_findings(
    nerves: pd.DataFrame, paths: pd.DataFrame, table: ThresholdTable, settings: Settings, *, criteria: str
) -> list[pd.DataFrame]:
    """Distal-CMAP items of the class rules and the "within normal limits" items, with their trace (one
    frame per item, each aligned with ``parameters.motor(nerves)``)."""
    frame = p.motor(nerves)
    amplitude = frame["distal_amplitude"].to_numpy(dtype=float)
    lln_amplitude = frame["lln_amplitude"].to_numpy(dtype=float)
    parts = []
    for item in (LOW_CMAP, VERY_LOW_CMAP, ONE_NERVE_FLOOR, "normal_dcmap"):
        parts.append(
            switched(
                frame,
                table,
                item,
                criteria=criteria,
                parameter="distal CMAP amplitude",
                unit="mV",
                value=amplitude,
                limit=lln_amplitude,
                settings=settings,
                block_no_response=False,
            )
        )
    column = cv_column(settings)
    parts.append(
        switched(
            frame,
            table,
            "normal_dml",
            criteria=criteria,
            parameter="distal latency",
            unit="ms",
            value=frame["distal_latency_ms"],
            limit=frame["uln_distal_latency_ms"],
            settings=settings,
        )
    )
    parts.append(
        switched(
            frame,
            table,
            "normal_cv",
            criteria=criteria,
            parameter="conduction velocity",
            unit="m/s",
            value=frame[column],
            limit=frame["lln_cv"],
            settings=settings,
            segment=frame[f"{column}_segment"],
        )
    )
    f_normal = switched(
        frame,
        table,
        "normal_f",
        criteria=criteria,
        parameter="F-wave latency",
        unit="ms",
        value=frame["f_latency_ms"],
        limit=frame["uln_f_latency_ms"],
        settings=settings,
    )
    # Absent F-waves are a finding here (not within normal limits), not missing data.
    absent = frame["f_absent"].to_numpy(dtype=bool) & (f_normal["reason"] == "value missing").to_numpy()
    f_normal.loc[absent, ["status", "reason"]] = [NOT_MET, "F-waves absent"]
    missing_f = (f_normal["reason"] == "value missing").to_numpy()
    f_normal.loc[missing_f, "reason"] = "F-waves not recorded"
    parts.append(f_normal)
    best = best_reduction(nerves, paths, settings)
    fall = best["amplitude_reduction_pct"].to_numpy(dtype=float)
    with np.errstate(invalid="ignore"):
        proximal = np.round(amplitude * (1.0 - fall / 100.0), 6)
    path = best["path"].to_numpy(dtype=object)
    no_path = (
        np.isnan(fall) & ~frame["no_response"].to_numpy(dtype=bool),
        f"{NO_PATH} ({settings.block_path.replace('_', ' ')})",
    )
    parts.append(
        switched(
            frame,
            table,
            "normal_pcmap",
            criteria=criteria,
            parameter="proximal CMAP amplitude (lowest eligible site)",
            unit="mV",
            value=proximal,
            limit=lln_amplitude,
            settings=settings,
            segment=path,
            blocked=[no_path],
        )
    )
    parts.append(
        switched(
            frame,
            table,
            "normal_ratio",
            criteria=criteria,
            parameter="conduction block (amplitude fall from distal)",
            unit="%",
            value=fall,
            limit=None,
            settings=settings,
            segment=path,
            blocked=[no_path],
        )
    )
    return parts


def no_response_reasons(parts: list[pd.DataFrame], nerves: pd.DataFrame) -> pd.DataFrame:
    """Concatenate per-item findings built over ``parameters.motor(nerves)`` (same rows, same order). The
    findings of an inexcitable nerve that could not be judged do not apply ("no recordable response"): an
    absent response is a finding, not want of data (the CIDP sets' contract, DESIGN.md §5)."""
    no_response = p.motor(nerves)["no_response"].to_numpy(dtype=bool)
    for part in parts:
        if len(part) != len(no_response):
            raise ValueError("findings part not aligned with the motor nerve tests")
    findings = rules.stack(parts)
    flag = np.tile(no_response, len(parts))
    status = findings["status"].to_numpy(dtype=object)
    reason = findings["reason"].to_numpy(dtype=object).copy()
    gap = flag & (status == NOT_EVALUABLE)
    reason[gap] = NO_RESPONSE
    reason[flag & ~gap & (reason == "")] = "no recordable response (amplitude 0)"
    status = status.copy()
    status[gap] = NOT_APPLICABLE
    findings["reason"] = pd.Series(reason, dtype=object, index=findings.index)
    findings["status"] = pd.Series(status, dtype=object, index=findings.index)
    return findings


def nerve_state(
    findings: pd.DataFrame, nerves: pd.DataFrame, settings: Settings, features: list[str]
) -> pd.DataFrame:
    """One row per visit and nerve identity (nerve and side, or nerve alone per the setting).

    ``findings`` as :func:`no_response_reasons` returns them: one block per item, each aligned with
    ``parameters.motor(nerves)``. Columns: ``absent``: no response at the distal site in every test of that
    identity; ``known``: distal amplitude recorded; ``very_low`` / ``low``: the very-low and axonal-range
    items met in every test; ``floor``: the one-nerve floor met in some test; ``normal``: every "within
    normal limits" item met in every test; ``item:<code>``: that demyelinating item met in some test;
    ``n_items``: how many distinct demyelinating items are met; ``present``: a response was recorded.
    """
    motor = p.motor(nerves)
    n = len(motor)
    base = pd.DataFrame(
        {
            "visit_key": motor["visit_key"].to_numpy(),
            "identity": pd.Series(rules.nerve_identity(motor, settings).to_numpy(), dtype=object),
            "absent": (motor["distal_amplitude"] == 0).to_numpy(),
            "known": motor["distal_amplitude"].notna().to_numpy(),
        }
    )
    grouped = base.groupby(["visit_key", "identity"], sort=True)
    state = grouped.agg(absent=("absent", "all"), known=("known", "all"))
    codes = grouped.ngroup().to_numpy()
    groups = len(state)
    met = _met_by_item(findings, n)

    def every(item: str) -> np.ndarray:
        if item not in met or groups == 0:
            return np.zeros(groups, dtype=bool)
        return np.bincount(codes, weights=~met[item], minlength=groups) == 0

    def some(item: str) -> np.ndarray:
        if item not in met or groups == 0:
            return np.zeros(groups, dtype=bool)
        return np.bincount(codes, weights=met[item], minlength=groups) > 0

    state["very_low"] = every(VERY_LOW_CMAP)
    state["low"] = every(LOW_CMAP)
    state["floor"] = some(ONE_NERVE_FLOOR)
    state["normal"] = np.logical_and.reduce([every(item) for item in NORMAL_ITEMS])
    for item in features:
        state[ITEM_PREFIX + item] = some(item)
    state["n_items"] = state[[ITEM_PREFIX + i for i in features]].sum(axis=1).astype(int)
    state["present"] = state["known"] & ~state["absent"]
    return state


def _met_by_item(findings: pd.DataFrame, n: int) -> dict[str, np.ndarray]:
    """item → met flags over the motor nerve tests, from findings built block by block (one item each)."""
    if n == 0:
        return {}
    if len(findings) % n:
        raise ValueError("findings are not aligned with the motor nerve tests")
    items = findings["item"].to_numpy(dtype=object)
    met = findings["status"].to_numpy(dtype=object) == MET
    result = {}
    for start in range(0, len(findings), n):
        block = items[start : start + n]
        if not (block == block[0]).all():
            raise ValueError("findings are not aligned with the motor nerve tests")
        result[block[0]] = met[start : start + n]
    return result


def per_visit(mask: pd.Series, keys: pd.Index) -> pd.Series:
    """Count of true rows per visit (0 for visits without rows)."""
    return rules.count_per_visit(mask, keys)


def _items_met(state: pd.DataFrame, items: list[str]) -> pd.Series:
    """Per nerve identity, how many of ``items`` are met."""
    return state[[ITEM_PREFIX + i for i in items]].sum(axis=1)


def nerves_with_any(state: pd.DataFrame, items: list[str], keys: pd.Index) -> pd.Series:
    """Number of nerves (identities) per visit with at least one of ``items`` met."""
    return per_visit(_items_met(state, items) >= 1, keys)


def one_nerve_rule(state: pd.DataFrame, items: list[str], keys: pd.Index) -> pd.Series:
    """≥ 2 of ``items`` in the only excitable nerve, every other nerve inexcitable, that nerve at or above the
    one-nerve floor. Decision: "all others inexcitable" needs at least one other nerve studied (a one-nerve
    study never qualifies), and every other nerve's distal response must be recorded as absent."""
    candidate = state["present"] & state["floor"] & (_items_met(state, items) >= 2)
    n = per_visit(pd.Series(True, index=state.index), keys)
    return (n >= 2) & (per_visit(candidate, keys) == 1) & (per_visit(state["absent"], keys) == n - 1)


def classify(
    findings: pd.DataFrame,
    state: pd.DataFrame,
    keys: pd.Index,
    table: ThresholdTable,
    demyelinating: dict[str, pd.Series],
    features: list[str],
) -> pd.DataFrame:
    """Outcome and decisive rule per visit. Order: demyelinating (``demyelinating`` rules, first that fires),
    inexcitable, axonal, normal, equivocal. The classes as defined are disjoint except inexcitable ⊂ the
    axonal amplitude pattern, which is why inexcitable is decided first."""
    n_nerves = per_visit(pd.Series(True, index=state.index), keys)
    n_absent = per_visit(state["absent"], keys)
    n_present = per_visit(state["present"], keys)
    total_items = state["n_items"].groupby(level="visit_key").sum().reindex(keys, fill_value=0)
    very_low = rule_text(table, VERY_LOW_CMAP)

    # Plain arrays over ``keys`` (setting a Series through a mask costs more than the rule).
    outcome = np.full(len(keys), "equivocal", dtype=object)
    rule = np.full(len(keys), "", dtype=object)
    decided = np.zeros(len(keys), dtype=bool)

    def assign(mask: pd.Series, name: str, text: str | pd.Series) -> None:
        fire = mask.reindex(keys, fill_value=False).to_numpy(dtype=bool) & ~decided
        outcome[fire] = name
        rule[fire] = text.reindex(keys).to_numpy(dtype=object)[fire] if isinstance(text, pd.Series) else text
        decided[fire] = True

    for text, mask in demyelinating.items():
        assign(mask, "demyelinating", text)

    enough = n_nerves >= MIN_NERVES
    n_present_very_low = per_visit(state["present"] & state["very_low"], keys)
    all_absent = enough & (n_absent == n_nerves)
    one_very_low = enough & (n_absent == n_nerves - 1) & (n_present == 1) & (n_present_very_low == 1)
    # Distal amplitudes not recorded in some nerve while every recorded one would fit the inexcitable class:
    # that class can be neither confirmed nor excluded, so neither axonal nor normal is given.
    n_unknown = n_nerves - n_absent - n_present
    undecidable = (
        enough & (n_unknown > 0) & ((n_present == 0) | ((n_present == 1) & (n_present_very_low == 1)))
    )
    decided[undecidable.to_numpy(dtype=bool)] = True
    assign(all_absent, "inexcitable", "distal CMAP absent in all nerves")
    assign(
        one_very_low,
        "inexcitable",
        f"distal CMAP absent in all nerves but one, whose distal CMAP is {very_low}",
    )

    low = rule_text(table, LOW_CMAP)
    two_low = per_visit(state["low"], keys) >= 2
    exception = (total_items == 1) & (per_visit((state["n_items"] == 1) & state["very_low"], keys) == 1)
    missing = _missing_feature_findings(findings, features)
    note = missing.reindex(keys, fill_value=0).map(
        lambda k: f"; {k} demyelinating finding(s) not evaluable for missing data" if k else ""
    )
    assign(
        two_low & (total_items == 0),
        "axonal",
        pd.Series(f"no demyelinating feature in any nerve and distal CMAP {low} in ≥ 2 nerves", index=keys)
        + note,
    )
    assign(
        two_low & exception,
        "axonal",
        pd.Series(
            f"one demyelinating feature, in one nerve whose distal CMAP is {very_low}, and distal CMAP {low} "
            "in ≥ 2 nerves",
            index=keys,
        )
        + note,
    )

    all_normal = per_visit(state["normal"], keys) == n_nerves
    assign(
        enough & all_normal & (total_items == 0), "normal", "all values within normal limits in all nerves"
    )

    abnormal, unevaluable = _normal_item_status(findings, keys)
    reasons = np.select(
        [
            n_nerves == 0,
            total_items > 0,
            n_nerves < MIN_NERVES,
            undecidable & (outcome == "equivocal"),
            abnormal,
            unevaluable,
        ],
        [
            "no motor nerve studied: the study cannot be classified",
            "demyelinating feature(s) found, but not in the combination the demyelinating class requires",
            f"fewer than {MIN_NERVES} motor nerves studied: too few to classify",
            "distal CMAP not recorded in every nerve: the inexcitable class can be neither confirmed nor "
            "excluded",
            "values outside normal limits that fit neither the demyelinating, axonal nor inexcitable pattern",
            "not all values could be evaluated: the study cannot be called normal",
        ],
        default="does not fit the demyelinating, axonal, inexcitable or normal pattern",
    )
    rest = outcome == "equivocal"
    rule[rest] = reasons[rest]
    return pd.DataFrame({"visit_key": keys, "outcome": outcome, "rule": rule})


def _missing_feature_findings(findings: pd.DataFrame, features: list[str]) -> pd.Series:
    # Plain arrays of the three columns needed (filtering the whole findings frame costs more).
    chosen = findings["item"].isin(features).to_numpy(dtype=bool) & (
        findings["status"].to_numpy(dtype=object) == NOT_EVALUABLE
    )
    reasons = findings["reason"].to_numpy(dtype=object)[chosen]
    # Few distinct reasons: each is tested once (text only; anything else is not a missing-data reason).
    missing = rules.per_distinct(
        lambda why: isinstance(why, str) and why.startswith(MISSING_DATA), reasons
    ).astype(int)
    return pd.Series(missing, index=findings["visit_key"].to_numpy()[chosen]).groupby(level=0).sum()


def _normal_item_status(findings: pd.DataFrame, keys: pd.Index) -> tuple[np.ndarray, np.ndarray]:
    chosen = findings["item"].isin(NORMAL_ITEMS).to_numpy(dtype=bool)
    status = findings["status"].to_numpy(dtype=object)[chosen]
    visit = findings["visit_key"].to_numpy()[chosen]
    abnormal = pd.Series(status == NOT_MET).groupby(visit).any().reindex(keys, fill_value=False)
    unevaluable = pd.Series(status == NOT_EVALUABLE).groupby(visit).any().reindex(keys, fill_value=False)
    return abnormal.to_numpy(dtype=bool), unevaluable.to_numpy(dtype=bool)
