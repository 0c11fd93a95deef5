"""Fixtures for the plan tests: the base plan's text and a writer for variants."""
from __future__ import annotations

from pathlib import Path

import pytest

from tests.plan.helpers import BASE_PLAN


@pytest.fixture
def base_text() -> str:
    return BASE_PLAN.read_text(encoding="utf-8")


@pytest.fixture
def write_plan(tmp_path: Path):
    """write_plan(text, name="plan.yaml") -> path of a plan file in a fresh folder."""

    def write(text: str, name: str = "plan.yaml") -> Path:
        path = tmp_path / name
        path.write_text(text, encoding="utf-8")
        return path

    return write
