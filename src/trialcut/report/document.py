"""Assemble the report's content from Results: sections of paragraphs, tables and figures.

Nothing here knows about HTML or PDF.  The section modules (``sections_*.py``) read
results.json (and audit.json when given) and fill :class:`~trialcut.report.blocks.Section`
objects with blocks; they never import this module.  This module only assembles their
sections into a :class:`Document` and numbers its tables and figures; the templates lay it
out.  Unknown analysis methods get a generic section from their ``tables``; a failed
analysis shows its error.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any, Mapping, Sequence

from trialcut.report import sections_analysis, sections_flow, sections_front, sections_glance, sections_responder
from trialcut.report.blocks import Block, Section, walk
from trialcut.report.figures import FigureImage
from trialcut.report.formatting import NumberFormat, short_hash
from trialcut.report.tables import ReportTable


@dataclass
class Document:
    title: str
    study_id: str
    cut: str
    run_id: str
    plan_hash: str
    paper: str
    facts: list[tuple[str, str]]
    banners: list[str]
    cautions: list[str]
    sections: list[Section]
    tables: list[ReportTable] = field(default_factory=list)
    csv_tables: list[ReportTable] = field(default_factory=list)    # CSV files only, listed in the text
    figures: list[FigureImage] = field(default_factory=list)

    marks: list[str] = field(default_factory=list)   # short marks of state for the running header

    @property
    def header_text(self) -> str:
        """The running header; an unlocked or dry run carries its mark on every page, not only the watermark."""
        text = f"{self.study_id} · cut {self.cut} · plan {short_hash(self.plan_hash, 12)}"
        return " · ".join([*self.marks, text])

    @property
    def kicker(self) -> str:
        if "UNLOCKED PLAN" in self.marks:
            return "Exploratory run of a plan that was not locked: not for decisions"
        if "DUMMY TREATMENT CODES" in self.marks:
            return "Dry run with dummy treatment codes: not the real assignment"
        look = next((m for m in self.marks if m.startswith(("INTERIM LOOK", "NOT A PLANNED LOOK"))), None)
        if look and look.startswith("INTERIM LOOK"):     # "INTERIM LOOK k OF K"
            return (f"Interim analysis, {look.removeprefix('INTERIM ').lower()}, from a prespecified, locked plan: "
                    f"not the final analysis")
        if look:
            return "Analyses of a cut that is not a planned look, from a prespecified, locked plan: no decision"
        return "Efficacy analyses run from a prespecified, locked plan"


CAUTIONS = (
    "These results were produced by software from a prespecified plan. They require review by a "
    "qualified statistician before anyone relies on them.",
    "They do not replace regulatory, ethics committee or local review of the trial.",
    "Conclusions depend on the stated assumptions about missing data; the sensitivity analyses "
    "show how far the estimates move when those assumptions change.",
)


def build_document(results: Mapping[str, Any], audit: Mapping[str, Any] | None = None, *,
                   draw: bool = True) -> Document:
    """The report's content.  ``draw=False`` leaves each figure's drawing as a job for the
    renderer (see render.py); numbering assumes every such figure will be drawn."""
    run = results.get("run") or {}
    plan = results.get("plan") or {}
    study = plan.get("study") or {}
    report_settings = plan.get("report") or {}
    base_format = NumberFormat.from_results(results)
    sections: list[Section] = []

    # The cautions stand on the title page, where no reader can miss them.
    about = Section("run", "About this run")
    sections_front.run_record(about, results, base_format)
    # Said before the tables, where it cannot be left alone on a page of its own.
    about.blocks.insert(min(1, len(about.blocks)), Block(
        "paragraph", "How values are rounded is stated at the start of each endpoint's section, from the plan's "
                     "decimals; the CSV files keep full precision."))
    sections.append(about)
    # The answer the trial was run for, before the pages of estimands, populations and conformance.
    glance = sections_glance.glance_section(results, base_format)
    if glance is not None:
        sections.append(glance)

    estimands = Section("estimands", "Estimands")
    sections_front.estimands(estimands, results, base_format)
    sections.append(estimands)

    populations = Section("populations", "Analysis populations and disposition")
    sections_front.populations(populations, results, base_format)
    sections.append(populations)
    sections.append(sections_flow.flow_section(results, base_format))

    conformance = Section("conformance", "Data conformance")
    sections_front.conformance(conformance, results, base_format)
    sections.append(conformance)

    for position, endpoint in enumerate(results.get("endpoints") or []):
        number_format = NumberFormat.from_results(results, raw=endpoint.get("decimals"))
        section = Section(f"endpoint{position + 1}", f"Endpoint: {endpoint.get('label') or endpoint.get('id')}")
        sections_analysis.endpoint(section, results, endpoint, number_format)
        sections_responder.endpoint_extras(section, results, endpoint, number_format)   # binary, count, subgroups
        sections.append(section)

    if results.get("multiplicity"):
        adjustment = Section("multiplicity", "Multiple comparisons")
        sections_front.multiplicity(adjustment, results, base_format)
        sections.append(adjustment)

    listings = sections_flow.listings_section(results, base_format)
    if listings is not None:
        sections.append(listings)

    appendix = Section("audit", "Appendix: audit record")
    sections_front.audit_appendix(appendix, results, audit, base_format)
    sections.append(appendix)

    document = Document(
        title=report_settings.get("title") or f"{study.get('id', run.get('study_id', ''))} efficacy report",
        study_id=str(study.get("id") or run.get("study_id") or ""),
        cut=str(run.get("cut") or ""),
        run_id=str(run.get("id") or ""),
        plan_hash=str(plan.get("sha256") or ""),
        paper=report_settings.get("paper") if report_settings.get("paper") in ("A4", "Letter") else "A4",
        facts=sections_front.title_facts(results),
        banners=sections_front.banners(results),
        cautions=_cautions(results),
        sections=sections,
        marks=sections_front.marks(results),
    )
    if draw:
        map_figures(document, FigureImage.drawn)
    number_items(document, report_settings)
    sections_glance.name_places(document.sections, document.tables)
    return document


def _cautions(results: Mapping[str, Any]) -> list[str]:
    """The cautions; an unlocked or dry run does not claim to come from a prespecified plan, and an
    interim look (or a cut that is no planned look) opens with that before anything else."""
    marks = sections_front.marks(results)
    if "UNLOCKED PLAN" in marks or "DUMMY TREATMENT CODES" in marks:
        first = ("These results were produced by software from a plan that was not locked" if "UNLOCKED PLAN" in marks
                 else "These results were produced by software with dummy treatment codes (a dry run)")
        cautions = [first + ": they are exploratory, not for decisions. They require review by a qualified "
                    "statistician before anyone relies on them.", *CAUTIONS[1:]]
    else:
        cautions = list(CAUTIONS)
    look = sections_front.look_banner(results)
    if look is None:
        return cautions
    rule = ("decisions at this look follow the group-sequential boundaries in the multiple comparisons section, "
            "not the nominal p-values of the analysis tables" if look.startswith("INTERIM") else
            "the plan's looks do not include this cut, so no hypothesis can be rejected from it")
    return [f"{look.replace(' — ', ': ', 1).capitalize()}; {rule}.", *cautions]


def map_figures(document: Document, change) -> Document:
    """Replace every figure of ``document`` (in place) by ``change(figure)``, each changed once."""
    listed = {f.anchor for f in document.figures}
    figures = []
    for section in walk(document.sections):
        for block in section.blocks:
            if block.kind == "figure":
                block.content = change(block.content)
                if block.content.anchor and block.content.anchor in listed:
                    figures.append(block.content)
    document.figures = figures
    return document


def number_items(document: Document, report_settings: Mapping[str, Any]) -> Document:
    """Number tables and figures in reading order with the plan's prefixes; slugs become unique.

    A CSV-only table takes the number of the last table shown before it and a letter
    ("12a_…"), so the files in tables/ sort in reading order.
    """
    table_prefix = report_settings.get("table_prefix", "Table ")
    figure_prefix = report_settings.get("figure_prefix", "Figure ")
    tables, csv_tables, figures = [], [], []
    letters = "abcdefghijklmnopqrstuvwxyz"
    csv_after: dict[int, int] = {}     # tables shown so far -> CSV-only tables already after them
    for section in walk(document.sections):
        for block in section.blocks:
            if block.kind == "csv_tables":
                numbered = []
                for table in block.content:
                    position = csv_after.get(len(tables), 0)
                    csv_after[len(tables)] = position + 1
                    suffix = letters[position] if position < len(letters) else f"z{position}"
                    numbered.append(replace(table, slug=f"{len(tables):02d}{suffix}_{table.slug}"))
                csv_tables.extend(numbered)
                block.content = numbered
            elif block.kind == "table":
                number = len(tables) + 1
                block.content = replace(block.content.with_number(f"{table_prefix}{number}", f"table-{number}"),
                                        slug=f"{number:02d}_{block.content.slug}")
                tables.append(block.content)
            elif block.kind == "figure" and block.content.shown:
                number = len(figures) + 1
                block.content = replace(block.content, number=f"{figure_prefix}{number}",
                                        anchor=f"figure-{number}", slug=f"{number:02d}_{block.content.slug}")
                figures.append(block.content)
    document.tables, document.csv_tables, document.figures = tables, csv_tables, figures
    return document


__all__ = ["Block", "Document", "Section", "build_document"]
