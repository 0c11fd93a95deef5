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
