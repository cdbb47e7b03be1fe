"""The shipped reference tables are well-formed: every row sourced, names consistent, numbers parse."""

from __future__ import annotations

from tracker.domain import catalogue
from tracker.domain.plausibility import ranges, scales
from tracker.domain.vocabulary import MODALITIES


def test_nerve_aliases_are_unique_and_canonical():
    seen: dict[str, str] = {}
    for info in catalogue.nerves().values():
        for word in (info.name, *info.aliases):
            assert word not in seen, f"{word} names both {seen[word]} and {info.name}"
            seen[word] = info.name
            assert word == catalogue.normalise_word(word)
        assert set(info.modalities) <= set(MODALITIES)
        assert info.limb in ("upper", "lower")


def test_every_site_belongs_to_a_known_nerve_and_modality():
    for (nerve, modality), labels in catalogue._site_lookup().items():
        assert nerve in catalogue.nerves()
        assert modality in catalogue.nerves()[nerve].modalities
        assert labels


def test_design_contract_nerve_names_are_known():
    # DESIGN.md §4.1 lists these names and the peroneal alias.
    for word in (
        "median",
        "ulnar",
        "fibular",
        "peroneal",
        "tibial",
        "radial",
        "sural",
        "superficial_fibular",
    ):
        assert catalogue.canonical_nerve(word) is not None
    assert catalogue.canonical_nerve("Peroneal") == "fibular"


def test_plausibility_ranges_are_sourced_and_ordered():
    for rule in ranges().values():
        assert rule.lower < rule.upper
        assert rule.source.strip()
    assert ranges()["motor_velocity_m_per_s"].overridable
    assert not ranges()["temperature_c"].overridable


def test_scale_ranges_match_the_design_contract():
    # DESIGN.md §4.2: INCAT 0–10, MRC sum 0–60, I-RODS centile 0–100.
    table = scales()
    assert (table["incat"].minimum, table["incat"].maximum) == (0, 10)
    assert (table["mrc_sum"].minimum, table["mrc_sum"].maximum) == (0, 60)
    assert (table["i_rods"].minimum, table["i_rods"].maximum) == (0, 100)
    assert all(s.source.strip() for s in table.values())
