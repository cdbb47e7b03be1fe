"""AAN 1991 research criteria for CIDP, electrodiagnostic part: at least 3 of 4 items → ``met``.

Ad Hoc Subcommittee of the American Academy of Neurology AIDS Task Force. Research criteria for diagnosis of
chronic inflammatory demyelinating polyneuropathy (CIDP). Neurology 1991;41:617–618 (citation from memory, not
verified; the thresholds were verified in a JNNP table reproducing the criteria — reference sheet S13).

Items (thresholds in ``tables/aan-1991-cidp.csv``):

1. conduction velocity reduced in ≥ 2 motor nerves: < 80 % of LLN (distal CMAP > 80 % of LLN) or < 70 % of LLN
   (distal CMAP < 80 % of LLN);
2. partial conduction block or abnormal temporal dispersion in ≥ 1 motor nerve, only over peroneal ankle →
   below fibular head, median wrist → elbow, ulnar wrist → below elbow: > 20 % drop of negative-peak area or
   amplitude; with ≤ 15 % duration increase labelled "partial block", with > 15 % "dispersion and possible
   block" — both count;
3. distal motor latency in ≥ 2 nerves: > 125 % of ULN (distal CMAP > 80 % of LLN) or > 150 % (< 80 %);
4. F-waves absent, or minimal F latency > 120 % of ULN (distal CMAP > 80 % of LLN) / > 150 % (< 80 %), in ≥ 2
   nerves.

Decisions where the published text leaves a gap (also in the project's decisions table):

- Amplitude switch: the CMAP is the distal (site 1) negative-peak CMAP of the same nerve. The text says
  "> 80 %" and "< 80 %"; exactly 80 % of LLN is put on the normal-amplitude branch (the stricter branch
  needs "< 80 %", as EFNS/PNS 2010 writes it). When the distal CMAP or its LLN is missing the branch cannot
  be chosen and the finding is not evaluable.
- Item 2 segments are fixed by the criteria, so ``Settings.block_path`` does not apply;
  ``Settings.cv_segments`` does apply to item 1 (the criteria do not restrict the velocity segment).
- Item 2 measure: negative-peak area and negative-peak amplitude, the larger drop decides (the text says "area
  or amplitude"; it names peak-to-peak amplitude for block, the tool stores negative-peak amplitude only).
  When one of the two is missing the other decides (the reason says so); both missing → not evaluable.
  No distal-amplitude floor (the criteria give none); a nerve without a recordable distal response is not
  evaluable.
- Item 2 duration: "15 %" is the increase of negative-peak duration from the distal to the proximal site of
  the standard segment, in percent of the distal duration. It only labels the finding (exactly 15 % → partial
  block; > 15 % strict → dispersion); the item is met on the > 20 % drop alone, also when duration is missing.
- Item 3: the AAN text has no wrist-entrapment exclusion, so by default a median distal latency is judged also
  when the clinician marked a neuropathy at the wrist (the trace says so). ``Settings.aan_wrist_exclusion``
  applies the EFNS/PNS exclusion instead (a project rule; the finding is then not applicable).
- Item 4: absent F-waves count only when a distal CMAP was recorded (> 0 mV) — absent F-waves with no motor
  response are inexcitability, not demyelination. The criteria set no other amplitude condition.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from tracker.criteria import parameters as p
from tracker.criteria import rules
from tracker.criteria.model import MET, NOT_EVALUABLE, NOT_MET, SetResult, Settings
from tracker.criteria.thresholds import ThresholdTable, load

ID = "aan-1991-cidp"
ITEMS_NEEDED = 3
# Item number → (finding items whose met nerves are pooled, nerves needed, short name).
ITEMS = {
    1: (("cv",), 2, "conduction velocity"),
    2: (("cb_td",), 1, "block or dispersion"),
    3: (("dml",), 2, "distal latency"),
    4: (("f_latency", "f_absent"), 2, "F-waves"),
}
BLOCK_SEGMENTS = {
    "fibular": "ankle → below fibular head",
    "median": "wrist → elbow",
    "ulnar": "wrist → below elbow",
}

NO_RESPONSE = "no recordable response at the distal site"
SWITCH_UNKNOWN = (
    "distal CMAP amplitude or its LLN missing: the amplitude-dependent threshold cannot be chosen"
)
WRIST = (
    "median distal latency not counted: neuropathy at the wrist judged by the clinician (project rule, "
    "setting aan_wrist_exclusion on)"
)
WRIST_COUNTED = (
    "wrist entrapment recorded, latency counted: the AAN 1991 text has no such exclusion "
    "(publication's reading; setting aan_wrist_exclusion off)"
)
NOT_A_BLOCK_NERVE = "no AAN 1991 block segment for this nerve (only peroneal, median and ulnar)"
NO_STANDARD_SITE = "no stimulation at the proximal end of the standard segment"
F_ABSENT_ELSEWHERE = "F-waves absent (judged by the absent-F item)"
F_PRESENT = "F-waves present (judged by the F-latency item)"
F_NOT_RECORDED = "F-waves not recorded"


def _editable(frame: pd.DataFrame, *columns: str) -> pd.DataFrame:
    """Text columns as plain objects so they can be rewritten (the engine
    may hand them over as categories)."""
    for column in columns:
        frame[column] = frame[column].astype(object)
    return frame


def pct(value: float, sign: bool = False) -> str:
    """A percentage for a reason text: at most two decimals."""
    return f"{round(float(value), 2):{'+' if sign else ''}g}"


def _switched(frame: pd.DataFrame, table: ThresholdTable, item: str, low_item: str, limit: np.ndarray):
    """Threshold per nerve from the normal or the low-CMAP row, chosen by the distal CMAP (< 80 % of LLN)."""
    normal = table.per_nerve(item, frame["nerve"])
    low_rows = table.per_nerve(low_item, frame["nerve"])
    low, known = p.amplitude_switch(frame, table, "cmap_switch")
    factor = np.where(low, low_rows["value"].to_numpy(dtype=float), normal["value"].to_numpy(dtype=float))
    threshold = factor * limit
    names = rules.per_distinct(
        lambda f, r, lo: (
            f"{f * 100:g} % of {str(r).upper()}" + (" (distal CMAP < 80 % of LLN)" if lo else "")
        ),
        factor,
        normal["reference"].to_numpy(dtype=object),
        np.asarray(low, dtype=bool),
    )
    return threshold, normal, names, known


def _switched_item(
    nerves,
    table,
    settings,
    *,
    item,
    low_item,
    parameter,
    unit,
    value_column,
    limit_column,
    segment=None,
    extra_blocks=(),
    not_applicable=(),
):
    frame = p.motor(nerves)
    limit = frame[limit_column].to_numpy(dtype=float)
    value = frame[value_column].to_numpy(dtype=float)
    threshold, rows, names, known = _switched(frame, table, item, low_item, limit)
    no_response = frame["no_response"].to_numpy(dtype=bool)
    return rules.item_findings(
        frame,
        criteria=ID,
        item=item,
        parameter=parameter,
        unit=unit,
        value=value,
        threshold=threshold,
        comparator=rows["comparator"].to_numpy(dtype=object),
        limit=limit,
        limit_name=names,
        source=rows["source"],
        source_status=rows["status"],
        segment=segment,
        **p.limit_provenance(frame, limit_column),
        blocked=rules.common_blocks(frame, settings)
        + [(mask(frame), why) for mask, why in extra_blocks]
        + [(~known & ~np.isnan(value) & ~no_response, SWITCH_UNKNOWN)],
        inapplicable=[(no_response, NO_RESPONSE)] + [(mask(frame), why) for mask, why in not_applicable],
    )


def velocity(nerves, table, settings):
    column = "cv_standard" if settings.cv_segments == "standard" else "cv_outside_entrapment"
    segment = p.motor(nerves)[f"{column}_segment"].to_numpy(dtype=object)
    return _switched_item(
        nerves,
        table,
        settings,
        item="cv",
        low_item="cv_low_cmap",
        parameter="conduction velocity",
        unit="m/s",
        value_column=column,
        limit_column="lln_cv",
        segment=segment,
    )


def distal_latency(nerves, table, settings):
    def wrist(frame):
        return (frame["nerve"] == "median").to_numpy() & frame["wrist_entrapment"].fillna(False).astype(
            bool
        ).to_numpy()

    if settings.aan_wrist_exclusion:
        return _switched_item(
            nerves,
            table,
            settings,
            item="dml",
            low_item="dml_low_cmap",
            parameter="distal latency",
            unit="ms",
            value_column="distal_latency_ms",
            limit_column="uln_distal_latency_ms",
            not_applicable=[(wrist, WRIST)],
        )
    found = _switched_item(
        nerves,
        table,
        settings,
        item="dml",
        low_item="dml_low_cmap",
        parameter="distal latency",
        unit="ms",
        value_column="distal_latency_ms",
        limit_column="uln_distal_latency_ms",
    )
    # The trace says the mark was seen and not applied (judged findings only; a gap keeps its own reason).
    marked = wrist(p.motor(nerves)) & np.isin(found["status"].to_numpy(dtype=object), [MET, NOT_MET])
    found = _editable(found, "reason")
    found.loc[marked, "reason"] = WRIST_COUNTED
    return found


def f_latency(nerves, table, settings):
    def absent(frame):
        return frame["f_absent"].to_numpy(dtype=bool)

    return _switched_item(
        nerves,
        table,
        settings,
        item="f_latency",
        low_item="f_latency_low_cmap",
        parameter="F-wave latency",
        unit="ms",
        value_column="f_latency_ms",
        limit_column="uln_f_latency_ms",
        not_applicable=[(absent, F_ABSENT_ELSEWHERE)],
    )


def f_absent(nerves, table, settings):
    """Absent F-waves; the value shown is the distal CMAP, which must be recordable (> 0 mV)."""
    frame = p.motor(nerves)
    rows = table.per_nerve("f_absent", frame["nerve"])
    amplitude = frame["distal_amplitude"].to_numpy(dtype=float)
    absent = frame["f_absent"].to_numpy(dtype=bool)
    present = ~absent & ~np.isnan(frame["f_latency_ms"].to_numpy(dtype=float))
    findings = rules.item_findings(
        frame,
        criteria=ID,
        item="f_absent",
        parameter="F-waves absent (distal CMAP)",
        unit="mV",
        value=amplitude,
        threshold=rows["value"].to_numpy(dtype=float),
        comparator=rows["comparator"].to_numpy(dtype=object),
        limit=frame["lln_amplitude"].to_numpy(dtype=float),
        limit_name="recordable distal CMAP (> 0 mV)",
        source=rows["source"],
        source_status=rows["status"],
        requirement=absent,
        **p.limit_provenance(frame, "lln_amplitude"),
        blocked=rules.common_blocks(frame, settings)
        + [
            (~absent & ~present, F_NOT_RECORDED),
            (
                absent & np.isnan(amplitude) & ~frame["no_response"].to_numpy(dtype=bool),
                "distal CMAP amplitude missing: absent F-waves cannot be interpreted",
            ),
        ],
        inapplicable=[(absent & frame["no_response"].to_numpy(dtype=bool), NO_RESPONSE)],
    )
    findings = _editable(findings, "status", "reason")
    cold = (findings["reason"] == "cold limb excluded (setting)").to_numpy()
    findings.loc[present & ~cold, "status"] = NOT_MET
    findings.loc[present & ~cold, "reason"] = F_PRESENT
    return findings


def block_or_dispersion(nerves, paths, table, settings):
    """Item 2 over the standard segment of the median, ulnar and peroneal nerves only."""
    frame = p.motor(nerves)
    standard = paths[paths["path_standard"].astype(bool) & paths["nerve"].isin(list(BLOCK_SEGMENTS))]
    seg = standard.drop_duplicates("test_key").set_index("test_key").reindex(frame["test_key"])
    amplitude = seg["amplitude_reduction_pct"].to_numpy(dtype=float)
    area = seg["area_reduction_pct"].to_numpy(dtype=float)
    duration = seg["duration_increase_pct"].to_numpy(dtype=float)
    value = np.fmax(amplitude, area)  # NaN only where both are missing
    rows = table.per_nerve("cb_td", frame["nerve"])
    threshold = rows["value"].to_numpy(dtype=float)
    dispersion = table.one("td_duration")
    dispersed = rules.compare(duration, np.full(len(frame), dispersion.value), dispersion.comparator)
    block_nerve = frame["nerve"].isin(list(BLOCK_SEGMENTS)).to_numpy()
    no_response = frame["no_response"].to_numpy(dtype=bool)
    no_site = block_nerve & np.isnan(seg["site_order"].to_numpy(dtype=float))
    findings = rules.item_findings(
        frame,
        criteria=ID,
        item="cb_td",
        parameter="block or dispersion (negative-peak area or amplitude drop)",
        unit="%",
        value=value,
        threshold=threshold,
        comparator=rows["comparator"].to_numpy(dtype=object),
        limit=np.full(len(frame), np.nan),
        limit_name="",
        source=rows["source"],
        source_status=rows["status"],
        segment=seg["segment"].to_numpy(dtype=object),
        blocked=rules.common_blocks(frame, settings) + [(no_site & ~no_response, NO_STANDARD_SITE)],
        inapplicable=[(~block_nerve, NOT_A_BLOCK_NERVE), (no_response, NO_RESPONSE)],
    )
    status = findings["status"].to_numpy(dtype=object)
    # The details replace the reason of evaluable findings only; each part is written once per distinct value.
    evaluable = (status == MET) | (status == NOT_MET)
    hit = status[evaluable] == MET

    def drop(amp):
        return "amplitude not measured" if np.isnan(amp) else f"amplitude drop {pct(amp)} %"

    def area_drop(ar):
        return "area not recorded (judged on amplitude alone)" if np.isnan(ar) else f"area drop {pct(ar)} %"

    def label(dur, hit, disp):
        if np.isnan(dur):
            return "duration not measured" + (
                ": block or dispersion not distinguished (both count)" if hit else ""
            )
        if not hit:
            return f"duration change {pct(dur, sign=True)} %"
        if disp:
            return (
                f"duration change {pct(dur, sign=True)} % (> {dispersion.value:g} %): abnormal temporal "
                "dispersion and possible block"
            )
        return f"duration change {pct(dur, sign=True)} % (≤ {dispersion.value:g} %): partial conduction block"

    details = (
        rules.per_distinct(drop, amplitude[evaluable])
        + ", "
        + rules.per_distinct(area_drop, area[evaluable])
        + "; "
        + rules.per_distinct(label, duration[evaluable], hit, dispersed[evaluable])
    )
    findings = _editable(findings, "reason")
    findings.loc[evaluable, "reason"] = details
    return findings


def findings(nerves: pd.DataFrame, paths: pd.DataFrame, settings: Settings) -> pd.DataFrame:
    table = load(ID)
    return rules.stack(
        [
            velocity(nerves, table, settings),
            block_or_dispersion(nerves, paths, table, settings),
            distal_latency(nerves, table, settings),
            f_latency(nerves, table, settings),
            f_absent(nerves, table, settings),
        ],
    )


def _item_counts(
    found: pd.DataFrame, items: tuple[str, ...], settings: Settings, keys: pd.Index
) -> tuple[pd.Series, pd.Series]:
    """Per visit: the number of nerves (identities, see ``rules.nerve_identity``) meeting
    any of ``items``, and the number not meeting them where one is not evaluable for want
    of data (more data could still count)."""
    # Only the columns read here: taking every column of the findings costs more than the count.
    part = found.loc[
        np.isin(found["item"].to_numpy(dtype=object), list(items)), ["visit_key", "nerve", "side", "status"]
    ]
    status = part["status"].to_numpy(dtype=object)
    per_nerve = (
        pd.DataFrame(
            {
                "visit_key": part["visit_key"].to_numpy(),
                "identity": pd.Series(rules.nerve_identity(part, settings).to_numpy(), dtype=object),
                "met": status == MET,
                "wanting": status == NOT_EVALUABLE,
            }
        )
        .groupby(["visit_key", "identity"])[["met", "wanting"]]
        .any()
    )
    per_visit = (
        pd.DataFrame({"met": per_nerve["met"], "open": per_nerve["wanting"] & ~per_nerve["met"]})
        .groupby(level="visit_key")
        .sum()
    )
    per_visit = per_visit.reindex(keys, fill_value=0)
    return per_visit["met"].astype(int), per_visit["open"].astype(int)


def evaluate(
    nerves: pd.DataFrame, paths: pd.DataFrame, visits: pd.DataFrame, settings: Settings
) -> SetResult:
    found = findings(nerves, paths, settings)
    keys = pd.Index(visits["visit_key"].unique(), name="visit_key")
    met_items: dict[int, np.ndarray] = {}
    undecided: dict[int, np.ndarray] = {}
    for number, (items, needed, _) in ITEMS.items():
        count, wanting = _item_counts(found, items, settings, keys)
        met_items[number] = (count >= needed).to_numpy()
        undecided[number] = ~met_items[number] & (count + wanting >= needed).to_numpy()
    items_met = np.sum([m.astype(int) for m in met_items.values()], axis=0).astype(int).reshape(len(keys))
    outcome = np.where(items_met >= ITEMS_NEEDED, "met", "not_met")
    open_count = np.sum([u.astype(int) for u in undecided.values()], axis=0).reshape(len(keys))
    studied = keys.isin(found["visit_key"].unique())

    def rule_text(studied, met_count, open_count, *flags):
        """The rule text of one visit, from its deciding flags (met items, then undecided items, in order)."""
        if not studied:
            return "no motor nerve studied: the items cannot be judged"
        met_flags, open_flags = flags[: len(ITEMS)], flags[len(ITEMS) :]
        names = [f"{n} ({ITEMS[n][2]})" for n, hit in zip(ITEMS, met_flags) if hit]
        text = (
            f"{met_count} of 4 items met"
            + (f": {', '.join(names)}" if names else "")
            + f"; ≥ {ITEMS_NEEDED} needed"
        )
        if met_count < ITEMS_NEEDED and open_count and met_count + open_count >= ITEMS_NEEDED:
            open_items = [f"{n} ({ITEMS[n][2]})" for n, hit in zip(ITEMS, open_flags) if hit]
            text += (
                f"; undecided: item {', '.join(open_items)} not evaluable in enough nerves for want of data"
            )
        return text

    # Few visits differ in these flags: each combination's text is written once and spread over the visits.
    texts = rules.per_distinct(
        rule_text,
        np.asarray(studied, dtype=bool),
        items_met,
        open_count,
        *(np.asarray(met_items[n], dtype=bool).reshape(len(keys)) for n in ITEMS),
        *(np.asarray(undecided[n], dtype=bool).reshape(len(keys)) for n in ITEMS),
    )
    # Undecided: items that more data could still meet, enough of them to reach the 3 needed.
    best = pd.Series(np.where(items_met + open_count >= ITEMS_NEEDED, "met", outcome), index=keys)
    open_rows = np.zeros(len(found), dtype=bool)
    visit = found["visit_key"].to_numpy()
    item = found["item"].to_numpy(dtype=object)
    for number, (names, _, _) in ITEMS.items():
        open_rows |= np.isin(item, list(names)) & np.isin(visit, keys[undecided[number]])
    open_rows &= rules.wanting(found)
    outcome, rule, items = rules.settle(
        pd.Series(outcome, index=keys),
        pd.Series(list(texts), index=keys, dtype=object),
        best,
        {"not_met": 0, "met": 1},
        found.loc[open_rows, rules.OPEN_COLUMNS],
        keys,
        note=False,
    )
    outcomes = pd.DataFrame(
        {
            "visit_key": keys,
            "outcome": outcome.to_numpy(),
            "rule": rule.to_numpy(),
            "items_met": items_met,
            "undecided_items": items.to_numpy(),
        }
    )
    return SetResult(ID, load(ID).version, found, outcomes, extra_keys=("items_met",))
