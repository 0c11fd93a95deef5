"""`trialcut simulate` end to end: a sealed, verifiable record citing the plan, and its schema."""
import json
from pathlib import Path

import yaml

from trialcut.cli import main
from trialcut.plan.load import load_plan

PLAN = Path(__file__).resolve().parents[1] / "run" / "simulation" / "two_arm_plan.yaml"
VISITS = ("Visit 1", "Visit 2", "Visit 3", "Visit 4")


def _scenarios(path: Path) -> Path:
    changes = {v: -1.0 * (i + 1) for i, v in enumerate(VISITS)}
    scenario = {"id": "small", "participants_per_arm": {"Control": 10, "Active": 10},
                "baseline": {"mean": 20, "sd": 5}, "mean_change": {"Control": changes, "Active": changes},
                "sd": {v: 3.0 for v in VISITS}, "correlation": {"exchangeable": 0.5},
                "analyses": ["last_visit_completers"]}
    path.write_text(yaml.safe_dump({"format": 1, "seed": 1, "scenarios": [scenario]}, sort_keys=False))
    return path


def test_simulate_seals_a_record_that_verify_accepts(tmp_path, capsys):
    out = tmp_path / "out"
    scenarios = _scenarios(tmp_path / "scenarios.yaml")
    assert main(["simulate", str(PLAN), "--scenarios", str(scenarios), "--trials", "3", "--batch", "2",
                 "--out", str(out), "--no-pdf"]) == 0
    (folder,) = (out / "SIM-CHECK" / "simulations").iterdir()
    record = json.loads((folder / "record.json").read_text())
    assert record["kind"] == "simulation"
    assert record["details"]["plan_sha256"] == load_plan(PLAN).canonical_hash
    summary = json.loads((folder / "simulation.json").read_text())["summary"]
    assert {r["analysis"] for r in summary["analyses"]} == {"repeated", "last_visit_completers"}
    assert all(r["trials"] == 3 for r in summary["analyses"])
    assert (folder / "simulation.html").is_file() and (folder / "figures" / "power.svg").is_file()
    assert not any((out / ".simulation-work").iterdir())       # the finished batches are gone once sealed
    capsys.readouterr()
    assert main(["verify", "--out", str(out)]) == 0


def test_print_schema_gives_the_scenarios_json_schema(capsys):
    assert main(["simulate", "--print-schema"]) == 0
    schema = json.loads(capsys.readouterr().out)
    assert {"format", "scenarios"} <= set(schema["properties"])
