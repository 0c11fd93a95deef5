"""An internal fault leaves its traceback in a log of its own, named on stderr without a traceback."""
from __future__ import annotations

import os
import re
from pathlib import Path

import trialcut.commands as commands
from trialcut.cli import main


def test_a_fault_is_logged_under_the_process_id_and_named_on_stderr(monkeypatch, tmp_path, capsys):
    # Several runs at once (a shared machine, a scheduler) can fault in the same second: the
    # log name carries the process id so one run's log never overwrites another's.
    def faulty(args):
        raise ZeroDivisionError("a fault planted by this test")

    monkeypatch.setattr(commands, "command_history", faulty)
    monkeypatch.setenv("TMPDIR", str(tmp_path))
    monkeypatch.setattr("tempfile.tempdir", None)   # read TMPDIR again
    assert main(["history", "--out", str(tmp_path)]) == 3
    error = capsys.readouterr().err
    assert "Traceback" not in error
    named = re.search(r"details in (\S+)", error).group(1)
    assert Path(named).parent == tmp_path
    assert Path(named).name.endswith(f"-{os.getpid()}.log")
    assert "a fault planted by this test" in Path(named).read_text(encoding="utf-8")
