"""REML for nested random intercepts from summary statistics.

Model (``K >= 1`` nested grouping levels, outermost first; every group of
level ``l + 1`` lies inside exactly one group of level ``l``)::

    y = X beta + sum_{l=1..K} Z_l u_l + e,   u_l ~ N(0, s_l I),   e ~ N(0, s_e I).

``X`` may vary inside groups (covariates, within-unit treatments, block
columns). The fit is the same as :func:`replicheck.stats.mixed.fit_reml` on
these factors, but every evaluation costs work proportional to the number of
groups: the rows are read only by :func:`summarise` (a few vectorised sweeps:
group sums by ``bincount``, then centred cross-products in row blocks, the
second sweep being what keeps within-group sums of squares accurate when the
means are large), and never again. :func:`combine` merges the summaries of
disjoint row chunks, so a file can be read chunk by chunk.

Derivation
----------
Write ``W = [X, y]`` (``m = p + 1`` columns). ``V`` is block diagonal by
outermost group. For a group ``g`` of level ``l`` let ``A_g`` be the covariance
of its rows under the levels ``l..K`` and the residual, and ``B_g`` the block
diagonal matrix of its children's ``A`` (children are the level ``l + 1``
groups inside ``g``; for the innermost level they are the rows, each with
``A = s_e``). Then ``A_g = B_g + s_l 1 1'`` and ``V`` is the block diagonal of
the outermost ``A_g``. Define for every group::

    m_g = 1'B_g^{-1} 1,   mu_g = 1'B_g^{-1} W_g / m_g,   d_g = 1 + s_l m_g,   w_g = m_g / d_g.

The Woodbury identity ``A_g^{-1} = B_g^{-1} - s_l B_g^{-1} 1 1' B_g^{-1} / d_g``
gives ``1'A_g^{-1} = 1'B_g^{-1} / d_g``, hence

* ``1'A_g^{-1} 1 = w_g`` and ``1'A_g^{-1} W_g = w_g mu_g``: a group passes its
  weighted mean ``mu_g`` upwards with weight ``w_g``, so for a parent ``h``
  ``m_h = sum_c w_c`` and ``mu_h = sum_c w_c mu_c / m_h`` over its children;
* (matrix determinant lemma) ``|A_g| = |B_g| d_g``;
* ``W_g'A_g^{-1}W_g = R_g + w_g mu_g mu_g'`` with
  ``R_g = sum_c R_c + sum_c w_c (mu_c - mu_g)(mu_c - mu_g)'``. Proof: by
  induction ``W_g'B_g^{-1}W_g = sum_c (R_c + w_c mu_c mu_c')
  = sum_c R_c + sum_c w_c (mu_c - mu_g)(mu_c - mu_g)' + m_g mu_g mu_g'``, and the
  Woodbury term removes ``s_l m_g^2 mu_g mu_g' / d_g``, leaving
  ``m_g mu_g mu_g' / d_g = w_g mu_g mu_g'``.

At the innermost level the children are rows (``R = 0``, weight ``1/s_e``):
``m_g = n_g / s_e``, ``mu_g`` is the group mean, ``w_g = n_g / (s_e + s_K n_g)``
and ``R_g = S_g / s_e`` with ``S_g`` the centred cross-products of ``W`` inside
``g``. Summing over the outermost groups::

    W'V^{-1}W = S_w / s_e
                + sum_{l=1..K-1} sum_{c in level l+1} w_c (mu_c - mu_par(c))(mu_c - mu_par(c))'
                + sum_{h in level 1} w_h mu_h mu_h',
    log|V| = (n - G_K) log s_e + sum_{g in level K} log(s_e + s_K n_g)
             + sum_{l=1..K-1} sum_{h in level l} log(1 + s_l m_h),

with ``S_w = sum_g S_g`` (pooled within-group cross-products). So ``X'V^{-1}X``,
``X'V^{-1}y``, ``y'V^{-1}y`` and ``log|V|`` depend on the data only through
``n``, ``S_w``, the count and column sums of every innermost group, and the
parent of every group at every level (global ``X'X = S_w + sum_g s_g s_g'/n_g``).
Every term is a sum of positive semi-definite pieces built from differences of
means, so nothing is a small difference of large numbers; the pooled
``S_w`` is kept instead of ``X'X`` for the same reason.

REML criterion and derivatives
------------------------------
With ``A = X'V^{-1}X``, ``C = A^{-1}``, ``beta = C X'V^{-1}y`` and
``rVr = y'V^{-1}y - beta'X'V^{-1}y`` the REML deviance is
``D(s) = log|V| + log|A| + rVr + (n - p) log(2 pi)``; profiling ``s_e`` out
(``s_e = 1``, ``s_l = lam_l``) gives lme4's ``REMLcrit``
``log|H| + log|A_H| + (n - p)(1 + log(2 pi rHr / (n - p)))`` (Bates, Maechler,
Bolker & Walker 2015, J. Stat. Software 67(1), eq. 41), the same criterion as
:mod:`replicheck.stats.mixed`.

The recursion is a composition of elementwise arithmetic and sums over the
children of each group, so first and second derivatives with respect to the
variance parameters are propagated through it exactly (forward-mode
differentiation: every quantity carries its gradient and Hessian, see
:class:`_Jet`). From ``M = W'V^{-1}W`` and its derivatives ``M_i``, ``M_ij``
(blocks ``A``, ``b``, ``c``; ``z = (-beta, 1)``)::

    d rVr / d s_i = z'M_i z,
    d^2 rVr / d s_i d s_j = z'M_ij z - 2 (b_j - A_j beta)' C (b_i - A_i beta),
    d log|A| / d s_i = tr(C A_i),
    d^2 log|A| / d s_i d s_j = tr(C A_ij) - tr(C A_i C A_j),
    d C / d s_i = -C A_i C.

These are the Hessian of the REML deviance and the Jacobian of ``cov(beta) = C``
that lmerTest's Satterthwaite df need (Kuznetsova, Brockhoff & Christensen
2017, J. Stat. Software 82(13)); no finite differences are used. Cost per
evaluation: ``O(G m^2)`` for the criterion, ``O(G m^2 P^2)`` with ``P``
parameters for the Hessian (``G`` groups over all levels).

Before optimising, the fixed effects are re-expressed in centred coordinates
(``X~ = X T`` with ``det T = 1`` when ``X`` has a constant column, and
``y~ = y - X~ b0``; see :func:`_recentre`), which leaves the likelihood unchanged
and keeps the Schur complement ``r'V^{-1}r`` accurate when the response has a
large mean and a small spread; ``beta``, ``cov(beta)`` and its Jacobian are
transformed back.

Optimisation is the search shared with :func:`replicheck.stats.mixed.fit_reml`
and described in :mod:`replicheck.stats.reml_search`: L-BFGS-B over
``theta = sqrt(lam)``, continued in ``lam`` (whose gradient is informative at
0), an active set that pins negligible components at exactly 0 and releases
them when the gradient at 0 is negative (Karush-Kuhn-Tucker), Newton steps on
the unprofiled deviance ``D`` in log-variance coordinates, and a first-order
optimality check (``converged``). Up to 20,000 groups (all levels) it starts
from the best point of a grid of ``lam`` evaluated in one batch
(:func:`_deviance_grid`) when there is one grouping level, going straight to
the Newton steps and falling back to the full search when that does not give
a checked optimum, and from three theta starts when there are more; beyond
20,000 groups from lme4's single start ``theta = 1``. It stops the Newton polish
at log steps below ``1e-10`` (the error left after such a step is of order its
square). ``vcov_varpar`` is twice the inverse Hessian of ``D`` in the variance
parameters left after dropping boundary components (inverted in log
coordinates), assembled by that module as for :mod:`replicheck.stats.mixed`,
so :func:`satterthwaite_test` and :func:`satterthwaite_t` apply unchanged.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import TypeVar

import numpy as np
from scipy import linalg

from replicheck.stats.classic import DesignError
from replicheck.stats.reml_search import (
    FinalPoint,
    MixedFit,
    PolishPoint,
    active_variances,
    fit_components,
)

__all__ = ["NestedSummaries", "combine", "fit_nested_reml", "summarise"]

_LOG_2PI = float(np.log(2.0 * np.pi))
_F = TypeVar("_F", float, np.ndarray)
_MULTI_START_GROUPS = 20_000  # groups (all levels) up to which a grid or three starts are used
# largest log-variance step at which the Newton polish stops (Newton: the
# error left after such a step is ~step^2)
_NEWTON_STOP = 1e-10
# exceptions that mark a point where the criterion cannot be evaluated
_FAILURES: tuple[type[Exception], ...] = (np.linalg.LinAlgError, DesignError, FloatingPointError)
_ROW_BLOCK = 1 << 14  # rows per block when accumulating centred cross-products


# ---------------------------------------------------------------------------
# summaries


@dataclass(frozen=True, eq=False)
class NestedSummaries:
    """Everything REML needs about the rows of a nested random-intercept model.

    ``counts[g]`` and ``sums[g]`` are the number of rows and the column sums of
    ``[X, y]`` (last column ``y``) of innermost group ``g``; ``within`` holds the
    pooled within-innermost-group centred cross-products of ``[X, y]``
    (``(p + 1) x (p + 1)``). ``parents[l]`` maps each group of level ``l + 1`` to
    its group at level ``l`` (``-1`` for a group with no rows), ``n_groups[l]``
    is the number of codes of level ``l`` (groups without rows allowed). Levels
    run outermost first.
    """

    n: int
    p: int
    level_names: tuple[str, ...]
    fixed_names: tuple[str, ...]
    n_groups: tuple[int, ...]
    counts: np.ndarray
    sums: np.ndarray
    within: np.ndarray
    parents: tuple[np.ndarray, ...]

    def _cross(self) -> np.ndarray:
        """Global ``[X, y]'[X, y] = within + sum_g s_g s_g' / n_g``."""
        keep = self.counts > 0
        s = self.sums[keep]
        return np.asarray(self.within + (s / self.counts[keep, None]).T @ s)

    @property
    def xtx(self) -> np.ndarray:
        """``X'X``."""
        return self._cross()[: self.p, : self.p]

    @property
    def xty(self) -> np.ndarray:
        """``X'y``."""
        return self._cross()[: self.p, self.p]

    @property
    def yty(self) -> float:
        """``y'y``."""
        return float(self._cross()[self.p, self.p])


def _check_names(level_names: Sequence[str], n_levels: int) -> tuple[str, ...]:
    names = tuple(str(nm) for nm in level_names)
    if len(names) != n_levels:
        raise DesignError(f"{len(names)} level names given for {n_levels} grouping levels")
    for i, nm in enumerate(names):
        if not nm or nm == "residual" or nm in names[:i]:
            raise DesignError(f"invalid or duplicate grouping level name {nm!r}")
    return names


def _indicator_within_constant(
    col: np.ndarray, low: float, high: float, sums: np.ndarray, counts: np.ndarray
) -> bool:
    """Whether ``col`` (extremes ``low``, ``high``) holds only 0 and 1 and is
    constant within every group.

    Exact: sums of 0/1 values are integers, so a group is then constant when
    its sum is 0 or its count.
    """
    if low != 0.0 or high != 1.0 or not np.all((sums == 0.0) | (sums == counts)):
        return False
    return np.count_nonzero(col == 1.0) + np.count_nonzero(col == 0.0) == col.size


def summarise(
    y: np.ndarray,
    X: np.ndarray,
    levels: Sequence[np.ndarray],
    level_names: Sequence[str],
    fixed_names: Sequence[str],
    n_groups: Sequence[int] | None = None,
) -> NestedSummaries:
    """Summarise the rows of a nested random-intercept model (vectorised sweeps).

    ``levels`` holds one integer code array per grouping level, outermost
    first, with codes ``0..G_l - 1`` that identify a group uniquely at its
    level (e.g. cask-within-batch numbered across batches). ``n_groups`` fixes
    ``G_l`` (so that summaries of row chunks share one coding); by default
    ``G_l = max code + 1``. Rows with missing values must be dropped first.
    Raises :class:`DesignError` when a level is not nested in the previous one
    or the input is malformed.
    """
    try:
        yy = np.asarray(y, dtype=float)
        xx = np.asarray(X, dtype=float)
    except (TypeError, ValueError):
        raise DesignError("response and fixed-effects matrix must be numeric") from None
    if yy.ndim != 1:
        raise DesignError(f"response must be one-dimensional, got shape {yy.shape}")
    n = yy.shape[0]
    if n == 0:
        raise DesignError("no rows to summarise")
    if xx.ndim != 2 or xx.shape[0] != n:
        raise DesignError(f"fixed-effects matrix must be 2-D with {n} rows, got {xx.shape}")
    p = xx.shape[1]
    if p == 0:
        raise DesignError("the fixed-effects matrix has no columns")
    if len(fixed_names) != p:
        raise DesignError(f"{len(fixed_names)} fixed-effect names given for {p} columns")
    # one contiguous array per column (a single transposing copy of a row-major X)
    if p > 1 and not xx.flags.f_contiguous:
        xx = np.asfortranarray(xx)
    columns = [xx[:, j] for j in range(p)] + [yy]
    # the extremes of each column: all finite exactly when both are (NaN and
    # infinities propagate to them), and equal for a column constant over all rows
    lows = [float(col.min()) for col in columns]
    highs = [float(col.max()) for col in columns]
    if not (np.all(np.isfinite(lows)) and np.all(np.isfinite(highs))):
        raise DesignError(
            "response or fixed-effects matrix contains missing or non-finite values; "
            "drop those rows before summarising"
        )
    if len(levels) == 0:
        raise DesignError("at least one grouping level is needed")
    names = _check_names(level_names, len(levels))
    if n_groups is not None and len(n_groups) != len(levels):
        raise DesignError(f"{len(n_groups)} group counts given for {len(levels)} levels")
    codes: list[np.ndarray] = []
    sizes: list[int] = []
    for i, (name, raw) in enumerate(zip(names, levels, strict=True)):
        arr = np.asarray(raw)
        if arr.ndim != 1 or arr.shape[0] != n:
            raise DesignError(f"grouping level {name!r} must be one-dimensional with {n} entries")
        if not np.issubdtype(arr.dtype, np.integer):
            raise DesignError(f"grouping level {name!r} codes must be integers")
        arr = arr.astype(np.int64, copy=False)
        lo, hi = int(arr.min()), int(arr.max())
        size = hi + 1 if n_groups is None else int(n_groups[i])
        if lo < 0 or hi >= size:
            raise DesignError(f"grouping level {name!r} codes must lie in 0..{size - 1}")
        codes.append(arr)
        sizes.append(size)
    parents: list[np.ndarray] = []
    for i in range(1, len(codes)):
        par = np.full(sizes[i], -1, dtype=np.int64)
        par[codes[i]] = codes[i - 1]
        bad = np.flatnonzero(par[codes[i]] != codes[i - 1])
        if bad.size:
            g = int(codes[i][bad[0]])
            raise DesignError(
                f"grouping level {names[i]!r} is not nested in {names[i - 1]!r}: its group "
                f"{g} occurs in more than one {names[i - 1]!r} group (number inner groups "
                "uniquely across outer groups, e.g. batch:cask)"
            )
        parents.append(par)
    inner = codes[-1]
    g_inner = sizes[-1]
    counts = np.bincount(inner, minlength=g_inner).astype(np.int64)
    sums = np.empty((g_inner, p + 1))
    for j, col in enumerate(columns):
        if lows[j] == highs[j]:  # a constant column (the intercept): no pass needed
            sums[:, j] = lows[j] * counts
        else:
            sums[:, j] = np.bincount(inner, weights=col, minlength=g_inner)
    with np.errstate(invalid="ignore", divide="ignore"):
        means = sums / counts[:, None]
    # second sweep: deviations from the group means, a block of rows at a time
    # (blocks small enough to stay in cache), one column at a time. Columns
    # whose deviations are exactly 0 are skipped: a column constant over all
    # rows (such as the intercept), and a 0/1 indicator constant within every
    # group (such as a treatment given to whole units)
    mean_cols = [np.ascontiguousarray(means[:, j]) for j in range(p + 1)]
    moving = [
        j
        for j, col in enumerate(columns)
        if j == p
        or (
            lows[j] != highs[j]
            and not _indicator_within_constant(col, lows[j], highs[j], sums[:, j], counts)
        )
    ]
    dev = np.empty((len(moving), min(n, _ROW_BLOCK)))
    part = np.zeros((len(moving), len(moving)))
    for start in range(0, n, _ROW_BLOCK):
        stop = min(n, start + _ROW_BLOCK)
        idx = inner[start:stop]
        block = dev[:, : stop - start]
        for row, j in enumerate(moving):
            np.subtract(columns[j][start:stop], mean_cols[j].take(idx), out=block[row])
        part += block @ block.T
    within = np.zeros((p + 1, p + 1))
    within[np.ix_(moving, moving)] = 0.5 * (part + part.T)
    return NestedSummaries(
        n=n,
        p=p,
        level_names=names,
        fixed_names=tuple(str(s) for s in fixed_names),
        n_groups=tuple(sizes),
        counts=counts,
        sums=sums,
        within=within,
        parents=tuple(parents),
    )


def _pad(arr: np.ndarray, size: int, fill: float) -> np.ndarray:
    if arr.shape[0] == size:
        return arr
    out = np.full((size, *arr.shape[1:]), fill, dtype=arr.dtype)
    out[: arr.shape[0]] = arr
    return out


def combine(a: NestedSummaries, b: NestedSummaries) -> NestedSummaries:
    """Summaries of the union of two disjoint row sets coded the same way.

    Pooled within-group cross-products merge by the pairwise update
    ``S = S_a + S_b + sum_g n_a n_b / (n_a + n_b) (mean_a - mean_b)(mean_a - mean_b)'``
    (Chan, Golub & LeVeque 1979, Updating formulae and a pairwise algorithm
    for computing sample variances, Stanford report STAN-CS-79-773).
    """
    if a.level_names != b.level_names or a.fixed_names != b.fixed_names or a.p != b.p:
        raise DesignError("summaries to combine must have the same levels and fixed effects")
    sizes = tuple(max(x, y) for x, y in zip(a.n_groups, b.n_groups, strict=True))
    g_inner = sizes[-1]
    ca, cb = _pad(a.counts, g_inner, 0), _pad(b.counts, g_inner, 0)
    sa, sb = _pad(a.sums, g_inner, 0.0), _pad(b.sums, g_inner, 0.0)
    both = (ca > 0) & (cb > 0)
    na, nb = ca[both].astype(float), cb[both].astype(float)
    diff = sa[both] / na[:, None] - sb[both] / nb[:, None]
    within = a.within + b.within + (diff * (na * nb / (na + nb))[:, None]).T @ diff
    parents: list[np.ndarray] = []
    for i, (pa, pb) in enumerate(zip(a.parents, b.parents, strict=True)):
        pa2, pb2 = _pad(pa, sizes[i + 1], -1), _pad(pb, sizes[i + 1], -1)
        clash = np.flatnonzero((pa2 >= 0) & (pb2 >= 0) & (pa2 != pb2))
        if clash.size:
            inner, outer = a.level_names[i + 1], a.level_names[i]
            raise DesignError(
                f"grouping level {inner!r} is not nested in {outer!r}: its group "
                f"{int(clash[0])} lies in different {outer!r} groups in the two summaries"
            )
        parents.append(np.where(pa2 >= 0, pa2, pb2))
    return NestedSummaries(
        n=a.n + b.n,
        p=a.p,
        level_names=a.level_names,
        fixed_names=a.fixed_names,
        n_groups=sizes,
        counts=ca + cb,
        sums=sa + sb,
        within=0.5 * (within + within.T),
        parents=tuple(parents),
    )


# ---------------------------------------------------------------------------
# compact tree of non-empty groups, children sorted by parent


@dataclass(frozen=True, eq=False)
class _Tree:
    """Non-empty groups, each level's groups sorted by their parent.

    ``starts[l]`` are the positions where each level-``l`` group's children
    (level ``l + 1``) begin; ``parent[l]`` maps each level-``l + 1`` group to its
    parent's position. ``means`` are the innermost group means of ``[X, y]``.

    Implements :class:`replicheck.stats.reml_search.RemlProblem`.
    """

    n: int
    p: int
    names: tuple[str, ...]
    sizes: tuple[int, ...]
    counts: np.ndarray
    means: np.ndarray
    within: np.ndarray
    starts: tuple[np.ndarray, ...]
    parent: tuple[np.ndarray, ...]
    level_sums: tuple[np.ndarray, ...]  # column sums of X per group, per level
    level_counts: tuple[np.ndarray, ...]

    @property
    def k(self) -> int:
        return len(self.sizes)

    @property
    def mean_sizes(self) -> tuple[float, ...]:
        return tuple(self.n / g for g in self.sizes)

    # the REML search interface (replicheck.stats.reml_search.RemlProblem)

    def profiled(self, lam: np.ndarray) -> tuple[float, np.ndarray]:
        """lme4's REMLcrit at ``lam`` and its gradient in ``lam``."""
        return _profiled(self, lam)

    def profiled_deviance(self, lam: np.ndarray) -> float:
        """lme4's REMLcrit at ``lam``."""
        return _profiled(self, lam, grad=False)[0]

    def deviance_grid(self, lams: np.ndarray) -> np.ndarray:
        """lme4's REMLcrit at many values of a single level's ``lam`` at once."""
        return _deviance_grid(self, lams)

    def polish_start(self, lam: np.ndarray, active: Sequence[int]) -> PolishPoint:
        """Unprofiled deviance at ``lam`` and the profiled ``s_e`` (Newton start)."""
        sigma2 = _profiled_sigma2(self, _reml_at(self, lam))
        return _polish_point(self, active_variances(lam, active, sigma2), active)

    def polish_point(self, variances: np.ndarray, active: Sequence[int]) -> PolishPoint:
        """Unprofiled deviance at the variances (active levels, residual last)."""
        return _polish_point(self, variances, active)

    def final(self, lam: np.ndarray, active: Sequence[int]) -> FinalPoint:
        """Estimates (centred coordinates), criterion, Hessian and d C / d s at ``lam``."""
        ev = _reml_at(self, lam)
        sigma2 = _profiled_sigma2(self, ev)
        sec = _second_at(self, active_variances(lam, active, sigma2), active)
        return FinalPoint(
            sigma2=sigma2,
            deviance=_remlcrit(self, ev),
            beta=sec.beta,
            cov_beta=sec.cov_beta,
            hessian=sec.hessian,
            jac=sec.jac,
        )


def _build_tree(s: NestedSummaries) -> _Tree:
    k = len(s.level_names)
    if len(s.parents) != k - 1 or len(s.n_groups) != k:
        raise DesignError("summaries are inconsistent: one parent map per nested level needed")
    counts = np.asarray(s.counts)
    if counts.shape != (s.n_groups[-1],) or int(counts.sum()) != s.n or np.any(counts < 0):
        raise DesignError("summaries are inconsistent: group counts do not add up to n")
    # non-empty groups per level, innermost first
    alive: list[np.ndarray] = [np.empty(0, dtype=bool)] * k
    alive[k - 1] = counts > 0
    for lvl in range(k - 2, -1, -1):
        par = np.asarray(s.parents[lvl])
        child_alive = alive[lvl + 1]
        if np.any(par[child_alive] < 0) or np.any(par[child_alive] >= s.n_groups[lvl]):
            raise DesignError("summaries are inconsistent: a group with rows has no parent")
        flag = np.zeros(s.n_groups[lvl], dtype=bool)
        flag[par[child_alive]] = True
        alive[lvl] = flag
    # canonical order: level 0 by code, deeper levels sorted by parent position
    new_index: list[np.ndarray] = []
    starts: list[np.ndarray] = []
    parent_pos: list[np.ndarray] = []
    orders: list[np.ndarray] = []
    for lvl in range(k):
        ids = np.flatnonzero(alive[lvl])
        if lvl == 0:
            order = ids
        else:
            ppos = new_index[lvl - 1][np.asarray(s.parents[lvl - 1])[ids]]
            perm = np.argsort(ppos, kind="stable")
            order = ids[perm]
            sorted_par = ppos[perm]
            parent_pos.append(sorted_par)
            starts.append(np.searchsorted(sorted_par, np.arange(orders[lvl - 1].size)))
        idx = np.full(s.n_groups[lvl], -1, dtype=np.int64)
        idx[order] = np.arange(order.size)
        new_index.append(idx)
        orders.append(order)
    inner_order = orders[-1]
    n_g = counts[inner_order].astype(float)
    sums = np.asarray(s.sums, dtype=float)[inner_order]
    means = sums / n_g[:, None]
    # column sums of X and counts aggregated to every level (for design checks)
    level_sums: list[np.ndarray] = [np.empty(0)] * k
    level_counts: list[np.ndarray] = [np.empty(0)] * k
    level_sums[k - 1] = sums[:, : s.p]
    level_counts[k - 1] = n_g
    for lvl in range(k - 2, -1, -1):
        level_sums[lvl] = np.add.reduceat(level_sums[lvl + 1], starts[lvl], axis=0)
        level_counts[lvl] = np.add.reduceat(level_counts[lvl + 1], starts[lvl])
    return _Tree(
        n=s.n,
        p=s.p,
        names=s.level_names,
        sizes=tuple(int(o.size) for o in orders),
        counts=n_g,
        means=means,
        within=np.asarray(s.within, dtype=float),
        starts=tuple(starts),
        parent=tuple(parent_pos),
        level_sums=tuple(level_sums),
        level_counts=tuple(level_counts),
    )


def _check_design(tree: _Tree, s: NestedSummaries) -> None:
    n, p, names = tree.n, tree.p, tree.names
    if n - p < 1:
        raise DesignError("no residual degrees of freedom: more fixed effects than observations")
    cross = s._cross()
    xtx = cross[:p, :p]
    diag = np.diag(xtx)
    if np.any(diag <= 0.0):
        raise DesignError("the fixed-effects matrix is not of full column rank")
    scaled = xtx / np.sqrt(np.outer(diag, diag))
    evals = np.linalg.eigvalsh(scaled)
    if float(evals[0]) <= 1e-12 * float(evals[-1]):
        raise DesignError("the fixed-effects matrix is not of full column rank")
    for lvl, name in enumerate(names):
        if tree.sizes[lvl] < 2:
            raise DesignError(
                f"grouping level {name!r} has a single group; its variance is not estimable"
            )
        if lvl > 0 and tree.sizes[lvl] == tree.sizes[lvl - 1]:
            raise DesignError(
                f"grouping levels {names[lvl - 1]!r} and {name!r} group the observations "
                "identically; their variances cannot be separated"
            )
    if tree.sizes[-1] == n:
        raise DesignError(
            f"grouping level {names[-1]!r} has one observation per group; its variance "
            "cannot be separated from the residual"
        )
    # a level whose indicator columns lie in col(X) has no estimable variance:
    # tr(Z'(I - P_X)Z) = n - sum_g s_g'(X'X)^{-1} s_g is then 0 (it is at least of
    # order one row otherwise); the tolerance allows for rounding in n - sum
    chol = linalg.cho_factor(xtx, lower=True)
    for lvl, name in enumerate(names):
        sg = tree.level_sums[lvl]
        proj = float(np.sum(sg * np.asarray(linalg.cho_solve(chol, sg.T)).T))
        tol = max(1e-8 * float(np.max(tree.level_counts[lvl])), 1e-10 * n)
        if n - proj <= tol:
            raise DesignError(
                f"grouping level {name!r} is confounded with the fixed effects (each of its "
                "groups is determined by them); its variance cannot be estimated"
            )
    # y in col([X, Z]): the REML likelihood is unbounded (residual variance 0).
    # Regress y on X within the innermost groups (columns constant within groups
    # dropped, the rest scaled to unit length); a within R^2 above 1 - 1e-10 is
    # taken as an exact fit.
    sw = tree.within
    wyy = float(sw[p, p])
    varying = np.flatnonzero(np.diag(sw)[:p] > 1e-20 * diag)
    wd = np.sqrt(np.diag(sw)[varying])
    wxx = sw[np.ix_(varying, varying)] / np.outer(wd, wd)
    wxy = sw[varying, p] / wd
    evals_w, evecs_w = np.linalg.eigh(wxx)
    keep = evals_w > 1e-10 * float(evals_w[-1]) if evals_w.size else np.zeros(0, dtype=bool)
    proj_w = evecs_w[:, keep].T @ wxy
    rss_w = wyy - float(np.sum(proj_w**2 / evals_w[keep]))
    yty = float(cross[p, p])
    if n - tree.sizes[-1] - int(keep.sum()) < 1 or wyy <= 1e-20 * yty or rss_w <= 1e-10 * wyy:
        raise DesignError(
            "the response does not vary within the innermost groups beyond what the fixed "
            "effects explain (e.g. one value copied to every row of a unit); the residual "
            "variance is zero, so analyse the unit-level values instead"
        )


def _recentre(tree: _Tree) -> tuple[_Tree, np.ndarray, np.ndarray]:
    """Reparametrise the fixed effects so that the summaries are centred.

    With a large mean and a small spread (e.g. thickness ~2000 +- 5) the final
    term ``sum_h w_h mu_h mu_h'`` is dominated by the mean, and the Schur
    complement that gives ``r'V^{-1}r`` loses digits. When ``X`` has a constant
    column ``a`` (value ``kappa``), every other column ``j`` is replaced by
    ``X_j - (c_j / kappa) X_a`` (``c_j`` its mean): ``X~ = X T`` with
    ``T = I - e_a d'``, ``det T = 1``. Then ``y~ = y - X~ b0`` with ``b0`` the
    least-squares coefficients from the summaries. The likelihood is unchanged
    (an invertible, volume-preserving change of fixed-effects coordinates), and
    ``beta = T (beta~ + b0)``, ``cov(beta) = T cov(beta~) T'``. Only the group means
    and the pooled cross-products are transformed, exactly and linearly.
    """
    p = tree.p
    means = tree.means.copy()
    within = tree.within
    n_g = tree.counts
    t_mat = np.eye(p)
    centre = n_g @ means / tree.n
    for j in range(p):
        kappa = float(means[0, j])
        constant = np.all(np.abs(means[:, j] - kappa) <= 1e-12 * abs(kappa))
        if kappa != 0.0 and constant and within[j, j] <= 1e-20 * tree.n * kappa**2:
            d = centre[:p] / kappa
            d[j] = 0.0
            t_mat[j, :] -= d
            means[:, :p] -= np.outer(means[:, j], d)
            means[:, j] = kappa
            break
    full = np.eye(p + 1)
    full[:p, :p] = t_mat
    within = full.T @ within @ full
    # least-squares coefficients of y on the transformed X, from the summaries
    cross = within + (means * n_g[:, None]).T @ means
    b0 = np.asarray(linalg.solve(cross[:p, :p], cross[:p, p], assume_a="pos"))
    shift = np.eye(p + 1)
    shift[:p, p] = -b0
    means[:, p] -= means[:, :p] @ b0
    within = shift.T @ within @ shift
    within = 0.5 * (within + within.T)
    return replace(tree, means=means, within=within), t_mat, b0


# ---------------------------------------------------------------------------
# forward-mode derivatives


def _add_opt(*parts: np.ndarray | None) -> np.ndarray | None:
    out: np.ndarray | None = None
    for part in parts:
        if part is not None:
            out = part if out is None else out + part
    return out


def _e1(a: np.ndarray) -> np.ndarray:
    """Room for one trailing parameter axis."""
    return a[..., None]


def _e2(a: np.ndarray) -> np.ndarray:
    """Room for two trailing parameter axes."""
    return a[..., None, None]


def _outer_sym(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``a_p b_q + a_q b_p`` over the trailing parameter axis."""
    ab = a[..., :, None] * b[..., None, :]
    return ab + np.swapaxes(ab, -1, -2)


@dataclass(frozen=True, eq=False)
class _Jet:
    """A value with its gradient and Hessian in ``P`` parameters.

    ``g`` has shape ``(*v.shape, P)`` and ``h`` ``(*v.shape, P, P)``; ``None``
    stands for zero (a constant, or an order not requested). Arrays are
    indexed by group along their first axis, so gathering and summing groups
    touch contiguous memory.
    """

    v: np.ndarray
    g: np.ndarray | None = None
    h: np.ndarray | None = None

    def __add__(self, other: _Jet | np.ndarray | float) -> _Jet:
        o = _as_jet(other)
        return _Jet(self.v + o.v, _add_opt(self.g, o.g), _add_opt(self.h, o.h))

    __radd__ = __add__

    def __neg__(self) -> _Jet:
        return _Jet(
            -self.v,
            None if self.g is None else -self.g,
            None if self.h is None else -self.h,
        )

    def __sub__(self, other: _Jet | np.ndarray | float) -> _Jet:
        return self + (-_as_jet(other))

    def __mul__(self, other: _Jet | np.ndarray | float) -> _Jet:
        o = _as_jet(other)
        g = _add_opt(
            None if self.g is None else self.g * _e1(o.v),
            None if o.g is None else o.g * _e1(self.v),
        )
        cross = None
        second = self.h is not None or o.h is not None
        if second and self.g is not None and o.g is not None:
            cross = _outer_sym(self.g, o.g)
        h = _add_opt(
            None if self.h is None else self.h * _e2(o.v),
            None if o.h is None else o.h * _e2(self.v),
            cross,
        )
        return _Jet(self.v * o.v, g, h)

    __rmul__ = __mul__

    def _chain(self, f0: np.ndarray, f1: np.ndarray, f2: np.ndarray) -> _Jet:
        """``f(self)`` given ``f``, ``f'`` and ``f''`` at ``self.v``."""
        g = None if self.g is None else _e1(f1) * self.g
        h = None
        if self.h is not None and self.g is not None:
            h = _e2(f1) * self.h + _e2(f2) * (self.g[..., :, None] * self.g[..., None, :])
        return _Jet(f0, g, h)

    def recip(self) -> _Jet:
        r = 1.0 / self.v
        return self._chain(r, -(r * r), 2.0 * r * r * r)

    def log(self) -> _Jet:
        r = 1.0 / self.v
        return self._chain(np.log(self.v), r, -(r * r))

    def col(self) -> _Jet:
        """A per-group scalar as a column, to scale per-group rows."""
        return _Jet(
            self.v[:, None],
            None if self.g is None else self.g[:, None],
            None if self.h is None else self.h[:, None],
        )

    def take(self, idx: np.ndarray) -> _Jet:
        """Gather groups."""
        return _Jet(
            self.v[idx],
            None if self.g is None else self.g[idx],
            None if self.h is None else self.h[idx],
        )

    def segsum(self, starts: np.ndarray) -> _Jet:
        """Sum consecutive groups (the children of each parent)."""
        return _Jet(
            np.add.reduceat(self.v, starts, axis=0),
            None if self.g is None else np.add.reduceat(self.g, starts, axis=0),
            None if self.h is None else np.add.reduceat(self.h, starts, axis=0),
        )

    def total(self) -> _Jet:
        """Sum over all groups, keeping a length-1 group axis."""
        return _Jet(
            self.v.sum(axis=0, keepdims=True),
            None if self.g is None else self.g.sum(axis=0, keepdims=True),
            None if self.h is None else self.h.sum(axis=0, keepdims=True),
        )


def _as_jet(x: _Jet | np.ndarray | float) -> _Jet:
    return x if isinstance(x, _Jet) else _Jet(np.asarray(x, dtype=float))


def _param(value: float, index: int | None, n_par: int, order: int) -> _Jet:
    """A variance parameter as a length-1 jet (``index`` None: held fixed)."""
    v = np.array([value], dtype=float)
    if index is None or order == 0:
        return _Jet(v)
    g = np.zeros((1, n_par))
    g[0, index] = 1.0
    h = np.zeros((1, n_par, n_par)) if order >= 2 else None
    return _Jet(v, g, h)


def _tdot(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``sum_g a[g] (x) b[g]`` over the leading group axis (one BLAS product)."""
    g = a.shape[0]
    a2 = np.ascontiguousarray(a).reshape(g, -1)
    b2 = np.ascontiguousarray(b).reshape(g, -1)
    # the wider operand goes on the left: much faster in BLAS for tall matrices
    prod = (b2.T @ a2).T if a2.shape[1] < b2.shape[1] else a2.T @ b2
    return np.asarray(prod).reshape(a.shape[1:] + b.shape[1:])


def _gram(a: _Jet, b: _Jet) -> _Jet:
    """``sum_g a_g b_g'`` for per-group rows ``a``, ``b`` of shape ``(G, m)``.

    Result: value ``(m, m)``, gradient ``(m, m, P)``, Hessian ``(m, m, P, P)``.
    """
    v = _tdot(a.v, b.v)
    g = _add_opt(
        None if a.g is None else _tdot(a.g, b.v).transpose(0, 2, 1),
        None if b.g is None else _tdot(a.v, b.g),
    )
    cross = None
    second = a.h is not None or b.h is not None
    if second and a.g is not None and b.g is not None:
        ab = _tdot(a.g, b.g).transpose(0, 2, 1, 3)  # [i, j, p, q]
        cross = ab + np.swapaxes(ab, -1, -2)
    h = _add_opt(
        None if a.h is None else _tdot(a.h, b.v).transpose(0, 3, 1, 2),
        None if b.h is None else _tdot(a.v, b.h),
        cross,
    )
    return _Jet(v, g, h)


def _scalar_times(s: _Jet, mat: np.ndarray) -> _Jet:
    """A length-1 jet times a constant matrix."""
    return _Jet(
        s.v[0] * mat,
        None if s.g is None else _e1(mat) * s.g[0],
        None if s.h is None else _e2(mat) * s.h[0],
    )


@dataclass(frozen=True, eq=False)
class _Core:
    """``M = W'V^{-1}W`` and ``log|V|`` with derivatives (``M.v`` is ``m x m``)."""

    cross: _Jet
    logdet: _Jet


def _core(tree: _Tree, s: np.ndarray, free: Sequence[int], order: int) -> _Core:
    """The recursion of the module docstring at variance parameters ``s``.

    ``s = (s_1, ..., s_K, s_e)``; derivatives (to ``order``) are taken with
    respect to ``s[free]``.
    """
    k = tree.k
    n_par = len(free)
    pos = {int(f): i for i, f in enumerate(free)}
    par = [_param(float(s[i]), pos.get(i), n_par, order) for i in range(k + 1)]
    s_e = par[k]
    denom = s_e + par[k - 1] * tree.counts  # s_e + s_K n_g
    w = denom.recip() * tree.counts
    logdet = denom.log().total() + s_e.log() * float(tree.n - tree.sizes[-1])
    mu = _Jet(tree.means)
    cross = _scalar_times(s_e.recip(), tree.within)
    for lvl in range(k - 2, -1, -1):
        starts = tree.starts[lvl]
        m_par = w.segsum(starts)
        mu_par = (w.col() * mu).segsum(starts) * m_par.recip().col()
        diff = mu - mu_par.take(tree.parent[lvl])
        cross = cross + _gram(w.col() * diff, diff)
        d = par[lvl] * m_par + 1.0
        logdet = logdet + d.log().total()
        w = m_par * d.recip()
        mu = mu_par
    cross = cross + _gram(w.col() * mu, mu)
    return _Core(cross=cross, logdet=logdet)


# ---------------------------------------------------------------------------
# REML criterion


@dataclass(frozen=True, eq=False)
class _Reml:
    """REML quantities at one point (``A = X'V^{-1}X``, ``C = A^{-1}``)."""

    c_mat: np.ndarray
    beta: np.ndarray
    rvr: float  # r'V^{-1}r
    logdet_a: float
    logdet_v: float
    core: _Core


def _reml(tree: _Tree, s: np.ndarray, free: Sequence[int], order: int) -> _Reml:
    core = _core(tree, s, free, order)
    mat = core.cross.v
    p = tree.p
    scale = np.sqrt(np.diag(mat))
    if not np.all(scale > 0.0) or not np.all(np.isfinite(mat)):
        raise linalg.LinAlgError("degenerate cross-product matrix")
    chol = np.linalg.cholesky(mat / np.outer(scale, scale))
    lx = chol[:p, :p] * scale[:p, None]  # Cholesky factor of A
    logdet_a = float(2.0 * np.sum(np.log(np.diag(lx))))
    rvr = float((chol[p, p] * scale[p]) ** 2)
    if not rvr > 0.0:
        raise DesignError("the model fits the response exactly; residual variance is zero")
    c_mat = np.asarray(linalg.cho_solve((lx, True), np.eye(p), check_finite=False))
    c_mat = 0.5 * (c_mat + c_mat.T)
    beta = c_mat @ mat[:p, p]
    return _Reml(
        c_mat=c_mat,
        beta=beta,
        rvr=rvr,
        logdet_a=logdet_a,
        logdet_v=float(core.logdet.v[0]),
        core=core,
    )


def _reml_at(tree: _Tree, lam: np.ndarray) -> _Reml:
    """REML quantities (no derivatives) at ``s_e = 1``, ``s_l = lam_l``."""
    return _reml(tree, np.append(lam, 1.0), [], 0)


def _profiled_sigma2(tree: _Tree, ev: _Reml) -> float:
    """The residual variance that maximises the REML likelihood at ``ev``'s ``lam``."""
    return ev.rvr / (tree.n - tree.p)


def _crit(nmp: int, logdet_v: _F, logdet_a: _F, rvr: _F) -> _F:
    """lme4's REMLcrit from ``log|V|``, ``log|A|`` and ``r'V^{-1}r`` at ``s_e = 1``
    (floats, or arrays of them), ``nmp = n - p``."""
    return logdet_v + logdet_a + nmp * (1.0 + _LOG_2PI + np.log(rvr / nmp))


def _remlcrit(tree: _Tree, ev: _Reml) -> float:
    """lme4's REMLcrit from the quantities at ``s_e = 1``, ``s_l = lam_l``."""
    return float(_crit(tree.n - tree.p, ev.logdet_v, ev.logdet_a, ev.rvr))


def _profiled(tree: _Tree, lam: np.ndarray, grad: bool = True) -> tuple[float, np.ndarray]:
    """lme4's REMLcrit at relative variances ``lam`` and its gradient in ``lam``."""
    k = tree.k
    nmp = tree.n - tree.p
    if not grad:
        return _remlcrit(tree, _reml_at(tree, lam)), np.zeros(k)
    ev = _reml(tree, np.append(lam, 1.0), range(k), 1)
    dev = _remlcrit(tree, ev)
    p = tree.p
    assert ev.core.cross.g is not None and ev.core.logdet.g is not None
    mg = np.moveaxis(ev.core.cross.g, -1, 0)  # (P, m, m)
    z = np.append(-ev.beta, 1.0)
    d_rvr = np.einsum("i,kij,j->k", z, mg, z)
    d_logdet_a = np.einsum("ij,kji->k", ev.c_mat, mg[:, :p, :p])
    g = ev.core.logdet.g[0] + d_logdet_a + nmp * d_rvr / ev.rvr
    return dev, np.asarray(g)


def _deviance_grid(tree: _Tree, lams: np.ndarray) -> np.ndarray:
    """lme4's REMLcrit of a one-level tree at each ``lam`` in ``lams``.

    The recursion of the module docstring with ``K = 1`` and ``s_e = 1``:
    ``W'V^{-1}W = S_w + sum_g w_g mu_g mu_g'`` with ``w_g = n_g / (1 + lam n_g)``
    and ``log|V| = sum_g log(1 + lam n_g)``, for all ``lam`` in one batch (a
    grid that locates the optimum before Newton's method polishes it).
    Raises ``LinAlgError`` when a cross-product matrix is not positive definite.
    """
    if tree.k != 1:
        raise DesignError("the deviance grid is for one grouping level")
    lam = np.asarray(lams, dtype=float)
    p, nmp = tree.p, tree.n - tree.p
    n_g, mu = tree.counts, tree.means
    scaled = lam[:, None] * n_g[None, :]
    w = n_g[None, :] / (1.0 + scaled)
    logdet_v = np.log1p(scaled).sum(axis=1)
    m = mu.shape[1]
    if mu.shape[0] * m * m <= 1 << 22:
        outer = (mu[:, :, None] * mu[:, None, :]).reshape(mu.shape[0], m * m)
        mats = tree.within[None] + (w @ outer).reshape(lam.size, m, m)
    else:
        mats = np.stack([tree.within + (mu.T * wg) @ mu for wg in w])
    scale = np.sqrt(np.einsum("gii->gi", mats))
    if not (np.all(scale > 0.0) and np.all(np.isfinite(mats))):
        raise linalg.LinAlgError("degenerate cross-product matrix")
    chol = np.linalg.cholesky(mats / (scale[:, :, None] * scale[:, None, :]))
    diag = np.einsum("gii->gi", chol) * scale
    logdet_a = 2.0 * np.sum(np.log(diag[:, :p]), axis=1)
    rvr = diag[:, p] ** 2
    if not np.all(rvr > 0.0):
        raise DesignError("the model fits the response exactly; residual variance is zero")
    return np.asarray(_crit(nmp, logdet_v, logdet_a, rvr))


@dataclass(frozen=True, eq=False)
class _Second:
    deviance: float  # unprofiled REML deviance
    score: np.ndarray
    hessian: np.ndarray
    jac: np.ndarray  # d cov(beta) / d s, (P, p, p)
    cov_beta: np.ndarray
    beta: np.ndarray


def _second_order(tree: _Tree, s: np.ndarray, free: Sequence[int]) -> _Second:
    """Unprofiled REML deviance, its gradient and Hessian in ``s[free]``, d C / d s."""
    p = tree.p
    ev = _reml(tree, s, free, 2)
    cross, logdet = ev.core.cross, ev.core.logdet
    assert cross.g is not None and cross.h is not None
    assert logdet.g is not None and logdet.h is not None
    c = ev.c_mat
    beta = ev.beta
    z = np.append(-beta, 1.0)
    m_i = np.moveaxis(cross.g, -1, 0)  # (P, m, m)
    m_ij = np.moveaxis(cross.h, (-2, -1), (0, 1))  # (P, P, m, m)
    a_i = m_i[:, :p, :p]
    b_i = m_i[:, :p, p]
    # u_i = b_i - A_i beta;  C A_i
    u = b_i - a_i @ beta
    ca = c @ a_i  # (P, p, p)
    score = logdet.g[0] + np.einsum("kii->k", ca) + np.einsum("i,kij,j->k", z, m_i, z)
    hess = (
        logdet.h[0]
        + np.einsum("ij,klji->kl", c, m_ij[:, :, :p, :p])
        - np.einsum("kij,lji->kl", ca, ca)
        + np.einsum("i,klij,j->kl", z, m_ij, z)
        - 2.0 * (u @ c @ u.T)
    )
    hess = 0.5 * (hess + hess.T)
    jac = -(ca @ c)
    jac = 0.5 * (jac + np.swapaxes(jac, -1, -2))
    nmp = tree.n - p
    dev = ev.logdet_v + ev.logdet_a + ev.rvr + nmp * _LOG_2PI
    return _Second(
        deviance=float(dev),
        score=np.asarray(score),
        hessian=np.asarray(hess),
        jac=np.asarray(jac),
        cov_beta=c,
        beta=beta,
    )


# ---------------------------------------------------------------------------
# Newton points for the search (replicheck.stats.reml_search)


def _second_at(tree: _Tree, variances: np.ndarray, active: Sequence[int]) -> _Second:
    """:func:`_second_order` at the variances (active levels, residual last), the
    other levels at 0."""
    free = [*active, tree.k]
    s_full = np.zeros(tree.k + 1)
    s_full[free] = variances
    return _second_order(tree, s_full, free)


def _polish_point(tree: _Tree, variances: np.ndarray, active: Sequence[int]) -> PolishPoint:
    sec = _second_at(tree, variances, active)
    return PolishPoint(
        variances=variances,
        deviance=sec.deviance,
        derivatives=lambda: (sec.score, sec.hessian),
    )


# ---------------------------------------------------------------------------
# public fit


def fit_nested_reml(s: NestedSummaries) -> MixedFit:
    """REML fit of nested random intercepts from :func:`summarise` output.

    Returns the same :class:`~replicheck.stats.mixed.MixedFit` as
    :func:`~replicheck.stats.mixed.fit_reml` would for the factors
    ``level_names`` (outermost first), so that
    :func:`~replicheck.stats.mixed.satterthwaite_test` and
    :func:`~replicheck.stats.mixed.satterthwaite_t` apply. Work is proportional
    to the number of groups (module docstring; Patterson & Thompson 1971,
    Biometrika 58:545-554). Raises :class:`DesignError` for unusable designs.
    """
    tree = _build_tree(s)
    _check_design(tree, s)
    tree, t_mat, b0 = _recentre(tree)
    # while evaluations are cheap: a grid for one level, three starts for more;
    # lme4's single start theta = 1 beyond
    cheap = sum(tree.sizes) <= _MULTI_START_GROUPS
    starts = (1.0, 0.0625, 16.0) if cheap else (1.0,)
    fit = fit_components(
        tree,
        s.fixed_names,
        starts,
        newton_stop=_NEWTON_STOP,
        failures=_FAILURES,
        grid=tree.deviance_grid if tree.k == 1 and cheap else None,
    )
    # back from the centred fixed-effects coordinates of _recentre
    return replace(
        fit,
        beta=t_mat @ (fit.beta + b0),
        cov_beta=t_mat @ fit.cov_beta @ t_mat.T,
        jac_cov_beta=t_mat @ fit.jac_cov_beta @ t_mat.T,
    )
