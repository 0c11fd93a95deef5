"""Reproduction: compare a run's results with the results of running it again, number by number,
and the environment it was made in with the current one, package by package.

Compared: every number and every text under the results' ``populations``, ``disposition``,
``endpoints`` and ``multiplicity`` (times, ids and the software environment are not results).
Two numbers agree *exactly* when they are equal, *within tolerance* when
``|a − b| ≤ tolerance · max(1, |a|, |b|)`` (default tolerance 1e-9: the last few of the ~16
digits a double carries may change with the linear-algebra library or thread count), and
*differ* otherwise.

A run recorded in an older results format is compared in the current one: what the current format
no longer keeps is set aside first, with a note (``set_aside_by_format``), never counted as a
difference.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Iterator

COMPARED_SECTIONS = ("populations", "disposition", "endpoints", "multiplicity")
DEFAULT_TOLERANCE = 1e-9
EXACT, WITHIN, DIFFER = "exact", "within tolerance", "differ"


@dataclass(frozen=True)
class Difference:
    where: str
    original: Any
    again: Any
    kind: str      # "number", "text", "missing in the new run", "new in the new run"

    def to_dict(self) -> dict[str, Any]:
        return {"where": self.where, "original": self.original, "again": self.again, "kind": self.kind}


@dataclass(frozen=True)
class ReproductionOutcome:
    tolerance: float
    numbers: int
    exact: int
    within: int
    differences: tuple[Difference, ...] = ()
    packages: tuple[dict[str, Any], ...] = field(default=())
    notes: tuple[str, ...] = ()      # what was set aside before comparing, and why

    @property
    def verdict(self) -> str:
        if self.differences:
            return DIFFER
        return EXACT if self.exact == self.numbers else WITHIN

    @property
    def summary(self) -> str:
        return (f"{self.numbers} numbers compared: {self.exact} agree exactly, {self.within} within "
                f"tolerance {self.tolerance:g} (relative), {len(self.differences)} difference(s); "
                f"{len(self.packages)} package version(s) differ from the original run's")

    def to_dict(self) -> dict[str, Any]:
        return {"verdict": self.verdict, "tolerance": self.tolerance, "numbers": self.numbers,
                "exact": self.exact, "within_tolerance": self.within,
                "differences": [item.to_dict() for item in self.differences],
                "packages": list(self.packages), "notes": list(self.notes)}


def compare_results(original: dict[str, Any], again: dict[str, Any],
                    tolerance: float = DEFAULT_TOLERANCE) -> tuple[int, int, int, list[Difference]]:
    counts = {"numbers": 0, EXACT: 0, WITHIN: 0}
    differences: list[Difference] = []
    for section in COMPARED_SECTIONS:
        for difference in _walk(original.get(section), again.get(section), section, tolerance, counts):
            differences.append(difference)
    return counts["numbers"], counts[EXACT], counts[WITHIN], differences


def set_aside_by_format(original: dict[str, Any], again: dict[str, Any]) -> tuple[dict[str, Any], list[str]]:
    """``original`` without what its older results format kept and ``again``'s no longer does,
    and a sentence for each thing set aside.  Format 1 kept each repeated-measures fit's residuals
    twice; format 2 keeps them once, under ``diagnostics.residuals``, which is still compared."""
    if _results_format(original) >= 2 or _results_format(again) < 2:
        return original, []
    count, endpoints = 0, []
    for endpoint in original.get("endpoints") or []:
        analyses = []
        for analysis in endpoint.get("analyses") or []:
            fit = analysis.get("fit")
            if isinstance(fit, dict) and "residual_columns" in fit:
                count += 1
                analysis = {**analysis, "fit": {k: v for k, v in fit.items() if k != "residual_columns"}}
            analyses.append(analysis)
        endpoints.append({**endpoint, "analyses": analyses} if "analyses" in endpoint else endpoint)
    if not count:
        return original, []
    note = (f"the original run was recorded in results format {_results_format(original)}, which also kept the "
            f"residuals of {count} repeated-measures fit(s) under fit.residual_columns; the current format keeps "
            f"them once, under diagnostics.residuals, where they were compared")
    return {**original, "endpoints": endpoints}, [note]


def _results_format(results: dict[str, Any]) -> int:
    value = results.get("format", 1)
    return value if isinstance(value, int) and not isinstance(value, bool) else 1


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _walk(first: Any, second: Any, where: str, tolerance: float,
          counts: dict[str, int]) -> Iterator[Difference]:
    if isinstance(first, dict) and isinstance(second, dict):
        for key in list(first) + [k for k in second if k not in first]:
            if key not in second:
                yield Difference(f"{where}.{key}", first[key], None, "missing in the new run")
            elif key not in first:
                yield Difference(f"{where}.{key}", None, second[key], "new in the new run")
            else:
                yield from _walk(first[key], second[key], f"{where}.{key}", tolerance, counts)
    elif isinstance(first, list) and isinstance(second, list) and len(first) == len(second):
        for index, (one, other) in enumerate(zip(first, second)):
            yield from _walk(one, other, f"{where}[{_label(one, index)}]", tolerance, counts)
    elif _is_number(first) and _is_number(second):
        counts["numbers"] += 1
        verdict = _number_verdict(float(first), float(second), tolerance)
        if verdict == DIFFER:
            yield Difference(where, first, second, "number")
        else:
            counts[verdict] += 1
    elif first != second:
        yield Difference(where, first, second, "text" if isinstance(first, str) else "value")


def _label(item: Any, index: int) -> str:
    return str(item.get("id")) if isinstance(item, dict) and item.get("id") else str(index)


def _number_verdict(first: float, second: float, tolerance: float) -> str:
    if first == second or (math.isnan(first) and math.isnan(second)):
        return EXACT
    if abs(first - second) <= tolerance * max(1.0, abs(first), abs(second)):
        return WITHIN
    return DIFFER


def package_differences(original: dict[str, str], current: dict[str, str]) -> list[dict[str, Any]]:
    """Every distribution whose version differs, or that only one environment has."""
    names = sorted(set(original) | set(current))
    return [{"package": name, "original": original.get(name), "now": current.get(name)}
            for name in names if original.get(name) != current.get(name)]
