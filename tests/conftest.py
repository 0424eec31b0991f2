"""Test settings shared by the whole suite.

Property tests run with a fixed derandomised profile so that every run (and
CI) explores the same examples; no deadlines, since timing is not tested.
"""

from __future__ import annotations

from hypothesis import settings

settings.register_profile("replicheck", derandomize=True, deadline=None)
settings.load_profile("replicheck")
