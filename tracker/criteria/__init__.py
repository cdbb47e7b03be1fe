"""The criteria engine: published electrodiagnostic criteria applied nerve by nerve, with a trace.

Pure Python and pandas: no database, no UI. One visit (for a report) and a whole cohort (for research) go
through the same vectorised rules. Thresholds are data (``tables/*.csv``) with their citation and whether
they were verified or are from memory; the set modules hold comparison and combination logic only.
"""
