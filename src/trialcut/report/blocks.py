"""What a section of the report is made of: paragraphs, lists, notices, tables and figures.

The report's modules depend in one direction only: ``tables``/``figures`` build items, the
section modules (``sections_*.py``) fill :class:`Section` objects with blocks, and
``document`` assembles those sections into a :class:`~trialcut.report.document.Document`.
Nothing here imports a section module or the document, so a new section module needs only
this module (and the item builders) and one line in ``document.build_document``.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Sequence

from trialcut.report.figures import FigureImage
from trialcut.report.tables import ReportTable


@dataclass
class Block:
    kind: str          # "paragraph", "list", "notice", "table", "figure", "csv_tables"
    content: Any


@dataclass
class Section:
    anchor: str
    title: str
    blocks: list[Block] = field(default_factory=list)
    subsections: list["Section"] = field(default_factory=list)

    def paragraph(self, text: str) -> None:
        if text:
            self.blocks.append(Block("paragraph", text))

    def items(self, texts: Sequence[str]) -> None:
        if texts:
            self.blocks.append(Block("list", list(texts)))

    def notice(self, text: str) -> None:
        self.blocks.append(Block("notice", text))

    def table(self, table: ReportTable | None) -> None:
        if table is not None and table.rows:
            self.blocks.append(Block("table", table))

    def csv_only(self, tables: Sequence[ReportTable | None]) -> None:
        """Detail tables written as CSV beside the report and listed here, not laid out in it."""
        kept = [t for t in tables if t is not None and t.rows]
        if kept:
            self.blocks.append(Block("csv_tables", kept))

    def figure(self, figure: FigureImage | None) -> None:
        if figure is not None:
            self.blocks.append(Block("figure", figure))

    @property
    def lead_landscape(self) -> int:
        """How many leading blocks go onto a landscape page with the heading (0: none).

        When a section opens with a wide table, the page change before it would strand the
        heading and the opening text at the foot of a portrait page; they move with it."""
        for position, block in enumerate(self.blocks):
            if block.kind == "table":
                return position + 1 if block.content.wide else 0
            if block.kind not in ("paragraph", "list", "notice"):
                return 0
        return 0

    def keeps_with_next(self, position: int) -> bool:
        """Whether text at ``position`` introduces the table or figure right after it (no page break between)."""
        following = self.blocks[position + 1] if position + 1 < len(self.blocks) else None
        return (self.blocks[position].kind in ("paragraph", "list", "notice")
                and following is not None and following.kind in ("table", "figure", "list"))

    def keeps_with_previous(self, position: int) -> bool:
        """Whether a closing paragraph after a table or figure stays on that item's last page."""
        block = self.blocks[position]
        return (block.kind == "paragraph" and position == len(self.blocks) - 1 and position > 0
                and self.blocks[position - 1].kind in ("table", "figure") and len(str(block.content)) < 400)

    def child(self, anchor: str, title: str) -> "Section":
        section = Section(anchor=f"{self.anchor}-{anchor}", title=title)
        self.subsections.append(section)
        return section


def walk(sections: Sequence[Section]):
    """Every section and subsection in reading order."""
    for section in sections:
        yield section
        yield from walk(section.subsections)


__all__ = ["Block", "Section", "walk"]
