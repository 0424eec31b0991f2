"""Integer codings of the rows and comparisons of two partitions.

Everything here is one hashing pass over the rows (``pandas.factorize``) or a
``bincount``: no sorting of the rows and no Python loop over them, so the
structure of a design with millions of rows costs about as much as one
group-by.
"""

from __future__ import annotations

import numpy as np
import pandas as pd


def already_dense(values: np.ndarray) -> bool:
    """Whether integer ``values`` are already the codes ``0..k-1`` with every code used."""
    if values.size == 0 or not np.issubdtype(values.dtype, np.integer):
        return False
    lo, hi = int(values.min()), int(values.max())
    if lo != 0 or hi >= values.size:
        return False
    return bool(np.all(np.bincount(values.astype(np.intp, copy=False), minlength=hi + 1)))


def dense_codes(values: np.ndarray) -> np.ndarray:
    """Codes ``0..k-1`` numbering the distinct values in increasing order.

    The same result as ``np.unique(values, return_inverse=True)[1]``, by hashing
    (integer codes that already are ``0..k-1`` with every code used are
    returned as they are, without hashing).
    """
    flat = np.asarray(values).reshape(-1)
    if already_dense(flat):
        return flat.astype(np.int64)  # a copy: callers may change their codes in place
    codes, _ = pd.factorize(flat, sort=True)
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


_PREFIX = 2048  # rows looked at first by is_nested, to reject most pairs cheaply


def is_nested(fine: np.ndarray, coarse: np.ndarray) -> bool:
    """Whether every level of ``fine`` lies inside one level of ``coarse``."""
    if fine.size == 0:
        return True
    if fine.size > 4 * _PREFIX and not is_nested(fine[:_PREFIX], coarse[:_PREFIX]):
        return False  # a level split within the first rows is split in all of them
    top = int(fine.max())
    if int(fine.min()) >= 0 and top <= 4 * fine.size + 1024:
        # write each row's coarse code at its fine level, read it back: a fine level
        # spread over two coarse levels keeps only one of them and fails the check
        image = np.empty(top + 1, dtype=np.asarray(coarse).dtype)
        image[fine] = coarse
        return bool(np.array_equal(image[fine], coarse))
    return n_distinct(pair_codes(fine, coarse)) == n_distinct(fine)


def same_partition(a: np.ndarray, b: np.ndarray) -> bool:
    """Whether two codings group the rows identically."""
    return int(a.max()) == int(b.max()) and is_nested(a, b)


def group_means(codes: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The mean of ``values`` in each group of ``codes`` (0..k-1, every group present),
    and the groups' sizes: the one home for unit means.

    >>> group_means(np.array([0, 0, 1]), np.array([1.0, 3.0, 5.0]))
    (array([2., 5.]), array([2, 1]))
    """
    k = int(codes.max()) + 1
    sizes = np.bincount(codes, minlength=k)
    return np.bincount(codes, weights=values, minlength=k) / sizes, sizes


def units_per_level(unit: np.ndarray, level: np.ndarray, k: int) -> np.ndarray:
    """Number of distinct ``unit`` codes among the rows of each ``level`` code ``0..k-1``."""
    pairs = pd.unique(unit.astype(np.int64, copy=False) * np.int64(max(k, 1)) + level)
    return np.bincount(pairs % max(k, 1), minlength=k)


def units_in_levels(unit: np.ndarray, level: np.ndarray, k: int) -> list[np.ndarray]:
    """The distinct ``unit`` codes (increasing) among the rows of each ``level`` code ``0..k-1``."""
    pairs = np.sort(pd.unique(level.astype(np.int64, copy=False) * (int(unit.max()) + 1) + unit))
    per = pairs // (int(unit.max()) + 1)
    cuts = np.searchsorted(per, np.arange(k + 1))
    return [pairs[cuts[j] : cuts[j + 1]] % (int(unit.max()) + 1) for j in range(k)]
