"""The plan schema names the spending functions without importing the statistics behind them.

The names live in ``stats/names.py`` so that loading a plan (``trialcut check``, ``lock``) does
not pay for scipy; this keeps that list and the registry the run dispatches on equal.
"""
from __future__ import annotations

import subprocess
import sys

from trialcut.stats.group_sequential import SPENDING_FUNCTIONS
from trialcut.stats.names import SPENDING_FUNCTION_NAMES


def test_the_plan_names_are_the_registry_keys():
    assert tuple(SPENDING_FUNCTIONS) == SPENDING_FUNCTION_NAMES


def test_loading_a_plan_does_not_import_scipy():
    code = "import sys, trialcut.plan.load; print('scipy' in sys.modules)"
    shown = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert shown.stdout.strip() == "False", shown.stderr
