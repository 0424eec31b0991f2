"""Integer codings of the rows and comparisons of two partitions.

Everything here is one hashing pass over the rows (``pandas.factorize``) or a
``bincount``: no sorting of the rows and no Python loop over them, so the
structure of a design with millions of rows costs about as much as one
group-by.
"""

from __future__ import annotations

import numpy as np
import pandas as pd


def dense_codes(values: np.ndarray) -> np.ndarray:
    """Codes ``0..k-1`` numbering the distinct values in increasing order.

    The same result as ``np.unique(values, return_inverse=True)[1]``, by hashing.
    """
    codes, _ = pd.factorize(np.asarray(values).reshape(-1), sort=True)
    return codes.astype(np.int64, copy=False)


def first_seen_codes(values: np.ndarray) -> np.ndarray:
    """Codes ``0..k-1`` numbering the distinct values in order of first appearance."""
    codes, _ = pd.factorize(np.asarray(values).reshape(-1), sort=False)
    return codes.astype(np.int64, copy=False)


def n_distinct(values: np.ndarray) -> int:
    """Number of distinct values (hashing, no sort)."""
    return int(pd.unique(np.asarray(values).reshape(-1)).size)


def pair_codes(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """A single integer per row identifying the pair ``(a, b)`` of non-negative codes."""
    return a.astype(np.int64, copy=False) * (int(b.max()) + 1 if b.size else 1) + b


def is_nested(fine: np.ndarray, coarse: np.ndarray) -> bool:
    """Whether every level of ``fine`` lies inside one level of ``coarse``."""
    if fine.size == 0:
        return True
    return n_distinct(pair_codes(fine, coarse)) == n_distinct(fine)


def same_partition(a: np.ndarray, b: np.ndarray) -> bool:
    """Whether two codings group the rows identically."""
    return int(a.max()) == int(b.max()) and is_nested(a, b)
