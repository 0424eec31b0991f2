"""Variance-component linear mixed models fitted by REML, with Satterthwaite tests.

Model (random intercepts only, nested or crossed factors)::

    y = X beta + sum_k Z_k u_k + e,   u_k ~ N(0, s2_k I),   e ~ N(0, s2_e I)

where ``Z_k`` is the indicator matrix of factor ``k``. Write ``lam_k = s2_k / s2_e``
and ``H = I + sum_k lam_k Z_k Z_k'`` so that ``V = s2_e H``.

Computation never forms an n x n matrix. ``Z'Z = U diag(e) U'`` (q x q, computed
once; positive eigenvalues kept) gives ``Q = Z U e^{-1/2}``, an orthonormal basis
of ``col(Z)``, and ``Z_k Z_k' = Q T_k Q'``. Then::

    H = (I - QQ') + Q N Q',   N = I_r + sum_k lam_k T_k,
    H^{-1} = (I - QQ') + Q N^{-1} Q',   log|H| = log|N|,

so every quantity splits into a *within* part (projections of X and y on the
orthogonal complement of ``col(Z)``, computed once in n-space; for one factor
these are deviations from unit means) and an r-dimensional *between* part
(``Q'X``, ``Q'y``). This is the Woodbury form ``H^{-1} = I - Z D M^{-1} D Z'``
with ``M = I + D Z'Z D`` (``log|M| = log|N|``) rewritten so that nothing is
obtained as a small difference of large numbers when some ``lam_k`` is large
(residual variance tiny compared with a unit variance). Profiling out
``s2_e`` gives the REML criterion that lme4 reports (Bates, Maechler, Bolker &
Walker 2015, J. Stat. Software 67(1), eq. 41)::

    d(theta) = log|N| + log|X'H^{-1}X| + (n-p) [1 + log(2 pi r'H^{-1}r / (n-p))],

minimised over ``theta_k = sqrt(lam_k) >= 0`` (the relative standard deviations
lme4 calls theta) by the search of :mod:`replicheck.stats.reml_search`
(L-BFGS-B in theta, continued in ``lam``; an active set that sets components
whose optimum lies on the boundary to exactly 0, with the Karush-Kuhn-Tucker
condition ``d d / d lam_k >= 0`` at 0; Newton steps on the unprofiled REML
deviance in log-variance coordinates). This module supplies the analytic
gradient ``d d / d lam_k = tr(P_H V_k) - y'P_H V_k P_H y / s2_e``, the
unprofiled deviance and its Hessian (below). Three theta starts are used
unless each evaluation is costly (more than 300 levels in the dense part of the
problem: then lme4's single start ``theta = 1``); the Newton polish stops at log
steps below ``1e-13``. Several groupings with more than 300 levels in all go to
:mod:`replicheck.stats.mixed_lowrank`, which holds ``N`` as diagonal plus low rank
(the largest grouping eliminated first) instead of factorising it densely.
When ``y`` lies in ``col([X, Z])`` the REML likelihood is unbounded (residual
variance 0) and the fit is refused.

Satterthwaite degrees of freedom follow lmerTest (Kuznetsova, Brockhoff &
Christensen 2017, J. Stat. Software 82(13); Satterthwaite 1946, Biometrics
Bulletin 2:110-114; Fai & Cornelius 1996, J. Stat. Comput. Simul. 54:363-378).
The covariance of the variance parameters is ``A = 2 * inverse Hessian`` of the
REML deviance ``-2 log L_R`` (observed information), and the Jacobian of
``cov(beta)`` with respect to the variance parameters is analytic::

    d C / d s2_k = C X'V^{-1} Z_k Z_k' V^{-1} X C,   d C / d s2_e = C X'V^{-2} X C,
    d^2 (-2 log L_R) / d s2_i d s2_j = -tr(P V_i P V_j) + 2 y'P V_i P V_j P y,

with ``V_k = Z_k Z_k'``, ``V_e = I`` and ``P = V^{-1} - V^{-1}X C X'V^{-1}``; the
traces reduce to r x r and p x p matrices through the within/between split
(see ``_second_order``). :mod:`replicheck.stats.reml_search` inverts the
Hessian in log-variance coordinates and leaves components estimated at 0 out
of the variance parameters (its docstring says why the Satterthwaite df are
then those of lmerTest, which differentiates numerically with respect to
``(theta, sigma)``).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
from scipy import linalg

from replicheck.advice import option
from replicheck.stats import dist
from replicheck.stats.classic import DesignError
from replicheck.stats.reml_search import (
    FinalPoint,
    MixedFit,
    PolishPoint,
    active_variances,
    fit_components,
    lam_from_variances,
)

__all__ = [
    "FTest",
    "MixedFit",
    "TTest",
    "fit_reml",
    "satterthwaite_t",
    "satterthwaite_test",
]

_LOG_2PI = float(np.log(2.0 * np.pi))
_NEWTON_STOP = 1e-13  # largest log-variance step at which the Newton polish stops
# exceptions that mark a point where the criterion cannot be evaluated
_FAILURES: tuple[type[Exception], ...] = (linalg.LinAlgError, DesignError)


@dataclass(frozen=True)
class FTest:
    """A Wald F test of ``L beta = 0`` with Satterthwaite denominator df."""

    statistic: float
    df_num: float
    df_den: float
    p_value: float
    method: str


@dataclass(frozen=True)
class TTest:
    """A Wald t test of one contrast ``l' beta = 0`` with Satterthwaite df."""

    estimate: float
    se: float
    statistic: float
    df: float
    p_value: float


# ---------------------------------------------------------------------------
# design: within/between decomposition


class SearchInterface:
    """The REML search interface (:class:`replicheck.stats.reml_search.RemlProblem`)
    of a design that provides ``solver``, ``gradient`` and ``second_order``
    (the dense :class:`_Design` here, the low-rank one in
    :mod:`replicheck.stats.mixed_lowrank`)."""

    n: int
    p: int
    sizes: tuple[int, ...]
    xb: np.ndarray
    yb: np.ndarray
    xw: np.ndarray
    yw: np.ndarray
    sw: np.ndarray

    def solver(self, lam: np.ndarray) -> _Solver:
        raise NotImplementedError

    def gradient(self, ev: _Eval) -> np.ndarray:
        raise NotImplementedError

    def second_order(self, ev: _Eval, active: Sequence[int], sigma2: float) -> _Second:
        raise NotImplementedError

    def profiled(self, lam: np.ndarray) -> tuple[float, np.ndarray]:
        """lme4's REMLcrit at ``lam`` and its gradient in ``lam``."""
        ev = _evaluate(self, lam)
        return ev.deviance, self.gradient(ev)

    def profiled_deviance(self, lam: np.ndarray) -> float:
        """lme4's REMLcrit at ``lam``."""
        return _evaluate(self, lam).deviance

    def polish_start(self, lam: np.ndarray, active: Sequence[int]) -> PolishPoint:
        """Unprofiled deviance at ``lam`` and the profiled ``s2_e`` (Newton start)."""
        ev = _evaluate(self, lam)
        sigma2 = ev.rhr / (self.n - self.p)
        return _polish_point(self, ev, active, active_variances(lam, active, sigma2))

    def polish_point(self, variances: np.ndarray, active: Sequence[int]) -> PolishPoint:
        """Unprofiled deviance at the variances (active components, residual last)."""
        lam = lam_from_variances(variances, active, len(self.sizes))
        ev = _evaluate(self, lam)
        return _polish_point(self, ev, active, variances)

    def final(self, lam: np.ndarray, active: Sequence[int]) -> FinalPoint:
        """Estimates, criterion, Hessian and Jacobian of ``cov(beta)`` at ``lam``."""
        ev = _evaluate(self, lam)
        sigma2 = ev.rhr / (self.n - self.p)
        sec = self.second_order(ev, active, sigma2)
        return FinalPoint(
            sigma2=sigma2,
            deviance=ev.deviance,
            beta=ev.beta.copy(),
            cov_beta=sec.cov_beta,
            hessian=sec.hessian,
            jac=sec.jac,
        )


@dataclass(frozen=True, eq=False)
class _Design(SearchInterface):
    """Fixed quantities of the problem, computed once.

    ``Z'Z = U diag(e) U'`` with the ``r`` positive eigenvalues kept; ``Q = Z U e^{-1/2}``
    (never formed) has orthonormal columns spanning ``col(Z)``. ``xb = Q'X``,
    ``yb = Q'y``; ``xw``, ``yw`` are the projections of X and y on the orthogonal
    complement of ``col(Z)`` (computed in n-space). ``t_mats[k] = Q' Z_k Z_k' Q``
    (a vector, the unit sizes, when there is a single factor).

    Implements :class:`replicheck.stats.reml_search.RemlProblem`.
    """

    n: int
    p: int
    names: tuple[str, ...]
    sizes: tuple[int, ...]
    diagonal: bool
    r: int
    e: np.ndarray
    t_mats: tuple[np.ndarray, ...]
    xb: np.ndarray
    yb: np.ndarray
    xw: np.ndarray
    yw: np.ndarray
    sw: np.ndarray  # xw'xw
    n_within: int  # n - r
    scale: float  # largest eigenvalue of Z'Z
    mean_sizes: tuple[float, ...]  # mean number of observations per level, per factor

    def t_times(self, k: int, mat: np.ndarray) -> np.ndarray:
        """T_k @ mat."""
        t = self.t_mats[k]
        if self.diagonal:
            return t * mat if mat.ndim == 1 else t[:, None] * mat
        return np.asarray(t @ mat)

    def solver(self, lam: np.ndarray) -> _NSolver:
        """N^{-1} at ``lam``."""
        return _NSolver(self, lam)

    def n_matrix(self, lam: np.ndarray) -> np.ndarray:
        """N = I + sum_k lam_k T_k (a vector in the single-factor case)."""
        if self.diagonal:
            return 1.0 + lam[0] * self.t_mats[0]
        out = np.eye(self.r)
        for k, t in enumerate(self.t_mats):
            out += lam[k] * t
        return out

    def gradient(self, ev: _Eval) -> np.ndarray:
        """Gradient of the profiled criterion in ``lam`` at an evaluation."""
        return _gradient_lam(self, ev)

    def second_order(self, ev: _Eval, active: Sequence[int], sigma2: float) -> _Second:
        """Score, Hessian and Jacobian at an evaluation."""
        return _second_order(self, ev, active, sigma2)


def _check_inputs(
    y: np.ndarray, x: np.ndarray, factors: Mapping[str, np.ndarray], fixed_names: Sequence[str]
) -> tuple[np.ndarray, np.ndarray, list[str], list[np.ndarray], list[int]]:
    yy = np.asarray(y, dtype=float)
    xx = np.asarray(x, dtype=float)
    if yy.ndim != 1:
        raise DesignError(f"response must be one-dimensional, got shape {yy.shape}")
    n = yy.shape[0]
    if xx.ndim != 2 or xx.shape[0] != n:
        raise DesignError(f"fixed-effects matrix must be 2-D with {n} rows, got {xx.shape}")
    if not (np.all(np.isfinite(yy)) and np.all(np.isfinite(xx))):
        raise DesignError("response or fixed-effects matrix contains non-finite values")
    p = xx.shape[1]
    if len(fixed_names) != p:
        raise DesignError(f"{len(fixed_names)} fixed-effect names given for {p} columns")
    if p == 0:
        raise DesignError("the fixed-effects matrix has no columns")
    if np.linalg.matrix_rank(xx) < p:
        raise DesignError("the fixed-effects matrix is not of full column rank")
    if n - p < 1:
        raise DesignError("no residual degrees of freedom: more fixed effects than observations")
    if len(factors) == 0:
        raise DesignError("at least one random factor is needed")
    names: list[str] = []
    codes_list: list[np.ndarray] = []
    sizes: list[int] = []
    for name, raw in factors.items():
        if name == "residual" or name in names:
            raise DesignError(f"invalid or duplicate random factor name {name!r}")
        arr = np.asarray(raw)
        if arr.ndim != 1 or arr.shape[0] != n:
            raise DesignError(f"random factor {name!r} must be one-dimensional with {n} entries")
        if not np.issubdtype(arr.dtype, np.integer):
            raise DesignError(f"random factor {name!r} codes must be integers")
        _, codes = np.unique(arr, return_inverse=True)
        codes = codes.reshape(-1).astype(np.intp)
        k = int(codes.max()) + 1
        if k < 2:
            raise DesignError(
                f"random factor {name!r} has a single level; its variance is not estimable"
            )
        if k == n:
            raise DesignError(
                f"random factor {name!r} has one observation per level; its variance "
                "cannot be separated from the residual"
            )
        for other_name, other, other_k in zip(names, codes_list, sizes, strict=True):
            pairs = np.unique(np.column_stack([codes, other]), axis=0).shape[0]
            if pairs == k == other_k:
                raise DesignError(
                    f"random factors {other_name!r} and {name!r} group the observations "
                    "identically; their variances cannot be separated"
                )
        # a factor whose indicator columns lie in col(X) has no estimable variance
        m_k = np.bincount(codes, minlength=k).astype(float)
        zkx = np.column_stack(
            [np.bincount(codes, weights=xx[:, j], minlength=k) for j in range(p)]
        ).reshape(k, p)
        # Z_k'(I - P_X)Z_k is positive semi-definite, so its largest entry is on
        # the diagonal: the diagonal alone decides (k x k is never formed)
        resid = m_k - np.sum(zkx * np.linalg.solve(xx.T @ xx, zkx.T).T, axis=1)
        if float(np.max(np.abs(resid))) <= 1e-8 * float(np.max(m_k)):
            raise DesignError(
                f"random factor {name!r} is confounded with the fixed effects (each of its "
                "levels is determined by them); its variance cannot be estimated"
            )
        names.append(name)
        codes_list.append(codes)
        sizes.append(k)
    return yy, xx, names, codes_list, sizes


def _zt(codes_list: Sequence[np.ndarray], sizes: Sequence[int], v: np.ndarray) -> np.ndarray:
    """Z'v for a vector or an (n, p) matrix."""
    parts = []
    for codes, size in zip(codes_list, sizes, strict=True):
        if v.ndim == 1:
            parts.append(np.bincount(codes, weights=v, minlength=size))
        else:
            parts.append(
                np.column_stack(
                    [np.bincount(codes, weights=v[:, j], minlength=size) for j in range(v.shape[1])]
                ).reshape(size, v.shape[1])
            )
    return np.concatenate(parts, axis=0)


def _z(codes_list: Sequence[np.ndarray], sizes: Sequence[int], c: np.ndarray) -> np.ndarray:
    """Z c for a (q,) vector or (q, p) matrix c."""
    out = np.zeros((codes_list[0].shape[0], *c.shape[1:]))
    start = 0
    for codes, size in zip(codes_list, sizes, strict=True):
        out += c[start : start + size][codes]
        start += size
    return out


def _build_design(
    y: np.ndarray,
    x: np.ndarray,
    factors: Mapping[str, np.ndarray],
    fixed_names: Sequence[str],
) -> _Design:
    yy, xx, names, codes_list, sizes = _check_inputs(y, x, factors, fixed_names)
    n, p = xx.shape
    q = sum(sizes)
    offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(int)
    ztx = _zt(codes_list, sizes, xx)
    zty = _zt(codes_list, sizes, yy)
    diagonal = len(sizes) == 1
    if diagonal:
        e = np.bincount(codes_list[0], minlength=sizes[0]).astype(float)
        inv_sqrt = 1.0 / np.sqrt(e)
        xb = inv_sqrt[:, None] * ztx
        yb = inv_sqrt * zty
        # projection on col(Z): unit means
        xw = xx - (ztx / e[:, None])[codes_list[0]]
        yw = yy - (zty / e)[codes_list[0]]
        t_mats: tuple[np.ndarray, ...] = (e,)
        r = sizes[0]
    else:
        ztz = np.zeros((q, q))
        for a in range(len(sizes)):
            for b in range(a, len(sizes)):
                sa, sb = sizes[a], sizes[b]
                block = np.bincount(codes_list[a] * sb + codes_list[b], minlength=sa * sb)
                block = block.reshape(sa, sb).astype(float)
                oa, ob = offsets[a], offsets[b]
                ztz[oa : oa + sa, ob : ob + sb] = block
                ztz[ob : ob + sb, oa : oa + sa] = block.T
        evals, evecs = np.linalg.eigh(ztz)
        keep = evals > 1e-9 * float(evals[-1])
        e = evals[keep]
        ur = evecs[:, keep]
        r = int(keep.sum())
        inv_sqrt = 1.0 / np.sqrt(e)
        xb = inv_sqrt[:, None] * (ur.T @ ztx)
        yb = inv_sqrt * (ur.T @ zty)
        pinv_ztz = (ur / e) @ ur.T
        xw = xx - _z(codes_list, sizes, pinv_ztz @ ztx)
        yw = yy - _z(codes_list, sizes, pinv_ztz @ zty)
        mats = []
        for k in range(len(sizes)):
            rows = ur[offsets[k] : offsets[k] + sizes[k]] * np.sqrt(e)[None, :]
            mats.append(rows.T @ rows)
        t_mats = tuple(mats)
    return _Design(
        n=n,
        p=p,
        names=tuple(names),
        sizes=tuple(sizes),
        diagonal=diagonal,
        r=r,
        e=e,
        t_mats=t_mats,
        xb=xb,
        yb=yb,
        xw=xw,
        yw=yw,
        sw=xw.T @ xw,
        n_within=n - r,
        scale=float(np.max(e)),
        mean_sizes=tuple(n / k for k in sizes),
    )


def _check_residual_identifiable(design: Any) -> None:
    """The REML likelihood is unbounded when y lies in col([X, Z])."""
    coef, *_ = np.linalg.lstsq(design.xw, design.yw, rcond=None)
    rss_within = float(np.sum((design.yw - design.xw @ coef) ** 2))
    total = float(np.sum(design.yb**2) + np.sum(design.yw**2))  # = y'y
    if design.n_within - np.linalg.matrix_rank(design.xw) < 1 or rss_within <= 1e-20 * total:
        raise DesignError(
            "the response does not vary within the levels of the random factors beyond "
            "what the fixed effects explain (e.g. one value copied to every row of a unit); "
            "the residual variance is zero, so analyse the unit-level values instead"
        )


# ---------------------------------------------------------------------------
# evaluation at given relative variances lam = theta^2


class _NSolver:
    """Applies N^{-1} for N = I + sum_k lam_k T_k (diagonal or dense Cholesky)."""

    def __init__(self, design: _Design, lam: np.ndarray) -> None:
        self.diagonal = design.diagonal
        nmat = design.n_matrix(lam)
        if self.diagonal:
            self.diag = nmat
            self.logdet = float(np.sum(np.log(nmat)))
            self.chol: tuple[np.ndarray, bool] | None = None
        else:
            self.diag = np.empty(0)
            self.chol = linalg.cho_factor(nmat, lower=True, check_finite=False)
            self.logdet = float(2.0 * np.sum(np.log(np.diag(self.chol[0]))))
        self.r = design.r

    def __call__(self, v: np.ndarray) -> np.ndarray:
        if self.diagonal:
            return v / (self.diag if v.ndim == 1 else self.diag[:, None])
        assert self.chol is not None
        return np.asarray(linalg.cho_solve(self.chol, v, check_finite=False))

    def inverse(self) -> np.ndarray:
        """N^{-1} as a vector (single factor) or a dense matrix."""
        if self.diagonal:
            return 1.0 / self.diag
        assert self.chol is not None
        inv, info = linalg.lapack.dpotri(self.chol[0], lower=1)
        if info != 0:
            return self(np.eye(self.r))
        lower = np.tril(inv)
        return np.asarray(lower + np.tril(lower, -1).T)


class _Solver(Protocol):
    """Applies N^{-1} and knows log|N| (dense, diagonal or diagonal plus low rank)."""

    logdet: float

    def __call__(self, v: np.ndarray) -> np.ndarray: ...


class _Between(Protocol):
    """What :func:`_evaluate` reads of a design (``_Design`` or the low-rank one)."""

    @property
    def n(self) -> int: ...

    @property
    def p(self) -> int: ...

    @property
    def xb(self) -> np.ndarray: ...

    @property
    def yb(self) -> np.ndarray: ...

    @property
    def xw(self) -> np.ndarray: ...

    @property
    def yw(self) -> np.ndarray: ...

    @property
    def sw(self) -> np.ndarray: ...

    def solver(self, lam: np.ndarray) -> _Solver: ...


@dataclass(frozen=True, eq=False)
class _Eval:
    lam: np.ndarray
    solver: _Solver
    c_h: np.ndarray  # (X'H^{-1}X)^{-1}
    logdet_x: float
    beta: np.ndarray
    r_w: np.ndarray  # within part of r = y - X beta (n-vector)
    u_b: np.ndarray  # N^{-1} Q'r
    w_b: np.ndarray  # N^{-1} Q'X
    rhr: float  # r'H^{-1}r
    deviance: float  # profiled REML criterion (lme4's REMLcrit)


def _evaluate(design: _Between, lam: np.ndarray) -> _Eval:
    """H^{-1} = (I - QQ') + Q N^{-1} Q' splits every quantity into a within part
    (fixed) and a between part (r-dimensional)."""
    lam = np.asarray(lam, dtype=float)
    solver = design.solver(lam)
    w_b = solver(design.xb)
    xhx = design.sw + design.xb.T @ w_b
    chol_x = linalg.cho_factor(xhx, lower=True, check_finite=False)
    logdet_x = float(2.0 * np.sum(np.log(np.diag(chol_x[0]))))
    xhy = design.xw.T @ design.yw + w_b.T @ design.yb
    beta = np.asarray(linalg.cho_solve(chol_x, xhy, check_finite=False))
    c_h = np.asarray(linalg.cho_solve(chol_x, np.eye(design.p), check_finite=False))
    r_w = design.yw - design.xw @ beta
    r_b = design.yb - design.xb @ beta
    u_b = solver(r_b)
    rhr = float(r_w @ r_w + r_b @ u_b)
    nmp = design.n - design.p
    if not rhr > 0.0:
        raise DesignError("the model fits the response exactly; residual variance is zero")
    dev = solver.logdet + logdet_x + nmp * (1.0 + _LOG_2PI + np.log(rhr / nmp))
    return _Eval(
        lam=lam.copy(),
        solver=solver,
        c_h=c_h,
        logdet_x=logdet_x,
        beta=beta,
        r_w=r_w,
        u_b=u_b,
        w_b=w_b,
        rhr=rhr,
        deviance=float(dev),
    )


def _gradient_lam(design: _Design, ev: _Eval) -> np.ndarray:
    """Gradient of the profiled REML criterion with respect to lam_k.

    ``d d / d lam_k = tr(P_H V_k) - y'P_H V_k P_H y / s2_e`` with
    ``tr(P_H V_k) = tr(P_bb T_k)``, ``P_bb = N^{-1} - W C W'``, ``W = N^{-1} Q'X``
    and ``P_H y = r_w + Q u_b``.
    """
    sigma2 = ev.rhr / (design.n - design.p)
    assert isinstance(ev.solver, _NSolver)
    ninv = ev.solver.inverse()
    grad = np.empty(len(design.sizes))
    for k in range(len(design.sizes)):
        t = design.t_mats[k]
        tr_ninv_t = float(np.sum(ninv * t))  # tr(N^{-1} T_k), both symmetric
        wtw = ev.w_b.T @ design.t_times(k, ev.w_b)
        tr_pbb_t = tr_ninv_t - float(np.sum(ev.c_h * wtw))
        grad[k] = tr_pbb_t - float(ev.u_b @ design.t_times(k, ev.u_b)) / sigma2
    return grad


# ---------------------------------------------------------------------------
# second-order quantities (Hessian of the REML deviance, Jacobian of cov(beta))


@dataclass(frozen=True, eq=False)
class _Second:
    score: np.ndarray  # gradient of -2 log L_R w.r.t. active s2 (residual last)
    hessian: np.ndarray
    jac: np.ndarray  # (m, p, p)
    cov_beta: np.ndarray


@dataclass(frozen=True, eq=False)
class BetweenTraces:
    """The between-part quantities of the second-order formulas, over the active
    components ``i, j`` (``P = P_bb``, ``u = u_b``): ``tr(P T_i P T_j)``,
    ``(T_i u)'P(T_j u)``, ``tr(P T_i P)``, ``u'P T_i u``, ``tr(T_i P)``, and
    ``tr(P)``, ``tr(P^2)``, ``u'P u``. The dense design computes them from ``P``
    as a matrix, the low-rank one from ``P`` as diagonal plus low rank."""

    ptpt: np.ndarray
    tu_p_tu: np.ndarray
    ptp: np.ndarray
    u_p_tu: np.ndarray
    tp: np.ndarray
    tr_p: float
    tr_p2: float
    u_p_u: float


def _dense_traces(design: _Design, ev: _Eval, active: Sequence[int]) -> BetweenTraces:
    """:class:`BetweenTraces` from ``P_bb`` formed as a matrix."""
    c = ev.c_h
    w = ev.w_b
    u = ev.u_b
    assert isinstance(ev.solver, _NSolver)
    ninv = ev.solver.inverse()
    pbb = (np.diag(ninv) if design.diagonal else ninv) - w @ c @ w.T
    pbb = 0.5 * (pbb + pbb.T)
    a = len(active)
    ptpt = np.empty((a, a))
    tu_p_tu = np.empty((a, a))
    pt = [design.t_times(k, pbb).T for k in active]  # P_bb T_k
    tu = [design.t_times(k, u) for k in active]  # T_k u
    for i in range(a):
        for j in range(i, a):
            ptpt[i, j] = ptpt[j, i] = float(np.sum(pt[i] * pt[j].T))
            tu_p_tu[i, j] = tu_p_tu[j, i] = float(tu[i] @ pbb @ tu[j])
    return BetweenTraces(
        ptpt=ptpt,
        tu_p_tu=tu_p_tu,
        ptp=np.array([float(np.sum(pt[i] * pbb)) for i in range(a)]),
        u_p_tu=np.array([float(u @ pbb @ tu[i]) for i in range(a)]),
        tp=np.array([float(np.trace(pt[i])) for i in range(a)]),
        tr_p=float(np.trace(pbb)),
        tr_p2=float(np.sum(pbb * pbb)),
        u_p_u=float(u @ pbb @ u),
    )


def _second_order(design: _Design, ev: _Eval, active: Sequence[int], sigma2: float) -> _Second:
    """Score, Hessian and Jacobian of the dense design (:func:`assemble_second`)."""
    return assemble_second(design, ev, active, sigma2, _dense_traces(design, ev, active))


def assemble_second(
    design: Any, ev: _Eval, active: Sequence[int], sigma2: float, tr: BetweenTraces
) -> _Second:
    """Score, Hessian of -2 log L_R and d cov(beta) / d s2 at (lam, sigma2).

    ``design`` provides ``p``, ``sw``, ``xw``, ``n_within`` and ``t_times``. With
    ``P_H = s2_e P``, ``T_k = Q'V_kQ``, ``P_bb = Q'P_H Q``, ``K = N^{-1} Q'X C``,
    ``S_w = X_w'X_w``, ``g_w = X_w'r_w``:

    * ``tr(P_H V_k P_H V_l) = tr(P_bb T_k P_bb T_l)``,
      ``y'P_H V_k P_H V_l P_H y = u'T_k P_bb T_l u``;
    * ``tr(P_H V_k P_H) = tr(T_k (P_bb^2 + K S_w K'))``,
      ``y'P_H V_k P_H^2 y = u'P_bb T_k u - g_w'K'T_k u``;
    * ``tr(P_H^2) = n_w - 2 tr(C S_w) + tr((C S_w)^2) + 2 tr(K S_w K') + tr(P_bb^2)``,
      ``y'P_H^3 y = r_w'r_w - g_w'C g_w - 2 g_w'C h + u'P_bb u`` with ``h = W'u``.

    The terms in ``P_bb`` come in ``tr`` (:class:`BetweenTraces`). No term is a
    difference of quantities much larger than the result, so the Hessian stays
    accurate when the residual variance is tiny compared with the unit
    variances (large lam).
    """
    p = design.p
    c = ev.c_h
    w = ev.w_b
    u = ev.u_b
    kb = w @ c  # N^{-1} Q'X C
    sw = design.sw
    g_w = design.xw.T @ ev.r_w
    h = w.T @ u
    m = len(active) + 1
    g_mat = np.empty((m, m))
    q_mat = np.empty((m, m))
    g_mat[:-1, :-1] = tr.ptpt
    q_mat[:-1, :-1] = tr.tu_p_tu
    tu = [design.t_times(k, u) for k in active]  # T_k u
    for i, k in enumerate(active):
        ktk = kb.T @ design.t_times(k, kb)
        g_mat[i, -1] = g_mat[-1, i] = float(tr.ptp[i] + np.sum(ktk * sw))
        q_mat[i, -1] = q_mat[-1, i] = float(tr.u_p_tu[i] - g_w @ (kb.T @ tu[i]))
    csw = c @ sw
    ksk = float(np.sum((kb.T @ kb) * sw))
    g_mat[-1, -1] = (
        design.n_within
        - 2.0 * float(np.trace(csw))
        + float(np.sum(csw * csw.T))
        + 2.0 * ksk
        + tr.tr_p2
    )
    q_mat[-1, -1] = (
        float(ev.r_w @ ev.r_w) - float(g_w @ c @ g_w) - 2.0 * float(g_w @ c @ h) + tr.u_p_u
    )
    s2 = sigma2
    hessian = -g_mat / s2**2 + 2.0 * q_mat / s2**3
    score = np.empty(m)
    for i in range(len(active)):
        score[i] = float(tr.tp[i]) / s2 - float(u @ tu[i]) / s2**2
    tr_p = design.n_within - float(np.trace(csw)) + tr.tr_p
    yp2y = float(ev.r_w @ ev.r_w + u @ u)
    score[-1] = tr_p / s2 - yp2y / s2**2
    jac = np.empty((m, p, p))
    for i, k in enumerate(active):
        jac[i] = kb.T @ design.t_times(k, kb)
    jac[-1] = c @ (sw + w.T @ w) @ c
    jac = 0.5 * (jac + np.transpose(jac, (0, 2, 1)))
    return _Second(score=score, hessian=hessian, jac=jac, cov_beta=s2 * c)


def _unprofiled_deviance(design: _Between, ev: _Eval, sigma2: float) -> float:
    nmp = design.n - design.p
    return float(
        nmp * np.log(sigma2) + ev.solver.logdet + ev.logdet_x + ev.rhr / sigma2 + nmp * _LOG_2PI
    )


def _polish_point(
    design: SearchInterface, ev: _Eval, active: Sequence[int], variances: np.ndarray
) -> PolishPoint:
    """A Newton point at ``ev`` with ``s2_e = variances[-1]``; derivatives on demand."""

    def derivatives() -> tuple[np.ndarray, np.ndarray]:
        sec = design.second_order(ev, active, variances[-1])
        return sec.score, sec.hessian

    return PolishPoint(
        variances=variances,
        deviance=_unprofiled_deviance(design, ev, variances[-1]),
        derivatives=derivatives,
    )


#: Levels of crossed groupings, outside the one with the most levels, that the REML
#: fit accepts: the low-rank algorithm (:mod:`replicheck.stats.mixed_lowrank`) holds
#: ``levels x that number`` values and each evaluation costs ``levels x that number^2``
#: (a chosen bound; 2,000 cages crossed with 1,500 batches means 3.5 GB of work
#: arrays; nested groupings go through the per-unit summaries instead, without this bound).
MAX_CROSSED_LEVELS = 2000

#: Levels in all from which crossed groupings are fitted by the low-rank algorithm
#: rather than the dense one (below it the dense ``r x r`` factorisation is quick).
LOW_RANK_FROM = 300


def fit_reml(
    y: np.ndarray,
    X: np.ndarray,
    factors: Mapping[str, np.ndarray],
    fixed_names: Sequence[str],
    max_levels: int = MAX_CROSSED_LEVELS,
    algorithm: str = "auto",
) -> MixedFit:
    """Fit ``y = X beta + sum_k Z_k u_k + e`` by REML (random intercepts only).

    ``factors`` maps a name to an integer code array per random factor; nested
    and crossed factors are both allowed (for nesting, codes must identify the
    inner unit uniquely, e.g. cask-within-batch as its own factor). ``X`` must
    have full column rank. See the module docstring for the method (Patterson &
    Thompson 1971, Biometrika 58:545-554; Bates et al. 2015, J. Stat. Software
    67(1)). ``algorithm`` is ``"dense"`` (this module), ``"low-rank"``
    (:mod:`replicheck.stats.mixed_lowrank`, the largest grouping eliminated first)
    or ``"auto"``: low-rank for several groupings with more than
    :data:`LOW_RANK_FROM` levels in all, dense otherwise; both give the same fit
    (tests/test_stats_mixed_crossed.py). Raises :class:`DesignError` for unusable
    input, and for several groupings whose levels outside the largest one number
    more than ``max_levels`` (the work grows as their square).
    """
    if algorithm not in ("auto", "dense", "low-rank"):
        raise ValueError(f"unknown REML algorithm {algorithm!r}")
    if len(factors) > 1:
        counts = sorted(int(np.unique(np.asarray(c)).size) for c in factors.values())
        outside = sum(counts[:-1])
        if outside > max_levels:
            raise DesignError(
                f"the crossed groupings have {outside} levels outside the largest one, more "
                f"than the limit of {max_levels} for their REML fit (its work grows as the "
                f"square of that number; {option('limit', 'crossed-levels')} raises it)"
            )
        low_rank = algorithm == "low-rank" or (algorithm == "auto" and sum(counts) > LOW_RANK_FROM)
    else:
        low_rank = False
    if low_rank:
        from replicheck.stats.mixed_lowrank import build_low_rank

        problem: Any = build_low_rank(y, X, factors, fixed_names)
        # several starts when each evaluation is cheap (the dense part small)
        cheap = sum(problem.sizes) - problem.sizes[problem.large] <= LOW_RANK_FROM
    else:
        problem = _build_design(y, X, factors, fixed_names)
        cheap = problem.r <= LOW_RANK_FROM or problem.diagonal
    _check_residual_identifiable(problem)
    # several starts for small problems; one (lme4's theta = 1) when every
    # evaluation costs a large factorisation
    starts = (1.0, 0.0625, 16.0) if cheap else (1.0,)
    return fit_components(
        problem,
        tuple(str(s) for s in fixed_names),
        starts,
        newton_stop=_NEWTON_STOP,
        failures=_FAILURES,
    )


# ---------------------------------------------------------------------------
# Satterthwaite tests


def _contrast_matrix(fit: MixedFit, L: np.ndarray) -> np.ndarray:
    mat = np.atleast_2d(np.asarray(L, dtype=float))
    if mat.ndim != 2 or mat.shape[1] != fit.n_fixed:
        raise DesignError(f"contrast must have {fit.n_fixed} columns, got shape {mat.shape}")
    if mat.shape[0] == 0 or not np.all(np.isfinite(mat)):
        raise DesignError("contrast matrix is empty or contains non-finite values")
    return mat


def _satterthwaite_1d(fit: MixedFit, vec: np.ndarray) -> TTest:
    estimate = float(vec @ fit.beta)
    var = float(vec @ fit.cov_beta @ vec)
    grad = np.einsum("i,mij,j->m", vec, fit.jac_cov_beta, vec)
    denom = float(grad @ fit.vcov_varpar @ grad)
    df = 2.0 * var**2 / denom if denom > 0 else float("inf")
    se = float(np.sqrt(var))
    t = estimate / se
    return TTest(
        estimate=estimate,
        se=se,
        statistic=float(t),
        df=float(df),
        p_value=float(2.0 * dist.t_sf(abs(t), df)),
    )


def satterthwaite_t(fit: MixedFit, contrast: np.ndarray) -> TTest:
    """t test of ``l' beta = 0`` with Satterthwaite df ``2 (l'Cl)^2 / (g'Ag)``.

    ``g`` is the gradient of ``l'C l`` with respect to the variance parameters
    and ``A`` their asymptotic covariance (Satterthwaite 1946; Kuznetsova et al.
    2017, eq. for ``contest1D`` in lmerTest).
    """
    mat = _contrast_matrix(fit, contrast)
    if mat.shape[0] != 1:
        raise DesignError("a t test needs a single contrast row")
    return _satterthwaite_1d(fit, mat[0])


def _fstat_ddf(nu: np.ndarray, tol: float = 1e-8) -> float:
    """lmerTest's ``get_Fstat_ddf`` (Fai & Cornelius 1996).

    With one t statistic the df is its own; if all ``nu_m`` agree within
    ``tol`` their mean; otherwise ``E = sum nu_m / (nu_m - 2)`` and
    ``df = 2E / (E - q)``, except that lmerTest returns 2 when any ``nu_m <= 2``
    (then the expectation of the F statistic does not exist).
    """
    if nu.size == 1:
        return float(nu[0])
    if np.all(np.abs(np.diff(nu)) < tol):
        return float(np.mean(nu))
    if np.any(nu <= 2.0):
        return 2.0
    e = float(np.sum(nu / (nu - 2.0)))
    return 2.0 * e / (e - nu.size)


def satterthwaite_test(fit: MixedFit, L: np.ndarray) -> FTest:
    """Wald F test of ``L beta = 0`` with Satterthwaite denominator df.

    One row: ``F = t^2`` with the Satterthwaite df. Several rows (as lmerTest's
    ``contestMD``): ``LCL' = P D P'``, rows with eigenvalue below
    ``sqrt(eps) * max eigenvalue`` dropped (numerator df = rank),
    ``F = sum_m (P_m' L b)^2 / d_m / q``; each rotated contrast gets
    ``nu_m = 2 d_m^2 / (g_m' A g_m)`` and the denominator df combines them by
    Fai & Cornelius (1996, J. Stat. Comput. Simul. 54:363-378) as in
    :func:`_fstat_ddf`. F and its numerator df depend only on the row space
    of ``L``; the denominator df (like lmerTest's) also depends on the rows
    chosen, slightly when the design is unbalanced. To reproduce lmerTest's
    ``anova()`` pass the matrix it reports with ``show_tests()``.
    """
    mat = _contrast_matrix(fit, L)
    if mat.shape[0] == 1:
        tt = _satterthwaite_1d(fit, mat[0])
        f = tt.statistic**2
        return FTest(
            statistic=f,
            df_num=1.0,
            df_den=tt.df,
            p_value=float(dist.f_sf(f, 1.0, tt.df)),
            method="Satterthwaite",
        )
    vl = mat @ fit.cov_beta @ mat.T
    evals, evecs = np.linalg.eigh(0.5 * (vl + vl.T))
    order = np.argsort(evals)[::-1]
    evals, evecs = evals[order], evecs[:, order]
    tol = max(np.sqrt(np.finfo(float).eps) * float(evals[0]), 0.0)
    q = int(np.sum(evals > tol))
    if q == 0:
        raise DesignError("the contrast has zero variance; nothing to test")
    ptl = evecs[:, :q].T @ mat
    if q == 1:
        tt = _satterthwaite_1d(fit, ptl[0])
        f = tt.statistic**2
        return FTest(f, 1.0, tt.df, float(dist.f_sf(f, 1.0, tt.df)), "Satterthwaite")
    d = evals[:q]
    t2 = (ptl @ fit.beta) ** 2 / d
    f = float(np.sum(t2) / q)
    grads = np.einsum("mi,kij,mj->mk", ptl, fit.jac_cov_beta, ptl)
    denom = np.einsum("mk,kl,ml->m", grads, fit.vcov_varpar, grads)
    with np.errstate(divide="ignore"):
        nu = np.where(denom > 0, 2.0 * d**2 / np.where(denom > 0, denom, 1.0), np.inf)
    ddf = _fstat_ddf(nu)
    return FTest(
        statistic=f,
        df_num=float(q),
        df_den=float(ddf),
        p_value=float(dist.f_sf(f, q, ddf)),
        method="Satterthwaite (Fai-Cornelius)",
    )
