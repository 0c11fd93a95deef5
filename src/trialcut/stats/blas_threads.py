"""One BLAS thread while trialcut computes: the same numbers whatever the machine, and no
threads spinning for nothing.

OpenBLAS splits a large matrix product between its threads, and each thread sums its own share
of the terms: with another thread count the sums are added in another order and the last bits
of a result move (about 1e-13 relative in a tipping-point grid at 3,000 participants).  The
fits here are many small products, where waking the threads costs more than the work (one
imputation sampler step used about 270 ms of CPU for 40 ms of work with two threads).  So every
analysis runs with one thread, whatever OPENBLAS_NUM_THREADS or the number of cores says.

The BLAS libraries are looked up once per process: a lookup costs about 3 ms, more than a
simulated trial's whole likelihood maximisation; entering and leaving the limit costs about
10 microseconds.
"""
from __future__ import annotations

import contextlib
import functools

try:    # optional: without it the numbers may depend on the thread count (the record says how many)
    from threadpoolctl import ThreadpoolController
except ImportError:          # pragma: no cover - the analyses still work
    ThreadpoolController = None


def one_blas_thread():
    """A context in which the BLAS libraries numpy and scipy loaded use one thread; the thread
    count is set back on leaving it.  The count is the process's (OpenBLAS keeps one), so the
    limit must not be left by one thread while another still computes."""
    if ThreadpoolController is None:
        return contextlib.nullcontext()
    return blas_controller().limit(limits=1, user_api="blas")


@functools.lru_cache(maxsize=1)
def blas_controller():
    """The process's BLAS libraries, looked up after numpy and scipy have loaded theirs (a
    library loaded after the lookup would not be limited)."""
    import numpy.linalg  # noqa: F401  - each carries its own OpenBLAS
    import scipy.linalg  # noqa: F401

    return ThreadpoolController()


def on_one_blas_thread(function):
    """``function`` wrapped to run inside :func:`one_blas_thread` (a picklable object when
    ``function`` pickles, so it can be sent to another process)."""
    return _OnOneBlasThread(function)


class _OnOneBlasThread:
    def __init__(self, function):
        self.function = function
        functools.update_wrapper(self, function)

    def __call__(self, *args, **kwargs):
        with one_blas_thread():
            return self.function(*args, **kwargs)

    def __reduce__(self):
        return _OnOneBlasThread, (self.function,)
