"""Plan × data cut -> Results: the one function that turns a frozen plan and a checked data
cut into plain, JSON-able results by calling the statistics layer.

Nothing here reads or writes files; the command line hands in what was loaded and the
record layer writes what comes back.  Run metadata (ids, times) sits only under
``results["run"]`` so that two runs of the same inputs differ nowhere else.
"""
from __future__ import annotations

import importlib
import os
import time
import warnings
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd

from trialcut.errors import FitError, ModelSpecificationError
from trialcut.forking import can_fork
from trialcut.run import estimand_guard
from trialcut.run.assumption_rules import check_reasons
from trialcut.run.context import InlineExecutor, RunContext
from trialcut.run.methods import METHODS
from trialcut.data import flow
from trialcut.data.derive_responder import derive_outcome
from trialcut.run.subgroups import subgroup_results
from trialcut.run.tables import frame_of, plain, table
from trialcut.run.two_processes import run_pieces

# 2: a repeated-measures fit's residuals are kept once, under diagnostics.residuals (format 1 also
# kept them under fit.residual_columns); record/reproduce.py sets the old copy aside.
RESULTS_FORMAT = 2


@dataclass
class StepTimer:
    """Collects how long each step took, for the audit record (not for results)."""

    steps: list[dict[str, Any]] = field(default_factory=list)
    # How many processes shared the endpoints (2: this one and a forked child, at the same time).
    endpoint_processes: int = 1

    def time(self, name: str):
        timer = self

        class _Step:
            def __enter__(self):
                self.start = time.perf_counter()

            def __exit__(self, *exc):
                timer.steps.append({"step": name, "seconds": round(time.perf_counter() - self.start, 4)})
                return False

        return _Step()


def run_plan(plan, cut, context: RunContext, *, plan_block: dict[str, Any], data_block: dict[str, Any],
             run_block: dict[str, Any], timer: StepTimer | None = None,
             datasets: list | None = None) -> dict[str, Any]:
    """Run every analysis of every endpoint of ``plan`` on ``cut`` (a prepared DataCut).

    ``datasets``, when given, receives every endpoint's derived analysis dataset in plan order (as
    ``analysis_datasets`` builds them), built where the endpoint ran: its data are at hand there.
    """
    timer = timer or StepTimer()
    results: dict[str, Any] = {
        "format": RESULTS_FORMAT,
        "run": run_block,
        "plan": plan_block,
        "data": data_block,
        "conformance": plain(cut.conformance.to_dict()) | {"derivations": plain(list(cut.derivations))},
        "populations": table(cut.population_counts(), "Participants in each analysis population"),
        "disposition": table(cut.disposition(), "Disposition by arm"),
        "visit_assignment": table(cut.visit_assignment(), "Post-baseline records by analysis visit and what the visit "
                                   "assignment did with them"),
        "endpoints": [],
        "warnings": [],
    }
    if cut.cut_off is not None:
        results["warnings"].extend(cut.cut_off.notes)
    check_reasons(plan, cut)   # a reason no assumption rule covers stops the run before any fit
    # Each endpoint's entry, warnings and timed steps come back separately (perhaps from the second
    # core) and join the results in plan order: the same results whoever computed them.
    for entry, endpoint_warnings, steps, dataset in _run_endpoints(plan, cut, context, timer,
                                                                   datasets is not None):
        results["endpoints"].append(entry)
        results["warnings"].extend(endpoint_warnings)
        timer.steps.extend(steps)
        if datasets is not None:
            datasets.append(dataset)
    results["multiplicity"] = _multiplicity(plan, results, cut)
    estimand_guard.annotate(plan, results)   # roles, covariate structures, guard-rail warnings
    return results


def _run_endpoints(plan, cut, context: RunContext, timer: StepTimer,
                   with_datasets: bool) -> list[tuple[dict, list, list, Any]]:
    """(entry, run warnings, timer steps, analysis dataset or None) of every endpoint in plan order,
    on two cores when that helps."""
    endpoints = list(plan.endpoints)

    def run_one(index: int, progress) -> tuple[dict, list, list, Any]:
        endpoint, endpoint_warnings, first_step = endpoints[index], [], len(timer.steps)
        with timer.time(f"endpoint {endpoint.id}"):
            entry = _run_endpoint(plan, cut, endpoint, replace(context, progress=progress), timer,
                                  endpoint_warnings)
        steps = timer.steps[first_step:]
        del timer.steps[first_step:]   # the caller adds them back in plan order
        return entry, endpoint_warnings, steps, _analysis_dataset(plan, cut, endpoint) if with_datasets else None

    # Largest first, so that neither process is left with a long endpoint at the end.
    order = sorted(range(len(endpoints)), key=lambda index: -_size(endpoints[index]))
    two_processes = _second_core_helps(plan, context)
    timer.endpoint_processes = 2 if two_processes else 1
    if two_processes:
        _import_what_both_need(endpoints, first=order[0])
    return run_pieces(len(endpoints), run_one, order=order, progress=context.progress,
                      two_processes=two_processes)


def _size(endpoint) -> int:
    """Rough work of an endpoint: its analyses (every endpoint refits its primary once per subgroup
    factor of the plan, the same for all, so that does not change the order)."""
    return len(endpoint.analyses.every)


# Methods whose statistics import statsmodels (the costliest import of an analysis), and the
# statsmodels modules they import: its models, not statsmodels.api (0.09 s against 0.25 s).
_STATSMODELS_METHODS = frozenset({"ancova", "gee", "rate", "proportions"})
_STATSMODELS_MODULES = ("statsmodels.regression.linear_model", "statsmodels.genmod.generalized_linear_model",
                        "statsmodels.genmod.generalized_estimating_equations",
                        "statsmodels.discrete.discrete_model")


def _import_what_both_need(endpoints, first: int) -> None:
    """Import statsmodels before forking when this process (which runs endpoint ``first``) needs it
    anyway and another endpoint does too: imported once instead of once in each process."""
    def methods(endpoint) -> set[str]:
        return {a.method for a in endpoint.analyses.every}

    others = set().union(*(methods(e) for index, e in enumerate(endpoints) if index != first))
    if methods(endpoints[first]) & _STATSMODELS_METHODS and others & _STATSMODELS_METHODS:
        for module in _STATSMODELS_MODULES:
            importlib.import_module(module)


def _second_core_helps(plan, context: RunContext) -> bool:
    """Endpoints on two processes only with two endpoints, two cores, no executor already using the
    cores (--workers, --scheduler) and a process that may fork (``trialcut.forking``)."""
    if len(plan.endpoints) < 2 or os.environ.get("TRIALCUT_ANALYSE_IN_PROCESS"):
        return False
    if not isinstance(context.executor, InlineExecutor):
        return False
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    return cores > 1 and can_fork()


def _analysis_population(plan, analysis) -> str:
    if analysis.population is not None:
        return analysis.population
    return plan.estimand(analysis.estimand).population


def _run_endpoint(plan, cut, endpoint, context, timer, run_warnings) -> dict[str, Any]:
    primary = endpoint.analyses.primary
    primary_population = _analysis_population(plan, primary)
    observed = cut.analysis_data(endpoint.id, population_id=primary_population)
    primary_data = cut.analysis_data(endpoint.id, estimand_id=primary.estimand, population_id=primary_population)
    columns = [c for c in (plan.columns.value, plan.columns.change) if c and c in observed.frame.columns]
    roles = dict(subject=primary_data.subject, arm=primary_data.arm, visit=primary_data.visit,
                 visits=list(primary_data.visits), arms=list(primary_data.arms))
    events = _event_labels(plan)
    flows = _flows(plan, cut, endpoint, events)
    primary_flow = frame_of(flows[0]["table"])
    entry: dict[str, Any] = {
        "id": endpoint.id, "label": endpoint.label, "analysed": endpoint.analysed,
        "primary_visit": endpoint.primary_visit, "decimals": endpoint.decimals, "better": endpoint.better,
        "type": endpoint.type, "population": primary_population,
        "missing_response": endpoint.response.missing if endpoint.type == "binary" else None,
        "descriptive": _descriptive(plan, endpoint, observed, columns, roles, primary_flow),
        "missing_by_visit": table(flow.missing_by_visit(primary_flow, primary_data.arms),
                                  "Missing outcomes by arm and visit (visits not yet due apart)"),
        "missing_patterns": table(flow.patterns(primary_data, events, primary_data.arms),
                                  "Patterns of values used, missing or set aside, and visits not yet due"),
        "flow": flows,
        "trajectories": _trajectory_sample(observed, plan.report.trajectories_sample, context),
        "analyses": [],
    }
    analyses = [("primary", primary)] + [("sensitivity", a) for a in endpoint.analyses.sensitivity]
    for role, analysis in analyses:
        with timer.time(f"analysis {analysis.id}"):
            entry["analyses"].append(_run_analysis(plan, cut, endpoint, analysis, role, context, run_warnings))
    with timer.time(f"subgroups {endpoint.id}"):   # the plan's subgroup factors (trialcut.run.subgroups)
        entry["subgroups"] = subgroup_results(plan, cut, endpoint, context, METHODS, primary_population)
    return entry


def _descriptive(plan, endpoint, observed, columns, roles, primary_flow) -> dict[str, Any]:
    """Observed values by arm and visit; for a binary endpoint its derived response, not the score."""
    from trialcut.stats.descriptive import describe_by_arm_visit, responders_by_arm_visit

    if endpoint.type == "binary":
        derived = derive_outcome(endpoint, observed)
        summary = responders_by_arm_visit(derived.frame, column=derived.outcome, **roles)
        counted = ("a visit due by the cut-off without a response counts as non-response"
                   if endpoint.response.missing == "non_response" else "visits without a response left out")
        return table(flow.with_not_yet_due(summary, primary_flow), f"Responders by arm and visit ({counted})")
    summary = describe_by_arm_visit(observed.frame, columns=tuple(columns), **roles)
    return table(flow.with_not_yet_due(_with_baseline_rows(summary, observed, plan.visits.baseline, roles["arms"]),
                                       primary_flow), "Summary statistics by arm and visit (observed data)")


def _with_baseline_rows(summary: pd.DataFrame, observed, label: str, arms: list) -> pd.DataFrame:
    """The summary with a first row per arm for the baseline value, each participant counted once."""
    from trialcut.stats.descriptive import describe_by_arm_visit

    baseline = observed.baseline
    if not baseline or baseline not in observed.frame.columns:
        return summary
    once = observed.frame.drop_duplicates(observed.subject)[[observed.subject, observed.arm, baseline]]
    once = once.assign(**{observed.visit: label})
    rows = describe_by_arm_visit(once, columns=(baseline,), subject=observed.subject, arm=observed.arm,
                                 visit=observed.visit, visits=[label], arms=arms)
    order = {arm: position for position, arm in enumerate(arms)}
    combined = pd.concat([rows, summary], ignore_index=True)
    keys = pd.DataFrame({"arm": combined["arm"].map(order), "later": combined["visit"] != label})
    return combined.loc[keys.sort_values(["arm", "later"], kind="stable").index].reset_index(drop=True)


def _trajectory_sample(data, size: int, context: RunContext) -> dict[str, Any]:
    """A seeded sample of participants' observed outcomes for the trajectory figure."""
    subjects = np.array(sorted(data.frame[data.subject].unique()))
    rng = np.random.default_rng(context.seed_sequence("trajectory sample"))
    chosen = set(rng.choice(subjects, size=min(size, len(subjects)), replace=False)) if len(subjects) else set()
    frame = data.frame[data.frame[data.subject].isin(chosen) & data.frame[data.outcome].notna()]
    frame = frame[[data.subject, data.arm, data.visit, data.outcome]]
    frame.columns = ["subject", "arm", "visit", "outcome"]
    frame = frame.assign(arm=frame["arm"].astype(str), visit=frame["visit"].astype(str))
    return table(frame.sort_values(["subject", "visit"], key=_visit_sort_key(data.visits)),
                 f"Observed outcomes of {len(chosen)} participants drawn at random")


def _visit_sort_key(visits):
    order = {v: i for i, v in enumerate(visits)}

    def key(column: pd.Series) -> pd.Series:
        return column.map(order) if column.name == "visit" else column

    return key


def _run_analysis(plan, cut, endpoint, analysis, role, context, run_warnings) -> dict[str, Any]:
    population = _analysis_population(plan, analysis)
    entry: dict[str, Any] = {
        "id": analysis.id, "label": analysis.label, "role": role, "method": analysis.method,
        "estimand": analysis.estimand, "population": population,
        "options": plain(analysis.options.model_dump(mode="json")),
        "status": "ok", "error": None, "tables": {}, "fit": {}, "diagnostics": {}, "warnings": [],
    }
    data = cut.analysis_data(endpoint.id, estimand_id=analysis.estimand, population_id=population)
    data = derive_outcome(endpoint, data, source=str(cut.manifest.get("file", "the data cut")))  # binary, count
    entry["left_out"] = table(flow.left_out_table(data, _event_labels(plan)),
                              "Participants of the population without any value used, by reason")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            # Visits not yet due are no missing values: no method sees them (none imputes them).
            entry.update(METHODS[analysis.method](data.due_only(), analysis, context))
        except (FitError, ModelSpecificationError) as error:
            entry["status"] = "failed"
            entry["error"] = error.render()
            if isinstance(error, FitError):
                entry["fit"] = {"attempts": plain(error.attempts)}
    entry["warnings"] = sorted({f"{w.category.__name__}: {w.message}" for w in caught})
    run_warnings.extend(f"{analysis.id}: {w}" for w in entry["warnings"])
    if entry["status"] == "failed":
        run_warnings.append(f"{analysis.id}: analysis failed — {entry['error'].splitlines()[0]}")
    return entry


def _event_labels(plan) -> dict[str, str]:
    return {event.id: event.label for event in plan.intercurrent_events}


def _flows(plan, cut, endpoint, events: dict[str, str]) -> list[dict[str, Any]]:
    """One participant flow per (estimand, population) the endpoint's analyses use; the primary's first."""
    targets = list(dict.fromkeys((a.estimand, _analysis_population(plan, a)) for a in endpoint.analyses.every))
    flows = []
    for estimand, population in targets:
        data = cut.analysis_data(endpoint.id, estimand_id=estimand, population_id=population)
        frame = flow.flow_table(cut.subjects, data, events, data.arms)
        title = (f"Participant flow: estimand {estimand}, population {population}" if estimand
                 else f"Participant flow: population {population} (no estimand)")
        flows.append({"estimand": estimand, "population": population, "table": table(frame, title),
                      "participants_due_at_primary_visit": data.participants_due()})
    return flows


def _multiplicity(plan, results, cut) -> dict[str, Any]:
    from trialcut.stats.multiplicity import adjust

    declared = plan.multiplicity
    hypotheses = []
    for h in declared.hypotheses:
        p_value = _find_p_value(plan, results, h)
        hypotheses.append({"id": h.id, "analysis": h.analysis, "arm": h.arm,
                           "visit": h.visit, "weight": h.weight, "p": p_value})
    if declared.alpha_spending is not None:
        # Planned looks: boundaries from the spending function, never a plain adjustment at full alpha.
        from trialcut.run.interim import interim_multiplicity

        return interim_multiplicity(plan, cut, results, hypotheses)
    outcome = adjust(
        [h["p"] for h in hypotheses], method=declared.method, alpha=declared.alpha,
        weights=[h["weight"] for h in hypotheses],
        transitions=[list(row) for row in declared.transitions] or None,
    ) if hypotheses else {"adjusted_p": [], "rejected": []}
    for h, adjusted, rejected in zip(hypotheses, outcome["adjusted_p"], outcome["rejected"]):
        h["adjusted_p"] = adjusted
        h["rejected"] = rejected
    return {"method": declared.method, "alpha": declared.alpha,
            "hypotheses": table(pd.DataFrame(hypotheses), "Multiplicity-adjusted tests") if hypotheses else None}


def _find_p_value(plan, results, hypothesis) -> float | None:
    for endpoint, declared in zip(results["endpoints"], plan.endpoints):
        visit = hypothesis.visit or declared.primary_visit
        for analysis in endpoint["analyses"]:
            if analysis["id"] != hypothesis.analysis or "differences" not in analysis["tables"]:
                continue
            frame = pd.DataFrame(analysis["tables"]["differences"]["data"],
                                 columns=analysis["tables"]["differences"]["columns"])
            row = frame[(frame["arm"] == hypothesis.arm) & (frame["visit"] == visit)]
            if len(row) == 1 and row["p"].notna().all():
                return float(row["p"].iloc[0])
    return None


IMPUTING_METHODS = ("multiple_imputation", "tipping_point")


def analysis_datasets(plan, cut) -> list:
    """The derived analysis dataset of every endpoint, for the record layer to write beside the results."""
    return [_analysis_dataset(plan, cut, endpoint) for endpoint in plan.endpoints]


def _analysis_dataset(plan, cut, endpoint):
    from trialcut.data.analysis_dataset import build_analysis_dataset

    imputed = frozenset(a.estimand for a in endpoint.analyses.every if a.method in IMPUTING_METHODS and a.estimand)
    return build_analysis_dataset(cut, endpoint.id, imputed)
