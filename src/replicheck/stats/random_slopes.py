"""Linear mixed models with random slopes, fitted by REML, with Satterthwaite tests.

Model, in the formulation of lme4 (Bates, Maechler, Bolker & Walker 2015,
J. Stat. Software 67(1), section 3)::

    y = X beta + Z b + e,   b = Lambda u,   u ~ N(0, s2 I),   e ~ N(0, s2 I)

Each random term ``(effects | g)`` contributes, for every level of ``g``, a
block of ``d`` columns of ``Z`` (the effects' columns in that level's rows: 1
for an intercept, the values of a number, the indicator columns of a
category), and ``Lambda`` is block diagonal with ``I (x) T`` for each term,
``T`` a lower-triangular ``d x d`` relative Cholesky factor (unstructured
covariance ``s2 T T'``; diagonal when the term is written ``||``). ``theta``
holds the free entries of the ``T``s, column by column as lme4 orders them.

Everything is computed from the cross-products ``Z'Z, Z'X, X'X, Z'y, X'y, y'y``
(one pass over the rows): with ``L L' = Lambda'Z'Z Lambda + I`` (dense
Cholesky of order q, the number of random effects), ``R_ZX = L^-1 Lambda'Z'X``,
``R_X'R_X = X'X - R_ZX'R_ZX``, the penalised residual sum of squares ``r2``
and the profiled REML criterion (lme4's ``REMLcrit``)::

    d(theta) = log|L|^2 + log|R_X|^2 + (n - p) [1 + log(2 pi r2 / (n - p))].

It is minimised over ``theta`` (diagonal entries >= 0) by L-BFGS-B from
lme4's start (identity ``T``s), then polished by Powell's method.

Satterthwaite degrees of freedom as lmerTest computes them (Kuznetsova,
Brockhoff & Christensen 2017, J. Stat. Software 82(13)): the variance
parameters are ``(theta, sigma)``; their covariance is twice the inverse
Hessian of the unprofiled REML deviance, and the Jacobian of ``cov(beta)``
with respect to them is taken numerically (central differences with
Richardson extrapolation, as lmerTest does through numDeriv). The result is a
:class:`~replicheck.stats.reml_search.MixedFit`, so that
:func:`replicheck.stats.mixed.satterthwaite_test` tests any contrast.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import linalg

from replicheck.stats.classic import DesignError
from replicheck.stats.numderiv import hessian, minimise
from replicheck.stats.reml_search import MixedFit

__all__ = ["RandomTerm", "fit_random_slopes"]

# each evaluation factorises a dense matrix of this order, and the search needs hundreds: 1,000
# random effects (500 subjects x intercept and slope) took 92 s on a busy 2-core machine
MAX_RANDOM_EFFECTS = 1000
# covariance parameters searched numerically (a 4 x 4 unstructured covariance has 10;
# beyond about 15 the search and the numerical Hessian take minutes)
MAX_THETA = 15


@dataclass(frozen=True)
class RandomTerm:
    """One random term: ``columns`` (n x d, e.g. an intercept and a slope) per level of
    ``codes`` (0..m-1), with an unstructured or (``diagonal``) independent covariance."""

    name: str
    codes: np.ndarray
    columns: np.ndarray
    diagonal: bool = False


@dataclass(frozen=True)
class _Cross:
    ztz: np.ndarray
    ztx: np.ndarray
    xtx: np.ndarray
    zty: np.ndarray
    xty: np.ndarray
    yty: float
    n: int
    p: int


def _z_blocks(terms: Sequence[RandomTerm]) -> list[tuple[int, int, int]]:
    """(offset, levels, dim) of each term's block of random effects."""
    out, at = [], 0
    for t in terms:
        m = int(t.codes.max()) + 1
        d = t.columns.shape[1]
        out.append((at, m, d))
        at += m * d
    return out


def _z_matrix(terms: Sequence[RandomTerm], n: int) -> np.ndarray:
    blocks = _z_blocks(terms)
    q = sum(m * d for _, m, d in blocks)
    z = np.zeros((n, q))
    rows = np.arange(n)
    for t, (at, _, d) in zip(terms, blocks, strict=True):
        for j in range(d):
            z[rows, at + t.codes * d + j] = t.columns[:, j]
    return z


def _n_theta(t: RandomTerm) -> int:
    d = t.columns.shape[1]
    return d if t.diagonal else d * (d + 1) // 2


def _lower_bounds(terms: Sequence[RandomTerm]) -> list[float | None]:
    out: list[float | None] = []
    for t in terms:
        d = t.columns.shape[1]
        if t.diagonal:
            out += [0.0] * d
            continue
        for j in range(d):  # column by column: diagonal first, then below it
            out += [0.0] + [None] * (d - j - 1)
    return out


def _factor(t: RandomTerm, theta: np.ndarray) -> np.ndarray:
    d = t.columns.shape[1]
    if t.diagonal:
        return np.diag(theta)
    T = np.zeros((d, d))
    k = 0
    for j in range(d):
        for i in range(j, d):
            T[i, j] = theta[k]
            k += 1
    return T


def _lambda(terms: Sequence[RandomTerm], theta: np.ndarray) -> np.ndarray:
    parts, k = [], 0
    for t in terms:
        m = int(t.codes.max()) + 1
        n_t = _n_theta(t)
        parts.append(np.kron(np.eye(m), _factor(t, theta[k : k + n_t])))
        k += n_t
    return np.asarray(linalg.block_diag(*parts))


@dataclass(frozen=True)
class _Eval:
    log_det_l: float  # log|L|^2
    log_det_rx: float  # log|R_X|^2
    r2: float  # penalised residual sum of squares
    beta: np.ndarray
    rxtrx_inv: np.ndarray


def _evaluate(cross: _Cross, terms: Sequence[RandomTerm], theta: np.ndarray) -> _Eval:
    lam = _lambda(terms, theta)
    q = lam.shape[0]
    m = lam.T @ cross.ztz @ lam + np.eye(q)
    try:
        chol = linalg.cholesky(m, lower=True)
        rzx = linalg.solve_triangular(chol, lam.T @ cross.ztx, lower=True)
        cu = linalg.solve_triangular(chol, lam.T @ cross.zty, lower=True)
        rxtrx = cross.xtx - rzx.T @ rzx
        rx = linalg.cholesky(rxtrx, lower=False)
    except linalg.LinAlgError as err:
        raise DesignError("the fixed effects are not estimable beside the random ones") from err
    rhs = cross.xty - rzx.T @ cu
    cb = linalg.solve_triangular(rx, rhs, trans="T", lower=False)
    beta = linalg.solve_triangular(rx, cb, lower=False)
    r2 = float(cross.yty - cu @ cu - cb @ cb)
    rx_inv = linalg.solve_triangular(rx, np.eye(cross.p), lower=False)
    return _Eval(
        2.0 * float(np.sum(np.log(np.diag(chol)))),
        2.0 * float(np.sum(np.log(np.abs(np.diag(rx))))),
        max(r2, 1e-300),
        beta,
        rx_inv @ rx_inv.T,
    )


def _profiled(cross: _Cross, terms: Sequence[RandomTerm], theta: np.ndarray) -> float:
    ev = _evaluate(cross, terms, theta)
    dof = cross.n - cross.p
    return ev.log_det_l + ev.log_det_rx + dof * (1.0 + np.log(2.0 * np.pi * ev.r2 / dof))


def _unprofiled(cross: _Cross, terms: Sequence[RandomTerm], varpar: np.ndarray) -> float:
    theta, sigma = varpar[:-1], varpar[-1]
    ev = _evaluate(cross, terms, theta)
    dof = cross.n - cross.p
    s2 = sigma * sigma
    return ev.log_det_l + ev.log_det_rx + dof * np.log(2.0 * np.pi * s2) + ev.r2 / s2


def _richardson(f: Callable[[np.ndarray], np.ndarray], x: np.ndarray, i: int) -> np.ndarray:
    """d f / d x_i by central differences with Richardson extrapolation (4 halvings)."""
    h = 1e-4 * max(abs(float(x[i])), 1e-2)
    table: list[np.ndarray] = []
    for _ in range(4):
        e = np.zeros_like(x)
        e[i] = h
        table.append((f(x + e) - f(x - e)) / (2 * h))
        h /= 2
    for k in range(1, len(table)):
        factor = 4.0**k
        table = [(factor * table[j + 1] - table[j]) / (factor - 1) for j in range(len(table) - 1)]
    return table[0]


def fit_random_slopes(
    y: np.ndarray, X: np.ndarray, terms: Sequence[RandomTerm], fixed_names: Sequence[str] = ()
) -> MixedFit:
    """REML fit of a linear mixed model with random intercepts and slopes.

    Raises :class:`DesignError` when there are too many random effects for the
    dense computation, or the model is not identifiable.
    """
    y = np.asarray(y, dtype=float)
    X = np.asarray(X, dtype=float)
    n, p = X.shape
    q = sum(int(t.codes.max() + 1) * t.columns.shape[1] for t in terms)
    if q > MAX_RANDOM_EFFECTS:
        raise DesignError(
            f"{q} random effects exceed the {MAX_RANDOM_EFFECTS} a random-slope fit handles"
        )
    n_theta = sum(_n_theta(t) for t in terms)
    if n_theta > MAX_THETA:
        raise DesignError(
            f"the random terms have {n_theta} covariance parameters, more than the "
            f"{MAX_THETA} replicheck fits"
        )
    if int(np.linalg.matrix_rank(X)) < p:
        raise DesignError("the fixed-effects design is rank deficient")
    z = _z_matrix(terms, n)
    cross = _Cross(z.T @ z, z.T @ X, X.T @ X, z.T @ y, X.T @ y, float(y @ y), n, p)
    start = np.concatenate(
        [
            np.ones(t.columns.shape[1]) if t.diagonal else _factor_start(t.columns.shape[1])
            for t in terms
        ]
    )
    bounds = [(lb, None) for lb in _lower_bounds(terms)]

    def crit(theta: np.ndarray) -> float:
        try:
            return _profiled(cross, terms, theta)
        except DesignError:
            return float("inf")

    best = minimise(crit, start, bounds, 1e-10, 1e-14, 20000)
    theta = np.asarray(best.x, dtype=float)
    ev = _evaluate(cross, terms, theta)
    dof = n - p
    sigma2 = ev.r2 / dof
    varpar = np.concatenate([theta, [np.sqrt(sigma2)]])
    lows = _lower_bounds(terms)
    boundary = [k for k, lb in enumerate(lows) if lb is not None and theta[k] < 1e-6]
    active = [k for k in range(theta.size) if k not in boundary] + [theta.size]

    def covbeta(vp: np.ndarray) -> np.ndarray:
        full = varpar.copy()
        full[active] = vp
        e = _evaluate(cross, terms, full[:-1])
        return np.asarray(full[-1] ** 2 * e.rxtrx_inv)

    def deviance(vp: np.ndarray) -> np.ndarray:
        full = varpar.copy()
        full[active] = vp
        return np.array(_unprofiled(cross, terms, full))

    x0 = varpar[active]
    k = x0.size
    hess = hessian(lambda v: float(deviance(v)), x0, 1e-2)
    hessian_ok = bool(np.all(np.linalg.eigvalsh(hess) > 0))
    vcov = 2.0 * np.linalg.pinv(hess)
    jac = np.stack([_richardson(covbeta, x0, i) for i in range(k)])
    components: dict[str, float] = {}
    at = 0
    for t in terms:
        n_t = _n_theta(t)
        T = _factor(t, theta[at : at + n_t])
        cov = sigma2 * T @ T.T
        for j in range(cov.shape[0]):
            components[f"{t.name}[{j}]"] = float(cov[j, j])
        at += n_t
    components["residual"] = float(sigma2)
    names = tuple(fixed_names) if fixed_names else tuple(f"x{j}" for j in range(p))
    return MixedFit(
        components=components,
        beta=ev.beta,
        cov_beta=sigma2 * ev.rxtrx_inv,
        fixed_names=names,
        reml_deviance=float(best.fun),
        n_obs=n,
        n_fixed=p,
        converged=bool(best.success),
        boundary=tuple(f"theta[{b}]" for b in boundary),
        theta={f"theta[{j}]": float(v) for j, v in enumerate(theta)},
        n_levels={t.name: int(t.codes.max()) + 1 for t in terms},
        varpar_names=(*(f"theta[{j}]" for j in active[:-1]), "sigma"),
        varpar=x0,
        vcov_varpar=vcov,
        jac_cov_beta=jac,
        hessian_ok=hessian_ok,
    )


def _factor_start(d: int) -> np.ndarray:
    """lme4's start: the identity factor, column by column."""
    out = []
    for j in range(d):
        out += [1.0] + [0.0] * (d - j - 1)
    return np.asarray(out)
