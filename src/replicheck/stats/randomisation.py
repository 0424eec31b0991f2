"""Randomisation tests at the level of the experimental unit.

Treatment labels are re-assigned among the units the way the design allows
(within blocks when there are blocks), and the F statistic of the unit-level
analysis is recomputed for every assignment (Fisher 1935, *The Design of
Experiments*, ch. 3; Edgington & Onghena 2007, *Randomization Tests*, 4th ed.).
Exact enumeration is used when the number of distinct assignments is at most
``max_exact``; otherwise a seeded Monte Carlo sample of assignments, with
p = (1 + #{T* >= T}) / (1 + draws) (Phipson & Smyth 2010, Stat. Appl. Genet.
Mol. Biol. 9:39).

The smallest p-value the design can reach is the share of assignments whose
statistic is as large as the largest one: with two units in each of two arms
it is 2/6 = 1/3, so no test on those units can reach 0.05.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass
from itertools import combinations, product

import numpy as np

from replicheck.defaults import DEFAULT_SEED

MAX_EXACT = 100_000
MONTE_CARLO_DRAWS = 20_000
_REL_TOL = 1e-9


@dataclass(frozen=True)
class RandomisationResult:
    """A unit-level randomisation test."""

    statistic: float
    p_value: float
    min_attainable_p: float
    n_assignments: int  # distinct assignments the design allows
    exact: bool
    draws: int | None  # Monte Carlo draws when not exact
    seed: int | None


def _arrangements(labels: np.ndarray) -> Iterator[np.ndarray]:
    """Every distinct arrangement of a multiset of labels over its positions."""
    n = labels.size
    levels, counts = np.unique(labels, return_counts=True)

    def place(free: tuple[int, ...], j: int, out: np.ndarray) -> Iterator[np.ndarray]:
        if j == len(levels) - 1:
            out[list(free)] = levels[j]
            yield out.copy()
            return
        for chosen in combinations(free, int(counts[j])):
            out[list(chosen)] = levels[j]
            rest = tuple(i for i in free if i not in set(chosen))
            yield from place(rest, j + 1, out)

    yield from place(tuple(range(n)), 0, np.empty(n, dtype=labels.dtype))


def n_assignments(labels: np.ndarray, blocks: np.ndarray | None = None) -> int:
    """Number of distinct assignments of the labels (within blocks when given)."""
    groups = (
        [np.arange(labels.size)]
        if blocks is None
        else [np.flatnonzero(blocks == b) for b in np.unique(blocks)]
    )
    total = 1
    for idx in groups:
        _, counts = np.unique(labels[idx], return_counts=True)
        total *= math.factorial(idx.size) // math.prod(math.factorial(int(c)) for c in counts)
    return total


def _all_assignments(labels: np.ndarray, blocks: np.ndarray | None) -> Iterator[np.ndarray]:
    if blocks is None:
        yield from _arrangements(labels)
        return
    groups = [np.flatnonzero(blocks == b) for b in np.unique(blocks)]
    for parts in product(*(list(_arrangements(labels[idx])) for idx in groups)):
        out = np.empty_like(labels)
        for idx, part in zip(groups, parts, strict=True):
            out[idx] = part
        yield out


def _ssb(values: np.ndarray, assignments: np.ndarray, levels: np.ndarray) -> np.ndarray:
    """Between-level sum of squares (up to a constant) of every assignment (one per row)."""
    codes = np.searchsorted(levels, assignments)  # levels are sorted (np.unique)
    return _ssb_codes(values, codes, levels.size)


def _ssb_codes(values: np.ndarray, codes: np.ndarray, k: int) -> np.ndarray:
    """``_ssb`` of assignments given as level codes 0..k-1: the level sums of every
    assignment by one weighted ``bincount``, in chunks of about a million entries."""
    draws, n = codes.shape
    counts = np.bincount(codes[0], minlength=k).astype(float)
    out = np.empty(draws)
    step = max(1, 1_000_000 // max(n, 1))
    for start in range(0, draws, step):
        block = codes[start : start + step]
        b = block.shape[0]
        index = (block + k * np.arange(b)[:, None]).ravel()
        weights = np.broadcast_to(values, (b, n)).ravel()
        sums = np.bincount(index, weights=weights, minlength=b * k).reshape(b, k)
        out[start : start + b] = (sums**2 / counts).sum(axis=1)
    return out


def _centred(values: np.ndarray, blocks: np.ndarray | None) -> np.ndarray:
    if blocks is None:
        return values - values.mean()
    b = np.unique(blocks, return_inverse=True)[1]
    means = np.bincount(b, weights=values) / np.bincount(b)
    return values - means[b]


def randomisation_test(
    values: np.ndarray,
    labels: np.ndarray,
    blocks: np.ndarray | None = None,
    *,
    max_exact: int = MAX_EXACT,
    draws: int = MONTE_CARLO_DRAWS,
    seed: int = DEFAULT_SEED,
) -> RandomisationResult:
    """Randomisation test of the labels on one value per unit.

    ``values`` are the unit-level values (unit means), ``labels`` the
    treatment level of each unit, ``blocks`` the block of each unit (labels
    are then re-assigned within blocks only, and the values are centred on
    their block means). Assignments are ordered by the between-level sum of
    squares of the (centred) values, which orders them as the F statistic of
    the one-way analysis (or, with blocks, of the randomised-block analysis
    when every block holds the same mix of levels; otherwise it is a valid
    statistic of its own). The reported statistic is that F.
    """
    values = np.asarray(values, dtype=float)
    labels = np.asarray(labels)
    centred = _centred(values, blocks)
    levels = np.unique(labels)
    observed_ssb = float(_ssb(centred, labels[None, :], levels)[0])
    sst = float(centred @ centred)
    n, k = values.size, levels.size
    n_blocks = 1 if blocks is None else int(np.unique(blocks).size)
    df2 = n - k - (n_blocks - 1)
    if df2 >= 1 and sst - observed_ssb > 1e-12 * max(sst, 1e-300):
        observed = (observed_ssb / (k - 1)) / ((sst - observed_ssb) / df2)
    else:
        observed = float("inf") if observed_ssb > 0 else float("nan")
    total = n_assignments(labels, blocks)
    tol = _REL_TOL * max(1.0, abs(observed_ssb))
    if total <= max_exact:
        table = np.array(list(_all_assignments(labels, blocks)))
        stats = _ssb(centred, table, levels)
        p = float(np.mean(stats >= observed_ssb - tol))
        top = float(np.max(stats))
        floor = float(np.mean(stats >= top - _REL_TOL * max(1.0, abs(top))))
        return RandomisationResult(observed, p, floor, total, True, None, None)
    # Draw in a canonical order of the units (by distance from the mean, blocks by
    # their closest unit), so that renaming units, blocks or levels, reordering
    # rows, or an affine change of the response gives the same draws and p-value.
    order = np.argsort(np.abs(values - values.mean()), kind="stable")
    centred, labels = centred[order], labels[order]
    ordered_blocks = None if blocks is None else np.asarray(blocks)[order]
    if ordered_blocks is None:
        groups = [np.arange(n)]
    else:
        first_seen: dict[object, int] = {}
        for i, blk in enumerate(ordered_blocks.tolist()):
            first_seen.setdefault(blk, i)
        groups = [np.flatnonzero(ordered_blocks == blk) for blk in first_seen]
    rng = np.random.default_rng(seed)
    # level codes in a small integer type: the same draws as permuting the
    # labels themselves (the shuffle depends only on the generator and lengths)
    table = np.tile(np.searchsorted(levels, labels).astype(np.int16), (draws, 1))
    for idx in groups:
        if idx.size == n:
            rng.permuted(table, axis=1, out=table)
        else:
            table[:, idx] = rng.permuted(table[:, idx], axis=1)
    stats = _ssb_codes(centred, table, k)
    hits = int(np.sum(stats >= observed_ssb - tol))
    p = (1 + hits) / (1 + draws)
    floor = _floor_by_relabelling(labels, blocks, total)
    return RandomisationResult(observed, p, floor, total, False, draws, seed)


def _floor_by_relabelling(labels: np.ndarray, blocks: np.ndarray | None, total: int) -> float:
    """Smallest p when only relabellings of equal-sized groups tie with the largest statistic."""
    _, counts = np.unique(labels, return_counts=True)
    ties = math.prod(math.factorial(int(c)) for c in np.unique(counts, return_counts=True)[1])
    return min(1.0, ties / total)
