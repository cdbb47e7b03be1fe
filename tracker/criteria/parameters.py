"""Per-nerve motor and sensory parameters shared by the criteria sets.

Each function returns the findings of one criteria item for every nerve test of the right modality. The
threshold comes from the set's table; the set decides how findings combine.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from tracker.criteria import memo, rules
from tracker.criteria.model import MET, NOT_MET, Settings
from tracker.criteria.thresholds import ThresholdTable

LIMIT_NAMES = {"uln": "ULN", "lln": "LLN"}
COMPARATOR_WORDS = {"ge": "at least", "gt": "above", "le": "at most", "lt": "below"}


def motor(nerves: pd.DataFrame) -> pd.DataFrame:
    """The motor nerve tests (computed once per evaluation, see :mod:`tracker.criteria.memo`)."""
    return memo.once("motor", (nerves,), lambda: nerves[nerves["modality"] == "motor"])


def sensory(nerves: pd.DataFrame) -> pd.DataFrame:
    """The sensory nerve tests (computed once per evaluation)."""
    return memo.once("sensory", (nerves,), lambda: nerves[nerves["modality"] == "sensory"])


def limit_provenance(frame: pd.DataFrame, column: str) -> dict[str, pd.Series]:
    """Keyword arguments naming where a nerve's normal limit came from, and the stratum (age, height,
    sex band) that was chosen for this patient (for the trace)."""
    source = frame[f"{column}_source"]
    stratum = frame[f"{column}_stratum"]
    with_stratum = rules.per_distinct(
        lambda s, st: s if not isinstance(s, str) else (f"{s} — stratum: {st}" if isinstance(st, str) else s),
        source,
        stratum,
        shared=True,
    )
    return {
        # object: letting pandas infer a string column here, only to turn it back into objects, cost more
        # than the rule itself
        "limit_source": pd.Series(with_stratum, index=frame.index, dtype=object),
        "limit_status": frame[f"{column}_status"],
    }


def _threshold(
    table: ThresholdTable, item: str, frame: pd.DataFrame, limit: np.ndarray | None
) -> tuple[pd.DataFrame, np.ndarray]:
    rows = table.per_nerve(item, frame["nerve"], frame.get("lff_hz"))
    factor = rows["value"].to_numpy(dtype=float)
    reference = rows["reference"].to_numpy(dtype=object)
    if limit is None:
        return rows, factor
    relative = memo.by_content(
        ("of_limit", tuple(LIMIT_NAMES)), (reference,), lambda: np.isin(reference, list(LIMIT_NAMES))
    )
    scaled = np.where(relative, factor * limit, factor)
    return rows, scaled


def _limit_name(rows: pd.DataFrame) -> np.ndarray:
    """``"110 % of ULN"`` (or ``"fixed"``) per row of a threshold lookup, built once per nerve."""
    return rules.per_code(
        lambda r, f: f"{f * 100:g} % of {LIMIT_NAMES.get(r, r)}" if r in LIMIT_NAMES else "fixed",
        rows["lookup"].to_numpy(),
        rows["reference"],
        rows["value"],
    )


NO_ROW = "the criterion gives no threshold for this nerve"
NO_RESPONSE_DISTAL = "no recordable response at the distal site"


def no_row(rows: pd.DataFrame) -> tuple[np.ndarray, str]:
    """Rows of a nerve the criterion has no threshold for: the item does not apply (not want of data)."""
    return np.isnan(rows["value"].to_numpy(dtype=float)), NO_ROW


def _excluded(frame: pd.DataFrame, table: ThresholdTable, item: str) -> tuple[np.ndarray, str]:
    excluded = {n for r in table.rows if r.item == item for n in r.excluded_nerves}
    mask = frame["nerve"].isin(excluded).to_numpy()
    return mask, f"{', '.join(sorted(excluded))} nerve excluded by this criterion" if excluded else ""


def distal_latency(
    nerves, table: ThresholdTable, item: str, settings: Settings, *, criteria: str
) -> pd.DataFrame:
    frame = motor(nerves)
    limit = frame["uln_distal_latency_ms"].to_numpy(dtype=float)
    rows, threshold = _threshold(table, item, frame, limit)
    wrist = (frame["nerve"] == "median").to_numpy() & frame["wrist_entrapment"].fillna(False).astype(
        bool
    ).to_numpy()
    return rules.item_findings(
        frame,
        criteria=criteria,
        item=item,
        parameter="distal latency",
        unit="ms",
        value=frame["distal_latency_ms"].to_numpy(dtype=float),
        threshold=threshold,
        comparator=rows["comparator"].to_numpy(dtype=object),
        limit=limit,
        limit_name=_limit_name(rows),
        source=rows["source"],
        source_status=rows["status"],
        **limit_provenance(frame, "uln_distal_latency_ms"),
        blocked=rules.common_blocks(frame, settings),
        inapplicable=[
            (wrist, "median distal latency not counted: neuropathy at the wrist judged by the clinician"),
            (frame["no_response"].to_numpy(dtype=bool), NO_RESPONSE_DISTAL),
            no_row(rows),
        ],
    )


def velocity(
    nerves,
    table: ThresholdTable,
    item: str,
    settings: Settings,
    *,
    criteria: str,
    requirement=None,
    comparator_item=None,
) -> pd.DataFrame:
    frame = motor(nerves)
    column = "cv_standard" if settings.cv_segments == "standard" else "cv_outside_entrapment"
    limit = frame["lln_cv"].to_numpy(dtype=float)
    rows, threshold = _threshold(table, item, frame, limit)
    return rules.item_findings(
        frame,
        criteria=criteria,
        item=item,
        parameter="conduction velocity",
        unit="m/s",
        value=frame[column].to_numpy(dtype=float),
        threshold=threshold,
        comparator=rows["comparator"].to_numpy(dtype=object),
        limit=limit,
        limit_name=_limit_name(rows),
        source=rows["source"],
        source_status=rows["status"],
        segment=frame[f"{column}_segment"].to_numpy(dtype=object),
        requirement=requirement,
        **limit_provenance(frame, "lln_cv"),
        blocked=rules.common_blocks(frame, settings),
        inapplicable=[(frame["no_response"].to_numpy(dtype=bool), "no recordable response"), no_row(rows)],
    )


def amplitude_switch(
    frame: pd.DataFrame, table: ThresholdTable, switch_item: str
) -> tuple[np.ndarray, np.ndarray]:
    """(switch applies, amplitude known): distal amplitude below the switch fraction of LLN."""
    lln = frame["lln_amplitude"].to_numpy(dtype=float)
    rows, threshold = _threshold(table, switch_item, frame, lln)
    amplitude = frame["distal_amplitude"].to_numpy(dtype=float)
    low = rules.compare(amplitude, threshold, rows["comparator"].to_numpy(dtype=object))
    known = ~np.isnan(amplitude) & ~np.isnan(threshold)
    return low, known


def f_latency(
    nerves,
    table: ThresholdTable,
    item: str,
    low_item: str,
    switch_item: str,
    settings: Settings,
    *,
    criteria: str,
) -> pd.DataFrame:
    """Minimal F latency against the ULN factor, or the larger factor when the distal CMAP is low."""
    frame = motor(nerves)
    limit = frame["uln_f_latency_ms"].to_numpy(dtype=float)
    normal_rows, normal_threshold = _threshold(table, item, frame, limit)
    low_rows, low_threshold = _threshold(table, low_item, frame, limit)
    low, known = amplitude_switch(frame, table, switch_item)
    threshold = np.where(low, low_threshold, normal_threshold)
    factor = np.where(low, low_rows["value"], normal_rows["value"])
    names = rules.per_distinct(
        lambda f, l: f"{f * 100:g} % of ULN" + (" (distal CMAP below the switch)" if l else ""), factor, low
    )
    absent = frame["f_absent"].to_numpy(dtype=bool)
    return rules.item_findings(
        frame,
        criteria=criteria,
        item=item,
        parameter="F-wave latency",
        unit="ms",
        value=frame["f_latency_ms"].to_numpy(dtype=float),
        threshold=threshold,
        comparator=normal_rows["comparator"].to_numpy(dtype=object),
        limit=limit,
        limit_name=names,
        source=normal_rows["source"],
        source_status=normal_rows["status"],
        **limit_provenance(frame, "uln_f_latency_ms"),
        blocked=rules.common_blocks(frame, settings)
        + [
            (
                ~known & ~absent & ~np.isnan(frame["f_latency_ms"].to_numpy(dtype=float)),
                "distal CMAP amplitude or its LLN missing: the F-wave threshold cannot be chosen",
            ),
        ],
        inapplicable=[(absent, "F-waves absent (judged by the absent-F item)"), no_row(normal_rows)],
    )


def f_absent(nerves, table: ThresholdTable, item: str, settings: Settings, *, criteria: str) -> pd.DataFrame:
    """Absent F-waves, counted only when the distal CMAP reaches the precondition fraction of LLN."""
    frame = motor(nerves)
    limit = frame["lln_amplitude"].to_numpy(dtype=float)
    rows, threshold = _threshold(table, item, frame, limit)
    absent = frame["f_absent"].to_numpy(dtype=bool)
    present = ~np.isnan(frame["f_latency_ms"].to_numpy(dtype=float))
    amplitude = frame["distal_amplitude"].to_numpy(dtype=float)
    precondition = rules.compare(amplitude, threshold, rows["comparator"].to_numpy(dtype=object))
    findings = rules.item_findings(
        frame,
        criteria=criteria,
        item=item,
        parameter="F-waves absent (distal CMAP)",
        unit="mV",
        value=amplitude,
        threshold=threshold,
        comparator=rows["comparator"].to_numpy(dtype=object),
        limit=limit,
        limit_name=_limit_name(rows),
        source=rows["source"],
        source_status=rows["status"],
        requirement=absent,
        **limit_provenance(frame, "lln_amplitude"),
        blocked=rules.common_blocks(frame, settings) + [(~absent & ~present, "F-waves not recorded")],
        inapplicable=[
            (frame["no_response"].to_numpy(dtype=bool), NO_RESPONSE_DISTAL),
            (
                absent & ~precondition & ~np.isnan(amplitude) & ~np.isnan(threshold),
                "amplitude precondition failed: distal CMAP below the required fraction of LLN",
            ),
            no_row(rows),
        ],
    )
    # Only where the item was judged (a cold limb excluded by the setting keeps its own reason).
    findings.loc[present & ~absent & (findings["status"] == "not_met").to_numpy(), "reason"] = (
        "F-waves present"
    )
    return findings


def best_path(nerves: pd.DataFrame, paths: pd.DataFrame, measure: str, eligible: pd.Series) -> pd.DataFrame:
    """Per motor nerve test, the eligible path (or segment) with the largest ``measure``."""
    candidates = paths[eligible & paths[measure].notna()]
    best = candidates.sort_values(["test_key", measure], ascending=[True, False]).drop_duplicates("test_key")
    return best.set_index("test_key").reindex(motor(nerves)["test_key"])


def eligible_paths(paths: pd.DataFrame, block_path: str, exclude_labels: tuple[str, ...] = ()) -> pd.Series:
    """Paths the block items may use under the ``block_path`` setting, without
    sites labelled ``exclude_labels``."""
    eligible = (
        paths["path_outside_entrapment"] if block_path == "outside_entrapment" else paths["path_standard"]
    )
    if exclude_labels:
        eligible = eligible & ~paths["label"].isin(exclude_labels)
    return eligible


def best_eligible_path(
    nerves: pd.DataFrame,
    paths: pd.DataFrame,
    measure: str,
    block_path: str,
    exclude_labels: tuple[str, ...] = (),
) -> pd.DataFrame:
    """:func:`best_path` over :func:`eligible_paths` (several sets ask for the same one: computed once)."""
    return memo.once(
        ("best_path", measure, block_path, tuple(exclude_labels)),
        (nerves, paths),
        lambda: best_path(nerves, paths, measure, eligible_paths(paths, block_path, exclude_labels)),
    )


def block(
    nerves,
    paths,
    table: ThresholdTable,
    item: str,
    precondition_item: str,
    settings: Settings,
    *,
    criteria: str,
    exclude_labels: tuple[str, ...] = (),
    measure: str = "amplitude_reduction_pct",
) -> pd.DataFrame:
    """Largest proximal-versus-distal reduction over the eligible paths, with the distal CMAP precondition."""
    frame = motor(nerves)
    best = best_eligible_path(nerves, paths, measure, settings.block_path, exclude_labels)
    rows, threshold = _threshold(table, item, frame, None)
    lln = frame["lln_amplitude"].to_numpy(dtype=float)
    pre_rows, pre_threshold = _threshold(table, precondition_item, frame, lln)
    amplitude = frame["distal_amplitude"].to_numpy(dtype=float)
    precondition = rules.compare(amplitude, pre_threshold, pre_rows["comparator"].to_numpy(dtype=object))
    excluded, why = _excluded(frame, table, item)
    value = best[measure].to_numpy(dtype=float)
    no_path = np.isnan(value)
    no_response = frame["no_response"].to_numpy(dtype=bool)
    fraction = pre_rows["value"].to_numpy(dtype=float)
    has_site = memo.once(
        ("eligible_site", settings.block_path, tuple(exclude_labels)),
        (nerves, paths),
        lambda: (
            frame["test_key"]
            .isin(paths.loc[eligible_paths(paths, settings.block_path, exclude_labels), "test_key"].unique())
            .to_numpy()
        ),
    )
    no_amplitude = np.isnan(amplitude) & ~no_response
    # Proximal sites recorded, but every path to them crosses an entrapment (or unlabelled) segment.
    any_path = frame["test_key"].isin(paths["test_key"].unique()).to_numpy()
    # The failed-precondition text is only read where that block applies: written there alone.
    failing = ~precondition & ~no_path & ~np.isnan(pre_threshold) & ~no_amplitude
    failed = np.empty(len(frame), dtype=object)
    failed[failing] = rules.per_distinct(
        lambda a, c, f: (
            f"amplitude precondition failed: distal CMAP {a:g} mV is not {COMPARATOR_WORDS.get(c, c)} "
            f"{f * 100:g} % of LLN"
        ),
        amplitude[failing],
        pre_rows["comparator"].to_numpy(dtype=object)[failing],
        fraction[failing],
    )
    return rules.item_findings(
        frame,
        criteria=criteria,
        item=item,
        parameter="conduction block (amplitude reduction)"
        if "amplitude" in measure
        else "conduction block (area reduction)",
        unit="%",
        value=value,
        threshold=threshold,
        comparator=rows["comparator"].to_numpy(dtype=object),
        limit=np.full(len(frame), np.nan),
        limit_name="",
        source=rows["source"],
        source_status=rows["status"],
        segment=best["path"].to_numpy(dtype=object),
        blocked=rules.common_blocks(frame, settings)
        + [
            (no_path & ~no_response & ~has_site & ~any_path, "no proximal stimulation recorded"),
            (no_path & ~no_response & has_site, "amplitude (or area) missing at a site"),
            (no_amplitude & ~no_path, "distal CMAP amplitude missing (needed for the precondition)"),
            (np.isnan(pre_threshold) & ~no_path, "no LLN for the distal CMAP precondition"),
        ],
        inapplicable=[
            (excluded, why),
            (no_response, NO_RESPONSE_DISTAL),
            (no_path & ~has_site & any_path, "no proximal stimulation outside entrapment sites"),
            (failing, failed),
            no_row(rows),
        ],
    )


def dispersion(
    nerves, paths, table: ThresholdTable, item: str, settings: Settings, *, criteria: str
) -> pd.DataFrame:
    """Largest proximal-versus-distal negative-peak duration increase over the eligible paths."""
    frame = motor(nerves)
    best = best_eligible_path(nerves, paths, "duration_increase_pct", settings.block_path)
    rows, threshold = _threshold(table, item, frame, None)
    value = best["duration_increase_pct"].to_numpy(dtype=float)
    return rules.item_findings(
        frame,
        criteria=criteria,
        item=item,
        parameter="temporal dispersion (duration increase)",
        unit="%",
        value=value,
        threshold=threshold,
        comparator=rows["comparator"].to_numpy(dtype=object),
        limit=np.full(len(frame), np.nan),
        limit_name="",
        source=rows["source"],
        source_status=rows["status"],
        segment=best["path"].to_numpy(dtype=object),
        blocked=rules.common_blocks(frame, settings),
        inapplicable=[
            (np.isnan(value) & frame["no_response"].to_numpy(dtype=bool), "no recordable response"),
            no_row(rows),
        ],
    )


def distal_duration(
    nerves, table: ThresholdTable, item: str, settings: Settings, *, criteria: str
) -> pd.DataFrame:
    """Distal CMAP duration against a fixed (nerve- and possibly filter-specific) cut-off.

    Where the table says at which low-frequency filter (Hz) a fixed cut-off was derived (``derived_lff_hz``)
    and the nerve test was recorded with another filter, or with none recorded, the finding is judged and its
    reason warns (the publication's reading: one set of cut-offs); with ``settings.duration_filter_strict`` it
    is not evaluable instead. The reason names the setting either way.
    """
    frame = motor(nerves)
    rows, threshold = _threshold(table, item, frame, None)
    derived, derived_status = _derived_filter(table, item, frame["nerve"])
    lff = frame["lff_hz"].to_numpy(dtype=float) if "lff_hz" in frame else np.full(len(frame), np.nan)
    judged_here = ~np.isnan(derived) & ~np.isnan(threshold)
    with np.errstate(invalid="ignore"):
        other_filter = judged_here & ~np.isnan(lff) & ~np.isclose(lff, derived)
    no_filter = judged_here & np.isnan(lff)
    mismatch = other_filter | no_filter
    strict = settings.duration_filter_strict
    words = rules.per_distinct(
        lambda hz, at, status: filter_warning(hz, at, status, strict), lff, derived, derived_status
    )
    findings = rules.item_findings(
        frame,
        criteria=criteria,
        item=item,
        parameter="distal CMAP duration",
        unit="ms",
        value=frame["distal_duration_ms"].to_numpy(dtype=float),
        threshold=threshold,
        comparator=rows["comparator"].to_numpy(dtype=object),
        limit=np.full(len(frame), np.nan),
        limit_name=np.where(np.isnan(threshold), "", "fixed cut-off"),
        source=rows["source"],
        source_status=rows["status"],
        blocked=rules.common_blocks(frame, settings) + ([(mismatch, words)] if strict else []),
        inapplicable=[(frame["no_response"].to_numpy(dtype=bool), NO_RESPONSE_DISTAL), no_row(rows)],
    )
    if not strict:
        # Judged findings only: a value or limb that is not usable keeps its own reason.
        judged = mismatch & np.isin(findings["status"].to_numpy(dtype=object), [MET, NOT_MET])
        if judged.any():
            reason = findings["reason"].to_numpy(dtype=object).copy()
            reason[judged] = words[judged]
            findings["reason"] = pd.Series(reason, index=findings.index, dtype=object)
    return findings


FILTER_SETTING = "duration_filter_strict"


def filter_warning(lff_hz: float, derived_hz: float, status: str, strict: bool) -> str:
    """What the trace says when a duration cut-off derived at ``derived_hz`` (Hz) meets a recording made with
    a ``lff_hz`` (Hz) low-frequency filter (NaN: not recorded)."""
    if np.isnan(derived_hz):
        return ""
    derived = f"{derived_hz:g} Hz" + (" (from memory, not verified)" if status == "memory" else "")
    if np.isnan(lff_hz):
        recorded = "low-frequency filter not recorded"
    else:
        recorded = f"recorded with a {lff_hz:g} Hz low-frequency filter"
    if strict:
        return (
            f"{recorded}; the cut-off was derived at {derived}: not evaluable (setting {FILTER_SETTING} on)"
        )
    return (
        f"warning: {recorded}, the cut-off was derived at {derived}; judged as published, one set of "
        f"cut-offs (setting {FILTER_SETTING} off)"
    )


def _derived_filter(table: ThresholdTable, item: str, nerves: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Per nerve test, the filter (Hz) the item's fixed cut-off was derived at (NaN where not stated) and
    whether that filter is verified or from memory."""
    rows = [r for r in table.rows if r.item == item and r.lff_hz is None]
    at = {r.nerve: (r.derived_lff_hz, r.derived_lff_status) for r in rows if r.derived_lff_hz is not None}
    generic = at.get("*", (np.nan, ""))
    # Looked up once per distinct nerve name, not once per row.
    found = rules.per_distinct(
        lambda name: at.get(name, generic) if isinstance(name, str) else generic, nerves
    )
    derived = np.array([f[0] for f in found], dtype=float)
    status = np.empty(len(found), dtype=object)
    status[:] = [f[1] for f in found]
    return derived, status
