"""Cluster-robust tests of one term of an ordinary least squares fit.

Two corrections for few clusters, both at the level of the experimental unit
(the cluster) while keeping every observation in the fit:

* :func:`cr2_test` -- the bias-reduced linearization ("CR2") covariance of
  Bell & McCaffrey (2002, Survey Methodology 28:169-181) with small-sample
  degrees of freedom: the Satterthwaite t test of Bell & McCaffrey for one
  contrast (recommended by Imbens & Kolesar 2016, Rev. Econ. Stat.
  98:701-712) and the approximate Hotelling's T-squared test "HTZ" of
  Pustejovsky & Tipton (2018, J. Business & Economic Statistics 36:672-683)
  for several. The computations follow the R package clubSandwich of the
  latter authors for an unweighted ``lm()`` (identity working model), and the
  tests compare with its values.
* :func:`wild_cluster_bootstrap` -- the restricted wild cluster bootstrap
  ("WCR") of Cameron, Gelbach & Miller (2008, Rev. Econ. Stat. 90:414-427)
  with Rademacher or Webb (2013, Queen's Economics Department Working Paper
  1315) six-point weights, all draws computed at once with matrix products.

Notation: ``R`` is the upper-triangular factor of ``X'X = R'R`` (QR's ``R``
up to the signs of its rows), ``M = (X'X)^-1 = R^-1 R^-T`` and ``Q = X R^-1``
(orthonormal columns); ``Q_g`` are the rows of ``Q`` in cluster ``g`` and
``K_g = Q_g'Q_g`` (the cluster's share of the identity, ``sum_g K_g = I``).
The leverage block ``H_gg = X_g M X_g'`` is ``Q_g Q_g'``, whose non-zero
eigenvalues are those of ``K_g``; so the CR2 adjustment
``A_g = (I - H_gg)^(-1/2)`` acts on ``Q_g`` as ``A_g Q_g = Q_g phi(K_g)`` with
``phi(l) = (1 - l)^(-1/2)``.

Per-cluster sums. Both tests see the rows only through per-cluster summaries:
with ``S_g = X_g'X_g`` and ``s_g = X_g'y_g``, ``X'X = sum_g S_g``,
``K_g = R^-T S_g R^-1`` and the residual scores are
``Q_g'e_g = R^-T (s_g - S_g beta)`` (the restricted fit's likewise with its
coefficients). The clusters are numbered in increasing order of the given
codes (one ``numpy.bincount`` of the codes, or ``pandas.factorize(sort=True)``
for negative or very large codes; the rows are never sorted), and the sums
come from one weighted ``numpy.bincount`` per entry of the upper triangle of
``X'X`` and of ``X'y``. Everything else is done on the ``G`` clusters: the
cost is O(n p^2) for the sums plus O(G p^3), whatever the cluster sizes.

Change of basis. Forming ``X'X`` squares the condition number of ``X``, so
the sums are taken in a well-conditioned basis ``Z = X T``: when ``X`` has a
constant column the other columns are centred on their means, every column is
scaled to unit length, and the result is multiplied by the inverse Cholesky
factor of its own (equilibrated) Gram matrix, so that ``Z'Z`` is close to the
identity before the per-cluster sums are formed (the "CholeskyQR2" scheme,
accurate like a Householder QR while the condition number of the equilibrated
``X`` is below about 1e8: Yamamoto, Nakatsukasa, Yanagisawa & Fukaya 2015,
Electron. Trans. Numer. Anal. 44:306-326). Fitted values, residuals, the hat
blocks ``H_gg`` and ``L beta`` are unchanged when ``X`` becomes ``X T`` and
``L`` becomes ``L T``, and so is every CR2 and bootstrap quantity. ``y`` enters
as the residuals ``e0`` of a first fit in that basis (``s_g = Z_g'e0_g``), so
that ``s_g - S_g delta`` only carries a small correction ``delta``. The
constant column of ``Z`` (put first) needs no products: its sums are its
level times the cluster sizes or times the sums of the other columns. With
several contrasts the statistics are unchanged by ``L -> A L`` (``A``
invertible), and the rows of ``L R^-1`` are replaced by an orthonormal basis
of their span, so that an ill-conditioned ``L M L'`` costs no accuracy. The
design is refused as rank-deficient when the smallest eigenvalue of the
equilibrated Gram matrix is at or below ``1e-12`` of the largest.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from replicheck.defaults import DEFAULT_SEED
from replicheck.stats import dist
from replicheck.stats.classic import DesignError

__all__ = [
    "WEBB_POINTS",
    "BootstrapTest",
    "RobustTest",
    "cr2_test",
    "draw_weights",
    "wild_cluster_bootstrap",
]

DEFAULT_DRAWS = 9999
WEBB_BELOW = 12  # "auto" uses Webb weights below this many clusters (common practice)
# Webb (2013): +-sqrt(3/2), +-1, +-sqrt(1/2), each with probability 1/6.
WEBB_POINTS = np.array([-np.sqrt(1.5), -1.0, -np.sqrt(0.5), np.sqrt(0.5), 1.0, np.sqrt(1.5)])
# Eigenvalues of I - H_gg at or below this are treated as zero, as clubSandwich's
# matrix_power() does (tol = 10^-12).
_EIG_TOL = 1e-12
# A contrast whose working-model expectation of the CR2 variance is below this share
# of its model-based variance is not estimable from between-cluster variation.
_LOST_TOL = 1e-8
# The design is refused as rank-deficient when the smallest eigenvalue of its
# equilibrated (centred, unit-length columns) Gram matrix is at or below this share
# of the largest: some combination of the standardised columns is below about 1e-6
# of their length. Exactly collinear designs give shares of 1e-15 or less from
# rounding; above this one the first Cholesky factor is accurate enough for the
# second step to restore full accuracy.
_RANK_TOL = 1e-12
_TIE_TOL = 1e-9  # relative tolerance when comparing bootstrap statistics to the observed one
_CHUNK = 262_144  # bootstrap values (draws x clusters x contrasts) held at once


@dataclass(frozen=True)
class RobustTest:
    """A CR2 cluster-robust test of ``L beta = 0``.

    ``statistic`` is the F statistic (for one contrast it is ``t**2``; for
    several it is the HTZ statistic ``(eta - q + 1) / (eta q) * Q`` with ``Q``
    the CR2 Wald statistic); ``df_num`` is ``q`` and ``df_den`` the
    small-sample df (Satterthwaite for ``q = 1``, ``eta - q + 1`` for HTZ).
    ``t_statistic``, ``estimate`` and ``std_error`` are given for one
    contrast only.
    """

    statistic: float
    df_num: float
    df_den: float
    p_value: float
    t_statistic: float | None
    estimate: float | None
    std_error: float | None
    n_clusters: int
    method: str


@dataclass(frozen=True)
class BootstrapTest:
    """A restricted wild cluster bootstrap test of ``L beta = 0``.

    ``statistic`` is the Wald statistic of the original sample divided by
    ``q`` (F-type; ``t**2`` for one contrast) with the CR1 covariance
    ``G/(G-1) * (n-1)/(n-p) * M (sum_g X_g'e_g e_g'X_g) M``. ``draws`` is the
    number of bootstrap samples (``2**G`` when ``enumerated``); ``seed`` is
    ``None`` when all Rademacher sign vectors were enumerated.
    """

    statistic: float
    p_value: float
    weights: str
    draws: int
    enumerated: bool
    n_clusters: int
    seed: int | None
    undefined: int = 0  # draws whose statistic is 0/0 (left out of the p-value)


@dataclass(frozen=True)
class _Fit:
    """Per-cluster summaries of an OLS fit (see the module docstring)."""

    grams: np.ndarray  # (G, p, p) K_g = Q_g'Q_g
    qe: np.ndarray  # (G, p) Q_g'e_g, unrestricted residuals
    lr: np.ndarray  # (q, p) L R^-1 (q > 1: orthonormal rows spanning the same space)
    estimate: np.ndarray  # (q,) L beta, for the L of ``lr``
    n: int
    p: int
    n_clusters: int


def _cluster_numbers(cl: np.ndarray) -> tuple[np.ndarray, int]:
    """Cluster numbers ``0..G-1`` in increasing order of the given codes, and ``G``.

    Non-negative codes of moderate size are numbered with one ``bincount``;
    others with ``pandas.factorize(sort=True)``. Neither sorts the rows.
    """
    n = cl.shape[0]
    if n == 0:
        return np.zeros(0, dtype=np.intp), 0
    low, high = int(cl.min()), int(cl.max())
    if low >= 0 and high <= 2 * n + 1024:
        present = np.bincount(cl.astype(np.intp, copy=False), minlength=high + 1) > 0
        number = np.cumsum(present) - 1
        return number[cl], int(number[-1]) + 1
    codes, uniques = pd.factorize(cl, sort=True)
    return np.asarray(codes, dtype=np.intp), len(uniques)


def _rank_deficient() -> DesignError:
    return DesignError("design matrix is not of full column rank")


def _inv_upper(upper: np.ndarray) -> np.ndarray:
    """Inverse of a small upper-triangular matrix (LU does no row exchanges here)."""
    return np.triu(np.linalg.inv(upper))


def _basis(xt: np.ndarray) -> tuple[np.ndarray, np.ndarray, float | None]:
    """A well-conditioned basis of the columns of ``X``: ``(Z', T, level)``, ``Z = X T``.

    ``xt`` is ``X'`` (p, n). When ``X`` has a constant column, ``T`` centres
    the other columns on their means and puts the constant first, so that the
    first column of ``Z`` is the constant ``level`` (``None`` otherwise). ``T``
    also scales every column to unit length and multiplies by the inverse
    Cholesky factor of the resulting Gram matrix, so that ``Z'Z`` is close to
    the identity. ``Z'`` is returned as a (p, n) C-ordered array.

    Raises :class:`DesignError` for a column of zeros, two constant columns, or
    when the smallest eigenvalue of the equilibrated Gram matrix is at or below
    ``_RANK_TOL`` of the largest.
    """
    p = xt.shape[0]
    high, low = xt.max(axis=1), xt.min(axis=1)
    flat = high == low
    if np.any(flat & (high == 0.0)) or np.count_nonzero(flat) > 1:
        raise _rank_deficient()
    order = np.arange(p)
    shift = np.eye(p)
    if flat.any():
        c = int(np.flatnonzero(flat)[0])
        means = xt.mean(axis=1)
        means[c] = 0.0
        scaled = xt - means[:, None]  # row c is untouched
        shift[c, :] -= means / high[c]  # X shift is centred, as column c is high[c] * 1
        order = np.concatenate([[c], np.delete(order, c)])
        high, low = high - means, low - means
    else:
        scaled = xt.copy()
    amax = np.maximum(high, -low)  # largest absolute value (near enough when centred)
    scaled *= (1.0 / amax)[:, None]
    gram = scaled @ scaled.T
    length = np.sqrt(np.diag(gram))
    equil = (gram / np.outer(length, length))[np.ix_(order, order)]
    eig = np.linalg.eigvalsh(equil)
    if not eig[0] > _RANK_TOL * eig[-1]:
        raise _rank_deficient()
    try:
        upper = np.linalg.cholesky(equil).T  # equil = upper'upper (columns in ``order``)
    except np.linalg.LinAlgError:
        raise _rank_deficient() from None
    # Z = scaled' P D^-1 upper^-1, P selecting the columns in ``order``, D = diag(length)
    mix = np.zeros((p, p))
    mix[order, :] = _inv_upper(upper) / length[order][:, None]
    zt = mix.T @ scaled
    level = None
    if flat.any():
        level = float(mix[order[0], 0] * scaled[order[0], 0])
        zt[0] = level  # exactly constant: mix[:, 0] is zero but for the constant column
    return zt, shift @ (mix / amax[:, None]), level


def _prepare(y: np.ndarray, x: np.ndarray, cluster: np.ndarray, contrast: np.ndarray) -> _Fit:
    """Validate the inputs and reduce the OLS fit to per-cluster summaries."""
    yy = np.asarray(y, dtype=float)
    if yy.ndim != 1:
        raise DesignError(f"response must be one-dimensional, got shape {yy.shape}")
    n = yy.shape[0]
    xx = np.asarray(x, dtype=float)
    if xx.ndim != 2 or xx.shape[0] != n:
        raise DesignError(f"design matrix must be 2-D with {n} rows, got shape {xx.shape}")
    p = xx.shape[1]
    cl = np.asarray(cluster)
    if cl.ndim != 1 or cl.shape[0] != n:
        raise DesignError(
            f"cluster codes must be one-dimensional with {n} entries, got shape {cl.shape}"
        )
    if not np.issubdtype(cl.dtype, np.integer):
        raise DesignError(f"cluster codes must be integers, got dtype {cl.dtype}")
    ll = np.asarray(contrast, dtype=float)
    if ll.ndim == 1:
        ll = ll[None, :]
    if ll.ndim != 2 or ll.shape[1] != p or ll.shape[0] < 1:
        raise DesignError(
            f"hypothesis matrix must have {p} columns (one per coefficient), got shape {ll.shape}"
        )
    if not (np.all(np.isfinite(yy)) and np.all(np.isfinite(xx)) and np.all(np.isfinite(ll))):
        raise DesignError("response, design matrix or hypothesis matrix has non-finite values")
    if np.linalg.matrix_rank(ll) < ll.shape[0]:
        raise DesignError("hypothesis matrix rows are linearly dependent")
    codes, n_clusters = _cluster_numbers(cl)
    if n_clusters < 2:
        raise DesignError(f"cluster-robust tests need at least 2 clusters, found {n_clusters}")
    if n <= p:
        raise DesignError(f"{n} observations cannot fit {p} coefficients with residual df")
    zt, basis, level = _basis(np.ascontiguousarray(xx.T))
    # a first fit (Z'Z is close to I) and its residuals; the exact fit adds ``delta``
    start = zt @ yy
    resid0 = yy - start @ zt

    def per_cluster(values: np.ndarray | None) -> np.ndarray:
        return np.bincount(codes, weights=values, minlength=n_clusters).astype(float)

    def times(i: int, values: np.ndarray) -> np.ndarray:
        """Per-cluster sums of ``Z_i * values`` (one product fewer for the constant)."""
        if i == 0 and level is not None:
            return level * per_cluster(values)
        return per_cluster(zt[i] * values)

    sums = np.empty((n_clusters, p, p))  # S_g = Z_g'Z_g
    for j in range(p):
        if j == 0 and level is not None:
            sums[:, 0, 0] = level * level * per_cluster(None)
        else:
            sums[:, 0, j] = sums[:, j, 0] = times(0, zt[j])
        for i in range(1, j + 1):
            sums[:, i, j] = sums[:, j, i] = per_cluster(zt[i] * zt[j])
    scores0 = np.column_stack([times(i, resid0) for i in range(p)])  # Z_g'e0_g
    total = sums.sum(axis=0)
    try:
        upper = np.linalg.cholesky(total).T  # R of Z'Z = R'R
    except np.linalg.LinAlgError:
        raise _rank_deficient() from None
    inv_r = _inv_upper(upper)  # R^-1
    delta = inv_r @ (inv_r.T @ scores0.sum(axis=0))  # (Z'Z)^-1 Z'e0
    qe = (scores0 - sums @ delta) @ inv_r  # rows (R^-T Z_g'e_g)'
    grams = inv_r.T @ sums @ inv_r
    beta_z = start + delta
    lr = ll @ basis @ inv_r  # L T R^-1, as L beta = (L T) beta_Z
    if lr.shape[0] == 1:
        return _Fit(grams, qe, lr, lr @ (upper @ beta_z), n, p, n_clusters)
    # Several contrasts: every statistic is unchanged by L -> A L (A invertible), so test
    # the equivalent hypothesis with orthonormal rows of L R^-1 (L M L' = I), whose
    # estimate U'(R beta_Z) does not suffer from an ill-conditioned L M L'.
    orth = np.linalg.qr(lr.T)[0].T
    return _Fit(grams, qe, orth, orth @ (upper @ beta_z), n, p, n_clusters)


def _inv_sqrt(values: np.ndarray) -> np.ndarray:
    """``values^(-1/2)``, and 0 where ``values <= 1e-12`` (clubSandwich's tolerance)."""
    kept = values > _EIG_TOL
    return np.where(kept, 1.0 / np.sqrt(np.where(kept, values, 1.0)), 0.0)


def _through(vecs: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """``V_g diag(weights_g) V_g'`` for a stack of eigenvector matrices."""
    return (vecs * weights[:, None, :]) @ np.swapaxes(vecs, 1, 2)


def _check_estimable(fit: _Fit, omega: np.ndarray) -> None:
    """Refuse contrasts that between-cluster variation cannot estimate.

    ``omega`` is the working-model expectation of the CR2 ``L V L'`` (independent
    errors of unit variance). CR2 is unbiased under that model, so
    ``omega = L M L'`` unless some ``I - H_gg`` is singular; the directions lost
    there are those of contrasts that lie within single clusters (each level in
    one cluster, or block effects when the clusters are the blocks).
    """
    scale = _sym_power(fit.lr @ fit.lr.T, -0.5)  # (L M L')^(-1/2)
    kept = np.linalg.eigvalsh(scale @ omega @ scale)
    if float(kept.min()) < _LOST_TOL:
        raise DesignError(
            "the tested contrast cannot be estimated from variation between clusters "
            "(a level or contrast lies within single clusters)"
        )


def _omega(fit: _Fit, grams: np.ndarray) -> np.ndarray:
    """Working-model expectation of the CR2 ``L V L'``: ``L R^-1 [sum_g ...] R^-T L'``."""
    lam, vecs = np.linalg.eigh(grams)
    one_minus = 1.0 - lam
    share = _inv_sqrt(one_minus) ** 2 * lam * one_minus
    return np.asarray(fit.lr @ _through(vecs, share).sum(axis=0) @ fit.lr.T)


def _sym_power(mat: np.ndarray, power: float) -> np.ndarray:
    """Symmetric matrix power with eigenvalues <= 1e-12 set to zero (as clubSandwich)."""
    vals, vecs = np.linalg.eigh(mat)
    safe = np.where(vals > _EIG_TOL, vals, 1.0)
    powered = np.where(vals > _EIG_TOL, safe**power, 0.0)
    return (vecs * powered[..., None, :]) @ np.swapaxes(vecs, -1, -2)


def cr2_test(y: np.ndarray, X: np.ndarray, cluster: np.ndarray, L: np.ndarray) -> RobustTest:
    """CR2 cluster-robust test of ``L beta = 0`` after an OLS fit.

    ``y`` (n,), ``X`` (n, p) of full column rank, ``cluster`` integer codes of
    the experimental units (any integers; n entries), ``L`` (q, p) of full row
    rank (a vector is one row).

    Covariance (Bell & McCaffrey 2002, Survey Methodology 28:169-181):
    ``V = M [sum_g X_g' A_g e_g e_g' A_g X_g] M`` with
    ``A_g = (I - H_gg)^(-1/2)``, the symmetric inverse square root; when
    ``I - H_gg`` is singular (the cluster's indicator lies in the column space
    of ``X``, e.g. block columns with clusters = blocks, or a cluster alone in
    its treatment level) the eigenvalues at or below 1e-12 get power zero, a
    pseudo-inverse square root, as in clubSandwich (Pustejovsky & Tipton 2018,
    J. Business & Economic Statistics 36:672-683). A cluster alone in its
    level then adds nothing to the variance of its level's contrast, so the
    variance rests on the other clusters only.

    One contrast: ``t = L beta / sqrt(L V L')`` on the Satterthwaite df of
    Bell & McCaffrey, computed under the working model of independent
    homoskedastic errors (``nu = E[LVL']^2 / Var[LVL']`` with the exact
    moments of the quadratic form; Imbens & Kolesar 2016, Rev. Econ. Stat.
    98:701-712, recommend this df). Several contrasts: the HTZ test of
    Pustejovsky & Tipton (2018): ``Q = (L beta)' (L V L')^-1 L beta``,
    ``F = (eta - q + 1) / (eta q) * Q`` on ``(q, eta - q + 1)`` df, with
    ``eta = q (q + 1) / sum_st Var(W_st)`` for ``W = Omega^-1/2 (L V L')
    Omega^-1/2`` and ``Omega = E[L V L']``. For ``q = 1`` both give the same
    test.

    Raises :class:`DesignError` for malformed input, fewer than 2 clusters,
    a rank-deficient ``X`` or ``L``, a contrast that between-cluster variation
    cannot estimate (for example each level in a single cluster), or HTZ df
    that are not positive (clubSandwich reports no p-value then).
    """
    fit = _prepare(y, X, cluster, L)
    q = fit.lr.shape[0]
    grams = fit.grams
    lam, vecs = np.linalg.eigh(grams)  # (G, p), (G, p, p)
    one_minus = 1.0 - lam
    phi = _inv_sqrt(one_minus)

    def through(weights: np.ndarray) -> np.ndarray:
        """``V_g diag(weights_g) V_g'`` for every cluster."""
        return _through(vecs, weights)

    # v_g = phi(K_g) Q_g' e_g;  L V L' = sum_g (L R^-1 v_g)(L R^-1 v_g)'
    qe = fit.qe  # (G, p)
    v = np.einsum("gab,gb->ga", through(phi), qe)
    scores = v @ fit.lr.T  # (G, q)
    lvl = scores.T @ scores
    # Working-model moments: G_g G_g' = Lr phi K phi Lr' and H_g = Lr phi K (q x p).
    omega = fit.lr @ through(phi**2 * lam * one_minus).sum(axis=0) @ fit.lr.T
    _check_estimable(fit, omega)
    if lvl.shape == (1, 1) and lvl[0, 0] <= 0.0:
        raise DesignError(
            "the CR2 variance of the tested contrast is zero: the residuals carry no "
            "information about it"
        )
    whiten = _sym_power(omega, -0.5)
    lw = whiten @ fit.lr  # (q, p)
    d_mats = np.einsum("ap,gpr,br->gab", lw, through(phi**2 * lam), lw)  # (G, q, q)
    h_mats = np.einsum("ap,gpr->gar", lw, through(phi * lam))  # (G, q, p)
    total_variance = _htz_total_variance(d_mats, h_mats)
    if not (np.isfinite(total_variance) and total_variance > 0.0):
        raise DesignError(
            "the CR2 degrees of freedom cannot be computed: the values are too extreme"
        )
    eta = q * (q + 1) / total_variance
    est = fit.estimate
    try:
        chol = np.linalg.cholesky(lvl)
    except np.linalg.LinAlgError:
        raise DesignError(
            "the CR2 covariance of the tested contrasts is singular (too few clusters)"
        ) from None
    z = np.linalg.solve(chol, est)
    wald = float(z @ z)
    if q == 1:
        se = float(np.sqrt(lvl[0, 0]))
        t = float(est[0]) / se
        df = float(eta)
        return RobustTest(
            statistic=t * t,
            df_num=1.0,
            df_den=df,
            p_value=float(2.0 * dist.t_sf(abs(t), df)),
            t_statistic=t,
            estimate=float(est[0]),
            std_error=se,
            n_clusters=fit.n_clusters,
            method="CR2, Satterthwaite df (Bell & McCaffrey 2002; Pustejovsky & Tipton 2018)",
        )
    df_den = float(eta - q + 1)
    if not df_den > 0.0:
        raise DesignError(
            f"the HTZ test has no positive denominator df ({df_den:.3g}): too few clusters"
        )
    f_stat = df_den / (eta * q) * wald
    return RobustTest(
        statistic=float(f_stat),
        df_num=float(q),
        df_den=df_den,
        p_value=float(dist.f_sf(f_stat, q, df_den)),
        t_statistic=None,
        estimate=None,
        std_error=None,
        n_clusters=fit.n_clusters,
        method="CR2, HTZ approximate Hotelling T-squared (Pustejovsky & Tipton 2018)",
    )


def _htz_total_variance(d_mats: np.ndarray, h_mats: np.ndarray) -> float:
    """``sum_st Var(W_st)`` of the whitened CR2 covariance under the working model.

    With ``B_st = diag_g(D_g[s,t]) - H_s H_t'`` (G x G; ``H_s`` stacks the rows
    ``H_g[s]``), clubSandwich's ``total_variance_mat`` is
    ``tr(B_st B_ts') + tr(B_ss B_tt')``; both traces are expanded here so that no
    G x G matrix is formed.
    """
    hh = np.einsum("gsa,gta->gst", h_mats, h_mats)  # H_g[s] . H_g[t]
    cross = np.einsum("gsa,gtb->stab", h_mats, h_mats)  # H_s' H_t
    diag_d = np.einsum("gss->gs", d_mats)
    diag_h = np.einsum("gss->gs", hh)
    first = (
        np.einsum("gst,gst->st", d_mats, d_mats)
        - 2.0 * np.einsum("gst,gst->st", d_mats, hh)
        + np.einsum("tsab,tsba->st", cross, cross)
    )
    second = (
        diag_d.T @ diag_d
        - diag_d.T @ diag_h
        - diag_h.T @ diag_d
        + np.einsum("stab,stab->st", cross, cross)
    )
    return float(np.sum(first + second))


def draw_weights(kind: str, n_clusters: int, draws: int, rng: np.random.Generator) -> np.ndarray:
    """Bootstrap weights, shape (draws, n_clusters), one row per bootstrap sample.

    ``"rademacher"``: +-1 with probability 1/2 each. ``"webb"``: the six-point
    distribution of Webb (2013, QED Working Paper 1315), ``+-sqrt(1/2)``,
    ``+-1``, ``+-sqrt(3/2)`` with probability 1/6 each (mean 0, variance 1).
    Each row holds the weights of the clusters in increasing code order.
    """
    points, picks = _draw_picks(kind, n_clusters, draws, rng)
    return points[picks]


_RADEMACHER_POINTS = np.array([-1.0, 1.0])


def _draw_picks(
    kind: str, n_clusters: int, draws: int, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    """The support of the weights and, per draw and cluster, the index of the point drawn."""
    if kind == "rademacher":
        return _RADEMACHER_POINTS, rng.integers(0, 2, size=(draws, n_clusters))
    if kind == "webb":
        return WEBB_POINTS, rng.integers(0, 6, size=(draws, n_clusters))
    raise DesignError(f"unknown bootstrap weights {kind!r}: use 'rademacher' or 'webb'")


def _all_signs(n_clusters: int) -> np.ndarray:
    """Every Rademacher sign vector as picks of ``(-1, 1)``, shape (2**G, G)."""
    return (np.arange(2**n_clusters)[:, None] >> np.arange(n_clusters)[None, :]) & 1


def _wald_per_draw(numer: np.ndarray, meat: np.ndarray) -> np.ndarray:
    """``numer' meat^-1 numer`` for each draw: numer (B, q), meat (B, q, q)."""
    q = numer.shape[1]
    if q == 1:
        num2 = numer[:, 0] ** 2
        den = meat[:, 0, 0]
        with np.errstate(divide="ignore", invalid="ignore"):
            out = np.where(den > 0.0, num2 / np.where(den > 0.0, den, 1.0), np.inf)
        return np.where((den <= 0.0) & (num2 == 0.0), 0.0, out)
    try:
        sol = np.linalg.solve(meat, numer[:, :, None])[:, :, 0]
    except np.linalg.LinAlgError:
        sol = np.einsum("bij,bj->bi", np.linalg.pinv(meat), numer)
    return np.einsum("bi,bi->b", numer, sol)


def wild_cluster_bootstrap(
    y: np.ndarray,
    X: np.ndarray,
    cluster: np.ndarray,
    L: np.ndarray,
    weights: str = "auto",
    draws: int = DEFAULT_DRAWS,
    seed: int = DEFAULT_SEED,
) -> BootstrapTest:
    """Restricted wild cluster bootstrap test of ``L beta = 0`` (WCR).

    Cameron, Gelbach & Miller (2008, Rev. Econ. Stat. 90:414-427): fit the
    model under the null (restricted least squares, ``L b_r = 0``), build
    ``y* = X b_r + w_g e_r`` with one weight ``w_g`` per cluster, refit the
    unrestricted model and recompute the Wald statistic with the CR1
    covariance ``G/(G-1) * (n-1)/(n-p) * M (sum_g X_g'u_g u_g'X_g) M`` (the
    usual choice, as in Cameron, Gelbach & Miller; the factor does not change
    the p-value). The reported statistic is that Wald statistic over ``q``
    (``t**2`` for one contrast); the p-value is the share of bootstrap
    statistics at least as large, i.e. ``|t*| >= |t|`` for one contrast (the
    symmetric test) and ``F* >= F`` for several.

    ``weights``: ``"rademacher"``, ``"webb"`` (Webb 2013, QED WP 1315) or
    ``"auto"``: Webb below 12 clusters, Rademacher otherwise (common
    practice: with few clusters Rademacher weights give only ``2**G``
    distinct samples). With Rademacher weights and ``2**G <= draws`` all
    ``2**G`` sign vectors are enumerated and ``p = #{F* >= F} / 2**G`` is exact
    for that bootstrap distribution (flipping every sign gives the same
    ``|t|``, so the smallest attainable p is ``2 / 2**G``). Otherwise ``draws``
    weight vectors come from ``numpy.random.default_rng(seed)``, in increasing
    cluster-code order within each draw (so row order does not matter), and
    ``p = (1 + #{F* >= F}) / (1 + draws)`` (the original sample counted as
    one draw; Phipson & Smyth 2010, Stat. Appl. Genet. Mol. Biol. 9:39).
    Statistics within a relative 1e-9 of the observed one count as ties
    (at least as large). A draw whose robust variance is singular is scored
    with a pseudo-inverse (one contrast: infinite unless its numerator is 0).

    Raises :class:`DesignError` as :func:`cr2_test` does, including for a
    contrast that between-cluster variation cannot estimate (its CR1 variance
    is then a numerical zero).

    All draws are computed with matrix products: with ``a_g = Q_g'e_r,g`` and
    ``K_g = Q_g'Q_g``, the bootstrap numerator is ``L R^-1 sum_g w_g a_g`` and
    cluster ``g``'s score is ``L R^-1 (w_g a_g - K_g sum_h w_h a_h)``.
    """
    if weights not in ("auto", "rademacher", "webb"):
        raise DesignError(
            f"unknown bootstrap weights {weights!r}: use 'auto', 'rademacher' or 'webb'"
        )
    if int(draws) < 1:
        raise DesignError(f"the number of bootstrap draws must be positive, got {draws}")
    draws = int(draws)
    fit = _prepare(y, X, cluster, L)
    n_cl, q = fit.n_clusters, fit.lr.shape[0]
    kappa = n_cl / (n_cl - 1.0) * (fit.n - 1.0) / (fit.n - fit.p)
    grams = fit.grams
    _check_estimable(fit, _omega(fit, grams))
    lrk = np.einsum("ap,gpr->gar", fit.lr, grams)  # (G, q, p): L R^-1 K_g

    # observed statistic, unrestricted residuals
    obs_scores = fit.qe @ fit.lr.T  # (G, q)
    obs_meat = kappa * (obs_scores.T @ obs_scores)
    try:
        np.linalg.cholesky(obs_meat)
    except np.linalg.LinAlgError:
        raise DesignError(
            "the cluster-robust covariance of the tested contrasts is singular (too few clusters)"
        ) from None
    observed = float(_wald_per_draw(fit.estimate[None, :], obs_meat[None])[0])
    if not np.isfinite(observed):
        raise DesignError(
            "the cluster-robust variance of the tested contrast is zero (too few clusters)"
        )

    # restricted residuals: e_r = e + Q Lr' (Lr Lr')^-1 L b, so Q_g'e_r,g = Q_g'e_g + K_g shift
    shift = fit.lr.T @ np.linalg.solve(fit.lr @ fit.lr.T, fit.estimate)
    a = fit.qe + grams @ shift  # (G, p)
    c = a @ fit.lr.T  # (G, q)

    kind = weights
    if kind == "auto":
        kind = "webb" if n_cl < WEBB_BELOW else "rademacher"
    enumerated = kind == "rademacher" and n_cl < 63 and 2**n_cl <= draws
    if enumerated:
        points, picks = _RADEMACHER_POINTS, _all_signs(n_cl)
        used_seed: int | None = None
    else:
        points, picks = _draw_picks(kind, n_cl, draws, np.random.default_rng(seed))
        used_seed = seed
    n_draws = picks.shape[0]

    threshold = observed * (1.0 - _TIE_TOL)
    hits = 0
    undefined = 0
    lrk_rows = lrk.reshape(n_cl * q, fit.p)  # row (g, s): (L R^-1 K_g)[s]
    # A draw whose numerator and robust variance both vanish has the statistic 0/0
    # (its weights cancel the clusters that carry the contrast); its computed value is
    # rounding noise, so it is left out of the count. "Vanish": below 1e-12 of the
    # size the terms of the sums could reach with the largest weight.
    w_max = float(np.max(np.abs(points)))
    numer_tol = 1e-12 * w_max * float(np.sum(np.linalg.norm(c, axis=1)))
    score_tol = (
        1e-12
        * w_max
        * (
            float(np.max(np.linalg.norm(c, axis=1)))
            + float(np.max(np.linalg.norm(lrk_rows, axis=1)))
            * float(np.sum(np.linalg.norm(a, axis=1)))
        )
    )
    meat_tol = kappa * n_cl * q * score_tol**2
    chunk = max(1, _CHUNK // max(1, n_cl * q))
    for lo in range(0, n_draws, chunk):
        w = np.take(points, picks[lo : lo + chunk])  # (b, G)
        aw = w @ a  # (b, p): sum_h w_h a_h
        numer = w @ c  # (b, q)
        scores = w[:, :, None] * c[None, :, :] - (aw @ lrk_rows.T).reshape(-1, n_cl, q)
        if q == 1:
            meat = kappa * np.einsum("bg,bg->b", scores[:, :, 0], scores[:, :, 0])[:, None, None]
        else:
            meat = kappa * np.einsum("bgq,bgr->bqr", scores, scores)
        void = (np.linalg.norm(numer, axis=1) <= numer_tol) & (
            np.trace(meat, axis1=1, axis2=2) <= meat_tol
        )
        undefined += int(np.sum(void))
        hits += int(np.sum((_wald_per_draw(numer, meat) >= threshold) & ~void))
    counted = n_draws - undefined
    if counted < 1:
        raise DesignError(
            "every bootstrap draw gives 0/0: the contrast rests on clusters whose weights cancel"
        )
    p_value = hits / counted if enumerated else (1 + hits) / (1 + counted)
    return BootstrapTest(
        statistic=observed / q,
        p_value=float(p_value),
        weights=kind,
        draws=n_draws,
        enumerated=enumerated,
        n_clusters=n_cl,
        seed=used_seed,
        undefined=undefined,
    )
