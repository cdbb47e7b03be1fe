"""The nerves and stimulation sites the tool knows, read from ``tracker/reference/*.csv``.

Names are canonical snake_case words; aliases (``peroneal`` for ``fibular``…) are accepted on input and
stored under the canonical name.
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass
from functools import cache

from tracker.domain.reference_files import read_reference_csv


@dataclass(frozen=True, slots=True)
class NerveInfo:
    name: str
    aliases: tuple[str, ...]
    modalities: tuple[str, ...]
    limb: str  # "upper" or "lower": decides which temperature minimum applies
    motor_recording_site: str | None
    sensory_recording_site: str | None


def _split(cell: str) -> tuple[str, ...]:
    return tuple(part.strip() for part in cell.split("|") if part.strip())


def normalise_word(text: str) -> str:
    """Lower-case, trimmed, spaces and hyphens as underscores: ``'Below Elbow'`` → ``'below_elbow'``."""
    return "_".join(text.strip().lower().replace("-", " ").replace("'", "").split())


@cache
def nerves() -> dict[str, NerveInfo]:
    """Canonical nerve name → its description."""
    result = {}
    for row in read_reference_csv("nerves.csv"):
        result[row["nerve"]] = NerveInfo(
            name=row["nerve"],
            aliases=_split(row["aliases"]),
            modalities=_split(row["modalities"]),
            limb=row["limb"],
            motor_recording_site=row["motor_recording_site"] or None,
            sensory_recording_site=row["sensory_recording_site"] or None,
        )
    return result


@cache
def _nerve_lookup() -> dict[str, str]:
    lookup = {}
    for info in nerves().values():
        lookup[info.name] = info.name
        for alias in info.aliases:
            lookup[alias] = info.name
    return lookup


@cache
def _site_lookup() -> dict[tuple[str, str], dict[str, str]]:
    """(nerve, modality) → {accepted label: canonical label}."""
    table: dict[tuple[str, str], dict[str, str]] = {}
    for row in read_reference_csv("sites.csv"):
        labels = table.setdefault((row["nerve"], row["modality"]), {})
        labels[row["site"]] = row["site"]
        for alias in _split(row["aliases"]):
            labels[alias] = row["site"]
    return table


def suggest(word: str, choices: list[str] | tuple[str, ...] | set[str]) -> str | None:
    """The closest known word, for a "did you mean …?" hint, or ``None``."""
    close = difflib.get_close_matches(word, sorted(choices), n=1, cutoff=0.6)
    return close[0] if close else None


def canonical_nerve(text: str) -> str | None:
    """Canonical nerve name for ``text`` (alias-aware), or ``None`` when unknown."""
    return _nerve_lookup().get(normalise_word(text))


def known_nerve_words() -> list[str]:
    return sorted(_nerve_lookup())


def canonical_site(nerve: str, modality: str, text: str) -> str | None:
    """Canonical stimulation-site label for this nerve and modality, or ``None`` when unknown."""
    return _site_lookup().get((nerve, modality), {}).get(normalise_word(text))


def known_site_words(nerve: str, modality: str) -> list[str]:
    return sorted(_site_lookup().get((nerve, modality), {}))
