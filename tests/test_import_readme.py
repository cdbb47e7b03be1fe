"""The README lists every nerve and stimulation-site name the importer accepts, with
their aliases, as the reference files define them (issue 10, item 16): a name added to
tracker/reference/ without the README fails."""

from __future__ import annotations

import csv
import re

from conftest import ROOT

REFERENCE = ROOT / "tracker" / "reference"


def _readme_table() -> dict[str, list[str]]:
    """The README's nerve-and-site table: nerve → its row's cells."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("**Nerve and site names**", 1)[1]
    rows = {}
    for line in section.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if line.startswith("| `") and len(cells) == 4:
            rows[cells[0].strip("`")] = cells
        elif rows and not line.startswith("|"):
            break
    return rows


def _names(cell: str) -> list[str]:
    return re.findall(r"`([^`]+)`", cell)


def _split(cell: str) -> list[str]:
    return [part for part in cell.split("|") if part]


def test_readme_lists_every_nerve_with_its_aliases_and_modalities():
    table = _readme_table()
    with open(REFERENCE / "nerves.csv", encoding="utf-8", newline="") as handle:
        nerves = list(csv.DictReader(handle))
    assert sorted(table) == sorted(n["nerve"] for n in nerves)
    for nerve in nerves:
        cells = table[nerve["nerve"]]
        assert sorted(_names(cells[1])) == sorted(_split(nerve["aliases"])), nerve["nerve"]
        for column, modality in ((2, "motor"), (3, "sensory")):
            studied = modality in _split(nerve["modalities"])
            assert (cells[column] != "—") == studied, (nerve["nerve"], modality, cells[column])


def test_readme_lists_every_site_with_its_aliases():
    table = _readme_table()
    with open(REFERENCE / "sites.csv", encoding="utf-8", newline="") as handle:
        sites = list(csv.DictReader(handle))
    expected: dict[tuple[str, int], list[str]] = {}
    for site in sites:
        column = 2 if site["modality"] == "motor" else 3
        expected.setdefault((site["nerve"], column), []).extend([site["site"], *_split(site["aliases"])])
    for (nerve, column), names in expected.items():
        assert sorted(_names(table[nerve][column])) == sorted(names), (nerve, column)
    for nerve, cells in table.items():  # nothing listed that the reference files lack
        for column in (2, 3):
            assert _names(cells[column]) == [] or (nerve, column) in expected, (nerve, column)
