"""The multiplicity section of a run whose plan spends alpha over planned looks.

Reads only ``results["multiplicity"]`` (with its ``sequential`` block).  An interim look
says so in its first sentence and never speaks of rejection; a cut that is not a planned
look shows nominal p-values and a caution, and no decision column at all.
"""
from __future__ import annotations

from typing import Any, Mapping

from trialcut.report.blocks import Section
from trialcut.report.formatting import NumberFormat
from trialcut.report.tables import from_results_table

SPENDING_WORDS = {"obrien_fleming_type": "Lan–DeMets O'Brien–Fleming-type",
                  "pocock_type": "Lan–DeMets Pocock-type", "hwang_shih_decani": "Hwang–Shih–DeCani"}
METHOD_WORDS = {"holm": "Holm", "hochberg": "Hochberg", "bonferroni": "Bonferroni",
                "graphical": "graphical", "none": "no multiplicity"}


def multiplicity_by_look(section: Section, results: Mapping[str, Any], number_format: NumberFormat,
                         analysis_labels: Mapping[str, str]) -> None:
    record = results.get("multiplicity") or {}
    facts = record.get("sequential") or {}
    section.paragraph(_look_sentence(record, facts))
    for caution in facts.get("cautions") or []:
        section.notice(caution)
    hypotheses = _with_labels(record.get("hypotheses"), analysis_labels)
    if hypotheses is None:
        return
    final = facts.get("planned_look") and facts.get("look") == facts.get("looks")
    decision = "Rejected" if final else "Boundary crossed (interim)"
    # The analysis, arm and visit name each hypothesis; its plan id is for the CSV file. Equal
    # weights (the usual Holm set-up) say nothing, so their column is left out (issue 9).
    rows = hypotheses.get("data") or []
    columns = list(hypotheses.get("columns") or [])
    weights = {row[columns.index("weight")] for row in rows} if "weight" in columns else set()
    hidden = ("tested", "id", *(("weight",) if len(weights) <= 1 else ()))
    section.table(from_results_table(
        hypotheses, slug="multiplicity", title=hypotheses.get("title") or "Tests of the hypotheses",
        number_format=number_format, hide=hidden, wide=True,
        labels={"id": "Hypothesis", "analysis": "Analysis", "weight": "Weight", "p": "Nominal p-value",
                "local_alpha": "Alpha held", "boundary_z": "Boundary |z|", "boundary_p": "Boundary p-value",
                "crossed_alone": "Crosses at its own initial alpha", "crossed_adjusted": decision},
        kinds={"p": "p_exact", "local_alpha": "alpha", "boundary_z": "boundary_z", "boundary_p": "boundary_p",
               "crossed_alone": "flag", "crossed_adjusted": "flag", "weight": "general"}))
    if facts.get("planned_look") and "crossed_adjusted" in columns:
        section.paragraph(_conclusion(rows, columns, final, f"{record.get('alpha', 0.05):g}"))
    if facts.get("boundaries"):
        section.table(from_results_table(
            facts["boundaries"], slug="multiplicity_boundaries", number_format=number_format,
            labels={"look": "Look", "information_fraction": "Information fraction",
                    "cumulative_alpha": "Alpha spent so far", "boundary_z": "Boundary |z|",
                    "boundary_p": "Boundary p-value"},
            kinds={"look": "count", "information_fraction": "fraction", "cumulative_alpha": "boundary_p",
                   "boundary_z": "boundary_z", "boundary_p": "boundary_p"}))


def _look_sentence(record: Mapping[str, Any], facts: Mapping[str, Any]) -> str:
    spending = SPENDING_WORDS.get(facts.get("spending"), str(facts.get("spending")))
    if facts.get("parameter") is not None:
        spending += f" (γ = {facts['parameter']:g})"
    reached = facts.get("information_reached")
    reached_text = f"{reached:.3f}" if isinstance(reached, (int, float)) else "not measured"
    basis = f"information fraction reached {reached_text} ({facts.get('information_basis')})"
    method = METHOD_WORDS.get(record.get("method"), str(record.get("method")))
    alpha = f"{record.get('alpha', 0.05):g}"
    if not facts.get("planned_look"):
        return (f"Cut {facts.get('cut')!r} is not a planned look (the plan plans {facts.get('looks')}); "
                f"{basis}. Nominal p-values only: no decision is taken on them.")
    look, looks = facts.get("look"), facts.get("looks")
    used = facts.get("fractions_used") or []
    boundary = _boundary_at_look(facts)
    opening = f"Look {look} of {looks} (final analysis)" if look == looks else f"Interim look {look} of {looks}"
    return (f"{opening}, {basis}; boundaries recomputed at the information "
            f"fractions {', '.join(f'{t:.3f}' for t in used)} with {spending} spending of a two-sided "
            f"{alpha}; boundary at this look at the full alpha: {boundary}. Hypotheses go through the "
            f"{method} procedure with group-sequential boundaries for the alpha each holds.")


def _conclusion(rows: list, columns: list, final: bool, alpha: str) -> str:
    """One sentence a reviewer can quote: which comparisons crossed, at the final or an interim look."""
    def name(row) -> str:
        parts = [str(row[columns.index(c)]) for c in ("arm", "visit") if c in columns and row[columns.index(c)]]
        return " at ".join(parts) or (str(row[columns.index("id")]) if "id" in columns else "a hypothesis")

    crossed = [name(r) for r in rows if r[columns.index("crossed_adjusted")]]
    if final:
        if not crossed:
            return f"Conclusion: no hypothesis is rejected at the overall two-sided level {alpha}."
        return (f"Conclusion: {len(crossed)} of {len(rows)} hypotheses rejected at the overall two-sided level "
                f"{alpha} ({'; '.join(crossed)}).")
    if not crossed:
        return "At this interim look no boundary is crossed."
    return (f"At this interim look the boundary is crossed for {'; '.join(crossed)}; this is not a final "
            "decision, which the plan's stopping rules and the committee's review govern.")


def _boundary_at_look(facts: Mapping[str, Any]) -> str:
    table = facts.get("boundaries") or {}
    columns = list(table.get("columns") or [])
    rows = table.get("data") or []
    if not rows or "boundary_z" not in columns:
        return "not computed"
    last = rows[-1]
    z, p = last[columns.index("boundary_z")], last[columns.index("boundary_p")]
    return "none (no alpha spent)" if z is None else f"|z| ≥ {z:.3f} (nominal p ≤ {p:.5f})"


def _with_labels(hypotheses: Mapping[str, Any] | None, labels: Mapping[str, str]) -> Mapping[str, Any] | None:
    if not hypotheses or not hypotheses.get("data"):
        return None
    columns = list(hypotheses.get("columns") or [])
    if "analysis" not in columns:
        return hypotheses
    position = columns.index("analysis")
    return {**hypotheses, "data": [[labels.get(v, v) if i == position else v for i, v in enumerate(row)]
                                   for row in hypotheses.get("data") or []]}
