"""Independent pieces of work on two cores: this process and one forked child.

The runner hands over ``count`` pieces (a plan's endpoints) and a function ``run_one(index,
progress)`` whose answer pickles.  Both processes take the next piece not yet taken, in the
order given (largest first); the child sends each answer back through a pipe.  The answers
come back by index, so whoever computed a piece, the caller assembles them in its own order.

What a serial loop would do on failure is kept exactly: the pieces are settled in index order
and the first that raises in this process raises here, with its own type, message and
traceback.  A piece the child could not deliver (an exception in the child, a child killed, an
answer that would not pickle) is simply run again here, so the child never decides what
surfaces.  Ctrl-C and SIGTERM are the parent's (``trialcut.forking``); the parent kills the
child when it stops.

A thread of the parent reads the pipe the whole time, so the child never waits on a full pipe
however large an answer (tens of MB at 30,000 participants) while the parent computes; it also
hands out the pieces and passes the child's progress reports on.  It exists only while the
pieces run: a later fork (the figure child) sees one thread again.
"""
from __future__ import annotations

import multiprocessing
import os
import sys
import threading
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

from trialcut.forking import leave_stopping_to_the_parent

Progress = Callable[[str, int, int], None]
RunOne = Callable[[int, "Progress | None"], Any]

__all__ = ["run_pieces"]


def run_pieces(count: int, run_one: RunOne, *, order: Sequence[int], progress: Progress | None,
               two_processes: bool) -> list[Any]:
    """``[run_one(i, progress) for i in range(count)]``, on two processes when ``two_processes``."""
    if not two_processes or count < 2:
        return [run_one(index, progress) for index in range(count)]
    return _Shared(count, run_one, list(order), progress).run()


@dataclass
class _State:
    """What the parent's two threads share, under ``lock``."""

    waiting: list[int]                                   # pieces nobody has taken yet
    answers: dict[int, Any] = field(default_factory=dict)
    child_holds: set[int] = field(default_factory=set)   # taken by the child, not yet answered
    child_ended: bool = False


class _Shared:
    def __init__(self, count: int, run_one: RunOne, order: list[int], progress: Progress | None):
        self.count, self.run_one = count, run_one
        self.state = _State(waiting=order)
        self.lock = threading.Condition()
        self.progress_lock = threading.Lock()   # one reporter, called from both threads
        self.progress = progress
        self.failures: dict[int, BaseException] = {}

    # ------------------------------------------------------------------ parent
    def run(self) -> list[Any]:
        first = self._take()     # the first (largest) piece stays here: its answer needs no pickling
        child, connection = self._start_child()
        reader = threading.Thread(target=self._read, args=(connection,), name="trialcut-endpoints", daemon=True)
        reader.start()
        try:
            self._work_here(first)
            self._wait_for_child(child)
        finally:
            with self.lock:
                done = self.state.child_ended   # it only has to exit; else it is stopped (Ctrl-C, a failure)
            child.join(timeout=5.0 if done else 0.0)
            if child.is_alive():
                child.kill()
            child.join()
            reader.join()
            connection.close()
        return self._settle()

    def _work_here(self, index: int | None) -> None:
        reporter = self._reporter()
        while index is not None:
            try:
                answer = self.run_one(index, reporter)
            except Exception as error:   # noqa: BLE001 - raised again by _settle, in index order
                self.failures[index] = error
                self._stop_handing_out()
                return
            with self.lock:
                self.state.answers[index] = answer
            index = self._take()

    def _take(self) -> int | None:
        with self.lock:
            return self.state.waiting.pop(0) if self.state.waiting else None

    def _stop_handing_out(self) -> None:
        with self.lock:
            self.state.waiting.clear()

    def _wait_for_child(self, child) -> None:
        """Until the child has asked for work and got none; after a failure here, only as long as
        it holds a piece a serial loop would have run before the failed one."""
        failed = min(self.failures, default=None)
        with self.lock:
            while not self.state.child_ended:
                if failed is not None and all(index > failed for index in self.state.child_holds):
                    break
                self.lock.wait(timeout=0.5)

    def _settle(self) -> list[Any]:
        """Answers in index order; a missing one is computed here, the first failure raised."""
        answers = []
        for index in range(self.count):
            if index in self.state.answers:
                answers.append(self.state.answers[index])
            elif index in self.failures:
                raise self.failures[index]
            else:
                answers.append(self.run_one(index, self.progress))
        return answers

    def _reporter(self) -> Progress | None:
        if self.progress is None:
            return None

        def report(label: str, done: int, total: int) -> None:
            with self.progress_lock:
                self.progress(label, done, total)

        return report

    # ------------------------------------------------------------------ the reading thread
    def _read(self, connection) -> None:
        report = self._reporter()
        try:
            while True:
                try:
                    kind, *message = connection.recv()
                except (EOFError, OSError):
                    return
                except Exception:   # noqa: BLE001 - an answer that would not unpickle here (memory):
                    return          # the child is stopped and its pieces are run here instead
                if kind == "next":
                    with self.lock:
                        index = self.state.waiting.pop(0) if self.state.waiting else None
                        if index is not None:
                            self.state.child_holds.add(index)
                    connection.send(index)
                elif kind == "progress":
                    if report is not None:
                        report(*message)
                else:                       # "answer" or "failed": the piece is out of the child's hands
                    index, *answer = message
                    with self.lock:
                        self.state.child_holds.discard(index)
                        if kind == "answer":
                            self.state.answers[index] = answer[0]
                        self.lock.notify_all()
        except (BrokenPipeError, ConnectionResetError):
            return
        finally:
            with self.lock:
                self.state.child_ended = True
                self.lock.notify_all()

    # ------------------------------------------------------------------ child
    def _start_child(self):
        context = multiprocessing.get_context("fork")
        here, there = context.Pipe(duplex=True)
        parent = os.getpid()
        run_one, forward = self.run_one, self.progress is not None

        def work() -> None:
            here.close()
            leave_stopping_to_the_parent(parent)
            report = (lambda label, done, total: there.send(("progress", label, done, total))) if forward else None
            try:
                while True:
                    there.send(("next",))
                    index = there.recv()
                    if index is None:
                        break
                    try:
                        there.send(("answer", index, run_one(index, report)))
                    except (BrokenPipeError, ConnectionResetError):
                        raise
                    except Exception:   # noqa: BLE001 - the parent runs the piece again and raises its own
                        there.send(("failed", index))
                there.close()
            except (BrokenPipeError, ConnectionResetError, EOFError):
                os._exit(0)   # the parent stopped listening (killed, or gave up): nobody wants the rest

        child = context.Process(target=work, name="trialcut-endpoints", daemon=True)
        # Text waiting in our buffers would be copied into the child and written twice.
        sys.stdout.flush()
        sys.stderr.flush()
        child.start()
        there.close()
        return child, here
