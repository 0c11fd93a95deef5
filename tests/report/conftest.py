"""Shared pieces of the report tests: the rendering fixture module, loaded under a name of its own."""
from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest


def load_fixture_module():
    """tests/report/fixtures.py, importable from any test folder without a package __init__."""
    name = "trialcut_report_test_fixtures"
    if name not in sys.modules:
        spec = importlib.util.spec_from_file_location(name, Path(__file__).with_name("fixtures.py"))
        module = importlib.util.module_from_spec(spec)
        sys.modules[name] = module
        spec.loader.exec_module(module)
    return sys.modules[name]


@pytest.fixture(scope="session")
def report_fixtures():
    return load_fixture_module()
