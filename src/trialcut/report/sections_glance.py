"""Primary results at a glance: each endpoint's primary estimate, near the front of the report.

A reviewer opening the report should not have to turn past the run record, estimands,
populations and conformance to find the answer the trial was run for.  This section repeats,
for every endpoint and active arm, the primary analysis' estimate at the primary visit (or over
the whole period) with its confidence interval and p-value, printed by the same NumberFormat and
kinds as that analysis' own table of differences, and says where the full table is.  It draws no
conclusion: the decision on each hypothesis stays in the multiple comparisons section.

The table numbers are known only once the document is numbered, so the "Full table" column is
filled by :func:`name_places` after numbering (document.py calls it).
"""
from __future__ import annotations

from dataclasses import replace
from typing import Any, Mapping, Sequence

from trialcut.report.blocks import Section, walk
from trialcut.report.context import EndpointContext, _lower_first
from trialcut.report.formatting import NumberFormat
from trialcut.report.sections_analysis import (
    EFFECT_WORDS, RATIO_EFFECTS, _effect_scale, _estimates_at_primary_visit, _level_text, _short_label,
)
from trialcut.report.sections_front import look_banner
from trialcut.report.tables import ReportTable, from_records

ANCHOR = "glance"
TITLE = "Primary results at a glance"
TABLE_SLUG = "primary_results_at_a_glance"
# A place not yet numbered: "<endpoint section anchor>-primary", replaced by name_places.
PLACE_MARK = "place:"
COLUMNS = ("endpoint", "analysis", "arms", "visit", "effect", "estimate_text", "interval_text", "p_text", "place",
           # In the CSV file (numbers at full precision); shown in the columns above.
           "estimand", "population", "arm", "n_arm", "reference", "n_reference", "estimate", "lower", "upper", "p")
SHOWN = 9
LABELS = {"endpoint": "Endpoint", "analysis": "Primary analysis; estimand, population",
          "arms": "Arm (N) against reference (N)", "visit": "Visit", "effect": "Effect measure",
          "estimate_text": "Estimate", "p_text": "p-value", "place": "Full table"}


def glance_section(results: Mapping[str, Any], base_format: NumberFormat) -> Section | None:
    """The section, or None when the results carry no endpoint."""
    endpoints = results.get("endpoints") or []
    if not endpoints:
        return None
    section = Section(ANCHOR, TITLE)
    rows, levels, populations, contexts = [], {}, [], []
    for position, endpoint in enumerate(endpoints):
        context = EndpointContext(results, endpoint, NumberFormat.from_results(results, raw=endpoint.get("decimals")))
        analyses = endpoint.get("analyses") or []
        primary = next((a for a in analyses if a.get("role") == "primary"), analyses[0] if analyses else None)
        if primary is None:
            rows.extend(_missing_row(context, None, f"endpoint{position + 1}", "no analysis recorded"))
            continue
        contexts.append((context, primary))
        population = primary.get("population") or context.population
        if population not in populations:
            populations.append(population)
        levels.setdefault(_level_text(primary.get("options") or {}), []).append(context.label)
        rows.extend(_rows(context, primary, f"endpoint{position + 1}"))
    section.table(_table(rows, levels, populations, contexts, base_format))
    section.paragraph(_closing(results))
    return section


def _rows(context: EndpointContext, primary: Mapping[str, Any], anchor: str) -> list[dict[str, Any]]:
    if primary.get("status") not in (None, "ok"):
        return _missing_row(context, primary, anchor, f"failed: {primary.get('error') or 'no message was recorded'}")
    differences = (primary.get("tables") or {}).get("differences") or {}
    kinds, _, _ = _effect_scale(primary, differences)
    # The kinds the differences table gives these columns (tables.from_results_table), so both print alike.
    estimate_kind, interval_kind = kinds.get("estimate") or "mean", kinds.get("lower") or "mean"
    p_kind = kinds.get("p") or "p"
    number_format = context.number_format
    found = [r for r in _estimates_at_primary_visit(context, [primary]) if r.get("arm_code") != context.reference]
    # The plan's order of arms in every endpoint's rows, whatever order the analysis wrote them in.
    order = {arm: position for position, arm in enumerate(context.arms)}
    found.sort(key=lambda r: order.get(r.get("arm_code"), len(order)))
    if not found:
        return _missing_row(context, primary, anchor, f"no estimate at {context.primary_visit} in its table")
    rows = []
    for estimate in found:
        row = _common(context, primary, anchor, estimate.get("arm_code"))
        visit = estimate.get("visit")
        row.update(visit=visit if visit is not None else "whole period",
                   effect=_effect_text(estimate.get("effect")),
                   estimate_text=number_format.cell(estimate.get("estimate"), estimate_kind),
                   interval_text=number_format.interval(estimate.get("lower"), estimate.get("upper"), interval_kind),
                   p_text=number_format.cell(estimate.get("p"), p_kind),
                   estimate=estimate.get("estimate"), lower=estimate.get("lower"), upper=estimate.get("upper"),
                   p=estimate.get("p"))
        rows.append(row)
    return rows


def _missing_row(context: EndpointContext, primary, anchor: str, reason: str) -> list[dict[str, Any]]:
    """One row per active arm that says why there is no estimate: a blank would read as 'not planned'."""
    active = [arm for arm in context.arms if arm != context.reference] or [None]
    rows = []
    for arm in active:
        row = _common(context, primary or {}, anchor, arm)
        row.update(visit=context.primary_visit or "not recorded", effect=_effect_text(None),
                   estimate_text=reason, interval_text="not estimated", p_text="not estimated")
        rows.append(row)
    return rows


def _common(context: EndpointContext, analysis: Mapping[str, Any], anchor: str, arm: str | None) -> dict[str, Any]:
    population = analysis.get("population") or context.population
    counts = context.population_counts(population)
    label = str(analysis.get("label") or analysis.get("id") or "none recorded")
    scope = context.scope({**analysis, "population": population}) if analysis else ""   # what the label does not say
    return {"endpoint": _short_label(context.label), "analysis": f"{label}; {scope}" if scope else label,
            "estimand": _short_label(context.estimand_label(analysis.get("estimand"))),
            "population": context.population_label(population),
            "arm": arm, "n_arm": counts.get(arm), "reference": context.reference,
            "n_reference": counts.get(context.reference),
            "arms": f"{_with_n(arm, counts.get(arm))} against {_with_n(context.reference, counts.get(context.reference))}",
            "place": f"{PLACE_MARK}{anchor}-primary"}


def _with_n(arm: str | None, n: int | None) -> str:
    if arm is None:
        return "no active arm recorded"
    return f"{arm} (N = {n})" if n is not None else f"{arm} (N not recorded)"


def _effect_text(effect: str | None) -> str:
    """What the estimate measures: a ratio is never read as a difference."""
    return EFFECT_WORDS.get(effect, effect) if effect else "difference in means"


def _table(rows, levels, populations, contexts, base_format: NumberFormat) -> ReportTable | None:
    """Every cell is text already rounded by its endpoint's rule (endpoints may differ in decimals), so
    the table's own format only prints it; the CSV file keeps the numbers at full precision."""
    if not rows:
        return None
    table = from_records(rows, COLUMNS, slug=TABLE_SLUG, number_format=base_format, labels=LABELS,
                         kinds={c: "text" for c in COLUMNS[:SHOWN]},
                         title=_title(contexts, populations))
    display = tuple(c for c in table.display if c.sources[0] in COLUMNS[:SHOWN])
    interval_label = (f"{next(iter(levels))} confidence interval" if len(levels) == 1 else "Confidence interval")
    display = tuple(replace(c, label=interval_label) if c.sources == ("interval_text",) else c for c in display)
    table = replace(table, display=display, wide=True)
    if not contexts:
        return table
    first = contexts[0][0]
    level_note = (f"Confidence level: {next(iter(levels))} in every primary analysis." if len(levels) == 1 else
                  "Confidence levels: " + "; ".join(f"{level} ({', '.join(_short_label(name) for name in names)})"
                                                    for level, names in levels.items()) + ".")
    ratio = any(row.get("effect") in {EFFECT_WORDS[e] for e in RATIO_EFFECTS} for row in rows)
    notes = [level_note,
             ("Differences are arm minus reference; ratios are arm over reference (see the effect measure). "
              if ratio else "Differences are each active arm minus the reference arm. ")
             + "Each number is rounded as in the full table named in its row; p-values are nominal, two-sided "
               "and unadjusted for multiple comparisons."]
    ids = ", ".join(f"{c.slug}/{p.get('id')}" for c, p in contexts)
    return first.standalone(table, notes=notes, populations=populations,
                            source=f"Source: primary analyses {ids} of run {first.run_id}; "
                                   f"data file SHA-256 {first.data_hash}….")


def _title(contexts: Sequence[tuple[EndpointContext, Mapping[str, Any]]], populations: Sequence[str]) -> str:
    what = "Primary results at a glance: each endpoint's primary analysis, every active arm against the reference"
    if not contexts:
        return what
    context = contexts[0][0]
    return f"{what}; {' or '.join(_lower_first(context.population_label(p)) for p in populations)}"


def _closing(results: Mapping[str, Any]) -> str:
    """Where the rest is; short, since it stays on the table's last page."""
    text = "These are the prespecified primary analyses; sensitivity analyses are in each endpoint's section"
    multiplicity = results.get("multiplicity") or {}
    if multiplicity.get("sequential"):
        text += "; the group-sequential boundaries and the decision on each hypothesis are under Multiple comparisons."
    elif multiplicity:
        text += "; the decision on each hypothesis is under Multiple comparisons."
    else:
        text += "; the plan makes no adjustment for multiple comparisons."
    look = look_banner(results)
    if look:
        text += f" {look.split(' — ')[0].capitalize()}: the interim caution on the title page applies."
    return text


def name_places(sections: Sequence[Section], tables: Sequence[ReportTable]) -> None:
    """Fill the glance table's "Full table" column with the number and section of each primary
    analysis' table of differences, once the document is numbered (in place; ``tables`` too)."""
    places = {}
    for section in walk(sections):
        if section.anchor.endswith("-primary"):
            found = next((b.content for b in section.blocks if b.kind == "table"
                          and b.content.slug.endswith("differences")), None)
            places[section.anchor] = found.number if found is not None else f"Section {section.title}"
    for section in sections:
        if section.anchor != ANCHOR:
            continue
        for block in section.blocks:
            if block.kind == "table" and block.content.slug.endswith(TABLE_SLUG):
                old = block.content
                at = old.columns.index("place")
                rows = tuple(tuple(_place(v, places) if i == at else v for i, v in enumerate(row)) for row in old.rows)
                block.content = replace(old, rows=rows)
                for position, table in enumerate(tables):
                    if table is old:
                        tables[position] = block.content   # type: ignore[index]


def _place(value: Any, places: Mapping[str, str]) -> Any:
    if isinstance(value, str) and value.startswith(PLACE_MARK):
        return places.get(value.removeprefix(PLACE_MARK), "the endpoint's primary analysis section")
    return value


__all__ = ["glance_section", "name_places"]
