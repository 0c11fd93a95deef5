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
from typing import Any, Mapping, NamedTuple

from rich.console import Console

from trialcut import __version__
from trialcut.errors import InputError, Problem

console = Console(highlight=False, soft_wrap=True)


# --------------------------------------------------------------------------- plan commands
def command_check(args) -> int:
    from trialcut.plan.load import load_plan

    loaded = load_plan(args.plan)
    plan = loaded.plan
    check_names(plan)
    line, lock_error = _lock_line(loaded)
    # 'ok' only when a run would go ahead: a plan that reads but whose lock would stop the run
    # must not open with a word a reader takes for a pass.
    verdict = "[green]ok[/green]" if lock_error is None else "[red]not runnable as locked[/red]"
    console.print(f"{verdict} {args.plan}: plan {plan.version} of study {plan.study.id}")
    console.print(f"  canonical hash {loaded.canonical_hash}")
    console.print(f"  lock: {line}")
    for endpoint in plan.endpoints:
        names = [endpoint.analyses.primary.id] + [a.id for a in endpoint.analyses.sensitivity]
        console.print(f"  endpoint {endpoint.id}: {len(names)} analyses ({', '.join(names)})")
    _print_estimand_findings(loaded)
    if lock_error is not None:
        # The plan reads, but 'run' would refuse it: exit as 'run' would, and say why on stderr.
        print(f"error: {lock_error.render()}", file=sys.stderr)
        return lock_error.exit_status
    return 0


def _print_estimand_findings(loaded) -> None:
    """Roles and estimand guard-rails: warnings with their place in the plan (the run records them too)."""
    from rich.markup import escape

    from trialcut.plan.estimand_checks import findings

    for finding in findings(loaded.plan):
        field, position = finding.field, None
        while field and position is None:   # the nearest key the plan spells out
            position = loaded.position(field)
            field = field.rsplit(".", 1)[0] if "." in field else ""
        place = f"{loaded.path}:{position[0]}:{position[1]}" if position else str(loaded.path)
        console.print(f"  [yellow]warning[/yellow] {escape(f'{place} {finding.field}: {finding.message}')}",
                      soft_wrap=True)


def _lock_line(loaded):
    """The lock line of 'check', and the lock error that would stop a locked run (None when a
    locked run can go ahead, or when the plan is simply not locked yet)."""
    from trialcut.errors import LockError
    from trialcut.plan.lock import check_lock

    try:
        summary = check_lock(loaded).summary()
    except LockError as error:
        if [p.code for p in error.problems] == ["lock.missing"]:
            return "not locked yet: lock it ('trialcut lock') before a locked run", None
        return f"not usable for a locked run — {error}", error
    return (f"locked at {summary['locked_utc']} by {summary['locked_by']} ({summary['reason']}); "
            f"{len(summary['amendments'])} lock record(s)"), None


def check_names(plan, cut_label: str | None = None, out_root: Path | None = None) -> None:
    """Refuse, before any data is read, every name that would stop the run at its end: the
    study id and the cut label become folder names; the output root must be a writable folder."""
    from trialcut.record.runfolder import safe_folder_name

    safe_folder_name(plan.study.id, "study id")
    if cut_label is not None:
        safe_folder_name(cut_label, "cut")
    if out_root is not None:
        _check_out_root(Path(out_root))


def _check_out_root(out_root: Path) -> None:
    import os

    existing = out_root
    while not existing.exists() and existing != existing.parent:
        existing = existing.parent
    problem = None
    if existing.exists() and not existing.is_dir():
        problem = ("is a file, not a folder" if existing == out_root else f"lies under the file {existing}")
    elif existing.exists() and not os.access(existing, os.W_OK | os.X_OK):
        problem = f"cannot be written ({existing} is not writable)"
    if problem:
        raise InputError(f"the output root {out_root} {problem}", [Problem(
            code="run.bad_output_root", message=f"the output root {problem}", file=str(out_root), field="--out",
            expected="a folder trialcut may create and write to", hint="pass --out with another folder")])


def command_schema(args) -> int:
    from trialcut.plan.schema import json_schema

    sys.stdout.write(json.dumps(json_schema(), indent=2, sort_keys=True) + "\n")
    return 0


def command_lock(args) -> int:
    from trialcut.plan.load import load_plan
    from trialcut.plan.lock import lock_plan

    loaded = load_plan(args.plan)
    check_names(loaded.plan)
    from trialcut.commands_key import lock_signer

    record = lock_plan(loaded, by=args.by, reason=args.reason, sign=lock_signer(args))
    console.print(f"[green]locked[/green] {args.plan} as {_short(record.plan_sha256)} "
                  f"by {record.by} ({record.locked_utc})")
    if record.signature:
        console.print(f"  signed by {record.signature['key']} ({record.signature['fingerprint']})")
    else:
        console.print("  unsigned: fine for a rehearsal; sign with --sign KEY before a run that counts")
    return 0


# --------------------------------------------------------------------------- run
def command_run(args) -> int:
    started = _utc_now()
    recorded = execute_run(
        plan_path=args.plan, data_path=args.data, cut_label=args.cut, out_root=args.out,
        unlocked=args.unlocked, dummy_arms_seed=args.dummy_arms, workers=args.workers,
        scheduler=args.scheduler, command_line=["trialcut", *sys.argv[1:]], started=started,
        cut_off=args.cut_off,
    )
    console.print(f"run folder: {recorded.folder}")
    console.print(f"report:     {recorded.report}")
    return _say_primary_failures(recorded.failed_primaries)


PRIMARY_FAILED = 4      # README: the run is recorded, but a primary analysis failed


class RecordedRun(NamedTuple):
    folder: Path
    report: Path
    failed_primaries: tuple[tuple[str, str, str], ...]   # (endpoint id, analysis id, first line of its error)


def _failed_primaries(results: Mapping[str, Any]) -> tuple[tuple[str, str, str], ...]:
    """The primary analyses the results (as recorded) mark as failed, with their reasons."""
    return tuple((endpoint["id"], analysis["id"], (analysis.get("error") or "no reason recorded").splitlines()[0])
                 for endpoint in results.get("endpoints", []) for analysis in endpoint.get("analyses", [])
                 if analysis.get("role") == "primary" and analysis.get("status") == "failed")


def _say_primary_failures(failed: tuple[tuple[str, str, str], ...]) -> int:
    """Say on the console which primary analyses failed; exit 4 if any did."""
    for endpoint_id, analysis_id, reason in failed:
        print(f"primary analysis failed: {analysis_id} of endpoint {endpoint_id}: {reason}", file=sys.stderr)
    if failed:
        print("the run is recorded with the failure (see the report); its primary results are missing",
              file=sys.stderr)
        return PRIMARY_FAILED
    return 0


def execute_run(*, plan_path: Path, data_path: Path, cut_label: str, out_root: Path, unlocked: bool = False,
                dummy_arms_seed: int | None = None, workers: int = 1, scheduler: str | None = None,
                command_line: list[str] | None = None, started: str | None = None,
                cut_off=None, looks_before: list[dict[str, Any]] | None = None) -> RecordedRun:
    """Load, check, run, render and record one data cut: its folder, report.html and failed primaries.

    ``looks_before``: the earlier looks' fractions reached as a run recorded them (a reproduction
    passes its run's own); by default they are read from the registry under ``out_root``.
    """
    from trialcut.data.prepare import prepare_cut
    from trialcut.data.readers import read_cut
    from trialcut.plan.load import load_plan
    from trialcut.record.environment import capture_environment
    from trialcut.record.runfolder import new_run_id
    from trialcut.run.context import RunContext
    from trialcut.run.participant_records import participant_records
    from trialcut.record.participants import participant_hashes
    from trialcut.commands_progress import LoggedStepTimer
    from trialcut.run.runner import run_plan

    started = started or _utc_now()
    timer = LoggedStepTimer(console)   # also says each step in a batch log
    with timer.time("load plan"):
        loaded = load_plan(plan_path)
        lock = _lock_state(loaded, unlocked)
        from trialcut.record.amendments import flag_lock_state

        lock = flag_lock_state(lock, out_root, loaded.plan.study.id)
    plan = loaded.plan
    check_names(plan, cut_label, out_root)
    check_registry(out_root)   # a locked or unwritable registry is said now, not after the analysis
    if scheduler is not None:
        _check_scheduler(scheduler)
    with timer.time("read data"):
        raw = read_cut(data_path)
    with timer.time("check and derive data"):
        cut = prepare_cut(plan, raw, dummy_arms_seed=dummy_arms_seed, cut_off=cut_off)
    plan, raw = cut.plan, cut.blinded_raw(raw)   # a dry run names the dummy arms only, from here on
    run_id = new_run_id()
    run_block = {
        "id": run_id, "study_id": plan.study.id, "cut": cut_label, "started_utc": started,
        "finished_utc": None, "tool_version": __version__, "unlocked": lock["status"] != "locked",
        "dummy_arms_seed": dummy_arms_seed, "seed": plan.seed, "cut_off": cut.summary()["cut_off"]["date"],
        "earlier_looks": (looks_before if looks_before is not None
                          else earlier_looks(out_root / "registry.sqlite", plan, cut_label)),
    }
    executor, close_executor = _executor(workers, scheduler)
    datasets: list = []   # each endpoint's analysis dataset, made where the endpoint ran
    try:
        with timer.time("analyses"):
            context = RunContext(root_seed=plan.seed, executor=executor, progress=_progress_printer())
            results = run_plan(
                plan, cut, context, timer=timer, run_block=run_block, datasets=datasets,
                plan_block=cut.blind(_plan_block(loaded, lock)),
                data_block=cut.summary() | {
                    "participant_hashes": participant_hashes(raw.frame, plan.columns.subject),
                    # What changed, for a later comparison: new visits, edited values, removed records.
                    "participant_records": participant_records(raw.frame, plan.columns),
                },
            )
    finally:
        close_executor()
    results["run"]["finished_utc"] = _utc_now()
    audit = {
        "command_line": command_line or [], "started_utc": started, "finished_utc": results["run"]["finished_utc"],
        "run_id": run_id, "environment": capture_environment(), "seeds": {"root": plan.seed,
                                                                           "dummy_arms": dummy_arms_seed},
        "executor": {"workers": workers, "scheduler": scheduler, "endpoint_processes": timer.endpoint_processes},
        "cut_off": cut.summary()["cut_off"],
        "lock": cut.blind(lock), "warnings": results["warnings"], "steps": timer.steps,
        "plan_problems": [], "conformance_problems": [c for c in results["conformance"].get("checks", [])
                                                      if c.get("status") == "failed"],
    }
    folder = _record(out_root, plan, cut_label, run_id, results, audit, loaded, raw, cut, datasets)
    # From the results just sealed (the same object written as results.json), not a second read of it.
    return RecordedRun(folder, folder / "report.html", _failed_primaries(results))


DRY_RUN_PLAN_NOTE = (
    "This is a blinded dry run with dummy arms. The plan file and its lock record name the real arms, so\n"
    "they are not copied here; results.json identifies the plan by its SHA-256 (plan.sha256) and shows it\n"
    "with every arm code and label replaced by its dummy name.\n")


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


def _record(out_root: Path, plan, cut_label, run_id, results, audit, loaded, raw, cut, datasets) -> Path:
    from trialcut.record.seal import record_run
    from trialcut.record.analysis_data import write_analysis_data
    from trialcut.report import render_documents

    def write(folder: Path, position) -> None:
        # The report prints the registry row it will take and the chain head it follows:
        # an anchor outside the registry file (README: what verify can and cannot detect).
        audit["registry_seq"], audit["registry_follows"] = position.seq, position.previous_hash
        _write_json(folder / "results.json", results, indent=None)
        (folder / "plan").mkdir()
        if cut.blinding is not None:   # the plan and its lock name the real arms: a dry run leaves them out
            (folder / "plan" / "LEFT_OUT.txt").write_text(DRY_RUN_PLAN_NOTE, encoding="utf-8")
        else:
            (folder / "plan" / Path(loaded.path).name).write_text(loaded.text, encoding="utf-8")
            lock_file = Path(str(loaded.path) + ".lock.json")
            if lock_file.exists():
                shutil.copyfile(lock_file, folder / "plan" / lock_file.name)
        _write_json(folder / "data_manifest.json", {k: v for k, v in results["data"].items()
                                                      if k not in ("participant_hashes", "participant_records")})
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
    recorded = record_run(out_root, out_root / "registry.sqlite", plan.study.id, cut_label, run_id, write, entry,
                          on_wait=_registry_wait_printer(out_root / "registry.sqlite"))
    _print_chain_head(recorded.row)
    return Path(recorded.folder)


def earlier_looks(registry: Path, plan, cut_label: str) -> list[dict[str, Any]]:
    """The information fraction each earlier planned look reached, read from its latest recorded run.

    A later look recomputes its boundaries with these fractions, so that it and the interim
    report agree about the same look; a look with no run in the registry is left out (the run
    then uses its planned fraction and says so).
    """
    from trialcut.record.registry import list_runs

    spending = getattr(plan.multiplicity, "alpha_spending", None)
    looks = [str(look.cut) for look in spending.looks] if spending else []
    if cut_label not in looks or not Path(registry).is_file():
        return []
    found = []
    for cut in looks[:looks.index(cut_label)]:
        rows = list_runs(Path(registry), study=plan.study.id, cut=cut)
        rows = [r for r in rows if not r.dummy_arms] or rows   # real treatment codes first
        for row in reversed(rows):
            try:
                results = json.loads((row.folder_path(Path(registry)) / "results.json").read_text(encoding="utf-8"))
            except (OSError, ValueError):
                continue   # a folder moved or unreadable: the next older run of that cut may serve
            facts = (results.get("multiplicity") or {}).get("sequential") or {}
            if facts.get("planned_look") and facts.get("cut") == cut:
                found.append({"cut": cut, "run_id": row.record_id,
                              "information_reached": facts.get("information_reached")})
                break
    return found


def check_registry(out_root: Path) -> None:
    """Before any analysis: refuse (exit 2) a registry this run could not be recorded in."""
    from trialcut.record.registry import check_writable

    registry = Path(out_root) / "registry.sqlite"
    check_writable(registry, on_wait=_registry_wait_printer(registry))


def _registry_wait_printer(registry: Path):
    """Say, at once and then every 15 s, that the registry is held by another writer."""
    said = {"last": None}

    def waiting(seconds: float) -> None:
        if said["last"] is None or seconds - said["last"] >= 15:
            said["last"] = seconds
            print(f"waiting for the registry {registry}: another trialcut (or program) is writing "
                  f"to it ({seconds:.0f} s so far; Ctrl-C stops)", file=sys.stderr, flush=True)
    return waiting


def _print_chain_head(row) -> None:
    console.print(f"registry:   row {row.seq} ({row.kind} {row.record_id}); chain head now {row.row_hash}")
    console.print("            keep this chain head elsewhere: 'trialcut verify --head HASH' "
                  "later shows that no row up to it was removed or rewritten")


def _executor(workers: int, scheduler: str | None):
    """The executor the command line asks for, and how to close it."""
    from trialcut.run.executor import make_executor

    if scheduler is not None:
        import dask

        # A local cluster gets at least two workers; --workers raises that.
        made = make_executor("dask", workers=max(workers, 2), address=None if scheduler == "local" else scheduler)
        try:
            # Import the imputation code on every worker now, not inside the first timed batch.
            with dask.config.set({"distributed.comm.timeouts.connect": f"{SCHEDULER_TIMEOUT:g}s"}):
                made.preload("trialcut.stats.imputation", "trialcut.stats.tipping")
        except (OSError, TimeoutError) as error:      # something answers, but it is no Dask scheduler
            made.close()
            raise InputError(f"cannot work with the Dask scheduler at {scheduler}", [Problem(
                code="run.no_scheduler", message="the scheduler did not accept a connection", field="--scheduler",
                got=str(error), hint="check that the address is the Dask scheduler's, or use --scheduler local")]) \
                from error
    elif workers > 1:
        made = make_executor("processes", workers=workers)
    else:
        made = make_executor("inline")
    return made, getattr(made, "close", lambda: None)


def _check_scheduler(address: str) -> None:
    """A malformed address or one where nothing listens is a mistake on the command line:
    say so in seconds, before the data are read (Dask itself would wait 30 s, then fail)."""
    import re
    import socket

    if address == "local":
        return
    found = re.fullmatch(r"(?:(tcp|tls)://)?(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9.-]+):(\d{1,5})", address)
    port = int(found.group(3)) if found else 0
    if not found or not 0 < port < 65536:
        raise InputError(f"the scheduler address {address!r} is not valid", [Problem(
            code="run.bad_scheduler", message="the scheduler address is not valid", field="--scheduler",
            expected="'local', or HOST:PORT such as tcp://10.0.0.5:8786", got=repr(address),
            hint="copy the address the Dask scheduler printed when it started")])
    host = found.group(2).strip("[]")
    try:
        connection = socket.create_connection((host, port), timeout=SCHEDULER_TIMEOUT)
    except OSError as error:
        raise InputError(f"no Dask scheduler answers at {address}", [Problem(
            code="run.no_scheduler", message=f"nothing answers at {host}:{port} within {SCHEDULER_TIMEOUT:g} s",
            field="--scheduler", got=error.strerror or type(error).__name__,
            hint="start the scheduler first, check the address and port, or use --scheduler local")]) from error
    with connection:
        # A Dask scheduler greets a new connection at once (its handshake); a silent listener
        # would leave the Dask client waiting for ever.  (TLS waits for the client: not probed.)
        if found.group(1) != "tls" and not _greets(connection):
            raise InputError(f"the program at {address} is not a Dask scheduler", [Problem(
                code="run.not_a_scheduler", message=f"something listens at {host}:{port} but does not answer "
                f"as a Dask scheduler within {SCHEDULER_TIMEOUT:g} s", field="--scheduler",
                hint="check the port: the scheduler prints its address (tcp://HOST:PORT) when it starts")])


def _greets(connection) -> bool:
    import socket

    try:
        return bool(connection.recv(1))
    except (socket.timeout, OSError):
        return False


SCHEDULER_TIMEOUT = 5.0


def _progress_printer():
    """A rich bar for long analyses (imputations) on a terminal, timestamped log lines otherwise."""
    from trialcut.commands_progress import progress_reporter

    return progress_reporter(console)


# --------------------------------------------------------------------------- registry commands
def command_history(args) -> int:
    from trialcut.record.registry import list_records
    from trialcut.record.seal import find_leftovers

    registry = args.out / "registry.sqlite"
    if not registry.exists():
        raise InputError(f"no registry at {registry}", [Problem(
            code="record.no_registry", message="no runs have been recorded under this output root",
            file=str(registry), hint="run 'trialcut run' first, or pass --out with the right folder")])
    every_row = list_records(registry)
    rows = list_records(registry, study=args.study, cut=args.cut)
    console.print(f"Records in {registry}: {len(rows)} of {len(every_row)} shown")
    for row in rows:
        for line in _history_lines(row):
            console.print(line, markup=False)
    if every_row:
        console.print(f"chain head (row {every_row[-1].seq}):\n  {every_row[-1].row_hash}", markup=False)
    _print_leftovers(find_leftovers(args.out, every_row))
    return 0


def _history_lines(row) -> list[str]:
    """One record in three short lines, so that an 80-column terminal shows every id whole."""
    first = f"#{row.seq:<4d}{row.kind:<11s}{row.record_id}"
    second = f"      {row.study_id}, {'cut ' if row.kind == 'run' else ''}{row.cut}, {row.created_utc}"
    if row.kind == "run":
        codes = "dummy treatment codes" if row.dummy_arms else "real treatment codes"
        third = f"      {row.lock_status} plan {_short(row.plan_sha256)}, data {_short(row.data_sha256)}, {codes}"
    else:
        sources = [source.get("record_id", "?") for source in row.details_dict().get("sources") or []]
        third = f"      made from {', '.join(sources)}" if sources else ""
    return [line for line in (first, second, third) if line]


def _print_leftovers(leftovers) -> None:
    if not leftovers:
        return
    console.print(f"[yellow]{len(leftovers)} unfinished record(s) left by interrupted or running writers:[/yellow]")
    for leftover in leftovers:
        console.print(f"  - {leftover.describe()}", markup=False)


def command_verify(args) -> int:
    from trialcut.record.verify import registry_beside, verify_all, verify_folder

    if args.run_folder is not None and Path(args.run_folder).is_file():
        from trialcut.commands_bundle import verify_bundle_command

        return verify_bundle_command(args)
    if args.run_folder is None:
        report = verify_all(args.out, args.registry or args.out / "registry.sqlite", head=args.head)
    else:
        registry = args.registry or registry_beside(args.run_folder)
        if args.registry is None and not registry.is_file():
            return _verify_without_registry(args, registry)
        report = verify_folder(args.run_folder, registry, head=args.head)
    console.print(f"[green]verified[/green] {report.summary}")
    console.print(f"chain head (row {report.registry_rows_checked}): {report.head}", markup=False)
    if args.head is not None:
        after = report.rows_after_known_head
        console.print(f"the chain head you gave is in the chain; {len(after)} row(s) recorded after it"
                      + (":" if after else ""))
        for line in after:
            console.print(f"  {line}", markup=False)
    _print_leftovers(report.leftovers)
    from trialcut.commands_approve import verify_signoff

    verify_signoff(args, Path(report.registry), run_id=None if args.run_folder is None
                   else Path(args.run_folder).resolve().name)
    return 0


def _verify_without_registry(args, registry: Path) -> int:
    from trialcut.record.verify import verify_folder

    report = verify_folder(args.run_folder, None)   # a changed folder is still said first (exit 1)
    warning = (f"NOT VERIFIED AGAINST A REGISTRY: no registry at {registry}. The folder matches its own "
               "manifest, but anyone who edits a file can write a new manifest; only the registry row "
               "(and a chain head kept elsewhere) shows that it is the folder that was recorded.")
    if not args.without_registry:
        raise InputError("the folder was not checked against a registry", [Problem(
            code="verify.no_registry_checked", file=str(registry), message=warning,
            hint="pass the registry of the output folder it was written to with --registry, or "
                 "--without-registry to check the folder against its manifest alone")])
    console.print(f"[bold red]{warning}[/bold red]")
    console.print(f"checked {report.summary}")
    return 0


def verified_input(folder: Path, registry: Path | None, purpose: str) -> Path:
    """Verify a sealed folder before using it; returns its registry. Refuses (exit 1 or 2) if not."""
    from trialcut.errors import VerificationFailed
    from trialcut.record.verify import registry_beside, verify_folder

    registry = registry or registry_beside(folder)
    if not registry.is_file():
        raise InputError(f"refusing to {purpose} {folder}: it cannot be verified", [Problem(
            code="record.input_unverifiable", file=str(registry),
            message="no registry where the folder's output root should keep it",
            hint="pass the registry of the output folder the run was written to with --registry")])
    try:
        verify_folder(folder, registry)
    except VerificationFailed as failure:
        raise VerificationFailed(f"refusing to {purpose} {folder}: it does not match its records "
                                 "(see 'trialcut verify')", failure.problems) from failure
    return registry


def verified_run(folder: Path, registry: Path | None, command: str, purpose: str):
    """Verify a sealed run folder and find its registry row; returns (registry, row).

    approve, qc and bundle take runs only: any other sealed record is refused (exit 2)."""
    from trialcut.record.registry import find_record

    registry = verified_input(folder, registry, purpose)
    row = find_record(registry, Path(folder).resolve().name)
    if row is None or row.kind != "run":
        raise InputError(f"{folder} is not a recorded run", [Problem(
            code=f"{command}.not_a_run", file=str(folder), message=f"'{command}' takes runs only",
            hint="pass a run folder (see 'trialcut history')")])
    return registry, row


def command_render(args) -> int:
    from trialcut.record.runfolder import new_run_id
    from trialcut.record.seal import record_folder
    from trialcut.report import render_run

    registry = verified_input(args.run_folder, args.registry, "render")
    if args.to is not None:
        write_separately(args.to, lambda folder: render_run(args.run_folder, out=folder))
        console.print(f"rendered {args.run_folder} into {args.to} (a plain copy, not recorded)")
        return 0
    run = _read_results(args.run_folder)["run"]
    recorded = record_folder(
        registry.parent, kind="rendering", study_id=run["study_id"], group="renderings", record_id=new_run_id(),
        write=lambda folder, position: render_run(args.run_folder, out=folder), registry_path=registry,
        entry={"cut": run["cut"], "details": {"sources": [_source(args.run_folder, registry)]}})
    console.print(f"rendered {args.run_folder} into {recorded.folder}")
    _print_chain_head(recorded.row)
    return 0


def command_compare(args) -> int:
    registry_a = verified_input(args.run_a, args.registry, "compare")
    registry_b = verified_input(args.run_b, args.registry, "compare")
    if args.to is not None:
        write_separately(args.to, lambda folder: compare_runs(args.run_a, args.run_b, folder))
        console.print(f"comparison: {args.to / 'comparison.html'} (a plain copy, not recorded)")
        return 0
    if registry_a.resolve() != registry_b.resolve():
        raise InputError("the two runs are in different output folders", [Problem(
            code="record.runs_in_two_registries", message="a comparison is recorded in one registry",
            got=f"{registry_a} and {registry_b}", hint="pass --to to write an unrecorded comparison")])
    recorded = record_comparison(args.run_a, args.run_b, registry_a)
    console.print(f"comparison: {recorded.folder / 'comparison.html'}")
    _print_chain_head(recorded.row)
    return 0


def record_comparison(run_a: Path, run_b: Path, registry: Path):
    """Seal and register a comparison in ``<root>/<study>/comparisons/<new id>/`` (never reused)."""
    from trialcut.record.runfolder import new_run_id
    from trialcut.record.seal import record_folder

    a, b = _read_results(run_a)["run"], _read_results(run_b)["run"]
    sources = [_source(run_a, registry), _source(run_b, registry)]
    return record_folder(
        registry.parent, kind="comparison", study_id=b["study_id"], group="comparisons", record_id=new_run_id(),
        write=lambda folder, position: compare_runs(run_a, run_b, folder), registry_path=registry,
        entry={"cut": f"{a['cut']}-vs-{b['cut']}", "details": {"sources": sources}})


def _source(folder: Path, registry: Path) -> dict[str, str]:
    from trialcut.record.manifest import MANIFEST_NAME, sha256_file

    return {"record_id": Path(folder).name, "manifest_sha256": sha256_file(Path(folder) / MANIFEST_NAME)}


def write_separately(target: Path, write) -> dict[str, Path]:
    """Fill a new (or empty) folder outside every output folder with ``write(folder)``, whole or not at all."""
    import os
    import secrets

    _refuse_target(Path(target))
    target.parent.mkdir(parents=True, exist_ok=True)
    temporary = target.parent / f".tmp-{target.name}-{os.getpid()}-{secrets.token_hex(4)}"
    temporary.mkdir()
    try:
        files = write(temporary)
        os.rename(temporary, target)   # replaces an empty folder; never a non-empty one
    except BaseException:
        shutil.rmtree(temporary, ignore_errors=True)
        raise
    return files


def _refuse_target(target: Path) -> None:
    """A --to folder: new or empty, not inside a sealed folder, not inside an output folder."""
    resolved = target.resolve()
    reason = None
    if target.exists() and (not target.is_dir() or any(target.iterdir())):
        reason = "it exists and is not an empty folder"
    for folder in [resolved, *resolved.parents]:
        if reason:
            break
        if (folder / "MANIFEST.sha256").is_file():
            reason = f"it lies inside the sealed folder {folder}"
        elif (folder / "registry.sqlite").is_file():
            reason = f"it lies inside the output folder {folder}, where only recorded folders belong"
    if reason:
        raise InputError(f"refusing to write into {target}: {reason}", [Problem(
            code="record.bad_target", file=str(target), field="--to", message=reason,
            expected="a new or empty folder outside every run folder and output folder",
            hint="leave out --to to have it sealed and recorded in the run's output folder, "
                 "or pass a new folder elsewhere")])


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

    out = args.out
    data_dir = out / "demo" / "data"
    plan_dir = out / "demo" / "plan"
    data_dir.mkdir(parents=True, exist_ok=True)
    plan_dir.mkdir(parents=True, exist_ok=True)
    console.print("[bold]trialcut demo[/bold]: an invented trial (study LVT-201), two data cuts")
    _remove_unsealed_demo_comparisons(out / "LVT-201" / "comparisons")
    cuts = demo_cuts(seed=args.seed)
    paths = {}
    for label, frame in cuts.items():
        paths[label] = data_dir / f"{label}.csv"
        write_csv(frame, paths[label])
        console.print(f"  wrote {paths[label]} ({len(frame)} records)")
    plan_path = plan_dir / "demo.yaml"
    source = _repo_file("analysis_plans/demo.yaml")
    if not plan_path.exists() or plan_path.read_text() != source.read_text():
        _set_aside_earlier_demo_plan(plan_path)
        plan_path.write_text(source.read_text(encoding="utf-8"), encoding="utf-8")
    from trialcut.demo_trust import approve_and_check_final, lock_demo_plan

    console.print(f"  {lock_demo_plan(load_plan(plan_path), out)}: {plan_path}")
    folders = {}
    for label in ("interim", "final"):
        started = time.perf_counter()
        folders[label] = execute_run(plan_path=plan_path, data_path=paths[label], cut_label=label,
                                     out_root=out, command_line=["trialcut", "demo"],
                                     cut_off=demo_cut_offs()[label]).folder
        console.print(f"  ran the {label} cut in {time.perf_counter() - started:.1f} s")
    compared = record_comparison(folders["interim"], folders["final"], out / "registry.sqlite")
    _print_chain_head(compared.row)
    comparison = {name: compared.folder / name for name in ("comparison.html", "comparison.pdf")}
    trust = approve_and_check_final(out, folders["final"], paths["final"])
    from trialcut.commands_simulate import demo_simulation

    simulation = demo_simulation(out, plan_path)
    console.print("\n[bold]Reports[/bold]")
    for label, folder in folders.items():
        console.print(f"  {label:8s} report:  {folder / 'report.html'}")
        console.print(f"  {label:8s} PDF:     {folder / 'report.pdf'}")
        console.print(f"  {label:8s} results: {folder / 'results.json'}")
    console.print(f"  comparison:       {comparison.get('comparison.html')}")
    console.print(f"  comparison PDF:   {comparison.get('comparison.pdf')}")
    console.print(f"  simulation:       {simulation}")
    console.print("\n[bold]Trust chain[/bold] (demo keys in " + str(out / "demo" / "keys") + ")")
    for line in trust:
        console.print(f"  {line}", markup=False)
    return 0


def _set_aside_earlier_demo_plan(plan_path: Path) -> None:
    """The shipped demo plan changed since an earlier demo locked it under the same version: a
    lock records amendments under new versions only, so the earlier plan and its lock move to
    plan/superseded/<UTC time>/ and the new plan starts a lock chain of its own (each earlier
    run folder keeps its own copy of the plan and lock)."""
    from trialcut.plan.lock import lock_file_for
    from trialcut.record.registry import utc_now

    earlier = [path for path in (plan_path, lock_file_for(plan_path)) if path.exists()]
    if len(earlier) < 2:
        return
    target = plan_path.parent / "superseded" / utc_now().replace(":", "")
    target.mkdir(parents=True, exist_ok=True)
    for path in earlier:
        path.rename(target / path.name)
    console.print(f"  the shipped demo plan changed since the last demo: set the earlier plan and its lock aside "
                  f"in {target}")


def _remove_unsealed_demo_comparisons(folder: Path) -> None:
    """Earlier demos wrote their comparison unsealed and unrecorded; verify would flag it now."""
    for leftover in sorted(folder.glob("interim-vs-final*")) if folder.is_dir() else []:
        if leftover.is_dir() and not (leftover / "MANIFEST.sha256").exists():
            shutil.rmtree(leftover)
            console.print(f"  removed {leftover}: an unrecorded comparison left by an earlier demo")


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


def _write_json(path: Path, data: Any, *, indent: int | None = 1) -> None:
    """Small records indented for reading; ``indent=None`` for results.json, whose size grows with the
    participants (195 MB at 30,000): the standard library only uses its C encoder without indenting,
    which writes it about ten times faster (the same values; a JSON viewer lays it out)."""
    path.write_text(json.dumps(data, indent=indent, sort_keys=False, ensure_ascii=False, allow_nan=False) + "\n",
                    encoding="utf-8")


def _utc_now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _short(hash_text: str | None) -> str:
    return (hash_text or "")[:12]
