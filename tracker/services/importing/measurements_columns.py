"""Column names of a measurements table (DESIGN.md §4.1) and the level each value belongs to.

A row is one stimulation site; nerve-, visit- and patient-level values are repeated on the rows of their
nerve test, visit or patient and must agree there (:mod:`.measurements_groups`).
"""

from __future__ import annotations

REQUIRED = ["patient", "visit_date", "nerve", "side", "modality", "site_order", "distance_mm", "latency_ms"]
AMPLITUDES = ["amplitude_mv", "amplitude_uv"]
OPTIONAL = [
    "site",
    "peak_latency_ms",
    "duration_ms",
    "area_mvms",
    "temperature_c",
    "lff_hz",
    "f_latency_ms",
    "f_persistence_pct",
    "recording_site",
    "height_cm",
    "sex",
    "birth_year",
    "diagnosis",
    "phenotype",
    "wrist_entrapment",
]
KNOWN = REQUIRED + AMPLITUDES + OPTIONAL
NERVE_LEVEL = [
    "temperature_c",
    "lff_hz",
    "f_latency_ms",
    "f_absent",
    "f_persistence_pct",
    "recording_site",
    "wrist_entrapment",
]
VISIT_LEVEL = ["height_cm", "diagnosis", "phenotype"]
PATIENT_LEVEL = ["sex", "birth_year"]
TEST_KEY = ["patient", "visit_date", "nerve", "side", "modality"]
VISIT_KEY = ["patient", "visit_date"]
SITE_VALUES = [
    "site_order",
    "label",
    "distance_mm",
    "latency_ms",
    "peak_latency_ms",
    "amplitude_mv",
    "amplitude_uv",
    "duration_ms",
    "area_mvms",
]
