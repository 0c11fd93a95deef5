"""The data bad-input case folders, run through the data layer alone (read_cut, then
prepare_cut with the case's plan): each must raise DataError whose rendering contains the
case's message fragment.  tests/test_bad_input_cases.py runs the same folders through the
command line; this file keeps the data layer's half honest without it."""
from __future__ import annotations

import io
from pathlib import Path

import pytest
import yaml

from trialcut.data.prepare import prepare_cut
from trialcut.data.readers import read_cut
from trialcut.errors import DataError
from trialcut.plan.schema import AnalysisPlan

from .build_cases import BASE, base_frame
from trialcut.data.simulate import write_csv

CASES = BASE.parent
DATA_CASES = sorted(p for p in CASES.glob("data_*") if (p / "case.yaml").exists())
# Degenerate data that the data layer accepts: the run goes on and the analyses that cannot
# be fitted are recorded as failed (tests/test_bad_input_cases.py checks them end to end).
REFUSED_CASES = [p for p in DATA_CASES
                 if not yaml.safe_load((p / "case.yaml").read_text(encoding="utf-8")).get("recorded")]


def _plan(path: Path) -> AnalysisPlan:
    return AnalysisPlan.model_validate(yaml.safe_load(path.read_text(encoding="utf-8")))


def _argument(argv: list[str], flag: str, case: Path) -> Path:
    value = argv[argv.index(flag) + 1] if flag else argv[1]
    return Path(value.replace("{case}", str(case)).replace("{base}", str(BASE)))


def test_there_are_at_least_twelve_data_cases():
    assert len(DATA_CASES) >= 12


@pytest.mark.parametrize("case", REFUSED_CASES, ids=[p.name for p in REFUSED_CASES])
def test_data_case_is_refused_with_its_message(case: Path):
    spec = yaml.safe_load((case / "case.yaml").read_text(encoding="utf-8"))
    assert spec["exit"] == 2 and spec["argv"][0] == "run"
    plan = _plan(_argument(spec["argv"], "", case))
    with pytest.raises(DataError) as caught:
        cut = prepare_cut(plan, read_cut(_argument(spec["argv"], "--data", case)))
        # Some checks belong to an endpoint type and run when the runner derives its outcome
        # (counts, response flags): the cut must then be refused before any analysis.
        from trialcut.run.context import RunContext
        from trialcut.run.runner import run_plan

        run_plan(plan, cut, RunContext(root_seed=plan.seed), plan_block={}, data_block={}, run_block={})
    assert caught.value.exit_status == 2
    assert spec["message"].lower() in caught.value.render().lower(), caught.value.render()


def test_base_cut_is_the_simulator_output():
    # The base cut is generated, not hand-edited: regenerating it gives the same bytes.
    buffer = io.StringIO()
    write_csv(base_frame(), buffer)
    assert (BASE / "data.csv").read_text(encoding="utf-8") == buffer.getvalue()


def test_base_cut_passes_the_base_plan():
    cut = prepare_cut(_plan(BASE / "plan.yaml"), read_cut(BASE / "data.csv"))
    assert not cut.conformance.errors
    assert cut.summary()["participants"] == 30
    data = cut.analysis_data("fbs_change", "primary")
    assert len(data.frame) == 30 * 4
