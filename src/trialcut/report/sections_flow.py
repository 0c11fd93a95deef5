"""The report's account of participants: the cut-off, which visits were due, and one
participant-flow table per estimand whose rows add up, with the count of participants each fit
leaves out; the listing of those participants is an appendix of its own (``listings_section``).

Reads results.json only (``data.cut_off``, ``endpoints[].flow``, ``analyses[].left_out``).
"""
from __future__ import annotations

import re

from typing import Any, Mapping

from trialcut.report.blocks import Block, Section
from trialcut.report.formatting import NumberFormat
from trialcut.report.tables import from_results_table, rows_as_dicts

# Steps shown indented under "Visit due by the cut-off" and "In the analysis population".
_DUE_PARTS_PREFIXES = ("observed_", "composite_", "missing_")
_LEFT_OUT_STEPS = ("no_visit_due", "all_values_set_aside", "all_due_values_missing")
LONGEST_LISTING = 40
# The same missing value can sit under different events in two estimands' tables; a reader must
# be told why (the rule itself is in DEVELOPERS.md, "governing" event).
ATTRIBUTION_NOTE = ("A missing value is counted under one intercurrent event only: the earliest event whose "
                    "strategy in this estimand changes the outcome (hypothetical or composite), or else the "
                    "earliest event. The same missing value can therefore sit under different events in the "
                    "tables of different estimands.")


def flow_section(results: Mapping[str, Any], number_format: NumberFormat) -> Section:
    section = Section("flow", "Cut-off, visits due and participant flow")
    cut_off(section, results)
    visit_assignment(section, results, number_format)
    endpoints = results.get("endpoints") or []
    for position, endpoint in enumerate(endpoints):
        for index, entry in enumerate(endpoint.get("flow") or []):
            _flow_table(section, results, endpoint, entry, f"flow_{position + 1}_{index + 1}", number_format,
                        name_endpoint=len(endpoints) > 1)
    if not any(e.get("flow") for e in results.get("endpoints") or []):
        section.notice("The results carry no participant-flow tables (a run made before they existed).")
    return section


def cut_off(section: Section, results: Mapping[str, Any]) -> None:
    record = (results.get("data") or {}).get("cut_off") or {}
    date, source = record.get("date"), record.get("source")
    if date:
        how = "as given for the run" if source == "given" else "taken as the latest date in the data (none was given)"
        section.paragraph(f"Data cut-off: {date}, {how}.")
    else:
        section.paragraph("No data cut-off date is known for this run.")
    if record.get("due_judged"):
        section.paragraph(
            f"A visit counts as due when the participant's randomisation date ({record.get('date_column')}) "
            "plus the visit's planned day minus one plus its window falls on or before the cut-off, or when a "
            "value was recorded. A visit not yet due is neither observed nor missing: no analysis uses, "
            "imputes or shifts it, and every table shows it apart.")
    else:
        section.notice("Whether a visit was due by the cut-off could not be judged (the plan names no "
                       "randomisation date column, or the cut has none): every scheduled visit counts as due, "
                       "so a visit that was not yet due is counted as missing.")
    for note in record.get("notes") or []:
        if "could not be judged" not in note:
            section.paragraph(note)


def _label(results: Mapping[str, Any], kind: str, item_id: str | None) -> str:
    """The plan's label of an estimand or population (its id when the results lack it)."""
    for item in (results.get("plan") or {}).get(kind) or []:
        if isinstance(item, Mapping) and item.get("id") == item_id:
            return str(item.get("label") or item_id)
    return str(item_id)


def _flow_table(section: Section, results, endpoint, entry, slug: str, number_format: NumberFormat,
                name_endpoint: bool = False) -> None:
    source = entry.get("table") or {}
    columns = list(source.get("columns") or [])
    arms = [c for c in columns if c not in ("visit", "step", "label")]
    rows = [list(row) for row in source.get("data") or []]
    step_at, label_at = columns.index("step"), columns.index("label")
    # Composite rows only matter when the estimand uses that strategy: all zero, they add nothing.
    composite = [r for r in rows if str(r[step_at]).startswith("composite_")]
    if composite and not any(r[columns.index("Total")] for r in composite):
        rows = [r for r in rows if not str(r[step_at]).startswith("composite_")]
    for row in rows:
        if str(row[step_at]).startswith(_DUE_PARTS_PREFIXES) or row[step_at] in _LEFT_OUT_STEPS:
            row[label_at] = f"– {row[label_at]}"
    shown = {"title": source.get("title") or "", "columns": columns, "data": rows}
    who = _who(results, endpoint, entry, name_endpoint=False)
    part = section.child(slug, _who(results, endpoint, entry, name_endpoint))
    part.paragraph("Each visit's rows add up: the randomised participants split into those in and out of the "
                   "population, the population into visits due and not yet due, and the due visits into the "
                   "indented rows. The rows marked All visits count participants: those with at least one value "
                   "used by a fit and those left out, by reason. Every other count in this report derives from "
                   "this table.")
    part.table(from_results_table(
        shown, slug=slug, number_format=number_format, hide=("step",),
        title=(f"Participant flow ({_endpoint_words(endpoint)}): {who}" if name_endpoint else f"Participant flow: {who}"),
        labels={"visit": "Visit", "label": "Step"},
        kinds={"visit": "text", "label": "text", **{arm: "count" for arm in arms}},
        footnotes=(ATTRIBUTION_NOTE,)))
    _left_out(part, endpoint, entry)


def _who(results, endpoint, entry, name_endpoint: bool) -> str:
    """A flow entry's estimand and population in words, after the endpoint's label when there are
    several (a heading never shows a plan id)."""
    estimand, population = entry.get("estimand"), _label(results, "populations", entry.get("population"))
    who = f"{_label(results, 'estimands', estimand)}; {population}" if estimand else f"{population}, no estimand"
    return f"{_endpoint_words(endpoint)}: {who}" if name_endpoint else who


def _endpoint_words(endpoint: Mapping[str, Any]) -> str:
    """The endpoint's label without its explanation in brackets (its id when it has none)."""
    label = str(endpoint.get("label") or endpoint.get("id"))
    return re.sub(r"\s*\([^()]*\)\s*$", "", label).strip() or label


def _left_out(section: Section, endpoint, entry) -> None:
    """The count of participants without a usable value, by reason; the listing itself is in the appendix."""
    listing, _ = _listing_of(endpoint, entry)
    if listing is None:
        return
    reasons = {}
    for row in rows_as_dicts(listing):
        reasons[row.get("reason")] = reasons.get(row.get("reason"), 0) + 1
    section.paragraph(f"{len(listing['data'])} participant(s) of the population have no value these analyses can "
                      "use (" + "; ".join(f"{reason}: {n}" for reason, n in reasons.items())
                      + "). A fit leaves them out; an imputation keeps those with a visit due. They are listed "
                        f"one by one in the appendix '{LISTINGS_TITLE}' at the end of this report, and as a CSV "
                        "file beside it.")


def _listing_of(endpoint, entry) -> tuple[Mapping[str, Any] | None, str]:
    """The left-out listing of a flow entry's analyses (None without one) and those analyses' labels."""
    target = (entry.get("estimand"), entry.get("population"))
    analyses = [a for a in endpoint.get("analyses") or [] if (a.get("estimand"), a.get("population")) == target]
    listing = next((a.get("left_out") for a in analyses if a.get("left_out")), None)
    names = "; ".join(str(a.get("label") or a.get("id")) for a in analyses)   # labels hold commas
    return (listing if listing and listing.get("data") else None), names


LISTINGS_TITLE = "Appendix: participant listings"


def listings_section(results: Mapping[str, Any], number_format: NumberFormat) -> Section | None:
    """Per-participant listings, at the end of the report: a reviewer reaches the efficacy results
    first, and the flow section keeps the counts and says where the names are (None: no listing)."""
    section = Section("listings", LISTINGS_TITLE)
    endpoints = results.get("endpoints") or []
    for position, endpoint in enumerate(endpoints):
        for index, entry in enumerate(endpoint.get("flow") or []):
            listing, names = _listing_of(endpoint, entry)
            if listing is None:
                continue
            slug = f"flow_{position + 1}_{index + 1}"
            table = from_results_table(listing, slug=f"{slug}_left_out", number_format=number_format,
                                       title=f"Participants without any value used ({names})",
                                       labels={"participant": "Participant", "arm": "Arm", "reason": "Reason"},
                                       kinds={"participant": "text", "arm": "text", "reason": "text"})
            part = section.child(slug, _who(results, endpoint, entry, name_endpoint=len(endpoints) > 1))
            if len(listing["data"]) <= LONGEST_LISTING:
                part.table(table)
            else:
                part.csv_only([table])
    if not section.subsections:
        return None
    section.blocks.insert(0, Block("paragraph", (
        "Participants of each analysis population without any value the analyses can use, one row per participant, "
        "with the reason; the participant-flow section counts them. Listings longer than "
        f"{LONGEST_LISTING} rows are CSV files only.")))
    return section


def visit_assignment(section: Section, results: Mapping[str, Any], number_format: NumberFormat) -> None:
    """How records became analysis visits: kept, moved by their study day, or not analysed."""
    source = results.get("visit_assignment")
    if not source or not source.get("data"):
        return
    windowing = ((results.get("plan") or {}).get("visits") or {}).get("windowing")
    part = section.child("visits", "How records were assigned to visits")
    rows = rows_as_dicts(source)
    moved = sum(r["records"] for r in rows if str(r["what_happened"]).startswith(("moved", "placed")))
    if windowing:
        part.paragraph(f"The plan assigns records to visits by their study day (visit windows): {moved} analysed "
                       "record(s) sit at a visit other than the one they were recorded as. The plan switch "
                       "visits.windowing: false keeps the visits as the data names them (for example an analysis "
                       "dataset's AVISIT) instead.")
    else:
        part.paragraph("The plan keeps the visits as the data names them (visits.windowing: false): no record was "
                       "moved.")
    part.table(from_results_table(source, slug="visit_assignment", number_format=number_format,
                                  title="Post-baseline records by analysis visit and what the assignment did",
                                  labels={"visit": "Visit", "what_happened": "What happened", "records": "Records"},
                                  kinds={"visit": "text", "what_happened": "text", "records": "count"}))
