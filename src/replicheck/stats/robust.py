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

Notation: ``X = QR`` (thin QR), ``M = (X'X)^-1 = R^-1 R^-T``; ``Q_g`` are the
rows of ``Q`` in cluster ``g`` and ``K_g = Q_g'Q_g`` (the cluster's share of
the identity, ``sum_g K_g = I``). The leverage block ``H_gg = X_g M X_g'`` is
``Q_g Q_g'``, whose non-zero eigenvalues are those of ``K_g``; so the CR2
adjustment ``A_g = (I - H_gg)^(-1/2)`` acts on ``Q_g`` as
``A_g Q_g = Q_g phi(K_g)`` with ``phi(l) = (1 - l)^(-1/2)``, and everything
below costs O(n p^2) whatever the cluster sizes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from replicheck.stats.classic import DesignError

__all__ = [
    "WEBB_POINTS",
    "BootstrapTest",
    "RobustTest",
    "cr2_test",
    "draw_weights",
    "wild_cluster_bootstrap",
]

DEFAULT_SEED = 20261201
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
_TIE_TOL = 1e-9  # relative tolerance when comparing bootstrap statistics to the observed one
_CHUNK = 4_000_000  # bootstrap values (clusters x contrasts x draws) held at once


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


@dataclass(frozen=True)
class _Fit:
    """OLS fit by thin QR, rows sorted by cluster."""

    y: np.ndarray  # (n,) sorted by cluster
    q_mat: np.ndarray  # (n, p) Q of X = QR, sorted rows
    r_mat: np.ndarray  # (p, p) upper triangular R
    starts: np.ndarray  # (G,) first sorted row of each cluster
    beta: np.ndarray  # (p,)
    resid: np.ndarray  # (n,) sorted
    lr: np.ndarray  # (q, p) L R^-1
    estimate: np.ndarray  # (q,) L beta
    n: int
    p: int
    n_clusters: int


def _prepare(y: np.ndarray, x: np.ndarray, cluster: np.ndarray, contrast: np.ndarray) -> _Fit:
    """Validate the inputs, fit OLS and sort the rows by cluster code."""
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
    _, codes = np.unique(cl, return_inverse=True)
    codes = codes.reshape(-1)
    n_clusters = int(codes.max()) + 1 if n else 0
    if n_clusters < 2:
        raise DesignError(f"cluster-robust tests need at least 2 clusters, found {n_clusters}")
    if n <= p:
        raise DesignError(f"{n} observations cannot fit {p} coefficients with residual df")
    order = np.argsort(codes, kind="stable")
    ys, xs = yy[order], xx[order]
    starts = np.searchsorted(codes[order], np.arange(n_clusters))
    q_mat, r_mat = np.linalg.qr(xs)
    if np.linalg.matrix_rank(r_mat) < p:
        raise DesignError("design matrix is not of full column rank")
    qty = q_mat.T @ ys
    beta = np.linalg.solve(r_mat, qty)
    resid = ys - q_mat @ qty
    # L R^-1 = (R^-T L')'
    lr = np.linalg.solve(r_mat.T, ll.T).T
    return _Fit(ys, q_mat, r_mat, starts, beta, resid, lr, ll @ beta, n, p, n_clusters)


def _cluster_sums(values: np.ndarray, starts: np.ndarray) -> np.ndarray:
    """Sums of the sorted rows of ``values`` over each cluster (first axis)."""
    return np.add.reduceat(values, starts, axis=0)


def _cluster_grams(fit: _Fit) -> np.ndarray:
    """``K_g = Q_g'Q_g`` for every cluster, shape (G, p, p)."""
    outer = fit.q_mat[:, :, None] * fit.q_mat[:, None, :]
    return _cluster_sums(outer, fit.starts)


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
    grams = _cluster_grams(fit)
    lam, vecs = np.linalg.eigh(grams)  # (G, p), (G, p, p)
    one_minus = 1.0 - lam
    phi = _inv_sqrt(one_minus)

    def through(weights: np.ndarray) -> np.ndarray:
        """``V_g diag(weights_g) V_g'`` for every cluster."""
        return _through(vecs, weights)

    # v_g = phi(K_g) Q_g' e_g;  L V L' = sum_g (L R^-1 v_g)(L R^-1 v_g)'
    qe = _cluster_sums(fit.q_mat * fit.resid[:, None], fit.starts)  # (G, p)
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
    eta = q * (q + 1) / _htz_total_variance(d_mats, h_mats)
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
            p_value=float(2.0 * stats.t.sf(abs(t), df)),
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
        p_value=float(stats.f.sf(f_stat, q, df_den)),
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
    if kind == "rademacher":
        return rng.integers(0, 2, size=(draws, n_clusters)).astype(float) * 2.0 - 1.0
    if kind == "webb":
        return WEBB_POINTS[rng.integers(0, 6, size=(draws, n_clusters))]
    raise DesignError(f"unknown bootstrap weights {kind!r}: use 'rademacher' or 'webb'")


def _all_signs(n_clusters: int) -> np.ndarray:
    """Every Rademacher sign vector, shape (2**G, G)."""
    bits = (np.arange(2**n_clusters)[:, None] >> np.arange(n_clusters)[None, :]) & 1
    return bits.astype(float) * 2.0 - 1.0


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
    grams = _cluster_grams(fit)
    _check_estimable(fit, _omega(fit, grams))
    lrk = np.einsum("ap,gpr->gar", fit.lr, grams)  # (G, q, p): L R^-1 K_g

    # observed statistic, unrestricted residuals
    qe = _cluster_sums(fit.q_mat * fit.resid[:, None], fit.starts)  # (G, p)
    obs_scores = qe @ fit.lr.T  # (G, q)
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

    # restricted residuals: e_r = e + Q Lr' (Lr Lr')^-1 L b
    shift = fit.lr.T @ np.linalg.solve(fit.lr @ fit.lr.T, fit.estimate)
    resid_r = fit.resid + fit.q_mat @ shift
    a = _cluster_sums(fit.q_mat * resid_r[:, None], fit.starts)  # (G, p)
    c = a @ fit.lr.T  # (G, q)

    kind = weights
    if kind == "auto":
        kind = "webb" if n_cl < WEBB_BELOW else "rademacher"
    enumerated = kind == "rademacher" and n_cl < 63 and 2**n_cl <= draws
    if enumerated:
        wmat = _all_signs(n_cl)
        used_seed: int | None = None
    else:
        wmat = draw_weights(kind, n_cl, draws, np.random.default_rng(seed))
        used_seed = seed
    n_draws = wmat.shape[0]

    threshold = observed * (1.0 - _TIE_TOL)
    hits = 0
    chunk = max(1, _CHUNK // max(1, n_cl * q))
    for lo in range(0, n_draws, chunk):
        w = wmat[lo : lo + chunk]  # (b, G)
        aw = w @ a  # (b, p): sum_h w_h a_h
        numer = w @ c  # (b, q)
        scores = c[None, :, :] * w[:, :, None] - np.einsum("gqp,bp->bgq", lrk, aw)
        meat = kappa * np.einsum("bgq,bgr->bqr", scores, scores)
        hits += int(np.sum(_wald_per_draw(numer, meat) >= threshold))
    p_value = hits / n_draws if enumerated else (1 + hits) / (1 + n_draws)
    return BootstrapTest(
        statistic=observed / q,
        p_value=float(p_value),
        weights=kind,
        draws=n_draws,
        enumerated=enumerated,
        n_clusters=n_cl,
        seed=used_seed,
    )
