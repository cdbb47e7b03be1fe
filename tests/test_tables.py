"""Reading files: the fast and the careful CSV readers agree, and row numbers match a spreadsheet's."""

from __future__ import annotations

import pandas as pd
import pytest

from conftest import DEMO
from tracker.errors import InputRejected
from tracker.services import tables
from tracker.services.importing.measurements_check import validate_measurements

HEADER = "patient,visit_date,nerve,side,modality,site_order,distance_mm,latency_ms,amplitude_mv\n"


def test_fast_and_careful_readers_give_the_same_cells(monkeypatch):
    fast = tables.read_table(DEMO / "measurements.csv").cells
    monkeypatch.setattr(tables, "_read_csv_fast", lambda text: None)
    careful = tables.read_table(DEMO / "measurements.csv").cells
    pd.testing.assert_frame_equal(fast, careful, check_dtype=False)


def test_blank_line_keeps_spreadsheet_row_numbers(tmp_path):
    path = tmp_path / "gap.csv"
    path.write_text(
        HEADER
        + (
            "T-1,2024-01-10,median,right,motor,1,70,4.0,6.0\n\n"
            "T-1,2024-01-10,medain,right,motor,1,70,4.0,6.0\n"
        ),
        encoding="utf-8",
    )
    cells = tables.read_table(path).cells
    assert cells[tables.ROW].tolist() == [2, 4]  # row 3 is the blank line, as a spreadsheet shows it
    with pytest.raises(InputRejected) as refused:
        validate_measurements(cells)
    assert any(p.row == 4 and p.column == "nerve" for p in refused.value.problems)


def test_cells_are_trimmed_and_headers_normalised(tmp_path):
    path = tmp_path / "spaces.csv"
    path.write_text(
        " Patient , Visit_Date ,NERVE,side,modality,site_order,distance_mm,latency_ms,amplitude_mv\n"
        "  T-1 , 2024-01-10 , median ,R,Motor,1,70, 4.0 ,6.0\n",
        encoding="utf-8",
    )
    cells = tables.read_table(path).cells
    assert list(cells.columns[:3]) == ["patient", "visit_date", "nerve"]
    assert cells.loc[0, "patient"] == "T-1" and cells.loc[0, "latency_ms"] == "4.0"
    batch = validate_measurements(cells)
    assert batch.sites.loc[0, "side"] == "right" and batch.sites.loc[0, "latency_ms"] == 4.0
