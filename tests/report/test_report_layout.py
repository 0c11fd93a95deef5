"""Where things sit in the rendered report, read from the outside (html.parser-free: the document
model and pypdf): estimands known by their labels, per-participant listings in an appendix after the
efficacy sections, and a contents page whose page numbers are the pages the headings fall on.

Rendered from the invented LVT-201 rendering fixture (tests/report/fixtures.py), with a flow table
and a listing of participants left out added, as a run carries them (DEVELOPERS.md, Results).
"""
from __future__ import annotations

import copy
import csv
import io
import re

import pytest

pypdf = pytest.importorskip("pypdf")

from trialcut.report import render_documents
from trialcut.report.blocks import walk
from trialcut.report.csv_output import table_csv_text
from trialcut.report.document import build_document
from trialcut.report.sections_flow import LISTINGS_TITLE


@pytest.fixture(scope="module")
def results(report_fixtures):
    results = copy.deepcopy(report_fixtures.build_results(unlocked=True))
    endpoint = results["endpoints"][0]
    primary = endpoint["analyses"][0]
    endpoint["flow"] = [{"estimand": primary.get("estimand"), "population": primary.get("population"),
                         "table": {"title": "flow", "columns": ["visit", "step", "label", "Placebo", "Total"],
                                   "data": [["Week 12", "due", "Visit due by the cut-off", 10, 10],
                                            ["Week 12", "missing_no_event", "Value missing", 4, 4]]}}]
    primary["left_out"] = {"title": "left out", "columns": ["participant", "arm", "reason"],
                           "data": [["LVT-201-0007", "Placebo", "no value at any due visit"],
                                    ["LVT-201-0142", "Placebo", "every observed value set aside by the strategy"]]}
    return results


@pytest.fixture(scope="module")
def document(results):
    return build_document(results, draw=False)


def _tables(section):
    return [b.content for s in walk([section]) for b in s.blocks if b.kind == "table"]


def test_the_estimand_table_is_headed_by_labels_and_keeps_the_ids_in_a_footnote_and_the_csv(results, document):
    # Review finding: the columns were headed by plan ids ("main"), which a reader does not know.
    estimands = next(s for s in document.sections if s.anchor == "estimands")
    table = next(t for t in _tables(estimands) if t.title == "Estimands and their attributes")
    entries = results["plan"]["estimands"]
    labels = [c.label for c in table.header()]
    assert labels == ["Attribute", *[e["label"] for e in entries]]
    assert not any(e["id"] in labels for e in entries)
    assert all(f"{e['label']}: {e['id']}" in " ".join(table.footnotes) for e in entries)
    # A program reading the CSV file finds the estimands by their ids.
    header = next(csv.reader(io.StringIO(table_csv_text(table))))
    assert header == ["attribute", *[e["id"] for e in entries]]


def test_listings_of_participants_sit_in_an_appendix_after_the_efficacy_sections(results, document):
    anchors = [s.anchor for s in document.sections]
    flow, listings = anchors.index("flow"), anchors.index("listings")
    endpoints = [i for i, a in enumerate(anchors) if a.startswith("endpoint")]
    assert flow < min(endpoints) and listings > max(endpoints)
    assert anchors[-1] == "audit"                  # the audit record stays the last appendix
    assert document.sections[listings].title == LISTINGS_TITLE
    # The flow section keeps the counts and says where the names are; no listing is laid out there.
    flow_section = document.sections[flow]
    assert not [t for t in _tables(flow_section) if t.title.startswith("Participants without any value")]
    sentences = [b.content for s in walk([flow_section]) for b in s.blocks if b.kind == "paragraph"]
    assert any("2 participant(s)" in s and f"'{LISTINGS_TITLE}'" in s for s in sentences)
    listed = [t for t in _tables(document.sections[listings]) if t.title.startswith("Participants without any value")]
    assert len(listed) == 1
    assert [row[0] for row in listed[0].rows] == ["LVT-201-0007", "LVT-201-0142"]


def test_without_a_listing_there_is_no_listings_appendix(report_fixtures):
    document = build_document(report_fixtures.build_results(), draw=False)
    assert "listings" not in [s.anchor for s in document.sections]


def test_every_heading_is_on_the_page_the_contents_gives_it(results, tmp_path_factory):
    # The PDF's bookmarks are placed by the PDF engine where each heading falls; the contents page
    # numbers come from a cross-reference in the stylesheet.  Both must agree, and the contents
    # must read title then page number (the order a reader copying the text gets).
    written = render_documents(results, tmp_path_factory.mktemp("layout"))
    reader = pypdf.PdfReader(written["report.pdf"])
    pages = [" ".join(page.extract_text().split()) for page in reader.pages]
    headings = []

    def collect(items):
        for item in items:
            if isinstance(item, list):
                collect(item)
            else:
                headings.append((item.title, reader.get_destination_page_number(item) + 1))

    collect(reader.outline)
    # A bookmark is the heading's text: its section number, then its title (no space between).
    numbered = [(m.group(1), m.group(2).strip(), page) for title, page in headings
                if (m := re.match(r"(\d+(?:\.\d+)*)(\D.*)", title))]
    assert any(words == LISTINGS_TITLE for _, words, _ in numbered)
    contents = " ".join(pages[1:5])
    for number, words, page in numbered:
        title = f"{number} {words}"
        assert re.search(rf"{re.escape(number)} {re.escape(words)} {page}\b", contents), (title, page)
        assert words in pages[page - 1], (title, page)
