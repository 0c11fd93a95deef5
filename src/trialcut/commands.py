"""One function per command of the command line; each returns an exit status.

These functions are the only place that joins the layers: load and check the plan, read
and check the cut, run, render and record.  They print to the console with rich.
"""
from __future__ import annotations

import json
import shutil
import sys
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from rich.console import Console

from trialcut import __version__
from trialcut.errors import InputError, Problem

console = Console(highlight=False, soft_wrap=True)


# --------------------------------------------------------------------------- plan commands
def command_check(args) -> int:
    from trialcut.plan.load import load_plan

    loaded = load_plan(args.plan)
    plan = loaded.plan
    console.print(f"[green]ok[/green] {args.plan}: plan {plan.version} of study {plan.study.id}")
    console.print(f"  canonical hash {loaded.canonical_hash}")
    console.print(f"  lock: {_lock_line(loaded)}")
    for endpoint in plan.endpoints:
        names = [endpoint.analyses.primary.id] + [a.id for a in endpoint.analyses.sensitivity]
        console.print(f"  endpoint {endpoint.id}: {len(names)} analyses ({', '.join(names)})")
    return 0


def _lock_line(loaded) -> str:
    from trialcut.errors import LockError
    from trialcut.plan.lock import check_lock

    try:
        summary = check_lock(loaded).summary()
    except LockError as error:
        return f"not usable for a locked run — {error}"
    return (f"locked at {summary['locked_utc']} by {summary['locked_by']} ({summary['reason']}); "
            f"{len(summary['amendments'])} lock record(s)")


def command_schema(args) -> int:
    from trialcut.plan.schema import json_schema

    sys.stdout.write(json.dumps(json_schema(), indent=2, sort_keys=True) + "\n")
    return 0


def command_lock(args) -> int:
    from trialcut.plan.load import load_plan
    from trialcut.plan.lock import lock_plan

    loaded = load_plan(args.plan)
    record = lock_plan(loaded, by=args.by, reason=args.reason)
    console.print(f"[green]locked[/green] {args.plan} as {_short(record.plan_sha256)} "
                  f"by {args.by} ({record.locked_utc})")
    return 0


# --------------------------------------------------------------------------- run
def command_run(args) -> int:
    started = _utc_now()
    run_folder, report = execute_run(
        plan_path=args.plan, data_path=args.data, cut_label=args.cut, out_root=args.out,
        unlocked=args.unlocked, dummy_arms_seed=args.dummy_arms, workers=args.workers,
        scheduler=args.scheduler, command_line=["trialcut", *sys.argv[1:]], started=started,
        cut_off=args.cut_off,
    )
    console.print(f"run folder: {run_folder}")
    console.print(f"report:     {report}")
    return 0


def execute_run(*, plan_path: Path, data_path: Path, cut_label: str, out_root: Path, unlocked: bool = False,
                dummy_arms_seed: int | None = None, workers: int = 1, scheduler: str | None = None,
                command_line: list[str] | None = None, started: str | None = None,
                cut_off=None) -> tuple[Path, Path]:
    """Load, check, run, render and record one data cut. Returns (run folder, report.html)."""
    from trialcut.data.prepare import prepare_cut
    from trialcut.data.readers import read_cut
    from trialcut.plan.load import load_plan
    from trialcut.record.environment import capture_environment
    from trialcut.record.runfolder import new_run_id
    from trialcut.run.context import RunContext
    from trialcut.run.runner import StepTimer, participant_hashes, run_plan

    started = started or _utc_now()
    timer = StepTimer()
    with timer.time("load plan"):
        loaded = load_plan(plan_path)
        lock = _lock_state(loaded, unlocked)
    plan = loaded.plan
    with timer.time("read data"):
        raw = read_cut(data_path)
    with timer.time("check and derive data"):
        cut = prepare_cut(plan, raw, dummy_arms_seed=dummy_arms_seed, cut_off=cut_off)
    run_id = new_run_id()
    run_block = {
        "id": run_id, "study_id": plan.study.id, "cut": cut_label, "started_utc": started,
        "finished_utc": None, "tool_version": __version__, "unlocked": lock["status"] != "locked",
        "dummy_arms_seed": dummy_arms_seed, "seed": plan.seed, "cut_off": cut.summary()["cut_off"]["date"],
    }
    executor, close_executor = _executor(workers, scheduler)
    try:
        with timer.time("analyses"):
            context = RunContext(root_seed=plan.seed, executor=executor, progress=_progress_printer())
            results = run_plan(
                plan, cut, context, timer=timer, run_block=run_block,
                plan_block=_plan_block(loaded, lock),
                data_block=cut.summary() | {
                    "participant_hashes": participant_hashes(raw.frame, plan.columns.subject),
                },
            )
    finally:
        close_executor()
    results["run"]["finished_utc"] = _utc_now()
    audit = {
        "command_line": command_line or [], "started_utc": started, "finished_utc": results["run"]["finished_utc"],
        "run_id": run_id, "environment": capture_environment(), "seeds": {"root": plan.seed,
                                                                           "dummy_arms": dummy_arms_seed},
        "executor": {"workers": workers, "scheduler": scheduler}, "cut_off": cut.summary()["cut_off"],
        "lock": lock, "warnings": results["warnings"], "steps": timer.steps,
        "plan_problems": [], "conformance_problems": [c for c in results["conformance"].get("checks", [])
                                                      if c.get("status") == "failed"],
    }
    folder = _record(out_root, plan, cut_label, run_id, results, audit, loaded, raw, cut)
    return folder, folder / "report.html"


def _lock_state(loaded, unlocked: bool) -> dict[str, Any]:
    from trialcut.errors import LockError
    from trialcut.plan.lock import check_lock

    try:
        status = check_lock(loaded)
    except LockError as error:
        if not unlocked:
            raise
        return {"status": "unlocked", "reason": str(error), "record": None, "chain": []}
    summary = status.summary()
    return {"status": "locked", "reason": None, "record": summary, "chain": summary["amendments"]}


def _plan_block(loaded, lock: dict[str, Any]) -> dict[str, Any]:
    plan = loaded.plan
    dumped = plan.model_dump(mode="json")
    return {
        "file": Path(loaded.path).name, "sha256": loaded.canonical_hash, "version": plan.version,
        "lock_status": lock["status"], "lock": lock["record"], "lock_chain": lock["chain"],
        "canonical": dumped,
        **{key: dumped[key] for key in ("study", "columns", "arms", "visits", "populations",
                                        "intercurrent_events", "estimands", "multiplicity", "report")},
    }


def _record(out_root: Path, plan, cut_label, run_id, results, audit, loaded, raw, cut) -> Path:
    from trialcut.record.registry import record_run
    from trialcut.record.analysis_data import write_analysis_data
    from trialcut.report import render_documents
    from trialcut.run.runner import analysis_datasets

    datasets = analysis_datasets(plan, cut)

    def write(folder: Path) -> None:
        _write_json(folder / "results.json", results)
        (folder / "plan").mkdir()
        (folder / "plan" / Path(loaded.path).name).write_text(loaded.text, encoding="utf-8")
        lock_file = Path(str(loaded.path) + ".lock.json")
        if lock_file.exists():
            shutil.copyfile(lock_file, folder / "plan" / lock_file.name)
        _write_json(folder / "data_manifest.json", {k: v for k, v in results["data"].items()
                                                      if k != "participant_hashes"})
        _write_json(folder / "conformance.json", results["conformance"])
        write_analysis_data(folder, datasets, study_id=plan.study.id, created=results["run"]["started_utc"])
        started = time.perf_counter()
        render_documents(results, folder, audit=audit)
        audit["steps"].append({"step": "render documents", "seconds": round(time.perf_counter() - started, 4)})
        _write_json(folder / "audit.json", audit)

    entry = {
        "plan_sha256": loaded.canonical_hash, "lock_status": results["plan"]["lock_status"],
        "dummy_arms": results["run"]["dummy_arms_seed"] is not None, "data_sha256": raw.manifest["sha256"],
        "created_utc": results["run"]["started_utc"],
    }
    recorded = record_run(out_root, out_root / "registry.sqlite", plan.study.id, cut_label, run_id, write, entry)
    return Path(recorded.folder)


def _executor(workers: int, scheduler: str | None):
    """The executor the command line asks for, and how to close it."""
    from trialcut.run.executor import make_executor

    if scheduler is not None:
        # A local cluster gets at least two workers; --workers raises that.
        made = make_executor("dask", workers=max(workers, 2), address=None if scheduler == "local" else scheduler)
        # Import the imputation code on every worker now, not inside the first timed batch.
        made.preload("trialcut.stats.imputation", "trialcut.stats.tipping")
    elif workers > 1:
        made = make_executor("processes", workers=workers)
    else:
        made = make_executor("inline")
    return made, getattr(made, "close", lambda: None)


def _progress_printer():
    """A rich progress bar for long analyses (imputations); silent when not a terminal."""
    if not console.is_terminal:
        return None
    from rich.progress import Progress

    progress = Progress(transient=True, console=console)
    tasks: dict[str, Any] = {}

    def report(label: str, done: int, total: int) -> None:
        if label not in tasks:
            progress.start()
            tasks[label] = progress.add_task(label, total=total)
        progress.update(tasks[label], completed=done)
        if done >= total:
            progress.remove_task(tasks.pop(label))
            if not tasks:
                progress.stop()

    return report


# --------------------------------------------------------------------------- registry commands
def command_history(args) -> int:
    from rich.table import Table

    from trialcut.record.registry import list_runs

    registry = args.out / "registry.sqlite"
    if not registry.exists():
        raise InputError(f"no registry at {registry}", [Problem(
            code="record.no_registry", message="no runs have been recorded under this output root",
            file=str(registry), hint="run 'trialcut run' first, or pass --out with the right folder")])
    rows = list_runs(registry, study=args.study, cut=args.cut)
    table = Table(title=f"Runs recorded in {registry}")
    for name in ("#", "run", "study", "cut", "created (UTC)", "plan", "lock", "dummy arms", "data"):
        table.add_column(name)
    for row in rows:
        table.add_row(str(row.seq), row.run_id, row.study_id, row.cut, row.created_utc, _short(row.plan_sha256),
                      row.lock_status, "yes" if row.dummy_arms else "no", _short(row.data_sha256))
    console.print(table)
    return 0


def command_verify(args) -> int:
    from trialcut.record.verify import verify_all, verify_run

    registry = args.registry or args.out / "registry.sqlite"
    if args.run_folder is not None:
        # An explicit --registry must exist; the default one may be absent (chain not checked).
        use = registry if args.registry is not None or registry.exists() else None
        report = verify_run(args.run_folder, registry_path=use)
    else:
        report = verify_all(args.out, registry)
    console.print(f"[green]verified[/green] {report.summary}")
    return 0


def command_render(args) -> int:
    from trialcut.report import render_run

    target = args.to or _fresh_sibling(args.run_folder, "rendered")
    files = render_run(args.run_folder, out=target)
    console.print(f"rendered {args.run_folder} into {target}")
    for name, path in sorted(files.items()):
        console.print(f"  {name}: {path}")
    return 0


def command_compare(args) -> int:
    out = args.to or _fresh_sibling(args.run_b.parent.parent.parent / "comparisons",
                                    f"{args.run_a.name}-vs-{args.run_b.name}")
    files = compare_runs(args.run_a, args.run_b, out)
    console.print(f"comparison: {files.get('comparison.html', out)}")
    return 0


def compare_runs(run_a: Path, run_b: Path, out: Path) -> dict[str, Path]:
    from trialcut.report import render_comparison

    results_a, results_b = _read_results(run_a), _read_results(run_b)
    return render_comparison(results_a, results_b, out)


def _read_results(run_folder: Path) -> dict[str, Any]:
    path = run_folder / "results.json"
    if not path.is_file():
        raise InputError(f"{run_folder} is not a run folder", [Problem(
            code="record.not_a_run", message="no results.json in this folder", file=str(path),
            hint="pass a folder made by 'trialcut run' (see 'trialcut history')")])
    return json.loads(path.read_text(encoding="utf-8"))


# --------------------------------------------------------------------------- demo
def command_demo(args) -> int:
    from trialcut.data.simulate import demo_cut_offs, demo_cuts, write_csv
    from trialcut.plan.load import load_plan
    from trialcut.plan.lock import check_lock, lock_plan

    out = args.out
    data_dir = out / "demo" / "data"
    plan_dir = out / "demo" / "plan"
    data_dir.mkdir(parents=True, exist_ok=True)
    plan_dir.mkdir(parents=True, exist_ok=True)
    console.print("[bold]trialcut demo[/bold]: an invented trial (study LVT-201), two data cuts")
    cuts = demo_cuts(seed=args.seed)
    paths = {}
    for label, frame in cuts.items():
        paths[label] = data_dir / f"{label}.csv"
        write_csv(frame, paths[label])
        console.print(f"  wrote {paths[label]} ({len(frame)} records)")
    plan_path = plan_dir / "demo.yaml"
    source = _repo_file("analysis_plans/demo.yaml")
    if not plan_path.exists() or plan_path.read_text() != source.read_text():
        plan_path.write_text(source.read_text(encoding="utf-8"), encoding="utf-8")
    loaded = load_plan(plan_path)
    try:
        check_lock(loaded)
    except InputError:
        lock_plan(loaded, by="demo", reason="demo: plan frozen before the first data cut")
    console.print(f"  locked plan {plan_path}")
    folders = {}
    for label in ("interim", "final"):
        started = time.perf_counter()
        folders[label], _ = execute_run(plan_path=plan_path, data_path=paths[label], cut_label=label,
                                        out_root=out, command_line=["trialcut", "demo"],
                                        cut_off=demo_cut_offs()[label])
        console.print(f"  ran the {label} cut in {time.perf_counter() - started:.1f} s")
    comparison = compare_runs(folders["interim"], folders["final"],
                              _fresh_sibling(out / "LVT-201" / "comparisons", "interim-vs-final"))
    console.print("\n[bold]Reports[/bold]")
    for label, folder in folders.items():
        console.print(f"  {label:8s} report:  {folder / 'report.html'}")
        console.print(f"  {label:8s} PDF:     {folder / 'report.pdf'}")
        console.print(f"  {label:8s} results: {folder / 'results.json'}")
    console.print(f"  comparison:       {comparison.get('comparison.html')}")
    console.print(f"  comparison PDF:   {comparison.get('comparison.pdf')}")
    return 0


# --------------------------------------------------------------------------- helpers
def _repo_file(relative: str) -> Path:
    here = Path(__file__).resolve()
    for parent in here.parents:
        candidate = parent / relative
        if candidate.exists():
            return candidate
    raise InputError(f"cannot find {relative}", [Problem(code="install.missing_file",
                                                         message=f"{relative} is not installed",
                                                         hint="run trialcut from a checkout of the project")])


def _fresh_sibling(parent: Path, name: str) -> Path:
    """A folder name that does not exist yet (never overwrite earlier output)."""
    candidate = parent / name
    n = 2
    while candidate.exists():
        candidate = parent / f"{name}-{n}"
        n += 1
    return candidate


def _write_json(path: Path, data: Any) -> None:
    path.write_text(json.dumps(data, indent=1, sort_keys=False, ensure_ascii=False, allow_nan=False) + "\n",
                    encoding="utf-8")


def _utc_now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _short(hash_text: str | None) -> str:
    return (hash_text or "")[:12]
