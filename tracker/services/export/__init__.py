"""Research export (``ncs-tracker export``): analysis-ready visit / nerve / segment / long tables,
de-identified by default, with a data dictionary and a manifest. Entry points: :func:`write_export`
(files, chunk by chunk), :func:`export_frame` (one DataFrame), :class:`ExportOptions`,
:func:`neutralise_text` (spreadsheet safety).

Inner modules: ``tables`` (options, plan, per-chunk tables), ``columns`` (every column: type, unit, meaning →
dictionary and Parquet schema), ``files`` (CSV / Parquet / xlsx writers), ``response`` (treatment-response
columns), ``deidentify`` (export ids, date shifts, who may ask for identified data), ``run`` (the two entry
points).
"""

from tracker.services.export.files import neutralise_text
from tracker.services.export.run import export_frame, write_export
from tracker.services.export.tables import ExportOptions

__all__ = ["ExportOptions", "export_frame", "neutralise_text", "write_export"]
