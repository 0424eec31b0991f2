"""Comparisons of two partitions of the rows, each given as integer codes 0..k-1."""

from __future__ import annotations

import numpy as np


def is_nested(fine: np.ndarray, coarse: np.ndarray) -> bool:
    """Whether every level of ``fine`` lies inside one level of ``coarse``."""
    pairs = np.unique(fine * (int(coarse.max()) + 1) + coarse)
    return bool(pairs.size == int(fine.max()) + 1)


def same_partition(a: np.ndarray, b: np.ndarray) -> bool:
    """Whether two codings group the rows identically."""
    return int(a.max()) == int(b.max()) and is_nested(a, b)
