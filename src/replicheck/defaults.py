"""Defaults shared by the command line and the statistics (a module without imports,
so that the command line can start without loading the statistics stack)."""

from __future__ import annotations

# seed of every Monte Carlo draw (randomisation tests, wild bootstrap, scans):
# the same seed gives the same report
DEFAULT_SEED = 20261201
