"""The editable copy (report.docx) beside the PDF, and the appendix's labels in every output.

The DOCX is read back with python-docx (an independent reader of the format); the table titles
it holds are compared with the HTML's captions (html text) and the PDF's text (pypdf).
Re-rendering a run gives the same DOCX bytes: tests/report/test_render.py compares every file
of a re-rendering, report.docx among them.
"""
from __future__ import annotations

import html
import re
import unicodedata
import zipfile

import pytest

pypdf = pytest.importorskip("pypdf")
docx = pytest.importorskip("docx")

from trialcut.record.environment import capture_environment
from trialcut.report import render_documents
from trialcut.report.document import build_document
from trialcut.report.docx_output import table_titles, write_docx

from tests.report import test_appendix as APPENDIX_TEST


def squeezed(text: str) -> str:
    """Text without whitespace, ligatures unfolded: how titles are compared across formats."""
    return re.sub(r"\s+", "", unicodedata.normalize("NFKC", text))


@pytest.fixture(scope="module")
def results(report_fixtures):
    return report_fixtures.build_results(dummy_arms=True)


@pytest.fixture(scope="module")
def audit():
    audit = APPENDIX_TEST.old_style_audit()
    audit["environment"] = capture_environment()
    return audit


@pytest.fixture(scope="module")
def rendered(results, audit, tmp_path_factory):
    return render_documents(results, tmp_path_factory.mktemp("copy"), audit=audit)


def html_captions(text: str) -> list[str]:
    return [html.unescape(re.sub(r"<[^>]+>", " ", c)) for c in re.findall(r"<caption>(.*?)</caption>", text, re.S)]


def test_docx_holds_every_table_title_in_the_order_of_the_html_and_pdf(rendered):
    assert "report.docx" in rendered
    titles = table_titles(rendered["report.docx"])
    captions = html_captions(rendered["report.html"].read_text(encoding="utf-8"))
    assert captions, "the fixture's report has tables"
    assert [squeezed(t) for t in titles] == [squeezed(c) for c in captions]
    pdf_text = squeezed(" ".join(page.extract_text() for page in pypdf.PdfReader(rendered["report.pdf"]).pages))
    missing = [t for t in titles if squeezed(t) not in pdf_text]
    assert not missing, missing


def test_docx_tables_carry_the_values_shown_in_the_html(rendered):
    word = docx.Document(str(rendered["report.docx"]))
    text = rendered["report.html"].read_text(encoding="utf-8")
    # Every body row of the first data table, cell by cell, as the HTML shows it.
    first_html = re.search(r"<tbody>(.*?)</tbody>", text, re.S).group(1)
    html_rows = [[re.sub(r"<[^>]+>", "", cell).strip()
                  for cell in re.findall(r"<t[hd][^>]*>(.*?)</t[hd]>", row, re.S)]
                 for row in re.findall(r"<tr>(.*?)</tr>", first_html, re.S)]
    # The first table of the DOCX is the title page's facts; the report's tables follow.
    table = word.tables[1]
    body = [[cell.text for cell in row.cells] for row in table.rows][-len(html_rows):]
    assert body == [[html.unescape(c) for c in row] for row in html_rows]


def test_docx_has_the_figures_as_pictures_and_the_pdf_fonts(rendered, results):
    word = docx.Document(str(rendered["report.docx"]))
    pictures = [part for part in word.part.package.parts if part.partname.endswith(".png")]
    figures = list((rendered["report.html"].read_text(encoding="utf-8")).split("<figure ")[1:])
    assert len(pictures) == len(figures) > 0
    # PNG signature (ISO/IEC 15948 / RFC 2083): the pictures are real PNG files.
    assert all(part.blob[:8] == b"\x89PNG\r\n\x1a\n" for part in pictures)
    assert word.styles["Normal"].font.name == "DejaVu Sans"
    # Cells and notes carry the copy's own styles (set by style id, so the ids must resolve).
    assert {p.style.name for t in word.tables[1:] for row in t.rows for c in row.cells for p in c.paragraphs} \
        == {"Table text"}
    assert "Table note" in {p.style.name for p in word.paragraphs}
    header_rows = word.element.body.findall(".//" + docx.oxml.ns.qn("w:tblHeader"))
    assert len(header_rows) >= len(word.tables) - 1      # every report table repeats its header
    core = word.core_properties
    assert core.created.strftime("%Y-%m-%dT%H:%M:%SZ") == results["run"]["started_utc"]
    assert core.modified.strftime("%Y-%m-%dT%H:%M:%SZ") == results["run"]["finished_utc"]


def test_docx_is_the_same_bytes_when_written_again(results, audit, tmp_path):
    document = build_document(results, audit)
    run = results["run"]
    first = write_docx(document, tmp_path / "a.docx", created=run["started_utc"], modified=run["finished_utc"])
    second = write_docx(document, tmp_path / "b.docx", created=run["started_utc"], modified=run["finished_utc"])
    assert first.read_bytes() == second.read_bytes()
    with zipfile.ZipFile(first) as archive:
        stamps = {info.date_time for info in archive.infolist()}
    started = tuple(int(x) for x in re.findall(r"\d+", run["started_utc"]))
    assert stamps == {started}


def test_no_replaced_appendix_label_in_any_output(rendered):
    word = docx.Document(str(rendered["report.docx"]))
    docx_text = "\n".join([p.text for p in word.paragraphs] +
                          [cell.text for table in word.tables for row in table.rows for cell in row.cells])
    pdf_text = "\n".join(page.extract_text() for page in pypdf.PdfReader(rendered["report.pdf"]).pages)
    html_text = re.sub(r"<[^>]+>", " ", rendered["report.html"].read_text(encoding="utf-8"))
    csv_text = "\n".join(path.read_text(encoding="utf-8") for key, path in rendered.items() if key.endswith(".csv"))
    for text in (docx_text, pdf_text, html_text, csv_text):
        APPENDIX_TEST.assert_no_replaced_label(text)
