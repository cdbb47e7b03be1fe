"""EFNS/PNS 2010 multifocal motor neuropathy guideline: the conduction-block level of a visit.

Joint Task Force of the EFNS and the PNS. European Federation of Neurological Societies/Peripheral Nerve
Society guideline on management of multifocal motor neuropathy, first revision. J Peripher Nerv Syst
2010;15:295–301 (block definitions verified in two secondary summaries — reference sheet §3.1).

Every motor segment between consecutive stimulation sites is judged on its own (``segment_*`` columns of the
``paths`` frame), outside entrapment sites: ``segment_kind`` standard or proximal; entrapment and unknown
segments are not evaluable, with the reason.

- Definite block: negative-peak CMAP area reduced ≥ 50 % (any segment length; median, ulnar, peroneal), CMAP
  at the distal end of the segment > 20 % of LLN and > 1 mV, duration increase ≤ 30 %.
- Probable block: (i) area reduced ≥ 30 % over a long segment of an upper-limb nerve with duration increase
  ≤ 30 %, or (ii) area reduced ≥ 50 % with duration increase > 30 %.

Visit outcome: ``definite`` if any segment meets definite block, else ``probable`` if any meets a probable
item, else ``not_met``. Findings are one row per motor nerve and item, carrying the deciding segment (met
first, then the largest area reduction). Extra key ``sensory``: ``normal`` when every tested sensory nerve has
a SNAP ≥ LLN, ``abnormal`` when any is below, else ``not_evaluable``; it does not change the block level.

Decisions where the published text leaves a gap (also in the project's decisions table):

- The amplitude precondition (> 20 % of LLN and > 1 mV) is written under definite block; it is applied to both
  probable items too (``PRECONDITION_BINDS_PROBABLE``): item (ii) is "as definite" but dispersed, and a
  percentage fall in a CMAP of 1 mV or less is dominated by noise and stimulus problems in any item. A failed
  precondition makes the segment not evaluable (not "not met").
- The LLN for the precondition is the nerve's distal CMAP amplitude LLN, applied to the CMAP at the distal end
  of the segment (the guideline names no other limit).
- Area is required: with area missing and amplitude present the segment is not evaluable; the amplitude drop
  is shown in the reason but not used (amplitude overstates block when the response is dispersed).
- Duration missing: not evaluable when the area criterion is reached (the level then depends on duration);
  not met when the area falls short (duration cannot rescue it).
- "Long segment": the ``long_segment`` column of ``tracker/reference/segments.csv`` (the guideline gives
  wrist–elbow and elbow–axilla as examples, no length).
- The nerves of definite block and of probable item (ii) are the ones the guideline names (median, ulnar,
  peroneal: nerve-specific rows in the table); item (i) takes any upper-limb nerve.
- Blocks are judged per segment; a fall spread over two consecutive segments is not added up.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from tracker.criteria import parameters as p
from tracker.criteria import rules
from tracker.criteria.model import MET, NOT_APPLICABLE, NOT_EVALUABLE, NOT_MET, SetResult, Settings
from tracker.criteria.thresholds import load

ID = "efns-pns-2010-mmn"
PRECONDITION_BINDS_PROBABLE = True
LEVELS = {"definite_cb": "definite", "probable_cb_long": "probable", "probable_cb_dispersed": "probable"}

ENTRAPMENT = "entrapment segment: block is not assessed at common entrapment sites"
UNKNOWN = "segment not in the segment table: an entrapment site cannot be ruled out"
NOT_NAMED = "nerve not named for this block item (median, ulnar, peroneal)"
NOT_UPPER = "not an upper-limb nerve (probable block (i) is for upper-limb nerves)"
SHORT = "short segment (probable block (i) needs a long segment)"
PRECONDITION = (
    "amplitude precondition failed: CMAP at the distal end of the segment not > 20 % of LLN and > 1 mV"
)
NO_PROXIMAL = "no proximal stimulation: block cannot be assessed"


def pct(value: float, sign: bool = False) -> str:
    return f"{round(float(value), 2):{'+' if sign else ''}g}"


def _segments(nerves: pd.DataFrame, paths: pd.DataFrame) -> pd.DataFrame:
    """Motor segments with the nerve-level columns the items need."""
    motor = p.motor(nerves).set_index("test_key")
    columns = ["modality", "lln_amplitude", "lln_amplitude_source", "lln_amplitude_status", "cold"]
    seg = paths.join(motor[[c for c in columns if c in motor]], on="test_key")
    return seg.reset_index(drop=True)


def segment_findings(nerves: pd.DataFrame, paths: pd.DataFrame, settings: Settings) -> pd.DataFrame:
    """One row per motor segment and block item, with ``test_key``, ``site_order`` and ``wanting`` (the status
    could change with more data)."""
    table = load(ID)
    seg = _segments(nerves, paths)
    n = len(seg)
    area = seg["segment_area_reduction_pct"].to_numpy(dtype=float)
    amplitude_drop = seg["segment_amplitude_reduction_pct"].to_numpy(dtype=float)
    duration = seg["segment_duration_increase_pct"].to_numpy(dtype=float)
    cmap = seg["segment_distal_amplitude"].to_numpy(dtype=float)
    lln = seg["lln_amplitude"].to_numpy(dtype=float)
    kind = seg["segment_kind"].to_numpy(dtype=object)
    long_segment = seg["long_segment"].fillna(False).astype(bool).to_numpy()
    upper = (seg["limb"] == "upper").to_numpy()

    pre_lln, pre_mv = table.one("amplitude_lln"), table.one("amplitude_mv")
    lln_threshold = pre_lln.value * lln
    over_lln = rules.compare(cmap, lln_threshold, pre_lln.comparator)
    over_mv = rules.compare(cmap, np.full(n, pre_mv.value), pre_mv.comparator)
    precondition = over_lln & over_mv
    failed = (~np.isnan(cmap) & ~over_mv) | (~np.isnan(cmap) & ~np.isnan(lln) & ~over_lln)
    unknown_pre = ~precondition & ~failed
    short_max, dispersed_min = table.one("duration_max"), table.one("duration_dispersed")
    duration_ok = rules.compare(duration, np.full(n, short_max.value), short_max.comparator)
    dispersed = rules.compare(duration, np.full(n, dispersed_min.value), dispersed_min.comparator)
    no_duration = np.isnan(duration)
    # Texts are written only for the rows that will show them, from the few distinct numbers of each
    # column (a cohort has tens of thousands of segments).
    no_area = np.isnan(area)
    area_reason = np.empty(n, dtype=object)
    area_reason[no_area] = rules.per_distinct(
        lambda a: (
            "negative-peak area not recorded: block is defined by area"
            + ("" if np.isnan(a) else f" (amplitude drop {pct(a)} % not used)")
        ),
        amplitude_drop[no_area],
    )
    details = np.empty(n, dtype=object)
    described = np.zeros(n, dtype=bool)

    def describe(rows: np.ndarray) -> np.ndarray:
        """The measured values of the segments in ``rows`` (a mask), as the reason of a judged finding."""
        todo = rows & ~described
        if todo.any():
            details[todo] = (
                "area drop "
                + rules.per_distinct(pct, area[todo])
                + " %; CMAP at the distal end "
                + rules.per_distinct(lambda c: f"{c:g}", cmap[todo])
                + " mV (needs > "
                + rules.per_distinct(pct, lln_threshold[todo])
                + " mV = 20 % of LLN and > 1 mV); "
                + rules.per_distinct(
                    lambda d: (
                        "duration not measured" if np.isnan(d) else f"duration change {pct(d, sign=True)} %"
                    ),
                    duration[todo],
                )
            )
            described[todo] = True
        return details[rows]

    def item(
        name: str,
        requirement: np.ndarray,
        binds_precondition: bool,
        scope: list[tuple[np.ndarray, str]],
        duration_rule: str,
    ):
        rows = table.per_nerve(name, seg["nerve"])
        threshold = rows["value"].to_numpy(dtype=float)
        reaches = rules.compare(area, threshold, rows["comparator"].to_numpy(dtype=object))
        blocked = rules.common_blocks(seg, settings) + [
            (~np.isin(kind, ["standard", "proximal", "entrapment"]), UNKNOWN)
        ]
        inapplicable = [(kind == "entrapment", ENTRAPMENT)] + scope
        if binds_precondition:
            inapplicable += [(failed, PRECONDITION)]
            blocked += [
                (
                    unknown_pre,
                    "CMAP at the distal end of the segment or its LLN missing: the amplitude precondition "
                    "cannot be checked",
                )
            ]
        blocked += [(np.isnan(area), area_reason)]
        blocked += [
            (reaches & no_duration, "duration not measured: needed once the area criterion is reached")
        ]
        found = rules.item_findings(
            seg,
            criteria=ID,
            item=name,
            parameter="conduction block (negative-peak area reduction)",
            unit="%",
            value=area,
            threshold=threshold,
            comparator=rows["comparator"].to_numpy(dtype=object),
            limit=lln,
            limit_name="LLN of the CMAP amplitude (precondition)",
            source=rows["source"],
            source_status=rows["status"],
            segment=seg["segment"].to_numpy(dtype=object),
            requirement=requirement & (precondition if binds_precondition else True),
            limit_source=seg.get("lln_amplitude_source"),
            limit_status=seg.get("lln_amplitude_status"),
            blocked=blocked,
            inapplicable=inapplicable,
        )
        status = found["status"].to_numpy(dtype=object)
        reason = found["reason"].to_numpy(dtype=object, copy=True)
        evaluable = (status == MET) | (status == NOT_MET)
        reason[evaluable] = describe(evaluable)
        short_of_duration = evaluable & reaches & ~requirement
        reason[short_of_duration] = (
            reason[short_of_duration] + f" — area criterion reached, duration is not {duration_rule}"
        )
        found["reason"] = pd.Series(reason, index=found.index, dtype=object)
        found["test_key"] = seg["test_key"].to_numpy()
        found["site_order"] = seg["site_order"].to_numpy()
        # Not evaluable is want of data (the not-applicable reasons are apart): more data could change it.
        found["wanting"] = status == NOT_EVALUABLE
        return found

    def unnamed(name: str) -> np.ndarray:
        return np.isnan(table.per_nerve(name, seg["nerve"])["value"].to_numpy(dtype=float))

    frames = [
        item(
            "definite_cb",
            duration_ok,
            True,
            [(unnamed("definite_cb"), NOT_NAMED)],
            f"≤ {short_max.value:g} %",
        ),
        item(
            "probable_cb_long",
            duration_ok,
            PRECONDITION_BINDS_PROBABLE,
            [(~upper, NOT_UPPER), (~long_segment, SHORT)],
            f"≤ {short_max.value:g} %",
        ),
        item(
            "probable_cb_dispersed",
            dispersed,
            PRECONDITION_BINDS_PROBABLE,
            [(unnamed("probable_cb_dispersed"), NOT_NAMED)],
            f"> {dispersed_min.value:g} %",
        ),
    ]
    return rules.stack(frames)


def per_nerve(segments: pd.DataFrame, nerves: pd.DataFrame, settings: Settings) -> pd.DataFrame:
    """One finding per motor nerve and item: the deciding segment (met first, then the largest reduction);
    other segments that could not be assessed are named in the reason."""
    table = load(ID)
    frame = p.motor(nerves)
    status = segments["status"].to_numpy(dtype=object)
    rank = np.select(
        [status == MET, status == NOT_MET, status == NOT_EVALUABLE, status == NOT_APPLICABLE],
        [0, 1, 2, 3],
        default=4,
    )
    value = segments["value"].to_numpy(dtype=float)
    missing = np.isnan(value)
    test_key = segments["test_key"].to_numpy()
    item_code = pd.factorize(segments["item"].to_numpy(dtype=object), sort=True)[0]
    # Per nerve test and item: met first, then not met, then not evaluable; the largest value first (missing
    # values last); then the most distal site. A stable sort keeps equal rows in their order.
    order = np.lexsort(
        (
            segments["site_order"].to_numpy(),
            np.where(missing, 0.0, -value),
            missing,
            rank,
            item_code,
            test_key,
        )
    )
    sorted_key, sorted_item = test_key[order], item_code[order]
    opens = (
        np.r_[True, (sorted_key[1:] != sorted_key[:-1]) | (sorted_item[1:] != sorted_item[:-1])]
        if len(order)
        else np.zeros(0, dtype=bool)
    )
    group = np.cumsum(opens) - 1
    best = segments.iloc[order[opens]].assign(rank=rank[order[opens]])
    # Segments that could not be assessed, other than the deciding one, are listed in the reason.
    others = ~opens & np.isin(status[order], [NOT_EVALUABLE, NOT_APPLICABLE])
    if others.any():
        rows = order[others]
        pieces = rules.per_distinct(
            lambda seg, why: f"{seg} ({why})",
            segments["segment"].to_numpy(dtype=object)[rows],
            segments["reason"].to_numpy(dtype=object)[rows],
        )
        owner = group[others]
        notes = np.empty(int(opens.sum()), dtype=object)
        # Join the pieces of each nerve test and item in order: one pass per position within the group.
        position = np.arange(len(owner)) - np.maximum.accumulate(
            np.where(np.r_[True, owner[1:] != owner[:-1]], np.arange(len(owner)), 0)
        )
        first = position == 0
        notes[owner[first]] = pieces[first]
        # Texts joined once per distinct pair (the same few texts repeat over a cohort's nerves).
        for step in range(1, int(position.max()) + 1):
            at = position == step
            notes[owner[at]] = rules.per_distinct(lambda a, b: a + "; " + b, notes[owner[at]], pieces[at])
        noted = pd.notna(notes)
        reason = best["reason"].to_numpy(dtype=object, copy=True)  # always text (item_findings)
        reason[noted] = rules.per_distinct(
            lambda r, note: r + "; other segments not assessed: " + note, reason[noted], notes[noted]
        )
        best["reason"] = pd.Series(reason, index=best.index, dtype=object)
    parts = [best]
    for name in LEVELS:
        without = frame[~frame["test_key"].isin(best.loc[best["item"] == name, "test_key"])]
        if without.empty:
            continue
        rows = table.per_nerve(name, without["nerve"])
        found = rules.item_findings(
            without,
            criteria=ID,
            item=name,
            parameter="conduction block (negative-peak area reduction)",
            unit="%",
            value=np.full(len(without), np.nan),
            threshold=rows["value"].to_numpy(dtype=float),
            comparator=rows["comparator"].to_numpy(dtype=object),
            limit=without["lln_amplitude"].to_numpy(dtype=float),
            limit_name="LLN of the CMAP amplitude (precondition)",
            source=rows["source"],
            source_status=rows["status"],
            limit_source=without.get("lln_amplitude_source"),
            limit_status=without.get("lln_amplitude_status"),
            blocked=[(np.ones(len(without), dtype=bool), NO_PROXIMAL)],
            inapplicable=[(np.isnan(rows["value"].to_numpy(dtype=float)), NOT_NAMED)]
            + (
                [((without["limb"] != "upper").to_numpy(), NOT_UPPER)]
                if name == "probable_cb_long" and "limb" in without
                else []
            ),
        )
        found["test_key"] = without["test_key"].to_numpy()
        parts.append(found)
    return rules.stack(parts)


def sensory_findings(nerves: pd.DataFrame, settings: Settings) -> pd.DataFrame:
    """SNAP amplitude ≥ LLN in each tested sensory nerve (met = normal)."""
    table = load(ID)
    frame = p.sensory(nerves)
    row = table.one("snap_normal")
    lln = frame["lln_amplitude"].to_numpy(dtype=float)
    return rules.item_findings(
        frame,
        criteria=ID,
        item="snap_normal",
        parameter="SNAP amplitude",
        unit="µV",
        value=frame["distal_amplitude"].to_numpy(dtype=float),
        threshold=row.value * lln,
        comparator=row.comparator,
        limit=lln,
        limit_name="LLN",
        source=row.source,
        source_status=row.status,
        **p.limit_provenance(frame, "lln_amplitude"),
        blocked=rules.common_blocks(frame, settings),
    )


def _sensory_key(sensory: pd.DataFrame, keys: pd.Index) -> pd.Series:
    status = sensory["status"].to_numpy(dtype=object)
    by_visit = pd.DataFrame({"abnormal": status == NOT_MET, "normal": status == MET}).groupby(
        sensory["visit_key"].to_numpy()
    )
    abnormal = by_visit["abnormal"].any().reindex(keys, fill_value=False).to_numpy(dtype=bool)
    normal = by_visit["normal"].all().reindex(keys, fill_value=False).to_numpy(dtype=bool)
    result = np.full(len(keys), NOT_EVALUABLE, dtype=object)
    result[normal] = "normal"
    result[abnormal] = "abnormal"
    return pd.Series(result, index=keys)


def _join_per_visit(visit_keys: np.ndarray, texts: np.ndarray, sep: str) -> pd.Series:
    """Per visit (index, ascending): its distinct ``texts`` in sorted order, joined by ``sep``.

    Vectorised over visits: the texts are ranked once, each (visit, text) pair kept once, and the pieces
    joined one position within the visit at a time."""
    visit_codes, visit_values = pd.factorize(np.asarray(visit_keys), sort=True)
    text_codes, text_values = pd.factorize(np.asarray(texts, dtype=object), sort=True)
    order = np.lexsort((text_codes, visit_codes))
    visit_codes, text_codes = visit_codes[order], text_codes[order]
    keep = (
        np.r_[True, (visit_codes[1:] != visit_codes[:-1]) | (text_codes[1:] != text_codes[:-1])]
        if len(order)
        else np.zeros(0, dtype=bool)
    )
    visit_codes, pieces = visit_codes[keep], np.asarray(text_values, dtype=object)[text_codes[keep]]
    starts = np.r_[True, visit_codes[1:] != visit_codes[:-1]] if len(visit_codes) else np.zeros(0, dtype=bool)
    position = np.arange(len(visit_codes)) - np.maximum.accumulate(
        np.where(starts, np.arange(len(visit_codes)), 0)
    )
    joined = np.empty(len(visit_values), dtype=object)
    joined[visit_codes[starts]] = pieces[starts]
    for step in range(1, int(position.max()) + 1 if len(position) else 1):
        at = position == step
        joined[visit_codes[at]] = joined[visit_codes[at]] + sep + pieces[at]
    return pd.Series(joined, index=visit_values, dtype=object)


def evaluate(
    nerves: pd.DataFrame, paths: pd.DataFrame, visits: pd.DataFrame, settings: Settings
) -> SetResult:
    segments = segment_findings(nerves, paths, settings)
    motor = per_nerve(segments, nerves, settings)
    sensory = sensory_findings(nerves, settings)
    keys = pd.Index(visits["visit_key"].unique(), name="visit_key")
    outcome = pd.Series("not_met", index=keys, dtype=object)
    rule = pd.Series(
        "no segment outside entrapment sites meets definite or probable block", index=keys, dtype=object
    )
    rule[~keys.isin(segments["visit_key"].unique())] = (
        "no motor segment with proximal stimulation: block cannot be assessed"
    )
    met = segments[segments["status"].to_numpy(dtype=object) == MET]
    for level in ("probable", "definite"):
        hits = met[
            np.isin(met["item"].to_numpy(dtype=object), [i for i, lv in LEVELS.items() if lv == level])
        ]
        if hits.empty:
            continue
        where = rules.per_distinct(
            lambda n, s, seg, v: f"{n} {s} {seg} (area drop {pct(v)} %)",
            hits["nerve"].to_numpy(dtype=object),
            hits["side"].to_numpy(dtype=object),
            hits["segment"].to_numpy(dtype=object),
            hits["value"].to_numpy(dtype=float),
        )
        text = f"{level} conduction block: " + _join_per_visit(hits["visit_key"].to_numpy(), where, "; ")
        outcome[text.index] = level
        rule[text.index] = text
    # Segments not evaluable for want of data, at a level above the visit's outcome, leave the outcome open.
    # Nerves without proximal stimulation (want of data) are as open as a segment that could not be judged.
    # Only the columns read below and by rules.settle (taking every column costs more than the rule).
    unstimulated = motor.loc[
        (motor["reason"].to_numpy(dtype=object) == NO_PROXIMAL) & rules.wanting(motor), rules.OPEN_COLUMNS
    ]
    wanting = pd.concat(
        [segments.loc[segments["wanting"].to_numpy(dtype=bool), rules.OPEN_COLUMNS], unstimulated],
        ignore_index=True,
    )
    level_of_visit = outcome.reindex(wanting["visit_key"]).to_numpy(dtype=object)
    above = (level_of_visit == "not_met") | (
        (level_of_visit == "probable") & (wanting["item"] == "definite_cb").to_numpy()
    )
    wanting = wanting[above]
    best = outcome.copy()
    for level in ("probable", "definite"):
        raising = wanting.loc[
            np.isin(wanting["item"].to_numpy(dtype=object), [i for i, lv in LEVELS.items() if lv == level]),
            "visit_key",
        ].unique()
        best[best.index.isin(raising)] = level
    outcome, rule, undecided = rules.settle(
        outcome, rule, best, {"not_met": 0, "probable": 1, "definite": 2}, wanting, keys, note=False
    )
    if len(wanting):
        where = rules.per_distinct(
            lambda n, s, seg: f"{n} {s} {seg}",
            wanting["nerve"].to_numpy(dtype=object),
            wanting["side"].to_numpy(dtype=object),
            wanting["segment"].to_numpy(dtype=object),
        )
        note = (
            "; undecided: "
            + _join_per_visit(wanting["visit_key"].to_numpy(), where, ", ")
            + " not evaluable for want of data"
        )
        rule[note.index] = rule[note.index] + note
    outcomes = pd.DataFrame(
        {
            "visit_key": keys,
            "outcome": outcome.to_numpy(),
            "rule": rule.to_numpy(),
            "sensory": _sensory_key(sensory, keys).to_numpy(),
            "undecided_items": undecided.to_numpy(),
        }
    )
    findings = rules.stack(
        [motor.drop(columns=["test_key", "site_order", "wanting", "rank"], errors="ignore"), sensory]
    )
    # The SNAP check is required for the diagnosis, not for the block level:
    # it is no near miss of the outcome.
    return SetResult(
        ID, load(ID).version, findings, outcomes, extra_keys=("sensory",), outcome_items=tuple(LEVELS)
    )
