"""Compare two runs: did the plan change, how did the data change, how did the estimates move.

``compare_results`` is a pure function of two results dicts; ``render_comparison`` lays its
answer out with the same templates, stylesheet and table model as the report.
"""
from __future__ import annotations

from dataclasses import replace
from pathlib import Path
from typing import Any, Mapping, Sequence

from trialcut.report.document import Document, Section, number_items
from trialcut.report.formatting import NumberFormat, short_hash
from trialcut.report.render import render_html, write_outputs
from trialcut.report.sections_front import facts_table
from trialcut.report.tables import ReportColumn, from_records, rows_as_dicts


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
    """(path, a, b) for every leaf that differs; lists are compared position by position."""
    if isinstance(a, Mapping) and isinstance(b, Mapping):
        for key in list(a) + [k for k in b if k not in a]:
            yield from _differences(f"{path}.{key}" if path else str(key), a.get(key, _ABSENT), b.get(key, _ABSENT))
    elif isinstance(a, list) and isinstance(b, list):
        for index in range(max(len(a), len(b))):
            yield from _differences(f"{path}[{index}]", a[index] if index < len(a) else _ABSENT,
                                    b[index] if index < len(b) else _ABSENT)
    elif a != b:
        yield {"field": path, "a": _shown(a), "b": _shown(b)}


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
    of that participant's records) when both runs carry them; records come from the row counts
    (and ``participant_rows`` per participant, when present, to split them by kind of change).
    """
    answer: dict[str, Any] = {
        "changed": data_a.get("sha256") != data_b.get("sha256"),
        "sha256_a": data_a.get("sha256"), "sha256_b": data_b.get("sha256"),
        "rows_a": data_a.get("rows"), "rows_b": data_b.get("rows"),
        "participants_a": data_a.get("participants"), "participants_b": data_b.get("participants"),
        "participant_level": False,
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
        rows_a, rows_b = data_a.get("participant_rows"), data_b.get("participant_rows")
        if isinstance(rows_a, Mapping) and isinstance(rows_b, Mapping):
            answer["records_added_with_new_participants"] = sum(rows_b.get(k, 0) for k in added)
            answer["records_removed_with_participants"] = sum(rows_a.get(k, 0) for k in removed)
            answer["records_net_change_in_changed_participants"] = sum(
                rows_b.get(k, 0) - rows_a.get(k, 0) for k in changed)
    return answer


# --------------------------------------------------------------------------- estimates
def _estimates(results: Mapping[str, Any]) -> dict[tuple, dict[str, Any]]:
    out = {}
    for endpoint in results.get("endpoints") or []:
        for analysis in endpoint.get("analyses") or []:
            if analysis.get("status") not in (None, "ok"):
                continue
            for row in rows_as_dicts((analysis.get("tables") or {}).get("differences")):
                if row.get("visit") != endpoint.get("primary_visit"):
                    continue
                key = (endpoint.get("id"), analysis.get("id"), row.get("arm"))
                out[key] = {"endpoint": endpoint.get("id"), "analysis": analysis.get("id"),
                            "label": analysis.get("label") or analysis.get("id"), "role": analysis.get("role"),
                            "arm": row.get("arm"), "visit": row.get("visit"), "decimals": endpoint.get("decimals"),
                            "estimate": row.get("estimate"), "lower": row.get("lower"),
                            "upper": row.get("upper"), "p": row.get("p")}
    return out


def compare_estimates(results_a: Mapping[str, Any], results_b: Mapping[str, Any]) -> list[dict[str, Any]]:
    """The primary and sensitivity estimates at each endpoint's primary visit, both runs side by side."""
    first, second = _estimates(results_a), _estimates(results_b)
    rows = []
    for key in list(first) + [k for k in second if k not in first]:
        a, b = first.get(key, {}), second.get(key, {})
        both = a or b
        change = (b["estimate"] - a["estimate"]
                  if a.get("estimate") is not None and b.get("estimate") is not None else None)
        rows.append({"endpoint": both["endpoint"], "analysis": both["analysis"], "label": both["label"],
                     "role": both["role"], "arm": both["arm"], "visit": both["visit"], "decimals": both["decimals"],
                     "estimate_a": a.get("estimate"), "lower_a": a.get("lower"), "upper_a": a.get("upper"),
                     "p_a": a.get("p"), "estimate_b": b.get("estimate"), "lower_b": b.get("lower"),
                     "upper_b": b.get("upper"), "p_b": b.get("p"), "change": change})
    return rows


def compare_results(results_a: Mapping[str, Any], results_b: Mapping[str, Any]) -> dict[str, Any]:
    """Plan change, data change and estimate changes between run A (earlier) and run B (later)."""
    run_a, run_b = results_a.get("run") or {}, results_b.get("run") or {}
    return {
        "runs": {"a": {k: run_a.get(k) for k in ("id", "study_id", "cut", "started_utc", "tool_version")},
                 "b": {k: run_b.get(k) for k in ("id", "study_id", "cut", "started_utc", "tool_version")}},
        "plan": compare_plans(results_a.get("plan") or {}, results_b.get("plan") or {}),
        "data": compare_data_manifests(results_a.get("data") or {}, results_b.get("data") or {}),
        "estimates": compare_estimates(results_a, results_b),
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
    runs, plan, data = comparison["runs"], comparison["plan"], comparison["data"]
    sections = []
    identity = Section("runs", "The two runs")
    identity.table(facts_table(
        [(f"Run {side.upper()}: {label}", runs[side].get(key), "text")
         for side in ("a", "b") for label, key in (("identifier", "id"), ("data cut", "cut"),
                                                   ("started (UTC)", "started_utc"),
                                                   ("software version", "tool_version"))],
        slug="runs", title="Runs compared", number_format=number_format))
    sections.append(identity)
    sections.append(_plan_section(plan, number_format))
    sections.append(_data_section(data, number_format))
    sections.append(_estimates_section(comparison["estimates"], results_b, number_format))
    study = (results_b.get("plan") or {}).get("study") or {}
    document = Document(
        title=f"{study.get('id', '')} — comparison of cut {runs['a'].get('cut')} with cut {runs['b'].get('cut')}",
        study_id=str(study.get("id") or runs["b"].get("study_id") or ""), cut=f"{runs['a'].get('cut')} → {runs['b'].get('cut')}",
        run_id=f"{runs['a'].get('id')} vs {runs['b'].get('id')}", plan_hash=str(plan.get("sha256_b") or ""),
        paper=((results_b.get("plan") or {}).get("report") or {}).get("paper") or "A4",
        facts=[], banners=[], cautions=[], sections=sections)
    return number_items(document, (results_b.get("plan") or {}).get("report") or {})


def _plan_section(plan: Mapping[str, Any], number_format: NumberFormat) -> Section:
    section = Section("plan", "Analysis plan")
    if not plan["changed"]:
        section.paragraph(f"The plan is the same in both runs (hash {short_hash(plan['sha256_a'], 16)}).")
        return section
    section.notice(f"The plan changed: hash {short_hash(plan['sha256_a'], 16)} (version {plan.get('version_a')}) "
                   f"became {short_hash(plan['sha256_b'], 16)} (version {plan.get('version_b')}).")
    if plan.get("fields") is None:
        section.paragraph("The results do not carry the plans' canonical forms, so only the change of hash can "
                          "be reported; compare the two plan files to see which settings changed.")
    elif plan["fields"]:
        rows = [{"field": d["field"], "a": _text(d["a"]), "b": _text(d["b"])} for d in plan["fields"]]
        section.table(from_records(rows, ("field", "a", "b"), slug="plan_changes", title="Plan settings that changed",
                                   number_format=number_format,
                                   labels={"field": "Setting", "a": "Run A", "b": "Run B"},
                                   kinds={"field": "text", "a": "text", "b": "text"}))
    return section


def _text(value: Any) -> str:
    return value if isinstance(value, str) else repr(value) if not isinstance(value, (int, float)) else f"{value:g}"


def _data_section(data: Mapping[str, Any], number_format: NumberFormat) -> Section:
    section = Section("data", "Data cut")
    pairs = [("Data changed", data.get("changed"), "flag"),
             ("Hash in run A", data.get("sha256_a"), "text"), ("Hash in run B", data.get("sha256_b"), "text"),
             ("Records in run A", data.get("rows_a"), "count"), ("Records in run B", data.get("rows_b"), "count"),
             ("Participants in run A", data.get("participants_a"), "count"),
             ("Participants in run B", data.get("participants_b"), "count")]
    if data.get("participant_level"):
        pairs += [("Participants added", len(data.get("participants_added") or []), "count"),
                  ("Participants removed", len(data.get("participants_removed") or []), "count"),
                  ("Participants whose records changed", len(data.get("participants_changed") or []), "count"),
                  ("Participants unchanged", data.get("participants_unchanged"), "count")]
        for key, label in (("records_added_with_new_participants", "Records of added participants"),
                           ("records_removed_with_participants", "Records of removed participants"),
                           ("records_net_change_in_changed_participants",
                            "Net change in records of changed participants")):
            if key in data:
                pairs.append((label, data[key], "count"))
    section.table(facts_table([p for p in pairs if p[1] is not None], slug="data_changes",
                              title="How the data cut changed", number_format=number_format))
    if data.get("participant_level"):
        for key, label in (("participants_added", "Added"), ("participants_removed", "Removed"),
                           ("participants_changed", "Changed")):
            ids = data.get(key) or []
            if ids:
                shown = ", ".join(ids[:40]) + (f" and {len(ids) - 40} more" if len(ids) > 40 else "")
                section.paragraph(f"{label} participants: {shown}.")
    else:
        section.paragraph("The results do not carry per-participant hashes, so only whole-file changes "
                          "(hash, records, participants) can be reported.")
    return section


def _estimates_section(rows: Sequence[Mapping[str, Any]], results_b, number_format: NumberFormat) -> Section:
    section = Section("estimates", "Estimates at the primary visit")
    if not rows:
        section.notice("Neither run holds a table of differences at the primary visit.")
        return section
    section.paragraph("Each analysis' difference from the reference arm at the endpoint's primary visit, "
                      "in run A and run B; the change is B minus A.")
    decimals = next((r["decimals"] for r in rows if r.get("decimals") is not None), None)
    endpoint_format = NumberFormat.from_results(results_b, raw=decimals)
    columns = ("label", "role", "arm", "estimate_a", "lower_a", "upper_a", "p_a",
               "estimate_b", "lower_b", "upper_b", "p_b", "change")
    table = from_records(rows, columns, slug="estimates_compared", title="Estimates in both runs",
                         number_format=endpoint_format,
                         labels={"label": "Analysis", "role": "Role", "estimate_a": "Estimate A",
                                 "estimate_b": "Estimate B", "p_a": "p-value A", "p_b": "p-value B",
                                 "change": "Change (B − A)"},
                         kinds={"estimate_a": "mean", "estimate_b": "mean", "change": "mean",
                                "p_a": "p", "p_b": "p"})
    display = [c for c in table.display if c.sources[0] not in ("lower_a", "upper_a", "lower_b", "upper_b")]
    for side in ("a", "b"):
        position = next(i for i, c in enumerate(display) if c.sources == (f"estimate_{side}",)) + 1
        display.insert(position, ReportColumn((f"lower_{side}", f"upper_{side}"), f"CI {side.upper()}", "mean"))
    section.table(replace(table, display=tuple(display), wide=True))
    return section
