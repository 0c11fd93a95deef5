"""The analysis plan: one pydantic schema, the only place a plan's shape is defined.

Every model is frozen and forbids unknown keys, so a typo in a plan is an error, not a
silently ignored setting.  Rules that span fields (the reference arm is one of the arms,
visits are in time order, an estimand names a known population, ...) collect every
:class:`RuleIssue` they find, each with the path of the offending field relative to the
model that checks it, and raise them together as one ``plan_rule`` error; the loader
(:mod:`trialcut.plan.load`) turns each issue into its own located problem.  Allowed names
of covariance structures, df methods and imputation assumptions come from
:mod:`trialcut.stats.names`, the lists the engine dispatches on.
"""
from __future__ import annotations

import difflib
import typing
from dataclasses import dataclass, fields
from datetime import date
from functools import lru_cache
from typing import Annotated, Any, Iterable, Iterator, Literal, Union

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    TypeAdapter,
    ValidationError,
    WithJsonSchema,
    field_validator,
    model_validator,
)
from pydantic_core import PydanticCustomError

from trialcut.stats.names import (
    COVARIANCE_STRUCTURES,
    DF_METHODS,
    ESTIMATION_METHODS,
    IMPUTATION_ASSUMPTIONS,
    MULTIPLICITY_METHODS,
    SPENDING_FUNCTION_NAMES,
)

CovarianceName = Literal[COVARIANCE_STRUCTURES]  # type: ignore[valid-type]
DfMethod = Literal[DF_METHODS]  # type: ignore[valid-type]
EstimationMethod = Literal[ESTIMATION_METHODS]  # type: ignore[valid-type]
ImputationAssumption = Literal[IMPUTATION_ASSUMPTIONS]  # type: ignore[valid-type]
MultiplicityMethod = Literal[MULTIPLICITY_METHODS]  # type: ignore[valid-type]
SpendingFunction = Literal[SPENDING_FUNCTION_NAMES]  # type: ignore[valid-type]

Identifier = Annotated[str, Field(pattern=r"^[A-Za-z][A-Za-z0-9_]*$", max_length=64)]

PLAN_FORMAT_VERSION = 2

# Format 2 gave the confidence-level key and two degrees-of-freedom methods plain names of our own;
# a format-1 plan is refused, and check then names any key or value it does not know.
OLDER_FORMATS = (1,)


class Strict(BaseModel):
    # NaN and infinity never mean anything in a plan and would break the canonical JSON.
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)

    @model_validator(mode="before")
    @classmethod
    def _no_true_false_as_numbers(cls, data: Any) -> Any:
        # Pydantic reads true as 1, and YAML reads an unquoted yes/no/on/off as true/false,
        # so "imputations: yes" would silently become 1.  Such a value is swapped for a
        # marker that no number field accepts, so it fails with the field's own error.
        if not isinstance(data, dict):
            return data
        swapped = {key: _TrueFalse(value) for key, value in data.items()
                   if isinstance(value, bool) and key in cls.model_fields
                   and _numeric_only(cls.model_fields[key].annotation)}
        return {**data, **swapped} if swapped else data


class _TrueFalse:
    """A true/false value found where a number belongs."""

    def __init__(self, value: bool):
        self.value = value

    def __repr__(self) -> str:
        return "true" if self.value else "false"


@dataclass(frozen=True)
class RuleIssue:
    """One broken rule; ``path`` is relative to the model whose validator found it."""

    path: tuple[str | int, ...]
    message: str
    expected: str | None = None
    got: str | None = None
    hint: str | None = None
    code: str = "plan.rule"


def _raise_issues(issues: Iterable[RuleIssue]) -> None:
    issues = tuple(issues)
    if issues:
        summary = "; ".join(issue.message for issue in issues)
        raise PydanticCustomError("plan_rule", "{summary}", {"summary": summary, "issues": issues})


def _numeric_only(annotation: Any) -> bool:
    """A number field (int or float, possibly optional) that does not also take true/false."""
    members = {annotation} if not typing.get_args(annotation) else set(typing.get_args(annotation))
    return bool(members & {int, float}) and bool not in members and annotation is not bool


def suggestion(word: object, choices: Iterable[str]) -> str | None:
    """'did you mean ...?' for a near miss, else None."""
    if not isinstance(word, str):
        return None
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f"did you mean {close[0]!r}?" if close else None


def _one_of(choices: Iterable[str]) -> str:
    return "one of " + ", ".join(str(c) for c in choices)


# --------------------------------------------------------------------------- study, columns
class Study(Strict):
    id: str = Field(min_length=1, max_length=64, description="Study identifier (invented in examples).")
    title: str = Field(min_length=1)
    phase: Literal["1", "2", "3", "4", "1/2", "2/3"] | None = None
    sponsor: str | None = None
    indication: str | None = None


class Columns(Strict):
    """Where each piece of information sits in the data cut (CDISC ADaM BDS names by default)."""

    subject: str = "USUBJID"
    arm: str = "TRT01P"
    visit: str = "AVISIT"
    visit_number: str | None = "AVISITN"
    study_day: str | None = "ADY"
    value: str = "AVAL"
    baseline: str | None = "BASE"
    change: str | None = "CHG"
    baseline_flag: str | None = "ABLFL"
    parameter: str | None = "PARAMCD"
    randomisation_date: str | None = Field(default=None, description=(
        "Column with each participant's randomisation (or first-dose) date, ISO 8601 (ADaM RANDDT or "
        "TRTSDT). With it a visit is due at the cut-off when date + planned day − 1 + window is on or "
        "before the cut-off; without it the report says due-ness could not be judged."))
    analysis_flag: str | None = Field(default=None, description=(
        "Without windowing: a column (ADaM ANL01FL) whose value Y marks the one record per participant and "
        "visit the data's own assignment analyses; other post-baseline records are left out and counted."))


# --------------------------------------------------------------------------- arms, visits
class Arm(Strict):
    code: str = Field(min_length=1, description="The arm's value in the arm column.")
    label: str | None = None


class Arms(Strict):
    reference: str = Field(description="Code of the control arm; differences are arm minus reference.")
    list: tuple[Arm, ...] = Field(min_length=2)
    strata: tuple[str, ...] = Field(
        default=(), description="Columns holding the randomisation strata (used by dummy arms).")

    @property
    def codes(self) -> tuple[str, ...]:
        return tuple(a.code for a in self.list)

    @model_validator(mode="after")
    def _reference_is_an_arm(self) -> "Arms":
        _raise_issues(_arms_issues(self))
        return self


def _arms_issues(arms: Arms) -> Iterator[RuleIssue]:
    codes = [a.code for a in arms.list]
    for index, code in enumerate(codes):
        if code in codes[:index]:
            yield RuleIssue(("list", index, "code"), f"arm code {code!r} is used twice",
                            expected="a different code for every arm", got=repr(code), code="plan.duplicate_arm")
    if arms.reference not in codes:
        yield RuleIssue(("reference",), f"reference arm {arms.reference!r} is not among the arms",
                        expected=_one_of(codes), got=repr(arms.reference),
                        hint=suggestion(arms.reference, codes) or "name the control arm by its code",
                        code="plan.unknown_reference_arm")


class Visit(Strict):
    label: str = Field(min_length=1, description="Analysis visit label, as in the visit column.")
    order: int = Field(ge=1, description="Position in time; 1 is the first post-baseline visit.")
    day: float | None = Field(default=None, description="Planned study day (needed for windowing and spatial_exponential).")
    window: float | None = Field(default=None, ge=0, description="Half-width of the window in days: planned day ± window.")


class Visits(Strict):
    baseline: str = Field(default="Baseline", description="Label of the baseline visit in the visit column.")
    windowing: bool = Field(default=False, description=(
        "true: assign records to visits by their study day (the windows below); false: keep the visits as "
        "the data names them (e.g. an analysis dataset's AVISIT), trusting its own assignment."))
    other_labels: Literal["error", "leave_out"] = Field(default="error", description=(
        "Without windowing, post-baseline records whose visit label is not scheduled (e.g. 'Unscheduled'): "
        "'error' refuses the cut, 'leave_out' leaves them out of the analysis and counts them."))
    schedule: tuple[Visit, ...] = Field(min_length=1, description="Post-baseline analysis visits, in time order.")

    @property
    def labels(self) -> tuple[str, ...]:
        return tuple(v.label for v in self.schedule)

    @model_validator(mode="after")
    def _ordered_and_windowed(self) -> "Visits":
        _raise_issues(_visits_issues(self))
        return self


def _visits_issues(visits: Visits) -> Iterator[RuleIssue]:
    schedule = visits.schedule
    for index in range(1, len(schedule)):
        before, visit = schedule[index - 1], schedule[index]
        if visit.order <= before.order:
            yield RuleIssue(("schedule", index, "order"), "visit orders must increase down the schedule",
                            expected=f"more than {before.order} (the order of {before.label!r})",
                            got=str(visit.order), hint="list the visits in time order, numbered 1, 2, 3, ...",
                            code="plan.visit_order")
        if visit.day is not None and before.day is not None and visit.day <= before.day:
            yield RuleIssue(("schedule", index, "day"), "planned days must increase down the schedule",
                            expected=f"more than {before.day:g} (the day of {before.label!r})",
                            got=f"{visit.day:g}", code="plan.visit_day_order")
    labels = [v.label for v in schedule]
    for index, label in enumerate(labels):
        if label in labels[:index]:
            yield RuleIssue(("schedule", index, "label"), f"visit label {label!r} is used twice",
                            expected="a different label for every visit", got=repr(label),
                            code="plan.duplicate_visit")
        if label == visits.baseline:
            yield RuleIssue(("schedule", index, "label"), f"visit {label!r} has the baseline label",
                            expected="post-baseline visits only", got=repr(label),
                            hint="the baseline visit is named by visits.baseline, not listed in the schedule",
                            code="plan.baseline_in_schedule")
        if visits.windowing:
            for key in ("day", "window"):
                if getattr(schedule[index], key) is None:
                    yield RuleIssue(("schedule", index), f"windowing needs a planned {key!r} for every visit",
                                    expected=f"a {key!r} for visit {label!r}", got="none",
                                    hint="add it, or set visits.windowing: false", code="plan.windowing")


class Population(Strict):
    id: Identifier
    label: str
    flag: str | None = Field(default=None, description="Column whose value 'Y' marks membership; none = everyone.")


# --------------------------------------------------------------------------- events, estimands
class IntercurrentEvent(Strict):
    id: Identifier
    label: str
    day_column: str = Field(description="Column with the study day the event happened (empty when it did not).")


Strategy = Literal["treatment_policy", "hypothetical", "composite", "while_on_treatment", "principal_stratum"]
SUPPORTED_STRATEGIES = ("treatment_policy", "hypothetical", "composite")


class EventHandling(Strict):
    event: Identifier
    strategy: Strategy
    composite_value: float | None = Field(
        default=None, description="Outcome value assigned after the event (composite strategy).")

    @model_validator(mode="after")
    def _supported(self) -> "EventHandling":
        _raise_issues(_event_handling_issues(self))
        return self


def _event_handling_issues(handling: EventHandling) -> Iterator[RuleIssue]:
    if handling.strategy not in SUPPORTED_STRATEGIES:
        yield RuleIssue(("strategy",), f"strategy {handling.strategy!r} is not supported yet",
                        expected=_one_of(SUPPORTED_STRATEGIES), got=repr(handling.strategy),
                        code="plan.unsupported_strategy")
    if handling.strategy == "composite" and handling.composite_value is None:
        yield RuleIssue(("strategy",), "the composite strategy needs 'composite_value'",
                        expected="composite_value: the outcome value given after the event", got="none",
                        hint="add composite_value, e.g. the worst possible score", code="plan.composite_value")
    if handling.strategy != "composite" and handling.composite_value is not None:
        yield RuleIssue(("composite_value",), "'composite_value' is only for the composite strategy",
                        expected="no composite_value", got=f"{handling.composite_value:g}",
                        hint="remove it, or set strategy: composite", code="plan.composite_value")


class Estimand(Strict):
    """The ICH E9(R1) attributes; the endpoint is named in the endpoint's analyses."""

    id: Identifier
    label: str
    population: Identifier
    treatment: str = Field(description="Treatment condition of interest, in words.")
    intercurrent_events: tuple[EventHandling, ...] = ()
    summary: str = Field(description="Population-level summary, in words.")


# --------------------------------------------------------------------------- analyses
class MMRMOptions(Strict):
    # The JSON Schema says what the loader accepts: one name, or a list tried in order.
    covariance: Annotated[tuple[CovarianceName, ...], WithJsonSchema({
        "anyOf": [{"enum": list(COVARIANCE_STRUCTURES), "type": "string"},
                  {"items": {"enum": list(COVARIANCE_STRUCTURES), "type": "string"}, "minItems": 1, "type": "array"}],
        "default": ["unstructured"], "description": "Structures to try in order until one converges."})] = Field(
        default=("unstructured",), min_length=1, description="Structures to try in order until one converges.")
    covariance_by: str | None = Field(default=None, description="Column for a separate matrix per group (often the arm column).")
    covariates: tuple[str, ...] = ()
    covariates_by_visit: tuple[str, ...] = ()
    method: EstimationMethod = "reml"
    df: DfMethod = "kenward_roger"
    second_derivatives: bool | Literal["bias_corrected"] = Field(default=True, description=(
        "Kenward-Roger only: false leaves out the second-derivative term (which is zero for structures "
        "linear in their variances and covariances, and depends on the parametrisation for the others); "
        "bias_corrected corrects it for the bias of the estimated variances and correlations (Kenward & Roger "
        "2009), which makes the adjustment independent of the parametrisation."))
    robust: bool = False
    confidence_level: float = Field(default=0.95, gt=0, lt=1)

    @field_validator("covariance", mode="before")
    @classmethod
    def _one_name_is_a_list(cls, value: Any) -> Any:
        return (value,) if isinstance(value, str) else value

    @model_validator(mode="after")
    def _kenward_roger_needs_reml(self) -> "MMRMOptions":
        if self.df == "kenward_roger" and self.method != "reml":
            # Kenward-Roger adjusts the REML covariance of the fixed effects; under ML it is undefined.
            _raise_issues([RuleIssue(
                ("df",), f"df {self.df!r} needs method 'reml'", expected="method reml with this df",
                got=f"method {self.method}", hint="set method: reml, or choose df: satterthwaite",
                code="plan.kenward_roger_needs_reml")])
        return self


class AncovaOptions(Strict):
    """Analysis of covariance of the endpoint at each visit on observed data (or one visit)."""

    covariates: tuple[str, ...] = ()
    visits: tuple[str, ...] | Literal["all", "primary"] = "all"
    confidence_level: float = Field(default=0.95, gt=0, lt=1)


class AssumptionRule(Strict):
    """One line of 'assumptions by reason': after this event, for these reasons, this assumption."""

    event: Identifier
    reasons: tuple[str, ...] | None = Field(default=None, description=(
        "Values of the event's reason_column this rule covers; leave out to cover every reason."))
    assumption: ImputationAssumption


class _ImputationSettings(Strict):
    """What every analysis by multiple imputation shares."""

    assumption: ImputationAssumption = "mar"
    burn_in: int = Field(default=200, ge=0)
    thinning: int = Field(default=10, ge=1)
    covariance_by_arm: bool = False
    chains: int = Field(default=4, ge=1, le=64, description=(
        "Independent imputation chains, each with its own burn-in. Part of the random-number "
        "layout: changing it changes the numbers; the worker count never does."))
    covariates: tuple[str, ...] = ()
    covariate_effects: Literal["by_visit", "common"] = Field(default="by_visit", description=(
        "How the imputation model's covariates act: by_visit gives each its own effect at each visit; "
        "common gives one effect at all visits, as a repeated-measures model with covariates but no "
        "covariates_by_visit has. Match the primary model so the two are congenial."))
    reason_column: str | None = Field(default=None, description=(
        "Column with each participant's reason for the event (e.g. DCTREAS or DCSREAS), read by "
        "assumptions_by_reason."))
    assumptions_by_reason: tuple[AssumptionRule, ...] = Field(default=(), description=(
        "Assumptions for values missing after an intercurrent event, chosen by the event and its reason; "
        "the first rule that matches wins, and 'assumption' covers events no rule names."))

    @model_validator(mode="after")
    def _reasons_need_a_column(self) -> "_ImputationSettings":
        if self.reason_column is None and any(rule.reasons is not None for rule in self.assumptions_by_reason):
            _raise_issues([RuleIssue(("reason_column",), "assumptions chosen by reason need the reason column",
                                     expected="reason_column: the column holding the reason, e.g. DCTREAS",
                                     got="none", hint="add reason_column, or drop 'reasons' from the rules",
                                     code="plan.reason_column")])
        return self


class ImputationOptions(_ImputationSettings):
    """Multiple imputation under an assumption for values missing after intercurrent events."""

    imputations: int = Field(default=100, ge=2, le=100_000)
    analysis_model: Literal["ancova", "mmrm"] = "ancova"
    delta: tuple[float, ...] | None = Field(default=None, description="Shift added to imputed values, per visit.")
    delta_arms: tuple[str, ...] = Field(default=(), description="Arms whose imputed values are shifted.")
    delta_cumulative: bool = False
    confidence_level: float = Field(default=0.95, gt=0, lt=1)


class TippingPointOptions(_ImputationSettings):
    imputations: int = Field(default=50, ge=2, le=100_000)
    shifts: tuple[float, ...] = Field(min_length=2, description="Grid of δ added to imputed values in the active arm(s).")
    reference_shifts: tuple[float, ...] | None = Field(
        default=None, description="Second dimension: δ in the reference arm (two-dimensional grid).")
    alpha: float = Field(default=0.05, gt=0, lt=1)


class _AnalysisBase(Strict):
    id: Identifier
    label: str
    estimand: Identifier | None = None
    population: Identifier | None = Field(default=None, description="Overrides the estimand's population.")
    role: Literal["primary", "sensitivity", "supplementary"] | None = Field(default=None, description=(
        "ICH E9(R1): sensitivity = the primary estimand under other assumptions about missing data; "
        "supplementary = another estimand or population. None: primary in the primary slot, otherwise "
        "sensitivity when estimand and population are the primary's, else supplementary."))


class MMRMAnalysis(_AnalysisBase):
    method: Literal["mmrm"]
    options: MMRMOptions = MMRMOptions()


class AncovaAnalysis(_AnalysisBase):
    method: Literal["ancova"]
    options: AncovaOptions = AncovaOptions()


class ImputationAnalysis(_AnalysisBase):
    method: Literal["multiple_imputation"]
    options: ImputationOptions = ImputationOptions()


class TippingPointAnalysis(_AnalysisBase):
    method: Literal["tipping_point"]
    options: TippingPointOptions


class GEEOptions(Strict):
    """Generalized estimating equations over the visits (binary or count endpoints)."""

    covariates: tuple[str, ...] = ()
    correlation: Literal["independence", "exchangeable", "ar1", "unstructured"] = "exchangeable"
    family: Literal["binomial", "poisson", "negative_binomial"] | None = Field(default=None, description=(
        "Leave out: binomial for a binary endpoint, negative_binomial for a count endpoint."))
    effect: Literal["risk_difference", "risk_ratio", "odds_ratio", "rate_ratio", "rate_difference"] | None = Field(
        default=None, description="Leave out: risk_difference (binary) or rate_ratio (count).")
    small_sample: Literal["mancl_derouen"] | None = Field(default=None, description=(
        "mancl_derouen: the bias-reduced sandwich variance of Mancl & DeRouen (2001)."))
    confidence_level: float = Field(default=0.95, gt=0, lt=1)


class RateOptions(Strict):
    """Events over the whole period per participant, exposure time as offset (count endpoints)."""

    covariates: tuple[str, ...] = ()
    family: Literal["negative_binomial", "poisson"] = "negative_binomial"
    effect: Literal["rate_ratio", "rate_difference"] = "rate_ratio"
    confidence_level: float = Field(default=0.95, gt=0, lt=1)


class ProportionsOptions(Strict):
    """Responders at one visit or at each visit: stratified and covariate-adjusted comparisons."""

    visits: tuple[str, ...] | Literal["all", "primary"] = "primary"
    strata: tuple[str, ...] = ()
    covariates: tuple[str, ...] = ()
    confidence_level: float = Field(default=0.95, gt=0, lt=1)


class ResponderImputationOptions(Strict):
    """Multiple imputation of the underlying score, then responders by the endpoint's threshold."""

    assumption: ImputationAssumption = "mar"
    covariates: tuple[str, ...] = ()
    imputations: int = Field(default=50, ge=2, le=10000)
    burn_in: int = Field(default=200, ge=0)
    thinning: int = Field(default=10, ge=1)
    chains: int = Field(default=4, ge=1)
    confidence_level: float = Field(default=0.95, gt=0, lt=1)


class ResponderImputationAnalysis(_AnalysisBase):
    method: Literal["responder_imputation"]
    options: ResponderImputationOptions = ResponderImputationOptions()


class GEEAnalysis(_AnalysisBase):
    method: Literal["gee"]
    options: GEEOptions = GEEOptions()


class RateAnalysis(_AnalysisBase):
    method: Literal["rate"]
    options: RateOptions = RateOptions()


class ProportionsAnalysis(_AnalysisBase):
    method: Literal["proportions"]
    options: ProportionsOptions = ProportionsOptions()


Analysis = Annotated[
    Union[MMRMAnalysis, AncovaAnalysis, ImputationAnalysis, TippingPointAnalysis, GEEAnalysis, RateAnalysis,
          ProportionsAnalysis, ResponderImputationAnalysis],
    Field(discriminator="method"),
]
# Method name -> the plan model of its analysis.  The runner's registry must carry the
# same names (checked by a test), so a method is added here and in trialcut.run.methods.
ANALYSIS_METHODS: dict[str, type[_AnalysisBase]] = {
    "mmrm": MMRMAnalysis,
    "ancova": AncovaAnalysis,
    "multiple_imputation": ImputationAnalysis,
    "tipping_point": TippingPointAnalysis,
    "gee": GEEAnalysis,
    "rate": RateAnalysis,
    "proportions": ProportionsAnalysis,
    "responder_imputation": ResponderImputationAnalysis,
}
# Which endpoint types each method analyses.
METHOD_ENDPOINT_TYPES: dict[str, tuple[str, ...]] = {
    "mmrm": ("continuous",), "ancova": ("continuous",), "multiple_imputation": ("continuous",),
    "tipping_point": ("continuous",), "gee": ("binary", "count"), "rate": ("count",), "proportions": ("binary",),
    "responder_imputation": ("binary",),
}


class Subgroup(Strict):
    """A participant-level factor for subgroup analyses (e.g. sex, disease severity)."""

    id: Identifier
    label: str
    column: str = Field(description="A column constant within each participant.")
    levels: tuple[str, ...] = Field(min_length=2, description="The column's values to analyse, in display order.")
    min_participants: int = Field(default=10, ge=2, description=(
        "Fewer participants than this in any arm of a level: the level is reported, not fitted."))


class ResponseRule(Strict):
    """How a binary endpoint's response (1) or non-response (0) is found at each visit."""

    flag_column: str | None = Field(default=None, description=(
        "A column of the data holding the response itself: Y/N or 1/0 unless flag_values names its two values."))
    flag_values: tuple[str, str] | None = Field(default=None, description=(
        "The flag column's two values, the one meaning response first, e.g. [Responder, Non-responder]."))
    threshold: float | None = Field(default=None, description=(
        "Response when the analysed value (the change or the value, as 'analysed' says) reaches this."))
    direction: Literal["at_most", "at_least"] | None = Field(default=None, description=(
        "at_most: a value at or below the threshold is a response (lower is better); at_least: at or above."))
    missing: Literal["non_response", "leave_out"] = Field(description=(
        "A due visit without a value: counted as non-response, or left out of the analysis. An intercurrent "
        "event under the composite strategy always counts as non-response."))

    @model_validator(mode="after")
    def _one_source(self) -> "ResponseRule":
        _raise_issues(_response_issues(self))
        return self


def _response_issues(rule: ResponseRule) -> Iterator[RuleIssue]:
    if (rule.flag_column is None) == (rule.threshold is None):
        yield RuleIssue((), "a response is read from flag_column or derived by threshold, exactly one of them",
                        expected="flag_column, or threshold with direction", got="both" if rule.threshold is not None
                        else "neither", code="plan.response_source")
    if rule.flag_values is not None and rule.flag_column is None:
        yield RuleIssue(("flag_values",), "flag_values name the values of flag_column", expected="flag_column as well",
                        got="flag_values alone", code="plan.response_flag_values")
    if rule.flag_values is not None and rule.flag_values[0].strip() == rule.flag_values[1].strip():
        yield RuleIssue(("flag_values",), "response and non-response need two different values",
                        expected="two different values", got=f"{rule.flag_values[0]!r} twice",
                        code="plan.response_flag_values")
    if rule.threshold is not None and rule.direction is None:
        yield RuleIssue(("direction",), "a threshold needs its direction", expected="at_most or at_least",
                        got="none", hint="at_most when lower values are better", code="plan.response_direction")


class EndpointAnalyses(Strict):
    primary: Analysis
    sensitivity: tuple[Analysis, ...] = ()

    @property
    def every(self) -> tuple[Analysis, ...]:
        """The primary analysis, then the sensitivity analyses, in the plan's order."""
        return (self.primary, *self.sensitivity)


class Endpoint(Strict):
    id: Identifier
    label: str
    type: Literal["continuous", "binary", "count"] = "continuous"
    parameter: str | None = Field(default=None, description="Value of the parameter column to select (PARAMCD).")
    analysed: Literal["change", "value"] = Field(default="change", description="Analyse change from baseline or the value itself.")
    primary_visit: str
    range: tuple[float, float] | None = Field(default=None, description="Allowed range of the measured value.")
    decimals: int = Field(default=1, ge=0, le=6, description="Decimals the raw value is recorded to.")
    better: Literal["lower", "higher"] | None = Field(default=None, description=(
        "Which values are better for the participant; sets which side of a difference favours the "
        "active arm in figures and text. Left out, the report reads it from the label ('higher is worse')."))
    response: ResponseRule | None = Field(default=None, description="Binary endpoints: how a response is found.")
    exposure: str | None = Field(default=None, description=(
        "Count endpoints: the column with each record's time at risk (the count is events in that time)."))
    analyses: EndpointAnalyses

    @model_validator(mode="after")
    def _continuous_only(self) -> "Endpoint":
        _raise_issues(_endpoint_issues(self))
        return self


def _endpoint_issues(endpoint: Endpoint) -> Iterator[RuleIssue]:
    if endpoint.type == "binary" and endpoint.response is None:
        yield RuleIssue(("response",), "a binary endpoint says how a response is found",
                        expected="response: {threshold, direction, missing} or {flag_column, missing}", got="none",
                        code="plan.response_missing")
    if endpoint.type != "binary" and endpoint.response is not None:
        yield RuleIssue(("response",), "'response' is only for binary endpoints", expected="type: binary",
                        got=f"type: {endpoint.type}", code="plan.response_type")
    if endpoint.type != "count" and endpoint.exposure is not None:
        yield RuleIssue(("exposure",), "'exposure' is only for count endpoints", expected="type: count",
                        got=f"type: {endpoint.type}", code="plan.exposure_type")
    if endpoint.type == "count" and endpoint.analysed != "value":
        yield RuleIssue(("analysed",), "a count endpoint analyses the counts themselves", expected="value",
                        got=repr(endpoint.analysed), code="plan.count_analysed")
    analyses = [("primary",), *[("sensitivity", i) for i in range(len(endpoint.analyses.sensitivity))]]
    for path, analysis in zip(analyses, endpoint.analyses.every):
        allowed = METHOD_ENDPOINT_TYPES.get(analysis.method, ())
        if endpoint.type not in allowed:
            fitting = sorted(m for m, types in METHOD_ENDPOINT_TYPES.items() if endpoint.type in types)
            yield RuleIssue(("analyses", *path, "method"), f"method {analysis.method!r} does not analyse "
                            f"{endpoint.type} endpoints", expected=_one_of(fitting), got=repr(analysis.method),
                            code="plan.method_endpoint_type")
        elif analysis.method == "responder_imputation" and endpoint.response and endpoint.response.threshold is None:
            yield RuleIssue(("analyses", *path, "method"), "responder_imputation imputes the underlying score, so "
                            "the response must be derived by a threshold", expected="response: {threshold, direction}",
                            got="flag_column", code="plan.responder_imputation_flag")
    if endpoint.range is not None and endpoint.range[0] >= endpoint.range[1]:
        yield RuleIssue(("range",), "range must be [low, high] with low < high",
                        expected="low < high", got=f"[{endpoint.range[0]:g}, {endpoint.range[1]:g}]",
                        code="plan.range")


# --------------------------------------------------------------------------- multiplicity, report
class Hypothesis(Strict):
    id: Identifier
    analysis: Identifier
    arm: str
    visit: str | None = None
    weight: float = Field(default=1.0, ge=0, le=1)


class PlannedLook(Strict):
    cut: str = Field(min_length=1, description="The data cut's label (trialcut run --cut) that is this look.")
    information: float = Field(gt=0, le=1, description=(
        "Planned information fraction in (0, 1]; the last look is the final analysis at 1."))


class AlphaSpending(Strict):
    """Interim looks at the data with the type I error spent over them (Lan–DeMets)."""

    spending: SpendingFunction = Field(description="How alpha is spent over the information fraction.")
    parameter: float | None = Field(default=None, description="γ of the Hwang–Shih–DeCani family (e.g. −4 or 1).")
    information_by: Literal["participants_due", "calendar"] = Field(default="participants_due", description=(
        "participants_due: participants whose primary visit is due at the cut-off, over planned_participants; "
        "calendar: days from calendar_start to the cut-off over the days to calendar_end."))
    planned_participants: int | None = Field(default=None, ge=1, description="Participants planned at the final analysis.")
    calendar_start: date | None = None
    calendar_end: date | None = None
    looks: tuple[PlannedLook, ...] = Field(default=(), description="Planned looks, in time order; the last is the final.")
    tested_at_interims: tuple[Identifier, ...] | None = Field(default=None, description=(
        "Hypotheses tested at interim looks (their ids); the others spend nothing before the final. None = all."))

    @model_validator(mode="after")
    def _looks_make_sense(self) -> "AlphaSpending":
        _raise_issues(_spending_issues(self))
        return self


def _spending_issues(spending: AlphaSpending) -> Iterator[RuleIssue]:
    if not spending.looks:
        yield RuleIssue(("looks",), "alpha spending is declared without looks",
                        expected="a list of looks, e.g. [{cut: interim, information: 0.5}, {cut: final, information: 1}]",
                        got="none", hint="declare the planned looks, or remove alpha_spending",
                        code="plan.spending_without_looks")
        return
    fractions = [look.information for look in spending.looks]
    for index in range(1, len(fractions)):
        if fractions[index] <= fractions[index - 1]:
            yield RuleIssue(("looks", index, "information"), "information fractions must increase from look to look",
                            expected=f"more than {fractions[index - 1]:g}", got=f"{fractions[index]:g}",
                            code="plan.look_order")
    if fractions[-1] != 1:
        yield RuleIssue(("looks", len(fractions) - 1, "information"), "the last look is the final analysis",
                        expected="information 1", got=f"{fractions[-1]:g}", code="plan.final_look")
    cuts = [look.cut for look in spending.looks]
    for index, cut in enumerate(cuts):
        if cut in cuts[:index]:
            yield RuleIssue(("looks", index, "cut"), f"cut {cut!r} is named by two looks",
                            expected="a different cut label for every look", got=repr(cut), code="plan.duplicate_look")
    yield from _information_source_issues(spending)
    if spending.spending == "hwang_shih_decani" and spending.parameter is None:
        yield RuleIssue(("parameter",), "the Hwang–Shih–DeCani family needs its γ",
                        expected="parameter: a number (−4 spends like O'Brien–Fleming, 1 like Pocock)",
                        got="none", code="plan.spending_parameter")


def _information_source_issues(spending: AlphaSpending) -> Iterator[RuleIssue]:
    if spending.information_by == "participants_due" and spending.planned_participants is None:
        yield RuleIssue(("planned_participants",), "information by participants needs the planned number",
                        expected="planned_participants: participants planned at the final analysis", got="none",
                        code="plan.planned_participants")
    if spending.information_by == "calendar":
        if spending.calendar_start is None or spending.calendar_end is None:
            yield RuleIssue(("information_by",), "information by calendar needs calendar_start and calendar_end",
                            expected="two ISO dates", got="none", code="plan.calendar_dates")
        elif spending.calendar_end <= spending.calendar_start:
            yield RuleIssue(("calendar_end",), "calendar_end must come after calendar_start",
                            expected=f"after {spending.calendar_start}", got=str(spending.calendar_end),
                            code="plan.calendar_dates")


class Multiplicity(Strict):
    method: MultiplicityMethod = "none"
    alpha: float = Field(default=0.05, gt=0, lt=1)
    hypotheses: tuple[Hypothesis, ...] = ()
    transitions: tuple[tuple[float, ...], ...] = Field(
        default=(), description="Graphical approach: row i gives the share of hypothesis i's level passed to each other.")
    alpha_spending: AlphaSpending | None = Field(default=None, description=(
        "Planned interim looks and the spending of alpha over them; none = one final analysis."))


class Decimals(Strict):
    mean_extra: int = Field(default=1, ge=0, le=4, description="Means and CIs: decimals beyond the raw data.")
    sd_extra: int = Field(default=2, ge=0, le=4, description="SDs and SEs: decimals beyond the raw data.")
    p_value: int = Field(default=3, ge=2, le=6)


class Report(Strict):
    title: str | None = None
    paper: Literal["A4", "Letter"] = "A4"
    table_prefix: str = Field(default="Table ", description="Prefix of table numbers, e.g. 'Table 14.2.'.")
    figure_prefix: str = "Figure "
    decimals: Decimals = Decimals()
    trajectories_sample: int = Field(default=60, ge=1, description="Participants drawn for the trajectory figure.")


class SignOff(Strict):
    """What a locked run needs before trialcut calls it final (shown by verify and approve)."""

    signed_locks: bool = Field(default=False, description=(
        "Every lock record of the plan must carry a valid signature by a key in the keyring."))
    approvals: int = Field(default=0, ge=0, le=20, description=(
        "Signed approvals (trialcut approve) by different keys a run needs to be final."))
    roles: tuple[str, ...] = Field(default=(), description=(
        "Roles each of which needs at least one approval, e.g. [statistician, reviewer]."))


class QcTolerances(Strict):
    """Largest absolute difference between a run's value and a QC programmer's that still agrees."""

    estimate: float = Field(default=1e-6, ge=0)
    se: float = Field(default=1e-6, ge=0)
    df: float = Field(default=1e-4, ge=0, description="Degrees of freedom (approximations differ more).")
    t: float = Field(default=1e-5, ge=0)
    p: float = Field(default=1e-6, ge=0)
    lower: float = Field(default=1e-6, ge=0)
    upper: float = Field(default=1e-6, ge=0)


class QualityControl(Strict):
    tolerances: QcTolerances = QcTolerances()


# --------------------------------------------------------------------------- the plan
class AnalysisPlan(Strict):
    format: Literal[2] = Field(default=PLAN_FORMAT_VERSION, description="Plan file format version.")
    version: str = Field(default="1.0", description="The plan's own version, e.g. '1.0' or '2.1 amendment'.")
    study: Study
    columns: Columns = Columns()
    arms: Arms
    visits: Visits
    populations: tuple[Population, ...] = Field(min_length=1)
    intercurrent_events: tuple[IntercurrentEvent, ...] = ()
    estimands: tuple[Estimand, ...] = Field(min_length=1)
    endpoints: tuple[Endpoint, ...] = Field(min_length=1)
    multiplicity: Multiplicity = Multiplicity()
    subgroups: tuple[Subgroup, ...] = Field(default=(), description=(
        "Factors whose levels get the primary analysis of every endpoint on their own, with a test of equal "
        "effects across the levels (exploratory unless prespecified with control of error)."))
    report: Report = Report()
    sign_off: SignOff = SignOff()
    qc: QualityControl = QualityControl()
    seed: int = Field(default=20240101, ge=0, lt=2**63, description="Root seed for every random step of a run.")

    @field_validator("format", mode="before")
    @classmethod
    def _older_format(cls, value: Any) -> Any:
        # An older plan is told it is older, not just "expected 2".
        if isinstance(value, int) and not isinstance(value, bool) and value in OLDER_FORMATS:
            _raise_issues([RuleIssue(
                (), f"the plan is written in plan format {value}; this version of trialcut reads format "
                f"{PLAN_FORMAT_VERSION}", expected=f"format: {PLAN_FORMAT_VERSION}", got=f"format: {value}",
                hint=f"write format: {PLAN_FORMAT_VERSION}, then run 'trialcut check': it names every key or value "
                "format 2 does not know, with the allowed ones (README, 'Plan format 2')",
                code="plan.old_format")])
        return value

    @model_validator(mode="after")
    def _cross_references(self) -> "AnalysisPlan":
        _raise_issues(cross_reference_issues(PlanSections.of_plan(self)))
        return self

    # Convenience lookups used downstream (read-only).
    def population(self, pop_id: str) -> Population:
        return next(p for p in self.populations if p.id == pop_id)

    def estimand(self, estimand_id: str) -> Estimand:
        return next(e for e in self.estimands if e.id == estimand_id)

    def event(self, event_id: str) -> IntercurrentEvent:
        return next(e for e in self.intercurrent_events if e.id == event_id)

    @property
    def visit_labels(self) -> tuple[str, ...]:
        return self.visits.labels

    @property
    def arm_codes(self) -> tuple[str, ...]:
        return self.arms.codes


def _not_declared(path, what: str, name: str, known: Iterable[str], code: str) -> RuleIssue:
    known = sorted(known)
    return RuleIssue(path, f"{what} {name!r} is not declared",
                     expected=_one_of(known) if known else f"a declared {what}", got=repr(name),
                     hint=suggestion(name, known), code=code)


def _present(items) -> Iterator[tuple[int, Any]]:
    """(index, item) for the items that validated; a failed item is None and skipped."""
    return ((index, item) for index, item in enumerate(items) if item is not None)


def _duplicates(section: str, items) -> Iterator[RuleIssue]:
    seen: set[str] = set()
    for index, item in _present(items):
        if item.id in seen:
            yield RuleIssue((section, index, "id"), f"id {item.id!r} is used twice",
                            expected="a different id for every item", got=repr(item.id), code="plan.duplicate_id")
        seen.add(item.id)


@dataclass(frozen=True)
class PlanSections:
    """The parts of a plan the cross-reference rules read.

    Built from a whole valid plan, or (by the loader) from a plan that failed elsewhere:
    then a section that failed is None and a list item that failed is None, and each rule
    runs only on what it can judge without guessing, so a mistake in one section does not
    hide the cross-reference mistakes of another.
    """

    arms: Arms | None = None
    visits: Visits | None = None
    populations: tuple[Population | None, ...] | None = None
    intercurrent_events: tuple[IntercurrentEvent | None, ...] | None = None
    estimands: tuple[Estimand | None, ...] | None = None
    endpoints: tuple[Endpoint | None, ...] | None = None
    multiplicity: Multiplicity | None = None

    @classmethod
    def of_plan(cls, plan: AnalysisPlan) -> "PlanSections":
        return cls(**{f.name: getattr(plan, f.name) for f in fields(cls)})

    @classmethod
    def from_raw(cls, data: Any) -> "PlanSections":
        if not isinstance(data, dict):
            return cls()
        return cls(**{f.name: _lenient_section(f.name, data) for f in fields(cls)})

    @property
    def visit_labels(self) -> tuple[str, ...]:
        return self.visits.labels

    @property
    def arm_codes(self) -> tuple[str, ...]:
        return self.arms.codes


@lru_cache(maxsize=None)
def _section_adapter(name: str) -> TypeAdapter:
    return TypeAdapter(AnalysisPlan.model_fields[name].annotation)


def _lenient_section(name: str, data: dict[str, Any]) -> Any:
    field_info = AnalysisPlan.model_fields[name]
    if name not in data:
        return None if field_info.is_required() else field_info.get_default(call_default_factory=True)
    try:
        return _section_adapter(name).validate_python(data[name])
    except ValidationError:
        pass
    item_type = typing.get_args(field_info.annotation)
    if not isinstance(data[name], list) or not item_type:
        return None
    return tuple(_valid_or_none(item_type[0], item) for item in data[name])


def _valid_or_none(model: type[BaseModel], item: Any) -> BaseModel | None:
    try:
        return model.model_validate(item)
    except ValidationError:
        return None


def _complete(section: Any) -> bool:
    return section is not None and not (isinstance(section, tuple) and None in section)


# (sections every item of which must have validated, sections that must merely exist, rule)
_RULES = (
    ((), ("populations",), lambda plan: _duplicates("populations", plan.populations)),
    ((), ("intercurrent_events",), lambda plan: _duplicates("intercurrent_events", plan.intercurrent_events)),
    ((), ("estimands",), lambda plan: _duplicates("estimands", plan.estimands)),
    ((), ("endpoints",), lambda plan: _duplicates("endpoints", plan.endpoints)),
    (("populations", "intercurrent_events"), ("estimands",), lambda plan: _estimand_references(plan)),
    (("visits", "populations", "estimands"), ("endpoints",), lambda plan: _endpoint_references(plan)),
    (("arms", "visits", "endpoints", "multiplicity"), (), lambda plan: _multiplicity_references(plan)),
    (("intercurrent_events",), ("endpoints",), lambda plan: _role_and_assumption_references(plan)),
)


def cross_reference_issues(sections: PlanSections) -> Iterator[RuleIssue]:
    """Every broken reference between sections (paths relative to the plan)."""
    for complete, present, rule in _RULES:
        if all(_complete(getattr(sections, name)) for name in complete) and all(
                getattr(sections, name) is not None for name in present):
            yield from rule(sections)


def _estimand_references(plan: PlanSections) -> Iterator[RuleIssue]:
    populations = [p.id for p in plan.populations]
    events = [e.id for e in plan.intercurrent_events]
    for index, estimand in _present(plan.estimands):
        if estimand.population not in populations:
            yield _not_declared(("estimands", index, "population"), "population", estimand.population,
                                populations, "plan.unknown_population")
        for position, handling in enumerate(estimand.intercurrent_events):
            if handling.event not in events:
                yield _not_declared(("estimands", index, "intercurrent_events", position, "event"),
                                    "intercurrent event", handling.event, events, "plan.unknown_event")


def _analysis_paths(plan: PlanSections) -> Iterator[tuple[tuple[str | int, ...], Any]]:
    for index, endpoint in _present(plan.endpoints):
        yield ("endpoints", index, "analyses", "primary"), endpoint.analyses.primary
        for position, analysis in enumerate(endpoint.analyses.sensitivity):
            yield ("endpoints", index, "analyses", "sensitivity", position), analysis


def _endpoint_references(plan: PlanSections) -> Iterator[RuleIssue]:
    visits = list(plan.visit_labels)
    for index, endpoint in _present(plan.endpoints):
        if endpoint.primary_visit not in visits:
            yield RuleIssue(("endpoints", index, "primary_visit"),
                            f"primary visit {endpoint.primary_visit!r} is not a scheduled visit",
                            expected=_one_of(visits), got=repr(endpoint.primary_visit),
                            hint=suggestion(endpoint.primary_visit, visits), code="plan.unknown_visit")
    analysis_ids: list[str] = []
    for path, analysis in _analysis_paths(plan):
        if analysis.id in analysis_ids:
            yield RuleIssue(path + ("id",), f"analysis id {analysis.id!r} is used twice",
                            expected="a different id for every analysis", got=repr(analysis.id),
                            code="plan.duplicate_id")
        analysis_ids.append(analysis.id)
        yield from _analysis_references(plan, path, analysis)


def _analysis_references(plan: PlanSections, path, analysis) -> Iterator[RuleIssue]:
    populations = [p.id for p in plan.populations]
    estimands = [e.id for e in plan.estimands]
    visits = list(plan.visit_labels)
    if analysis.estimand is not None and analysis.estimand not in estimands:
        yield _not_declared(path + ("estimand",), "estimand", analysis.estimand, estimands, "plan.unknown_estimand")
    if analysis.population is not None and analysis.population not in populations:
        yield _not_declared(path + ("population",), "population", analysis.population, populations,
                            "plan.unknown_population")
    if analysis.estimand is None and analysis.population is None:
        yield RuleIssue(path, f"analysis {analysis.id!r} names neither an estimand nor a population",
                        expected="an 'estimand' or a 'population' key", got="neither",
                        code="plan.analysis_target")
    if isinstance(analysis, AncovaAnalysis) and not isinstance(analysis.options.visits, str):
        for position, visit in enumerate(analysis.options.visits):
            if visit not in visits:
                yield RuleIssue(path + ("options", "visits", position), f"visit {visit!r} is not a scheduled visit",
                                expected=_one_of(visits), got=repr(visit), hint=suggestion(visit, visits),
                                code="plan.unknown_visit")
    if isinstance(analysis, ImputationAnalysis):
        yield from _delta_references(plan, path, analysis.options)
    if isinstance(analysis, MMRMAnalysis):
        yield from _timed_structures(plan, path, analysis.options)


def _timed_structures(plan: PlanSections, path, options) -> Iterator[RuleIssue]:
    """A structure whose correlation decays with time needs every visit's planned day; the
    other structures use the visits' order only (issue 10: such a plan passed check and lock,
    then failed inside the fit)."""
    undated = [v.label for v in plan.visits.schedule if v.day is None]
    for position, name in enumerate(options.covariance):
        if name == "spatial_exponential" and undated:
            yield RuleIssue(path + ("options", "covariance", position),
                            "covariance structure 'spatial_exponential' needs every visit's planned day",
                            expected="a 'day' for every visit of the schedule", got="no day for " + ", ".join(
                                map(repr, undated)), hint="give the visits their planned days, or choose a "
                            "structure that uses the visits' order (ar1, toeplitz, unstructured…)",
                            code="plan.visit_day_needed")


def _role_and_assumption_references(plan: PlanSections) -> Iterator[RuleIssue]:
    """Roles fit their slot; assumption rules name declared events."""
    events = {e.id: e for e in plan.intercurrent_events}
    for path, analysis in _analysis_paths(plan):
        primary_slot = path[-1] == "primary"
        if analysis.role is not None and (analysis.role == "primary") != primary_slot:
            yield RuleIssue(path + ("role",), f"role {analysis.role!r} does not fit where the analysis is listed",
                            expected="primary (or nothing) for analyses.primary; sensitivity or supplementary "
                            "for the others", got=repr(analysis.role), code="plan.role")
        for position, rule in enumerate(getattr(analysis.options, "assumptions_by_reason", ())):
            where = path + ("options", "assumptions_by_reason", position)
            if rule.event not in events:
                yield _not_declared(where + ("event",), "intercurrent event", rule.event, list(events),
                                    "plan.unknown_event")


def _delta_references(plan: PlanSections, path, options: ImputationOptions) -> Iterator[RuleIssue]:
    visits = plan.visit_labels
    if options.delta is not None and len(options.delta) != len(visits):
        yield RuleIssue(path + ("options", "delta"), "delta needs one value per scheduled visit",
                        expected=f"{len(visits)} values", got=f"{len(options.delta)}", code="plan.delta_length")
    for position, arm in enumerate(options.delta_arms if plan.arms is not None else ()):
        if arm not in plan.arm_codes:
            yield _not_declared(path + ("options", "delta_arms", position), "arm", arm, plan.arm_codes,
                                "plan.unknown_arm")


def _multiplicity_references(plan: PlanSections) -> Iterator[RuleIssue]:
    analyses = [analysis.id for _, analysis in _analysis_paths(plan)]
    active_arms = [code for code in plan.arm_codes if code != plan.arms.reference]
    hypotheses = plan.multiplicity.hypotheses
    for index, hypothesis in enumerate(hypotheses):
        path = ("multiplicity", "hypotheses", index)
        if hypothesis.analysis not in analyses:
            yield _not_declared(path + ("analysis",), "analysis", hypothesis.analysis, analyses,
                                "plan.unknown_analysis")
        if hypothesis.arm not in active_arms:
            yield RuleIssue(path + ("arm",), f"hypothesis arm {hypothesis.arm!r} is not a non-reference arm",
                            expected=_one_of(active_arms), got=repr(hypothesis.arm),
                            hint=suggestion(hypothesis.arm, active_arms), code="plan.unknown_arm")
        if hypothesis.visit is not None and hypothesis.visit not in plan.visit_labels:
            yield RuleIssue(path + ("visit",), f"hypothesis visit {hypothesis.visit!r} is not a scheduled visit",
                            expected=_one_of(plan.visit_labels), got=repr(hypothesis.visit),
                            hint=suggestion(hypothesis.visit, plan.visit_labels), code="plan.unknown_visit")
    if plan.multiplicity.method == "graphical":
        yield from _transition_issues(plan.multiplicity.transitions, len(hypotheses))
    yield from _interim_hypothesis_issues(plan.multiplicity)


def _interim_hypothesis_issues(multiplicity: Multiplicity) -> Iterator[RuleIssue]:
    spending = multiplicity.alpha_spending
    if spending is None:
        return
    known = [h.id for h in multiplicity.hypotheses]
    if not known:
        yield RuleIssue(("multiplicity", "alpha_spending"), "alpha spending needs hypotheses to test",
                        expected="multiplicity.hypotheses", got="none", code="plan.spending_without_hypotheses")
    for position, name in enumerate(spending.tested_at_interims or ()):
        if name not in known:
            yield _not_declared(("multiplicity", "alpha_spending", "tested_at_interims", position), "hypothesis",
                                name, known, "plan.unknown_hypothesis")


def _transition_issues(transitions, size: int) -> Iterator[RuleIssue]:
    path = ("multiplicity", "transitions")
    if len(transitions) != size or any(len(row) != size for row in transitions):
        yield RuleIssue(path, "graphical transitions must be a square matrix, one row per hypothesis",
                        expected=f"a {size}×{size} matrix", got=f"{len(transitions)} rows",
                        code="plan.transitions")
        return
    for index, row in enumerate(transitions):
        if sum(row) > 1 + 1e-12 or row[index] != 0 or any(weight < 0 for weight in row):
            yield RuleIssue(path + (index,), "a transition row sums to at most 1 and has 0 on the diagonal",
                            expected="weights ≥ 0 summing to ≤ 1, diagonal 0", got=str(list(row)),
                            code="plan.transitions")


def json_schema() -> dict[str, Any]:
    """The JSON Schema of a plan file, for editors that complete and check YAML."""
    schema = AnalysisPlan.model_json_schema()
    schema["$schema"] = "https://json-schema.org/draft/2020-12/schema"
    schema["title"] = "trialcut analysis plan"
    return schema
