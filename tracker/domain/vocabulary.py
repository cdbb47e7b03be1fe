"""Closed vocabularies used on input, in the schema's CHECK constraints, and in outputs.

Words are the trade's own (CMAP, F-wave…) or plain English; nothing here is a threshold.
"""

from __future__ import annotations

SIDES = ("left", "right")
SIDE_ALIASES = {"l": "left", "r": "right", "left": "left", "right": "right"}
MODALITIES = ("motor", "sensory")
SEXES = ("female", "male", "unspecified")
DIAGNOSES = ("cidp", "mmn", "gbs", "other")
# CIDP phenotypes as named by the EAN/PNS 2021 guideline (typical and its variants).
PHENOTYPES = ("typical", "distal", "multifocal", "focal", "motor", "sensory")
VISIT_STATUSES = ("draft", "final")
USER_ROLES = ("viewer", "clinician", "coordinator", "admin")
THERAPIES = ("ivig", "scig", "corticosteroid", "plasma_exchange", "rituximab", "efgartigimod", "other")
YES_NO = {
    "yes": True,
    "y": True,
    "true": True,
    "1": True,
    "no": False,
    "n": False,
    "false": False,
    "0": False,
}
ABSENT_WORDS = ("absent", "none", "no response", "nr")
LIMIT_PARAMETERS = (
    "distal_latency_ms",
    "cv_ms",
    "amplitude",
    "f_latency_ms",
    "distal_duration_ms",
    "peak_latency_ms",
)
LIMIT_BOUNDS = ("uln", "lln")
