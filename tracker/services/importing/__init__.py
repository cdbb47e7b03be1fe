"""Import a measurements, treatments, scores or patients file: validate everything, then write in one
transaction.

The caller owns the transaction: on any :class:`~tracker.errors.InputRejected` nothing has been written.
Re-importing identical content changes no clinical data; changed content of a stored visit (or treatment,
or score) is refused unless ``replace`` is given, and a replaced visit keeps its earlier values in
``visit_revisions``.

Concurrent writers: an import reads the stored versions of its visits, then takes the write lock
(:func:`tracker.db.locking.take_write_lock`) and reads again before it compares and writes, so that two
imports of the same visit never both insert it, and a visit changed by someone else after the file's base
version (its ``visit_version`` column, else the version this import first read) is not replaced unless
``force``.

Modules, by concept: :mod:`.api` (entry points), :mod:`.dispatch` (one table checked and stored by its kind;
the import's audit event), :mod:`.blocks` (a long file in blocks); the file checks
:mod:`.measurements_check` (with :mod:`.measurements_columns`, :mod:`.measurements_groups` — checks across
rows — and :mod:`.fingerprints`), :mod:`.clinical_check` (treatments, scores), :mod:`.patients_check`; storing
:mod:`.measurements_store` (with :mod:`.nerve_tests`, :mod:`.visit_versions`, :mod:`.visit_warnings`),
:mod:`.clinical_store`, :mod:`.patients_store`; shared :mod:`.report`, :mod:`.stored`, :mod:`.bulk_insert`.
Callers use the names below; ``history`` and ``entry`` also take the column lists, ``MeasurementBatch``
and ``fingerprints_of`` from the modules that define them.
"""

from tracker.services.importing.api import import_file, import_table
from tracker.services.importing.report import ImportReport
from tracker.services.importing.visit_versions import VERSION_COLUMN

__all__ = ["VERSION_COLUMN", "ImportReport", "import_file", "import_table"]
