"""Treatment response of a patient and the course of every patient (issue: is the patient better, stable or
worse?). Entry points: :func:`patient_response` (command ``response``, follow-up page, report),
:func:`response_json` (the DESIGN.md §5 JSON), :func:`cohort_course` (Patients page, benchmark).

The arithmetic is pure and lives in :mod:`tracker.response`; this package loads the data and assembles it.
"""

from tracker.services.response.cohort import cohort_course, cohort_response
from tracker.services.response.patient import PatientResponse, TrendRow, patient_response, response_json

__all__ = ["PatientResponse", "TrendRow", "cohort_course", "cohort_response", "patient_response", "response_json"]
