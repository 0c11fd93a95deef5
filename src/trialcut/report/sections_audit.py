"""The audit appendix: how the run was made, in words a reviewer reads.

Run facts, the seeds of every random step, the software environment and the linear-algebra
libraries, each with a plain label of our own.  The appendix reads the keys of audit.json it
knows (both the current environment record and the older one with raw library keys) and
never prints a key as it is stored: a key it does not know is left to audit.json itself.
"""
from __future__ import annotations

import zlib
from typing import Any, Mapping, Sequence

from trialcut.report.blocks import Section
from trialcut.report.formatting import NumberFormat
from trialcut.report.tables import from_records

# The report cannot time its own rendering: that step is recorded in audit.json after the
# report is written, so showing it would make a re-rendered report differ from the first.
STEPS_LEFT_OUT = ("render documents",)

LIBRARY_KINDS = {"blas": "BLAS (basic linear algebra)", "lapack": "LAPACK (linear algebra)",
                 "openmp": "OpenMP (parallel loops)", "lapack-lite": "LAPACK (numpy's own subset)"}
IMPLEMENTATIONS = {"openblas": "OpenBLAS", "mkl": "Intel MKL", "blis": "BLIS", "flexiblas": "FlexiBLAS",
                   "accelerate": "Apple Accelerate", "openmp": "OpenMP runtime",
                   "scipy-openblas": "OpenBLAS", "lapack-lite": "numpy's own"}
NOT_RECORDED = "not recorded"


def audit_appendix(section: Section, results: Mapping[str, Any], audit: Mapping[str, Any] | None,
                   number_format: NumberFormat) -> None:
    section.paragraph(
        "How this run was made, so that a reviewer can repeat it: the command, the times, the seeds "
        "of every random step and the software that computed the numbers. The complete record is "
        "audit.json in the run folder; its checksum is in the folder's manifest.")
    if not audit:
        section.notice("No audit record (audit.json) was given to the renderer; the facts and seeds below "
                       "come from results.json alone, and the software environment is not known.")
    audit = audit or {}
    run_facts(section, results, audit, number_format)
    seeds(section, results, audit, number_format)
    warnings(section, results, audit)
    environment = audit.get("environment")
    if isinstance(environment, Mapping):
        software(section, results, environment, number_format)


# --------------------------------------------------------------------------- run facts
def run_facts(section: Section, results: Mapping[str, Any], audit: Mapping[str, Any],
              number_format: NumberFormat) -> None:
    run = results.get("run") or {}
    command = audit.get("command_line")
    pairs = [
        ("Command given", " ".join(str(c) for c in command) if isinstance(command, list) and command else None),
        ("Run identifier", run.get("id") or audit.get("run_id")),
        ("Data cut", run.get("cut")),
        ("Run began (UTC)", run.get("started_utc") or audit.get("started_utc")),
        ("Run ended (UTC)", run.get("finished_utc") or audit.get("finished_utc")),
        ("Where the imputations were computed", _executor_text(audit.get("executor"))),
        ("Where the endpoints were analysed", _endpoints_text(audit.get("executor"))),
        ("Problems found in the plan", _problems_text(audit.get("plan_problems"))),
        # The registry's chain head before this run's row: an anchor kept outside the registry.
        ("Registry row of this run, and the chain head it follows",
         f"row {audit['registry_seq']}, after {audit['registry_follows']}" if audit.get("registry_follows") else None),
    ]
    rows = [{"item": label, "value": str(value)} for label, value in pairs if value not in (None, "")]
    section.table(from_records(rows, ("item", "value"), slug="audit_run", title="How the run was made",
                               number_format=number_format, labels={"item": "Fact", "value": "Value"},
                               kinds={"item": "text", "value": "text"}))
    labels = _step_labels(results)
    steps = [{"step": labels(str(s.get("step"))), "seconds": s.get("seconds")} for s in audit.get("steps") or []
             if isinstance(s, Mapping) and s.get("step") not in STEPS_LEFT_OUT]
    if steps:
        timing = NumberFormat(raw=1, mean_extra=number_format.mean_extra, sd_extra=2, p_value=number_format.p_value)
        section.table(from_records(steps, ("step", "seconds"), slug="audit_steps", title="Steps and their timing",
                                   number_format=timing, labels={"step": "Step", "seconds": "Seconds"},
                                   kinds={"step": "text", "seconds": "sd"},
                                   note="Seconds of wall-clock time, to the millisecond. The time taken to "
                                        "render this report is recorded in audit.json only."
                                        + (" The endpoints were analysed two at a time, on two processes: "
                                           "their times add up to more than all analyses of the plan."
                                           if _endpoint_processes(audit.get("executor")) > 1 else "")))


def _step_labels(results: Mapping[str, Any]):
    """Steps as the runner names them ("analysis mmrm_primary") in words, by the plan's labels."""
    endpoints = {e.get("id"): e.get("label") or e.get("id") for e in results.get("endpoints") or []}
    analyses = {a.get("id"): a.get("label") or a.get("id")
                for e in results.get("endpoints") or [] for a in e.get("analyses") or []}

    def label(step: str) -> str:
        kind, _, name = step.partition(" ")
        if kind == "analysis" and name in analyses:
            return f"Analysis: {analyses[name]}"
        if kind == "endpoint" and name in endpoints:
            return f"All analyses of {endpoints[name]}"
        if kind == "subgroups" and name in endpoints:
            return f"Subgroup analyses of {endpoints[name]}"
        if step == "analyses":
            return "All analyses of the plan"
        return step[:1].upper() + step[1:]
    return label


def _executor_text(executor: Any) -> str | None:
    if not isinstance(executor, Mapping):
        return None
    if executor.get("scheduler"):
        where = "a local Dask cluster" if executor["scheduler"] == "local" else f"the Dask cluster at {executor['scheduler']}"
        return f"on {where}"
    workers = executor.get("workers")
    if isinstance(workers, int) and workers > 1:
        return f"in {workers} worker processes on this machine"
    return "in the process that ran the plan"


def _endpoint_processes(executor: Any) -> int:
    processes = executor.get("endpoint_processes") if isinstance(executor, Mapping) else None
    return processes if isinstance(processes, int) else 1


def _endpoints_text(executor: Any) -> str | None:
    """Recorded since runs could share their endpoints between two processes; older runs say nothing."""
    if not isinstance(executor, Mapping) or "endpoint_processes" not in executor:
        return None
    if _endpoint_processes(executor) > 1:
        return ("shared between the process that ran the plan and a second one on another core; "
                "each analysis draws from its own seed, so the numbers are those of one process")
    return "in the process that ran the plan"


def _problems_text(problems: Any) -> str | None:
    if problems is None:
        return None
    if not problems:
        return "none"
    return f"{len(problems)}: see audit.json"


# --------------------------------------------------------------------------- seeds
def seeds(section: Section, results: Mapping[str, Any], audit: Mapping[str, Any],
          number_format: NumberFormat) -> None:
    run = results.get("run") or {}
    recorded = audit.get("seeds") if isinstance(audit.get("seeds"), Mapping) else {}
    plan_seed = run.get("seed", recorded.get("root"))
    rows = []
    if plan_seed is not None:
        rows.append({"step": "Every random step (the seed the plan gives)", "seed": str(plan_seed)})
    dummy = run.get("dummy_arms_seed", recorded.get("dummy_arms"))
    if dummy is not None:
        rows.append({"step": "Dummy treatment codes of this blinded dry run", "seed": str(dummy)})
    for endpoint in results.get("endpoints") or []:
        for analysis in endpoint.get("analyses") or []:
            if _draws_random_numbers(analysis) and plan_seed is not None:
                rows.append({"step": f"{analysis.get('label') or analysis.get('id')}",
                             "seed": _stream_words(plan_seed, str(analysis.get("id")))})
    for key, value in recorded.items():
        if key not in ("root", "dummy_arms") and value is not None:
            rows.append({"step": str(key).replace("_", " ").capitalize(), "seed": str(value)})
    if not rows:
        section.paragraph("No seed was recorded: the run drew no random numbers.")
        return
    section.table(from_records(rows, ("step", "seed"), slug="seeds", title="Seeds of the random steps",
                               number_format=number_format, labels={"step": "Random step", "seed": "Seed"},
                               kinds={"step": "text", "seed": "text"},
                               note="Each analysis that draws random numbers takes its own stream from the "
                                    "plan's seed and a number made from the analysis identifier (its CRC-32 "
                                    "checksum): numpy's SeedSequence of the two numbers shown. Adding an "
                                    "analysis to the plan therefore leaves the other analyses' numbers unchanged."))


def _draws_random_numbers(analysis: Mapping[str, Any]) -> bool:
    fit = analysis.get("fit") or {}
    return analysis.get("method") in ("multiple_imputation", "tipping_point") or "imputations" in fit


def _stream_words(plan_seed: Any, analysis_id: str) -> str:
    # The run layer's rule (run/context.py, RunContext.seed_sequence), a contract checked by
    # tests/report/test_appendix.py against the run layer itself.
    return f"{plan_seed}, {zlib.crc32(analysis_id.encode('utf-8'))}"


# --------------------------------------------------------------------------- warnings
def warnings(section: Section, results: Mapping[str, Any], audit: Mapping[str, Any]) -> None:
    found = []
    for warning in list(results.get("warnings") or []) + list(audit.get("warnings") or []):
        text = warning if isinstance(warning, str) else _warning_text(warning)
        if text not in found:
            found.append(text)
    if found:
        section.paragraph("Warnings recorded during the run:")
        section.items(found)
    else:
        section.paragraph("No warnings were recorded during the run.")


def _warning_text(warning: Any) -> str:
    if isinstance(warning, Mapping):
        message = warning.get("message") or warning.get("text")
        where = warning.get("analysis") or warning.get("where")
        if message:
            return f"{where}: {message}" if where else str(message)
        return "; ".join(str(v) for v in warning.values() if v not in (None, "", [], {}))
    return str(warning)


# --------------------------------------------------------------------------- software
def software(section: Section, results: Mapping[str, Any], environment: Mapping[str, Any],
             number_format: NumberFormat) -> None:
    packages = environment.get("packages") if isinstance(environment.get("packages"), Mapping) else {}
    version = (results.get("run") or {}).get("tool_version") or packages.get("trialcut")
    pairs = [("Python interpreter", _python_text(environment.get("python"))),
             ("trialcut version", version),
             ("Operating system", _system_text(environment)),
             ("Processors available", environment.get("processor_count")),
             ("Thread limits set in the environment", _thread_text(environment.get("thread_settings"))),
             ("Pinned environment (requirements/lock.txt)", _pinned_text(environment.get("pinned"))),
             ("Installed distributions", _distributions_text(environment.get("distributions")))]
    rows = [{"item": label, "value": str(value)} for label, value in pairs if value not in (None, "")]
    section.table(from_records(rows, ("item", "value"), slug="audit_environment", title="Software environment",
                               number_format=number_format, labels={"item": "Part", "value": "Version or setting"},
                               kinds={"item": "text", "value": "text"}))
    if packages:
        listed = [{"package": name, "version": value if value else "not installed"}
                  for name, value in packages.items() if name != "trialcut"]
        section.table(from_records(listed, ("package", "version"), slug="audit_packages", title="Package versions",
                                   number_format=number_format, labels={"package": "Package", "version": "Version"},
                                   kinds={"package": "text", "version": "text"}))
    libraries = [library_row(entry) for entry in environment.get("linear_algebra") or [] if isinstance(entry, Mapping)]
    columns = ("library", "implementation", "version", "threads", "used_by")
    if all(row["used_by"] == NOT_RECORDED for row in libraries):     # an older record
        columns = columns[:-1]
    if libraries:
        section.table(from_records(
            libraries, columns, slug="audit_linear_algebra",
            title="Linear-algebra libraries in use", number_format=number_format,
            labels={"library": "Library", "implementation": "Implementation", "version": "Version",
                    "threads": "Threads", "used_by": "Loaded with"},
            kinds={"library": "text", "implementation": "text", "version": "text", "threads": "text",
                   "used_by": "text"},
            note="The number of threads can change the last digits of a result; every analysis limits the "
                 "linear-algebra library to one thread while it computes (runs recorded by earlier versions "
                 "of trialcut did so only while fitting repeated-measures models)."))


def _pinned_text(pinned: Any) -> str | None:
    """How the installed packages compare with the project's lock file of exact versions."""
    if not isinstance(pinned, Mapping):
        return None
    if not pinned.get("sha256"):
        return "no lock file found (trialcut was not run from a checkout)"
    lock = f"lock file SHA-256 {str(pinned['sha256'])[:16]}…"
    if pinned.get("matches"):
        return f"every installed package is the locked version ({lock})"
    parts = [f"{d.get('package')} {d.get('installed')} installed, {d.get('locked')} locked"
             for d in pinned.get("versions_differ") or [] if isinstance(d, Mapping)]
    parts += [f"{name} locked but not installed" for name in pinned.get("locked_not_installed") or []]
    parts += [f"{name} installed but not locked" for name in pinned.get("installed_not_locked") or []]
    shown = "; ".join(parts[:8]) + (f"; and {len(parts) - 8} more" if len(parts) > 8 else "")
    return f"differs from the lock ({lock}): {shown}"


def _distributions_text(distributions: Any) -> str | None:
    if not isinstance(distributions, Mapping) or not distributions:
        return None
    return f"{len(distributions)} (each with its version in audit.json)"


def _python_text(python: Any) -> str | None:
    if isinstance(python, Mapping):
        version = python.get("version")
        implementation = python.get("implementation")
        return f"{version} ({implementation})" if version and implementation else version
    return str(python) if python else None


def _system_text(environment: Mapping[str, Any]) -> str | None:
    system = environment.get("operating_system") or environment.get("system")
    machine = environment.get("machine")
    if system and machine:
        return f"{system} on {machine} processors"
    return system or None


def _thread_text(settings: Any) -> str:
    if not isinstance(settings, Mapping) or not settings:
        # Analyses limit the linear-algebra library to one thread whatever the environment says.
        return ("none (each library chooses its own number of threads, except where an analysis limits "
                "the linear-algebra library to one: see the table of linear-algebra libraries)")
    return "; ".join(f"{name} = {value}" for name, value in settings.items())


def library_row(entry: Mapping[str, Any]) -> dict[str, str]:
    """One linear-algebra library in our own words, from the current or the older record."""
    kind = str(entry.get("library") or entry.get("user_api") or entry.get("role") or "").lower()
    implementation = str(entry.get("implementation") or entry.get("internal_api") or entry.get("name") or "")
    details = []
    threading = entry.get("threading") or entry.get("threading_layer")
    if threading and threading != "disabled":
        details.append(f"{threading} threading")
    tuned = entry.get("tuned_for") or entry.get("architecture")
    if tuned:
        details.append(f"tuned for {tuned} processors")
    shown = IMPLEMENTATIONS.get(implementation.lower(), implementation or NOT_RECORDED)
    threads = entry.get("threads", entry.get("num_threads"))
    return {"library": LIBRARY_KINDS.get(kind, kind.upper() or NOT_RECORDED),
            "implementation": f"{shown} ({', '.join(details)})" if details else shown,
            "version": str(entry.get("version") or NOT_RECORDED),
            "threads": str(threads) if threads is not None else NOT_RECORDED,
            "used_by": str(entry.get("used_by") or NOT_RECORDED)}


__all__ = ["audit_appendix", "library_row"]
