"""The parts of the report that come before the endpoint analyses, and the audit appendix."""
from __future__ import annotations

from dataclasses import replace
from typing import Any, Mapping, Sequence

from trialcut.report.blocks import Section
from trialcut.report.formatting import NumberFormat, short_hash
from trialcut.report.tables import ReportTable, column_kind, from_records, from_results_table

STRATEGY_WORDS = {
    "treatment_policy": "treatment policy", "hypothetical": "hypothetical", "composite": "composite",
    "while_on_treatment": "while on treatment", "principal_stratum": "principal stratum",
}


def facts_table(pairs: Sequence[tuple[str, Any, str]], *, slug: str, title: str,
                number_format: NumberFormat, note: str = "") -> ReportTable:
    """A two-column table of (item, value); each row names the kind its value is shown as."""
    table = from_records([list(p) for p in pairs], ("item", "value", "kind"), slug=slug, title=title,
                         number_format=number_format, labels={"item": "Item", "value": "Value"},
                         kinds={"item": "text", "value": "by_row", "kind": "text"}, note=note)
    return replace(table, display=table.display[:2])


def _lock(plan: Mapping[str, Any], run: Mapping[str, Any]) -> Mapping[str, Any] | None:
    """The plan's lock record, or None when the run used an unlocked plan (either flag says so)."""
    lock = plan.get("lock")
    unlocked = run.get("unlocked") or plan.get("lock_status") == "unlocked"
    return lock if isinstance(lock, Mapping) and not unlocked else None


def lock_status(results: Mapping[str, Any]) -> str:
    plan, run = results.get("plan") or {}, results.get("run") or {}
    lock = _lock(plan, run)
    if lock is None:
        return "NOT LOCKED: this run used a plan without a valid lock record"
    who = lock.get("locked_by") or lock.get("by") or "someone not recorded"
    when = lock.get("locked_utc") or lock.get("when") or "an unrecorded time"
    reason = lock.get("reason") or lock.get("why")
    text = f"Locked by {who} on {when}"
    return f"{text}: {reason}" if reason else text


def banners(results: Mapping[str, Any]) -> list[str]:
    plan, run = results.get("plan") or {}, results.get("run") or {}
    out = []
    if _lock(plan, run) is None:
        out.append("UNLOCKED PLAN — exploratory run, not for decisions")
    if run.get("dummy_arms_seed") is not None:
        out.append("DUMMY TREATMENT CODES — arm labels are not the real assignment")
    return out


def title_facts(results: Mapping[str, Any]) -> list[tuple[str, str]]:
    plan, run, data = results.get("plan") or {}, results.get("run") or {}, results.get("data") or {}
    study = plan.get("study") or {}
    facts = [
        ("Study", f"{study.get('id', run.get('study_id', ''))} — {study.get('title', '')}".strip(" —")),
        ("Plan version", str(plan.get("version", "not recorded"))),
        ("Plan hash (SHA-256)", str(plan.get("sha256") or "not recorded")),
        ("Lock status", lock_status(results)),
        *([("Lock record hash", str(_lock(plan, run).get("record_sha256")))]
          if _lock(plan, run) is not None and _lock(plan, run).get("record_sha256") else []),
        ("Data cut", str(run.get("cut") or "not recorded")),
        ("Data hash (SHA-256)", str(data.get("sha256") or "not recorded")),
        ("Run", str(run.get("id") or "not recorded")),
        ("Run time (UTC)", f"{run.get('started_utc') or '?'} to {run.get('finished_utc') or '?'}"),
        ("Tool version", f"trialcut {run.get('tool_version') or 'not recorded'}"),
    ]
    history = amendment_history(plan) if _lock(plan, run) is not None else []
    if history:
        facts.insert(4, ("Amendment history", "; ".join(
            f"version {h['version']} locked {h['locked_utc']}" + (f" ({h['reason']})" if h.get("reason") else "")
            for h in history)))
    if run.get("dummy_arms_seed") is not None:
        facts.append(("Treatment codes", f"dummy codes drawn with seed {run['dummy_arms_seed']}"))
    return facts


# --------------------------------------------------------------------------- about this run
def run_record(section: Section, results: Mapping[str, Any], number_format: NumberFormat) -> None:
    plan, run, data = results.get("plan") or {}, results.get("run") or {}, results.get("data") or {}
    study = plan.get("study") or {}
    section.paragraph(
        "Every number in this report was computed from the data file and the plan identified below, "
        "by the software version shown. The hashes let a reviewer confirm that the files they hold "
        "are the ones analysed.")
    pairs = [
        ("Study identifier", study.get("id") or run.get("study_id"), "text"),
        ("Study title", study.get("title"), "text"),
        ("Phase", study.get("phase"), "text"),
        ("Sponsor", study.get("sponsor"), "text"),
        ("Indication", study.get("indication"), "text"),
        ("Plan file", plan.get("file"), "text"),
        ("Plan version", plan.get("version"), "text"),
        ("Plan hash (SHA-256)", plan.get("sha256"), "text"),
        ("Lock status", lock_status(results), "text"),
        ("Data cut", run.get("cut"), "text"),
        ("Data file", data.get("file"), "text"),
        ("Data format", data.get("format"), "text"),
        ("Data file size (bytes)", data.get("size"), "count"),
        ("Data hash (SHA-256)", data.get("sha256"), "text"),
        ("Records in the file", data.get("rows"), "count"),
        ("Participants in the file", data.get("participants"), "count"),
        ("Run identifier", run.get("id"), "text"),
        ("Started (UTC)", run.get("started_utc"), "text"),
        ("Finished (UTC)", run.get("finished_utc"), "text"),
        ("Software", f"trialcut {run.get('tool_version', '')}".strip(), "text"),
        ("Root seed of random steps", run.get("seed"), "count"),
    ]
    if run.get("dummy_arms_seed") is not None:
        pairs.append(("Dummy treatment codes: seed", run.get("dummy_arms_seed"), "count"))
    pairs = [p for p in pairs if p[1] not in (None, "")]
    section.table(facts_table(pairs, slug="run_identity", title="Plan, data and run identity",
                              number_format=number_format))
    history = amendment_history(plan)
    if history:
        section.table(from_records(history, ("version", "sha256", "locked_utc", "by", "reason"),
                                   slug="plan_history", title="Plan versions and amendments",
                                   number_format=number_format,
                                   labels={"version": "Plan version", "sha256": "Hash (first 16 characters)",
                                           "locked_utc": "Locked (UTC)", "by": "Locked by", "reason": "Reason"},
                                   kinds={"version": "text"}))
    elif _lock(plan, run) is not None:
        section.paragraph("The lock record lists no amendments: this is the first locked version of the plan.")


def amendment_history(plan: Mapping[str, Any]) -> list[dict[str, Any]]:
    lock = plan.get("lock") if isinstance(plan.get("lock"), Mapping) else {}
    entries = lock.get("amendments") or lock.get("history") or plan.get("lock_chain") or []
    out = []
    for entry in entries:
        if isinstance(entry, Mapping):
            out.append({"version": entry.get("version"), "sha256": short_hash(entry.get("sha256"), 16),
                        "locked_utc": entry.get("locked_utc") or entry.get("when"),
                        "by": entry.get("by") or entry.get("locked_by"),
                        "reason": entry.get("reason") or entry.get("why")})
    return out


# --------------------------------------------------------------------------- estimands
def estimands(section: Section, results: Mapping[str, Any], number_format: NumberFormat) -> None:
    plan = results.get("plan") or {}
    entries = plan.get("estimands") or []
    if not entries:
        section.notice("The plan records no estimands.")
        return
    section.paragraph(
        "Each estimand is described by the attributes of ICH E9(R1): the population, the treatment "
        "condition, the variable (endpoint), how each intercurrent event is handled, and the "
        "population-level summary.")
    population_labels = {p.get("id"): p.get("label") for p in plan.get("populations") or []}
    event_labels = {e.get("id"): e.get("label") for e in plan.get("intercurrent_events") or []}
    columns = ["attribute", *[e.get("id", f"estimand{i}") for i, e in enumerate(entries)]]
    rows = [
        ["Estimand", *[e.get("label") for e in entries]],
        ["Population", *[population_labels.get(e.get("population"), e.get("population")) for e in entries]],
        ["Treatment", *[e.get("treatment") for e in entries]],
        ["Variable (endpoint)", *[_variable_of(results, e.get("id")) for e in entries]],
        ["Intercurrent events and strategies", *[_events_text(e, event_labels) for e in entries]],
        ["Population-level summary", *[e.get("summary") for e in entries]],
    ]
    labels = {"attribute": "Attribute", **{e.get("id"): e.get("id") for e in entries}}
    kinds = {c: "text" for c in columns}
    section.table(from_records(rows, columns, slug="estimands", title="Estimands and their attributes",
                               number_format=number_format, labels=labels, kinds=kinds))


def _variable_of(results: Mapping[str, Any], estimand_id: str | None) -> str:
    names = []
    for endpoint in results.get("endpoints") or []:
        if any(a.get("estimand") == estimand_id for a in endpoint.get("analyses") or []):
            names.append(f"{endpoint.get('label') or endpoint.get('id')}, at {endpoint.get('primary_visit')}")
    return "; ".join(names) or "not analysed in this run"


def _events_text(estimand: Mapping[str, Any], event_labels: Mapping[str, str]) -> str:
    parts = []
    for handling in estimand.get("intercurrent_events") or []:
        label = event_labels.get(handling.get("event"), handling.get("event"))
        strategy = STRATEGY_WORDS.get(handling.get("strategy"), str(handling.get("strategy")))
        if handling.get("composite_value") is not None:
            strategy += f" (value set to {handling['composite_value']:g})"
        parts.append(f"{label}: {strategy}")
    return "; ".join(parts) or "none declared"


# --------------------------------------------------------------------------- populations
def populations(section: Section, results: Mapping[str, Any], number_format: NumberFormat) -> None:
    shown = False
    for key, slug, title in (("populations", "populations", "Participants per analysis population and arm"),
                             ("disposition", "disposition", "Disposition of participants by arm")):
        source = results.get(key)
        if isinstance(source, Mapping) and source.get("data"):
            section.table(from_results_table(source, slug=slug, title=title, number_format=number_format))
            shown = True
    if not shown:
        section.notice("The results carry no population or disposition counts.")


# --------------------------------------------------------------------------- multiplicity
def multiplicity(section: Section, results: Mapping[str, Any], number_format: NumberFormat) -> None:
    record = results.get("multiplicity") or {}
    method = record.get("method") or "none"
    hypotheses = record.get("hypotheses")
    if method == "none" or not hypotheses:
        section.paragraph("The plan declares no adjustment for multiple comparisons; p-values are unadjusted.")
        return
    method = {"holm": "Holm", "hochberg": "Hochberg", "bonferroni": "Bonferroni",
              "graphical": "graphical"}.get(method, method)
    section.paragraph(f"Hypotheses tested with the {method} procedure at an overall two-sided level of "
                      f"{record.get('alpha', 0.05):g}.")
    labels = {a.get("id"): a.get("label") for e in results.get("endpoints") or [] for a in e.get("analyses") or []}
    columns = list(hypotheses.get("columns") or [])
    if "analysis" in columns:   # the analysis by its label, as everywhere else in the report
        position = columns.index("analysis")
        hypotheses = {**hypotheses, "data": [[labels.get(v, v) if i == position else v for i, v in enumerate(row)]
                                             for row in hypotheses.get("data") or []]}
    section.table(from_results_table(hypotheses, slug="multiplicity", title="Tests adjusted for multiplicity",
                                     number_format=number_format,
                                     labels={"id": "Hypothesis", "analysis": "Analysis", "weight": "Weight",
                                             "adjusted_p": "Adjusted p-value", "rejected": "Rejected"},
                                     kinds={"adjusted_p": "p", "rejected": "flag", "weight": "general"}))


# --------------------------------------------------------------------------- conformance
def conformance(section: Section, results: Mapping[str, Any], number_format: NumberFormat) -> None:
    record = results.get("conformance") or {}
    checks = record.get("checks") or []
    failed = [c for c in checks if str(c.get("status")).lower() not in ("passed", "pass", "ok")]
    section.paragraph(
        f"{len(checks)} checks were run on the data cut before any analysis; {len(failed)} found something. "
        "Checks of severity error stop a run, so a finished run can only show warnings and notes here.")
    rows = [{**c, "rows": ", ".join(_record_text(r) for r in (c.get("rows") or [])[:5])} for c in checks]
    section.table(from_records(rows, ("id", "description", "severity", "status", "count", "rows"),
                               slug="conformance_checks", title="Conformance checks on the data cut",
                               number_format=number_format,
                               labels={"id": "Check", "description": "What is checked", "severity": "Severity",
                                       "status": "Result", "count": "Records found", "rows": "First records found"}))
    derivations = record.get("derivations") or []
    if derivations:
        section.paragraph("Derivations applied to the data before analysis:")
        section.items(_derivation_lines(derivations))


def _record_text(record: Any) -> str:
    """One offending record in words: participant, visit and where it sits in the file."""
    if not isinstance(record, Mapping):
        return str(record)
    parts = [str(record[k]) for k in ("subject", "visit") if record.get(k) not in (None, "")]
    if record.get("where"):
        parts.append(f"({record['where']})")
    return " ".join(parts) or _describe_mapping(record)


DERIVATIONS_SHOWN = 5


def _derivation_lines(derivations: Sequence[Any]) -> list[str]:
    """Text entries as they are; logged records grouped by step, with the first few shown."""
    lines = [d for d in derivations if isinstance(d, str)]
    groups: dict[str, list[Mapping[str, Any]]] = {}
    for entry in derivations:
        if isinstance(entry, Mapping):
            groups.setdefault(str(entry.get("step") or "derivation"), []).append(entry)
    for step, entries in groups.items():
        examples = "; ".join(
            " ".join(str(e[k]) for k in ("participant", "subject") if e.get(k)) + f": {e.get('reason') or _describe_mapping(e)}"
            for e in entries[:DERIVATIONS_SHOWN])
        more = f" (and {len(entries) - DERIVATIONS_SHOWN} more in conformance.json)" if len(entries) > DERIVATIONS_SHOWN else ""
        lines.append(f"{step.replace('_', ' ')}: {len(entries)} records. {examples}{more}")
    return lines


def _describe_mapping(entry: Mapping[str, Any]) -> str:
    return "; ".join(f"{k}: {v}" for k, v in entry.items() if v not in (None, "", [], {}))


# --------------------------------------------------------------------------- audit appendix
def audit_appendix(section: Section, results: Mapping[str, Any], audit: Mapping[str, Any] | None,
                   number_format: NumberFormat) -> None:
    run = results.get("run") or {}
    if not audit:
        section.notice("No audit record (audit.json) was given to the renderer; the seeds and warnings "
                       "below come from results.json.")
    audit = dict(audit or {})
    seeds = [("Root seed", run.get("seed"), "count")]
    if run.get("dummy_arms_seed") is not None:
        seeds.append(("Dummy treatment codes", run.get("dummy_arms_seed"), "count"))
    for endpoint in results.get("endpoints") or []:
        for analysis in endpoint.get("analyses") or []:
            seed = (analysis.get("fit") or {}).get("seed")
            if seed is not None:
                seeds.append((f"Analysis {analysis.get('id')}", seed, "count"))
    for key, value in (audit.pop("seeds", None) or {}).items():
        seeds.append((str(key), value, "count" if isinstance(value, int) else "text"))
    section.table(facts_table(seeds, slug="seeds", title="Seeds of the random steps", number_format=number_format))
    warnings = list(results.get("warnings") or []) + list(audit.pop("warnings", None) or [])
    if warnings:
        section.paragraph("Warnings recorded during the run:")
        section.items([w if isinstance(w, str) else _describe_mapping(w) for w in warnings])
    else:
        section.paragraph("No warnings were recorded during the run.")
    for key in AUDIT_SHOWN_ELSEWHERE:
        audit.pop(key, None)
    scalars = [(key.replace("_", " ").capitalize(), value, "text") for key, value in audit.items()
               if isinstance(value, (str, int, float)) and not isinstance(value, bool)]
    command = audit.pop("command_line", None)
    if isinstance(command, list):
        scalars.insert(0, ("Command line", " ".join(str(c) for c in command), "text"))
    if scalars:
        section.table(facts_table(scalars, slug="audit_run", title="Run facts from the audit record",
                                  number_format=number_format))
    for key, value in audit.items():
        if isinstance(value, (Mapping, list)) and value:
            _audit_part(section, key, value, number_format)


# Parts of audit.json the report already shows in its own sections (lock record, conformance).
AUDIT_SHOWN_ELSEWHERE = ("lock", "conformance_problems")

AUDIT_TITLES = {
    "environment": "Software environment", "hashes": "Hashes of the files involved", "steps": "Steps and their timing",
    "timings": "Steps and their timing", "packages": "Package versions", "files": "Files of the run folder",
    "thread_settings": "Thread settings of the numerical libraries", "executor": "How the analyses were executed",
    "plan_problems": "Problems found in the plan",
}


def _audit_part(section: Section, key: str, value: Any, number_format: NumberFormat,
                title: str | None = None) -> None:
    title = title or AUDIT_TITLES.get(key, key.replace("_", " ").capitalize())
    slug = f"audit_{key}"
    if isinstance(value, Mapping):
        scalars = [(str(k), v, _kind_of(v)) for k, v in value.items() if not isinstance(v, (Mapping, list))]
        if scalars:
            section.table(facts_table(scalars, slug=slug, title=title, number_format=number_format))
        for inner_key, inner in value.items():
            if isinstance(inner, (Mapping, list)):
                _audit_part(section, f"{key}_{inner_key}", inner, number_format,
                            title=AUDIT_TITLES.get(inner_key) or f"{title}: {str(inner_key).replace('_', ' ')}")
    elif isinstance(value, list) and value and all(isinstance(v, Mapping) for v in value):
        columns: list[str] = []
        for entry in value:
            columns += [c for c in entry if c not in columns and not isinstance(entry[c], (Mapping, list))]
        kinds = {c: ("sd" if c in ("seconds", "duration", "elapsed") else None) for c in columns}
        section.table(from_records(value, columns, slug=slug, title=title, number_format=replace_raw(number_format),
                                   kinds={k: v for k, v in kinds.items() if v}))
    elif isinstance(value, list) and value:
        section.paragraph(f"{title}:")
        section.items([str(v) for v in value])
    elif value not in (None, "", []):
        section.paragraph(f"{title}: {value}")


def replace_raw(number_format: NumberFormat) -> NumberFormat:
    """Timings are shown to 3 decimals (milliseconds) whatever the endpoint's precision."""
    return NumberFormat(raw=1, mean_extra=number_format.mean_extra, sd_extra=2, p_value=number_format.p_value)


def _kind_of(value: Any) -> str:
    kind = column_kind("", [value])
    return "text" if kind == "text" else ("count" if isinstance(value, int) else "general")
