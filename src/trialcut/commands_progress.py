"""Progress of long steps: a bar on a terminal, timestamped lines in a batch log.

A run of a large cut, or a simulation of thousands of trials, takes minutes; a batch job whose
output goes to a file must still show that it is alive and how far it got.  On a terminal a
rich bar shows work done and the time left; otherwise one line per step, and per long task at
its start, about every ``LOG_EVERY_SECONDS`` and at its end, each starting with the UTC time.
"""
from __future__ import annotations

import sys
import time
from contextlib import contextmanager
from datetime import datetime, timezone
from typing import Any, Callable, TextIO

from trialcut.run.runner import StepTimer

LOG_EVERY_SECONDS = 10.0

Reporter = Callable[[str, int, int], None]


def utc_stamp() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def log_line(text: str, stream: TextIO | None = None) -> None:
    # One write with its newline: two processes (endpoints on both cores) log to the same stream,
    # and print's separate write of the end could land after the other's line when unbuffered.
    stream = stream or sys.stderr
    stream.write(f"{utc_stamp()} {text}\n")
    stream.flush()


def progress_reporter(console, *, stream: TextIO | None = None) -> Reporter:
    """``report(label, done, total)``: a bar on a terminal, else timestamped log lines."""
    if console.is_terminal:
        return _bar_reporter(console)
    return _log_reporter(stream)


def _bar_reporter(console) -> Reporter:
    from rich.progress import (BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn,
                               TimeRemainingColumn)

    progress = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                        TimeElapsedColumn(), TextColumn("left"), TimeRemainingColumn(),
                        transient=True, console=console)
    tasks: dict[str, Any] = {}

    def report(label: str, done: int, total: int) -> None:
        if label not in tasks:
            if not tasks:
                progress.start()
            tasks[label] = progress.add_task(label, total=total)
        progress.update(tasks[label], completed=done)
        if done >= total:
            progress.remove_task(tasks.pop(label))
            if not tasks:
                progress.stop()

    return report


def _log_reporter(stream: TextIO | None) -> Reporter:
    started: dict[str, float] = {}
    said: dict[str, float] = {}

    def report(label: str, done: int, total: int) -> None:
        now = time.monotonic()
        if label not in started:
            started[label], said[label] = now, now
            log_line(f"{label}: {done} of {total} started", stream)
            if done < total:
                return
        if done >= total:
            log_line(f"{label}: {done} of {total} done in {now - started.pop(label):.1f} s", stream)
            said.pop(label, None)
            return
        if now - said[label] >= LOG_EVERY_SECONDS:
            said[label] = now
            elapsed = now - started[label]
            left = elapsed / done * (total - done) if done else float("nan")
            log_line(f"{label}: {done} of {total} done, {elapsed:.0f} s so far, about {left:.0f} s left", stream)

    return report


class LoggedStepTimer(StepTimer):
    """The run's step timer, also saying each step's start and end in a batch log."""

    def __init__(self, console, stream: TextIO | None = None):
        super().__init__()
        self._quiet = console.is_terminal    # a terminal has the bar and the final summary
        self._stream = stream

    def time(self, name: str):
        step = super().time(name)
        if self._quiet:
            return step
        return self._logged(name, step)

    @contextmanager
    def _logged(self, name: str, step):
        log_line(f"step '{name}' started", self._stream)
        with step:
            yield
        log_line(f"step '{name}' done in {self.steps[-1]['seconds']:.1f} s", self._stream)
