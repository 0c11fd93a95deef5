"""The audit appendix speaks in plain labels: run facts, seeds, environment, linear algebra.

The labels it replaced (raw audit.json keys, the introspection library's keys, the platform
module's one-line summary and the interpreter's build string) must appear in no output.
"""
from __future__ import annotations

import platform
import re

import numpy
import pytest

from trialcut.record.environment import capture_environment
from trialcut.report.document import build_document
from trialcut.report.render import render_html
from trialcut.report.sections_audit import library_row
from trialcut.run.context import RunContext

# Labels the appendix used to print, straight from audit.json keys and library introspection.
REPLACED_LABELS = ("Root seed", "Started utc", "Finished utc", "Run id", "Command line", "Build",
                   "Byte order", "Processor count", "Thread settings", "user_api", "internal_api",
                   "num_threads", "threading_layer", "User api", "Internal api", "Num threads",
                   "Threading layer", "Environment: python", "Environment: linear algebra")


def assert_no_replaced_label(text: str) -> None:
    for label in REPLACED_LABELS:
        # Whole words: "Run identifier" is our own label, "Run id" the raw key.
        assert not re.search(rf"\b{re.escape(label)}\b", text), label


def old_style_audit() -> dict:
    """An audit record as runs before the plain environment record wrote it."""
    return {
        "command_line": ["trialcut", "demo"], "started_utc": "2026-01-05T10:00:00Z",
        "finished_utc": "2026-01-05T10:00:09Z", "run_id": "20260105T100000Z-abcd",
        "environment": {
            "python": {"version": "3.11.7", "implementation": "CPython", "build": ["main", "May  9 2026 07:35:25"]},
            "platform": "Linux-6.1.0-x86_64-with-glibc2.36", "system": "Linux", "machine": "x86_64",
            "processor_count": 2, "byte_order": "little", "packages": {"numpy": "2.4.6", "trialcut": "0.1.0"},
            "thread_settings": {},
            "linear_algebra": [{"user_api": "blas", "internal_api": "openblas", "version": "0.3.30",
                                "threading_layer": "pthreads", "architecture": "SkylakeX", "num_threads": 2}]},
        "seeds": {"root": 20261201, "dummy_arms": 7},
        "executor": {"workers": 1, "scheduler": None},
        "warnings": [], "plan_problems": [],
        "steps": [{"step": "load plan", "seconds": 0.01}, {"step": "render documents", "seconds": 3.2}],
    }


def current_audit() -> dict:
    audit = old_style_audit()
    audit["environment"] = capture_environment()
    return audit


def appendix_tables(results, audit) -> dict[str, list[list[str]]]:
    document = build_document(results, audit, draw=False)
    appendix = document.sections[-1]
    return {block.content.title: [[text for text, _ in row] for row in block.content.body()]
            for block in appendix.blocks if block.kind == "table"}


@pytest.fixture(scope="module")
def results(report_fixtures):
    return report_fixtures.build_results(dummy_arms=True)


@pytest.mark.parametrize("audit_of", [old_style_audit, current_audit], ids=["older record", "current record"])
def test_no_replaced_label_in_the_html(results, audit_of):
    audit = audit_of()
    html = render_html(build_document(results, audit, draw=False))
    text = re.sub(r"<[^>]+>", " ", html)
    assert_no_replaced_label(text)
    # Neither the platform module's summary nor the interpreter's build string is shown.
    assert "with-glibc" not in text and "May  9 2026" not in text
    assert platform.platform() not in text


def test_run_facts_and_software_in_plain_words(results):
    tables = appendix_tables(results, current_audit())
    facts = dict(tables["How the run was made"])
    assert facts["Command given"] == "trialcut demo"
    assert facts["Run began (UTC)"] == results["run"]["started_utc"]
    software = dict(tables["Software environment"])
    # Reference: the running interpreter (Python standard library).
    assert software["Python interpreter"] == f"{platform.python_version()} ({platform.python_implementation()})"
    packages = dict(tables["Package versions"])
    assert packages["numpy"] == numpy.__version__
    # The report cannot time its own rendering: that step stays in audit.json only.
    assert [row[0] for row in tables["Steps and their timing"]] == ["Load plan"]


def test_seed_streams_are_those_the_run_layer_draws_from(results):
    tables = appendix_tables(results, current_audit())
    seeds = dict(tables["Seeds of the random steps"])
    assert seeds["Every random step (the seed the plan gives)"] == str(results["run"]["seed"])
    assert seeds["Dummy treatment codes of this blinded dry run"] == str(results["run"]["dummy_arms_seed"])
    random = [a for e in results["endpoints"] for a in e["analyses"]
              if a["method"] in ("multiple_imputation", "tipping_point")]
    assert random, "the fixture has imputation analyses"
    context = RunContext(root_seed=results["run"]["seed"])
    for analysis in random:
        # The run layer's own stream for this analysis (numpy SeedSequence entropy).
        entropy = context.seed_sequence(analysis["id"]).entropy
        assert seeds[analysis["label"]] == ", ".join(str(word) for word in entropy)


def test_linear_algebra_rows_from_either_record():
    old = library_row({"user_api": "blas", "internal_api": "openblas", "version": "0.3.30",
                       "threading_layer": "pthreads", "architecture": "SkylakeX", "num_threads": 2})
    new = library_row({"library": "blas", "implementation": "openblas", "version": "0.3.30", "threads": 2,
                       "threading": "pthreads", "tuned_for": "SkylakeX", "used_by": "numpy"})
    assert {k: v for k, v in old.items() if k != "used_by"} == {k: v for k, v in new.items() if k != "used_by"}
    assert new == {"library": "BLAS (basic linear algebra)",
                   "implementation": "OpenBLAS (pthreads threading, tuned for SkylakeX processors)",
                   "version": "0.3.30", "threads": "2", "used_by": "numpy"}
