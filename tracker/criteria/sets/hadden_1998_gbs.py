"""Hadden 1998 electrophysiological classification of Guillain–Barré syndrome: demyelinating, axonal,
inexcitable, normal or equivocal, from motor nerve conduction. Hadden RDM, Cornblath DR, Hughes RAC, et al.
Ann Neurol 1998;44:780–788, doi:10.1002/ana.410440512.

Demyelinating features per motor nerve (table ``hadden-1998-gbs.csv``): conduction velocity, distal motor
latency (both with a distal-CMAP switch), proximal/distal amplitude ratio with a distal-CMAP floor, F-wave
latency. Demyelinating: ≥ 1 feature in each of ≥ 2 nerves, or ≥ 2 features in the one excitable nerve when
all others are inexcitable. The other classes follow :func:`tracker.criteria.sets._gbs.classify`.
Clinical decision support only: the class is a pattern of conduction values, not a diagnosis.
"""

from __future__ import annotations

import pandas as pd

from tracker.criteria import parameters as p
from tracker.criteria.model import SetResult, Settings
from tracker.criteria.sets import _gbs as g
from tracker.criteria.thresholds import load

ID = "hadden-1998-gbs"
FEATURES = ["cv", "dml", "cb", "f_latency"]
TWO_NERVES = "≥ 1 demyelinating feature in each of ≥ 2 nerves"


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
            low_item="cv_low_cmap",
            switch_item="cv_switch",
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
            low_item="dml_low_cmap",
            switch_item="dml_switch",
            inapplicable=[g.wrist_block(frame)],
        ),
        g.block(nerves, paths, table, "cb", settings, criteria=ID, precondition_item="cb_precondition"),
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
            inapplicable=[
                (
                    frame["f_absent"].to_numpy(dtype=bool),
                    "F-waves absent: not a demyelinating feature in this set",
                )
            ],
        ),
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
    floor = g.rule_text(table, g.ONE_NERVE_FLOOR)
    demyelinating = {
        TWO_NERVES: g.nerves_with_any(state, FEATURES, keys) >= 2,
        (
            "≥ 2 demyelinating features in the only excitable nerve (all others inexcitable; its distal CMAP "
            f"{floor})"
        ): g.one_nerve_rule(state, FEATURES, keys),
    }
    outcomes = g.classify(findings, state, keys, table, demyelinating, FEATURES)
    return SetResult(ID, table.version, findings, outcomes, extra_keys=())
