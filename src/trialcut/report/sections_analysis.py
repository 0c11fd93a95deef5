"""The endpoint part of the report: missing data, descriptive statistics, primary and sensitivity analyses."""
from __future__ import annotations

import math
import re
from dataclasses import replace
from typing import Any, Mapping, Sequence

import numpy as np

from trialcut.report import figures as draw
from trialcut.report.blocks import Section
from trialcut.report.context import EndpointContext
from trialcut.report.figures import FigureImage
from trialcut.report.formatting import NumberFormat, describe_rules, term_text
from trialcut.report.sections_estimand import imputation_guard_words
from trialcut.report.sections_front import facts_table
from trialcut.report.tables import from_records, from_results_table, rows_as_dicts

METHOD_WORDS = {
    "mmrm": "Mixed model for repeated measures (MMRM)",
    "ancova": "Covariance analysis (ANCOVA) of observed data, one model per visit",
    "multiple_imputation": "Multiple imputation, pooled with Rubin's rules",
    "tipping_point": "Tipping-point analysis",
    "gee": "Generalized estimating equations (GEE) over the visits, with a working correlation between a "
           "participant's visits and sandwich standard errors; proportions or rates per arm are standardised "
           "over the covariates",
    "rate": "Regression of each participant's events over the whole period on arm and covariates, with the "
            "time at risk as offset",
    "proportions": "Proportions of responders compared at each visit, without a model over the visits",
    "responder_imputation": "Multiple imputation of the underlying score, each completed dataset turned into "
                            "responders by the plan's rule and compared, the results pooled by Rubin's rules",
}
# Binary and count analyses give proportions, rates and their contrasts: a risk difference of 0.07 shown
# to the 1 decimal of a mean reads 0.1, so their numbers keep three decimals (EFFECT_DECIMALS).
EFFECT_WORDS = {"risk_difference": "risk difference", "risk_ratio": "risk ratio", "odds_ratio": "odds ratio",
                "rate_ratio": "rate ratio", "rate_difference": "rate difference"}
EFFECT_KIND = "proportion"
EFFECT_NUMBER_COLUMNS = ("estimate", "se", "lower", "upper", "proportion", "rate", "crude_rate")
NON_CONTINUOUS_METHODS = ("gee", "rate", "proportions", "responder_imputation")
FIT_WORDS = {"binomial": "binomial", "negative_binomial": "negative binomial", "poisson": "Poisson",
             "non_response": "a missing value counts as no response", "exchangeable": "exchangeable",
             "independence": "independence", "ar1": "first-order autoregressive",
             "at_most": "a response is a value at or below the threshold",
             "at_least": "a response is a value at or above the threshold", **EFFECT_WORDS}
STRUCTURE_WORDS = {
    "unstructured": "unstructured", "toeplitz": "Toeplitz", "heterogeneous_toeplitz": "heterogeneous Toeplitz",
    "ar1": "first-order autoregressive", "heterogeneous_ar1": "heterogeneous first-order autoregressive",
    "compound_symmetry": "compound symmetry", "heterogeneous_compound_symmetry": "heterogeneous compound symmetry",
    "spatial_exponential": "spatial exponential (planned visit times)",
}
DF_WORDS = {
    "kenward_roger": "Kenward–Roger", "satterthwaite": "Satterthwaite",
    "participant_split": "residual degrees of freedom split into a participant-level and a visit-level part",
    "residual": "residual (observations minus fixed effects)",
}
METHOD_SHORT = {"mmrm": "MMRM", "ancova": "ANCOVA", "multiple_imputation": "Multiple imputation",
                "tipping_point": "Tipping point"}
ASSUMPTION_WORDS = {
    "mar": "missing at random", "jump_to_reference": "jump to reference", "copy_reference": "copy reference",
    "copy_increments_in_reference": "copy increments in reference",
}
FACT_LABELS = {"complete_df": "Complete-data DF", "burn_in": "Burn-in iterations",
               "thinning": "Iterations between imputations", "chains": "Independent chains",
               "confidence_level": "Confidence level",
               "visits": "Visits", "covariates": "Covariates", "outcome": "Outcome column",
               "reference": "Reference arm", "assumption": "Assumption", "imputations": "Imputations",
               "alpha": "Two-sided significance level", "visit": "Visit",
               "n_subjects": "Participants in the fit", "n_obs": "Observations in the fit",
               "n_left_out": "Participants left out", "working_correlation": "Working correlation (estimated)",
               "missing_rule": "Missing values", "effect": "Effect measure", "family": "Distribution",
               "correlation": "Working correlation structure", "dispersion": "Dispersion",
               "dispersion_se": "Standard error of the dispersion", "strata": "Strata"}
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
    ("n_subjects_excluded", "Participants with a visit due but no value used (left out)", "count"),
    ("iterations", "Iterations", "count"), ("gradient_norm", "Gradient norm at the end", "general"),
    ("scaled_gradient", "Scaled gradient at the end", "general"),
    ("tolerance", "Convergence tolerance", "general"), ("robust", "Standard errors of the fixed effects", "text"),
)


def endpoint(section: Section, results, endpoint: Mapping[str, Any], number_format: NumberFormat) -> None:
    context = EndpointContext(results, endpoint, number_format)
    section.paragraph(describe_rules(number_format, what="this endpoint", recorded=endpoint.get("decimals")))
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
    sensitivity(section.child("sensitivity", "Sensitivity and supplementary analyses"), context, primary, others)


# --------------------------------------------------------------------------- missing data
def missing_data(section: Section, context: EndpointContext) -> None:
    endpoint, number_format = context.endpoint, context.number_format
    by_visit = endpoint.get("missing_by_visit")
    if by_visit:
        section.table(context.standalone(from_results_table(
            by_visit, slug=f"{context.slug}_missing_by_visit", number_format=number_format,
            title=context.title("Missing values of the primary analysis by arm and visit"),
            labels=MISSING_TABLE_LABELS),
            notes=["Expected: participants due a value at the visit by the data cut; a visit not yet due "
                   "is not counted as missing.",
                   "Due = observed + missing. Set aside: values observed after an intercurrent event that the "
                   "primary estimand's strategy does not use; they are part of the observed count, and the "
                   "primary analysis treats them as missing (see the participant-flow table).",
                   *(["A missing value is a due visit without the value the response is read from; the "
                      "endpoint's rule counts it as non-response or leaves it out (see the table of "
                      "responders)."] if context.type == "binary" else [])]))
    patterns = endpoint.get("missing_patterns")
    if patterns:
        section.paragraph(
            f"A pattern has one mark per scheduled visit in time order, drawn as in Figure 1: {OBSERVED_MARK} "
            f"where a value was observed, {MISSING_MARK} where it is missing (or set aside by the strategy), "
            f"{NOT_DUE_MARK} where the visit was not yet due at the cut-off (neither observed nor missing). A monotone "
            "pattern has no observed value after a missing one.")
        shown = _with_pattern_marks(patterns)
        section.table(context.standalone(from_results_table(
            shown, slug=f"{context.slug}_missing_patterns", number_format=number_format,
            title=context.title("Participants by pattern of observed visits")),
            notes=[f"Visits in order: {', '.join(context.visits)}. {OBSERVED_MARK} observed; {MISSING_MARK} missing "
                   f"or set aside; {NOT_DUE_MARK} not yet due at the cut-off."]))
        rows = rows_as_dicts(patterns)
        section.figure(_figure(
            "missing_patterns", "Pattern of observed and missing visits by arm",
            f"Tile chart of {len(rows)} patterns of observed visits across {len(context.arms)} arms and "
            f"{len(context.visits)} visits, with the number of participants per pattern.",
            lambda: draw.pattern_chart(rows, arms=context.arms, visits=context.visits), context))
    if not by_visit and not patterns:
        section.notice("The results carry no missing-data summaries for this endpoint.")


# The missing-value table's counts read as a sum: due = observed + missing, set aside within observed.
MISSING_TABLE_LABELS = {"observed": "Observed (set aside included)", "set_aside": "Set aside (of observed)"}


# The marks of a pattern, the same as the tiles of the pattern figure (filled: observed; the
# figure's light grey tile, a visit not yet due, is a dash: neither observed nor missing).
OBSERVED_MARK, MISSING_MARK, NOT_DUE_MARK = "■", "□", "–"
# How results.json stores a pattern: X used, '.' missing or set aside, '-' not yet due.
STORED_NOT_DUE = "-"


def _with_pattern_marks(patterns: Mapping[str, Any]) -> dict[str, Any]:
    """The pattern column in the figure's marks, whatever characters results.json stored."""
    columns = list(patterns.get("columns") or [])
    if "pattern" not in columns:
        return dict(patterns)
    position = columns.index("pattern")
    data = [[_marks(v) if i == position else v for i, v in enumerate(row)] for row in patterns.get("data") or []]
    return {**patterns, "data": data}


def _marks(pattern: Any) -> Any:
    if not isinstance(pattern, str):
        return pattern
    return "".join(NOT_DUE_MARK if mark in (STORED_NOT_DUE, NOT_DUE_MARK)
                   else MISSING_MARK if mark in (".", " ", "0", MISSING_MARK) else OBSERVED_MARK for mark in pattern)


# --------------------------------------------------------------------------- descriptive
def descriptive(section: Section, context: EndpointContext) -> None:
    source = context.endpoint.get("descriptive")
    if source and context.type == "binary":
        _responders(section, context, source)
        return   # the trajectories of a score say nothing about the response; none is drawn
    if not source:
        section.notice("The results carry no descriptive statistics for this endpoint.")
    else:
        population = _lower_first_word(context.population_label(context.population))
        section.paragraph(
            f"All values observed in the {population}, as recorded: values after an intercurrent event are "
            "included, nothing is imputed, set aside by an estimand's strategy or modelled here. The baseline "
            "row summarises each participant's baseline value once. SD uses the n − 1 divisor.")
        shown = _with_variable_words(source, context)
        section.table(context.standalone(from_results_table(
            shown, slug=f"{context.slug}_descriptive", number_format=context.number_format,
            title=context.title("Observed values by arm and visit, as recorded"),
            labels={"variable": "Variable"},
            intervals={"Quartiles (lower, upper)": ("q1", "q3"), "Range (minimum, maximum)": ("min", "max")}),
            notes=["Observed data only (no imputation, no estimand strategy applied)."]))
        section.figure(_observed_means_figure(context, rows_as_dicts(source)))
    section.figure(_trajectories_figure(context))


def _responders(section: Section, context: EndpointContext, source: Mapping[str, Any]) -> None:
    """A binary endpoint's observed response: responders over those with a response, and its figure."""
    population = _lower_first_word(context.population_label(context.population))
    section.paragraph(
        f"The response as derived for this endpoint at each visit in the {population}: responders over the "
        "participants with a response (n). Nothing is imputed or modelled here; the endpoint's rule for a due "
        "visit without a value (non-response or left out) is already applied.")
    section.table(context.standalone(from_results_table(
        source, slug=f"{context.slug}_descriptive", number_format=context.number_format,
        title=context.title("Responders by arm and visit, observed"),
        labels={"n": "n with a response", "not_yet_due": "Not yet due", "responders": "Responders",
                "proportion": "Proportion responding"},
        kinds={"n": "count", "not_yet_due": "count", "responders": "count", "proportion": "proportion"}),
        notes=["Observed data only (no imputation, no model)."]))
    points = []
    for row in rows_as_dicts(source):
        n, share = row.get("n"), row.get("proportion")
        if share is None or not n or (isinstance(share, float) and math.isnan(share)):
            continue
        half = math.sqrt(share * (1 - share) / n)
        points.append({"arm": row.get("arm"), "visit": row.get("visit"), "centre": share,
                       "lower": share - half, "upper": share + half})
    section.figure(_figure(
        "observed_means", "Observed proportion responding ± standard error by arm and visit",
        f"Line chart of the observed proportion responding ({context.label}) with bars of one standard error, "
        f"for {len(context.arms)} arms at {len(context.visits)} visits.",
        lambda: draw.profile_chart(points, arms=context.arms, visits=context.visits,
                                   visit_days=context.visit_days, y_label=context.y_label), context,
        note=f"Responses observed in the {population}; n per arm and visit as in the table of responders. "
             "Standard error: √(p(1 − p)/n)."))


def _variable_words(context: EndpointContext) -> dict[str, str]:
    columns = context.columns
    return {columns.get("value", "AVAL"): "Value", columns.get("change", "CHG"): "Change from baseline",
            columns.get("baseline", "BASE"): "Baseline value"}


def _with_variable_words(source: Mapping[str, Any], context: EndpointContext) -> dict[str, Any]:
    """The variable column in words (Value, Change from baseline, Baseline value)."""
    columns = list(source.get("columns") or [])
    if "variable" not in columns:
        return dict(source)
    position, words = columns.index("variable"), _variable_words(context)
    data = [[words.get(v, v) if i == position else v for i, v in enumerate(row)] for row in source.get("data") or []]
    return {**source, "data": data}


def _observed_means_figure(context: EndpointContext, rows: list[dict]) -> FigureImage:
    wanted = context.columns.get("change", "CHG") if context.analysed == "change" else context.columns.get("value", "AVAL")
    if any("variable" in r for r in rows):
        rows = [r for r in rows if r.get("variable") == wanted] or rows
    rows = [r for r in rows if r.get("visit") in context.visits] or rows
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
                                   visit_days=context.visit_days, y_label=context.y_label), context,
        note=f"Every value observed in the {_lower_first_word(context.population_label(context.population))}, "
             "as recorded (values after an intercurrent event included, nothing imputed); n per arm and visit "
             "as in the table of observed values. Standard error: SD/√n.")


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
    note = _trajectories_note(context, source, shown, total)
    figure = _figure(
        "trajectories", title,
        f"Line charts, one per arm, of {context.label} over visits for {shown} participants.",
        lambda: draw.trajectories_chart(sampled, arms=context.arms, visits=context.visits,
                                        visit_days=context.visit_days, y_label=context.y_label), context)
    return replace(figure, note=figure.note or note)


def _trajectories_note(context: EndpointContext, source: Mapping[str, Any], shown: int, in_table: int) -> str:
    """Say which participants are drawn: the run draws a random sample of the population first."""
    population = _lower_first_word(context.population_label(context.population))
    in_population = sum(context.population_counts(context.population).values())
    drawn = re.search(r"(\d+) participants drawn at random", str(source.get("title") or ""))
    if drawn and in_population and int(drawn.group(1)) < in_population:
        text = (f"A random sample of {drawn.group(1)} of the {in_population} participants of the {population}, "
                "drawn by the run with its seed")
        if shown < int(drawn.group(1)):
            text += f"; {shown} of them are drawn here" + (" (the others have no observed value)" if shown == in_table else "")
        return text + "."
    if shown < in_table:
        return f"A random sample of {shown} of {in_table} participants (seed {context.seed}), split evenly across arms."
    return f"All {shown} participants with an observed value" + (f" in the {population}." if population else ".")


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
    model = _model_footnote(context, analysis)
    # Every table stands alone (N per arm, model, source), the supporting ones too: a reviewer may
    # read the covariance matrix or the fit's facts without the pages around them.
    section.table(context.standalone(_covariate_summary(context, fit, analysis), analysis, notes=[model]))
    _fallbacks(section, context, fit, options, analysis)
    ci = f"{level} confidence interval"
    if tables.get("marginal_means"):
        section.table(context.standalone(from_results_table(
            tables["marginal_means"], slug=f"{context.slug}_model_means", number_format=number_format,
            title=context.title("Model-estimated means by arm and visit", analysis),
            intervals={ci: ("lower", "upper")}), analysis, notes=[model, AVERAGING_RULE]))
    if tables.get("differences"):
        section.table(_differences_table(context, tables["differences"], "primary_differences",
                                         context.title(f"Differences from {context.reference} by visit (arm minus "
                                                       "reference)", analysis), ci, analysis=analysis))
    if tables.get("joint_tests"):
        section.paragraph(JOINT_TESTS_WORDS)
        section.table(context.standalone(from_results_table(
            _with_term_words(tables["joint_tests"]), slug=f"{context.slug}_joint_tests", number_format=number_format,
            title=context.title("Tests of each effect in the model, all its coefficients at once", analysis),
            labels={"term": "Effect tested"}, kinds={"term": "text"}), analysis,
            notes=[model, "Each row is an F test that the effect is absent (see the text above the table)."]))
    if tables.get("fixed_effects"):
        columns = tables["fixed_effects"].get("columns") or []
        section.table(context.standalone(from_results_table(
            _with_term_words(tables["fixed_effects"]), slug=f"{context.slug}_fixed_effects",
            number_format=number_format, title=context.title("Estimated coefficients of the model", analysis),
            labels={"term": "Coefficient"},
            kinds={"term": "text", **{c: "coefficient" for c in ("estimate", "se", "lower", "upper") if c in columns}}),
            analysis, notes=[model, f"Coefficients compare each level with the first: {context.reference} for the "
                                    f"arm, {context.visits[0] if context.visits else 'the first visit'} for the "
                                    "visit; a numeric covariate's coefficient is its slope per unit."]))
    for name in sorted(tables):
        if name.startswith("covariance") or name.startswith("correlation"):
            kind = "sd" if name.startswith("covariance") else "correlation"
            group = name.split("_", 1)[1] if "_" in name else ""
            what = f"Estimated {name.split('_')[0]} matrix between visits" + (f" ({group})" if group else "")
            columns = tables[name].get("columns") or []
            section.table(context.standalone(from_results_table(
                tables[name], slug=f"{context.slug}_{name}", title=context.title(what, analysis),
                number_format=number_format, kinds={c: kind for c in columns[1:]}, labels={"visit": "Visit"}),
                analysis, notes=[model]))
    section.table(context.standalone(_model_fit_facts(context, fit, analysis), analysis, notes=[model]))
    known = {"marginal_means", "differences", "joint_tests", "fixed_effects"}
    for name, source in tables.items():
        if name not in known and not name.startswith(("covariance", "correlation")):
            section.table(context.standalone(from_results_table(source, slug=f"{context.slug}_{name}",
                                                                number_format=number_format), analysis, notes=[model]))
    section.figure(_model_profile_figure(context, tables.get("marginal_means"), level, analysis))
    section.figure(_residual_figure(context, analysis))


JOINT_TESTS_WORDS = (
    "The tests of each effect ask, one effect at a time, whether all of its coefficients could be zero: "
    "Arm, whether the arms' means averaged over the visits are equal; Visit, whether the visits' means "
    "averaged over the arms are equal; Arm by visit, whether the differences between arms are the same "
    "at every visit; a covariate, whether it has no effect on the outcome (averaged over the visits when it "
    "has an effect at each visit). Each is an F test; with Kenward–Roger degrees of freedom the F statistic "
    "is the scaled one and the denominator degrees of freedom are adjusted."
)


def _with_term_words(source: Mapping[str, Any]) -> dict[str, Any]:
    """The term column in plain words, so the CSV file reads as the table does."""
    columns = list(source.get("columns") or [])
    if "term" not in columns:
        return dict(source)
    position = columns.index("term")
    return {**source, "data": [[term_text(v) if i == position and isinstance(v, str) else v
                                for i, v in enumerate(row)] for row in source.get("data") or []]}


def _model_description(context: EndpointContext, analysis) -> str:
    fit, options = analysis.get("fit") or {}, analysis.get("options") or {}
    structure = fit.get("structure") or (options.get("covariance") or ["not recorded"])[0]
    method = str(fit.get("method") or options.get("method") or "reml").upper()
    df = fit.get("df_method") or options.get("df") or "not recorded"
    df_words = DF_WORDS.get(df, df)
    if df == "kenward_roger" and fit.get("second_derivatives") is False:
        df_words += " without its second-derivative term"
    elif df == "kenward_roger" and fit.get("second_derivatives") == "bias_corrected":
        df_words += (" with its second-derivative term corrected for the bias of the covariance-parameter "
                     "estimates (Kenward & Roger 2009)")
    parametrisation = " ".join(
        f"Kenward–Roger adjustment of the {STRUCTURE_WORDS.get(record['structure'], record['structure'])} matrix"
        + (f" ({record['group']})" if record.get("group") is not None else "") + f": {record['description']}."
        for record in fit.get("kenward_roger_parametrisation") or ())
    covariates = list(options.get("covariates") or fit.get("covariates") or [])
    by_visit = list(options.get("covariates_by_visit") or fit.get("covariates_by_visit") or [])
    robust = " Standard errors of the fixed effects are empirical (sandwich) estimates." if options.get("robust") else ""
    structure_words = STRUCTURE_WORDS.get(structure, structure)
    return (
        f"{context.label} was analysed with a mixed model for repeated measures (MMRM). Fixed effects: arm, "
        f"visit and the arm-by-visit interaction{_covariates_words(context, covariates, by_visit)} "
        f"Within a participant the visits share {_article(structure_words)} {structure_words} covariance matrix, "
        f"estimated by {method}. Degrees of freedom for tests and intervals: {df_words}. "
        f"Differences are each arm minus {context.reference}; the primary comparison is at "
        f"{context.primary_visit}.{robust}" + (f" {parametrisation}" if parametrisation else "")
        + " " + _records_words(context, analysis)
    )


def _article(word: str) -> str:
    return "an" if word[:1].lower() in "aeiou" else "a"


def _covariates_words(context: EndpointContext, covariates: Sequence[str], by_visit: Sequence[str]) -> str:
    """Which terms are covariates, what they are, and whether each interacts with visit."""
    if not covariates and not by_visit:
        return "; no covariates."
    baseline = context.columns.get("baseline", "BASE")
    named = []
    for name in dict.fromkeys([*covariates, *by_visit]):
        what = ("the baseline value" if name == baseline else
                "a stratification factor" if name in context.strata else "")
        named.append(f"{name} ({what})" if what else name)
    text = "; covariates: " + ", ".join(named) + "."
    with_visit = [c for c in by_visit]
    without = [c for c in covariates if c not in by_visit]
    if with_visit:
        text += f" {', '.join(with_visit)} also {'has' if len(with_visit) == 1 else 'have'} an effect at each visit " \
                "(an interaction with visit)."
    if without:
        text += (f" {', '.join(without)} {'has' if len(without) == 1 else 'have'} one effect for all visits "
                 "(no interaction with visit).")
    return text


def _records_words(context: EndpointContext, analysis: Mapping[str, Any]) -> str:
    """Which records the model reads, including those on the day of an intercurrent event."""
    plan = context.results.get("plan") or {}
    events = {e.get("id"): e.get("label") or e.get("id") for e in plan.get("intercurrent_events") or []}
    estimand = next((e for e in plan.get("estimands") or [] if e.get("id") == analysis.get("estimand")), None)
    text = ("Each participant contributes at most one record per scheduled visit (the record in the visit's "
            "window). A visit on the same day as an intercurrent event, or later, counts as after the event")
    handled = []
    for handling in (estimand or {}).get("intercurrent_events") or []:
        label = _lower_first_word(str(events.get(handling.get("event"), handling.get("event"))))
        strategy = handling.get("strategy")
        if strategy == "hypothetical":
            handled.append(f"after {label} its value is set aside (hypothetical strategy)")
        elif strategy == "composite":
            handled.append(f"after {label} its value is set to {handling.get('composite_value')} (composite strategy)")
        elif strategy:
            handled.append(f"after {label} its value is kept ({str(strategy).replace('_', ' ')} strategy)")
    return text + (": " + "; ".join(handled) + "." if handled else ".")


def _lower_first_word(text: str) -> str:
    return text[:1].lower() + text[1:] if len(text) > 1 and not text[1].isupper() else text


def _imputation_assumption_words(context: EndpointContext, options: Mapping[str, Any]) -> str:
    """'under copy increments in reference', or, with rules by reason, each rule and the rest (an
    imputation by reason footnoted 'under missing at random' misstates what was imputed)."""
    default = ASSUMPTION_WORDS.get(options.get("assumption"), options.get("assumption"))
    rules = options.get("assumptions_by_reason") or []
    if not rules:
        return f"under {default}"
    events = {e.get("id"): e.get("label") or e.get("id")
              for e in (context.results.get("plan") or {}).get("intercurrent_events") or []}
    parts = [f"{ASSUMPTION_WORDS.get(r.get('assumption'), r.get('assumption'))} after "
             f"{_lower_first_word(str(events.get(r.get('event'), r.get('event'))))} "
             f"({', '.join(str(reason) for reason in r.get('reasons') or []) or 'any reason'})" for r in rules]
    return f"by reason: {'; '.join(parts)}; every other missing value under {default}"


def _model_footnote(context: EndpointContext, analysis: Mapping[str, Any]) -> str:
    """The model in one footnote line: method, effects, covariates, structure, df, confidence level."""
    fit, options = analysis.get("fit") or {}, analysis.get("options") or {}
    method = analysis.get("method")
    level = _level_text(options)
    covariates = list(options.get("covariates") or [])
    by_visit = list(options.get("covariates_by_visit") or [])
    covariate_text = (", ".join(covariates + [f"{c} by visit" for c in by_visit]) if covariates or by_visit
                      else "none")
    if method == "mmrm":
        structure = fit.get("structure") or (options.get("covariance") or ["not recorded"])[0]
        df = fit.get("df_method") or options.get("df") or "not recorded"
        return (f"Model: MMRM with arm, visit and arm by visit; covariates: {covariate_text}; "
                f"{STRUCTURE_WORDS.get(structure, structure)} covariance; "
                f"{str(fit.get('method') or options.get('method') or 'reml').upper()}"
                + ("; empirical (sandwich) standard errors" if options.get("robust") else "")
                + f". Degrees of freedom: {DF_WORDS.get(df, df)}. Confidence level: {level}.")
    if method == "ancova":
        return (f"Model: ANCOVA at each visit on observed values, with arm and the covariates {covariate_text}. "
                f"Degrees of freedom: residual. Confidence level: {level}.")
    if method in ("multiple_imputation", "tipping_point"):
        return (f"Imputation {_imputation_assumption_words(context, options)}, "
                f"{options.get('imputations', '?')} imputations; each completed dataset analysed by ANCOVA at "
                f"each visit with covariates {covariate_text}; pooled by Rubin's rules with Barnard–Rubin degrees "
                f"of freedom. Confidence level: {level}.")
    return f"Method: {METHOD_WORDS.get(method, method)}. Confidence level: {level}."





def _fallbacks(section: Section, context: EndpointContext, fit, options, analysis=None) -> None:
    planned = list(options.get("covariance") or [])
    if planned:
        section.paragraph("Covariance structures in the plan, tried in this order until one converges: "
                          + ", ".join(STRUCTURE_WORDS.get(s, s) for s in planned) + ".")
    attempts = fit.get("attempts") or []
    if attempts:
        rows = [{"structure": STRUCTURE_WORDS.get(a.get("structure"), a.get("structure")),
                 "status": _attempt_status(a),
                 "reason": a.get("reason") or a.get("message") or a.get("error") or ""} for a in attempts]
        section.table(context.standalone(from_records(
            rows, ("structure", "status", "reason"), slug=f"{context.slug}_structures_tried",
            title=context.title("Covariance structures tried", analysis), number_format=context.number_format,
            labels={"structure": "Structure", "status": "Outcome", "reason": "Reason it was set aside"}), analysis))
    if fit.get("structure") and planned and fit.get("structure") != planned[0]:
        section.notice(f"The first planned structure did not converge; the fallback "
                       f"{STRUCTURE_WORDS.get(fit['structure'], fit['structure'])} was used.")


def _attempt_status(attempt: Mapping[str, Any]) -> str:
    if attempt.get("status"):
        stage = f" at the {attempt['stage']} stage" if attempt.get("stage") and attempt["status"] != "used" else ""
        return f"{attempt['status']}{stage}"
    return "used" if attempt.get("converged") else "did not converge"


def _covariate_summary(context: EndpointContext, fit: Mapping[str, Any], analysis: Mapping[str, Any]):
    """The covariate values the model-estimated means average over, when the fit records them."""
    summary = fit.get("covariate_summary")
    if not isinstance(summary, Mapping) or not summary:
        return None
    pairs = [(str(name), _covariate_text(value), "text") for name, value in summary.items() if value is not None]
    return facts_table(pairs, slug=f"{context.slug}_covariate_values",
                       title=context.title("Covariate values used for the model-estimated means", analysis),
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


def _model_fit_facts(context: EndpointContext, fit: Mapping[str, Any], analysis: Mapping[str, Any]):
    """The fit's facts, each under a plain label; settings the text already states are left out."""
    pairs = []
    for key, label, kind in FIT_FACTS:
        value = fit.get(key)
        if value is None or label in {p[0] for p in pairs}:
            continue
        if key == "structure":
            value = STRUCTURE_WORDS.get(value, value)
        elif key == "df_method":
            value = DF_WORDS.get(value, value)
        elif key == "method":
            value = str(value).upper()
        elif key == "robust":
            value = "empirical (sandwich)" if value else "model-based"
        pairs.append((label, value, kind))
        if key == "n_subjects_excluded":
            pairs.extend(_not_yet_due_fact(analysis))
    level = _level_text(analysis.get("options") or {})
    if pairs:
        pairs.append(("Confidence level", level, "text"))
    if not pairs:
        return None
    return facts_table(pairs, slug=f"{context.slug}_model_fit", title=context.title("Fit of the model", analysis),
                       number_format=context.number_format)


NOT_YET_DUE_REASON = "no visit due yet"


def _not_yet_due_fact(analysis: Mapping[str, Any]) -> list[tuple[str, Any, str]]:
    """Participants of the population the fit never saw (no visit due): with them the fit's counts add up
    to the population of the participant-flow table (in the fit + left out + no visit due)."""
    rows = rows_as_dicts(analysis.get("left_out") or {})
    waiting = sum(1 for row in rows if str(row.get("reason")) == NOT_YET_DUE_REASON)
    return [("Participants with no visit due yet (not in the fit)", waiting, "count")] if waiting else []


def _effect_scale(analysis: Mapping[str, Any] | None, source: Mapping[str, Any]) -> tuple[dict, dict, tuple]:
    """Kinds, labels and hidden columns of a binary or count analysis' table (none for a continuous one)."""
    if (analysis or {}).get("method") not in NON_CONTINUOUS_METHODS:
        return {}, {}, ()
    columns = list(source.get("columns") or [])
    kinds = {c: EFFECT_KIND for c in EFFECT_NUMBER_COLUMNS if c in columns}
    kinds.update({c: "term" for c in ("term",) if c in columns})
    labels = {"effect": "Effect measure", "z": "z", "chi_square": "Chi-square", "num_df": "Numerator DF"}
    rows = source.get("data") or []
    hidden = tuple(c for c in ("df",) if c in columns and all(r[columns.index(c)] is None for r in rows))
    if "df" in hidden and "t" in columns:
        labels["t"] = "z"    # no degrees of freedom: the statistic is referred to the normal distribution
    return kinds, labels, hidden


def _effect_words(source: Mapping[str, Any]) -> Mapping[str, Any]:
    """The effect column in words ('risk difference', not 'risk_difference')."""
    columns = list(source.get("columns") or [])
    if "effect" not in columns:
        return source
    at = columns.index("effect")
    data = [[EFFECT_WORDS.get(v, v) if i == at else v for i, v in enumerate(row)] for row in source.get("data") or []]
    return {**source, "data": data}


def _differences_table(context: EndpointContext, source, slug: str, title: str, ci: str, note: str = "", *,
                       analysis: Mapping[str, Any] | None = None, notes: Sequence[str] = ()):
    kinds, labels, hidden = _effect_scale(analysis, source)
    table = from_results_table(_effect_words(source), slug=f"{context.slug}_{slug}", title=title,
                               number_format=context.number_format, hide=("reference", *hidden),
                               kinds=kinds, labels=labels, intervals={ci: ("lower", "upper")}, note=note)
    if analysis is None:
        return table
    return context.standalone(table, analysis, notes=[*notes, _model_footnote(context, analysis)])


def _model_profile_figure(context: EndpointContext, source, level: str,
                          analysis: Mapping[str, Any] | None = None) -> FigureImage | None:
    if not source:
        return None
    points = [{"arm": r.get("arm"), "visit": r.get("visit"), "centre": r.get("estimate"),
               "lower": r.get("lower"), "upper": r.get("upper")} for r in rows_as_dicts(source)]
    return _figure(
        "model_means", f"Model-estimated mean profile with {level} confidence intervals",
        f"Line chart of model-estimated means of {context.label} with {level} confidence intervals "
        f"for {len(context.arms)} arms at {len(context.visits)} visits.",
        lambda: draw.profile_chart(points, arms=context.arms, visits=context.visits,
                                   visit_days=context.visit_days, y_label=context.y_label), context,
        note=f"{context.title('Means from the model', analysis)}; the same numbers as the table of "
             "model-estimated means.")


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
        level = _level_text(primary.get("options") or {})
        section.paragraph(
            f"The primary estimate and every sensitivity estimate at {context.primary_visit}, side by side. "
            "Each row reads its analysis' table of differences from the reference arm; N is the arm's number "
            "of participants in the analysis' population. The tipping-point analysis is shown at no shift, "
            "where it is a multiple imputation under missing at random.")
        columns = ("label", "scope", "arm", "estimate", "se", "df", "lower", "upper", "p")
        labels = {"label": "Analysis", "scope": "Role; estimand; population", "arm": "Arm (N)"}
        # A binary or count endpoint's contrasts keep the decimals of proportions and rates.
        scale = ({c: EFFECT_KIND for c in ("estimate", "se", "lower", "upper")}
                 if primary.get("method") in NON_CONTINUOUS_METHODS else {})
        summary = from_results_table({"columns": list(columns), "data": [[r[c] for c in columns] for r in rows]},
                                     slug=f"{context.slug}_estimates_summary", number_format=context.number_format,
                                     wide=True, kinds=scale,
                                     title=_summary_title(context, [primary, *others]),
                                     labels=labels, intervals={f"{level} confidence interval": ("lower", "upper")})
        ratio = _ratio_words(rows)
        if ratio:   # a rate or odds ratio is not a difference: its title, note and axis say so
            summary = replace(summary, title=summary.title.replace("Estimated difference from", f"Estimated {ratio} to"))
        # N per arm of every population the rows use, not only the primary's.
        summary = context.standalone(summary, populations=_populations_of([primary, *others], context), notes=[
            (f"Ratios are each arm over {context.reference}." if ratio
             else f"Differences are each arm minus {context.reference}.") + f" {_levels_sentence([primary, *others])} "
            "Models and degrees of freedom: see each analysis' section; DF is each analysis' own "
            "(Kenward–Roger, residual or Barnard–Rubin)."])
        section.table(summary)
        favours = context.favours_words()
        section.figure(_figure(
            "forest", (f"Estimated {ratio} to" if ratio else "Estimated difference from")
                      + f" {context.reference} at {context.primary_visit} with {level} "
                      "confidence intervals, every analysis",
            f"Forest plot of {len(rows)} estimated differences from {context.reference} at "
            f"{context.primary_visit} with {level} confidence intervals; a dashed line marks no difference; "
            "the primary analysis is marked.",
            lambda: draw.forest_chart(rows, arms=context.arms,
                                      x_label=(f"{ratio.capitalize()} to {context.reference} (arm / {context.reference})"
                                               if ratio else f"Difference from {context.reference} "
                                               f"(arm minus {context.reference})"),
                                      favours=None if ratio else favours, no_effect=1.0 if ratio else 0.0,
                                      label=lambda v: context.number_format.cell(v, EFFECT_KIND if scale else "mean")),
            context,
            note=f"Numbers at the right: estimate ({level} confidence interval). The primary analysis is in bold. "
                 + (f"Direction: {favours[0]} to the left, {favours[1]} to the right." if favours else "")))
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


RATIO_EFFECTS = ("risk_ratio", "odds_ratio", "rate_ratio")


def _ratio_words(rows: Sequence[Mapping[str, Any]]) -> str:
    """'rate ratio' (or 'ratio' when they differ) when every row of the summary is a ratio; else ''."""
    effects = {r.get("effect") for r in rows}
    if not effects or not effects <= set(RATIO_EFFECTS):
        return ""
    return EFFECT_WORDS[next(iter(effects))] if len(effects) == 1 else "ratio"


def _populations_of(analyses: Sequence[Mapping[str, Any]], context: EndpointContext) -> list[str]:
    found = []
    for analysis in analyses:
        population = analysis.get("population") or context.population
        if population not in found:
            found.append(population)
    return found


def _summary_title(context: EndpointContext, analyses: Sequence[Mapping[str, Any]]) -> str:
    """The all-analyses title names every population its rows use (a per-protocol row under a title
    saying 'full analysis set' is a number a reader cannot place)."""
    what = f"Estimated difference from {context.reference} at {context.primary_visit}, every analysis"
    populations = [_lower_first_word(context.population_label(p)) for p in _populations_of(analyses, context)]
    if len(populations) <= 1:
        return context.title(what)
    return f"{what}; {', '.join(populations[:-1])} or {populations[-1]} (as each row states)"


def _levels_sentence(analyses: Sequence[Mapping[str, Any]]) -> str:
    """The confidence level of every analysis in the summary, as the analyses record it."""
    levels = {}
    for analysis in analyses:
        options = analysis.get("options") or {}
        if analysis.get("method") == "tipping_point":
            level = f"{100 * (1 - float(options.get('alpha') or 0.05)):g}%"
        else:
            level = _level_text(options)
        levels.setdefault(level, []).append(str(analysis.get("label") or analysis.get("id")))
    if len(levels) == 1:
        return f"Confidence level: {next(iter(levels))} in every analysis."
    return "Confidence levels: " + "; ".join(f"{level} in {', '.join(names)}" for level, names in levels.items()) + "."


def _estimates_at_primary_visit(context: EndpointContext, analyses) -> list[dict[str, Any]]:
    rows = []
    for analysis in analyses:
        if analysis.get("status") not in (None, "ok"):
            continue
        label = analysis.get("label") or analysis.get("id")
        if analysis.get("method") == "tipping_point":   # its differences are the no-shift cell, under MAR
            label = f"{label}: no shift (multiple imputation, missing at random)"
        counts = context.population_counts(analysis.get("population"))
        differences = (analysis.get("tables") or {}).get("differences")
        for row in rows_as_dicts(differences):
            # An estimate over the whole period (not at a scheduled visit) stands in for the primary visit,
            # said in its label: a count endpoint's primary analysis was missing from the summary.
            whole = row.get("visit") is not None and row.get("visit") not in context.visits
            if (row.get("visit") in (context.primary_visit, None) or whole) and row.get("estimate") is not None:
                n = counts.get(row.get("arm"))
                rows.append({"label": f"{label}: {str(row.get('visit')).lower()}" if whole else label,
                             "primary": analysis.get("role") == "primary",
                             "scope": "; ".join([str(analysis.get("role") or "sensitivity").capitalize(),
                                                 _short_label(context.estimand_label(analysis.get("estimand"))),
                                                 context.population_label(analysis.get("population"))]),
                             "arm": f"{row.get('arm')} (N = {n})" if n is not None else row.get("arm"),
                             "arm_code": row.get("arm"), "estimate": row.get("estimate"), "se": row.get("se"),
                             "df": row.get("df"), "lower": row.get("lower"), "upper": row.get("upper"),
                             "p": row.get("p"), "effect": row.get("effect"), "visit": row.get("visit")})
    return rows


def _short_label(label: str) -> str:
    return re.sub(r"\s*\(.*\)\s*$", "", label).strip() or label


def mmrm_sensitivity(section: Section, context: EndpointContext, analysis) -> None:
    """A repeated-measures model as a sensitivity analysis: what differs, its differences and fit."""
    tables, fit = analysis.get("tables") or {}, analysis.get("fit") or {}
    section.paragraph(_model_description(context, analysis))
    if analysis.get("population"):
        section.paragraph(f"Population: {context.population_label(analysis['population'])}; "
                          f"estimand: {context.estimand_label(analysis.get('estimand'))}.")
    if tables.get("differences"):
        section.table(_differences_table(context, tables["differences"], f"{analysis.get('id')}_differences",
                                         context.title(f"Differences from {context.reference} by visit", analysis),
                                         f"{_level_text(analysis.get('options') or {})} confidence interval",
                                         analysis=analysis))
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
    if method == "multiple_imputation":
        for text in _imputation_words(context, analysis):
            section.paragraph(text)
    else:
        text = f"{METHOD_WORDS.get(method, f'Method {method!r}')}."
        if method not in METHOD_WORDS:
            text += " This method is not described further by this version of the report; its tables follow as recorded."
        section.paragraph(text)
    level = _level_text(options)
    detail = []
    for name, source in (analysis.get("tables") or {}).items():
        if name == "differences":
            ratio = _ratio_words(rows_as_dicts(source))
            what = (f"{ratio.capitalize()}s to {context.reference} by visit" if ratio
                    else f"Differences from {context.reference} by visit")
            section.table(_differences_table(context, source, f"{analysis.get('id')}_differences",
                                             context.title(what, analysis),
                                             f"{level} confidence interval", analysis=analysis))
            continue
        if name == "pooling":
            source = _pooling_in_our_order(source)
        kinds, labels, hidden = _effect_scale(analysis, source)
        table = from_results_table(_effect_words(source), slug=f"{context.slug}_{analysis.get('id')}_{name}",
                                   number_format=context.number_format, labels={**POOLING_LABELS, **labels},
                                   kinds=kinds, hide=hidden,
                                   title=context.title(POOLING_TITLE if name == "pooling"
                                                       else str(source.get("title") or name), analysis))
        if detail_shown or name in SENSITIVITY_SHOWN:
            section.table(context.standalone(table, analysis, notes=[_model_footnote(context, analysis)]))
        else:
            detail.append(table)
    fit = {k: v for k, v in (analysis.get("fit") or {}).items() if isinstance(v, (int, float, str, bool))}
    if method == "multiple_imputation":
        fit = {}     # stated in words above
    if fit.get("assumption"):
        fit["assumption"] = ASSUMPTION_WORDS.get(fit["assumption"], fit["assumption"])
    if method in NON_CONTINUOUS_METHODS:
        fit = {k: (FIT_WORDS.get(v, v) if isinstance(v, str) else v) for k, v in fit.items()}
    if "confidence_level" in fit:
        fit["confidence_level"] = _level_text({"confidence_level": fit["confidence_level"]})
    if fit and not detail_shown:
        section.paragraph(_facts_sentence(fit, context.number_format))
    elif fit:
        section.table(context.standalone(facts_table(
            [(_fact_label(k), v, "text" if isinstance(v, str) else ("count" if isinstance(v, int) else "general"))
             for k, v in fit.items()], slug=f"{context.slug}_{analysis.get('id')}_facts",
            title=context.title("Settings and facts", analysis), number_format=context.number_format), analysis))
    section.csv_only(detail)


POOLING_TITLE = "How the imputations add to the variance of each estimate"
# Our own order: the total first, then its two parts, then what they imply.
POOLING_ORDER = ("arm", "visit", "total_variance", "within_variance", "between_variance", "monte_carlo_se",
                 "fraction_missing_information", "relative_increase", "proportion_due_to_missing",
                 "relative_efficiency", "imputations", "complete_df")
POOLING_LABELS = {
    "total_variance": "Variance of the pooled estimate", "within_variance": "Average variance within an imputation",
    "between_variance": "Variance between imputations", "monte_carlo_se": "Monte Carlo error (√(between / m))",
    "fraction_missing_information": "Information lost to missing data (fraction)",
    "relative_increase": "Increase in variance from missing data (relative)",
    "proportion_due_to_missing": "Part of the variance from missing data",
    "relative_efficiency": "Efficiency against infinitely many imputations",
    "imputations": "Imputations (m)", "complete_df": "DF with complete data",
}


def _pooling_in_our_order(source: Mapping[str, Any]) -> dict[str, Any]:
    """The variance table in our column order, with the Monte Carlo error of each estimate added."""
    rows = rows_as_dicts(source)
    for row in rows:
        if row.get("between_variance") is not None and row.get("imputations"):
            row["monte_carlo_se"] = math.sqrt(max(row["between_variance"], 0.0) / row["imputations"])
    present = [c for c in POOLING_ORDER if any(c in r for r in rows)]
    present += [c for c in (source.get("columns") or []) if c not in present]
    return {**source, "columns": present, "data": [[r.get(c) for c in present] for r in rows]}


def _imputation_words(context: EndpointContext, analysis: Mapping[str, Any]) -> list[str]:
    """The imputation model, the analysis model run on each completed dataset, and what was imputed."""
    options, fit = analysis.get("options") or {}, analysis.get("fit") or {}
    assumption = ASSUMPTION_WORDS.get(options.get("assumption"), options.get("assumption") or "an unrecorded assumption")
    if (fit.get("assumption_rules") or {}).get("rules"):
        assumption = "the assumption their event and reason call for (below)"
    covariates = ", ".join(options.get("covariates") or []) or "no covariates"
    own_matrix = ("each arm with its own regression and covariance matrix" if options.get("covariance_by_arm")
                  else "the arms sharing one covariance matrix, with a mean for each arm and visit")
    words = [
        f"Imputation model: the outcome at all {len(context.visits)} scheduled visits is multivariate normal given "
        f"the arm and the covariates ({covariates}, "
        f"{'one effect common to all visits' if options.get('covariate_effects') == 'common' else 'each with its own effect at each visit'}"
        f"), {own_matrix}; "
        f"parameters are drawn from their posterior by data augmentation ({options.get('chains', '?')} independent "
        f"chains, {options.get('burn_in', '?')} burn-in iterations, {options.get('thinning', '?')} iterations between "
        f"imputations), giving {options.get('imputations', '?')} completed datasets. Values missing at or after "
        f"an intercurrent event are imputed under {assumption}; every other missing value (intermittent or "
        "administrative) under missing at random."]
    if options.get("delta") not in (None, 0, 0.0):
        arms = ", ".join(options.get("delta_arms") or []) or "the active arms"
        words[0] += (f" Imputed values in {arms} are then shifted by {options['delta']:g}"
                     + (" at each later visit, cumulatively." if options.get("delta_cumulative") else "."))
    words.extend(imputation_guard_words(options, fit))
    model = options.get("analysis_model") or "ancova"
    model_words = ("an analysis of covariance at each visit (outcome on arm and the covariates "
                   f"{covariates})" if model == "ancova" else
                   "the repeated-measures model of the primary analysis" if model == "mmrm" else str(model))
    complete_df = fit.get("complete_df")
    words.append(f"Analysis model: each completed dataset is analysed by {model_words}; the {options.get('imputations', '?')} "
                 "results are pooled by Rubin's rules, with Barnard–Rubin degrees of freedom"
                 + (f" (complete-data degrees of freedom {complete_df:g})." if isinstance(complete_df, (int, float)) else "."))
    diagnostics = fit.get("diagnostics") or {}
    if diagnostics.get("imputed_values") is not None:
        words.append(
            f"Values imputed: {diagnostics['imputed_values']} in each completed dataset"
            + (f" (among {diagnostics['participants']} participants)" if diagnostics.get("participants") else "")
            + f": {diagnostics.get('imputed_after_event', '?')} at or after an intercurrent event, under {assumption}, "
              f"and {diagnostics.get('imputed_other', '?')} under missing at random.")
    return words


def _fact_label(key: str) -> str:
    return FACT_LABELS.get(key, key.replace("_", " ").capitalize())


def _facts_sentence(fit: Mapping[str, Any], number_format: NumberFormat) -> str:
    """The settings and facts of a sensitivity analysis as one line of text."""
    parts = []
    for key, value in fit.items():
        kind = "text" if isinstance(value, str) else ("count" if isinstance(value, int) else "general")
        parts.append(f"{_fact_label(key)}: {number_format.cell(value, kind)}")
    return "Settings and facts: " + "; ".join(parts) + "."


def tipping_point(section: Section, context: EndpointContext, analysis) -> None:
    tables, options = analysis.get("tables") or {}, analysis.get("options") or {}
    alpha = float(options.get("alpha") or 0.05)
    grid_name = next((n for n, t in tables.items()
                      if {"shift", "active_shift"} & set(t.get("columns") or []) and "estimate" in (t.get("columns") or [])),
                     None)
    if grid_name is None:
        section.notice("The tipping-point analysis carries no grid of shifts.")
        return
    grid = tables[grid_name]
    cells = [{**c, "shift": c.get("shift", c.get("active_shift")), "reference_shift": c.get("reference_shift") or 0.0}
             for c in rows_as_dicts(grid)]
    reading = TippingReading(context, analysis, cells, alpha)
    for text in reading.method_words():
        section.paragraph(text)
    caution = interim_level_caution(context.results, alpha)
    if caution:
        section.notice(caution)
    section.items(reading.bullets())
    for name, source in tables.items():
        if name == "differences":
            section.table(_differences_table(
                context, source, "tipping_base_differences",
                context.title(f"Differences from {context.reference} with no shift (missing at random)", analysis),
                f"{100 * (1 - alpha):g}% confidence interval", analysis=analysis))
    section.table(reading.summary_table())
    # The grid's numbers are a CSV file (listed before the map, so the list never stands alone on a page).
    visits = {c.get("visit") for c in cells}
    hidden = ("visit", "reference") if len(visits) == 1 else ("reference",)
    grid_table = from_results_table(grid, slug=f"{context.slug}_tipping_grid", hide=hidden, wide=True,
                                    title=context.title("Tipping-point grid: estimate and p-value for each shift"
                                                        + (f" (at {next(iter(visits))})" if len(visits) == 1 else ""),
                                                        analysis),
                                    number_format=context.number_format,
                                    intervals={f"{100 * (1 - alpha):g}% confidence interval": ("lower", "upper")})
    section.csv_only([grid_table])
    usable = [c for c in cells if c.get("shift") is not None and c.get("arm") is not None]
    section.figure(_figure(
        "tipping_map", f"Tipping-point map: estimated difference from {context.reference} for each pair of shifts, "
                       f"coloured by whether p < {alpha:g}",
        f"Tile map over {len({c['shift'] for c in usable})} shifts in the active arm and "
        f"{len({c['reference_shift'] for c in usable})} in the reference arm for {len({c['arm'] for c in usable})} arms; "
        f"each tile is labelled with the estimated difference and coloured by whether its p-value is below {alpha:g}.",
        lambda: draw.tipping_chart(usable, arms=context.arms, alpha=alpha,
                                   label=lambda v: context.number_format.cell(v, "mean"),
                                   shift_label=lambda v: context.number_format.cell(v, "shift")), context,
        note="Tile text: pooled estimated difference (arm minus reference). Colour: whether the two-sided p-value "
             f"is below {alpha:g}."))


def interim_level_caution(results: Mapping[str, Any], alpha: float) -> str:
    """At a look that is not the last (or a cut that is no planned look), the tipping point's level is nominal:
    the group-sequential boundary, not α, is what a decision at this cut may use."""
    facts = (results.get("multiplicity") or {}).get("sequential") or {}
    if not facts or (facts.get("planned_look") and facts.get("look") == facts.get("looks")):
        return ""
    where = (f"interim look {facts.get('look')} of {facts.get('looks')}" if facts.get("planned_look")
             else "a cut that is not a planned look")
    return (f"This is {where}: the tipping point uses the nominal two-sided level {alpha:g}, not the "
            "group-sequential boundary of the multiple-comparisons section. 'Significant' below describes how far "
            "the estimate withstands the shifts; no decision follows from it at this cut.")


class TippingReading:
    """The tipping-point grid read for a reviewer: which shift tips each row, in context."""

    def __init__(self, context: EndpointContext, analysis: Mapping[str, Any], cells: list[dict], alpha: float):
        self.context, self.analysis, self.cells, self.alpha = context, analysis, cells, alpha
        self.recorded = {(r.get("arm"), r.get("reference_shift") or 0.0): r
                         for r in rows_as_dicts((analysis.get("tables") or {}).get("tipping_points"))}
        self.arms = [a for a in dict.fromkeys(c.get("arm") for c in cells) if a is not None]
        self.reference_shifts = sorted({c["reference_shift"] for c in cells}, key=lambda r: (abs(r), r))
        self.sd, self.sd_source = _outcome_sd(context)

    def shift_text(self, value: float | None) -> str:
        return self.context.number_format.cell(value, "shift")

    def row(self, arm: str, reference_shift: float) -> list[dict]:
        return sorted((c for c in self.cells if c.get("arm") == arm and c["reference_shift"] == reference_shift),
                      key=lambda c: c["shift"])

    def tipping(self, arm: str, reference_shift: float) -> float | None:
        """The run's interpolated tipping shift, or the same rule applied to the grid here."""
        recorded = self.recorded.get((arm, reference_shift))
        if recorded is not None and "tipping_shift" in recorded:   # the run's reading is the record
            return None if recorded["tipping_shift"] is None else float(recorded["tipping_shift"])
        line = self.row(arm, reference_shift)
        for left, right in zip(line, line[1:]):
            if None in (left.get("p"), right.get("p")) or (left["p"] < self.alpha) == (right["p"] < self.alpha):
                continue
            return left["shift"] + (self.alpha - left["p"]) * (right["shift"] - left["shift"]) / (right["p"] - left["p"])
        return None

    def method_words(self) -> list[str]:
        options = self.analysis.get("options") or {}
        shifts = ", ".join(self.shift_text(s) for s in sorted({c["shift"] for c in self.cells}))
        reference_shifts = ", ".join(self.shift_text(s) for s in sorted({c["reference_shift"] for c in self.cells}))
        base = next((c for c in self.cells if c["shift"] == 0 and c["reference_shift"] == 0 and c.get("estimate") is not None), None)
        words = [
            f"Multiple imputation under missing at random ({options.get('imputations', '?')} imputations; imputation "
            "and analysis models as for the other multiple-imputation analyses), repeated with every imputed value "
            f"in the active arms shifted by δ ({shifts}) and every imputed value in {self.context.reference} shifted "
            f"by δᵣ ({reference_shifts}). Observed values are never shifted. Each shifted set of completed datasets "
            f"is analysed and pooled again at {self.context.primary_visit}.",
            f"The tipping shift of a row (one δᵣ) is where the two-sided p-value crosses α = {self.alpha:g} between "
            "two neighbouring shifts of the grid, found by linear interpolation of the p-value in the shift: "
            "δ* = δᵢ + (α − pᵢ)(δᵢ₊₁ − δᵢ)/(pᵢ₊₁ − pᵢ).",
        ]
        if base is not None:
            below = base["estimate"] < 0
            better = self.context.better
            # The plan's better key says which way hurts the treatment; only without it does the
            # sign of the estimate stand in (an arm can sit on the worse side of the reference).
            lower = better == "lower" if better in ("lower", "higher") else below
            words.append(
                f"Direction: the estimated differences at no shift are {'negative' if below else 'positive'} "
                f"(the active arms {'below' if below else 'above'} {self.context.reference}"
                + (f", and {better} values are better for this endpoint" if better else "") + "). "
                f"A {'positive' if lower else 'negative'} δ (the active arms' imputed values made "
                f"{'higher' if lower else 'lower'}) and a {'negative' if lower else 'positive'} δᵣ "
                f"({self.context.reference}'s imputed values made {'lower' if lower else 'higher'}) work against "
                "the treatment; the grid searches that way.")
        if self.sd is not None:
            words.append(f"SD units use the {self.sd_source}, {self.context.number_format.cell(self.sd, 'sd')}.")
        if any(c.get("monte_carlo_se") is not None for c in self.cells):
            words.append(f"Monte Carlo error: with {options.get('imputations', '?')} imputations each pooled "
                         "estimate carries a Monte Carlo standard error of √(B/m) (B: variance between "
                         "imputations); divided by how fast the estimate moves with δ, it says how far δ* "
                         "could move with another seed.")
        else:
            words.append("Monte Carlo error: not recorded by the run that made these results.")
        return words

    def bullets(self) -> list[str]:
        lines = []
        for arm in self.arms:
            for reference_shift in self.reference_shifts:
                lines.append(self.bullet(arm, reference_shift))
        return lines

    def bullet(self, arm: str, reference_shift: float) -> str:
        where = f"{arm}, with {self.context.reference} shifted by δᵣ = {self.shift_text(reference_shift)}"
        line = self.row(arm, reference_shift)
        tipping = self.tipping(arm, reference_shift)
        base = line[0] if line else {}
        significant = base.get("p") is not None and base["p"] < self.alpha
        if tipping is None:
            largest = self.shift_text(line[-1]["shift"]) if line else "–"
            verdict = "significant" if significant else "not significant"
            return f"{where}: {verdict} at every shift of the grid, up to δ = {largest}."
        change = "is no longer significant" if significant else "becomes significant"
        text = f"{where}: the difference {change} from δ ≈ {self.shift_text(tipping)}"
        context = []
        if self.sd:
            context.append(f"{tipping / self.sd:.2f} SD")
        if base.get("estimate"):
            context.append(f"{abs(tipping / base['estimate']):.1f} times the size of the estimated difference at "
                           f"no active shift ({self.context.number_format.cell(base['estimate'], 'mean')})")
        error = self.monte_carlo(line, tipping)
        if error:
            context.append(error)
        return text + (f" ({'; '.join(context)})" if context else "") + "."

    def monte_carlo(self, line: list[dict], tipping: float) -> str:
        """The Monte Carlo error near the tipping shift, as a standard error and as a shift."""
        near = [c for c in line if c.get("monte_carlo_se") is not None]
        if not near:
            return ""
        closest = min(near, key=lambda c: abs(c["shift"] - tipping))
        slopes = [(b["estimate"] - a["estimate"]) / (b["shift"] - a["shift"]) for a, b in zip(line, line[1:])
                  if a.get("estimate") is not None and b.get("estimate") is not None and b["shift"] != a["shift"]]
        slope = abs(sum(slopes) / len(slopes)) if slopes else 0.0
        text = f"Monte Carlo error of the estimate there {self.context.number_format.cell(closest['monte_carlo_se'], 'sd')}"
        if slope > 0:
            text += f", about ±{self.shift_text(closest['monte_carlo_se'] / slope)} in δ"
        return text

    def summary_table(self):
        rows = []
        for arm in self.arms:
            for reference_shift in self.reference_shifts:
                line = self.row(arm, reference_shift)
                tipping = self.tipping(arm, reference_shift)
                base = line[0] if line else {}
                rows.append({"arm": arm, "reference_shift": reference_shift, "tipping_shift": tipping,
                             "tipping_sd": tipping / self.sd if tipping is not None and self.sd else None,
                             "base_estimate": base.get("estimate"),
                             "ratio": abs(tipping / base["estimate"]) if tipping is not None and base.get("estimate") else None})
        columns = ["arm", "reference_shift", "base_estimate", "tipping_shift", "tipping_sd", "ratio"]
        if self.sd is None:
            columns.remove("tipping_sd")
        table = from_records(rows, columns, slug=f"{self.context.slug}_tipping_tipping_points",
                             title=self.context.title("Shift of the active arms' imputed values at which the "
                                                      "conclusion changes", self.analysis),
                             number_format=self.context.number_format,
                             labels={"reference_shift": f"Shift in {self.context.reference} (δᵣ)",
                                     "base_estimate": "Estimated difference at δ = 0",
                                     "tipping_shift": "Tipping shift δ*", "tipping_sd": "δ* in SD units",
                                     "ratio": "δ* relative to the difference at δ = 0"},
                             kinds={"reference_shift": "shift", "base_estimate": "mean", "tipping_shift": "shift",
                                    "tipping_sd": "statistic", "ratio": "percent"})
        notes = [_model_footnote(self.context, self.analysis).replace("Imputation under", "Imputation under")
                 + " Shifts are added to imputed values only.",
                 "δ* is interpolated linearly in the p-value between neighbouring shifts of the grid; "
                 "– where the conclusion does not change within the grid."]
        if self.sd is not None:
            notes.append(f"SD: the {self.sd_source}.")
        return self.context.standalone(table, self.analysis, notes=notes)


def _outcome_sd(context: EndpointContext) -> tuple[float | None, str]:
    """The outcome's SD at the primary visit: from the primary model's covariance, else observed."""
    for analysis in context.endpoint.get("analyses") or []:
        if analysis.get("role") != "primary":
            continue
        for row in rows_as_dicts((analysis.get("tables") or {}).get("covariance")):
            value = row.get(context.primary_visit)
            if row.get("visit") == context.primary_visit and isinstance(value, (int, float)) and value > 0:
                return math.sqrt(value), f"residual SD at {context.primary_visit} from the primary model"
    wanted = context.columns.get("change", "CHG") if context.analysed == "change" else context.columns.get("value", "AVAL")
    rows = [r for r in rows_as_dicts(context.endpoint.get("descriptive"))
            if r.get("visit") == context.primary_visit and r.get("variable") in (wanted, None)
            and r.get("sd") is not None and r.get("n")]
    if rows:
        pooled = math.sqrt(sum((r["n"] - 1) * r["sd"] ** 2 for r in rows) / max(1, sum(r["n"] - 1 for r in rows)))
        return pooled, f"pooled observed SD at {context.primary_visit}"
    return None, ""


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
