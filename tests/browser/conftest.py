"""Browser tests reuse the report's rendering fixture."""
from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest


@pytest.fixture(scope="session")
def report_fixtures():
    name = "trialcut_report_test_fixtures"
    if name not in sys.modules:
        path = Path(__file__).resolve().parents[1] / "report" / "fixtures.py"
        spec = importlib.util.spec_from_file_location(name, path)
        module = importlib.util.module_from_spec(spec)
        sys.modules[name] = module
        spec.loader.exec_module(module)
    return sys.modules[name]
