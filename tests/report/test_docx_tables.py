"""The DOCX copy's tables, written as WordprocessingML text in bulk, read back by python-docx.

python-docx (an independent reader of the format) must find every cell's text exactly as
given, including characters XML escapes, tabs, line breaks and leading or trailing spaces; the
participants-per-arm row must be one cell across every column, as wide as the table; header
rows repeat on every page and no row breaks across pages.  The element order inside each
property element is the one the format's schema (ECMA-376 Part 1, WordprocessingML) requires.
"""
from __future__ import annotations

import io

import pytest

docx = pytest.importorskip("docx")

from docx.oxml.ns import qn

from trialcut.report.blocks import Block, Section
from trialcut.report.document import Document
from trialcut.report.docx_output import table_titles, write_docx
from trialcut.report.tables import ReportColumn, ReportTable

TRICKY = ("A & B < C > D", "  spaces at both ends  ", "tab\tbetween", "two\nlines", "quote \" and ' apostrophe",
          "", "ünïcödé — ≥ ±", "<w:t>not markup</w:t>")


def _table(rows, *, counts: str = "", slug: str = "tricky", wide: bool = False) -> ReportTable:
    display = (ReportColumn(("label",), "Label", "text", row_header=True), ReportColumn(("value",), "Value", "mean"))
    return ReportTable(slug=slug, title=f"Table of {slug}", columns=("label", "value"), rows=tuple(rows),
                       display=display, counts=counts, number="Table 1", wide=wide,
                       footnotes=("Source: invented for this test.",))


def _document(*tables: ReportTable, figures=()) -> Document:
    section = Section("s", "Results", blocks=[Block("table", t) for t in tables] + [Block("figure", f) for f in figures])
    return Document(title="Test report", study_id="S-1", cut="final", run_id="run-1", plan_hash="0" * 64, paper="A4",
                    facts=[("Study", "S-1 & co"), ("Plan", "<plan>")], banners=[], cautions=["Review required."],
                    sections=[section], tables=list(tables), figures=list(figures))


def _written(tmp_path, document, **kwargs):
    path = write_docx(document, tmp_path / "copy.docx", created="2026-01-01T00:00:00Z", **kwargs)
    return path, docx.Document(str(path))


def test_every_cell_text_reads_back_as_given(tmp_path):
    rows = [(text, float(position)) for position, text in enumerate(TRICKY)]
    table = _table(rows)
    _, word = _written(tmp_path, _document(table))
    grid = word.tables[1]      # the first is the title page's facts
    read = [[cell.text for cell in row.cells] for row in grid.rows]
    assert read[0] == ["Label", "Value"]
    assert read[1:] == [[text, value] for text, value in (cells for cells in
                                                          ([t for t, _ in r] for r in table.body()))]
    # python-docx's own writer keeps the spaces of a run that starts or ends with one
    texts = [t for t in grid._tbl.iter(qn("w:t")) if t.text and t.text != t.text.strip()]
    assert texts and all(t.get(qn("xml:space")) == "preserve" for t in texts)
    facts = word.tables[0]
    assert [[c.text for c in row.cells] for row in facts.rows] == [["Study", "S-1 & co"], ["Plan", "<plan>"]]


def test_participants_row_spans_the_table_and_header_rows_repeat(tmp_path):
    _, word = _written(tmp_path, _document(_table([("a", 1.0), ("b", 2.0), ("c", 3.0)], counts="Arm A N = 3")))
    grid = word.tables[1]._tbl
    rows = grid.tr_lst
    first = rows[0].tc_lst
    assert len(first) == 1 and first[0].tcPr.find(qn("w:gridSpan")).get(qn("w:val")) == "2"
    columns = [int(c.get(qn("w:w"))) for c in grid.tblGrid.findall(qn("w:gridCol"))]
    assert int(first[0].tcPr.find(qn("w:tcW")).get(qn("w:w"))) == sum(columns)
    for row in rows:
        for cell in row.tc_lst:     # at most one shading per cell (the schema allows one)
            assert len(cell.tcPr.findall(qn("w:shd"))) <= 1
    header = [r for r in rows if r.trPr is not None and r.trPr.find(qn("w:tblHeader")) is not None]
    assert header == rows[:2]
    assert all(r.trPr.find(qn("w:cantSplit")) is not None for r in rows)


def test_property_children_follow_the_schema_order(tmp_path):
    _, word = _written(tmp_path, _document(_table([("a", 1.0), ("b", 2.0)], counts="Arm A N = 2")))
    # ECMA-376 Part 1, 17.4.70 (tcPr) and 17.4.82 (trPr, a choice in schema order), 17.3.2.28 (rPr)
    cell_order = ["tcW", "gridSpan", "tcBorders", "shd"]
    for cell in word.element.body.iter(qn("w:tcPr")):
        names = [child.tag.split("}")[1] for child in cell]
        assert names == sorted(names, key=cell_order.index), names
    for row in word.element.body.iter(qn("w:trPr")):
        names = [child.tag.split("}")[1] for child in row]
        assert names in (["cantSplit"], ["cantSplit", "tblHeader"]), names
    for properties in word.tables[1]._tbl.iter(qn("w:rPr")):
        names = [child.tag.split("}")[1] for child in properties]
        assert names == sorted(names, key=["b", "color"].index), names


def test_table_titles_and_pictures_in_order(tmp_path):
    from PIL import Image

    from trialcut.report.figures import FigureImage

    pictures = {}
    figures = []
    for number in (1, 2, 3):
        buffer = io.BytesIO()
        Image.new("RGB", (40 * number, 20), (number * 60, 90, 120)).save(buffer, format="PNG")
        pictures[f"f{number}"] = buffer.getvalue()
        figures.append(FigureImage(f"f{number}", f"Figure title {number}", "", b"<svg/>", number=f"Figure {number}"))
    missing = FigureImage("f4", "Figure title 4", "", b"<svg/>", number="Figure 4", note="could not be drawn")
    tables = [_table([("a", 1.0)], slug="one"), _table([("b", 2.0)], slug="two", wide=True)]
    path, word = _written(tmp_path, _document(*tables, figures=[*figures, missing]), pictures=pictures)
    assert table_titles(path) == ["Table 1  Table of one", "Table 1  Table of two"]
    shapes = word.inline_shapes
    assert len(shapes) == 3
    # Each picture is its own image, in order, with a distinct drawing id (readers require unique ids).
    ids = [shape._inline.docPr.get("id") for shape in shapes]
    assert len(set(ids)) == 3
    blobs = [word.part.related_parts[shape._inline.graphic.graphicData.pic.blipFill.blip.embed].blob for shape in shapes]
    assert blobs == [pictures["f1"], pictures["f2"], pictures["f3"]]
    assert any(p.text == "Figure title 4: could not be drawn" for p in word.paragraphs)


def test_pictures_given_late_give_the_same_file(tmp_path):
    # The renderer passes a call that waits for the figure child: it is made once, after the
    # text and tables are built, and the file is the same as with the pictures given at once.
    from PIL import Image

    from trialcut.report.figures import FigureImage

    buffer = io.BytesIO()
    Image.new("RGB", (30, 20), (10, 90, 120)).save(buffer, format="PNG")
    pictures = {"f1": buffer.getvalue()}
    figures = [FigureImage("f1", "Drawn", "", b"<svg/>", number="Figure 1"),
               FigureImage("f2", "Not drawn", "", b"<svg/>", number="Figure 2", note="its note")]
    document = _document(_table([("a", 1.0)]), figures=figures)
    calls = []
    early = write_docx(document, tmp_path / "early.docx", pictures=pictures, created="2026-01-01T00:00:00Z")
    late = write_docx(document, tmp_path / "late.docx", pictures=lambda: calls.append(1) or pictures,
                      created="2026-01-01T00:00:00Z")
    assert calls == [1] and early.read_bytes() == late.read_bytes()
    word = docx.Document(str(late))
    assert len(word.inline_shapes) == 1
    texts = [p.text for p in word.paragraphs]
    captions = [p.text for p in word.paragraphs if p.style.name == "Caption"]
    assert "Figure 1  Drawn" in captions and "Not drawn: its note" in texts
    assert not any(t.startswith("Figure 2") for t in captions) and "its note" not in texts   # the contents list it
