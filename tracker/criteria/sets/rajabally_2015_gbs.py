"""Rajabally 2015 single-study criteria for Guillain–Barré syndrome subtype (demyelinating parameters from
memory, not verified). Rajabally YA, Durand M-C, Mitchell J, Orlikowski D, Nicolas G. J Neurol Neurosurg
Psychiatry 2015;86:115–119.

Demyelinating (table ``rajabally-2015-gbs.csv``), any of:
- conduction velocity, distal motor latency or F-wave latency (switch at 50 % of LLN): ≥ 1 in each of ≥ 2
  nerves (mixed allowed, as in Hadden 1998);
- absent F-waves (distal CMAP ≥ 20 % of LLN) in ≥ 2 nerves plus another parameter in another nerve;
- conduction block (p/d ratio < 0.7, tibial excluded) plus another parameter in another nerve;
- temporal dispersion in ≥ 2 nerves;
- distal CMAP duration plus another parameter in another nerve;
- ≥ 2 of conduction velocity, distal latency, F-wave latency in the one excitable nerve when all others are
  inexcitable (decision: the items that need another nerve cannot count inside one nerve).
"Another parameter" is any other listed per-nerve parameter met in a different nerve (as in the EFNS/PNS
2010 exemplar). Axonal, inexcitable, normal and equivocal follow Hadden 1998 (decision: this set's own
axonal rules are not verified). Clinical decision support only.
"""

from __future__ import annotations

import pandas as pd

from tracker.criteria import parameters as p
from tracker.criteria import rules
from tracker.criteria.model import SetResult, Settings
from tracker.criteria.sets import _gbs as g
from tracker.criteria.thresholds import load

ID = "rajabally-2015-gbs"
CORE = ["cv", "dml", "f_latency"]
FEATURES = CORE + ["f_absent", "cb", "td", "dcmap_duration"]


def motor_findings(nerves: pd.DataFrame, paths: pd.DataFrame, settings: Settings) -> pd.DataFrame:
    table = load(ID)
    frame = p.motor(nerves)
    column = g.cv_column(settings)
    parts = [
        g.switched(
            frame,
            table,
            "cv",
            criteria=ID,
            parameter="conduction velocity",
            unit="m/s",
            value=frame[column],
            limit=frame["lln_cv"],
            settings=settings,
            segment=frame[f"{column}_segment"],
        ),
        g.switched(
            frame,
            table,
            "dml",
            criteria=ID,
            parameter="distal latency",
            unit="ms",
            value=frame["distal_latency_ms"],
            limit=frame["uln_distal_latency_ms"],
            settings=settings,
            inapplicable=[g.wrist_block(frame)],
        ),
        g.switched(
            frame,
            table,
            "f_latency",
            criteria=ID,
            parameter="F-wave latency",
            unit="ms",
            value=frame["f_latency_ms"],
            limit=frame["uln_f_latency_ms"],
            settings=settings,
            low_item="f_latency_low_cmap",
            switch_item="f_switch",
            inapplicable=[
                (frame["f_absent"].to_numpy(dtype=bool), "F-waves absent (judged by the absent-F item)")
            ],
        ),
        p.f_absent(nerves, table, "f_absent", settings, criteria=ID),
        g.block(
            nerves,
            paths,
            table,
            "cb",
            settings,
            criteria=ID,
            precondition_item="cb_precondition" if "cb_precondition" in table.items() else None,
        ),
        p.dispersion(nerves, paths, table, "td", settings, criteria=ID),
        p.distal_duration(nerves, table, "dcmap_duration", settings, criteria=ID),
        *g.class_findings(nerves, paths, table, settings, criteria=ID),
    ]
    return g.no_response_reasons(parts, nerves)


def evaluate(
    nerves: pd.DataFrame, paths: pd.DataFrame, visits: pd.DataFrame, settings: Settings
) -> SetResult:
    table = load(ID)
    findings = motor_findings(nerves, paths, settings)
    keys = pd.Index(visits["visit_key"].unique(), name="visit_key")
    state = g.nerve_state(findings, nerves, settings, FEATURES)
    # Only the columns met_sets reads (taking every finding column costs more than the rule).
    sets = rules.met_sets(
        findings.loc[
            findings["item"].isin(FEATURES).to_numpy(), ["visit_key", "nerve", "side", "item", "status"]
        ],
        settings,
    )

    def count(item: str) -> pd.Series:
        return rules.count_nerves(sets, item, keys)

    def plus_other(item: str) -> pd.Series:
        return rules.one_plus_other(sets, item, [i for i in FEATURES if i != item], keys)

    floor = g.rule_text(table, g.ONE_NERVE_FLOOR)
    demyelinating = {
        "≥ 1 of conduction velocity, distal latency, F-wave latency in each of ≥ 2 nerves": g.nerves_with_any(
            state, CORE, keys
        )
        >= 2,
        "absent F-waves in ≥ 2 nerves plus another parameter in another nerve": (count("f_absent") >= 2)
        & plus_other("f_absent"),
        "conduction block in 1 nerve plus another parameter in another nerve": plus_other("cb"),
        "temporal dispersion in ≥ 2 nerves": count("td") >= 2,
        "distal CMAP duration in 1 nerve plus another parameter in another nerve": plus_other(
            "dcmap_duration"
        ),
        (
            "≥ 2 of conduction velocity, distal latency, F-wave latency in the only excitable nerve (all "
            f"others inexcitable; its distal CMAP {floor})"
        ): g.one_nerve_rule(state, CORE, keys),
    }
    outcomes = g.classify(findings, state, keys, table, demyelinating, FEATURES)
    return SetResult(ID, table.version, findings, outcomes, extra_keys=())
