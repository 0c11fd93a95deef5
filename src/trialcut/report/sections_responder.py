"""Report sections for binary and count endpoints and for subgroups, from Results alone.

* ``responder_figures``: the standardised proportions (or rates) of a GEE over the visits with
  their confidence intervals, and the crude rates of a whole-period rate analysis.
* ``subgroups``: per plan-declared factor, the effect within each level (N per arm), the
  overall estimate of the primary analysis and the test of equal effects across the levels,
  as a table and a forest plot, with the caution that subgroup results are exploratory.
  Ratios are drawn on the log scale, labelled with the ratios themselves.
"""
from __future__ import annotations

import math
from typing import Any, Mapping

from trialcut.report import figures as draw
from trialcut.report.blocks import Section
from trialcut.report.context import EndpointContext
from trialcut.report.tables import from_results_table, rows_as_dicts

RATIO_EFFECTS = ("risk_ratio", "odds_ratio", "rate_ratio")
METHOD_WORDS = {
    "gee": "Generalized estimating equations (robust sandwich variance) over the visits, with standardised "
           "(g-computation) proportions or rates per arm and visit and delta-method intervals",
    "rate": "Event rate over the whole period with exposure time as offset (negative binomial unless stated), "
            "standardised rates per arm and delta-method intervals",
    "proportions": "Responders at one visit: unadjusted difference (Newcombe's hybrid score interval), "
                   "Mantel–Haenszel difference and odds ratio over the strata, Cochran–Mantel–Haenszel test, "
                   "and the covariate-adjusted standardised difference",
}


def _figure(slug: str, title: str, alt: str, render, context: EndpointContext, note: str = ""):
    return draw.FigureImage(f"{context.slug}_{slug}", title, alt, None, note=note, job=render)


def endpoint_extras(section: Section, results, endpoint: Mapping[str, Any], number_format) -> None:
    """What a binary or count endpoint and the plan's subgroups add to an endpoint's section."""
    context = EndpointContext(results, endpoint, number_format)
    analyses = [a for a in endpoint.get("analyses") or [] if a.get("method") in METHOD_WORDS
                and a.get("status") in (None, "ok")]
    if analyses:
        child = section.child("responder_methods", "Binary and count analyses: methods and figures")
        for analysis in analyses:
            child.paragraph(f"{analysis.get('label') or analysis.get('id')}: {METHOD_WORDS[analysis['method']]}.")
            responder_figures(child, context, analysis)
    if endpoint.get("subgroups"):
        subgroups(section.child("subgroups", "Subgroup analyses"), context, endpoint)


def responder_figures(section: Section, context: EndpointContext, analysis: Mapping[str, Any]) -> None:
    tables = analysis.get("tables") or {}
    if analysis.get("method") == "gee" and tables.get("marginal_means"):
        points = [{"arm": r.get("arm"), "visit": r.get("visit"), "centre": r.get("estimate"),
                   "lower": r.get("lower"), "upper": r.get("upper")} for r in rows_as_dicts(tables["marginal_means"])]
        binary = (analysis.get("fit") or {}).get("family") == "binomial"
        what = "proportion of responders" if binary else "event rate per unit of exposure"
        section.figure(_figure(
            f"{analysis.get('id')}_standardised", f"Standardised {what} by arm and visit with confidence intervals",
            f"Line chart of the standardised {what} for {len(context.arms)} arms at {len(context.visits)} visits.",
            lambda: draw.profile_chart(points, arms=context.arms, visits=context.visits,
                                       visit_days=context.visit_days, y_label=what.capitalize(),
                                       reference_line=False), context,
            note="Standardised: each participant's prediction in each arm, averaged over the participants."))
    if analysis.get("method") == "rate" and tables.get("rates"):
        rows = [{"label": "Event rate", "arm": r.get("arm"), "estimate": r.get("estimate"), "lower": r.get("lower"),
                 "upper": r.get("upper")} for r in rows_as_dicts(tables["rates"])]
        section.figure(_figure(
            f"{analysis.get('id')}_rates", "Standardised event rate by arm with confidence intervals",
            f"Interval chart of the event rate per unit of exposure in {len(rows)} arms.",
            lambda: draw.forest_chart(rows, arms=context.arms, x_label="Events per unit of exposure"), context,
            note="Rates per unit of the exposure column's time, standardised over the participants."))


def subgroups(section: Section, context: EndpointContext, endpoint: Mapping[str, Any]) -> None:
    entries = endpoint.get("subgroups") or []
    if not entries:
        return
    primary = next((a for a in endpoint.get("analyses") or [] if a.get("role") == "primary"), None)
    section.notice(entries[0].get("caution") or "Subgroup results are exploratory.")
    for entry in entries:
        child = section.child(f"subgroup_{entry.get('id')}", f"Subgroups: {entry.get('label')}")
        for note in entry.get("notes") or []:
            child.paragraph(str(note))
        # Both tables stand alone (N per arm of the population, how the levels were fitted, source).
        child.table(context.standalone(from_results_table(
            entry["levels"], slug=f"{context.slug}_subgroup_{entry.get('id')}", number_format=context.number_format,
            title=entry["levels"].get("title"), **_subgroup_layout(entry["levels"], primary)), primary,
            notes=[SUBGROUP_FIT_NOTE, entry.get("caution") or ""]))
        child.table(context.standalone(from_results_table(
            entry["interaction"], slug=f"{context.slug}_subgroup_{entry.get('id')}_test",
            number_format=context.number_format, labels={"statistic": "Chi-square", "levels_fitted": "Levels fitted"},
            hide=("test",) if _only_test(entry["interaction"], "equal_effects") else (),
            # Every endpoint has this test per factor: the title names the endpoint.
            title=context.title(str(entry["interaction"].get("title") or "Test of equal effects across the levels"),
                                primary)), primary, notes=[INTERACTION_NOTE]))
        rows = _forest_rows(entry, primary, context)
        if rows:
            child.figure(_forest(entry, rows, primary, context))


SUBGROUP_FIT_NOTE = ("Each level: the primary analysis fitted again on the participants of that level, with the "
                     "factor left out of the covariates and strata. N in arm, N in reference arm: participants of "
                     "the level in each arm.")
INTERACTION_NOTE = ("Chi-square: the weighted sum of squared deviations of the levels' estimates from their "
                    "inverse-variance weighted mean (Cochran's Q; ratios on the log scale), referred to a "
                    "chi-square distribution with the levels fitted minus one degrees of freedom.")


def _only_test(table: Mapping[str, Any], name: str) -> bool:
    """Whether every row is the test the title already names (its column then says nothing)."""
    return all(row.get("test") == name for row in rows_as_dicts(table))


def _subgroup_layout(levels: Mapping[str, Any], primary) -> dict[str, Any]:
    """Columns that say nothing (every status 'ok', every note empty, the reference arm) left out, and a
    binary or count effect with the decimals of proportions and ratios (0.85, not 0.9)."""
    columns = list(levels.get("columns") or [])
    rows = levels.get("data") or []

    def constant(name, values):
        return name in columns and all(r[columns.index(name)] in values for r in rows)
    hide = [c for c, values in (("status", ("ok",)), ("note", ("", None)), ("reference", ())) if c in columns
            and (constant(c, values) or c == "reference")]
    kinds = ({c: "proportion" for c in ("estimate", "se", "lower", "upper") if c in columns}
             if (primary or {}).get("method") in ("gee", "rate", "proportions") else {})
    return {"hide": tuple(hide), "kinds": kinds, "labels": {"n_arm": "N in arm", "n_reference": "N in reference arm"}}


def _effect(primary) -> str:
    differences = ((primary or {}).get("tables") or {}).get("differences")
    effects = {r.get("effect") for r in rows_as_dicts(differences)} if differences else set()
    return next(iter(effects - {None}), "difference")


def _forest_rows(entry, primary, context) -> list[dict[str, Any]]:
    ratio = _effect(primary) in RATIO_EFFECTS
    scale = (lambda v: math.log(v) if v is not None and v > 0 else None) if ratio else (lambda v: v)
    rows = []
    for row in rows_as_dicts((primary or {}).get("tables", {}).get("differences")):
        if row.get("visit") in (context.primary_visit, "Whole period") and row.get("estimate") is not None:
            rows.append({"label": "All participants", "primary": True, "arm": row.get("arm"),
                         "estimate": scale(row["estimate"]), "lower": scale(row.get("lower")),
                         "upper": scale(row.get("upper"))})
    levels = rows_as_dicts(entry["levels"])
    totals: dict[Any, int] = {}
    for row in levels:      # participants of the level in every arm: each arm once, the reference once
        totals[row.get("level")] = totals.get(row.get("level"), row.get("n_reference") or 0) + (row.get("n_arm") or 0)
    for row in levels:
        if row.get("status") != "ok" or row.get("estimate") is None:
            continue
        rows.append({"label": f"{row.get('level')} (N = {totals[row.get('level')]})",
                     "arm": row.get("arm"), "estimate": scale(row["estimate"]), "lower": scale(row.get("lower")),
                     "upper": scale(row.get("upper"))})
    return rows


def _forest(entry, rows, primary, context):
    effect = _effect(primary)
    ratio = effect in RATIO_EFFECTS
    tests = "; ".join(f"{r.get('arm')}: p = {context.number_format.cell(r.get('p'), 'p')}"
                      for r in rows_as_dicts(entry["interaction"]) if r.get("p") is not None)
    label = (lambda v: "" if v is None else f"{math.exp(v):.2f}") if ratio else \
        (lambda v: context.number_format.cell(v, "mean"))
    x_label = f"log {effect.replace('_', ' ')} (numbers at the right: the ratio)" if ratio else \
        f"Difference from {context.reference}"
    return _figure(
        f"subgroup_{entry.get('id')}_forest", f"Effect by {entry.get('label')} at {context.primary_visit}",
        f"Forest plot of the effect in each level of {entry.get('label')} and in all participants.",
        lambda: draw.forest_chart(rows, arms=context.arms, x_label=x_label, label=label), context,
        note=f"Test of equal effects across levels (treatment-by-subgroup interaction): {tests or 'not computed'}. "
             "N: participants of the level in all arms (per arm in the table above). Subgroup results are exploratory "
             "unless prespecified with control of error.")
