"""Suite-wide settings.

On CI (the CI environment variable is set) Hypothesis draws the same examples on every run,
so a landing is never decided by a new random draw; on a developer's machine it explores
freshly each time and prints the failing example and seed when it finds one.
"""
import os

from hypothesis import settings

settings.register_profile("ci", derandomize=True, print_blob=True)
settings.register_profile("explore", print_blob=True)
settings.load_profile("ci" if os.environ.get("CI") else "explore")


def pytest_collection_modifyitems(config, items):
    """Tests marked ``forks`` run first, while this process has no other thread.

    A process with other threads never forks a helper (``trialcut.forking.can_fork``), and some
    libraries keep a thread once used (Dask's offload thread lives until the process ends): the
    tests that check what a forked child does would then find no child.  The sort is stable, so
    every other test keeps its order.
    """
    items.sort(key=lambda item: item.get_closest_marker("forks") is None)
