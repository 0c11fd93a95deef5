"""Helpers for the plan tests (paths of the repository's plans, text edits)."""
from __future__ import annotations

from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
DEMO_PLAN = ROOT / "analysis_plans" / "demo.yaml"
STARTER_PLAN = ROOT / "analysis_plans" / "starter.yaml"
BASE_PLAN = ROOT / "tests" / "cases" / "_base" / "plan.yaml"


def replace_once(text: str, old: str, new: str) -> str:
    """Edit a plan text, failing loudly if the edit would not apply (so no test passes
    because its mistake was never made)."""
    assert text.count(old) == 1, f"expected exactly one {old!r} in the plan"
    return text.replace(old, new)


def line_of(text: str, fragment: str, occurrence: int = 1) -> int:
    """1-based line number of the n-th line containing ``fragment``."""
    hits = [number for number, line in enumerate(text.splitlines(), start=1) if fragment in line]
    assert len(hits) >= occurrence, f"{fragment!r} not in the plan"
    return hits[occurrence - 1]
