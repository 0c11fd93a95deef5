"""Compare two runs: did the plan change, how did the data change, how did the results move.

``compare_results`` is a pure function of two results dicts; ``render_comparison`` lays its
answer out with the same templates, stylesheet and table model as the report.  What it says:

- the plan: the settings that changed, each named by the ids of the items it sits in
  (``endpoints[fbs_change].analyses.sensitivity[mi_jump_to_reference].options.imputations``);
- the data: participants new, unchanged, with new visits only, with edited values, with
  records removed, and gone; a listing of every edited value (participant, visit, field,
  value in run A and in run B) from the records each run carries
  (``data.participant_records``, see run/participant_records.py);
- the results: N, estimate, standard error, degrees of freedom and confidence interval of
  every analysis at the primary visit in both runs side by side; the tipping points; the
  multiplicity decisions.
"""
from __future__ import annotations

from dataclasses import replace
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

from trialcut.report.blocks import Section, walk
from trialcut.report.document import Document, number_items
from trialcut.report.formatting import NumberFormat, short_hash
from trialcut.report.render import render_html, write_outputs
from trialcut.report.tables import ReportColumn, ReportTable, from_records, rows_as_dicts

# Keys that name an item of a list in the plan, tried in this order (ids first).
ITEM_KEYS = ("id", "code", "label", "event")
# Edited values shown in the document; the complete listing is always a CSV file.
LISTING_SHOWN = 60
WITHHELD_TEXT = "(withheld)"


# --------------------------------------------------------------------------- plan
def compare_plans(plan_a: Mapping[str, Any], plan_b: Mapping[str, Any]) -> dict[str, Any]:
    """Whether the plan hash changed and, when both canonical forms are present, which fields."""
    hash_a, hash_b = plan_a.get("sha256"), plan_b.get("sha256")
    answer: dict[str, Any] = {"changed": hash_a != hash_b, "sha256_a": hash_a, "sha256_b": hash_b,
                              "version_a": plan_a.get("version"), "version_b": plan_b.get("version"),
                              "fields": None}
    canonical_a, canonical_b = plan_a.get("canonical"), plan_b.get("canonical")
    if isinstance(canonical_a, Mapping) and isinstance(canonical_b, Mapping):
        answer["fields"] = list(_differences("", canonical_a, canonical_b))
    return answer


def _differences(path: str, a: Any, b: Any):
    """(path, a, b) for every leaf that differs.  Lists of items with ids are matched by id and
    named by it; other lists position by position."""
    if isinstance(a, Mapping) and isinstance(b, Mapping):
        for key in list(a) + [k for k in b if k not in a]:
            yield from _differences(f"{path}.{key}" if path else str(key), a.get(key, _ABSENT), b.get(key, _ABSENT))
    elif isinstance(a, list) and isinstance(b, list):
        key = _item_key(a, b)
        if key is None:
            for index in range(max(len(a), len(b))):
                yield from _differences(f"{path}[{index}]", a[index] if index < len(a) else _ABSENT,
                                        b[index] if index < len(b) else _ABSENT)
            return
        first, second = {item[key]: item for item in a}, {item[key]: item for item in b}
        for name in list(first) + [n for n in second if n not in first]:
            yield from _differences(f"{path}[{name}]", first.get(name, _ABSENT), second.get(name, _ABSENT))
    elif a != b:
        yield {"field": path, "a": _shown(a), "b": _shown(b)}


def _item_key(a: Sequence[Any], b: Sequence[Any]) -> str | None:
    """The key that names every item of both lists uniquely (an id), or None."""
    items = list(a) + list(b)
    if not items or not all(isinstance(item, Mapping) for item in items):
        return None
    for key in ITEM_KEYS:
        if all(isinstance(item.get(key), (str, int)) for item in items):
            names_a, names_b = [item[key] for item in a], [item[key] for item in b]
            if len(set(names_a)) == len(names_a) and len(set(names_b)) == len(names_b):
                return key
    return None


class _Absent:
    def __repr__(self) -> str:
        return "(absent)"


_ABSENT = _Absent()


def _shown(value: Any) -> Any:
    return "(absent)" if value is _ABSENT else value


# --------------------------------------------------------------------------- data
def compare_data_manifests(data_a: Mapping[str, Any], data_b: Mapping[str, Any]) -> dict[str, Any]:
    """How the data cut changed, from the results' ``data`` blocks.

    Participants added, removed and changed come from ``participant_hashes`` (USUBJID -> SHA-256
    of that participant's records) when both runs carry them; with ``participant_records`` in
    both, each changed participant is put in one kind of change and every edited value listed.
    """
    answer: dict[str, Any] = {
        "changed": data_a.get("sha256") != data_b.get("sha256"),
        "sha256_a": data_a.get("sha256"), "sha256_b": data_b.get("sha256"),
        "file_a": data_a.get("file"), "file_b": data_b.get("file"),
        "rows_a": data_a.get("rows"), "rows_b": data_b.get("rows"),
        "participants_a": data_a.get("participants"), "participants_b": data_b.get("participants"),
        "participant_level": False, "record_level": False,
    }
    if isinstance(data_a.get("rows"), int) and isinstance(data_b.get("rows"), int):
        answer["rows_difference"] = data_b["rows"] - data_a["rows"]
    hashes_a, hashes_b = data_a.get("participant_hashes"), data_b.get("participant_hashes")
    if isinstance(hashes_a, Mapping) and isinstance(hashes_b, Mapping):
        added = sorted(set(hashes_b) - set(hashes_a))
        removed = sorted(set(hashes_a) - set(hashes_b))
        changed = sorted(k for k in set(hashes_a) & set(hashes_b) if hashes_a[k] != hashes_b[k])
        answer.update(participant_level=True, participants_added=added, participants_removed=removed,
                      participants_changed=changed,
                      participants_unchanged=len(set(hashes_a) & set(hashes_b)) - len(changed))
        records_a, records_b = data_a.get("participant_records"), data_b.get("participant_records")
        if _usable_records(records_a) and _usable_records(records_b):
            answer.update(record_level=True, **compare_records(records_a, records_b, changed))
            answer["records_of_added"] = sum(len(records_b["participants"].get(k, {})) for k in added)
            answer["records_of_removed"] = sum(len(records_a["participants"].get(k, {})) for k in removed)
    return answer


def _usable_records(records: Any) -> bool:
    return isinstance(records, Mapping) and isinstance(records.get("participants"), Mapping) \
        and isinstance(records.get("fields"), list)


def compare_records(records_a: Mapping[str, Any], records_b: Mapping[str, Any],
                    changed: Iterable[str]) -> dict[str, Any]:
    """Each changed participant's kind of change, and the listing of edited values.

    Kinds (one per participant, the first that applies): ``records_removed`` (a record of run A
    is not in run B), ``values_edited`` (a record of both runs differs in a field), ``new_visits``
    (only records added).  A participant whose hash changed but whose records did not changed
    in a withheld column (the arm).
    """
    fields_a, fields_b = list(records_a["fields"]), list(records_b["fields"])
    withheld = sorted(set(records_a.get("withheld") or []) | set(records_b.get("withheld") or []))
    kinds: dict[str, list[str]] = {"new_visits": [], "values_edited": [], "records_removed": []}
    listing: list[dict[str, Any]] = []
    counts = {kind: {"added": 0, "removed": 0} for kind in kinds}     # records, by kind of participant
    for participant in changed:
        first = records_a["participants"].get(participant, {})
        second = records_b["participants"].get(participant, {})
        gone = [name for name in first if name not in second]
        new = [name for name in second if name not in first]
        edits = _edits(participant, first, second, fields_a, fields_b)
        if not (gone or edits or new):
            edits = [{"participant": participant, "visit": "all records", "field": ", ".join(withheld) or "unknown",
                      "a": WITHHELD_TEXT, "b": WITHHELD_TEXT}]
        kind = "records_removed" if gone else "values_edited" if edits else "new_visits"
        kinds[kind].append(participant)
        counts[kind]["added"] += len(new)
        counts[kind]["removed"] += len(gone)
        listing += edits
        listing += [{"participant": participant, "visit": name, "field": "whole record", "a": "present",
                     "b": "removed"} for name in gone]
    return {"participants_with_new_visits_only": kinds["new_visits"],
            "participants_with_edited_values": kinds["values_edited"],
            "participants_with_records_removed": kinds["records_removed"],
            "records_by_kind": counts,
            "edited_values": listing, "withheld_fields": withheld}


def _edits(participant: str, first: Mapping[str, list], second: Mapping[str, list],
           fields_a: Sequence[str], fields_b: Sequence[str]) -> list[dict[str, Any]]:
    """Edited values of the records both runs hold.  A field edited the same way in every
    such record (a participant-level value repeated on each row) is listed once."""
    common = [name for name in first if name in second]
    changes: dict[tuple[str, str, str], list[str]] = {}
    for name in common:
        values_a = dict(zip(fields_a, first[name]))
        values_b = dict(zip(fields_b, second[name]))
        for field in list(values_a) + [f for f in values_b if f not in values_a]:
            old, new = values_a.get(field, "(absent)"), values_b.get(field, "(absent)")
            if old != new:
                changes.setdefault((field, old, new), []).append(name)
    rows = []
    for (field, old, new), names in changes.items():
        everywhere = len(names) == len(common) and len(common) > 1
        shown = [f"all {len(common)} records"] if everywhere else names
        rows += [{"participant": participant, "visit": visit, "field": field, "a": old or "(empty)",
                  "b": new or "(empty)"} for visit in shown]
    return rows


# --------------------------------------------------------------------------- estimates
def _estimates(results: Mapping[str, Any]) -> dict[tuple, dict[str, Any]]:
    counts = _population_counts(results)
    out = {}
    for endpoint in results.get("endpoints") or []:
        for analysis in endpoint.get("analyses") or []:
            if analysis.get("status") not in (None, "ok"):
                continue
            per_arm = counts.get(analysis.get("population") or endpoint.get("population"), {})
            fit = analysis.get("fit") or {}
            for row in rows_as_dicts((analysis.get("tables") or {}).get("differences")):
                if row.get("visit") != endpoint.get("primary_visit"):
                    continue
                key = (endpoint.get("id"), analysis.get("id"), row.get("arm"))
                n_arm, n_reference = per_arm.get(row.get("arm")), per_arm.get(row.get("reference"))
                out[key] = {"endpoint": endpoint.get("id"), "analysis": analysis.get("id"),
                            "label": analysis.get("label") or analysis.get("id"), "role": analysis.get("role"),
                            "arm": row.get("arm"), "reference": row.get("reference"), "visit": row.get("visit"),
                            "decimals": endpoint.get("decimals"), "effect": row.get("effect"),
                            "n": f"{n_arm}/{n_reference}" if n_arm is not None and n_reference is not None else None,
                            "n_analysed": fit.get("n_subjects"),
                            **{k: row.get(k) for k in ("estimate", "se", "df", "lower", "upper", "p")}}
    return out


def _population_counts(results: Mapping[str, Any]) -> dict[str, dict[str, int]]:
    """Population id -> {arm: N} from the run's population table (rows named by label)."""
    labels = {p.get("label"): p.get("id") for p in (results.get("plan") or {}).get("populations") or []}
    counts = {}
    for row in rows_as_dicts(results.get("populations")):
        name = row.get("population")
        counts[labels.get(name, name)] = {k: v for k, v in row.items() if isinstance(v, int) and k != "Total"}
    return counts


ESTIMATE_KEYS = ("n", "n_analysed", "estimate", "se", "df", "lower", "upper", "p")


def compare_estimates(results_a: Mapping[str, Any], results_b: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Every analysis' difference at its endpoint's primary visit, both runs side by side."""
    first, second = _estimates(results_a), _estimates(results_b)
    rows = []
    for key in list(first) + [k for k in second if k not in first]:
        a, b = first.get(key, {}), second.get(key, {})
        both = a or b
        change = (b["estimate"] - a["estimate"]
                  if a.get("estimate") is not None and b.get("estimate") is not None else None)
        rows.append({**{k: both.get(k) for k in ("endpoint", "analysis", "label", "role", "arm", "reference",
                                                 "visit", "decimals", "effect")},
                     **{f"{k}_a": a.get(k) for k in ESTIMATE_KEYS}, **{f"{k}_b": b.get(k) for k in ESTIMATE_KEYS},
                     "change": change})
    return rows


# --------------------------------------------------------------------------- tipping points, multiplicity
def _tipping_points(results: Mapping[str, Any]) -> dict[tuple, dict[str, Any]]:
    out = {}
    for endpoint in results.get("endpoints") or []:
        for analysis in endpoint.get("analyses") or []:
            for row in rows_as_dicts((analysis.get("tables") or {}).get("tipping_points")):
                key = (endpoint.get("id"), analysis.get("id"), row.get("arm"), row.get("reference_shift"))
                out[key] = {"label": analysis.get("label") or analysis.get("id"), "arm": row.get("arm"),
                            "reference_shift": row.get("reference_shift"), "decimals": endpoint.get("decimals"),
                            "tipping_shift": row.get("tipping_shift")}
    return out


def compare_tipping_points(results_a: Mapping[str, Any], results_b: Mapping[str, Any]) -> list[dict[str, Any]]:
    """The shift at which each tipping-point analysis' conclusion changes, in both runs."""
    first, second = _tipping_points(results_a), _tipping_points(results_b)
    rows = []
    for key in list(first) + [k for k in second if k not in first]:
        a, b = first.get(key, {}), second.get(key, {})
        both = a or b
        change = (b["tipping_shift"] - a["tipping_shift"]
                  if a.get("tipping_shift") is not None and b.get("tipping_shift") is not None else None)
        rows.append({"label": both["label"], "arm": both["arm"], "reference_shift": both["reference_shift"],
                     "decimals": both["decimals"], "tipping_shift_a": a.get("tipping_shift"),
                     "tipping_shift_b": b.get("tipping_shift"), "change": change})
    return rows


def compare_decisions(results_a: Mapping[str, Any], results_b: Mapping[str, Any]) -> dict[str, Any]:
    """Each multiplicity hypothesis' p-values and decision in both runs.

    The decision is ``rejected`` (a one-look procedure) or ``crossed_adjusted`` (a look of a
    group-sequential design, where ``boundary_p`` is the threshold); a hypothesis not tested
    at a look has no decision.
    """
    def hypotheses(results):
        record = results.get("multiplicity") or {}
        labels = {a.get("id"): a.get("label") for e in results.get("endpoints") or [] for a in e.get("analyses") or []}
        found = {}
        for row in rows_as_dicts(record.get("hypotheses")):
            decision = row.get("rejected", row.get("crossed_adjusted"))
            if row.get("tested") is False:
                decision = None
            found[row.get("id")] = {**row, "decision": decision,
                                    "analysis_label": labels.get(row.get("analysis"), row.get("analysis"))}
        return record, found

    record_a, first = hypotheses(results_a)
    record_b, second = hypotheses(results_b)
    rows = []
    for key in list(first) + [k for k in second if k not in first]:
        a, b = first.get(key, {}), second.get(key, {})
        both = a or b
        row = {"hypothesis": f"{both.get('arm')} at {both.get('visit')}, {both.get('analysis_label')}",
               "same": (a.get("decision") == b.get("decision")) if a and b else None}
        for side, found in (("a", a), ("b", b)):
            row.update({f"p_{side}": found.get("p"), f"adjusted_p_{side}": found.get("adjusted_p"),
                        f"boundary_p_{side}": found.get("boundary_p"), f"rejected_{side}": found.get("decision")})
        rows.append(row)
    return {"method_a": record_a.get("method"), "method_b": record_b.get("method"),
            "alpha_a": record_a.get("alpha"), "alpha_b": record_b.get("alpha"),
            "interim_a": _is_interim(record_a), "interim_b": _is_interim(record_b), "hypotheses": rows}


def _is_interim(record: Mapping[str, Any]) -> bool:
    """A run whose decisions are not final: a look before the last, or a cut that is not a planned look."""
    facts = record.get("sequential") or {}
    if not facts:
        return False
    return not (facts.get("planned_look") and facts.get("look") == facts.get("looks"))


def late_amendments(results: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Amendments in a run's lock chain that were locked after cuts had been run with an
    earlier plan version (``runs_before`` as the record layer flags them)."""
    lock = (results.get("plan") or {}).get("lock") or {}
    return [{"version": entry.get("version"), "locked_utc": entry.get("locked_utc"),
             "runs_before": list(entry.get("runs_before") or [])}
            for entry in lock.get("amendments") or [] if isinstance(entry, Mapping) and entry.get("runs_before")]


def compare_results(results_a: Mapping[str, Any], results_b: Mapping[str, Any]) -> dict[str, Any]:
    """Plan, data and result changes between run A (earlier) and run B (later)."""
    keys = ("id", "study_id", "cut", "started_utc", "tool_version")
    run_a, run_b = results_a.get("run") or {}, results_b.get("run") or {}
    return {
        "runs": {"a": {k: run_a.get(k) for k in keys}, "b": {k: run_b.get(k) for k in keys}},
        "plan": {**compare_plans(results_a.get("plan") or {}, results_b.get("plan") or {}),
                 "late_amendments": late_amendments(results_b)},
        "data": compare_data_manifests(results_a.get("data") or {}, results_b.get("data") or {}),
        "estimates": compare_estimates(results_a, results_b),
        "tipping_points": compare_tipping_points(results_a, results_b),
        "multiplicity": compare_decisions(results_a, results_b),
    }


# --------------------------------------------------------------------------- rendering
def render_comparison(results_a: Mapping[str, Any], results_b: Mapping[str, Any], out_folder: Path, *,
                      plan_diff: list | None = None, data_diff: dict | None = None) -> dict[str, Path]:
    """comparison.html, comparison.pdf and its tables as CSV in ``out_folder``.

    ``plan_diff`` (a list of {field, a, b}) and ``data_diff`` (as from
    :func:`compare_data_manifests`) replace what this module can work out from the results alone.
    """
    comparison = compare_results(results_a, results_b)
    if plan_diff is not None:
        comparison["plan"]["fields"] = list(plan_diff)
    if data_diff is not None:
        comparison["data"] = {**comparison["data"], **data_diff}
    document = comparison_document(comparison, results_a, results_b)
    html = render_html(document, template="comparison.html.j2", comparison=comparison)
    return write_outputs(document, html, Path(out_folder), stem="comparison")


def comparison_document(comparison: Mapping[str, Any], results_a, results_b) -> Document:
    number_format = NumberFormat.from_results(results_b)
    runs, plan = comparison["runs"], comparison["plan"]
    endpoint_format = _endpoint_format(results_b, comparison["estimates"])
    sections = [_runs_section(comparison, results_a, results_b, number_format),
                _plan_section(plan, number_format),
                _data_section(comparison["data"], number_format),
                _estimates_section(comparison["estimates"], endpoint_format, results_b),
                _tipping_section(comparison["tipping_points"], endpoint_format),
                _decisions_section(comparison["multiplicity"], number_format)]
    study = (results_b.get("plan") or {}).get("study") or {}
    report = (results_b.get("plan") or {}).get("report") or {}
    document = Document(
        title=f"{study.get('id', '')} — comparison of cut {runs['a'].get('cut')} with cut {runs['b'].get('cut')}",
        study_id=str(study.get("id") or runs["b"].get("study_id") or ""),
        cut=f"{runs['a'].get('cut')} → {runs['b'].get('cut')}",
        run_id=f"{runs['a'].get('id')} vs {runs['b'].get('id')}", plan_hash=str(plan.get("sha256_b") or ""),
        paper=report.get("paper") if report.get("paper") in ("A4", "Letter") else "A4",
        facts=[], banners=[], cautions=[], sections=[s for s in sections if s is not None])
    # Every page of the comparison is landscape (see comparison.html.j2): tables take its width.
    for part in walk(document.sections):
        for block in part.blocks:
            if block.kind == "table":
                block.content = replace(block.content, wide=True)
    return number_items(document, report)


def _endpoint_format(results: Mapping[str, Any], rows: Sequence[Mapping[str, Any]]) -> NumberFormat:
    decimals = next((r["decimals"] for r in rows if r.get("decimals") is not None), None)
    return NumberFormat.from_results(results, raw=decimals)


def _side_by_side(rows, slug: str, title: str, number_format: NumberFormat, *, item: str,
                  item_label: str) -> ReportTable:
    """Item | Run A | Run B, every value as text."""
    return from_records(rows, (item, "a", "b"), slug=slug, title=title, number_format=number_format,
                        labels={item: item_label, "a": "Run A", "b": "Run B"},
                        kinds={item: "text", "a": "text", "b": "text"})


def _runs_section(comparison, results_a, results_b, number_format: NumberFormat) -> Section:
    section = Section("runs", "The two runs")
    runs, data, plan = comparison["runs"], comparison["data"], comparison["plan"]
    pairs = [("Run identifier", runs["a"].get("id"), runs["b"].get("id")),
             ("Data cut", runs["a"].get("cut"), runs["b"].get("cut")),
             ("Run began (UTC)", runs["a"].get("started_utc"), runs["b"].get("started_utc")),
             ("trialcut version", runs["a"].get("tool_version"), runs["b"].get("tool_version")),
             ("Plan version", plan.get("version_a"), plan.get("version_b")),
             ("Plan hash (SHA-256)", plan.get("sha256_a"), plan.get("sha256_b")),
             ("Data file", data.get("file_a"), data.get("file_b")),
             ("Data hash (SHA-256)", data.get("sha256_a"), data.get("sha256_b")),
             ("Records in the file", data.get("rows_a"), data.get("rows_b")),
             ("Participants in the file", data.get("participants_a"), data.get("participants_b"))]
    rows = [{"item": label, "a": _text(a), "b": _text(b)} for label, a, b in pairs if a is not None or b is not None]
    section.paragraph("Run A is the earlier run, run B the later one. A change between data cuts is expected as "
                      "data accrue and is not by itself a finding; the results still need review by a qualified "
                      "statistician.")
    section.table(_side_by_side(rows, "runs", "The two runs compared", number_format, item="item", item_label="Item"))
    return section


def _plan_section(plan: Mapping[str, Any], number_format: NumberFormat) -> Section:
    section = Section("plan", "Analysis plan")
    for late in plan.get("late_amendments") or []:
        cuts = ", ".join(f"{run.get('cut')} (plan version {run.get('plan_version')})" for run in late["runs_before"])
        section.notice(f"Plan version {late['version']} was locked at {late['locked_utc']}, after these data cuts "
                       f"had been analysed with an earlier version: {cuts}. Check that the amendment did not "
                       "depend on their results.")
    if not plan["changed"]:
        section.paragraph(f"The plan is the same in both runs (hash {short_hash(plan['sha256_a'], 16)}).")
        return section
    section.notice(f"The plan changed: hash {short_hash(plan['sha256_a'], 16)} (version {plan.get('version_a')}) "
                   f"became {short_hash(plan['sha256_b'], 16)} (version {plan.get('version_b')}).")
    if plan.get("fields") is None:
        section.paragraph("The results do not carry the plans' canonical forms, so only the change of hash can "
                          "be reported; compare the two plan files to see which settings changed.")
    elif plan["fields"]:
        section.paragraph("Each setting is named by the ids of the plan items it sits in, as the plan file names "
                          "them.")
        rows = [{"field": d["field"], "a": _text(d["a"]), "b": _text(d["b"])} for d in plan["fields"]]
        section.table(_side_by_side(rows, "plan_changes", "Plan settings that changed", number_format,
                                    item="field", item_label="Setting"))
    return section


def _text(value: Any) -> str:
    if value is None:
        return "–"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, float)):
        return f"{value:g}"
    return value if isinstance(value, str) else repr(value)


# --------------------------------------------------------------------------- data section
def _data_section(data: Mapping[str, Any], number_format: NumberFormat) -> Section:
    section = Section("data", "Data cut")
    if not data.get("changed"):
        section.paragraph("The data file is the same in both runs (same SHA-256 hash).")
    if not data.get("participant_level"):
        section.paragraph("The results do not carry per-participant hashes, so only whole-file changes "
                          "(hash, records, participants) can be reported.")
        return section
    section.table(_kinds_table(data, number_format))
    if not data.get("record_level"):
        section.paragraph("The results do not carry each participant's records, so participants whose records "
                          "changed cannot be split into new visits, edited values and removed records.")
    for key, label in (("participants_added", "New participants"), ("participants_removed", "Participants no "
                                                                                           "longer in the data")):
        ids = data.get(key) or []
        if ids:
            section.paragraph(f"{label}: {_id_list(ids)}.")
    if data.get("record_level"):
        _listing(section, data, number_format)
    return section


def _kinds_table(data: Mapping[str, Any], number_format: NumberFormat) -> ReportTable:
    added, removed = data.get("participants_added") or [], data.get("participants_removed") or []
    by_kind = data.get("records_by_kind") or {}

    def row(kind: str, participants: Any, key: str | None = None, *, new=None, gone=None) -> dict[str, Any]:
        counted = by_kind.get(key, {}) if key else {}
        return {"kind": kind, "participants": participants, "added": counted.get("added", new),
                "removed": counted.get("removed", gone)}

    rows = [row("New in run B", len(added), new=data.get("records_of_added"), gone=0),
            row("Unchanged", data.get("participants_unchanged"), new=0, gone=0)]
    if data.get("record_level"):
        rows += [row("New visits only (earlier records unchanged)",
                     len(data.get("participants_with_new_visits_only") or []), "new_visits"),
                 row("Values edited (with or without new visits)",
                     len(data.get("participants_with_edited_values") or []), "values_edited"),
                 row("Records removed (with or without other changes)",
                     len(data.get("participants_with_records_removed") or []), "records_removed")]
    else:
        rows.append(row("Records changed (kind not known)", len(data.get("participants_changed") or [])))
    rows.append(row("No longer in the data", len(removed), new=0, gone=data.get("records_of_removed")))
    note = ("Each participant of either run is counted once: one with a record removed under 'Records removed', "
            "else one with an edited value under 'Values edited', else under 'New visits only'. Records added and "
            "removed are those of the participants in the row; the listing below names every edited value and "
            "removed record.")
    return from_records(rows, ("kind", "participants", "added", "removed"), slug="participant_changes",
                        title="Participants by how their records changed from run A to run B",
                        number_format=number_format,
                        labels={"kind": "How the records changed", "participants": "Participants",
                                "added": "Records added", "removed": "Records removed"},
                        kinds={"kind": "text", "participants": "count", "added": "count", "removed": "count"},
                        note=note)


def _id_list(ids: Sequence[str], shown: int = 30) -> str:
    return ", ".join(ids[:shown]) + (f" and {len(ids) - shown} more" if len(ids) > shown else "")


def _listing(section: Section, data: Mapping[str, Any], number_format: NumberFormat) -> None:
    listing = data.get("edited_values") or []
    if not listing:
        section.paragraph("No value of an earlier record was edited and no record was removed.")
        return
    withheld = data.get("withheld_fields") or []
    note = ("A field edited the same way in every record a participant has in both runs (a value recorded once per "
            "participant and repeated on each row) is listed once, as 'all n records'.")
    if withheld:
        note += (f" Values of {', '.join(withheld)} are withheld (treatment codes stay out of comparisons); a change "
                 "there shows as '(withheld)'.")
    columns = ("participant", "visit", "field", "a", "b")
    labels = {"participant": "Participant", "visit": "Visit (record)", "field": "Field",
              "a": "Value in run A", "b": "Value in run B"}
    kinds = {c: "text" for c in columns}
    full = from_records(listing, columns, slug="edited_values", number_format=number_format, labels=labels,
                        kinds=kinds, note=note,
                        title=f"Edited values and removed records of participants in both runs ({len(listing)})")
    if len(listing) <= LISTING_SHOWN:
        section.table(full)
        return
    section.table(from_records(listing[:LISTING_SHOWN], columns, slug="edited_values_first",
                               number_format=number_format, labels=labels, kinds=kinds,
                               note=note + f" The complete listing of {len(listing)} rows is a CSV file.",
                               title=f"Edited values and removed records, first {LISTING_SHOWN} of {len(listing)}"))
    section.csv_only([full])


# --------------------------------------------------------------------------- results
def _estimates_section(rows: Sequence[Mapping[str, Any]], endpoint_format: NumberFormat, results_b) -> Section:
    section = Section("estimates", "Estimates at the primary visit")
    if not rows:
        section.notice("Neither run holds a table of differences at the primary visit.")
        return section
    level = _confidence_words(results_b)
    section.paragraph("Each analysis' difference from the reference arm at the endpoint's primary visit, run A "
                      f"beside run B; the change is B minus A. N is the number of participants of the analysis' "
                      f"population in the arm and in the reference arm; the interval is the {level} confidence "
                      "interval.")
    # One table per endpoint: a risk difference or rate ratio shown with a score's 1 decimal reads 0.2 or
    # 0.8, and rows of three endpoints in one table do not say which endpoint each belongs to.
    labels = {e.get("id"): e.get("label") or e.get("id") for e in results_b.get("endpoints") or []}
    groups = list(dict.fromkeys(r.get("endpoint") for r in rows))
    for endpoint in groups:
        mine = [r for r in rows if r.get("endpoint") == endpoint]
        scale = "proportion" if any(r.get("effect") for r in mine) else None
        title = "Differences from the reference arm in both runs" + (
            f": {labels.get(endpoint, endpoint)}" if len(groups) > 1 else "")
        section.table(_estimates_table(mine, endpoint_format, title, f"estimates_compared_{groups.index(endpoint) + 1}"
                                       if len(groups) > 1 else "estimates_compared", scale))
    return section


def _estimates_table(rows, endpoint_format: NumberFormat, title: str, slug: str, scale: str | None) -> ReportTable:
    mean, sd = (scale, scale) if scale else ("mean", "sd")
    table = from_records(rows, ("label", "arm", "n_a", "estimate_a", "se_a", "df_a", "lower_a", "upper_a",
                                "n_b", "estimate_b", "se_b", "df_b", "lower_b", "upper_b", "change"),
                         slug=slug, title=title,
                         number_format=endpoint_format,
                         kinds={"label": "text", "arm": "text", "n_a": "text", "n_b": "text",
                                "estimate_a": mean, "estimate_b": mean, "se_a": sd, "se_b": sd,
                                "df_a": "df", "df_b": "df", "change": mean})
    display = []
    for side in ("a", "b"):
        upper = side.upper()
        display += [ReportColumn((f"n_{side}",), f"N in {upper}", "text"),
                    ReportColumn((f"estimate_{side}",), f"Estimate {upper}", mean),
                    ReportColumn((f"se_{side}",), f"Standard error {upper}", sd),
                    ReportColumn((f"df_{side}",), f"DF {upper}", "df"),
                    ReportColumn((f"lower_{side}", f"upper_{side}"), f"Confidence interval {upper}", mean)]
    display = [ReportColumn(("label",), "Analysis", "text", row_header=True), ReportColumn(("arm",), "Arm", "text"),
               *display, ReportColumn(("change",), "B − A", mean)]
    return _replace_display(table, display, note="B − A: the estimate of run B minus that of run A. "
                                                 "Abbreviations: DF: degrees of freedom; N: participants "
                                                 "in the arm / in the reference arm.")


def _replace_display(table: ReportTable, display: Sequence[ReportColumn], note: str = "") -> ReportTable:
    return replace(table, display=tuple(display), note=note or table.note)


def _confidence_words(results: Mapping[str, Any]) -> str:
    for endpoint in results.get("endpoints") or []:
        for analysis in endpoint.get("analyses") or []:
            fit = analysis.get("fit") or {}
            level = fit.get("confidence_level") or \
                (analysis.get("options") or {}).get("confidence_level")
            if level:
                return f"{100 * float(level):g}%"
    return "95%"


def _tipping_section(rows: Sequence[Mapping[str, Any]], endpoint_format: NumberFormat) -> Section | None:
    if not rows:
        return None
    section = Section("tipping", "Tipping points")
    section.paragraph("The shift added to the imputed values of the active arm at which the two-sided p-value of "
                      "the difference crosses the tipping-point analysis' own level, for each shift in the reference "
                      "arm, in both runs. That level is nominal: at an interim look it is not the group-sequential "
                      "boundary, and no decision follows from it. A larger tipping shift means a result that is "
                      "harder to overturn.")
    section.table(from_records(rows, ("label", "arm", "reference_shift", "tipping_shift_a", "tipping_shift_b",
                                      "change"),
                               slug="tipping_points_compared", title="Tipping points in both runs",
                               number_format=endpoint_format,
                               labels={"label": "Analysis", "arm": "Arm", "reference_shift": "Shift in reference arm",
                                       "tipping_shift_a": "Tipping shift A", "tipping_shift_b": "Tipping shift B",
                                       "change": "B − A"},
                               kinds={"label": "text", "arm": "text", "reference_shift": "shift",
                                      "tipping_shift_a": "mean", "tipping_shift_b": "mean", "change": "mean"},
                               note="B − A: the tipping shift of run B minus that of run A. A dash: the "
                                    "conclusion did not change within the shifts tried."))
    return section


def _decisions_section(record: Mapping[str, Any], number_format: NumberFormat) -> Section | None:
    rows = record.get("hypotheses") or []
    if not rows:
        return None
    section = Section("multiplicity", "Multiplicity decisions")
    changed = [r for r in rows if r.get("same") is False]
    method = {"holm": "Holm", "hochberg": "Hochberg", "bonferroni": "Bonferroni",
              "graphical": "graphical"}.get(record.get("method_b"), record.get("method_b"))
    section.paragraph(f"Hypotheses tested with the {method} procedure at an overall two-sided level of "
                      f"{record.get('alpha_b') or 0.05:g} in run B"
                      + (f" ({record.get('method_a')} at {record.get('alpha_a'):g} in run A)"
                         if (record.get("method_a"), record.get("alpha_a")) != (record.get("method_b"),
                                                                                 record.get("alpha_b"))
                         and record.get("alpha_a") is not None else "") + ". "
                      + ("Every decision is the same in both runs." if not changed else
                         f"{len(changed)} decision{'s' if len(changed) > 1 else ''} changed: "
                         + "; ".join(r["hypothesis"] for r in changed) + ".")
                      + (" Both runs are looks of a group-sequential design: an earlier look is judged against a "
                         "stricter boundary, so a decision that changes from one look to the next is expected."
                         if any(r.get("boundary_p_a") is not None or r.get("boundary_p_b") is not None for r in rows)
                         else ""))
    columns = ["hypothesis"]
    labels = {"hypothesis": "Hypothesis", "same": "Same decision"}
    for side in ("a", "b"):
        upper = side.upper()
        for key, label in (("p", "p-value"), ("adjusted_p", "Adjusted p-value"), ("boundary_p", "Boundary p-value"),
                           ("rejected", "Rejected")):
            if key in ("p", "rejected") or any(r.get(f"{key}_{side}") is not None for r in rows):
                columns.append(f"{key}_{side}")
                interim = key == "rejected" and record.get(f"interim_{side}")
                labels[f"{key}_{side}"] = f"Boundary crossed (interim) {upper}" if interim else f"{label} {upper}"
    columns.append("same")
    # p-values keep three significant digits and boundaries the places of the run's own report, so a
    # p-value can be read against its boundary (never '<0.001' beside a boundary of 0.001).
    kinds = {c: ("flag" if c.startswith(("rejected", "same")) else "text" if c == "hypothesis"
                 else "boundary_p" if c.startswith("boundary_p") else "p_exact") for c in columns}
    interim_sides = [side.upper() for side in ("a", "b") if record.get(f"interim_{side}")]
    note = ("Rejected: the null hypothesis is rejected after the adjustment for multiplicity (at a look of a "
            "group-sequential design: its adjusted boundary is crossed); a dash: not tested."
            + (f" Run {' and '.join(interim_sides)} is an interim look: a crossed boundary there allows stopping "
               "but is not a final decision." if interim_sides else ""))
    section.table(from_records(rows, columns, slug="multiplicity_compared",
                               title="Multiplicity-adjusted decisions in both runs", number_format=number_format,
                               labels=labels, kinds=kinds, note=note))
    return section


__all__ = ["compare_data_manifests", "compare_decisions", "compare_estimates", "compare_plans", "compare_records",
           "compare_results", "compare_tipping_points", "render_comparison"]
