"""The record end to end on a real analysis of the small base case (slow: real runs).

- a re-rendered run gives the same results.json, table CSVs and HTML as the run itself,
  and as another re-rendering (issue 10: re-rendering changed the timing table);
- the report prints the registry row it took and the chain head it followed;
- ``trialcut run`` stopped by SIGTERM or SIGKILL at a random moment never leaves a visible
  run folder without its registry row (seeded; the seed is printed on failure).
"""
from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from trialcut.cli import main
from trialcut.record.registry import GENESIS_HASH, list_records
from trialcut.record.runfolder import list_run_folders

BASE = Path(__file__).resolve().parents[1] / "cases" / "_base"
pytestmark = pytest.mark.slow


def _sigint_as_usual() -> None:
    # A shell running the tests in the background may ignore SIGINT, and a child inherits
    # that; give the child the usual disposition so Ctrl-C reaches it.
    signal.signal(signal.SIGINT, signal.SIG_DFL)


@pytest.fixture(scope="module")
def recorded(tmp_path_factory) -> tuple[Path, Path]:
    out = tmp_path_factory.mktemp("out")
    assert main(["run", str(BASE / "plan.yaml"), "--data", str(BASE / "data.csv"), "--cut", "c1",
                 "--out", str(out), "--unlocked"]) in (0, 4)
    return out, list_run_folders(out)[0]


def same_files(first: Path, second: Path) -> list[str]:
    names = ["results.json", "report.html"] + sorted(
        path.relative_to(first).as_posix() for path in (first / "tables").glob("*.csv"))
    return [name for name in names if (first / name).read_bytes() != (second / name).read_bytes()]


def test_rerendering_gives_the_same_results_tables_and_page(recorded):
    out, run = recorded
    assert main(["render", str(run)]) == 0
    assert main(["render", str(run)]) == 0
    renderings = [out / row.folder for row in list_records(out / "registry.sqlite")
                  if row.kind == "rendering"]
    assert len(renderings) == 2
    assert same_files(renderings[0], renderings[1]) == []
    assert same_files(run, renderings[0]) == []
    assert main(["verify", "--out", str(out)]) == 0


def test_the_report_prints_the_chain_head_it_follows(recorded):
    _, run = recorded
    page = (run / "report.html").read_text(encoding="utf-8")
    assert "chain head it follows" in page and f"row 1, after {GENESIS_HASH}" in page


def test_verify_finds_the_registry_from_the_run_wherever_it_is_started(recorded, tmp_path,
                                                                       monkeypatch):
    _, run = recorded
    monkeypatch.chdir(tmp_path)   # no ./outputs here
    assert main(["verify", str(run)]) == 0


@pytest.mark.parametrize("signal_number", [signal.SIGTERM, signal.SIGKILL, signal.SIGINT])
def test_a_run_stopped_at_a_random_moment_is_recorded_whole_or_not_at_all(tmp_path, signal_number):
    seed = int(os.environ.get("TRIALCUT_TEST_SEED", random.randrange(10**6)))
    out = tmp_path / "out"
    command = [sys.executable, "-m", "trialcut", "run", str(BASE / "plan.yaml"), "--data",
               str(BASE / "data.csv"), "--cut", "c1", "--out", str(out), "--unlocked"]
    child = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                             preexec_fn=_sigint_as_usual)
    time.sleep(random.Random(seed).uniform(1.0, 12.0))
    child.send_signal(signal_number)
    # `communicate` returns once every holder of the pipes has ended: the figure child too.
    _, error = child.communicate(timeout=300)
    message = f"seed {seed}, signal {signal_number}, exit {child.returncode}: {error.decode()[-3000:]}"
    # Nothing that shares the run's stderr (the run or its forked figure child) may print a
    # traceback, however it was stopped.
    assert b"Traceback" not in error, message
    if not (out / "registry.sqlite").exists():
        assert list_run_folders(out) == [], message
        return
    registered = {(out / row.folder).resolve() for row in list_records(out / "registry.sqlite")}
    assert {folder.resolve() for folder in list_run_folders(out)} <= registered, message
    if signal_number != signal.SIGKILL:
        assert main(["verify", "--out", str(out)]) == 0, message
        assert not list(out.glob("*/*/.tmp-*")), message
