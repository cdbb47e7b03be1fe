"""One citations table: every threshold and default limit names its publication by key, every key resolves
to a full citation of the publication itself (authors, title, journal or publisher, year), never a website
summary, and the traces still show the citation."""

from __future__ import annotations

import csv
import re
from importlib import resources

import pytest

from criteria_cases import Motor, Sensory, Visit, evaluate, finding
from tracker.criteria import engine, limits, thresholds
from tracker.criteria.citations import citations, keys_of, source_text

# Words that mark a web page or a summary service rather than a publication (common practice, no source).
WEBSITE_MARKS = (
    "http",
    "www.",
    ".com",
    ".org",
    ".net",
    "website",
    "summarised at",
    "summary page",
    "best practice",
    "medicalalgorithms",
    "guideline.gov",
    "clearinghouse summary",
)


def _table_files() -> list[str]:
    folder = resources.files("tracker.criteria.tables")
    return sorted(f.name for f in folder.iterdir() if f.name.endswith(".csv") and f.name != "temperature.csv")


def _rows(package: str, name: str) -> list[dict[str, str]]:
    text = resources.files(package).joinpath(name).read_text(encoding="utf-8")
    return list(csv.DictReader((line for line in text.splitlines() if not line.startswith("#")), strict=True))


def test_every_criteria_set_has_its_table():
    assert sorted(f.removesuffix(".csv") for f in _table_files()) == sorted(engine.available())


@pytest.mark.parametrize("name", _table_files())
def test_every_threshold_row_cites_known_keys_and_no_long_text(name):
    known = citations()
    for row in _rows("tracker.criteria.tables", name):
        assert None not in row and None not in row.values(), row  # the right number of fields
        keys = keys_of(row["citation"])
        assert keys, f"{name} {row['item']}: no citation key"
        assert set(keys) <= set(known), f"{name} {row['item']}: unknown key in {keys}"
        # The citation text lives in the citations table, not repeated on each row.
        assert "source" not in row
        assert not any(known[k].title in row["note"] for k in keys), (
            f"{name} {row['item']}: citation repeated in the note"
        )


def test_every_default_limit_row_cites_a_known_key():
    known = citations()
    for row in _rows("tracker.reference", "limits_default.csv"):
        assert None not in row and None not in row.values(), row
        assert keys_of(row["citation"]) and set(keys_of(row["citation"])) <= set(known), row


def test_every_citation_is_a_publication_not_a_website():
    for key, citation in citations().items():
        assert citation.authors.strip() and citation.title.strip() and citation.published_in.strip(), key
        assert 1950 <= citation.year <= 2030 and str(citation.year) in citation.published_in, key
        assert citation.status in ("verified", "memory"), key
        text = citation.text()
        assert citation.authors.split(",")[0] in text and citation.title[:40] in text, key
        for mark in WEBSITE_MARKS:
            assert mark not in text.lower(), f"{key}: {mark!r} in {text!r}"
        if citation.doi:
            assert re.fullmatch(r"10\.\d{4,9}/\S+", citation.doi), key


@pytest.mark.parametrize("criteria", engine.available())
def test_loaded_sources_are_full_citations_without_websites(criteria):
    known = citations()
    for row in thresholds.load(criteria).rows:
        assert row.citations
        for key in row.citations:
            assert known[key].text() in row.source
        for mark in WEBSITE_MARKS:
            assert mark not in row.source.lower(), f"{criteria} {row.item}: {mark!r}"


def test_unknown_key_and_malformed_quoting_are_refused():
    header = (
        "item,parameter,nerve,lff_hz,derived_lff_hz,derived_lff_status,comparator,reference,value,unit,"
        "excluded_nerves,description,citation,note,status,version\n"
    )
    good = 'cv,cv,*,,,,le,lln,0.7,m/s,,"(b) velocity",efns-pns-2010-cidp,"a note",verified,1\n'
    assert thresholds.parse("x", header + good).rows[0].citations == ("efns-pns-2010-cidp",)
    with pytest.raises(KeyError, match="no-such-key"):
        thresholds.parse("x", header + good.replace("efns-pns-2010-cidp", "no-such-key"))
    # Text after a closing quote (the old supportive rows of efns-pns-2010-cidp.csv had this) is an error.
    with pytest.raises(csv.Error):
        thresholds.parse("x", header + good.replace('"a note"', '"a note" (more text)'))
    with pytest.raises(ValueError, match="number of fields"):
        thresholds.parse("x", header + good.replace(",verified,1", ",verified,1,extra"))


def test_efns_2010_supportive_rows_cite_the_guideline():
    # Van den Bergh PYK et al. Eur J Neurol 2010;17:356–363 (supportive criteria, item 3): the rows cite the
    # guideline itself and say the item was read in a secondary summary.
    rows = [
        r
        for r in thresholds.load("efns-pns-2010-cidp").rows
        if r.item in ("sensory_cv", "sensory_cv_low_snap", "sensory_switch", "sural_sparing")
    ]
    assert len(rows) == 4
    for row in rows:
        assert row.citations == ("efns-pns-2010-cidp",)
        assert row.source.endswith(
            "supportive item 3 read in a secondary summary of the guideline, not in the guideline text"
        )


def test_source_text_joins_keys_and_note():
    text = source_text("hadden-1998|rajabally-2015", "a note")
    assert text.startswith("Hadden RDM, Cornblath DR, Hughes RAC, et al")
    assert "; Rajabally YA, Durand M-C, Mitchell J, Orlikowski D, Nicolas G." in text and text.endswith(
        " — a note"
    )


def test_traces_still_show_the_citation():
    # EFNS/PNS 2010 (Van den Bergh PYK et al. Eur J Neurol 2010;17:356–363): median DML ≥ 1.5 × ULN 4.4 ms.
    result = evaluate([Visit([Motor("median", dml=7.0), Sensory("sural")])], "efns-pns-2010-cidp")
    row = finding(result, "median", "dml")
    assert row["status"] == "met"
    assert (
        "Van den Bergh PYK, Hadden RDM, Bouche P, et al. European Federation of Neurological Societies"
        in row["source"]
    )
    assert "Eur J Neurol 2010;17:356–363, doi:10.1111/j.1468-1331.2009.02930.x" in row["source"]
    # The normal limit cites the handbook (Preston & Shapiro appendix, median DML ULN 4.4 ms).
    assert row["limit_source"].startswith(
        "Preston DC, Shapiro BE. Electromyography and Neuromuscular Disorders"
    )
    assert limits.default_limits()["source"].str.len().min() > 40
