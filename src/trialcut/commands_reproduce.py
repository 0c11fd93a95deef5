"""`trialcut reproduce RUN`: run a recorded run again, from its own folder (plan copy and lock
chain) and its data (found by path and SHA-256, or taken from a bundle), in the current
environment; compare every number and name every package whose version differs.

The new run is made in a temporary folder and not recorded: a reproduction is a check.
"""
from __future__ import annotations

import json
import shutil
import tempfile
import zipfile
from datetime import date
from pathlib import Path

from trialcut.errors import InputError, Problem, VerificationFailed

MAX_SHOWN = 20


def add_reproduce_parser(commands) -> None:
    from trialcut.record.reproduce import DEFAULT_TOLERANCE

    reproduce = commands.add_parser(
        "reproduce", help="run a recorded run (folder or bundle) again here and compare every number")
    reproduce.add_argument("run", type=Path, help="a run folder, or a handover bundle (.zip)")
    reproduce.add_argument("--data", type=Path, metavar="FILE",
                           help="the data cut, if not where the run read it and not in the bundle")
    reproduce.add_argument("--tolerance", type=float, default=DEFAULT_TOLERANCE,
                           help=f"relative tolerance for 'agrees within tolerance' (default {DEFAULT_TOLERANCE:g})")
    reproduce.add_argument("--keyring", type=Path, metavar="FILE", help="keyring for checking a bundle's signatures")
    reproduce.add_argument("--registry", type=Path, help="registry file (default: the run's output root's)")
    reproduce.add_argument("--to", type=Path, metavar="FILE", help="also write the comparison as JSON to this new file")


def command_reproduce(args) -> int:
    from trialcut.commands import console

    if args.to is not None and args.to.exists():
        raise InputError(f"{args.to} already exists", [Problem(
            code="reproduce.output_exists", file=str(args.to), message="the comparison is never written over a file",
            hint="pass a new file name with --to")])
    with tempfile.TemporaryDirectory(prefix="trialcut-reproduce-") as scratch:
        run_folder, data = _sources(args, Path(scratch))
        console.print(f"reproducing run {run_folder.name} from {args.run} with data {data}", markup=False)
        outcome = reproduce_run(run_folder, data, Path(scratch), args.tolerance)
    console.print(f"reproduction: {outcome.verdict}: {outcome.summary}", markup=False)
    for package in outcome.packages:
        console.print(f"  package {package['package']}: {package['original']} then, {package['now']} now", markup=False)
    for note in outcome.notes:
        console.print(f"  set aside: {note}", markup=False)
    if args.to is not None:
        args.to.write_text(json.dumps(outcome.to_dict(), indent=1, ensure_ascii=False, default=str) + "\n",
                           encoding="utf-8")
        console.print(f"  details: {args.to}", markup=False)
    if outcome.differences:
        raise VerificationFailed(f"the run does not reproduce: {outcome.summary}", [
            Problem(code="reproduce.difference", field=item.where, message=item.kind,
                    expected=repr(item.original), got=repr(item.again))
            for item in outcome.differences[:MAX_SHOWN]])
    return 0


def _sources(args, scratch: Path) -> tuple[Path, Path]:
    """The verified run folder and its data cut (checked by SHA-256), before any work is done."""
    from trialcut.commands import verified_input
    from trialcut.commands_bundle import data_file_of

    if Path(args.run).is_file():
        return _bundle_sources(args, scratch)
    verified_input(args.run, args.registry, "reproduce")
    return Path(args.run), data_file_of(args.run, args.data)


def _bundle_sources(args, scratch: Path) -> tuple[Path, Path]:
    from trialcut.commands_bundle import data_file_of
    from trialcut.record.bundle import verify_bundle

    verify_bundle(args.run, keyring_file=args.keyring)
    with zipfile.ZipFile(args.run) as archive:
        archive.extractall(scratch / "bundle")
    (top,) = (scratch / "bundle").iterdir()
    facts = json.loads((top / "bundle.json").read_text(encoding="utf-8"))
    run_folder = top / "run" / facts["run"]["record_id"]
    included = (facts.get("data") or {}).get("included")
    if included and args.data is None:
        return run_folder, top / included
    return run_folder, data_file_of(run_folder, args.data)


def reproduce_run(run_folder: Path, data: Path, scratch: Path, tolerance: float):
    from trialcut.commands import execute_run
    from trialcut.record.pinned import installed_distributions
    from trialcut.record.reproduce import (ReproductionOutcome, compare_results, package_differences,
                                           set_aside_by_format)

    results = json.loads((run_folder / "results.json").read_text(encoding="utf-8"))
    audit = json.loads((run_folder / "audit.json").read_text(encoding="utf-8"))
    plan_folder = scratch / "plan"
    shutil.copytree(run_folder / "plan", plan_folder)
    run = results["run"]
    cut_off = (results.get("data") or {}).get("cut_off") or {}
    folder = execute_run(
        plan_path=plan_folder / Path(results["plan"]["file"]).name, data_path=data, cut_label=run["cut"],
        out_root=scratch / "out", unlocked=bool(run.get("unlocked")), dummy_arms_seed=run.get("dummy_arms_seed"),
        command_line=["trialcut", "reproduce", run["id"]],
        cut_off=date.fromisoformat(cut_off["date"]) if cut_off.get("source") == "given" else None,
        looks_before=run.get("earlier_looks") or []).folder   # the fractions the run used, not the scratch registry's
    again = json.loads((folder / "results.json").read_text(encoding="utf-8"))
    results, notes = set_aside_by_format(results, again)
    numbers, exact, within, differences = compare_results(results, again, tolerance)
    environment = audit.get("environment") or {}
    then = environment.get("distributions") or environment.get("packages") or {}
    now = installed_distributions()
    if "distributions" not in environment:   # an older record names a few packages only
        now = {name: version for name, version in now.items() if name in then}
    return ReproductionOutcome(tolerance=tolerance, numbers=numbers, exact=exact, within=within,
                               differences=tuple(differences),
                               packages=tuple(package_differences(then, now)), notes=tuple(notes))
