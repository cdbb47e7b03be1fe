"""Reading the data files shipped in ``tracker/reference/`` (each row carries its source)."""

from __future__ import annotations

import csv
from importlib import resources


def read_reference_csv(name: str) -> list[dict[str, str]]:
    """Rows of ``tracker/reference/<name>`` as dicts of text."""
    text = resources.files("tracker.reference").joinpath(name).read_text(encoding="utf-8")
    return list(csv.DictReader(text.splitlines()))
