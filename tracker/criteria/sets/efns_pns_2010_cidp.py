"""EFNS/PNS 2010 CIDP electrodiagnostic criteria: definite / probable / possible, and the supportive
sensory item. Van den Bergh PYK et al., Eur J Neurol 2010;17:356–363."""

from __future__ import annotations

import numpy as np
import pandas as pd

from tracker.criteria import parameters as p
from tracker.criteria import rules
from tracker.criteria.model import MET, NOT_EVALUABLE, NOT_MET, SetResult, Settings
from tracker.criteria.thresholds import load

ID = "efns-pns-2010-cidp"
DEMYELINATING = ["dml", "cv", "f_latency", "f_absent", "cb", "td", "dcmap_duration"]  # items (a)–(g)
SENSORY_NERVES = ("median", "ulnar", "radial", "sural")


def motor_findings(nerves: pd.DataFrame, paths: pd.DataFrame, settings: Settings) -> pd.DataFrame:
    return rules.stack(_motor_parts(nerves, paths, settings))


def _motor_parts(nerves: pd.DataFrame, paths: pd.DataFrame, settings: Settings) -> list[pd.DataFrame]:
    table = load(ID)
    return [
        p.distal_latency(nerves, table, "dml", settings, criteria=ID),
        p.velocity(nerves, table, "cv", settings, criteria=ID),
        p.f_latency(nerves, table, "f_latency", "f_latency_low_cmap", "f_switch", settings, criteria=ID),
        p.f_absent(nerves, table, "f_absent", settings, criteria=ID),
        p.block(nerves, paths, table, "cb", "cb_precondition", settings, criteria=ID),
        p.dispersion(nerves, paths, table, "td", settings, criteria=ID),
        p.distal_duration(nerves, table, "dcmap_duration", settings, criteria=ID),
        # Probable block: tibial excluded (table), and Erb's point needs ≥ 50 % (the definite item).
        p.block(
            nerves,
            paths,
            table,
            "probable_cb",
            "cb_precondition",
            settings,
            criteria=ID,
            exclude_labels=("erb",),
        ),
    ]


def sensory_findings(nerves: pd.DataFrame, settings: Settings) -> pd.DataFrame:
    """Supportive item 3: sensory CV < 80 % LLN (< 70 % if SNAP < 80 % LLN); sural sparing."""
    return rules.stack(_sensory_parts(nerves, settings))


def _sensory_parts(nerves: pd.DataFrame, settings: Settings) -> list[pd.DataFrame]:
    table = load(ID)
    frame = p.sensory(nerves)
    frame = frame[frame["nerve"].isin(SENSORY_NERVES)]
    limit = frame["lln_cv"].to_numpy(dtype=float)
    normal = table.one("sensory_cv")
    low_rows = table.one("sensory_cv_low_snap")
    low, known = p.amplitude_switch(frame, table, "sensory_switch")
    threshold = np.where(low, low_rows.value, normal.value) * limit
    names = np.where(
        low, f"{low_rows.value * 100:g} % of LLN (SNAP below 80 % of LLN)", f"{normal.value * 100:g} % of LLN"
    )
    cv = rules.item_findings(
        frame,
        criteria=ID,
        item="sensory_cv",
        parameter="sensory conduction velocity",
        unit="m/s",
        value=frame["sensory_cv"].to_numpy(dtype=float),
        threshold=threshold,
        comparator="lt",
        limit=limit,
        limit_name=names,
        source=normal.source,
        source_status=normal.status,
        **p.limit_provenance(frame, "lln_cv"),
        blocked=rules.common_blocks(frame, settings)
        + [(~known & ~frame["no_response"].to_numpy(dtype=bool), "SNAP amplitude or its LLN missing")],
        inapplicable=[(frame["no_response"].to_numpy(dtype=bool), "no recordable SNAP")],
    )
    # Sural sparing: median (not explained by the wrist) or radial SNAP below LLN, sural SNAP normal.
    sparing = table.one("sural_sparing")
    lln = frame["lln_amplitude"].to_numpy(dtype=float)
    amplitude = frame["distal_amplitude"].to_numpy(dtype=float)
    reduced = rules.compare(amplitude, lln, "lt")
    wrist = (frame["nerve"] == "median").to_numpy() & frame["wrist_entrapment"].fillna(False).astype(
        bool
    ).to_numpy()
    is_sural = (frame["nerve"] == "sural").to_numpy()
    snap = rules.item_findings(
        frame,
        criteria=ID,
        item="snap_reduced",
        parameter="SNAP amplitude",
        unit="µV",
        value=amplitude,
        threshold=lln,
        comparator=np.where(is_sural, "ge", "lt"),
        limit=lln,
        limit_name="LLN",
        source=sparing.source,
        source_status=sparing.status,
        **p.limit_provenance(frame, "lln_amplitude"),
        blocked=rules.common_blocks(frame, settings),
        inapplicable=[
            (wrist, "median SNAP not counted: neuropathy at the wrist judged by the clinician"),
            ((frame["nerve"] == "ulnar").to_numpy(), "not part of the sural-sparing pattern"),
        ],
    )
    snap.loc[is_sural, "item"] = "sural_normal"
    del reduced
    return [cv, snap]


RANKS = {"not_met": 0, "possible": 1, "probable": 2, "definite": 3}


def combine(motor: pd.DataFrame, keys: pd.Index, settings: Settings) -> tuple[pd.Series, pd.Series]:
    """(outcome, rule) per visit from the motor findings."""
    sets = rules.met_sets(motor, settings)

    def count(item):
        return rules.count_nerves(sets, item, keys)

    def plus_other(item):
        return rules.one_plus_other(sets, item, [i for i in DEMYELINATING if i != item], keys)

    definite_rules = {
        "(a) distal latency in ≥ 2 nerves": count("dml") >= 2,
        "(b) conduction velocity in ≥ 2 nerves": count("cv") >= 2,
        "(c) F-wave latency in ≥ 2 nerves": count("f_latency") >= 2,
        "(d) absent F-waves in ≥ 2 nerves plus another parameter in another nerve": (count("f_absent") >= 2)
        & rules.other_outside(sets, "f_absent", [i for i in DEMYELINATING if i != "f_absent"], keys),
        "(e) conduction block in ≥ 2 nerves": count("cb") >= 2,
        "(e) conduction block in 1 nerve plus another parameter in another nerve": plus_other("cb"),
        "(f) temporal dispersion in ≥ 2 nerves": count("td") >= 2,
        "(g) distal CMAP duration plus another parameter in another nerve": plus_other("dcmap_duration"),
    }
    probable_rules = {
        "probable block in ≥ 2 nerves": count("probable_cb") >= 2,
        "probable block in 1 nerve plus another parameter in another nerve": rules.one_plus_other(
            sets, "probable_cb", DEMYELINATING, keys
        ),
    }
    any_single = rules.count_any(sets, DEMYELINATING, keys) >= 1
    outcome = pd.Series("not_met", index=keys, dtype=object)
    rule = pd.Series("no demyelinating parameter met in any nerve", index=keys, dtype=object)
    outcome[any_single] = "possible"
    rule[any_single] = "a demyelinating parameter met in one nerve only"
    for name, hit in probable_rules.items():
        fire = hit & (outcome != "probable")
        outcome[fire], rule[fire] = "probable", name
    for name, hit in definite_rules.items():
        fire = hit & (outcome != "definite")
        outcome[fire], rule[fire] = "definite", name
    return outcome, rule


def evaluate(
    nerves: pd.DataFrame, paths: pd.DataFrame, visits: pd.DataFrame, settings: Settings
) -> SetResult:
    # Stacked once: the motor and sensory findings are views of the set's findings.
    motor_parts = _motor_parts(nerves, paths, settings)
    findings = rules.stack(motor_parts + _sensory_parts(nerves, settings))
    split = sum(len(part) for part in motor_parts)
    motor, sensory = findings.iloc[:split], findings.iloc[split:]
    keys = pd.Index(visits["visit_key"].unique(), name="visit_key")
    outcome, rule = combine(motor, keys, settings)
    # Undecided: would the motor findings not evaluable for want of data, if met, give a higher level?
    open_ = rules.wanting(motor)
    best = combine(rules.with_status(motor, open_, MET), keys, settings)[0] if open_.any() else outcome
    outcome, rule, undecided = rules.settle(
        outcome, rule, best, RANKS, motor.loc[open_, rules.OPEN_COLUMNS], keys
    )

    # Per visit: whether some sensory finding of the kind exists (plain arrays: the findings are many).
    item = sensory["item"].to_numpy(dtype=object)
    status = sensory["status"].to_numpy(dtype=object)
    visit = sensory["visit_key"].to_numpy()

    def any_where(mask: np.ndarray) -> np.ndarray:
        return keys.isin(visit[mask])

    met = status == MET
    supportive = pd.Series(NOT_EVALUABLE, index=keys, dtype=object)
    supportive[any_where((status == MET) | (status == NOT_MET))] = NOT_MET
    hit = pd.Series(
        any_where(met & (item == "sensory_cv"))
        | (any_where(met & (item == "snap_reduced")) & any_where(met & (item == "sural_normal"))),
        index=keys,
    )
    supportive[hit.to_numpy()] = MET
    outcomes = pd.DataFrame(
        {
            "visit_key": keys,
            "outcome": outcome.to_numpy(),
            "rule": rule.to_numpy(),
            "sensory_supportive": supportive.to_numpy(),
            "undecided_items": undecided.to_numpy(),
        }
    )
    return SetResult(
        ID,
        load(ID).version,
        findings,
        outcomes,
        extra_keys=("sensory_supportive",),
        outcome_items=(*DEMYELINATING, "probable_cb"),
    )
