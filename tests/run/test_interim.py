"""The runner's tests of hypotheses at planned looks, at unplanned cuts and at the final.

The expected boundaries are recomputed here with the statistics layer (whose numbers are
checked against published tables in tests/external/test_group_sequential_reference.py); what
is tested is the wiring: which look a cut is, which fractions enter, which hypotheses are
tested, and that an unplanned cut carries no decision.
"""
from __future__ import annotations

from pathlib import Path
from types import SimpleNamespace

import pandas as pd
import pytest
import yaml

from trialcut.plan.schema import AnalysisPlan
from trialcut.run.interim import interim_multiplicity
from trialcut.run.tables import frame_of
from trialcut.stats.group_sequential import boundaries

BASE = Path(__file__).resolve().parents[1] / "cases" / "_base" / "plan.yaml"


def _plan(**spending) -> AnalysisPlan:
    raw = yaml.safe_load(BASE.read_text(encoding="utf-8"))
    raw["multiplicity"] = {
        "method": "holm", "alpha": 0.05,
        "hypotheses": [{"id": "high", "analysis": "mmrm_primary", "arm": "Lorvatide 20 mg"},
                       {"id": "low", "analysis": "mmrm_primary", "arm": "Lorvatide 10 mg"}],
        "alpha_spending": {"spending": "obrien_fleming_type", "planned_participants": 100,
                           "looks": [{"cut": "interim", "information": 0.5}, {"cut": "final", "information": 1}],
                           **spending},
    }
    return AnalysisPlan.model_validate(raw)


def _cut(n_due: int, n_total: int = 100, judged: bool = True):
    frame = pd.DataFrame({"USUBJID": range(n_total), "AVISIT": "Week 12",
                          "CHG": [1.0] * n_total, "due": [i < n_due for i in range(n_total)]})
    data = SimpleNamespace(frame=frame, subject="USUBJID", visit="AVISIT", outcome="CHG",
                           primary_visit="Week 12", due_judged=judged)
    return SimpleNamespace(analysis_data=lambda *args, **kwargs: data)


def _hypotheses(p_high: float, p_low: float) -> list[dict]:
    return [{"id": "high", "analysis": "mmrm_primary", "arm": "Lorvatide 20 mg", "visit": None, "weight": 1.0,
             "p": p_high},
            {"id": "low", "analysis": "mmrm_primary", "arm": "Lorvatide 10 mg", "visit": None, "weight": 1.0,
             "p": p_low}]


def test_interim_look_uses_the_fraction_reached():
    out = interim_multiplicity(_plan(), _cut(n_due=46), {"run": {"cut": "interim"}}, _hypotheses(1e-4, 0.3))
    facts = out["sequential"]
    assert facts["planned_look"] and facts["look"] == 1 and facts["looks"] == 2
    assert facts["information_reached"] == pytest.approx(0.46)
    table = frame_of(out["hypotheses"]).set_index("id")
    # Holm: "high" holds 0.025 at first, and its boundary is the spending boundary at t = 0.46.
    expected = boundaries([0.46], alpha=0.025, spending="obrien_fleming_type").nominal_p[0]
    assert table.loc["high", "crossed_adjusted"]
    assert not table.loc["low", "crossed_adjusted"]
    # After "high" is rejected, "low" holds the whole 0.05 at this look.
    assert table.loc["low", "local_alpha"] == pytest.approx(0.05)
    assert table.loc["low", "boundary_p"] == pytest.approx(
        boundaries([0.46], alpha=0.05, spending="obrien_fleming_type").nominal_p[0])
    assert 1e-4 <= expected
    assert "Interim look 1 of 2" in " ".join(facts["cautions"])


def test_final_look_spends_what_is_left_at_fraction_one():
    out = interim_multiplicity(_plan(), _cut(n_due=93), {"run": {"cut": "final"}}, _hypotheses(0.02, 0.03))
    facts = out["sequential"]
    assert facts["fractions_used"] == [0.5, 1.0]
    expected = boundaries([0.5, 1.0], alpha=0.05, spending="obrien_fleming_type")
    assert frame_of(facts["boundaries"])["boundary_z"].tolist() == pytest.approx(list(expected.z))
    table = frame_of(out["hypotheses"]).set_index("id")
    holm_first = boundaries([0.5, 1.0], alpha=0.025, spending="obrien_fleming_type").nominal_p[1]
    assert table.loc["high", "crossed_adjusted"] == (0.02 <= holm_first)
    assert any("rejected at an earlier look stays rejected" in c for c in facts["cautions"])


def test_unplanned_cut_has_nominal_p_values_and_no_decision():
    out = interim_multiplicity(_plan(), _cut(n_due=30), {"run": {"cut": "dry_run"}}, _hypotheses(1e-6, 1e-6))
    table = out["hypotheses"]
    assert table["columns"] == ["id", "analysis", "arm", "visit", "weight", "p"]
    assert out["sequential"]["planned_look"] is False
    assert "not one of the plan's planned looks" in out["sequential"]["cautions"][0]
    assert "reject" not in str(out).lower()


def test_hypothesis_not_tested_at_interims_keeps_its_alpha_for_the_final():
    plan = _plan(tested_at_interims=["high"])
    interim = interim_multiplicity(plan, _cut(n_due=50), {"run": {"cut": "interim"}}, _hypotheses(0.2, 1e-9))
    table = frame_of(interim["hypotheses"]).set_index("id")
    assert not table.loc["low", "tested"] and not table.loc["low", "crossed_adjusted"]
    final = interim_multiplicity(plan, _cut(n_due=95), {"run": {"cut": "final"}}, _hypotheses(0.2, 0.024))
    table = frame_of(final["hypotheses"]).set_index("id")
    # Spent nothing at the interim: at the final its boundary is its whole local alpha (Holm: 0.025).
    assert table.loc["low", "boundary_p"] == pytest.approx(0.025, abs=1e-9)
    assert table.loc["low", "crossed_adjusted"]


def test_interim_reached_below_the_previous_look_gives_no_decision():
    raw = _plan().model_dump(mode="json")
    raw["multiplicity"]["alpha_spending"]["looks"] = [
        {"cut": "first", "information": 0.3}, {"cut": "second", "information": 0.6}, {"cut": "final", "information": 1}]
    plan = AnalysisPlan.model_validate(raw)
    out = interim_multiplicity(plan, _cut(n_due=25), {"run": {"cut": "second"}}, _hypotheses(1e-9, 1e-9))
    assert out["hypotheses"]["columns"][-1] == "p"
    assert any("not beyond the planned fraction" in c for c in out["sequential"]["cautions"])


def test_without_due_dates_information_counts_observed_participants():
    cut = _cut(n_due=100, judged=False)
    cut.analysis_data().frame.loc[:39, "CHG"] = float("nan")
    out = interim_multiplicity(_plan(), cut, {"run": {"cut": "interim"}}, _hypotheses(0.5, 0.5))
    assert out["sequential"]["information_reached"] == pytest.approx(0.6)
    assert any("no due dates" in c for c in out["sequential"]["cautions"])


def test_calendar_information_is_days_to_the_cut_off_over_planned_days():
    import datetime as dt

    plan = _plan(information_by="calendar", planned_participants=None, calendar_start="2026-01-01",
                 calendar_end="2026-12-27")
    cut = _cut(n_due=10)
    cut.cut_off = SimpleNamespace(date=dt.date(2026, 6, 1))
    out = interim_multiplicity(plan, cut, {"run": {"cut": "interim"}}, _hypotheses(0.5, 0.5))
    assert out["sequential"]["information_reached"] == pytest.approx(151 / 360)
    assert out["sequential"]["fractions_used"] == pytest.approx([151 / 360])
    no_date = _cut(n_due=10)
    out = interim_multiplicity(plan, no_date, {"run": {"cut": "interim"}}, _hypotheses(0.5, 0.5))
    assert out["hypotheses"]["columns"][-1] == "p"     # nothing to measure: no decision
