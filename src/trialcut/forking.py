"""When a second process may be forked, and how a forked child behaves: shared by the runner
(endpoints on both cores) and the report (figures drawn beside the PDF engine).

A leaf like ``trialcut.errors``: the standard library only, so every layer may import it.

Forking is used only where it is safe and cheap: a platform that has it, a parent with no other
threads (forking a threaded process can copy a lock another thread holds, which then never
opens in the child) and not itself a daemonic worker (those may not have children).
"""
from __future__ import annotations

import multiprocessing
import os
import signal
import sys
import threading

_PR_SET_PDEATHSIG = 1   # from <linux/prctl.h>


def can_fork() -> bool:
    """Whether this process may fork a helper child now."""
    if "fork" not in multiprocessing.get_all_start_methods():
        return False
    if threading.active_count() > 1 or multiprocessing.current_process().daemon:
        return False
    return True


def leave_stopping_to_the_parent(parent: int) -> None:
    """In a forked child: die with the parent, and let only the parent answer Ctrl-C or SIGTERM.

    Ctrl-C reaches the whole process group and the parent's SIGTERM handler (which raises
    KeyboardInterrupt) is inherited by the fork, so either would print a traceback in the child;
    the parent kills the child when it stops.  If the parent is killed outright (SIGKILL) it
    cannot, so on Linux the kernel is asked to kill the child then (PR_SET_PDEATHSIG).
    """
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    if sys.platform.startswith("linux"):
        try:
            import ctypes
            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(_PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
        except (OSError, AttributeError):
            pass   # no prctl: the child still ends quietly at its next send
    if os.getppid() != parent:   # the parent died before the request took effect
        os._exit(0)
