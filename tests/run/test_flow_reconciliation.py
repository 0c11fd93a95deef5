"""Every count of a run derives from its participant-flow tables (issue 8).

The identities are bookkeeping (common practice for a participant-flow account, as in a
CONSORT-style diagram: each box splits into boxes that add up to it).  They are checked on
seeded random cuts (any seed in the range must pass; the seed is printed on failure) and on
the results of the demo plan's two cuts.  The fitted counts come from the statistics layer's
own fit records, so a count that drifts from the flow fails here.
"""
from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from trialcut.data import flow
from trialcut.data.prepare import prepare_cut
from trialcut.data.readers import raw_from_frame
from trialcut.plan.schema import AnalysisPlan
from trialcut.run import runner
from trialcut.run.context import RunContext
from trialcut.run.tables import frame_of

from tests.data.conftest import PLAN

ROOT = Path(__file__).resolve().parents[2]


# --------------------------------------------------------------------------- the checks
def reconciliation_problems(results: dict, imputations: bool = True,
                            population_labels: dict[str, str] | None = None) -> list[str]:
    """Every count of ``results`` that does not follow from its flow tables (empty: all reconcile).

    ``population_labels`` (id -> label) also checks the population and disposition tables, whose
    rows are named by label: the N per arm that table headers print comes from them.
    """
    problems: list[str] = []
    for position, endpoint in enumerate(results["endpoints"]):
        flows = {(f["estimand"], f["population"]): frame_of(f["table"]) for f in endpoint["flow"]}
        arms = [c for c in next(iter(flows.values())).columns if c not in ("visit", "step", "label", "Total")]
        for key, table in flows.items():
            problems += [f"{endpoint['id']} {key}: {p}" for p in _identities(table, arms)]
        primary = next(iter(flows.values()))
        if population_labels and position == 0:
            problems += _population_tables(results, endpoint, flows, arms, population_labels)
        problems += _descriptive(endpoint, primary, arms)
        problems += _missing_tables(endpoint, primary, arms)
        for analysis in endpoint["analyses"]:
            table = flows[(analysis["estimand"], analysis["population"])]
            problems += [f"{analysis['id']}: {p}" for p in _analysis(analysis, table, arms, imputations)]
    return problems


def _count(table: pd.DataFrame, visit: str, step: str, arm: str = "Total") -> int:
    rows = table[(table["visit"] == visit) & (table["step"] == step)]
    assert len(rows) == 1, (visit, step)
    return int(rows[arm].iloc[0])


def _steps(table: pd.DataFrame, visit: str, prefix: str = "") -> list[str]:
    return [s for s in table.loc[table["visit"] == visit, "step"] if s.startswith(prefix)]


def _identities(table: pd.DataFrame, arms: list[str]) -> list[str]:
    problems = []
    visits = [v for v in dict.fromkeys(table["visit"]) if v != flow.ALL_VISITS]
    parts = list(flow.VISIT_PARTS) + _steps(table, visits[0], flow.MISSING_AFTER) + ["missing_no_event"]
    for arm in arms + ["Total"]:
        for visit in visits:
            count = lambda step: _count(table, visit, step, arm)  # noqa: E731
            if count("randomised") != count("not_in_population") + count("in_population"):
                problems.append(f"{visit}/{arm}: randomised does not split into in and out of the population")
            if count("in_population") != count("not_yet_due") + count("due"):
                problems.append(f"{visit}/{arm}: the population does not split into due and not yet due")
            if count("due") != sum(count(step) for step in parts):
                problems.append(f"{visit}/{arm}: due visits do not split into their outcomes")
        every = lambda step: _count(table, flow.ALL_VISITS, step, arm)  # noqa: E731
        if every("in_population") != every("with_value_used") + sum(every(r) for r in flow.LEFT_OUT_REASONS):
            problems.append(f"{arm}: participants do not split into used and left out")
    return problems


def _population_tables(results, endpoint, flows, arms, labels) -> list[str]:
    problems = []
    populations = {row[0]: row for row in results["populations"]["data"]}
    columns = results["populations"]["columns"]
    disposition = {row[0]: row for row in results["disposition"]["data"]}
    for (estimand, population), table in flows.items():
        row = populations[labels[population]]
        for arm in arms:
            if row[columns.index(arm)] != _count(table, flow.ALL_VISITS, "in_population", arm):
                problems.append(f"population table N of {arm} in {population} is not the flow's")
            if disposition["Randomised"][columns.index(arm)] != _count(table, flow.ALL_VISITS, "randomised", arm):
                problems.append(f"disposition's randomised {arm} is not the flow's")
    primary_key, primary = next(iter(flows.items()))
    observed = next(row for name, row in disposition.items() if name.startswith("Observed at"))
    for arm in arms:
        if observed[columns.index(arm)] != _recorded(primary, endpoint["primary_visit"], arm):
            problems.append(f"disposition's observed at {endpoint['primary_visit']} for {arm} is not the flow's")
    return problems


def _recorded(table, visit, arm) -> int:
    return sum(_count(table, visit, step, arm) for step in flow.RECORDED_PARTS)


def _used(table, visit, arm="Total") -> int:
    return sum(_count(table, visit, step, arm) for step in flow.USED_PARTS)


def _descriptive(endpoint, primary, arms) -> list[str]:
    analysed = "CHG" if endpoint["analysed"] == "change" else "AVAL"
    rows = frame_of(endpoint["descriptive"])
    if "variable" in rows.columns:      # a binary endpoint's responder table has one row per arm x visit
        rows = rows[rows["variable"] == analysed]
    expected = _recorded
    if endpoint.get("type") == "binary":
        # a response exists for every used value; with missing_response non_response every due visit has one
        expected = ((lambda table, visit, arm: _count(table, visit, "due", arm))
                    if endpoint["missing_response"] == "non_response" else _used)
    problems = [f"descriptive n at {row.visit}/{row.arm} is {row.n}, the flow gives "
                f"{expected(primary, row.visit, row.arm)}"
                for row in rows.itertuples() if row.n != expected(primary, row.visit, row.arm)]
    if "not_yet_due" in rows.columns:
        problems += [f"descriptive 'not yet due' at {row.visit}/{row.arm} is not the flow's"
                     for row in rows.itertuples()
                     if row.not_yet_due != _count(primary, row.visit, "not_yet_due", row.arm)]
    return problems


def _missing_tables(endpoint, primary, arms) -> list[str]:
    problems = []
    for row in frame_of(endpoint["missing_by_visit"]).itertuples():
        expected = (_count(primary, row.visit, "in_population", row.arm), _count(primary, row.visit, "not_yet_due", row.arm),
                    _count(primary, row.visit, "due", row.arm), _recorded(primary, row.visit, row.arm))
        if (row.in_population, row.not_yet_due, row.due, row.observed) != expected or row.missing != row.due - row.observed:
            problems.append(f"missing table at {row.visit}/{row.arm} disagrees with the flow")
    patterns = frame_of(endpoint["missing_patterns"])
    visits = [v for v in dict.fromkeys(primary["visit"]) if v != flow.ALL_VISITS]
    for arm in arms:
        mine = patterns[patterns["arm"] == arm]
        if mine["count"].sum() != _count(primary, flow.ALL_VISITS, "in_population", arm):
            problems.append(f"patterns of {arm} do not count the population")
        for position, visit in enumerate(visits):
            used = sum(c for p, c in zip(mine["pattern"], mine["count"]) if p[position] == "X")
            not_due = sum(c for p, c in zip(mine["pattern"], mine["count"]) if p[position] == "-")
            if used != _used(primary, visit, arm) or not_due != _count(primary, visit, "not_yet_due", arm):
                problems.append(f"patterns of {arm} at {visit} disagree with the flow")
    return problems


def _analysis(analysis, table, arms, imputations: bool = True) -> list[str]:
    problems = []
    if analysis["status"] != "ok":
        return problems
    visits = [v for v in dict.fromkeys(table["visit"]) if v != flow.ALL_VISITS]
    left_out = frame_of(analysis["left_out"])
    kept = _count(table, flow.ALL_VISITS, "with_value_used")
    if len(left_out) != _count(table, flow.ALL_VISITS, "in_population") - kept:
        problems.append("the list of participants left out does not match the flow")
    for reason in flow.LEFT_OUT_REASONS:
        words = flow.STEP_LABELS[reason].replace("Left out: ", "")
        if (left_out["reason"] == words).sum() != _count(table, flow.ALL_VISITS, reason):
            problems.append(f"left out for '{words}' does not match the flow")
    fit = analysis["fit"]
    if analysis["method"] == "mmrm":
        used = sum(_used(table, v) for v in visits)
        if fit["n_obs"] != used or fit["n_subjects"] != kept:
            problems.append(f"fit counts {fit['n_obs']} values of {fit['n_subjects']} participants; "
                            f"the flow uses {used} of {kept}")
    diagnostics = fit.get("diagnostics") if isinstance(fit.get("diagnostics"), dict) else {}
    if imputations and "imputed_values" in diagnostics:
        # An imputation fills every due cell without a used value, and nothing else.
        expected = sum(_count(table, v, "due") - _used(table, v) for v in visits)
        with_due = _count(table, flow.ALL_VISITS, "in_population") - _count(table, flow.ALL_VISITS, "no_visit_due")
        if diagnostics["imputed_values"] != expected or diagnostics.get("participants", with_due) != with_due:
            problems.append(f"imputation fills {diagnostics['imputed_values']} values of "
                            f"{diagnostics.get('participants')} participants; the flow leaves {expected} "
                            f"due values of {with_due} participants without a used value")
    if analysis["method"] == "ancova":
        for row in frame_of(analysis["diagnostics"]["per_visit"]["fits"]).itertuples():
            if row.n_subjects != _used(table, row.visit):
                problems.append(f"covariance analysis at {row.visit} counts {row.n_subjects}, "
                                f"the flow uses {_used(table, row.visit)}")
    return problems


# --------------------------------------------------------------------------- random cuts
PLAN_ANALYSES = {
    "primary": {"id": "main", "label": "Repeated measures", "method": "mmrm", "estimand": "hypo",
                "options": {"covariates": ["BASE"], "covariance": ["unstructured", "compound_symmetry"]}},
    "sensitivity": [
        {"id": "policy_model", "label": "Treatment policy", "method": "mmrm", "estimand": "policy",
         "options": {"covariates": ["BASE"], "covariance": ["unstructured", "compound_symmetry"]}},
        {"id": "composite_model", "label": "Composite", "method": "mmrm", "estimand": "comp",
         "options": {"covariates": ["BASE"], "covariance": ["unstructured", "compound_symmetry"]}},
        {"id": "per_protocol", "label": "Per protocol", "method": "ancova", "estimand": "hypo", "population": "pp",
         "options": {"covariates": ["BASE"]}},
    ],
}


def _random_plan() -> AnalysisPlan:
    data = yaml.safe_load(yaml.safe_dump(PLAN))
    data["columns"] = {"randomisation_date": "RANDDT"}
    data["endpoints"][0]["analyses"] = PLAN_ANALYSES
    return AnalysisPlan.model_validate(data)


def _random_cut(seed: int) -> tuple[pd.DataFrame, dt.date]:
    """Participants with random populations, events, gaps and randomisation dates."""
    rng = np.random.default_rng(seed)
    start = dt.date(2025, 3, 1)
    rows = []
    for number in range(int(rng.integers(36, 60))):
        subject = f"R{number:03d}"
        arm = ("Placebo", "Active")[number % 2]
        common = {"USUBJID": subject, "PARAMCD": "FBS", "TRT01P": arm, "STRAT1R": str(rng.choice(["Mild", "Severe"])),
                  "FASFL": "Y" if rng.uniform() < 0.92 else "N", "PPROTFL": "Y" if rng.uniform() < 0.8 else "N",
                  "DISCDY": float(rng.integers(3, 40)) if rng.uniform() < 0.3 else np.nan,
                  "RESCDY": float(rng.integers(3, 40)) if rng.uniform() < 0.2 else np.nan,
                  "RANDDT": (start + dt.timedelta(days=int(rng.integers(0, 80)))).isoformat()}
        base = float(rng.integers(20, 50))
        rows.append({**common, "AVISIT": "Baseline", "ADY": 1.0, "ABLFL": "Y", "AVAL": base})
        for label, day in (("Week 2", 15), ("Week 4", 29)):
            if rng.uniform() < 0.8:
                value = float(np.clip(round(base - 2 + rng.normal(0, 5)), 0, 60))
                rows.append({**common, "AVISIT": label, "ADY": float(day + rng.integers(-2, 3)), "ABLFL": None,
                             "AVAL": value})
    frame = pd.DataFrame(rows)
    cut_off = start + dt.timedelta(days=int(rng.integers(60, 105)))
    # Records dated after the cut-off were not in the database yet.
    dates = pd.to_datetime(frame["RANDDT"]) + pd.to_timedelta(frame["ADY"] - 1, unit="D")
    return frame[dates <= pd.Timestamp(cut_off)].reset_index(drop=True), cut_off


@pytest.mark.parametrize("seed", range(6))
def test_counts_reconcile_on_random_cuts(seed):
    plan = _random_plan()
    frame, cut_off = _random_cut(seed)
    cut = prepare_cut(plan, raw_from_frame(frame), cut_off=cut_off, today=dt.date(2026, 12, 2))
    results = runner.run_plan(plan, cut, RunContext(root_seed=seed), plan_block={}, data_block={}, run_block={})
    labels = {p.id: p.label for p in plan.populations}
    assert reconciliation_problems(results, population_labels=labels) == [], f"seed {seed}"
    not_yet_due = frame_of(results["endpoints"][0]["flow"][0]["table"]).query("step == 'not_yet_due'")["Total"].sum()
    assert not_yet_due > 0, f"seed {seed}: the random cut should leave some visits not yet due"


def test_methods_never_receive_a_visit_not_yet_due(monkeypatch):
    plan = _random_plan()
    frame, cut_off = _random_cut(3)
    cut = prepare_cut(plan, raw_from_frame(frame), cut_off=cut_off, today=dt.date(2026, 12, 2))
    seen = []
    real = runner.METHODS["mmrm"]
    monkeypatch.setitem(runner.METHODS, "mmrm", lambda data, analysis, context: seen.append(data.frame) or real(
        data, analysis, context))
    runner.run_plan(plan, cut, RunContext(root_seed=3), plan_block={}, data_block={}, run_block={})
    assert seen and all(part["due"].all() for part in seen)
    full = cut.analysis_data("score", "hypo")
    assert (~full.frame["due"]).any() and len(seen[0]) == int(full.frame["due"].sum())


def test_a_broken_count_is_caught():
    # The checks can fail: a fit that counted one value more than the flow is reported.
    plan = _random_plan()
    frame, cut_off = _random_cut(1)
    cut = prepare_cut(plan, raw_from_frame(frame), cut_off=cut_off, today=dt.date(2026, 12, 2))
    results = runner.run_plan(plan, cut, RunContext(root_seed=1), plan_block={}, data_block={}, run_block={})
    results["endpoints"][0]["analyses"][0]["fit"]["n_obs"] += 1
    descriptive = results["endpoints"][0]["descriptive"]
    columns = descriptive["columns"]
    first_change = next(row for row in descriptive["data"] if row[columns.index("variable")] == "CHG")
    first_change[columns.index("n")] += 1
    assert len(reconciliation_problems(results)) == 2


# --------------------------------------------------------------------------- the demo's two cuts
def _demo_plan_quick() -> AnalysisPlan:
    """The demo plan with few imputations: counts do not depend on how many are drawn."""
    data = yaml.safe_load((ROOT / "analysis_plans" / "demo.yaml").read_text(encoding="utf-8"))
    for analysis in data["endpoints"][0]["analyses"]["sensitivity"]:
        if "imputations" in analysis.get("options", {}):
            analysis["options"].update(imputations=2, burn_in=20, thinning=1)
            analysis["options"].pop("chains", None)
            analysis["options"]["chains"] = 1
    return AnalysisPlan.model_validate(data)


_DEMO_RESULTS: dict[str, dict] = {}


def _demo_results(label: str) -> dict:
    from trialcut.data.simulate import demo_cut_offs, demo_cuts

    if label not in _DEMO_RESULTS:
        plan = _demo_plan_quick()
        cut = prepare_cut(plan, raw_from_frame(demo_cuts(20261202)[label]), cut_off=demo_cut_offs()[label])
        _DEMO_RESULTS[label] = runner.run_plan(plan, cut, RunContext(root_seed=plan.seed), plan_block={},
                                               data_block={}, run_block={})
    return _DEMO_RESULTS[label]


@pytest.mark.slow
def test_the_interim_imputations_fill_only_due_values():
    problems = [p for p in reconciliation_problems(_demo_results("interim")) if "imputation fills" in p]
    assert problems == []


@pytest.mark.slow
@pytest.mark.parametrize("label", ["interim", "final"])
def test_counts_reconcile_on_the_demo_cuts(label):
    results = _demo_results(label)
    labels = {p.id: p.label for p in _demo_plan_quick().populations}
    assert reconciliation_problems(results, imputations=label == "final", population_labels=labels) == []
    primary = frame_of(results["endpoints"][0]["flow"][0]["table"])
    not_yet_due = _count(primary, "Week 12", "not_yet_due")
    if label == "interim":
        # Staggered enrolment: at the interim many Week 12 visits are not due yet, and they are
        # neither missing nor imputed (the missing table keeps them apart).
        assert not_yet_due > 30
        missing = frame_of(results["endpoints"][0]["missing_by_visit"])
        week12 = missing[missing["visit"] == "Week 12"]
        assert week12["not_yet_due"].sum() == not_yet_due
        assert (week12["missing"] + week12["observed"] == week12["due"]).all()
    else:
        assert not_yet_due == 0
