"""The endpoint part of the report: missing data, descriptive statistics, primary and sensitivity analyses."""
from __future__ import annotations

import math
import re
from dataclasses import replace
from typing import Any, Mapping, Sequence

import numpy as np

from trialcut.report import figures as draw
from trialcut.report.blocks import Section
from trialcut.report.figures import FigureImage
from trialcut.report.formatting import NumberFormat
from trialcut.report.sections_front import facts_table
from trialcut.report.tables import from_records, from_results_table, rows_as_dicts

METHOD_WORDS = {
    "mmrm": "Mixed model for repeated measures (MMRM)",
    "ancova": "Covariance analysis (ANCOVA) of observed data, one model per visit",
    "multiple_imputation": "Multiple imputation, pooled with Rubin's rules",
    "tipping_point": "Tipping-point analysis",
}
STRUCTURE_WORDS = {
    "unstructured": "unstructured", "toeplitz": "Toeplitz", "heterogeneous_toeplitz": "heterogeneous Toeplitz",
    "ar1": "first-order autoregressive", "heterogeneous_ar1": "heterogeneous first-order autoregressive",
    "compound_symmetry": "compound symmetry", "heterogeneous_compound_symmetry": "heterogeneous compound symmetry",
    "spatial_exponential": "spatial exponential (planned visit times)",
}
DF_WORDS = {
    "kenward_roger": "Kenward–Roger", "satterthwaite": "Satterthwaite",
    "participant_split": "residual degrees of freedom split into between- and within-participant parts",
    "residual": "residual (observations minus fixed effects)",
}
METHOD_SHORT = {"mmrm": "MMRM", "ancova": "ANCOVA", "multiple_imputation": "Multiple imputation",
                "tipping_point": "Tipping point"}
ASSUMPTION_WORDS = {
    "mar": "missing at random", "jump_to_reference": "jump to reference", "copy_reference": "copy reference",
    "copy_increments_in_reference": "copy increments in reference",
}
FACT_LABELS = {"complete_df": "Complete-data DF", "burn_in": "Burn-in iterations",
               "thinning": "Iterations between imputations", "chains": "Independent chains"}
AVERAGING_RULE = (
    "Model-estimated means set each numeric covariate to its mean over the participants in the fit "
    "(each participant counted once) and average over categorical covariates in their observed proportions."
)
FIT_FACTS = (
    ("converged", "Converged", "flag"), ("structure", "Covariance structure used", "text"),
    ("method", "Estimation", "text"), ("df_method", "Degrees of freedom", "text"),
    ("log_likelihood", "Log-likelihood", "criterion"), ("loglik", "Log-likelihood", "criterion"),
    ("aic", "AIC", "criterion"), ("bic", "BIC", "criterion"),
    ("n_subjects", "Participants in the fit", "count"), ("n_obs", "Observations in the fit", "count"),
    ("n_excluded_subjects", "Participants with no observed value (left out)", "count"),
    ("n_subjects_excluded", "Participants with no observed value (left out)", "count"),
    ("iterations", "Iterations", "count"), ("gradient_norm", "Gradient norm at the end", "general"),
)


def endpoint(section: Section, results, endpoint: Mapping[str, Any], number_format: NumberFormat) -> None:
    context = EndpointContext(results, endpoint, number_format)
    missing_data(section.child("missing", "Missing data"), context)
    descriptive(section.child("descriptive", "Descriptive statistics"), context)
    analyses = endpoint.get("analyses") or []
    primary = next((a for a in analyses if a.get("role") == "primary"), analyses[0] if analyses else None)
    if primary is None:
        section.notice("No analysis of this endpoint is recorded in the results.")
        return
    primary_analysis(section.child("primary", f"Primary analysis: {primary.get('label') or primary.get('id')}"),
                     context, primary)
    others = [a for a in analyses if a is not primary]
    sensitivity(section.child("sensitivity", "Sensitivity analyses"), context, primary, others)


class EndpointContext:
    """What every part of an endpoint's section needs: labels, arms, visits, decimals."""

    def __init__(self, results, endpoint, number_format: NumberFormat):
        plan = results.get("plan") or {}
        self.results, self.endpoint, self.number_format = results, endpoint, number_format
        self.slug = str(endpoint.get("id") or "endpoint")
        arms = plan.get("arms") or {}
        self.arms = [a.get("code") for a in arms.get("list") or []] or _levels(endpoint, "arm")
        self.reference = arms.get("reference") or (self.arms[0] if self.arms else "")
        schedule = (plan.get("visits") or {}).get("schedule") or []
        self.visits = [v.get("label") for v in schedule] or _levels(endpoint, "visit")
        self.visit_days = {v.get("label"): v.get("day") for v in schedule}
        self.primary_visit = endpoint.get("primary_visit")
        self.label = endpoint.get("label") or self.slug
        self.analysed = endpoint.get("analysed", "change")
        self.settings = plan.get("report") or {}
        self.seed = (results.get("run") or {}).get("seed") or 0

    @property
    def y_label(self) -> str:
        """Short enough for an axis: the kind of value and the unit in the label's last brackets."""
        unit = re.search(r"\(([^()]*)\)\s*$", self.label)
        kind = "Change from baseline" if self.analysed == "change" else "Value"
        return f"{kind} ({unit.group(1)})" if unit else kind


def _levels(endpoint, column: str) -> list[str]:
    seen: list[str] = []
    for row in rows_as_dicts(endpoint.get("descriptive")):
        if row.get(column) not in seen:
            seen.append(row.get(column))
    return seen


# --------------------------------------------------------------------------- missing data
def missing_data(section: Section, context: EndpointContext) -> None:
    endpoint, number_format = context.endpoint, context.number_format
    by_visit = endpoint.get("missing_by_visit")
    if by_visit:
        section.table(from_results_table(by_visit, slug=f"{context.slug}_missing_by_visit",
                                         title="Missing values by arm and visit", number_format=number_format))
    patterns = endpoint.get("missing_patterns")
    if patterns:
        section.paragraph(
            "A pattern has one mark per scheduled visit in time order: X where a value was observed, "
            "a dot where it is missing. A monotone pattern has no observed value after a missing one.")
        section.table(from_results_table(patterns, slug=f"{context.slug}_missing_patterns",
                                         title="Participants by pattern of observed visits",
                                         number_format=number_format))
        rows = rows_as_dicts(patterns)
        section.figure(_figure(
            "missing_patterns", "Pattern of observed and missing visits by arm",
            f"Tile chart of {len(rows)} patterns of observed visits across {len(context.arms)} arms and "
            f"{len(context.visits)} visits, with the number of participants per pattern.",
            lambda: draw.pattern_chart(rows, arms=context.arms, visits=context.visits), context))
    if not by_visit and not patterns:
        section.notice("The results carry no missing-data summaries for this endpoint.")


# --------------------------------------------------------------------------- descriptive
def descriptive(section: Section, context: EndpointContext) -> None:
    source = context.endpoint.get("descriptive")
    if not source:
        section.notice("The results carry no descriptive statistics for this endpoint.")
    else:
        section.paragraph("Observed values only; nothing is imputed or modelled here. SD uses the n − 1 divisor.")
        section.table(from_results_table(source, slug=f"{context.slug}_descriptive",
                                         title="Observed values by arm and visit",
                                         number_format=context.number_format,
                                         labels={"variable": "Variable"}))
        section.figure(_observed_means_figure(context, rows_as_dicts(source)))
    section.figure(_trajectories_figure(context))


def _observed_means_figure(context: EndpointContext, rows: list[dict]) -> FigureImage:
    wanted = "CHG" if context.analysed == "change" else "AVAL"
    if any("variable" in r for r in rows):
        rows = [r for r in rows if r.get("variable") == wanted] or rows
    points = []
    for row in rows:
        n, mean, sd = row.get("n"), row.get("mean"), row.get("sd")
        if mean is None:
            continue
        half = sd / math.sqrt(n) if sd is not None and n else 0.0
        points.append({"arm": row.get("arm"), "visit": row.get("visit"), "centre": mean,
                       "lower": mean - half, "upper": mean + half})
    return _figure(
        "observed_means", "Observed mean ± standard error by arm and visit",
        f"Line chart of the observed mean of {context.label} with bars of one standard error, "
        f"for {len(context.arms)} arms at {len(context.visits)} visits.",
        lambda: draw.profile_chart(points, arms=context.arms, visits=context.visits,
                                   visit_days=context.visit_days, y_label=context.y_label), context)


def _trajectories_figure(context: EndpointContext) -> FigureImage:
    source = context.endpoint.get("trajectories")
    if not source:
        for analysis in context.endpoint.get("analyses") or []:
            source = source or (analysis.get("diagnostics") or {}).get("trajectories")
    title = "Individual trajectories by arm"
    if not source:
        return FigureImage(f"{context.slug}_trajectories", title, "", None,
                           note="Not drawn: the results carry no per-participant values for this endpoint.")
    rows = rows_as_dicts(source)
    subject_key = next((c for c in ("USUBJID", "subject", "participant") if c in source["columns"]),
                       source["columns"][0])
    value_key = next((c for c in ("value", "outcome", "CHG", "AVAL") if c in source["columns"]),
                     source["columns"][-1])
    series: dict[str, dict[str, list]] = {}
    for row in rows:
        series.setdefault(row.get("arm"), {}).setdefault(row.get(subject_key), []).append(
            (row.get("visit"), row.get(value_key)))
    sample_size = int(context.settings.get("trajectories_sample") or 60)
    sampled, total = _sample(series, sample_size, context.seed)
    shown = sum(len(v) for v in sampled.values())
    note = (f"A random sample of {shown} of {total} participants (seed {context.seed}), split evenly across arms."
            if shown < total else f"All {total} participants.")
    figure = _figure(
        "trajectories", title,
        f"Line charts, one per arm, of {context.label} over visits for {shown} participants.",
        lambda: draw.trajectories_chart(sampled, arms=context.arms, visits=context.visits,
                                        visit_days=context.visit_days, y_label=context.y_label), context)
    return replace(figure, note=figure.note or note)


def _sample(series: dict[str, dict[str, list]], sample_size: int, seed: int):
    """A seeded sample, the same number per arm; sorted ids so the draw does not depend on row order."""
    total = sum(len(v) for v in series.values())
    if total <= sample_size:
        return series, total
    per_arm = max(1, sample_size // max(1, len(series)))
    generator = np.random.default_rng(seed)
    sampled = {}
    for arm in sorted(series, key=str):
        ids = sorted(series[arm], key=str)
        chosen = generator.choice(len(ids), size=min(per_arm, len(ids)), replace=False)
        sampled[arm] = {ids[i]: series[arm][ids[i]] for i in sorted(chosen)}
    return sampled, total


# --------------------------------------------------------------------------- primary analysis
def primary_analysis(section: Section, context: EndpointContext, analysis: Mapping[str, Any]) -> None:
    if _failed(section, analysis):
        return
    if analysis.get("method") != "mmrm":
        generic_analysis(section, context, analysis)
        return
    number_format, tables = context.number_format, analysis.get("tables") or {}
    fit, options = analysis.get("fit") or {}, analysis.get("options") or {}
    level = _level_text(options)
    section.paragraph(_model_description(context, analysis))
    section.paragraph(AVERAGING_RULE)
    section.table(_covariate_summary(context, fit))
    _fallbacks(section, context, fit, options)
    ci = f"{level} confidence interval"
    if tables.get("marginal_means"):
        section.table(from_results_table(tables["marginal_means"], slug=f"{context.slug}_model_means",
                                         title="Model-estimated means by arm and visit",
                                         number_format=number_format, intervals={ci: ("lower", "upper")}))
    if tables.get("differences"):
        section.table(_differences_table(context, tables["differences"], "primary_differences",
                                         f"Differences from {context.reference} by visit (arm minus reference)", ci))
    if tables.get("joint_tests"):
        section.table(from_results_table(tables["joint_tests"], slug=f"{context.slug}_joint_tests",
                                         title="Joint tests of the model terms", number_format=number_format,
                                         kinds={"term": "term"},
                                         note="Terms: arm, visit, arm by visit, and each covariate "
                                              "(with its own effect at each visit where the plan asks for it)."))
    if tables.get("fixed_effects"):
        section.table(from_results_table(tables["fixed_effects"], slug=f"{context.slug}_fixed_effects",
                                         title="Fixed-effect estimates", number_format=number_format,
                                         kinds={"term": "term"}))
    for name in sorted(tables):
        if name.startswith("covariance") or name.startswith("correlation"):
            kind = "sd" if name.startswith("covariance") else "correlation"
            group = name.split("_", 1)[1] if "_" in name else ""
            title = f"Estimated {name.split('_')[0]} matrix between visits" + (f" ({group})" if group else "")
            columns = tables[name].get("columns") or []
            section.table(from_results_table(tables[name], slug=f"{context.slug}_{name}", title=title,
                                             number_format=number_format,
                                             kinds={c: kind for c in columns[1:]}))
    section.table(_model_fit_facts(context, fit))
    known = {"marginal_means", "differences", "joint_tests", "fixed_effects"}
    for name, source in tables.items():
        if name not in known and not name.startswith(("covariance", "correlation")):
            section.table(from_results_table(source, slug=f"{context.slug}_{name}", number_format=number_format))
    section.figure(_model_profile_figure(context, tables.get("marginal_means"), level))
    section.figure(_residual_figure(context, analysis))


def _model_description(context: EndpointContext, analysis) -> str:
    fit, options = analysis.get("fit") or {}, analysis.get("options") or {}
    structure = fit.get("structure") or (options.get("covariance") or ["not recorded"])[0]
    method = str(fit.get("method") or options.get("method") or "reml").upper()
    df = fit.get("df_method") or options.get("df") or "not recorded"
    df_words = DF_WORDS.get(df, df)
    if df == "kenward_roger" and fit.get("second_derivatives") is False:
        df_words += " without its second-derivative term"
    parametrisation = " ".join(
        f"Kenward–Roger adjustment of the {STRUCTURE_WORDS.get(record['structure'], record['structure'])} matrix"
        + (f" ({record['group']})" if record.get("group") is not None else "") + f": {record['description']}."
        for record in fit.get("kenward_roger_parametrisation") or ())
    covariates = list(options.get("covariates") or fit.get("covariates") or [])
    by_visit = list(options.get("covariates_by_visit") or fit.get("covariates_by_visit") or [])
    covariate_text = ", ".join(covariates) if covariates else "no covariates"
    if by_visit:
        covariate_text += f"; with an effect at each visit for {', '.join(by_visit)}"
    robust = " Standard errors of the fixed effects are empirical (sandwich) estimates." if options.get("robust") else ""
    return (
        f"{context.label} was analysed with a mixed model for repeated measures: arm, visit and the "
        f"arm-by-visit interaction as fixed effects, {covariate_text}, and a "
        f"{STRUCTURE_WORDS.get(structure, structure)} covariance matrix between visits within a participant, "
        f"estimated by {method}. Degrees of freedom for tests and intervals: {df_words}. "
        f"Differences are each arm minus {context.reference}; the primary comparison is at "
        f"{context.primary_visit}.{robust}" + (f" {parametrisation}" if parametrisation else "")
    )


def _fallbacks(section: Section, context: EndpointContext, fit, options) -> None:
    planned = list(options.get("covariance") or [])
    if planned:
        section.paragraph("Covariance structures in the plan, tried in this order until one converges: "
                          + ", ".join(STRUCTURE_WORDS.get(s, s) for s in planned) + ".")
    attempts = fit.get("attempts") or []
    if attempts:
        rows = [{"structure": STRUCTURE_WORDS.get(a.get("structure"), a.get("structure")),
                 "status": _attempt_status(a),
                 "reason": a.get("reason") or a.get("message") or a.get("error") or ""} for a in attempts]
        section.table(from_records(rows, ("structure", "status", "reason"), slug=f"{context.slug}_structures_tried",
                                   title="Covariance structures tried", number_format=context.number_format,
                                   labels={"structure": "Structure", "status": "Outcome",
                                           "reason": "Reason it was set aside"}))
    if fit.get("structure") and planned and fit.get("structure") != planned[0]:
        section.notice(f"The first planned structure did not converge; the fallback "
                       f"{STRUCTURE_WORDS.get(fit['structure'], fit['structure'])} was used.")


def _attempt_status(attempt: Mapping[str, Any]) -> str:
    if attempt.get("status"):
        stage = f" at the {attempt['stage']} stage" if attempt.get("stage") and attempt["status"] != "used" else ""
        return f"{attempt['status']}{stage}"
    return "used" if attempt.get("converged") else "did not converge"


def _covariate_summary(context: EndpointContext, fit: Mapping[str, Any]):
    """The covariate values the model-estimated means average over, when the fit records them."""
    summary = fit.get("covariate_summary")
    if not isinstance(summary, Mapping) or not summary:
        return None
    pairs = [(str(name), _covariate_text(value), "text") for name, value in summary.items() if value is not None]
    return facts_table(pairs, slug=f"{context.slug}_covariate_values", title="Covariate values used for the means",
                       number_format=context.number_format) if pairs else None


def _covariate_text(value: Any) -> str:
    if not isinstance(value, Mapping):
        return f"{value:.4g}" if isinstance(value, float) else str(value)
    if isinstance(value.get("proportions"), Mapping):
        shares = ", ".join(f"{level} {100 * share:.1f}%" for level, share in value["proportions"].items())
        return f"categorical: averaged over {shares}"
    if value.get("mean") is not None:
        return f"numeric: set to its mean, {value['mean']:.4g}"
    return "; ".join(f"{k}: {v}" for k, v in value.items())


def _model_fit_facts(context: EndpointContext, fit: Mapping[str, Any]):
    pairs, used = [], set()
    for key, label, kind in FIT_FACTS:
        if key in fit and fit[key] is not None and label not in {p[0] for p in pairs}:
            value = fit[key]
            if key == "structure":
                value = STRUCTURE_WORDS.get(value, value)
            elif key == "df_method":
                value = DF_WORDS.get(value, value)
            elif key == "method":
                value = str(value).upper()
            pairs.append((label, value, kind))
            used.add(key)
    for key, value in fit.items():
        if key not in used and isinstance(value, (int, float, str, bool)) and key not in ("loglik",):
            pairs.append((key.replace("_", " ").capitalize(), value, "general" if not isinstance(value, str) else "text"))
    if not pairs:
        return None
    return facts_table(pairs, slug=f"{context.slug}_model_fit", title="Fit of the model",
                       number_format=context.number_format)


def _differences_table(context: EndpointContext, source, slug: str, title: str, ci: str, note: str = ""):
    return from_results_table(source, slug=f"{context.slug}_{slug}", title=title,
                              number_format=context.number_format, hide=("reference",),
                              intervals={ci: ("lower", "upper")}, note=note)


def _model_profile_figure(context: EndpointContext, source, level: str) -> FigureImage | None:
    if not source:
        return None
    points = [{"arm": r.get("arm"), "visit": r.get("visit"), "centre": r.get("estimate"),
               "lower": r.get("lower"), "upper": r.get("upper")} for r in rows_as_dicts(source)]
    return _figure(
        "model_means", f"Model-estimated mean profile with {level} confidence intervals",
        f"Line chart of model-estimated means of {context.label} with {level} confidence intervals "
        f"for {len(context.arms)} arms at {len(context.visits)} visits.",
        lambda: draw.profile_chart(points, arms=context.arms, visits=context.visits,
                                   visit_days=context.visit_days, y_label=context.y_label), context)


def _residual_figure(context: EndpointContext, analysis) -> FigureImage:
    source = (analysis.get("diagnostics") or {}).get("residuals")
    title = "Residual diagnostics of the primary model"
    if not source:
        return FigureImage(f"{context.slug}_residuals", title, "", None,
                           note="Not drawn: the primary analysis carries no residuals.")
    columns = source.get("columns") or []
    residual_key = next((c for c in ("scaled_residual", "normalized_residual", "standardized_residual",
                                     "residual", "residuals") if c in columns), None)
    fitted_key = next((c for c in ("fitted", "fitted_value", "prediction") if c in columns), None)
    if residual_key is None or fitted_key is None:
        return FigureImage(f"{context.slug}_residuals", title, "", None,
                           note=f"Not drawn: the residual table has no residual/fitted columns ({', '.join(columns)}).")
    pairs = [(r[fitted_key], r[residual_key]) for r in rows_as_dicts(source)
             if draw.finite([r.get(fitted_key), r.get(residual_key)])]
    label = "Scaled residual" if residual_key != "residual" and residual_key != "residuals" else "Residual"
    return _figure(
        "residuals", title,
        f"Two scatter plots of {len(pairs)} {label.lower()}s: against normal quantiles, and against fitted values.",
        lambda: draw.residual_chart([p[0] for p in pairs], [p[1] for p in pairs], residual_label=label), context,
        note=f"{label}s from the primary model ({residual_key}); the line in the quantile plot has the "
             "residuals' mean and standard deviation.")


# --------------------------------------------------------------------------- sensitivity analyses
def sensitivity(section: Section, context: EndpointContext, primary, others: Sequence[Mapping[str, Any]]) -> None:
    rows = _estimates_at_primary_visit(context, [primary, *others])
    if rows:
        section.paragraph(
            f"The primary estimate and every sensitivity estimate at {context.primary_visit}, side by side. "
            "Each row reads its analysis' table of differences from the reference arm.")
        summary = from_records(rows, ("label", "method", "arm", "estimate", "se", "lower", "upper", "p"),
                               slug=f"{context.slug}_estimates_summary",
                               title=f"Estimated difference from {context.reference} at {context.primary_visit}, "
                                     "all analyses",
                               number_format=context.number_format,
                               labels={"label": "Analysis", "method": "Method"})
        section.table(from_results_table({"columns": list(summary.columns), "data": list(summary.rows)},
                                         slug=summary.slug, title=summary.title, number_format=context.number_format,
                                         labels={"label": "Analysis", "method": "Method"},
                                         intervals={"Confidence interval": ("lower", "upper")}))
        section.figure(_figure(
            "forest", f"Estimates at {context.primary_visit} from every analysis",
            f"Forest plot of {len(rows)} estimated differences from {context.reference} at "
            f"{context.primary_visit} with confidence intervals; a dashed line marks no difference.",
            lambda: draw.forest_chart(rows, arms=context.arms,
                                      x_label=f"Difference from {context.reference}"), context))
    if not others:
        section.notice("The plan has no sensitivity analyses for this endpoint.")
    for analysis in others:
        child = section.child(str(analysis.get("id")), analysis.get("label") or str(analysis.get("id")))
        if _failed(child, analysis):
            continue
        if analysis.get("method") == "tipping_point":
            tipping_point(child, context, analysis)
        elif analysis.get("method") == "mmrm":
            mmrm_sensitivity(child, context, analysis)
        else:
            generic_analysis(child, context, analysis)


def _estimates_at_primary_visit(context: EndpointContext, analyses) -> list[dict[str, Any]]:
    rows = []
    for analysis in analyses:
        if analysis.get("status") not in (None, "ok"):
            continue
        differences = (analysis.get("tables") or {}).get("differences")
        for row in rows_as_dicts(differences):
            if row.get("visit") in (context.primary_visit, None) and row.get("estimate") is not None:
                rows.append({"label": analysis.get("label") or analysis.get("id"),
                             "method": METHOD_SHORT.get(analysis.get("method"), str(analysis.get("method"))),
                             "arm": row.get("arm"), "estimate": row.get("estimate"), "se": row.get("se"),
                             "lower": row.get("lower"), "upper": row.get("upper"), "p": row.get("p")})
    return rows


def mmrm_sensitivity(section: Section, context: EndpointContext, analysis) -> None:
    """A repeated-measures model as a sensitivity analysis: what differs, its differences and fit."""
    tables, fit = analysis.get("tables") or {}, analysis.get("fit") or {}
    section.paragraph(_model_description(context, analysis))
    plan = context.results.get("plan") or {}
    populations = {p.get("id"): p.get("label") for p in plan.get("populations") or []}
    estimands = {e.get("id"): e.get("label") for e in plan.get("estimands") or []}
    if analysis.get("population"):
        section.paragraph(f"Population: {populations.get(analysis['population'], analysis['population'])}; "
                          f"estimand: {estimands.get(analysis.get('estimand'), analysis.get('estimand') or 'none named')}.")
    if tables.get("differences"):
        section.table(_differences_table(context, tables["differences"], f"{analysis.get('id')}_differences",
                                         f"Differences from {context.reference} by visit",
                                         f"{_level_text(analysis.get('options') or {})} confidence interval"))
    section.paragraph(_fit_sentence(context, fit))


def _fit_sentence(context: EndpointContext, fit: Mapping[str, Any]) -> str:
    """A sensitivity model's fit in one sentence; the primary model gets the full table."""
    if not fit:
        return "The results record no facts about this fit."
    structure = STRUCTURE_WORDS.get(fit.get("structure"), fit.get("structure") or "an unrecorded")
    converged = "converged" if fit.get("converged") else "did not report convergence"
    parts = [f"Fit: {structure} covariance, {converged}"]
    if fit.get("iterations") is not None:
        parts[0] += f" after {fit['iterations']} iterations"
    log_likelihood = fit.get("loglik", fit.get("log_likelihood"))
    if log_likelihood is not None:
        parts.append(f"log-likelihood {context.number_format.cell(log_likelihood, 'criterion')}")
    if fit.get("n_subjects") is not None:
        parts.append(f"{fit['n_subjects']} participants and {fit.get('n_obs', '?')} observations")
    return "; ".join(parts) + "."


# A sensitivity analysis shows these tables in the PDF; its other tables are CSV files listed
# in its section (a reviewer compares analyses by their differences; the rest is detail).
SENSITIVITY_SHOWN = ("differences", "joint_tests")


def generic_analysis(section: Section, context: EndpointContext, analysis) -> None:
    """Any method: a sentence on what it is, then its tables (a sensitivity analysis: the
    differences and joint tests laid out, the other tables as CSV files, the facts in a sentence)."""
    # A method this report does not know is shown whole: its tables are all a reader has of it.
    detail_shown = analysis.get("role") == "primary" or analysis.get("method") not in METHOD_WORDS
    method = analysis.get("method")
    options = analysis.get("options") or {}
    words = METHOD_WORDS.get(method, f"Method '{method}'")
    assumption = options.get("assumption") or (analysis.get("fit") or {}).get("assumption")
    text = f"{words}."
    if assumption:
        text += f" Values missing after an intercurrent event are imputed under {ASSUMPTION_WORDS.get(assumption, assumption)}"
        if options.get("imputations"):
            text += f", with {options['imputations']} imputations"
        text += "."
    if method not in METHOD_WORDS:
        text += " This method is not described further by this version of the report; its tables follow as recorded."
    section.paragraph(text)
    level = _level_text(options)
    detail = []
    for name, source in (analysis.get("tables") or {}).items():
        if name == "differences":
            section.table(_differences_table(context, source, f"{analysis.get('id')}_differences",
                                             source.get("title") or "Differences from the reference arm",
                                             f"{level} confidence interval"))
            continue
        table = from_results_table(source, slug=f"{context.slug}_{analysis.get('id')}_{name}",
                                   number_format=context.number_format)
        if detail_shown or name in SENSITIVITY_SHOWN:
            section.table(table)
        else:
            detail.append(table)
    fit = {k: v for k, v in (analysis.get("fit") or {}).items() if isinstance(v, (int, float, str, bool))}
    if fit.get("assumption"):
        fit["assumption"] = ASSUMPTION_WORDS.get(fit["assumption"], fit["assumption"])
    if fit and not detail_shown:
        section.paragraph(_facts_sentence(fit, context.number_format))
    elif fit:
        section.table(facts_table([(FACT_LABELS.get(k, k.replace("_", " ").capitalize()), v,
                                    "text" if isinstance(v, str) else ("count" if isinstance(v, int) else "general"))
                                   for k, v in fit.items()],
                                  slug=f"{context.slug}_{analysis.get('id')}_facts",
                                  title=f"Settings and facts of {analysis.get('label') or analysis.get('id')}",
                                  number_format=context.number_format))
    section.csv_only(detail)


def _facts_sentence(fit: Mapping[str, Any], number_format: NumberFormat) -> str:
    """The settings and facts of a sensitivity analysis as one line of text."""
    parts = []
    for key, value in fit.items():
        label = FACT_LABELS.get(key, key.replace("_", " ").capitalize())
        kind = "text" if isinstance(value, str) else ("count" if isinstance(value, int) else "general")
        parts.append(f"{label}: {number_format.cell(value, kind)}")
    return "Settings and facts: " + "; ".join(parts) + "."


def tipping_point(section: Section, context: EndpointContext, analysis) -> None:
    tables, options = analysis.get("tables") or {}, analysis.get("options") or {}
    alpha = float(options.get("alpha") or 0.05)
    grid_name = next((n for n, t in tables.items()
                      if {"shift", "active_shift"} & set(t.get("columns") or []) and "estimate" in (t.get("columns") or [])),
                     None)
    section.paragraph(
        "Imputed values in the active arm are shifted by each amount in the grid (and, where the plan "
        "asks, in the reference arm too), and the comparison is repeated. The tipping point is the smallest "
        f"shift at which the difference is no longer significant at the two-sided level {alpha:g}.")
    if grid_name is None:
        section.notice("The tipping-point analysis carries no grid of shifts.")
        return
    grid = tables[grid_name]
    cells = [{**c, "shift": c.get("shift", c.get("active_shift"))} for c in rows_as_dicts(grid)]
    recorded = [r for r in rows_as_dicts(tables.get("tipping_points")) if r.get("statement")]
    if recorded:   # the run's own reading of the grid, with the shifts it searched
        section.items([f"{r.get('arm')}: {r['statement']}" for r in recorded])
    else:
        for line in _tipping_statements(cells, alpha, context.number_format):
            section.paragraph(line)
    visits = {c.get("visit") for c in cells}
    hidden = ("visit", "reference") if len(visits) == 1 else ("reference",)
    title = "Tipping-point grid: estimate and p-value for each shift"
    if hidden:
        title += f" (at {visits.pop()})"
    # The map below shows every cell's estimate and conclusion; the grid's numbers are a CSV file.
    grid_table = from_results_table(grid, slug=f"{context.slug}_tipping_grid", title=title, hide=hidden,
                                    number_format=context.number_format, wide=True,
                                    intervals={"Confidence interval": ("lower", "upper")})
    for name, source in tables.items():
        if name == "differences":
            section.table(_differences_table(context, source, "tipping_base_differences",
                                             "Differences from the reference arm with no shift", "Confidence interval"))
        elif name != grid_name:
            section.table(from_results_table(source, slug=f"{context.slug}_tipping_{name}", hide=("statement",),
                                             number_format=context.number_format,
                                             kinds={"tipping_shift": "shift", "base_shift": "shift",
                                                    "base_significant": "flag", "crossings": "count"},
                                             labels={"tipping_shift": "Tipping shift",
                                                     "base_shift": "Smallest shift in the grid",
                                                     "base_significant": "Significant without a shift",
                                                     "crossings": "Changes of conclusion in the grid"}))
    usable = [c for c in cells if c.get("shift") is not None and c.get("arm") is not None]
    section.figure(_figure(
        "tipping_map", "Tipping-point map of p-values",
        f"Heat map of p-values over {len({c['shift'] for c in usable})} shifts in the active arm"
        f" for {len({c['arm'] for c in usable})} arms; each tile is labelled with the estimated difference.",
        lambda: draw.tipping_chart(usable, arms=context.arms, alpha=alpha,
                                   label=lambda v: context.number_format.cell(v, "mean")), context))
    section.csv_only([grid_table])


def _tipping_statements(cells, alpha: float, number_format: NumberFormat) -> list[str]:
    lines = []
    for arm in dict.fromkeys(c.get("arm") for c in cells):
        line = sorted((c for c in cells if c.get("arm") == arm and not c.get("reference_shift")),
                      key=lambda c: c.get("shift") or 0.0)
        tipping = next((c for c in line if c.get("p") is not None and c["p"] >= alpha), None)
        if tipping is None:
            largest = number_format.cell(line[-1]["shift"], "shift") if line else "–"
            lines.append(f"{arm}: still significant at the largest shift in the grid ({largest}).")
        else:
            lines.append(f"{arm}: the difference is no longer significant from a shift of "
                         f"{number_format.cell(tipping['shift'], 'shift')} in the active arm.")
    return lines


# --------------------------------------------------------------------------- shared
def _failed(section: Section, analysis) -> bool:
    status = analysis.get("status")
    if status in (None, "ok"):
        return False
    section.notice(f"This analysis did not complete (status: {status}). Error recorded: "
                   f"{analysis.get('error') or 'no message was recorded'}")
    return True


def _level_text(options: Mapping[str, Any]) -> str:
    level = options.get("confidence_level") or 0.95
    return f"{100 * float(level):g}%"


def _figure(slug: str, title: str, alt: str, render, context: EndpointContext, note: str = "") -> FigureImage:
    """A figure to be drawn by ``render`` (see :meth:`FigureImage.drawn`): drawing waits until the
    renderer knows whether a second process can do it."""
    return FigureImage(f"{context.slug}_{slug}", title, alt, None, note=note, job=render)
