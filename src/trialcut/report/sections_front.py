"""The parts of the report that come before the endpoint analyses, and the audit appendix."""
from __future__ import annotations

from dataclasses import replace
from typing import Any, Mapping, Sequence

from trialcut.report.blocks import Section
from trialcut.report.formatting import NumberFormat, short_hash
from trialcut.report.tables import ReportTable, from_records, from_results_table, rows_as_dicts

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
    # The reason is a fact of its own (lock_reason): said once, not glued to who and when.
    return f"Locked by {who} on {when}"


def lock_reason(results: Mapping[str, Any]) -> str | None:
    plan, run = results.get("plan") or {}, results.get("run") or {}
    lock = _lock(plan, run)
    return None if lock is None else (lock.get("reason") or lock.get("why"))


def lock_signature(results: Mapping[str, Any]) -> str | None:
    """Who signed the latest lock record, as the record claims; 'trialcut verify' checks it."""
    plan, run = results.get("plan") or {}, results.get("run") or {}
    lock = _lock(plan, run)
    if lock is None:
        return None
    chain = lock.get("amendments") or []
    signed = chain[-1].get("signed_by") if chain and isinstance(chain[-1], Mapping) else None
    if not isinstance(signed, Mapping):
        return "unsigned (a rehearsal lock: fine for dry runs, not for a run that counts)"
    return (f"signed by {signed.get('key')} (key fingerprint {signed.get('fingerprint')}) at "
            f"{signed.get('signed_utc')}; 'trialcut verify --keyring FILE' checks it against the keyring")


def banners(results: Mapping[str, Any]) -> list[str]:
    plan, run = results.get("plan") or {}, results.get("run") or {}
    out = []
    if _lock(plan, run) is None:
        out.append("UNLOCKED PLAN — exploratory run, not for decisions")
    if run.get("dummy_arms_seed") is not None:
        out.append("DUMMY TREATMENT CODES — arm labels are not the real assignment")
    look = look_banner(results)
    if look:
        out.append(look)
    return out


def look_banner(results: Mapping[str, Any]) -> str | None:
    """An interim look, or a cut that is no planned look, says so on every page: its p-values must
    never be read as those of the final analysis (only the final look needs no mark)."""
    sequential = (results.get("multiplicity") or {}).get("sequential")
    if not isinstance(sequential, Mapping):
        return None
    if not sequential.get("planned_look"):
        return "NOT A PLANNED LOOK — nominal p-values only, no decision"
    look, looks = sequential.get("look"), sequential.get("looks")
    if isinstance(look, int) and isinstance(looks, int) and look < looks:
        return f"INTERIM LOOK {look} OF {looks} — not the final analysis"
    return None


def marks(results: Mapping[str, Any]) -> list[str]:
    """The banners' short forms, for the running header of every page."""
    return [banner.split(" — ")[0] for banner in banners(results)]


def title_facts(results: Mapping[str, Any]) -> list[tuple[str, str]]:
    plan, run, data = results.get("plan") or {}, results.get("run") or {}, results.get("data") or {}
    study = plan.get("study") or {}
    facts = [
        ("Study", f"{study.get('id', run.get('study_id', ''))} — {study.get('title', '')}".strip(" —")),
        ("Plan version", str(plan.get("version", "not recorded"))),
        ("Plan hash (SHA-256)", str(plan.get("sha256") or "not recorded")),
        ("Lock status", lock_status(results)),
        *([("Reason for the lock", str(lock_reason(results)))] if lock_reason(results) else []),
        *([("Lock record hash", str(_lock(plan, run).get("record_sha256")))]
          if _lock(plan, run) is not None and _lock(plan, run).get("record_sha256") else []),
        ("Data cut", str(run.get("cut") or "not recorded")),
        ("Data hash (SHA-256)", str(data.get("sha256") or "not recorded")),
        ("Run", str(run.get("id") or "not recorded")),
        ("Run time (UTC)", f"{run.get('started_utc') or '?'} to {run.get('finished_utc') or '?'}"),
        ("Tool version", f"trialcut {run.get('tool_version') or 'not recorded'}"),
    ]
    history = amendment_history(plan) if _lock(plan, run) is not None else []
    if len(history) > 1:     # one version has no history beyond its lock; reasons are in section 1
        facts.insert(4, ("Amendment history", "; ".join(
            f"version {h['version']} locked {h['locked_utc']}" for h in history)))
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
        ("Reason for the lock", lock_reason(results), "text"),
        ("Signature on the lock", lock_signature(results), "text"),
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
        ("Seed of the random steps (from the plan)", run.get("seed"), "count"),
    ]
    if run.get("dummy_arms_seed") is not None:
        pairs.append(("Dummy treatment codes: seed", run.get("dummy_arms_seed"), "count"))
    pairs = [p for p in pairs if p[1] not in (None, "")]
    section.table(facts_table(pairs, slug="run_identity", title="Plan, data and run identity",
                              number_format=number_format))
    history = amendment_history(plan)
    if history:
        section.table(from_records(history, ("version", "sha256", "locked_utc", "by", "reason", "changes",
                                             "after_runs"),
                                   slug="plan_history", title="Plan versions and amendments",
                                   number_format=number_format,
                                   labels={"version": "Plan version", "sha256": "Hash (first 16 characters)",
                                           "locked_utc": "Locked (UTC)", "by": "Locked by", "reason": "Reason",
                                           "changes": "What changed (plan item: before → after)",
                                           "after_runs": "Locked after runs of an earlier version"},
                                   kinds={"version": "text", "changes": "text", "after_runs": "text"}))
        for row in history:
            if row["after_runs"] != "no":
                section.notice(f"Plan version {row['version']} was locked after data cuts had already been "
                               f"analysed with an earlier version ({row['after_runs']}). A reviewer should "
                               "check that the amendment did not depend on those results.")
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
                        "reason": entry.get("reason") or entry.get("why"),
                        "changes": _changes_text(entry.get("changes")),
                        "after_runs": _runs_before_text(entry.get("runs_before"))})
    return out


def _changes_text(changes: Any) -> str:
    if not changes:
        return "first lock" if changes == [] else ""
    shown = [f"{c.get('item')}: {c.get('old')} → {c.get('new')}" for c in changes[:12] if isinstance(c, Mapping)]
    more = f"; and {len(changes) - 12} more" if len(changes) > 12 else ""
    return "; ".join(shown) + more


def _runs_before_text(runs: Any) -> str:
    if not runs:
        return "no"
    return ", ".join(f"cut {r.get('cut')} (run {r.get('run_id')}, plan version {r.get('plan_version')})"
                     for r in runs if isinstance(r, Mapping))


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
    ids = [str(e.get("id") or f"estimand{i + 1}") for i, e in enumerate(entries)]
    columns = ["attribute", *ids]
    rows = [
        ["Population", *[population_labels.get(e.get("population"), e.get("population")) for e in entries]],
        ["Treatment", *[e.get("treatment") for e in entries]],
        ["Variable (endpoint)", *[_variable_of(results, e.get("id")) for e in entries]],
        ["Intercurrent events and strategies", *[_events_text(e, event_labels) for e in entries]],
        ["Population-level summary", *[e.get("summary") for e in entries]],
    ]
    # A reader knows an estimand by its label; the plan's identifiers stay in a footnote and as the
    # CSV file's column names, where a program looks for them.
    labels = {"attribute": "Attribute", **{i: str(e.get("label") or i) for i, e in zip(ids, entries)}}
    kinds = {c: "text" for c in columns}
    footnote = "Identifiers in the plan: " + "; ".join(f"{labels[i]}: {i}" for i in ids) + "."
    section.table(from_records(rows, columns, slug="estimands", title="Estimands and their attributes",
                               number_format=number_format, labels=labels, kinds=kinds, footnotes=(footnote,)))


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
    if record.get("sequential"):   # planned looks with alpha spending: its own wording and tables
        from trialcut.report.sections_sequential import multiplicity_by_look

        labels = {a.get("id"): a.get("label") for e in results.get("endpoints") or [] for a in e.get("analyses") or []}
        return multiplicity_by_look(section, results, number_format, labels)
    if method == "none" or not hypotheses:
        section.paragraph("The plan declares no adjustment for multiple comparisons; p-values are unadjusted.")
        return
    procedure = {"holm": "Holm", "hochberg": "Hochberg", "bonferroni": "Bonferroni",
                 "graphical": "graphical"}.get(method, method)
    alpha = record.get("alpha", 0.05)
    reference = ((results.get("plan") or {}).get("arms") or {}).get("reference") or "the reference arm"
    labels = {a.get("id"): a.get("label") for e in results.get("endpoints") or [] for a in e.get("analyses") or []}
    rows = sorted(rows_as_dicts(hypotheses), key=lambda r: (r.get("p") is None, r.get("p") or 0.0))
    for order, row in enumerate(rows, start=1):
        row["order"] = order
        row["comparison"] = " ".join(str(part) for part in (
            row.get("arm"), f"vs {reference}", f"at {row['visit']}" if row.get("visit") else "") if part)
        row["analysis_label"] = labels.get(row.get("analysis"), row.get("analysis"))
        row["conclusion"] = ("rejected" if row.get("rejected") else "not rejected") if "rejected" in row else None
    weights = {row.get("weight") for row in rows}
    # Under Holm, Hochberg or Bonferroni with equal weights a weight column says nothing.
    show_weight = "weight" in (hypotheses.get("columns") or []) and (
        len(weights) > 1 or method not in ("holm", "hochberg", "bonferroni"))
    section.paragraph(
        f"Hypotheses tested with the {procedure} procedure at an overall two-sided level of {alpha:g}"
        + (", in the order of their p-values (smallest first)" if method in ("holm", "hochberg") else "") + ". "
        "Small p-values keep three significant digits here so that their order shows.")
    columns = ["id", "order", "comparison", "analysis_label", *(["weight"] if show_weight else []), "p",
               "adjusted_p", "conclusion"]
    table = from_records(rows, columns, slug="multiplicity", number_format=number_format,
                         title=f"Tests adjusted for multiplicity ({procedure} procedure, overall two-sided level {alpha:g})",
                         labels={"order": "Order", "comparison": "Comparison", "analysis_label": "Analysis",
                                 "weight": "Weight", "p": "p-value", "adjusted_p": "Adjusted p-value",
                                 "conclusion": "Conclusion"},
                         kinds={"p": "p_exact", "adjusted_p": "p_exact", "weight": "general", "order": "count"},
                         footnotes=[f"Comparisons are each arm minus {reference}. p-values are two-sided; an adjusted "
                                    f"p-value below {alpha:g} rejects its hypothesis.",
                                    f"Source: results of run {(results.get('run') or {}).get('id', 'not recorded')}; "
                                    f"data file SHA-256 {short_hash((results.get('data') or {}).get('sha256'), 12)}…."])
    section.table(replace(table, display=tuple(c for c in table.display if c.sources != ("id",))))
    rejected = [r["comparison"] for r in rows if r.get("rejected")]
    if not rows:
        return
    if len(rejected) == len(rows):
        section.paragraph(f"Conclusion: every hypothesis is rejected at the overall two-sided level {alpha:g} "
                          f"({'; '.join(rejected)}): the type I error is controlled across all {len(rows)} tests.")
    elif rejected:
        section.paragraph(f"Conclusion: {len(rejected)} of {len(rows)} hypotheses are rejected at the overall "
                          f"two-sided level {alpha:g} ({'; '.join(rejected)}); the others are not.")
    else:
        section.paragraph(f"Conclusion: no hypothesis is rejected at the overall two-sided level {alpha:g}.")


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
# The appendix has a module of its own (sections_audit.py); it is named here too so the
# document finds it where it always did.
from trialcut.report.sections_audit import audit_appendix  # noqa: E402,F401
