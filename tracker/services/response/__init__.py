"""Treatment response of a patient and the course of every patient (issue: is the patient better, stable or
worse?). Entry points: :func:`patient_response` (command ``response``, follow-up page, report),
:func:`response_json` (the DESIGN.md §5 JSON), :func:`cohort_course` (Patients page), :func:`cohort_response`
(every patient, benchmark), :func:`response_view` (what the dashboard pages show), :func:`save_assessments` /
:func:`saved_assessments` (what was shown, kept with rule set, version and visits compared).

The arithmetic is pure and lives in :mod:`tracker.response`; this package loads the data and assembles it.
"""

from tracker.services.response.cohort import cohort_course, cohort_response
from tracker.services.response.patient import PatientResponse, TrendRow, patient_response, response_json
from tracker.services.response.store import save_assessments, saved_assessments
from tracker.services.response.view import (
    STEP_COLUMNS,
    RegimenCard,
    ResponseView,
    build_view,
    response_view,
    rule_set_choices,
    sdc_words,
    with_course,
)

__all__ = [
    "PatientResponse",
    "RegimenCard",
    "ResponseView",
    "STEP_COLUMNS",
    "TrendRow",
    "build_view",
    "cohort_course",
    "cohort_response",
    "patient_response",
    "response_json",
    "response_view",
    "save_assessments",
    "saved_assessments",
    "rule_set_choices",
    "sdc_words",
    "with_course",
]
