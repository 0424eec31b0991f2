"""Shared result types of the hidden-grouping scans.

Each scan looks at the columns of the analysis frame for a grouping that no
column names outright (a session in a time stamp, a cluster in coordinates, a
run in the row order, a token inside a sample code, a covariate constant
within an unrecorded unit) and returns

* ``DerivedGrouping``: a new grouping column that the structure stage weighs
  like any other candidate unit (its name carries a word of the right kind, so
  the name hints read it: ``session[...]``, ``area[...]``, ``run[...]``);
* ``Signal``: a test result worth reporting even when no grouping is derived
  (treatment clumped in space, residual autocorrelation along the row order).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass(frozen=True)
class DerivedGrouping:
    """A grouping of the rows that no column names outright."""

    name: str  # the new column's name, e.g. "session[sampled_at]"
    codes: np.ndarray  # integer code per row, -1 where the grouping is unknown
    sources: tuple[str, ...]  # the columns it was derived from
    kind: str  # time | location | process | container | identifier
    how: str  # one plain sentence: what was seen and how the grouping was formed
    strength: dict[str, float] = field(default_factory=dict)  # e.g. {"gap_hours": 6.0}


@dataclass(frozen=True)
class Signal:
    """A test of hidden structure, reported whether or not a grouping was derived."""

    check: str  # kebab-case, e.g. "treatment-clumped-in-space"
    columns: tuple[str, ...]
    statistic: float
    p_value: float | None
    message: str  # one plain sentence with the numbers


@dataclass(frozen=True)
class HiddenScan:
    """What one scan found."""

    derived: tuple[DerivedGrouping, ...] = ()
    signals: tuple[Signal, ...] = ()
