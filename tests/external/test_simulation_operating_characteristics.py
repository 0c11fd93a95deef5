"""Operating characteristics from `trialcut simulate`'s engine against outside references (issue 13).

Each check runs the simulation engine (run/simulate.py: trials generated, checked and analysed
by the run's own code) on the two-arm plan in tests/run/simulation/ and compares with:
- the nominal 5% level of the Kenward-Roger test under no effect (common practice: 1,000
  trials give a Monte Carlo SE of about 0.7 points; to keep CI time reasonable we run 250,
  whose MC SE is sqrt(.05 * .95 / 250) = 1.4 points, and accept 3 MC SEs);
- the analytic power of the two-sample t test, statsmodels.stats.power.TTestIndPower.power:
  with complete data and no covariates the repeated-measures estimate at the last visit is the
  difference of the two arms' means there (a textbook identity of generalised least squares with
  an unstructured covariance and complete, balanced data), so its test is the t test;
- missing completely at random leaves the repeated-measures estimate unbiased, and missing at
  random on the last observed value leaves it unbiased while a complete-case analysis at the
  last visit is biased towards the values of those who stay (Little & Rubin, Statistical
  Analysis with Missing Data, 3rd ed. 2019, sections 1.3 and 3.2; for a likelihood analysis
  under MAR, ignorability, section 6.2).
Monte Carlo SEs follow Morris, White & Crowther, Statistics in Medicine 38 (2019) 2074-2102.
Every seed in a range passes (the bands are 3 MC SEs wide); the seed is printed on failure.
"""
from __future__ import annotations

from pathlib import Path

import pytest
import yaml
from statsmodels.stats.power import TTestIndPower

from trialcut.plan.load import load_plan
from trialcut.plan.scenarios_load import load_scenarios
from trialcut.run.context import InlineExecutor
from trialcut.run.simulate import batches, simulate, summarise

pytestmark = pytest.mark.slow
PLAN = Path(__file__).resolve().parents[1] / "run" / "simulation" / "two_arm_plan.yaml"
VISITS = ("Visit 1", "Visit 2", "Visit 3", "Visit 4")
SD = {"Visit 1": 3.0, "Visit 2": 3.5, "Visit 3": 4.0, "Visit 4": 4.5}


def _scenario(active_change: float, per_arm: int, dropout=None, analyses=("last_visit_completers",)) -> dict:
    control = {v: -1.0 * (i + 1) for i, v in enumerate(VISITS)}
    active = {v: control[v] + active_change * (i + 1) / len(VISITS) for i, v in enumerate(VISITS)}
    scenario = {"id": "checked", "participants_per_arm": {"Control": per_arm, "Active": per_arm},
                "baseline": {"mean": 20, "sd": 5}, "mean_change": {"Control": control, "Active": active},
                "sd": SD, "correlation": {"exchangeable": 0.6}, "analyses": list(analyses)}
    if dropout:
        scenario["dropout"] = dropout
    return scenario


def _simulate(tmp_path, scenario: dict, trials: int, seed: int) -> dict:
    path = tmp_path / "scenarios.yaml"
    path.write_text(yaml.safe_dump({"format": 1, "seed": seed, "scenarios": [scenario]}, sort_keys=False))
    plan = load_plan(PLAN).plan
    scenarios = load_scenarios(path, plan).scenarios
    outcomes = simulate(batches(plan, scenarios, trials, seed, batch_size=25), InlineExecutor(),
                        work_folder=tmp_path / "work")
    return summarise(plan, scenarios, outcomes, trials=trials, root_seed=seed)


def _row(summary: dict, analysis: str) -> dict:
    (row,) = [r for r in summary["analyses"] if r["analysis"] == analysis]
    return row


@pytest.mark.parametrize("seed", [101])
def test_kenward_roger_rejects_about_five_percent_under_no_effect(tmp_path, seed):
    summary = _simulate(tmp_path, _scenario(0.0, 30, analyses=()), 250, seed)
    (hypothesis,) = summary["hypotheses"]
    rate, mc_se = hypothesis["rejection_rate"], (0.05 * 0.95 / hypothesis["trials_decided"]) ** 0.5
    assert hypothesis["trials_decided"] == 250, f"seed {seed}"
    assert abs(rate - 0.05) <= 3 * mc_se, f"seed {seed}: rejection rate {rate:.3f}, MC SE {mc_se:.4f}"


@pytest.mark.parametrize("seed", [202])
def test_power_with_complete_data_matches_the_two_sample_t_test(tmp_path, seed):
    per_arm, effect = 30, -3.0
    summary = _simulate(tmp_path, _scenario(effect, per_arm, analyses=()), 150, seed)
    analytic = TTestIndPower().power(effect_size=abs(effect) / SD["Visit 4"], nobs1=per_arm, alpha=0.05, ratio=1.0,
                                     alternative="two-sided")
    (hypothesis,) = summary["hypotheses"]
    mc_se = (analytic * (1 - analytic) / hypothesis["trials_decided"]) ** 0.5
    assert abs(hypothesis["rejection_rate"] - analytic) <= 3 * mc_se, (
        f"seed {seed}: simulated power {hypothesis['rejection_rate']:.3f}, t test {analytic:.3f}, MC SE {mc_se:.3f}")


@pytest.mark.parametrize("seed", [303])
def test_dropout_completely_at_random_leaves_the_estimate_unbiased(tmp_path, seed):
    rates = {v: 0.12 for v in VISITS[1:]}
    dropout = {"mechanism": "completely_at_random", "rates": {"Control": rates, "Active": rates}}
    summary = _simulate(tmp_path, _scenario(-2.0, 30, dropout, analyses=()), 120, seed)
    row = _row(summary, "repeated")
    assert row["trials_estimated"] == 120, f"seed {seed}"
    assert abs(row["bias"]) <= 3 * row["bias_mc_se"], f"seed {seed}: bias {row['bias']:.3f} ± {row['bias_mc_se']:.3f}"


@pytest.mark.parametrize("seed", [404])
def test_dropout_at_random_biases_complete_cases_but_not_the_likelihood_analysis(tmp_path, seed):
    # Only active-arm participants leave, the more likely the higher their last change: those
    # still observed at Visit 4 have lower values, so the complete-case difference (active minus
    # control) is pulled down, while the likelihood analysis uses every observed value (MAR).
    rates = {v: 0.25 for v in VISITS[1:]}
    dropout = {"mechanism": "at_random_last_value", "slope": 2.0, "rates": {"Active": rates}}
    summary = _simulate(tmp_path, _scenario(-2.0, 40, dropout), 120, seed)
    likelihood, complete_cases = _row(summary, "repeated"), _row(summary, "last_visit_completers")
    assert abs(likelihood["bias"]) <= 3 * likelihood["bias_mc_se"], (
        f"seed {seed}: repeated-measures bias {likelihood['bias']:.3f} ± {likelihood['bias_mc_se']:.3f}")
    assert complete_cases["bias"] + 3 * complete_cases["bias_mc_se"] < 0, (
        f"seed {seed}: complete-case bias {complete_cases['bias']:.3f} ± {complete_cases['bias_mc_se']:.3f}")
