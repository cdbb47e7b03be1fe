"""Research export (``ncs-tracker export``): analysis-ready visit / nerve / segment / long tables,
de-identified by default, with a data dictionary, the limits and criteria tables and a manifest, so
that the export folder explains itself. Entry points: :func:`write_export` (files, chunk by chunk),
:func:`export_frame` (one DataFrame), :class:`ExportOptions`, :func:`neutralise_text` (spreadsheet safety).

Types a statistician can load without a cast: whole numbers (counts, ages, days) are nullable integers
(pandas Int64, Parquet int32), flags nullable booleans, outcomes categories (ordered where the criteria rank
their levels). Recorded absences (F-waves absent, no recordable response) are flagged findings at every
level, never empty cells that look like "not measured".

Inner modules: ``tables`` (options, plan, per-chunk tables), ``columns`` (every column: type, unit, meaning →
dictionary and Parquet schema), ``files`` (CSV / Parquet / xlsx writers), ``reference`` (the limits and
criteria tables), ``response`` (treatment-response columns), ``deidentify`` (export ids, date shifts, age
top-coding, who may ask for identified data), ``run`` (the two entry points, manifest, closing summary).
"""

from tracker.services.export.files import neutralise_text
from tracker.services.export.run import export_frame, write_export
from tracker.services.export.tables import ExportOptions

__all__ = ["ExportOptions", "export_frame", "neutralise_text", "write_export"]
