"""The editable copy of the report: report.docx, from the same document model as the HTML and PDF.

A medical writer pastes its tables into a clinical study report, so every table is a real
word-processor table (not a picture) with its numbered title above it, the participants per
arm in a first header row when the report has them, and its notes and footnotes below; the
header rows repeat on every page.  Figures are PNG pictures saved from the same drawings as
the SVGs of the HTML and PDF (``figures.svg_and_picture``; drawing.py saves them after the SVGs).
A report has thousands of table cells, so tables are written as WordprocessingML text in bulk
(``_GridXml``) rather than cell by cell through python-docx, which costs seconds.
Fonts, colours and table rules follow the PDF's stylesheet (templates/report.css): DejaVu
Sans, deep ink, a teal accent.

Same input, same bytes: python-docx stamps the package's parts with the time of writing, so
the document's own dates are set from the run (started, finished) and the ZIP entries are
rewritten with the run's start time.
"""
from __future__ import annotations

import io
import re
import zipfile
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

from trialcut.report.blocks import Block, Section
from trialcut.report.tables import ReportTable

# Style ids (python-docx derives them from the names given to add_style).
TABLE_TEXT_ID, TABLE_NOTE_ID, LIST_ID, CAPTION_ID = "Tabletext", "Tablenote", "ListBullet", "Caption"
FONT = "DejaVu Sans"          # the stylesheet's first family, the one the PDF uses
INK, MUTED, ACCENT = "1F2A33", "55636E", "0F6F6B"
ACCENT_SOFT, RULE, STRIPE, WARN, WARN_SOFT = "E6F0EF", "C7D0D5", "F5F7F8", "9A3412", "FFF4E5"
BODY_POINTS, TABLE_POINTS, NOTE_POINTS, CAPTION_POINTS = 9.5, 8.5, 8, 9.5
HEADING_POINTS = {1: 21, 2: 15, 3: 12, 4: 10.5, 5: 10}
# Page margins of the PDF (report.css, @page), in millimetres: top, right, bottom, left.
MARGINS_MM = (24, 15, 20, 15)
PAPER_MM = {"A4": (210, 297), "Letter": (215.9, 279.4)}
EARLIEST_ZIP_TIME = (1980, 1, 1, 0, 0, 0)
_W_NAMESPACE = 'xmlns:w="http://schemas.openxmlformats.org/wordprocessingml/2006/main"'


def write_docx(document, target: Path, *,
               pictures: Mapping[str, bytes] | Callable[[], Mapping[str, bytes]] | None = None,
               created: str | None = None, modified: str | None = None, kicker: str | None = None) -> Path:
    """Write ``document`` (a report.document.Document) as a DOCX file at ``target`` (see docx_bytes)."""
    data = docx_bytes(document, pictures=pictures, created=created, modified=modified, kicker=kicker)
    target = Path(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    target.write_bytes(data)
    return target


def docx_bytes(document, *, pictures: Mapping[str, bytes] | Callable[[], Mapping[str, bytes]] | None = None,
               created: str | None = None, modified: str | None = None, kicker: str | None = None) -> bytes:
    """``document`` (a report.document.Document) as the bytes of a DOCX file.

    ``pictures`` maps a figure's slug to its PNG, or is a call that gives that mapping: it is
    made only after the text and tables are built, so they are built while the pictures are
    still being drawn elsewhere.  A figure without a picture shows its title and note in words.
    ``created``/``modified`` are ISO UTC times (the run's start and end).
    """
    from docx import Document as new_docx

    word = new_docx()
    _styles(word)
    _page(word.sections[0], document.paper, landscape=False)
    _running_texts(word.sections[0], document)
    _title_page(word, document, kicker)
    _contents(word, document)
    writer = _Writer(word, document)
    for number, section in enumerate(document.sections, start=1):
        writer.section(section, level=1, number=str(number))
    writer.place_pictures(dict((pictures() if callable(pictures) else pictures) or {}))
    _core_properties(word, document, created, modified)
    buffer = io.BytesIO()
    word.save(buffer)
    return _fixed_zip(buffer.getvalue(), _zip_time(created))


# --------------------------------------------------------------------------- styles and page
def _styles(word) -> None:
    from docx.enum.style import WD_STYLE_TYPE
    from docx.shared import Pt, RGBColor

    normal = word.styles["Normal"]
    _font(normal.font, BODY_POINTS, INK)
    normal.paragraph_format.space_after = Pt(4)
    normal.paragraph_format.line_spacing = 1.15
    for level, points in HEADING_POINTS.items():
        style = word.styles[f"Heading {level}" if level else "Title"]
        _font(style.font, points, INK, bold=True)
        style.font.italic = False
        style.paragraph_format.keep_with_next = True
        style.paragraph_format.space_before = Pt(points * 1.1)
        style.paragraph_format.space_after = Pt(points * 0.4)
    title = word.styles["Title"]
    _font(title.font, HEADING_POINTS[1], INK, bold=True)
    _remove_border(title.element)
    caption = word.styles["Caption"]
    _font(caption.font, CAPTION_POINTS, INK, bold=True)
    caption.font.italic = False
    caption.paragraph_format.keep_with_next = True
    caption.paragraph_format.space_before = Pt(8)
    caption.paragraph_format.space_after = Pt(3)
    note = word.styles.add_style("Table note", WD_STYLE_TYPE.PARAGRAPH)
    note.base_style = normal
    _font(note.font, NOTE_POINTS, MUTED)
    note.paragraph_format.space_after = Pt(1)
    cell = word.styles.add_style("Table text", WD_STYLE_TYPE.PARAGRAPH)
    cell.base_style = normal
    _font(cell.font, TABLE_POINTS, INK)
    cell.paragraph_format.space_after = Pt(0)
    cell.paragraph_format.line_spacing = 1.0
    for name in ("List Bullet", "Header", "Footer"):
        _font(word.styles[name].font, BODY_POINTS if name == "List Bullet" else 7.5,
              INK if name == "List Bullet" else MUTED)
    word.styles["Normal"].font.color.rgb = RGBColor.from_string(INK)


def _font(font, points: float, colour: str, *, bold: bool | None = None) -> None:
    from docx.oxml.ns import qn
    from docx.shared import Pt, RGBColor

    font.name = FONT
    font.size = Pt(points)
    font.color.rgb = RGBColor.from_string(colour)
    if bold is not None:
        font.bold = bold
    # Theme fonts would win over the named one in a word processor: name it for every script.
    fonts = font.element.rPr.rFonts if font.element.rPr is not None else None
    if fonts is not None:
        for attribute in ("w:asciiTheme", "w:hAnsiTheme", "w:eastAsiaTheme", "w:cstheme"):
            fonts.attrib.pop(qn(attribute), None)
        for attribute in ("w:ascii", "w:hAnsi", "w:eastAsia", "w:cs"):
            fonts.set(qn(attribute), FONT)


def _remove_border(style_element) -> None:
    from docx.oxml.ns import qn

    properties = style_element.find(qn("w:pPr"))
    if properties is not None:
        for border in properties.findall(qn("w:pBdr")):
            properties.remove(border)


def _page(section, paper: str, *, landscape: bool) -> None:
    from docx.enum.section import WD_ORIENT
    from docx.shared import Mm

    width, height = PAPER_MM.get(paper, PAPER_MM["A4"])
    if landscape:
        width, height = height, width
    section.orientation = WD_ORIENT.LANDSCAPE if landscape else WD_ORIENT.PORTRAIT
    section.page_width, section.page_height = Mm(width), Mm(height)
    top, right, bottom, left = MARGINS_MM
    section.top_margin, section.right_margin = Mm(top), Mm(right)
    section.bottom_margin, section.left_margin = Mm(bottom), Mm(left)
    section.header_distance = section.footer_distance = Mm(10)


def _text_width(section) -> int:
    return section.page_width - section.left_margin - section.right_margin


def _running_texts(section, document) -> None:
    # A copy has no watermark: the marks of state (unlocked plan, dummy codes) lead the header
    # of every page in the warning colour; a document without marks names its banners there.
    header = section.header.paragraphs[0]
    marks = list(getattr(document, "marks", None) or [])
    text = document.header_text
    prefix = " · ".join(marks) + " · "
    if marks and text.startswith(prefix):
        text = text[len(prefix):]
    for mark in marks or document.banners:
        run = header.add_run(f"{mark} · ")
        run.bold = True
        _colour(run, WARN)
    header.add_run(text)
    footer = section.footer.paragraphs[0]
    footer.add_run(f"Run {document.run_id}    Page ")
    _field(footer, "PAGE")
    footer.add_run(" of ")
    _field(footer, "NUMPAGES")


def _field(paragraph, instruction: str) -> None:
    """A page-number field; the word processor fills it in when it lays out the pages."""
    from docx.oxml import OxmlElement
    from docx.oxml.ns import qn

    for kind, text in (("begin", None), ("instr", f" {instruction} "), ("separate", None), ("text", "1"),
                       ("end", None)):
        run = paragraph.add_run()
        if kind == "instr":
            element = OxmlElement("w:instrText")
            element.set(qn("xml:space"), "preserve")
            element.text = text
        elif kind == "text":
            element = OxmlElement("w:t")
            element.text = text
        else:
            element = OxmlElement("w:fldChar")
            element.set(qn("w:fldCharType"), kind)
        run._r.append(element)


def _colour(run, colour: str) -> None:
    from docx.shared import RGBColor

    run.font.color.rgb = RGBColor.from_string(colour)


def _shade(element_properties, fill: str) -> None:
    from docx.oxml import OxmlElement
    from docx.oxml.ns import qn

    shading = OxmlElement("w:shd")
    shading.set(qn("w:val"), "clear")
    shading.set(qn("w:color"), "auto")
    shading.set(qn("w:fill"), fill)
    element_properties.append(shading)


def _border(parent, sides: Mapping[str, tuple[str, int]], tag: str) -> None:
    """Borders (side -> (colour, eighths of a point)) on a cell or paragraph property element."""
    from docx.oxml import OxmlElement
    from docx.oxml.ns import qn

    borders = OxmlElement(tag)
    for side, (colour, size) in sides.items():
        line = OxmlElement(f"w:{side}")
        line.set(qn("w:val"), "single")
        line.set(qn("w:sz"), str(size))
        line.set(qn("w:space"), "0" if tag == "w:tcBorders" else "4")
        line.set(qn("w:color"), colour)
        borders.append(line)
    parent.append(borders)


# --------------------------------------------------------------------------- front matter
def _title_page(word, document, kicker: str | None) -> None:
    from docx.enum.text import WD_BREAK
    from docx.shared import Pt

    for banner in document.banners:
        paragraph = word.add_paragraph()
        run = paragraph.add_run(banner)
        run.bold = True
        _colour(run, WARN)
        _shade(paragraph._p.get_or_add_pPr(), WARN_SOFT)
    kicker = kicker or getattr(document, "kicker", "") or "Efficacy analyses"
    run = word.add_paragraph().add_run(kicker.upper())
    run.font.size = Pt(8.5)
    _colour(run, MUTED)
    _paragraph(word, document.title, "Title")
    if document.facts:
        grid = _GridXml(_twips([0.3, 0.7], _text_width(word.sections[-1])), fixed=False)
        for label, value in document.facts:
            grid.cells([_cell_xml(str(label), bold=True, colour=MUTED), _cell_xml(str(value))], keep_whole=False)
        grid.add_to(word)
    if document.cautions:
        _paragraph(word, "Before you read", "Heading2")
        for caution in document.cautions:
            _paragraph(word, caution, LIST_ID)
    word.add_paragraph("Editable copy of the report rendered by trialcut from the run's results.json; the PDF "
                       "is the reference layout and every table is also saved as a CSV file beside it.")
    word.add_paragraph().add_run().add_break(WD_BREAK.PAGE)


def _contents(word, document) -> None:
    from docx.enum.text import WD_BREAK

    _paragraph(word, "Contents", "Heading2")
    for number, section in enumerate(document.sections, start=1):
        _contents_entries(word, section, str(number), depth=0)
    if document.tables:
        _paragraph(word, "Tables", "Heading3")
        for table in document.tables:
            _paragraph(word, f"{table.number}  {table.title}", TABLE_NOTE_ID)
    if document.figures:
        _paragraph(word, "Figures", "Heading3")
        for figure in document.figures:
            _paragraph(word, f"{figure.number}  {figure.title}", TABLE_NOTE_ID)
    word.add_paragraph().add_run().add_break(WD_BREAK.PAGE)


def _contents_entries(word, section: Section, number: str, depth: int) -> None:
    from docx.shared import Mm

    paragraph = word.add_paragraph(f"{number}  {section.title}")
    paragraph.paragraph_format.left_indent = Mm(6 * depth)
    paragraph.paragraph_format.space_after = 0
    for position, child in enumerate(section.subsections, start=1):
        _contents_entries(word, child, f"{number}.{position}", depth + 1)


# --------------------------------------------------------------------------- body
class _Writer:
    def __init__(self, word, document):
        self.word, self.document = word, document
        self.figures: list[tuple] = []     # (figure, its picture's paragraph, caption and note, width)
        self.landscape = False      # the orientation of the page being filled
        self.room = _text_width(word.sections[-1])     # its text width (finding the section walks the body)
        self.next_shape_id = 0      # the id of the next picture, once the first one is placed
        self.fresh_page = False     # a section break has just started a new page

    def _orient(self, landscape: bool) -> None:
        """Turn the page only when the orientation changes: consecutive wide tables share
        landscape pages, as in the PDF, with no empty upright page between them."""
        if landscape != self.landscape:
            self._new_page_section(landscape=landscape)
            self.landscape, self.fresh_page = landscape, True

    def section(self, section: Section, *, level: int, number: str) -> None:
        from docx.enum.text import WD_BREAK

        self._orient(False)
        if level == 1 and number != "1" and not self.fresh_page and not getattr(self.document, "compact", False):
            self.word.add_paragraph().add_run().add_break(WD_BREAK.PAGE)
        self.fresh_page = False
        heading = _paragraph(self.word, "", f"Heading{min(level + 1, 5)}")
        run = heading.add_run(f"{number}  ")
        _colour(run, ACCENT)
        heading.add_run(section.title)
        for block in section.blocks:
            self.block(block)
        for position, child in enumerate(section.subsections, start=1):
            self.section(child, level=level + 1, number=f"{number}.{position}")

    def block(self, block: Block) -> None:
        self._orient(block.kind == "table" and bool(block.content.wide))
        self.fresh_page = False
        if block.kind == "paragraph":
            self.word.add_paragraph(str(block.content))
        elif block.kind == "list":
            for item in block.content:
                _paragraph(self.word, str(item), LIST_ID)
        elif block.kind == "notice":
            paragraph = self.word.add_paragraph(str(block.content))
            properties = paragraph._p.get_or_add_pPr()
            _border(properties, {"left": (WARN, 24)}, "w:pBdr")
            _shade(properties, WARN_SOFT)
        elif block.kind == "table":
            self.table(block.content)
        elif block.kind == "figure":
            self.figure(block.content)
        elif block.kind == "csv_tables":
            self.word.add_paragraph("Available as CSV beside this report, not shown here:")
            for table in block.content:
                _paragraph(self.word, f"{table.title}: tables/{table.slug}.csv", LIST_ID)

    # ------------------------------------------------------------------ tables
    def table(self, table: ReportTable) -> None:
        caption = _paragraph(self.word, "", CAPTION_ID)
        if table.number:
            number = caption.add_run(f"{table.number}  ")
            _colour(number, ACCENT)
        caption.add_run(table.title)
        body = table.body()
        columns = table.header()
        shares = [float(width.rstrip("%")) / 100 for width in table.column_widths(body)]
        grid = _GridXml(_twips(shares, self.room), fixed=True)
        counts = getattr(table, "counts", "")
        if counts:
            grid.spanning_row(counts, bold=True, fill=ACCENT_SOFT, header=True)
        grid.row([(column.label, column.numeric) for column in columns], bold=True, fill=ACCENT_SOFT,
                 rule=(ACCENT, 12), header=True)
        for position, values in enumerate(body):
            grid.row([(text, column.numeric) for text, column in values], fill=STRIPE if position % 2 else None,
                     rule=(RULE, 6))
        grid.add_to(self.word)
        for line in [table.note, *getattr(table, "footnotes", ())]:
            if line:
                _paragraph(self.word, str(line), TABLE_NOTE_ID)

    def _new_page_section(self, *, landscape: bool) -> None:
        from docx.enum.section import WD_SECTION

        section = self.word.add_section(WD_SECTION.NEW_PAGE)
        _page(section, self.document.paper, landscape=landscape)
        self.room = _text_width(section)

    # ------------------------------------------------------------------ figures
    def figure(self, figure) -> None:
        """A paragraph for the picture (placed by place_pictures), then the caption and note."""
        from docx.shared import Mm

        paragraph = self.word.add_paragraph()
        paragraph.paragraph_format.keep_with_next = True
        caption = _paragraph(self.word, "", CAPTION_ID)
        number = caption.add_run(f"{figure.number}  ")
        _colour(number, ACCENT)
        caption.add_run(figure.title)
        note = _paragraph(self.word, figure.note, TABLE_NOTE_ID) if figure.note else None
        self.figures.append((figure, paragraph, [caption, note], min(self.room, Mm(170))))

    def place_pictures(self, pictures: Mapping[str, bytes]) -> None:
        """Each figure's picture in its paragraph, in reading order; a figure without one is
        a single paragraph of its title and note in words instead (no caption)."""
        for figure, paragraph, extras, width in self.figures:
            picture = pictures.get(figure.slug)
            if picture is not None:
                paragraph.add_run()._r.add_drawing(self._inline_picture(picture, width))
                continue
            for extra in extras:
                if extra is not None:
                    extra._p.getparent().remove(extra._p)
            paragraph._p.remove(paragraph._p.pPr)
            paragraph.add_run(f"{figure.title}: {figure.note or 'not drawn.'}")


    def _inline_picture(self, picture: bytes, width: int):
        """The picture as python-docx's ``add_picture`` places it, numbered from a counter:
        python-docx numbers each picture by searching the whole document for the highest id
        so far, which grows with every table before it."""
        from docx.oxml.shape import CT_Inline

        part = self.word.part
        if not self.next_shape_id:
            self.next_shape_id = part.next_id
        relation, image = part.get_or_add_image(io.BytesIO(picture))
        cx, cy = image.scaled_dimensions(width, None)
        inline = CT_Inline.new_pic_inline(self.next_shape_id, relation, image.filename, cx, cy)
        self.next_shape_id += 1
        return inline


def _paragraph(word, text: str, style_id: str):
    """A paragraph in a style named by its id (python-docx looks a style name up by walking
    every style of the document, each time)."""
    paragraph = word.add_paragraph(text)
    paragraph._p.style = style_id
    return paragraph


# --------------------------------------------------------------------------- tables as XML
# A report has thousands of cells: python-docx's per-cell calls (add_row, cell.paragraphs,
# get_or_add_tcPr, one lookup per property) cost seconds, so each table's WordprocessingML is
# written as text and parsed once (python-docx's own parser, so the elements are its classes).
# Element order inside each property element follows the format's schema (tcW, gridSpan,
# tcBorders, shd; cantSplit before tblHeader; b before color): word processors reject a file
# that breaks it.
_TABLE_LOOK = ('<w:tblLook w:firstColumn="1" w:firstRow="1" w:lastColumn="0" w:lastRow="0" w:noHBand="0" '
               'w:noVBand="1" w:val="04A0"/>')
# Characters XML 1.0 cannot carry (controls other than tab, line feed and carriage return).
_NOT_IN_XML = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ufffe\uffff]")
_LINE_OR_TAB = re.compile("(\r\n|\n|\r|\t)")


class _GridXml:
    """One table's rows as WordprocessingML text; ``add_to`` parses it into the document's body."""

    def __init__(self, widths: Sequence[int], *, fixed: bool):
        self.widths = list(widths)
        self.parts = [f'<w:tbl {_W_NAMESPACE}><w:tblPr><w:tblW w:type="auto" w:w="0"/>',
                      '<w:tblLayout w:type="fixed"/>' if fixed else "", _TABLE_LOOK, "</w:tblPr><w:tblGrid>",
                      *(f'<w:gridCol w:w="{width}"/>' for width in self.widths), "</w:tblGrid>"]

    def row(self, cells: Sequence[tuple[str, bool]], *, bold: bool = False, fill: str | None = None,
            rule: tuple[str, int] | None = None, header: bool = False) -> None:
        """A row of (text, right-aligned) cells, one per column, sharing their look."""
        self.cells([_cell_xml(text, width=width, bold=bold, right=right, fill=fill, rule=rule)
                    for (text, right), width in zip(cells, self.widths)], header=header)

    def spanning_row(self, text: str, *, bold: bool, fill: str, header: bool) -> None:
        """One cell across every column (the participants per arm above the column labels)."""
        self.cells([_cell_xml(text, width=sum(self.widths), span=len(self.widths), bold=bold, fill=fill)],
                   header=header)

    def cells(self, cells: Sequence[str], *, header: bool = False, keep_whole: bool = True) -> None:
        if len(cells) == len(self.widths):      # a cell made without a width takes its column's
            cells = [cell.replace(_NO_WIDTH, str(width), 1) for cell, width in zip(cells, self.widths)]
        # cantSplit keeps a row on one page; tblHeader repeats the row at the top of every page.
        properties = ("<w:trPr><w:cantSplit/>" + ("<w:tblHeader/>" if header else "") + "</w:trPr>"
                      if keep_whole or header else "")
        self.parts.append("<w:tr>" + properties + "".join(cells) + "</w:tr>")

    def add_to(self, word):
        from docx.oxml import parse_xml

        table = parse_xml("".join(self.parts + ["</w:tbl>"]))
        word.element.body._insert_tbl(table)
        return table


_NO_WIDTH = "{column width}"        # replaced by _GridXml.cells with the column's width


def _cell_xml(text: str, *, width: int | None = None, span: int = 1, bold: bool = False, right: bool = False,
              colour: str | None = None, fill: str | None = None, rule: tuple[str, int] | None = None) -> str:
    """One cell holding one paragraph in the table text style (named by id, as Word stores it)."""
    properties = f'<w:tcW w:type="dxa" w:w="{_NO_WIDTH if width is None else width}"/>'
    if span > 1:
        properties += f'<w:gridSpan w:val="{span}"/>'
    if rule:
        properties += (f'<w:tcBorders><w:bottom w:val="single" w:sz="{rule[1]}" w:space="0" '
                       f'w:color="{rule[0]}"/></w:tcBorders>')
    if fill:
        properties += f'<w:shd w:val="clear" w:color="auto" w:fill="{fill}"/>'
    paragraph = f'<w:pPr><w:pStyle w:val="{TABLE_TEXT_ID}"/>' + ('<w:jc w:val="right"/>' if right else "") + "</w:pPr>"
    looks = ("<w:b/>" if bold else "") + (f'<w:color w:val="{colour}"/>' if colour else "")
    run = f"<w:r>{f'<w:rPr>{looks}</w:rPr>' if looks else ''}{_run_content(text)}</w:r>" if text else ""
    return f"<w:tc><w:tcPr>{properties}</w:tcPr><w:p>{paragraph}{run}</w:p></w:tc>"


def _run_content(text: str) -> str:
    """A run's text as python-docx writes it: a line break for a new line, a tab element for a
    tab, and spaces kept where they lead or trail."""
    text = _NOT_IN_XML.sub("\ufffd", text)
    if "\n" not in text and "\t" not in text and "\r" not in text:
        return _text_element(text)
    pieces = []
    for piece in _LINE_OR_TAB.split(text):
        if piece == "\t":
            pieces.append("<w:tab/>")
        elif piece in ("\n", "\r", "\r\n"):
            pieces.append("<w:br/>")
        elif piece:
            pieces.append(_text_element(piece))
    return "".join(pieces)


def _text_element(text: str) -> str:
    escaped = text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    return f'<w:t xml:space="preserve">{escaped}</w:t>' if text != text.strip() else f"<w:t>{escaped}</w:t>"


def _twips(shares: Sequence[float], room: int) -> list[int]:
    """Column widths as the PDF's shares of the text width (the word processor keeps them)."""
    from docx.shared import Emu

    total = sum(shares) or 1.0
    return [Emu(int(room * share / total)).twips for share in shares]


# --------------------------------------------------------------------------- same bytes every time
def _core_properties(word, document, created: str | None, modified: str | None) -> None:
    properties = word.core_properties
    properties.title = document.title
    properties.subject = f"{document.study_id}, data cut {document.cut}"
    properties.author = properties.last_modified_by = "trialcut"
    properties.identifier = document.run_id
    properties.revision = 1
    properties.comments = "Editable copy of the rendered report; review by a qualified statistician is required."
    start = _parse_utc(created) or datetime(2000, 1, 1, tzinfo=timezone.utc)
    properties.created = start
    properties.modified = _parse_utc(modified) or start
    properties.last_printed = start


def _parse_utc(text: str | None) -> datetime | None:
    if not text:
        return None
    try:
        parsed = datetime.fromisoformat(str(text).replace("Z", "+00:00"))
    except ValueError:
        return None
    return parsed if parsed.tzinfo else parsed.replace(tzinfo=timezone.utc)


def _zip_time(created: str | None) -> tuple[int, int, int, int, int, int]:
    moment = _parse_utc(created)
    if moment is None or moment.year < 1980:
        return EARLIEST_ZIP_TIME
    return moment.timetuple()[:6]


def _fixed_zip(data: bytes, when: tuple[int, int, int, int, int, int]) -> bytes:
    """The same archive with every entry stamped ``when`` (python-docx stamps the time of writing)."""
    out = io.BytesIO()
    with zipfile.ZipFile(io.BytesIO(data)) as source, zipfile.ZipFile(out, "w") as target:
        for entry in source.infolist():
            stamped = zipfile.ZipInfo(entry.filename, date_time=when)
            stamped.compress_type = zipfile.ZIP_DEFLATED
            stamped.external_attr = 0o644 << 16
            target.writestr(stamped, source.read(entry.filename))
    return out.getvalue()


def table_titles(path: Path) -> list[str]:
    """The numbered titles of a written DOCX's tables, in order: each is the caption paragraph
    just before a table (python-docx reads the file back; the title page's facts have none)."""
    from docx import Document as open_docx
    from docx.oxml.ns import qn

    word = open_docx(str(path))
    captions = {id(p._p): p for p in word.paragraphs if p.style.name == "Caption"}
    titles, previous = [], None
    for element in word.element.body.iterchildren():
        if element.tag == qn("w:tbl") and previous is not None and id(previous) in captions:
            titles.append(captions[id(previous)].text)
        previous = element
    return titles


__all__ = ["docx_bytes", "table_titles", "write_docx"]
