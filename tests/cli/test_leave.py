"""The command line ends its process without a last garbage collection, and nothing else changes:
the exit status is the command's, exit handlers run and buffered output is written."""
from __future__ import annotations

import subprocess
import sys

SCRIPT = r"""
import atexit, sys
from trialcut.cli import leave
atexit.register(lambda: print("exit handler ran", flush=True))
sys.stdout.write("buffered line")   # no newline, no flush: written at exit
leave(4)
"""


def test_leave_keeps_the_status_the_exit_handlers_and_the_output():
    # Python's documented exit: sys.exit runs atexit handlers and flushes stdio (docs.python.org,
    # "sys.exit" and "atexit"); gc.freeze only moves objects out of the collector's reach.
    done = subprocess.run([sys.executable, "-c", SCRIPT], capture_output=True, text=True, timeout=120)
    assert done.returncode == 4, done.stderr
    assert done.stdout == "buffered lineexit handler ran\n", done.stdout
    assert done.stderr == ""
