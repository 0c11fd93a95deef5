"""The analysis plan: one pydantic schema, the only place a plan's shape is defined.

Every model is frozen and forbids unknown keys, so a typo in a plan is an error, not a
silently ignored setting.  Cross-field rules (the reference arm is one of the arms, an
estimand names a known population, ...) are checked in the ``AnalysisPlan`` validator and
reported with the path of the offending field.  Allowed names of covariance structures,
df methods and imputation assumptions come from :mod:`trialcut.stats.names`, the lists the
engine dispatches on.
"""
from __future__ import annotations

from typing import Annotated, Any, Literal, Union

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from trialcut.stats.names import (
    COVARIANCE_STRUCTURES,
    DF_METHODS,
    ESTIMATION_METHODS,
    IMPUTATION_ASSUMPTIONS,
    MULTIPLICITY_METHODS,
)

CovarianceName = Literal[COVARIANCE_STRUCTURES]  # type: ignore[valid-type]
DfMethod = Literal[DF_METHODS]  # type: ignore[valid-type]
EstimationMethod = Literal[ESTIMATION_METHODS]  # type: ignore[valid-type]
ImputationAssumption = Literal[IMPUTATION_ASSUMPTIONS]  # type: ignore[valid-type]
MultiplicityMethod = Literal[MULTIPLICITY_METHODS]  # type: ignore[valid-type]

Identifier = Annotated[str, Field(pattern=r"^[A-Za-z][A-Za-z0-9_]*$", max_length=64)]

PLAN_FORMAT_VERSION = 1


class Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


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


# --------------------------------------------------------------------------- arms, visits
class Arm(Strict):
    code: str = Field(min_length=1, description="The arm's value in the arm column.")
    label: str | None = None


class Arms(Strict):
    reference: str = Field(description="Code of the control arm; differences are arm minus reference.")
    list: tuple[Arm, ...] = Field(min_length=2)
    strata: tuple[str, ...] = Field(
        default=(), description="Columns holding the randomisation strata (used by dummy arms).")

    @model_validator(mode="after")
    def _reference_is_an_arm(self) -> "Arms":
        codes = [a.code for a in self.list]
        if len(set(codes)) != len(codes):
            raise ValueError(f"arm codes must be unique; got {codes}")
        if self.reference not in codes:
            raise ValueError(f"reference arm {self.reference!r} is not among the arms {codes}")
        return self


class Visit(Strict):
    label: str = Field(min_length=1, description="Analysis visit label, as in the visit column.")
    order: int = Field(ge=1, description="Position in time; 1 is the first post-baseline visit.")
    day: float | None = Field(default=None, description="Planned study day (needed for windowing and spatial_exponential).")
    window: float | None = Field(default=None, ge=0, description="Half-width of the window in days: planned day ± window.")


class Visits(Strict):
    baseline: str = Field(default="Baseline", description="Label of the baseline visit in the visit column.")
    windowing: bool = Field(default=False, description="Assign records to visits from the study day column.")
    schedule: tuple[Visit, ...] = Field(min_length=1, description="Post-baseline analysis visits, in time order.")

    @model_validator(mode="after")
    def _ordered_and_windowed(self) -> "Visits":
        orders = [v.order for v in self.schedule]
        if orders != sorted(orders) or len(set(orders)) != len(orders):
            raise ValueError(f"visit orders must increase strictly down the schedule; got {orders}")
        labels = [v.label for v in self.schedule]
        if len(set(labels)) != len(labels) or self.baseline in labels:
            raise ValueError(f"visit labels must be unique and differ from the baseline label; got {labels}")
        days = [v.day for v in self.schedule]
        if all(d is not None for d in days) and days != sorted(days):
            raise ValueError(f"planned days must increase with the visit order; got {days}")
        if self.windowing and any(v.day is None or v.window is None for v in self.schedule):
            raise ValueError("windowing needs a planned 'day' and a 'window' for every visit")
        return self


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
        if self.strategy not in SUPPORTED_STRATEGIES:
            raise ValueError(
                f"strategy {self.strategy!r} is not supported yet; use one of {', '.join(SUPPORTED_STRATEGIES)}")
        if self.strategy == "composite" and self.composite_value is None:
            raise ValueError("the composite strategy needs 'composite_value'")
        if self.strategy != "composite" and self.composite_value is not None:
            raise ValueError("'composite_value' is only for the composite strategy")
        return self


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
    covariance: tuple[CovarianceName, ...] = Field(
        default=("unstructured",), min_length=1, description="Structures to try in order until one converges.")
    covariance_by: str | None = Field(default=None, description="Column for a separate matrix per group (often the arm column).")
    covariates: tuple[str, ...] = ()
    covariates_by_visit: tuple[str, ...] = ()
    method: EstimationMethod = "reml"
    df: DfMethod = "kenward_roger"
    robust: bool = False
    conf_level: float = Field(default=0.95, gt=0, lt=1)

    @field_validator("covariance", mode="before")
    @classmethod
    def _one_name_is_a_list(cls, value: Any) -> Any:
        return (value,) if isinstance(value, str) else value

    @model_validator(mode="after")
    def _kenward_roger_needs_reml(self) -> "MMRMOptions":
        if self.df.startswith("kenward_roger") and self.method != "reml":
            raise ValueError("df 'kenward_roger' needs method 'reml'")
        return self


class AncovaOptions(Strict):
    """Analysis of covariance of the endpoint at each visit on observed data (or one visit)."""

    covariates: tuple[str, ...] = ()
    visits: tuple[str, ...] | Literal["all", "primary"] = "all"
    conf_level: float = Field(default=0.95, gt=0, lt=1)


class ImputationOptions(Strict):
    """Multiple imputation under an assumption for values missing after intercurrent events."""

    assumption: ImputationAssumption = "mar"
    imputations: int = Field(default=100, ge=2, le=100_000)
    burn_in: int = Field(default=200, ge=0)
    thinning: int = Field(default=10, ge=1)
    covariance_by_arm: bool = False
    covariates: tuple[str, ...] = ()
    analysis_model: Literal["ancova", "mmrm"] = "ancova"
    delta: tuple[float, ...] | None = Field(default=None, description="Shift added to imputed values, per visit.")
    delta_arms: tuple[str, ...] = Field(default=(), description="Arms whose imputed values are shifted.")
    delta_cumulative: bool = False
    conf_level: float = Field(default=0.95, gt=0, lt=1)


class TippingPointOptions(Strict):
    assumption: ImputationAssumption = "mar"
    imputations: int = Field(default=50, ge=2, le=100_000)
    burn_in: int = Field(default=200, ge=0)
    thinning: int = Field(default=10, ge=1)
    covariates: tuple[str, ...] = ()
    shifts: tuple[float, ...] = Field(min_length=2, description="Grid of δ added to imputed values in the active arm(s).")
    reference_shifts: tuple[float, ...] | None = Field(
        default=None, description="Second dimension: δ in the reference arm (two-dimensional grid).")
    alpha: float = Field(default=0.05, gt=0, lt=1)


class _AnalysisBase(Strict):
    id: Identifier
    label: str
    estimand: Identifier | None = None
    population: Identifier | None = Field(default=None, description="Overrides the estimand's population.")


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


Analysis = Annotated[
    Union[MMRMAnalysis, AncovaAnalysis, ImputationAnalysis, TippingPointAnalysis],
    Field(discriminator="method"),
]
# Method name -> the plan model of its analysis.  The runner's registry must carry the
# same names (checked by a test), so a method is added here and in trialcut.run.methods.
ANALYSIS_METHODS: dict[str, type[_AnalysisBase]] = {
    "mmrm": MMRMAnalysis,
    "ancova": AncovaAnalysis,
    "multiple_imputation": ImputationAnalysis,
    "tipping_point": TippingPointAnalysis,
}


class EndpointAnalyses(Strict):
    primary: Analysis
    sensitivity: tuple[Analysis, ...] = ()


class Endpoint(Strict):
    id: Identifier
    label: str
    type: Literal["continuous", "binary", "count"] = "continuous"
    parameter: str | None = Field(default=None, description="Value of the parameter column to select (PARAMCD).")
    analysed: Literal["change", "value"] = Field(default="change", description="Analyse change from baseline or the value itself.")
    primary_visit: str
    range: tuple[float, float] | None = Field(default=None, description="Allowed range of the measured value.")
    decimals: int = Field(default=1, ge=0, le=6, description="Decimals the raw value is recorded to.")
    analyses: EndpointAnalyses

    @model_validator(mode="after")
    def _continuous_only(self) -> "Endpoint":
        if self.type != "continuous":
            raise ValueError(f"endpoint type {self.type!r} is reserved and not supported yet; use 'continuous'")
        if self.range is not None and self.range[0] >= self.range[1]:
            raise ValueError(f"range must be (low, high) with low < high; got {list(self.range)}")
        return self


# --------------------------------------------------------------------------- multiplicity, report
class Hypothesis(Strict):
    id: Identifier
    analysis: Identifier
    arm: str
    visit: str | None = None
    weight: float = Field(default=1.0, ge=0, le=1)


class Multiplicity(Strict):
    method: MultiplicityMethod = "none"
    alpha: float = Field(default=0.05, gt=0, lt=1)
    hypotheses: tuple[Hypothesis, ...] = ()
    transitions: tuple[tuple[float, ...], ...] = Field(
        default=(), description="Graphical approach: row i gives the share of hypothesis i's level passed to each other.")


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


# --------------------------------------------------------------------------- the plan
class AnalysisPlan(Strict):
    format: Literal[1] = Field(default=PLAN_FORMAT_VERSION, description="Plan file format version.")
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
    report: Report = Report()
    seed: int = Field(default=20240101, ge=0, lt=2**63, description="Root seed for every random step of a run.")

    @model_validator(mode="after")
    def _cross_references(self) -> "AnalysisPlan":
        problems = list(_cross_reference_problems(self))
        if problems:
            raise ValueError("; ".join(problems))
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
        return tuple(v.label for v in self.visits.schedule)

    @property
    def arm_codes(self) -> tuple[str, ...]:
        return tuple(a.code for a in self.arms.list)


def _unique(kind: str, ids: list[str]) -> list[str]:
    seen, dup = set(), []
    for i in ids:
        if i in seen:
            dup.append(i)
        seen.add(i)
    return [f"{kind} id {d!r} is used twice" for d in dup]


def _cross_reference_problems(plan: AnalysisPlan):
    pops = {p.id for p in plan.populations}
    events = {e.id for e in plan.intercurrent_events}
    estimands = {e.id for e in plan.estimands}
    visits = set(plan.visit_labels)
    arms = set(plan.arm_codes)
    yield from _unique("population", [p.id for p in plan.populations])
    yield from _unique("intercurrent event", [e.id for e in plan.intercurrent_events])
    yield from _unique("estimand", [e.id for e in plan.estimands])
    yield from _unique("endpoint", [e.id for e in plan.endpoints])
    for est in plan.estimands:
        if est.population not in pops:
            yield f"estimand {est.id!r}: population {est.population!r} is not declared (known: {sorted(pops)})"
        for h in est.intercurrent_events:
            if h.event not in events:
                yield f"estimand {est.id!r}: intercurrent event {h.event!r} is not declared (known: {sorted(events)})"
    analysis_ids: list[str] = []
    for ep in plan.endpoints:
        if ep.primary_visit not in visits:
            yield f"endpoint {ep.id!r}: primary_visit {ep.primary_visit!r} is not a scheduled visit ({sorted(visits)})"
        for an in (ep.analyses.primary, *ep.analyses.sensitivity):
            analysis_ids.append(an.id)
            if an.estimand is not None and an.estimand not in estimands:
                yield f"analysis {an.id!r}: estimand {an.estimand!r} is not declared (known: {sorted(estimands)})"
            if an.population is not None and an.population not in pops:
                yield f"analysis {an.id!r}: population {an.population!r} is not declared (known: {sorted(pops)})"
            if an.estimand is None and an.population is None:
                yield f"analysis {an.id!r}: name an 'estimand' or a 'population'"
            if isinstance(an, AncovaAnalysis) and not isinstance(an.options.visits, str):
                for v in an.options.visits:
                    if v not in visits:
                        yield f"analysis {an.id!r}: visit {v!r} is not a scheduled visit"
            if isinstance(an, ImputationAnalysis) and an.options.delta is not None:
                if len(an.options.delta) != len(visits):
                    yield (f"analysis {an.id!r}: delta needs one value per scheduled visit "
                           f"({len(visits)}); got {len(an.options.delta)}")
                for a in an.options.delta_arms:
                    if a not in arms:
                        yield f"analysis {an.id!r}: delta arm {a!r} is not an arm"
    yield from _unique("analysis", analysis_ids)
    known_analyses = set(analysis_ids)
    for h in plan.multiplicity.hypotheses:
        if h.analysis not in known_analyses:
            yield f"multiplicity hypothesis {h.id!r}: analysis {h.analysis!r} is not declared"
        if h.arm not in arms or h.arm == plan.arms.reference:
            yield f"multiplicity hypothesis {h.id!r}: arm {h.arm!r} must be a non-reference arm"
    n_h = len(plan.multiplicity.hypotheses)
    if plan.multiplicity.method == "graphical":
        t = plan.multiplicity.transitions
        if len(t) != n_h or any(len(row) != n_h for row in t):
            yield f"multiplicity: graphical transitions must be a {n_h}×{n_h} matrix"
        elif any(sum(row) > 1 + 1e-12 or row[i] != 0 for i, row in enumerate(t)):
            yield "multiplicity: each transition row sums to at most 1 and has 0 on the diagonal"


def json_schema() -> dict[str, Any]:
    """The JSON Schema of a plan file, for editors that complete and check YAML."""
    schema = AnalysisPlan.model_json_schema()
    schema["$schema"] = "https://json-schema.org/draft/2020-12/schema"
    schema["title"] = "trialcut analysis plan"
    return schema
