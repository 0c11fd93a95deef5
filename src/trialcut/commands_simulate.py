"""``trialcut simulate PLAN --scenarios FILE --trials N``: the plan's operating characteristics.

Every input is checked before anything is written (the plan, the scenarios file against it,
the trial count, the registry); the trials then run in batches on the chosen executor, each
finished batch kept in a work folder under the output root so that an interrupted simulation
resumes where it stopped; the summary, its report and the trial outcomes are sealed and
recorded in the registry as a record of kind ``simulation`` that cites the plan's hash.
"""
from __future__ import annotations

import argparse
import json
import shutil
import sys
import time
from pathlib import Path
from typing import Any

from trialcut.errors import InputError, Problem

WORK_FOLDER = ".simulation-work"


def add_simulate_parser(commands) -> None:
    simulate = commands.add_parser("simulate", help="simulate trials under stated scenarios and run the plan on "
                                                    "each: power, type I error, bias, coverage")
    simulate.add_argument("plan", type=Path, nargs="?")
    simulate.add_argument("--scenarios", type=Path, metavar="FILE", help="scenarios file (YAML)")
    simulate.add_argument("--trials", type=int, metavar="N", help="simulated trials per scenario (1 or more)")
    simulate.add_argument("--out", type=Path, default=Path("outputs"), help="output root (default: outputs)")
    simulate.add_argument("--workers", type=int, default=1, help="local worker processes")
    simulate.add_argument("--scheduler", metavar="ADDRESS", help="Dask scheduler address, or 'local'")
    simulate.add_argument("--batch", type=int, default=10, metavar="N", help="trials per task (default 10)")
    simulate.add_argument("--no-pdf", action="store_true", help="leave out the PDF (HTML, CSV and JSON only)")
    simulate.add_argument("--print-schema", action="store_true",
                          help="print the JSON Schema of scenarios files and stop")


def command_simulate(args: argparse.Namespace) -> int:
    from trialcut.plan.scenarios_load import schema_text

    if args.print_schema:
        sys.stdout.write(schema_text())
        return 0
    _check_arguments(args)
    from trialcut.commands import check_registry, console
    from trialcut.plan.load import load_plan
    from trialcut.plan.scenarios_load import load_scenarios

    loaded = load_plan(args.plan)
    scenarios = load_scenarios(args.scenarios, loaded.plan)
    check_registry(args.out)
    started = time.perf_counter()
    summary, outcomes, root_seed = _simulate(args, loaded, scenarios, console)
    recorded = _record(args, loaded, scenarios, summary, outcomes, root_seed, time.perf_counter() - started)
    folder = Path(recorded.folder)
    console.print(f"simulated {args.trials} trials of each of {len(scenarios.scenarios.scenarios)} scenarios "
                  f"in {time.perf_counter() - started:.1f} s")
    console.print(f"registry:   row {recorded.row.seq} (simulation {recorded.row.record_id}); "
                  f"chain head now {recorded.row.row_hash}")
    console.print(f"report:     {folder / 'simulation.html'}")
    return 0


def _check_arguments(args) -> None:
    problems = []
    if args.plan is None:
        problems.append(Problem(code="simulate.no_plan", field="PLAN", message="no plan file given",
                                hint="trialcut simulate PLAN --scenarios FILE --trials N"))
    if args.scenarios is None:
        problems.append(Problem(code="simulate.no_scenarios", field="--scenarios", message="no scenarios file given",
                                hint="see analysis_plans/demo_scenarios.yaml; 'trialcut simulate --print-schema'"))
    if args.trials is None or args.trials < 1:
        problems.append(Problem(code="simulate.trials", field="--trials", message="the number of trials must be 1 or more",
                                expected="a whole number of trials per scenario, 1 or more",
                                got=str(args.trials) if args.trials is not None else "nothing",
                                hint="about 1,000 trials give a Monte Carlo SE of 0.7 points on a 5% rate"))
    for name, value, least in (("--workers", args.workers, 1), ("--batch", args.batch, 1)):
        if value < least:
            problems.append(Problem(code="simulate.count", field=name, message=f"{name} must be {least} or more",
                                    got=str(value)))
    if problems:
        raise InputError("cannot simulate: " + "; ".join(p.message for p in problems), problems)


def _simulate(args, loaded, scenarios, console) -> tuple[dict[str, Any], list[dict[str, Any]], int]:
    from trialcut.commands import _executor
    from trialcut.commands_progress import progress_reporter
    from trialcut.run.simulate import batches, simulate, summarise, work_key

    plan = loaded.plan
    root_seed = scenarios.scenarios.seed if scenarios.scenarios.seed is not None else plan.seed
    work = batches(plan, scenarios.scenarios, args.trials, root_seed, args.batch)
    key = work_key(loaded.canonical_hash, scenarios.canonical_hash, args.trials, root_seed, args.batch)
    work_folder = args.out / WORK_FOLDER / key
    if work_folder.is_dir() and any(work_folder.glob("*.json")):
        console.print(f"resuming from the trials already simulated in {work_folder}")
    executor, close = _executor(args.workers, args.scheduler)
    try:
        round_size = max(4, 2 * max(args.workers, 2 if args.scheduler else 1))
        outcomes = simulate(work, executor, work_folder=work_folder, progress=progress_reporter(console),
                            round_size=round_size)
    except KeyboardInterrupt:
        kept = len(list(work_folder.glob("*.json"))) if work_folder.is_dir() else 0
        raise KeyboardInterrupt(f"nothing was recorded; {kept} finished batch(es) are kept in {work_folder}: "
                                "run the same command again to resume") from None
    finally:
        close()
    return summarise(plan, scenarios.scenarios, outcomes, trials=args.trials, root_seed=root_seed), outcomes, root_seed


def _record(args, loaded, scenarios, summary, outcomes, root_seed, seconds):
    from trialcut import __version__
    from trialcut.record.runfolder import new_run_id
    from trialcut.record.seal import record_folder
    from trialcut.report.simulation_report import render_simulation
    from trialcut.run.simulate import work_key

    plan = loaded.plan
    details = {"plan_file": Path(loaded.path).name, "plan_sha256": loaded.canonical_hash,
               "scenarios_file": Path(scenarios.path).name, "scenarios_sha256": scenarios.canonical_hash,
               "trials_per_scenario": args.trials, "root_seed": root_seed, "tool_version": __version__}
    facts = [("Study", plan.study.id), ("Plan", f"{details['plan_file']} (SHA-256 {loaded.canonical_hash[:16]}…)"),
             ("Scenarios", f"{details['scenarios_file']} (SHA-256 {scenarios.canonical_hash[:16]}…)"),
             ("Trials per scenario", str(args.trials)), ("Root seed", str(root_seed)),
             ("trialcut", __version__)]

    def write(folder: Path, position) -> None:
        body = {"summary": summary, "details": details, "seconds": round(seconds, 1)}
        (folder / "simulation.json").write_text(json.dumps(body, indent=1, allow_nan=False) + "\n", encoding="utf-8")
        (folder / "trials.json").write_text(json.dumps(outcomes, allow_nan=False) + "\n", encoding="utf-8")
        (folder / "inputs").mkdir()
        (folder / "inputs" / details["plan_file"]).write_text(loaded.text, encoding="utf-8")
        (folder / "inputs" / details["scenarios_file"]).write_text(scenarios.text, encoding="utf-8")
        render_simulation(summary, folder, title=f"{plan.study.id}: operating characteristics of the plan",
                          facts=facts + [("Registry row", f"{position.seq}, after {str(position.previous_hash)[:16]}…")],
                          pdf=not args.no_pdf)

    recorded = record_folder(args.out, kind="simulation", study_id=plan.study.id, group="simulations",
                             record_id=new_run_id(), write=write,
                             entry={"cut": "simulations", "details": details})
    key = work_key(loaded.canonical_hash, scenarios.canonical_hash, args.trials, root_seed, args.batch)
    shutil.rmtree(args.out / WORK_FOLDER / key, ignore_errors=True)   # recorded: the batches are no longer needed
    return recorded


# Per scenario: 300 trials in all, "a few hundred" as the demo promises (issue 13), on two worker
# processes (about 20 s on the 2-core machine).  The rejection rates' Monte Carlo SE is then about
# 2 points at 5%: enough to show the report, not to justify a plan (README: about 1,000 trials).
DEMO_TRIALS = 100
DEMO_WORKERS = 2


def demo_simulation(out: Path, plan_path: Path) -> Path:
    """The demo's small simulation of its plan under analysis_plans/demo_scenarios.yaml: the report's path."""
    from trialcut.commands import _repo_file, console
    from trialcut.plan.load import load_plan
    from trialcut.plan.scenarios_load import load_scenarios

    source = _repo_file("analysis_plans/demo_scenarios.yaml")
    scenarios_path = plan_path.parent / source.name
    scenarios_path.write_text(source.read_text(encoding="utf-8"), encoding="utf-8")
    args = argparse.Namespace(plan=plan_path, scenarios=scenarios_path, trials=DEMO_TRIALS, out=out,
                              workers=DEMO_WORKERS, scheduler=None, batch=10, no_pdf=False, print_schema=False)
    loaded = load_plan(plan_path)
    scenarios = load_scenarios(scenarios_path, loaded.plan)
    started = time.perf_counter()
    console.print(f"  simulating {DEMO_TRIALS} trials of each of {len(scenarios.scenarios.scenarios)} scenarios "
                  f"({scenarios_path.name}) to show the plan's operating characteristics")
    summary, outcomes, root_seed = _simulate(args, loaded, scenarios, console)
    recorded = _record(args, loaded, scenarios, summary, outcomes, root_seed, time.perf_counter() - started)
    console.print(f"  simulated in {time.perf_counter() - started:.1f} s")
    return Path(recorded.folder) / "simulation.html"
