"""Evaluate visits against criteria sets: load the rows (:mod:`.frames`), pick the normal limits, run the
engine, keep the evaluations (:mod:`.saving`: recomputed when the visit's data, the limits or the criteria
version change) with their traces (:mod:`.traces`), and check one visit (:mod:`.check`)."""

from tracker.services.evaluation.check import (
    DEFAULT_CRITERIA,
    FALLBACK_CRITERIA,
    VisitCheck,
    _only,
    check_visit,
    default_criteria,
)
from tracker.services.evaluation.frames import load_frames
from tracker.services.evaluation.saving import CHUNK_VISITS, refresh_evaluations
from tracker.services.evaluation.traces import compact_trace, expand_trace, to_json, to_json_many

__all__ = [
    "CHUNK_VISITS",
    "DEFAULT_CRITERIA",
    "FALLBACK_CRITERIA",
    "VisitCheck",
    "_only",
    "check_visit",
    "compact_trace",
    "default_criteria",
    "expand_trace",
    "load_frames",
    "refresh_evaluations",
    "to_json",
    "to_json_many",
]
