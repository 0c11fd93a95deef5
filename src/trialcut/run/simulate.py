"""Operating characteristics of a plan: simulate trials of each scenario and run the plan on them.

Each trial is generated (``data.scenario_trials``), checked and derived by ``prepare_cut`` and
analysed by the plan's own methods (``run.methods.METHODS``) and multiplicity procedure, the
same code ``run`` uses, without a report.  Trial ``i`` of scenario ``s`` draws everything from
``SeedSequence(root_seed, spawn_key=(s, i))`` (numpy's spawning of independent streams), so a
trial's result depends on the root seed and its indices only: the same in this process, in a
process pool or on a Dask cluster of any size.  Trials run in batches (one task each, so the
scheduling cost stays small); each finished batch is written to a work folder, so an
interrupted simulation resumes from the trials already done.

The summaries and their Monte Carlo standard errors follow Morris, White & Crowther, "Using
simulation studies to evaluate statistical methods", Statistics in Medicine 38 (2019) 2074-2102,
Table 6 (bias, empirical SE, model SE, mean squared error, coverage, rejection rate).
"""
from __future__ import annotations

import hashlib
import json
import math
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from trialcut.errors import DataError, FitError, ModelSpecificationError
from trialcut.run.context import RunContext
from trialcut.stats.blas_threads import one_blas_thread

FORMAT = 1
DEFAULT_BATCH = 10


@dataclass(frozen=True)
class TrialBatch:
    """One task: trials ``start`` to ``stop - 1`` of one scenario."""

    plan: Any
    scenario: Any
    scenario_index: int
    root_seed: int
    start: int
    stop: int

    @property
    def name(self) -> str:
        return f"{self.scenario.id}-{self.start:06d}-{self.stop:06d}"


def trial_seed(root_seed: int, scenario_index: int, trial: int) -> np.random.SeedSequence:
    return np.random.SeedSequence(root_seed, spawn_key=(scenario_index, trial))


def selected_analyses(plan, scenario) -> list[Any]:
    endpoint = plan.endpoints[0]
    chosen = [a for a in endpoint.analyses.sensitivity if a.id in scenario.analyses]
    return [endpoint.analyses.primary, *chosen]


def run_batch(batch: TrialBatch) -> list[dict[str, Any]]:
    """Module-level (it must pickle for a process pool or Dask): every trial of one batch, drawn
    and analysed with one BLAS thread like a run's analyses (trialcut.stats.blas_threads), so its
    numbers do not depend on the machine that ran the batch."""
    with one_blas_thread():
        return [run_trial(batch.plan, batch.scenario, trial_seed(batch.root_seed, batch.scenario_index, index), index)
                for index in range(batch.start, batch.stop)]


def run_trial(plan, scenario, seed: np.random.SeedSequence, index: int) -> dict[str, Any]:
    from trialcut.data.prepare import prepare_cut
    from trialcut.data.scenario_trials import simulate_scenario_trial

    data_seed, analysis_seed = seed.spawn(2)
    trial = simulate_scenario_trial(plan, scenario, np.random.default_rng(data_seed))
    outcome: dict[str, Any] = {"trial": index, "full_difference": trial.full_difference,
                               "left_by_primary": trial.left_by_primary, "analyses": {}, "rejected": {}}
    try:
        cut = prepare_cut(plan, _raw(trial.frame, f"{scenario.id}-trial-{index}.csv"), cut_off=trial.cut_off)
    except DataError as error:    # the plan's data checks refused this trial: counted, never hidden
        outcome["data_error"] = error.render().splitlines()[0]
        return outcome
    context = RunContext(root_seed=int(analysis_seed.generate_state(1)[0]), estimates_only=True)
    entries = [_analyse(plan, cut, analysis, context) for analysis in selected_analyses(plan, scenario)]
    outcome["analyses"] = {entry["id"]: _estimates(plan, entry) for entry in entries}
    outcome["rejected"] = _rejections(plan, cut, entries)
    return outcome


def _raw(frame, name: str):
    """The trial as a data cut in memory.  Unlike ``raw_from_frame`` it carries no content hash:
    writing every trial out as CSV to hash it cost more than its fit, and nothing reads it (a
    simulated trial is never recorded; its seed reproduces it)."""
    from trialcut.data.readers import RawCut

    manifest = {"file": name, "format": "memory", "size": None, "sha256": None, "rows": int(len(frame)),
                "columns": [str(c) for c in frame.columns]}
    return RawCut(frame, manifest, 1, "record", True)


def _analyse(plan, cut, analysis, context) -> dict[str, Any]:
    from trialcut.run.methods import METHODS
    from trialcut.run.runner import _analysis_population

    endpoint = plan.endpoints[0]
    entry: dict[str, Any] = {"id": analysis.id, "status": "ok", "tables": {}, "fit": {}}
    data = cut.analysis_data(endpoint.id, estimand_id=analysis.estimand,
                             population_id=_analysis_population(plan, analysis))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            entry.update(METHODS[analysis.method](data.due_only(), analysis, context))
        except (FitError, ModelSpecificationError) as error:
            entry["status"] = "failed"
            entry["error"] = error.render().splitlines()[0]
    return entry


def _estimates(plan, entry: dict[str, Any]) -> dict[str, Any]:
    """The comparison of each arm with the reference at the primary visit, and how the fit ended."""
    endpoint = plan.endpoints[0]
    fit = entry.get("fit") or {}
    found: dict[str, Any] = {"status": entry["status"], "structure": fit.get("structure"), "by_arm": {}}
    differences = (entry.get("tables") or {}).get("differences")
    if differences:
        columns = differences["columns"]
        for row in differences["data"]:
            values = dict(zip(columns, row))
            if values.get("visit") == endpoint.primary_visit:
                found["by_arm"][values["arm"]] = {key: values.get(key) for key in ("estimate", "se", "lower", "upper", "p")}
    return found


def _rejections(plan, cut, entries: list[dict[str, Any]]) -> dict[str, bool | None]:
    """The plan's multiplicity procedure on this trial (at its last planned look, if it has looks)."""
    from trialcut.run.runner import _multiplicity

    if not plan.multiplicity.hypotheses:
        return {}
    spending = plan.multiplicity.alpha_spending
    cut_label = spending.looks[-1].cut if spending is not None else "simulated"
    results = {"run": {"cut": cut_label}, "endpoints": [{"analyses": entries}]}
    block = _multiplicity(plan, results, cut)
    hypotheses = block.get("hypotheses") or {"columns": [], "data": []}
    out: dict[str, bool | None] = {}
    for row in hypotheses["data"]:
        values = dict(zip(hypotheses["columns"], row))
        decided = values.get("rejected", values.get("crossed_adjusted"))
        out[values["id"]] = None if decided is None else bool(decided)
    return out


# --------------------------------------------------------------------------- driving the batches
def batches(plan, scenarios, trials: int, root_seed: int, batch_size: int = DEFAULT_BATCH) -> list[TrialBatch]:
    return [TrialBatch(plan, scenario, index, root_seed, start, min(start + batch_size, trials))
            for index, scenario in enumerate(scenarios.scenarios) for start in range(0, trials, batch_size)]


def work_key(plan_hash: str, scenarios_hash: str, trials: int, root_seed: int, batch_size: int) -> str:
    text = json.dumps([FORMAT, plan_hash, scenarios_hash, trials, root_seed, batch_size])
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:20]


def simulate(work: Sequence[TrialBatch], executor, *, work_folder: Path,
             progress: Callable[[str, int, int], None] | None = None, round_size: int = 4) -> list[dict[str, Any]]:
    """Run every batch not already in ``work_folder``; return all trial outcomes in batch order."""
    work_folder.mkdir(parents=True, exist_ok=True)
    total = sum(b.stop - b.start for b in work)
    done = {b.name: _read_batch(work_folder / f"{b.name}.json") for b in work}
    todo = [b for b in work if done[b.name] is None]
    finished = total - sum(b.stop - b.start for b in todo)
    said: list[int] = []

    def say(count: int) -> None:
        # A round's last batch already said its count; saying it again after the round made a
        # batch log read "300 of 300 started" and "done in 0.0 s" after the real end.
        if progress and said[-1:] != [count]:
            said.append(count)
            progress("simulated trials", count, total)

    say(finished)
    for first in range(0, len(todo), round_size):
        group = todo[first:first + round_size]
        before = finished

        def advance(count: int, _total: int, group=group, before=before) -> None:
            # batches of a round finish in any order; count trials of the finished ones
            say(min(before + count * (group[0].stop - group[0].start), total))

        if getattr(executor, "reports_progress", False):
            outcomes = executor.map(run_batch, group, progress=advance)
        else:
            outcomes = executor.map(run_batch, group)
        for batch, result in zip(group, outcomes):
            _write_batch(work_folder / f"{batch.name}.json", result)
            done[batch.name] = result
            finished += batch.stop - batch.start
        say(finished)
    return [dict(outcome, scenario=b.scenario.id) for b in work for outcome in done[b.name]]


def _read_batch(path: Path) -> list[dict[str, Any]] | None:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):    # absent, or cut short by an interruption: run it again
        return None


def _write_batch(path: Path, outcomes: list[dict[str, Any]]) -> None:
    temporary = path.with_suffix(".partial")
    temporary.write_text(json.dumps(outcomes, allow_nan=False, default=_none_for_nan), encoding="utf-8")
    temporary.replace(path)     # whole or absent, never half a batch


def _none_for_nan(value: Any) -> Any:
    return None


# --------------------------------------------------------------------------- summaries
def summarise(plan, scenarios, outcomes: list[dict[str, Any]], *, trials: int, root_seed: int) -> dict[str, Any]:
    """The operating characteristics: plain JSON data for the report, the CSV and the JSON file."""
    endpoint = plan.endpoints[0]
    reference = plan.arms.reference
    alpha = plan.multiplicity.alpha
    rows, hypotheses_rows = [], []
    for scenario in scenarios.scenarios:
        mine = [o for o in outcomes if o["scenario"] == scenario.id]
        for analysis in selected_analyses(plan, scenario):
            level = getattr(analysis.options, "confidence_level", 0.95)
            for arm in plan.arms.codes:
                if arm == reference:
                    continue
                truth = _truth(scenario, endpoint.primary_visit, reference, arm, mine)
                rows.append(_analysis_row(scenario, analysis, arm, truth, mine, alpha, level))
        for hypothesis in plan.multiplicity.hypotheses:
            decided = [o["rejected"].get(hypothesis.id) for o in mine if o.get("rejected")]
            decided = [d for d in decided if d is not None]
            rate, se = _proportion(decided)
            hypotheses_rows.append({"scenario": scenario.id, "hypothesis": hypothesis.id, "analysis": hypothesis.analysis,
                                    "arm": hypothesis.arm, "visit": hypothesis.visit or endpoint.primary_visit,
                                    "trials_decided": len(decided), "rejection_rate": rate, "rejection_rate_mc_se": se})
    return {
        "format": FORMAT, "trials_per_scenario": trials, "root_seed": root_seed, "alpha": alpha,
        "multiplicity": plan.multiplicity.method,
        "multiplicity_note": _multiplicity_note(plan),
        "primary_visit": endpoint.primary_visit, "reference": reference,
        "scenarios": [{"id": s.id, "label": s.label or s.id, "participants": sum(s.participants_per_arm.values()),
                       "mechanism": s.dropout.mechanism if s.dropout else "none",
                       "data_errors": sum(1 for o in outcomes if o["scenario"] == s.id and o.get("data_error"))}
                      for s in scenarios.scenarios],
        "analyses": rows, "hypotheses": hypotheses_rows,
    }


def _multiplicity_note(plan) -> str:
    spending = plan.multiplicity.alpha_spending
    if spending is None:
        return f"Each trial applies the plan's multiplicity procedure ({plan.multiplicity.method}) at alpha {plan.multiplicity.alpha}."
    return (f"The plan spends alpha over {len(spending.looks)} looks; each simulated trial is analysed once, as the "
            f"last look ({spending.looks[-1].cut}), with that look's boundaries. Stopping at an earlier look is not "
            "simulated, so the rejection rates leave out what an interim could add.")


def _truth(scenario, visit: str, reference: str, arm: str, outcomes: list[dict[str, Any]]) -> float:
    """The declared difference; with values shifted after leaving, plus the shift times the
    difference in the share who left by the primary visit (averaged over the trials)."""
    declared = scenario.mean_change[arm][visit] - scenario.mean_change[reference][visit]
    dropout = scenario.dropout
    if dropout is None or dropout.mechanism != "not_at_random_shift" or not outcomes:
        return declared
    share = np.mean([o["left_by_primary"][arm] - o["left_by_primary"][reference] for o in outcomes])
    return float(declared + dropout.shift * share)


def _analysis_row(scenario, analysis, arm, truth, outcomes, alpha, level) -> dict[str, Any]:
    results = [o["analyses"].get(analysis.id) for o in outcomes]
    failed = sum(1 for r in results if r is None or r["status"] != "ok")
    found = [r["by_arm"].get(arm) for r in results if r is not None and r["status"] == "ok"]
    found = [f for f in found if f and _finite(f.get("estimate")) and _finite(f.get("se"))]
    estimates = np.array([f["estimate"] for f in found], dtype=float)
    errors = np.array([f["se"] for f in found], dtype=float)
    covered = [f["lower"] <= truth <= f["upper"] for f in found if _finite(f.get("lower")) and _finite(f.get("upper"))]
    significant = [f["p"] < alpha for f in found if _finite(f.get("p"))]
    structures: dict[str, int] = {}
    for r in results:
        if r is not None and r.get("structure"):
            structures[r["structure"]] = structures.get(r["structure"], 0) + 1
    row = {"scenario": scenario.id, "analysis": analysis.id, "method": analysis.method, "arm": arm,
           "true_difference": truth, "trials": len(outcomes), "trials_estimated": len(found),
           "fits_failed": failed, "confidence_level": level,
           "covariance_structures": ", ".join(f"{name} {count}" for name, count in sorted(structures.items()))}
    row.update(_performance(estimates, errors, truth))
    row["coverage"], row["coverage_mc_se"] = _proportion(covered)
    row["rejection_rate_unadjusted"], row["rejection_rate_unadjusted_mc_se"] = _proportion(significant)
    return row


def _performance(estimates: np.ndarray, errors: np.ndarray, truth: float) -> dict[str, float | None]:
    n = estimates.size
    if n < 2:
        return {key: None for key in ("mean_estimate", "mean_estimate_mc_se", "bias", "bias_mc_se", "empirical_se",
                                      "empirical_se_mc_se", "model_se", "model_se_mc_se", "rmse", "rmse_mc_se")}
    mean = float(estimates.mean())
    empirical = float(estimates.std(ddof=1))
    squared = (estimates - truth) ** 2
    mse = float(squared.mean())
    mse_se = float(np.sqrt(((squared - mse) ** 2).sum() / (n * (n - 1))))
    model = float(np.sqrt((errors ** 2).mean()))
    model_se = float(np.sqrt((errors ** 2).var(ddof=1) / (4 * n * model ** 2))) if model > 0 else None
    rmse = math.sqrt(mse)
    return {"mean_estimate": mean, "mean_estimate_mc_se": empirical / math.sqrt(n),
            "bias": mean - truth, "bias_mc_se": empirical / math.sqrt(n),
            "empirical_se": empirical, "empirical_se_mc_se": empirical / math.sqrt(2 * (n - 1)),
            "model_se": model, "model_se_mc_se": model_se,
            "rmse": rmse, "rmse_mc_se": mse_se / (2 * rmse) if rmse > 0 else None}


def _proportion(flags: list[bool]) -> tuple[float | None, float | None]:
    if not flags:
        return None, None
    rate = float(np.mean(flags))
    return rate, float(math.sqrt(rate * (1 - rate) / len(flags)))


def _finite(value: Any) -> bool:
    return isinstance(value, (int, float)) and math.isfinite(value)
