"""Inserting the nerve tests and stimulation sites of written visits, linked by the batch's positions."""

from __future__ import annotations

import numpy as np
import pandas as pd
from sqlalchemy.orm import Session

from tracker.db.models import NerveTest, StimulationSite
from tracker.services.importing.bulk_insert import _allocate_ids, _bulk_insert
from tracker.services.importing.measurements_check import MeasurementBatch
from tracker.services.importing.measurements_columns import SITE_VALUES


def _written_positions(batch: MeasurementBatch, written: pd.DataFrame) -> np.ndarray | None:
    """The rows of ``batch.visits`` that ``written`` holds (its index, when it was cut from a frame aligned
    with ``batch.visits``, as :func:`_store_measurements` makes it), else ``None``."""
    if batch.site_test is None or batch.test_visit is None:
        return None
    positions = written.index.to_numpy()
    if positions.dtype.kind not in "iu" or (len(positions) and positions.max() >= len(batch.visits)):
        return None
    own = batch.visits.iloc[positions]
    if not (
        np.array_equal(own["patient"].to_numpy(), written["patient"].to_numpy())
        and np.array_equal(own["visit_date"].to_numpy(), written["visit_date"].to_numpy())
    ):
        return None
    return positions


def _insert_nerve_tests(session: Session, batch: MeasurementBatch, written: pd.DataFrame) -> None:
    """Insert the nerve tests and sites of the written visits (Core executemany: no ORM overhead).

    Nerve tests and sites are linked to their visits by the batch's positions (:attr:`MeasurementBatch.
    site_test`, :attr:`~MeasurementBatch.test_visit`): a merge on the text keys of every site cost more
    than the rest of this function. Rows are inserted in the batch's order either way.
    """
    if written.empty:
        return
    key = ["patient", "visit_date"]
    test_key = ["nerve", "side", "modality"]
    positions = _written_positions(batch, written)
    if positions is None:
        tests = batch.nerve_tests.merge(written, on=key, how="inner")
    else:
        visit_ids = np.full(len(batch.visits), -1, dtype=np.int64)
        visit_ids[positions] = written["visit_id"].astype(int).to_numpy()
        test_visit_ids = visit_ids[batch.test_visit]
        test_kept = test_visit_ids >= 0
        tests = batch.nerve_tests[test_kept].reset_index(drop=True)
        tests["visit_id"] = test_visit_ids[test_kept]
    tests["visit_id"] = tests["visit_id"].astype(int)
    tests["f_absent"] = tests["f_absent"].astype(bool)
    test_columns = [
        "visit_id",
        *test_key,
        "recording_site",
        "temperature_c",
        "lff_hz",
        "f_latency_ms",
        "f_absent",
        "f_persistence_pct",
        "wrist_entrapment",
    ]
    tests["nerve_test_id"] = _allocate_ids(session, NerveTest.__table__, len(tests))
    _bulk_insert(
        session, NerveTest.__table__, tests.rename(columns={"nerve_test_id": "id"}), ["id", *test_columns]
    )
    if positions is None:
        sites = batch.sites.merge(
            tests[[*key, *test_key, "nerve_test_id"]], on=[*key, *test_key], how="inner"
        )
    else:
        test_ids = np.full(len(batch.nerve_tests), -1, dtype=np.int64)
        test_ids[np.flatnonzero(test_kept)] = tests["nerve_test_id"].to_numpy()
        site_test_ids = test_ids[batch.site_test]
        site_kept = site_test_ids >= 0
        sites = batch.sites[site_kept].reset_index(drop=True)
        sites["nerve_test_id"] = site_test_ids[site_kept]
    sites["nerve_test_id"] = sites["nerve_test_id"].astype(int)
    _bulk_insert(session, StimulationSite.__table__, sites, ["nerve_test_id", *SITE_VALUES])
