"""The verification case folders (tests/cases/verify_*), checked on a small recorded run.

The shared harness (tests/test_bad_input_cases.py) runs these cases on a full analysis of
the base plan.  This file runs the same case files through the same command line, but on
a run recorded directly with ``record_run``, so the case files and the tamper helper are
checked by the record layer's own tests even while the analysis pipeline changes.
"""
from __future__ import annotations

import shutil
from pathlib import Path

import pytest
import yaml

from trialcut.cli import main
from tests.record.sealing import record_small_run
from tests.record.tamper import TAMPER_ACTIONS, apply_tamper
from tests.test_bad_input_cases import _expand

CASES = Path(__file__).resolve().parents[1] / "cases"
VERIFY_CASES = sorted(CASES.glob("verify_*/case.yaml"))


def test_there_are_at_least_four_verification_cases():
    assert len(VERIFY_CASES) >= 4, VERIFY_CASES


@pytest.mark.parametrize("case_file", VERIFY_CASES, ids=[path.parent.name for path in VERIFY_CASES])
def test_verification_case(case_file: Path, tmp_path: Path, capsys):
    spec = yaml.safe_load(case_file.read_text(encoding="utf-8"))
    assert {"description", "argv", "exit", "message"} <= set(spec), case_file
    work = tmp_path / "case"
    shutil.copytree(case_file.parent, work)
    out = tmp_path / "out"
    tokens = {"case": work, "base": CASES / "_base", "out": out}
    if "setup" in spec:
        assert set(spec["setup"]) <= set(TAMPER_ACTIONS)
        tokens["run"] = record_small_run(out, "r1").folder
        # The untampered run verifies, so the failure below is the tamper's doing.
        assert main(["verify", str(tokens["run"]), "--registry", str(out / "registry.sqlite")]) == 0
        apply_tamper(tokens["run"], out / "registry.sqlite", spec["setup"])
    capsys.readouterr()
    status = main(_expand(spec["argv"], tokens))
    shown = capsys.readouterr().err
    assert status == spec["exit"], shown
    assert spec["message"].lower() in shown.lower(), shown
    assert "Traceback" not in shown


def test_unknown_or_inapplicable_tamper_is_refused(tmp_path):
    folder = record_small_run(tmp_path, "r1").folder
    registry = tmp_path / "registry.sqlite"
    for setup in ({"rename_file": "results.json"}, {"edit_file": "absent.json"},
                  {"add_file": "results.json"}, {"delete_file": "../registry.sqlite"},
                  {"edit_registry_row": "no_such_column"}, {"delete_registry_row": "yes"},
                  {"edit_file": "results.json", "delete_file": "audit.json"}):
        with pytest.raises(ValueError):
            apply_tamper(folder, registry, setup)
