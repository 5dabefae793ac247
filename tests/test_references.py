"""The methods appendix's bibliography: every entry identified, its checking status stated, none from memory.

The DOI checks follow the DOI Handbook (International DOI Foundation), section 2.2 "Syntax": a DOI is
``prefix/suffix``, the prefix being the directory indicator ``10`` and a registrant code of dot-separated
digits, the suffix any printable characters; DOIs are case-insensitive.  ISBN-10 check digits follow
ISO 2108 (weighted sum of the ten digits, weights 10 to 1, divisible by 11; ``X`` stands for 10).
"""

from __future__ import annotations

import re
from types import SimpleNamespace

import pytest

from wetlandflow.report.references import (
    BIBLIOGRAPHY,
    CHECKED_STATES,
    DOI_PATTERN,
    METHODS,
    Citations,
    Reference,
    cite_features,
    collect,
)
from wetlandflow.report.text import Bullets, Paragraph, section_references


def _isbn10_ok(isbn: str) -> bool:
    digits = isbn.replace("-", "")
    if not re.fullmatch(r"\d{9}[\dX]", digits):
        return False
    values = [10 if ch == "X" else int(ch) for ch in digits]
    return sum(w * v for w, v in zip(range(10, 0, -1), values, strict=True)) % 11 == 0


def test_every_entry_has_a_stable_identifier_and_a_checked_status():
    for key, ref in BIBLIOGRAPHY.items():
        assert ref.key == key
        assert ref.doi or ref.identifier, f"{key}: no DOI and no other stable identifier"
        assert ref.checked in CHECKED_STATES, f"{key}: checked={ref.checked!r}"
        assert ref.stable_id() in ref.citation(), f"{key}: identifier not shown in the citation"


def test_no_entry_is_from_memory_and_every_method_source_is_identified():
    assert not [k for k, r in BIBLIOGRAPHY.items() if "memory" in r.checked]
    cited = {k for keys in METHODS.values() for k in keys}
    assert cited <= set(BIBLIOGRAPHY)
    # The sources a run cites for its steps were at least checked against published reference lists.
    assert all(BIBLIOGRAPHY[k].checked in ("verified", "secondary") for k in cited)


@pytest.mark.reference
def test_dois_are_well_formed_per_the_doi_handbook_syntax():
    """DOI Handbook 2.2: ``10.<registrant>/<suffix>``; no resolver prefix, no spaces, unique per entry."""
    dois = [r.doi for r in BIBLIOGRAPHY.values() if r.doi]
    assert len(dois) >= 30
    for doi in dois:
        assert DOI_PATTERN.fullmatch(doi), doi
        assert not doi.lower().startswith(("doi:", "http")), doi
    assert len({d.lower() for d in dois}) == len(dois)  # DOIs are case-insensitive
    # The pattern itself, on the Handbook's form and on malformed strings.
    assert DOI_PATTERN.fullmatch("10.1000/182")
    for bad in ("10.12/abc", "11.1000/182", "10.1000", "10.1000/", "doi 10.1000/182"):
        assert not DOI_PATTERN.fullmatch(bad), bad


@pytest.mark.reference
def test_other_identifiers_are_well_formed():
    """ISBN-10 check digit per ISO 2108; NASA technical-report ids are 11 digits; ADS codes are 19 characters
    (year, journal, volume, page, initial; the ADS bibcode definition); arXiv identifiers follow arXiv's
    identifier scheme (YYMM.number since April 2007)."""
    others = {k: r.identifier for k, r in BIBLIOGRAPHY.items() if not r.doi}
    assert others, "every entry has a DOI: the non-DOI branch is untested"
    for key, ident in others.items():
        kind, _, value = ident.partition(" ")
        if kind == "ISBN":
            assert _isbn10_ok(value), (key, ident)
        elif ident.startswith("NASA NTRS "):
            assert re.fullmatch(r"\d{11}", ident.removeprefix("NASA NTRS ")), (key, ident)
        elif kind == "arXiv":  # arXiv identifiers since April 2007: YYMM.NNNN (to 2014) or YYMM.NNNNN
            assert re.fullmatch(r"\d{4}\.\d{4,5}", value), (key, ident)
            yymm = int(value[:4])
            assert 704 <= yymm and 1 <= yymm % 100 <= 12, (key, ident)
        elif kind == "ADS":
            assert len(value) == 19 and value.startswith(str(BIBLIOGRAPHY[key].year)), (key, ident)
        else:
            pytest.fail(f"{key}: unknown identifier kind {ident!r}")
    assert _isbn10_ok("0-471-16240-X") and not _isbn10_ok("0-471-16240-9")


@pytest.mark.reference
def test_corrected_gitelson_entry_matches_the_journal_record():
    """Gitelson & Merzlyak (1994), J. Photochem. Photobiol. B: Biol. 22(3), 247-252: the paper at those pages
    is "Quantitative estimation of chlorophyll-a using reflectance spectra: Experiments with autumn chestnut
    and maple leaves" (doi:10.1016/1011-1344(93)06963-4); the "autumn senescence ... leaves" title is the
    authors' J. Plant Physiol. 143, 286-292 paper."""
    ref = BIBLIOGRAPHY["gitelson1994"]
    assert ref.title.startswith("Quantitative estimation of chlorophyll-a")
    assert "22(3), 247-252" in ref.source and ref.doi == "10.1016/1011-1344(93)06963-4"


@pytest.mark.reference
def test_class_system_entry_matches_the_books_front_matter():
    """National Wetlands Working Group (1997), The Canadian Wetland Classification System, 2nd edition, eds.
    B.G. Warner and C.D.A. Rubec, Wetlands Research Centre, University of Waterloo: title page and imprint
    (ISBN 0-662-25857-6), read in the book's front matter."""
    ref = BIBLIOGRAPHY["nwwg1997"]
    assert (ref.authors, ref.year, ref.title) == ("National Wetlands Working Group", 1997,
                                                  "The Canadian Wetland Classification System")
    assert "2nd edition" in ref.source and "Warner, B. G., Rubec, C. D. A. (eds.)" in ref.source
    assert "Wetlands Research Centre, University of Waterloo" in ref.source
    assert ref.identifier == "ISBN 0-662-25857-6" and _isbn10_ok("0-662-25857-6")
    assert ref.short() == "National Wetlands Working Group (1997)"  # a body as author: no initials to drop
    assert METHODS["class_definitions"] == ("nwwg1997",)


def _references_text(citations: Citations) -> str:
    section = section_references(SimpleNamespace(citations=citations))
    parts = []
    for block in section.blocks:
        if isinstance(block, Paragraph):
            parts.append(block.text)
        elif isinstance(block, Bullets):
            parts.extend(block.items)
    return "\n".join(parts)


def test_reference_section_shows_identifiers_and_no_from_memory_mark():
    """Every method a run can cite, plus every bibliography entry, rendered as the report's reference list."""
    citations = collect((method, method.replace("_", " ")) for method in METHODS)
    for ref in BIBLIOGRAPHY.values():
        citations.add(ref, "bibliography")
    text = _references_text(citations)
    assert "memory" not in text.lower()
    for ref in BIBLIOGRAPHY.values():
        line = next(item for item in text.splitlines() if item.startswith(ref.citation()))
        assert ref.stable_id() in line
        marked = "[not verified in the original" in line
        assert marked == (ref.checked != "verified"), line


def test_reference_section_marks_unverified_and_unmatched_sources():
    citations = Citations()
    citations.add(Reference("x", "Doe, J.", 1999, "A title", "A journal 1, 1-2", "not verified",
                            doi="10.1000/182"), "feature a")
    cite_features(citations, {"b": {"reference": "Nobody (1901) An unlisted work"}}, {})
    lines = _references_text(citations).splitlines()
    doe = next(line for line in lines if line.startswith("Doe"))
    assert "doi:10.1000/182 [not verified in the original] Used for: feature a." in doe
    nobody = next(line for line in lines if line.startswith("Nobody"))
    assert "[as recorded with the feature; not verified in the original]" in nobody
