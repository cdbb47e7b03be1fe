"""EAN/PNS 2021 CIDP criteria: motor conduction (strongly / weakly supportive of demyelination), sensory
conduction, and the electrodiagnostic outcome for the visit's phenotype (typical CIDP or one of the four
variants). Van den Bergh PYK, van Doorn PA, Hadden RDM, et al. Eur J Neurol 2021;28:3556–3583,
doi:10.1111/ene.14959.

Every threshold is in ``tables/ean-pns-2021-cidp.csv``; all of them are from memory (not verified against
the guideline's tables). This module holds the comparisons that need more than one table row and the
combination rules. Clinical decision support only: the outcome is the electrodiagnostic part of the
criteria for the phenotype the clinician recorded; clinical and supportive criteria (CSF, imaging,
treatment response, biopsy) are not in the data, so "possible CIDP" is never upgraded here.

Choices where the text is open or unverified (each one is a decision for the project's decisions table):

- a sensory nerve (median, ulnar, radial, sural, superficial fibular) is *abnormal* when its SNAP amplitude
  is below LLN, its conduction velocity (from the onset latency) is below LLN, or its peak latency is above
  ULN (peak, because the shipped limits are peak latencies); *normal* when none is met and the amplitude plus
  at least one latency measure were judged; otherwise not evaluable. An absent SNAP is abnormal. The median
  nerve is not counted when the clinician judged a neuropathy at the wrist;
- "weakly supportive" is any motor parameter met in any nerve without a strongly supportive combination;
- (d) needs the further parameter in a nerve other than the two with absent F-waves;
- (e) block from Erb's point needs ≥ 50 % (item ``cb_erb``) and counts as block;
- (g) needs a different parameter in the other nerve (duration in two nerves alone is weakly supportive);
  absent F-waves in one eligible nerve count as that parameter (only (e) excludes them);
- distal CIDP is judged as typical CIDP (the unverified "two upper-limb nerves" requirement is not applied);
  multifocal and focal CIDP need sensory conduction abnormal in ≥ ``MULTIFOCAL_ABNORMAL_SENSORY_NERVES``
  nerve; motor CIDP needs sensory conduction normal in ≥ ``MOTOR_CIDP_NORMAL_SENSORY_NERVES`` evaluable
  nerve with none abnormal; sensory CIDP (median, ulnar, radial, sural) needs normal motor conduction in at
  least one judged motor nerve, and with motor parameters met it is not met (the rule text points to
  sensory-predominant CIDP). Sensory CIDP items are reported only for visits of the sensory phenotype.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from tracker.criteria import parameters as p
from tracker.criteria import rules
from tracker.criteria.model import FINDING_COLUMNS, MET, NOT_EVALUABLE, NOT_MET, SetResult, Settings
from tracker.criteria.thresholds import ThresholdTable, load

ID = "ean-pns-2021-cidp"
DEMYELINATING = ["dml", "cv", "f_latency", "f_absent", "cb", "td", "dcmap_duration"]  # items (a)–(g)
LETTERS = {
    "dml": "(a)",
    "cv": "(b)",
    "f_latency": "(c)",
    "f_absent": "(d)",
    "cb": "(e)",
    "td": "(f)",
    "dcmap_duration": "(g)",
}
SENSORY_NERVES = ("median", "ulnar", "radial", "sural", "superficial_fibular")
SENSORY_ITEMS = ("snap_amplitude", "sensory_cv", "sensory_peak_latency")
SENSORY_CIDP_NERVES = ("median", "ulnar", "radial", "sural")
PHENOTYPES = ("typical", "distal", "multifocal", "focal", "motor", "sensory")
# Motor CIDP: how many evaluable sensory nerves must be normal (the guideline's number is not verified).
MOTOR_CIDP_NORMAL_SENSORY_NERVES = 1
# Multifocal / focal CIDP: how many sensory nerves must be abnormal (decision; not verified).
MULTIFOCAL_ABNORMAL_SENSORY_NERVES = 1
WRIST = "median not counted: neuropathy at the wrist judged by the clinician"


# ---------------------------------------------------------------- per-nerve findings: motor


def motor_findings(nerves: pd.DataFrame, paths: pd.DataFrame, settings: Settings) -> pd.DataFrame:
    return rules.stack(_motor_parts(nerves, paths, settings))


def _motor_parts(nerves: pd.DataFrame, paths: pd.DataFrame, settings: Settings) -> list[pd.DataFrame]:
    table = load(ID)
    return [
        p.distal_latency(nerves, table, "dml", settings, criteria=ID),
        p.velocity(nerves, table, "cv", settings, criteria=ID),
        p.f_latency(nerves, table, "f_latency", "f_latency_low_cmap", "f_switch", settings, criteria=ID),
        p.f_absent(nerves, table, "f_absent", settings, criteria=ID),
        # Block at 30 % everywhere except from Erb's point, where the cb_erb item asks for 50 %.
        p.block(
            nerves, paths, table, "cb", "cb_precondition", settings, criteria=ID, exclude_labels=("erb",)
        ),
        erb_block(nerves, paths, table, settings),
        p.dispersion(nerves, paths, table, "td", settings, criteria=ID),
        distal_duration(nerves, table, settings),
    ]


def erb_block(
    nerves: pd.DataFrame, paths: pd.DataFrame, table: ThresholdTable, settings: Settings
) -> pd.DataFrame:
    """Block from the distal site to Erb's point (≥ 50 %), only for nerve tests stimulated at Erb's point."""
    erb_paths = paths[paths["label"] == "erb"]
    findings = p.block(nerves, erb_paths, table, "cb_erb", "cb_precondition", settings, criteria=ID)
    stimulated = p.motor(nerves)["test_key"].isin(erb_paths["test_key"]).to_numpy()
    findings = findings[stimulated].copy()
    reason = (
        findings["reason"]
        .astype(object)
        .replace(
            "no proximal stimulation outside entrapment sites",
            "the path to Erb's point crosses an entrapment or unlabelled segment (or the block-path setting "
            "is 'standard')",
        )
    )
    # keep the column's kind (text columns of findings may be categorical)
    findings["reason"] = (
        pd.Categorical(reason) if isinstance(findings["reason"].dtype, pd.CategoricalDtype) else reason
    )
    return findings


def distal_duration(nerves: pd.DataFrame, table: ThresholdTable, settings: Settings) -> pd.DataFrame:
    """(g) distal CMAP duration against the cut-off of the nerve test's low-frequency filter setting."""
    frame = p.motor(nerves)
    rows = table.per_nerve("dcmap_duration", frame["nerve"], frame["lff_hz"])
    threshold = rows["value"].to_numpy(dtype=float)
    lff = frame["lff_hz"].to_numpy(dtype=float)
    duration_rows = [r for r in table.rows if r.item == "dcmap_duration"]
    covered = {r.nerve for r in duration_rows}
    filters = ", ".join(f"{hz:g}" for hz in sorted({r.lff_hz for r in duration_rows if r.lff_hz is not None}))
    in_table = frame["nerve"].isin(covered).to_numpy()
    no_filter = in_table & np.isnan(lff)
    other_filter = in_table & ~np.isnan(lff) & np.isnan(threshold)
    # per-row texts built from the few distinct filter settings (a cohort has millions of rows)
    lff_text = np.full(len(lff), "", dtype=object)
    for hz in np.unique(lff[~np.isnan(lff)]):
        lff_text[lff == hz] = f"{hz:g}"
    other_reason = rules.per_distinct(
        lambda text: f"no cut-off for a {text} Hz low-frequency filter (this set has {filters} Hz)", lff_text
    )
    comparator = rows["comparator"].fillna("gt").to_numpy(dtype=object)
    names = rules.per_distinct(
        lambda missing, text: "" if missing else f"cut-off for LFF {text} Hz", np.isnan(threshold), lff_text
    )
    return rules.item_findings(
        frame,
        criteria=ID,
        item="dcmap_duration",
        parameter="distal CMAP duration",
        unit="ms",
        value=frame["distal_duration_ms"].to_numpy(dtype=float),
        threshold=threshold,
        comparator=comparator,
        limit=np.full(len(frame), np.nan),
        limit_name=names,
        source=rows["source"],
        source_status=rows["status"],
        blocked=rules.common_blocks(frame, settings)
        + [
            (
                no_filter,
                f"low-frequency filter setting not recorded: the cut-off depends on it ({filters} Hz)",
            )
        ],
        inapplicable=[
            (frame["no_response"].to_numpy(dtype=bool), "no recordable response"),
            (~in_table, "no distal CMAP duration cut-off for this nerve"),
            (other_filter, other_reason),
        ],
    )


# ---------------------------------------------------------------- per-nerve findings: sensory


def _scaled(
    table: ThresholdTable, item: str, frame: pd.DataFrame, limit: np.ndarray
) -> tuple[pd.DataFrame, np.ndarray]:
    rows = table.per_nerve(item, frame["nerve"])
    return rows, rows["value"].to_numpy(dtype=float) * limit


def _wrist(frame: pd.DataFrame) -> np.ndarray:
    # object first: the column may arrive as a categorical (or all empty), where fillna(False) is refused
    flag = frame["wrist_entrapment"].astype(object).fillna(False).astype(bool).to_numpy()
    return (frame["nerve"] == "median").to_numpy() & flag


def sensory_findings(nerves: pd.DataFrame, settings: Settings) -> pd.DataFrame:
    """Sensory conduction: SNAP amplitude < LLN, conduction velocity < LLN, peak latency > ULN."""
    return rules.stack(_sensory_parts(nerves, settings))


def _sensory_parts(nerves: pd.DataFrame, settings: Settings) -> list[pd.DataFrame]:
    table = load(ID)
    frame = p.sensory(nerves)
    frame = frame[frame["nerve"].isin(SENSORY_NERVES)]
    no_response = frame["no_response"].to_numpy(dtype=bool)
    base = rules.common_blocks(frame, settings)
    parts = []
    for item, parameter, unit, value, limit_column, limit_label in (
        ("snap_amplitude", "SNAP amplitude", "µV", "distal_amplitude", "lln_amplitude", "LLN"),
        ("sensory_cv", "sensory conduction velocity", "m/s", "sensory_cv", "lln_cv", "LLN"),
        (
            "sensory_peak_latency",
            "sensory peak latency",
            "ms",
            "peak_latency_ms",
            "uln_peak_latency_ms",
            "ULN",
        ),
    ):
        limit = frame[limit_column].to_numpy(dtype=float)
        rows, threshold = _scaled(table, item, frame, limit)
        # An absent SNAP is a finding for the amplitude (0 < LLN); latency and velocity cannot be measured.
        inapplicable = [(_wrist(frame), WRIST)] + (
            []
            if item == "snap_amplitude"
            else [(no_response, "no recordable SNAP (judged by the amplitude item)")]
        )
        parts.append(
            rules.item_findings(
                frame,
                criteria=ID,
                item=item,
                parameter=parameter,
                unit=unit,
                value=frame[value].to_numpy(dtype=float),
                threshold=threshold,
                comparator=rows["comparator"]
                .fillna("lt" if limit_label == "LLN" else "gt")
                .to_numpy(dtype=object),
                limit=limit,
                limit_name=limit_label,
                source=rows["source"],
                source_status=rows["status"],
                **p.limit_provenance(frame, limit_column),
                blocked=base,
                inapplicable=inapplicable,
            )
        )
    return parts


def sensory_cidp_findings(nerves: pd.DataFrame, settings: Settings) -> pd.DataFrame:
    """Sensory CIDP: velocity < 80 % LLN (< 70 % if SNAP < 80 % LLN); sural sparing (median/radial SNAP
    below LLN with a sural SNAP at or above LLN)."""
    return rules.stack(_sensory_cidp_parts(nerves, settings))


def _sensory_cidp_parts(nerves: pd.DataFrame, settings: Settings) -> list[pd.DataFrame]:
    table = load(ID)
    frame = p.sensory(nerves)
    frame = frame[frame["nerve"].isin(SENSORY_CIDP_NERVES)]
    no_response = frame["no_response"].to_numpy(dtype=bool)
    wrist = _wrist(frame)
    lln_cv = frame["lln_cv"].to_numpy(dtype=float)
    normal_rows, normal_threshold = _scaled(table, "sensory_cidp_cv", frame, lln_cv)
    low_rows, low_threshold = _scaled(table, "sensory_cidp_cv_low_snap", frame, lln_cv)
    low, known = p.amplitude_switch(frame, table, "sensory_cidp_switch")
    factor = np.where(low, low_rows["value"], normal_rows["value"])
    names = rules.per_distinct(
        lambda f, l: f"{f * 100:g} % of LLN" + (" (SNAP below 80 % of LLN)" if l else ""),
        np.asarray(factor, dtype=float),
        np.asarray(low, dtype=bool),
    )
    cv = rules.item_findings(
        frame,
        criteria=ID,
        item="sensory_cidp_cv",
        parameter="sensory conduction velocity",
        unit="m/s",
        value=frame["sensory_cv"].to_numpy(dtype=float),
        threshold=np.where(low, low_threshold, normal_threshold),
        comparator="lt",
        limit=lln_cv,
        limit_name=names,
        source=normal_rows["source"],
        source_status=normal_rows["status"],
        **p.limit_provenance(frame, "lln_cv"),
        blocked=rules.common_blocks(frame, settings)
        + [(~known & ~no_response, "SNAP amplitude or its LLN missing: the threshold cannot be chosen")],
        inapplicable=[(wrist, WRIST), (no_response, "no recordable SNAP")],
    )
    # Sural sparing: the median/radial rows ask "below LLN", the sural row asks "at or above LLN".
    sparing = table.one("sural_sparing")
    parts = [cv]
    for item, names, comparator in (
        ("sural_sparing_reduced", ("median", "radial"), sparing.comparator),
        ("sural_sparing_sural_normal", ("sural",), "ge"),
    ):
        pattern = frame[frame["nerve"].isin(names)]
        lln = pattern["lln_amplitude"].to_numpy(dtype=float)
        parts.append(
            rules.item_findings(
                pattern,
                criteria=ID,
                item=item,
                parameter="SNAP amplitude (sural-sparing pattern)",
                unit="µV",
                value=pattern["distal_amplitude"].to_numpy(dtype=float),
                threshold=sparing.value * lln,
                comparator=comparator,
                limit=lln,
                limit_name="LLN",
                source=sparing.source,
                source_status=sparing.status,
                **p.limit_provenance(pattern, "lln_amplitude"),
                blocked=rules.common_blocks(pattern, settings),
                inapplicable=[(_wrist(pattern), WRIST)],
            )
        )
    return parts


# ---------------------------------------------------------------- combination (vectorised over visits)


NERVE_TABLE_COLUMNS = ["visit_key", "nerve", "side", "item", "status"]


def _nerve_table(
    findings: pd.DataFrame, settings: Settings, keys: pd.Index, status: str | None = MET
) -> pd.DataFrame:
    """Boolean table indexed by (visit_key, nerve identity), one column per item: the item has ``status``
    there (any judged status — met or not met — when ``status`` is None)."""
    statuses = findings["status"].to_numpy(dtype=object)
    # Only the columns the table needs: taking every column of the findings costs more than the rule.
    chosen = findings.loc[
        statuses == status if status else (statuses == MET) | (statuses == NOT_MET), NERVE_TABLE_COLUMNS
    ]
    if chosen.empty:
        return pd.DataFrame(index=pd.MultiIndex.from_arrays([[], []], names=["visit_key", "identity"]))
    rows = pd.DataFrame(
        {
            "visit_key": chosen["visit_key"].to_numpy(),
            # plain objects, as the findings hold them (inferring a string column costs more than the rule)
            "identity": pd.Series(rules.nerve_identity(chosen, settings).to_numpy(), dtype=object),
            "item": pd.Series(chosen["item"].to_numpy(dtype=object), dtype=object),
        }
    )
    table = rows.groupby(["visit_key", "identity", "item"]).size().unstack("item", fill_value=0) > 0
    table.columns.name = None
    return table[table.index.get_level_values("visit_key").isin(keys)]


def _column(table: pd.DataFrame, *items: str) -> pd.Series:
    """Per nerve: any of ``items`` (False where no such column)."""
    present = [i for i in items if i in table]
    return table[present].any(axis=1) if present else pd.Series(False, index=table.index)


def _count(mask: pd.Series, keys: pd.Index) -> pd.Series:
    """Per visit: number of nerves where ``mask`` holds."""
    return rules.count_per_visit(mask, keys)


def _one_plus_other(first: pd.Series, other: pd.Series, keys: pd.Index) -> pd.Series:
    """Per visit: ``first`` in some nerve and ``other`` in a different nerve. With A and B the nerves where
    each holds, a pair a ≠ b exists unless A and B are one and the same single nerve."""
    n_a, n_b, n_ab = _count(first, keys), _count(other, keys), _count(first & other, keys)
    return (n_a >= 1) & (n_b >= 1) & ~((n_a == 1) & (n_b == 1) & (n_ab == 1))


STRONG_RULES = [
    "(a) distal motor latency in ≥ 2 nerves",
    "(b) motor conduction velocity in ≥ 2 nerves",
    "(c) F-wave latency in ≥ 2 nerves",
    "(d) absent F-waves in ≥ 2 nerves plus another parameter in a further nerve",
    "(e) conduction block in ≥ 2 nerves",
    "(e) conduction block in 1 nerve plus another parameter (other than absent F-waves) in another nerve",
    "(f) temporal dispersion in ≥ 2 nerves",
    "(g) distal CMAP duration in 1 nerve plus another parameter in another nerve",
]


def motor_levels(met: pd.DataFrame, keys: pd.Index) -> tuple[pd.Series, pd.Series]:
    """(motor key, rule) per visit from the per-nerve table of met items."""
    item = {i: _column(met, i) for i in DEMYELINATING}
    item["cb"] = _column(met, "cb", "cb_erb")  # block from Erb's point counts as block

    def others(*excluded: str) -> pd.Series:
        return (
            pd.concat([item[i] for i in DEMYELINATING if i not in excluded], axis=1).any(axis=1)
            if len(met)
            else pd.Series(False, index=met.index)
        )

    n = {i: _count(item[i], keys) for i in DEMYELINATING}
    other_than_f = others("f_absent")
    # (d): two absent-F nerves other than the nerve with the further parameter. That nerve y may itself
    # have absent F-waves, so either y lacks them and 2 absent-F nerves suffice, or 3 are needed.
    d = ((n["f_absent"] >= 2) & (_count(other_than_f & ~item["f_absent"], keys) >= 1)) | (
        (n["f_absent"] >= 3) & (_count(other_than_f, keys) >= 1)
    )
    conditions = [
        n["dml"] >= 2,
        n["cv"] >= 2,
        n["f_latency"] >= 2,
        d,
        n["cb"] >= 2,
        _one_plus_other(item["cb"], others("cb", "f_absent"), keys),
        n["td"] >= 2,
        _one_plus_other(item["dcmap_duration"], others("dcmap_duration"), keys),
    ]
    strong_rule = pd.Series(
        np.select([c.to_numpy() for c in conditions], STRONG_RULES, default=""), index=keys
    )
    nerves_any = _count(others(), keys)
    listed = pd.Series("", index=keys, dtype=object)
    for i in DEMYELINATING:
        listed = listed + np.where(n[i] > 0, f"{LETTERS[i]} {i}, ", "")
    listed = listed.str.rstrip(", ")
    weak_rule = np.where(
        nerves_any == 1,
        listed + " met in one nerve only",
        listed + " met in " + nerves_any.astype(str) + " nerves, but in no strongly supportive combination",
    )
    level = np.select(
        [strong_rule != "", nerves_any >= 1], ["strongly_supportive", "weakly_supportive"], default=NOT_MET
    )
    rule = np.select(
        [strong_rule != "", nerves_any >= 1],
        [strong_rule, weak_rule],
        default="no motor demyelinating parameter met",
    )
    return pd.Series(level, index=keys), pd.Series(rule, index=keys)


def sensory_category(abnormal: int, normal: int) -> str:
    if abnormal >= 2:
        return "abnormal_2_nerves"
    if abnormal == 1:
        return "abnormal_1_nerve"
    return "normal" if normal >= 1 else NOT_EVALUABLE


def sensory_counts(findings: pd.DataFrame, settings: Settings, keys: pd.Index) -> tuple[pd.Series, pd.Series]:
    """(abnormal nerves, normal nerves) per visit. A nerve is abnormal when any item is met; normal when none
    is met and the amplitude plus at least one latency measure (velocity or peak latency) were judged."""
    met = _nerve_table(findings, settings, keys, MET)
    judged_not_met = _nerve_table(
        findings.loc[findings["status"].to_numpy(dtype=object) == NOT_MET, NERVE_TABLE_COLUMNS],
        settings,
        keys,
        None,
    )
    abnormal = _column(met, *SENSORY_ITEMS)
    judged = _column(judged_not_met, "snap_amplitude") & _column(
        judged_not_met, "sensory_cv", "sensory_peak_latency"
    )
    normal = judged & ~abnormal.reindex(judged.index, fill_value=False)
    return _count(abnormal, keys), _count(normal, keys)


def sensory_cidp(findings: pd.DataFrame, settings: Settings, keys: pd.Index) -> tuple[pd.Series, pd.Series]:
    """(met, text) per visit of the sensory CIDP conduction criteria."""
    met = _nerve_table(findings, settings, keys, MET)
    slow = _count(_column(met, "sensory_cidp_cv"), keys)
    sparing = (_count(_column(met, "sural_sparing_reduced"), keys) >= 1) & (
        _count(_column(met, "sural_sparing_sural_normal"), keys) >= 1
    )
    judged = (
        _count(
            _column(_nerve_table(findings, settings, keys, None), *findings["item"].astype(str).unique()),
            keys,
        )
        >= 1
    )
    hit = (slow >= 2) | sparing
    text = np.select(
        [slow >= 2, sparing, ~judged],
        [
            "sensory conduction velocity below 80 % (70 %) of LLN in " + slow.astype(str) + " nerves",
            "sural-sparing pattern (median or radial SNAP below LLN, sural SNAP normal)",
            "sensory CIDP conduction criteria not evaluable (no sensory finding could be judged)",
        ],
        default="sensory CIDP conduction criteria not met (slowing in "
        + slow.astype(str)
        + " nerve(s), ≥ 2 needed; no sural-sparing pattern)",
    )
    return hit, pd.Series(text, index=keys)


def _phenotypes(visits: pd.DataFrame, keys: pd.Index) -> pd.Series:
    raw = visits.drop_duplicates("visit_key").set_index("visit_key").get("phenotype")
    if raw is None:
        return pd.Series("typical", index=keys, dtype=object)
    raw = raw.reindex(keys).astype(object)
    return raw.map(
        lambda v: (
            "typical"
            if v is None or (isinstance(v, float) and np.isnan(v)) or not str(v).strip()
            else str(v).strip().lower()
        )
    )


def _unrecorded(visits: pd.DataFrame, keys: pd.Index) -> np.ndarray:
    """Per visit: no phenotype recorded (judged as typical)."""
    raw = visits.drop_duplicates("visit_key").set_index("visit_key").get("phenotype")
    if raw is None:
        return np.ones(len(keys), dtype=bool)
    return (
        raw.reindex(keys)
        .astype(object)
        .map(lambda v: v is None or (isinstance(v, float) and np.isnan(v)) or not str(v).strip())
        .to_numpy(dtype=bool)
    )


def _motor_text(level: str, motor_rule: str, motor_judged: bool) -> str:
    if level != NOT_MET:
        return f"motor {level.replace('_', ' ')} ({motor_rule})"
    return (
        "motor conduction not evaluable (no motor finding could be judged)"
        if not motor_judged
        else "no motor demyelinating parameter met"
    )


def decide(
    phenotype: str,
    level: str,
    motor_rule: str,
    motor_judged: bool,
    abnormal: int,
    normal: int,
    sensory_cidp_met: bool,
    sensory_cidp_text: str,
) -> tuple[str, str]:
    """(outcome, rule) for one visit: the phenotype's combination of the motor and sensory results."""
    category = sensory_category(abnormal, normal)
    motor_text = _motor_text(level, motor_rule, motor_judged)
    if phenotype not in PHENOTYPES:
        return NOT_MET, f"phenotype {phenotype!r} is not one of {', '.join(PHENOTYPES)}"
    if phenotype in ("typical", "distal"):
        label = (
            "typical"
            if phenotype == "typical"
            else "distal (judged as typical; the upper-limb-nerve requirement is not applied, unverified)"
        )
        if level == NOT_MET:
            return NOT_MET, f"{label}: {motor_text}"
        if category == "abnormal_2_nerves":
            outcome = "cidp" if level == "strongly_supportive" else "possible_cidp"
            return outcome, f"{label}: {motor_text} + sensory conduction abnormal in ≥ 2 nerves"
        detail = (
            "not evaluable"
            if category == NOT_EVALUABLE
            else f"abnormal in {abnormal} nerve{'s' if abnormal != 1 else ''}"
        )
        return NOT_MET, f"{label}: {motor_text}, but sensory conduction {detail} (≥ 2 abnormal nerves needed)"
    if phenotype in ("multifocal", "focal"):
        if level == NOT_MET:
            return NOT_MET, f"{phenotype}: {motor_text}"
        if abnormal < MULTIFOCAL_ABNORMAL_SENSORY_NERVES:
            detail = "not evaluable" if category == NOT_EVALUABLE else "normal"
            return (
                NOT_MET,
                f"{phenotype}: {motor_text}, but sensory conduction {detail} (abnormal in ≥ "
                f"{MULTIFOCAL_ABNORMAL_SENSORY_NERVES} nerve needed)",
            )
        if phenotype == "multifocal" and level == "strongly_supportive":
            return "cidp", f"multifocal: {motor_text} + sensory conduction abnormal in {abnormal} nerve(s)"
        cap = " (focal: at most possible CIDP)" if phenotype == "focal" else ""
        return (
            "possible_cidp",
            f"{phenotype}: {motor_text} + sensory conduction abnormal in {abnormal} nerve(s){cap}",
        )
    if phenotype == "motor":
        if level == NOT_MET:
            return NOT_MET, f"motor: {motor_text}"
        if abnormal == 0 and normal >= MOTOR_CIDP_NORMAL_SENSORY_NERVES:
            outcome = "cidp" if level == "strongly_supportive" else "possible_cidp"
            return (
                outcome,
                f"motor: {motor_text} + sensory conduction normal ({normal} evaluable "
                f"nerve{'s' if normal != 1 else ''})",
            )
        detail = (
            "not evaluable, so normal sensory conduction cannot be shown"
            if category == NOT_EVALUABLE
            else f"abnormal in {abnormal} nerve(s); motor CIDP needs normal sensory conduction"
        )
        return NOT_MET, f"motor: {motor_text}, but sensory conduction {detail}"
    # sensory CIDP: sensory criteria with normal motor conduction; never "cidp" from conduction alone.
    if level != NOT_MET:
        return NOT_MET, (
            f"sensory: {motor_text} — sensory CIDP needs normal motor conduction; with motor parameters met "
            "consider sensory-predominant CIDP (judge against the typical or distal phenotype)"
        )
    if not motor_judged:
        return NOT_MET, "sensory: motor conduction not evaluable, so normal motor conduction cannot be shown"
    if sensory_cidp_met:
        return (
            "possible_cidp",
            f"sensory: {sensory_cidp_text} with normal motor conduction (CIDP needs supportive criteria not "
            "held in the data)",
        )
    return NOT_MET, f"sensory: {sensory_cidp_text}"


RANKS = {NOT_MET: 0, "possible_cidp": 1, "cidp": 2}


def combine(
    motor: pd.DataFrame,
    sensory: pd.DataFrame,
    cidp_sensory: pd.DataFrame,
    phenotypes: pd.Series,
    keys: pd.Index,
    settings: Settings,
) -> tuple[pd.Series, pd.Series, pd.Series, pd.Series, pd.Series]:
    """(outcome, rule, motor level, abnormal sensory nerves, normal sensory nerves) per visit."""
    level, motor_rule = motor_levels(_nerve_table(motor, settings, keys, MET), keys)
    motor_judged = keys.isin(
        motor.loc[np.isin(motor["status"].to_numpy(dtype=object), [MET, NOT_MET]), "visit_key"].unique()
    )
    abnormal, normal = sensory_counts(sensory, settings, keys)
    cidp_met, cidp_text = sensory_cidp(cidp_sensory, settings, keys)
    # Visits share few combinations of these inputs: each combination is decided once.
    decided = rules.per_distinct(
        decide, phenotypes, level, motor_rule, motor_judged, abnormal, normal, cidp_met, cidp_text
    )
    outcome = pd.Series([d[0] for d in decided], index=keys, dtype=object)
    rule = pd.Series([d[1] for d in decided], index=keys, dtype=object)
    return outcome, rule, level, abnormal, normal


def evaluate(
    nerves: pd.DataFrame, paths: pd.DataFrame, visits: pd.DataFrame, settings: Settings
) -> SetResult:
    keys = pd.Index(visits["visit_key"].unique(), name="visit_key")
    phenotypes = _phenotypes(visits, keys)
    # Stacked once: the motor, sensory and sensory-CIDP findings are views of the set's findings.
    groups = [
        _motor_parts(nerves, paths, settings),
        _sensory_parts(nerves, settings),
        # Sensory CIDP items only for visits recorded with the sensory phenotype (elsewhere they would be
        # noise).
        _sensory_cidp_parts(
            nerves[nerves["visit_key"].isin(phenotypes.index[phenotypes == "sensory"])], settings
        ),
    ]
    findings = rules.stack([part for group in groups for part in group])[FINDING_COLUMNS]
    ends = np.cumsum([sum(len(part) for part in group) for group in groups])
    motor, sensory, cidp_sensory = (findings.iloc[start:end] for start, end in zip([0, *ends[:-1]], ends))
    outcome, rule, level, abnormal, normal = combine(motor, sensory, cidp_sensory, phenotypes, keys, settings)
    # Undecided: each way the missing motor and sensory findings could turn out (met or not met, motor and
    # sensory apart: motor CIDP needs normal sensory nerves, sensory CIDP normal motor nerves).
    open_motor, open_sensory, open_cidp = (
        rules.wanting(motor),
        rules.wanting(sensory),
        rules.wanting(cidp_sensory),
    )
    best = outcome.copy()
    if open_motor.any() or open_sensory.any() or open_cidp.any():
        for motor_as in (MET, NOT_MET):
            for sensory_as in (MET, NOT_MET):
                what_if = combine(
                    rules.with_status(motor, open_motor, motor_as),
                    rules.with_status(sensory, open_sensory, sensory_as),
                    rules.with_status(cidp_sensory, open_cidp, sensory_as),
                    phenotypes,
                    keys,
                    settings,
                )[0]
                higher = what_if.map(RANKS).to_numpy() > best.map(RANKS).to_numpy()
                best[higher] = what_if[higher]
    candidates = pd.concat(
        [
            motor.loc[open_motor, rules.OPEN_COLUMNS],
            sensory.loc[open_sensory, rules.OPEN_COLUMNS],
            cidp_sensory.loc[open_cidp, rules.OPEN_COLUMNS],
        ],
        ignore_index=True,
    )
    outcome, rule, undecided = rules.settle(outcome, rule, best, RANKS, candidates, keys)
    # No phenotype recorded: say so instead of "typical:" (the typical-CIDP rules are applied).
    unrecorded = _unrecorded(visits, keys)
    rule[unrecorded] = rule[unrecorded].str.replace(
        r"^typical:", "phenotype not recorded — judged with the typical-CIDP rules:", regex=True
    )
    outcomes = pd.DataFrame(
        {
            "visit_key": keys,
            "outcome": outcome.to_numpy(),
            "rule": rule.to_numpy(),
            "motor": level.to_numpy(),
            "sensory": list(rules.per_distinct(sensory_category, abnormal, normal)),
            "phenotype": phenotypes.to_numpy(),
            "undecided_items": undecided.to_numpy(),
        }
    )
    return SetResult(ID, load(ID).version, findings, outcomes, extra_keys=("motor", "sensory"))
