"""What every part of an endpoint's section needs, and what makes its tables stand alone.

A table pasted into a study report must be read without the pages around it: its title names
the analysis, the estimand and the population; a header row gives N per arm; footnotes give
the model, covariates, degrees of freedom, confidence level, abbreviations and the source
(analysis id, run, data hash prefix).  :class:`EndpointContext` builds those pieces from
results.json alone.
"""
from __future__ import annotations

import re
from typing import Any, Mapping, Sequence

from trialcut.report.formatting import NumberFormat, short_hash
from trialcut.report.tables import ReportTable, rows_as_dicts

# Abbreviations a table may use, explained in its footnotes when (and only when) it uses them.
ABBREVIATIONS = (
    ("N", "participants in the analysis population"), ("n", "participants with a value"),
    ("SD", "standard deviation"), ("DF", "degrees of freedom"),
    ("MMRM", "mixed model for repeated measures"), ("ANCOVA", "analysis of covariance"),
    ("REML", "restricted maximum likelihood"), ("ML", "maximum likelihood"),
    ("MAR", "missing at random"), ("F", "F statistic"), ("t", "t statistic"),
)
ABBREVIATION_PATTERNS = {short: re.compile(rf"(?<![\w-]){re.escape(short)}(?![\w-])") for short, _ in ABBREVIATIONS}


class EndpointContext:
    """Labels, arms, visits, decimals and population counts of one endpoint."""

    def __init__(self, results: Mapping[str, Any], endpoint: Mapping[str, Any], number_format: NumberFormat):
        plan = results.get("plan") or {}
        self.results, self.endpoint, self.number_format = results, endpoint, number_format
        self.slug = str(endpoint.get("id") or "endpoint")
        arms = plan.get("arms") or {}
        self.arms = [a.get("code") for a in arms.get("list") or []] or _levels(endpoint, "arm")
        self.reference = arms.get("reference") or (self.arms[0] if self.arms else "")
        self.strata = list(arms.get("strata") or [])
        schedule = (plan.get("visits") or {}).get("schedule") or []
        self.visits = [v.get("label") for v in schedule] or _levels(endpoint, "visit")
        self.visit_days = {v.get("label"): v.get("day") for v in schedule}
        self.primary_visit = endpoint.get("primary_visit")
        self.label = endpoint.get("label") or self.slug
        self.analysed = endpoint.get("analysed", "change")
        self.type = endpoint.get("type") or "continuous"   # results made before the key: continuous
        self.settings = plan.get("report") or {}
        self.columns = plan.get("columns") or {}
        run = results.get("run") or {}
        self.seed = run.get("seed") or 0
        self.run_id = str(run.get("id") or "not recorded")
        self.data_hash = short_hash((results.get("data") or {}).get("sha256"), 12)
        self.population_labels = {p.get("id"): p.get("label") or p.get("id") for p in plan.get("populations") or []}
        self.estimand_labels = {e.get("id"): e.get("label") or e.get("id") for e in plan.get("estimands") or []}
        self.population = endpoint.get("population")
        if self.population is None and self.population_labels:
            self.population = next(iter(self.population_labels))

    # ------------------------------------------------------------------ words
    @property
    def y_label(self) -> str:
        """The axis title of a value plotted over visits: what is plotted, not the score's range."""
        if self.type == "binary":   # what is plotted is the response, not the score it may come from
            return "Proportion responding"
        name = re.sub(r"\s*\([^()]*\)\s*$", "", self.label).strip()
        if self.analysed == "change":
            if not name.lower().startswith("change"):
                name = f"Change from baseline in {name[:1].lower() + name[1:]}"
            return name
        return name or "Value"

    @property
    def better(self) -> str | None:
        """'lower' or 'higher': the plan's ``better`` key; without it, what the label says; else None."""
        stated = self.endpoint.get("better")
        if stated in ("lower", "higher"):
            return stated
        text = self.label.lower()
        if re.search(r"higher (values? )?(is|are) worse|lower (values? )?(is|are) better", text):
            return "lower"
        if re.search(r"higher (values? )?(is|are) better|lower (values? )?(is|are) worse", text):
            return "higher"
        return None

    def favours_words(self) -> tuple[str, str] | None:
        """(left, right) of a difference axis, arm minus reference: which side favours which arm."""
        if self.better == "lower":
            return "favours the active arm", f"favours {self.reference}"
        if self.better == "higher":
            return f"favours {self.reference}", "favours the active arm"
        return None

    def population_label(self, population_id: str | None) -> str:
        return str(self.population_labels.get(population_id, population_id or "population not recorded"))

    def estimand_label(self, estimand_id: str | None) -> str:
        return str(self.estimand_labels.get(estimand_id, estimand_id or "no estimand named"))

    def scope(self, analysis: Mapping[str, Any] | None) -> str:
        """'primary estimand; full analysis set' — left out where the analysis' own label says it."""
        analysis = analysis or {}
        label = str(analysis.get("label") or "").lower()
        parts = []
        if analysis.get("estimand"):
            estimand = _lower_first(_short(self.estimand_label(analysis.get("estimand"))))
            if estimand.lower() not in label:
                parts.append(estimand)
        population = _lower_first(self.population_label(analysis.get("population") or self.population))
        if population.lower() not in label:
            parts.append(population)
        return ", ".join(parts)

    def title(self, what: str, analysis: Mapping[str, Any] | None = None) -> str:
        """A unique title: what the table shows, of which analysis, for which estimand and population
        (and of which endpoint, when the plan has more than one: their tables otherwise read alike)."""
        if len(self.results.get("endpoints") or []) > 1:
            what = f"{what} ({_short(self.label)})"
        if analysis is None:
            return f"{what}; {_lower_first(self.population_label(self.population))}"
        scope = self.scope(analysis)
        name = analysis.get("label") or analysis.get("id")
        return f"{what}: {name}" + (f"; {scope}" if scope else "")

    # ------------------------------------------------------------------ counts
    def population_counts(self, population_id: str | None = None) -> dict[str, int]:
        """N per arm of a population, from the run's population table (by the population's label)."""
        wanted = self.population_label(population_id or self.population)
        for row in rows_as_dicts(self.results.get("populations")):
            if row.get("population") in (wanted, population_id or self.population):
                return {arm: row[arm] for arm in self.arms if isinstance(row.get(arm), int)}
        return {}

    def counts_line(self, population_id: str | None = None) -> str:
        counts = self.population_counts(population_id)
        population = self.population_label(population_id or self.population)
        if not counts:
            return f"{population}: participants per arm not recorded"
        return f"{population}: " + "; ".join(f"{arm} N = {n}" for arm, n in counts.items())

    # ------------------------------------------------------------------ footnotes
    def source_line(self, analysis: Mapping[str, Any] | None = None) -> str:
        what = f"analysis {analysis.get('id')} of run {self.run_id}" if analysis else f"run {self.run_id}"
        return f"Source: {what}; data file SHA-256 {self.data_hash}…; endpoint {self.slug}."

    def standalone(self, table: ReportTable | None, analysis: Mapping[str, Any] | None = None, *,
                   notes: Sequence[str] = (), population: str | None = None,
                   populations: Sequence[str] = (), source: str | None = None) -> ReportTable | None:
        """``table`` with N per arm in its header and its footnotes (notes, abbreviations, source).

        ``populations``: a table whose rows use several populations shows N per arm of each (more
        than one given); ``source``: the source line of a table drawn from several analyses."""
        if table is None:
            return None
        from dataclasses import replace

        population = population or (analysis or {}).get("population") or self.population
        counts = ("  ".join(self.counts_line(p) + "." for p in populations) if len(populations) > 1
                  else self.counts_line(populations[0] if populations else population))
        lines = [n for n in notes if n]
        text = " ".join([table.title, *[c.label for c in table.display], *lines])
        used = [f"{short}: {words}" for short, words in ABBREVIATIONS
                if ABBREVIATION_PATTERNS[short].search(text) or (short == "N")]
        lines.append("Abbreviations: " + "; ".join(used) + ".")
        lines.append(source or self.source_line(analysis))
        return replace(table, counts=counts, footnotes=tuple(lines))


def _short(label: str) -> str:
    """A label without its explanation in brackets: 'Primary estimand (effect had …)' -> 'Primary estimand'."""
    return re.sub(r"\s*\(.*\)\s*$", "", label).strip() or label


def _lower_first(text: str) -> str:
    """Lower-case the first letter of a phrase used mid-sentence, unless it starts an acronym."""
    if len(text) > 1 and text[0].isupper() and not text[1].isupper():
        return text[0].lower() + text[1:]
    return text


def _levels(endpoint: Mapping[str, Any], column: str) -> list[str]:
    seen: list[str] = []
    for row in rows_as_dicts(endpoint.get("descriptive")):
        if row.get(column) not in seen:
            seen.append(row.get(column))
    return seen


__all__ = ["EndpointContext"]
