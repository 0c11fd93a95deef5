"""Progress of long steps in a batch log: timestamped lines, never silence (issue 13)."""
import io
import re

from rich.console import Console

from trialcut import commands_progress
from trialcut.commands_progress import LoggedStepTimer, progress_reporter

STAMP = r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ "


def _batch_console():
    return Console(file=io.StringIO(), force_terminal=False)


def test_batch_log_says_start_middle_and_end_with_utc_times(monkeypatch):
    stream = io.StringIO()
    monkeypatch.setattr(commands_progress, "LOG_EVERY_SECONDS", 0.0)   # every update is due
    report = progress_reporter(_batch_console(), stream=stream)
    for done in range(0, 5):
        report("imputations", done, 4)
    lines = stream.getvalue().splitlines()
    assert all(re.match(STAMP, line) for line in lines), lines
    assert "0 of 4 started" in lines[0]
    assert any("2 of 4 done" in line and "s left" in line for line in lines)
    assert "4 of 4 done in" in lines[-1]


def test_batch_log_is_not_flooded(monkeypatch):
    stream = io.StringIO()
    monkeypatch.setattr(commands_progress, "LOG_EVERY_SECONDS", 3600.0)
    report = progress_reporter(_batch_console(), stream=stream)
    for done in range(0, 1001):
        report("trials", done, 1000)
    assert len(stream.getvalue().splitlines()) == 2   # started and done only


def test_step_timer_logs_each_step_and_keeps_the_audit_record():
    stream = io.StringIO()
    timer = LoggedStepTimer(_batch_console(), stream=stream)
    with timer.time("read data"):
        pass
    assert [s["step"] for s in timer.steps] == ["read data"]
    lines = stream.getvalue().splitlines()
    assert len(lines) == 2 and all(re.match(STAMP, line) for line in lines)
    assert "step 'read data' started" in lines[0] and "step 'read data' done in" in lines[1]


def test_terminal_gets_a_bar_and_no_log_lines():
    stream = io.StringIO()
    console = Console(file=io.StringIO(), force_terminal=True)
    timer = LoggedStepTimer(console, stream=stream)
    with timer.time("analyses"):
        report = progress_reporter(console, stream=stream)
        for done in range(0, 3):
            report("imputations", done, 2)
    assert stream.getvalue() == ""
    assert timer.steps[0]["step"] == "analyses"
