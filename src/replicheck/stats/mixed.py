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
lme4 calls theta) by L-BFGS-B (three starts unless the problem is large) with
the analytic gradient ``d d / d lam_k = tr(P_H V_k) - y'P_H V_k P_H y / s2_e``,
then continued by L-BFGS-B in ``lam`` itself (the theta gradient vanishes at
``theta_k = 0``, so a theta search can stall there although a small positive
variance is optimal). The optimum is then refined by Newton steps on the unprofiled REML deviance in
log-variance coordinates; components whose optimum lies on the boundary are
set to exactly 0 (Karush-Kuhn-Tucker condition ``d d / d lam_k >= 0`` at 0).
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
(see ``_second_order``). The Hessian is inverted in log-variance coordinates.
lmerTest differentiates numerically with respect to ``(theta, sigma)``; at an
interior optimum the Satterthwaite df are invariant to that change of
parameters. Components estimated at 0 are left out of the variance parameters
when computing ``A`` and the Jacobian: in lmerTest's ``(theta, sigma)``
parameters their Jacobian entries and Hessian cross terms vanish at
``theta = 0``, so the result is the same.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import linalg, optimize, stats

from replicheck.stats.classic import DesignError

__all__ = [
    "FTest",
    "MixedFit",
    "TTest",
    "fit_reml",
    "satterthwaite_t",
    "satterthwaite_test",
]

_LOG_2PI = float(np.log(2.0 * np.pi))
_TINY = 1e-6  # lam_k * mean level size below which a component is tried at exactly 0
_KKT_TOL = 1e-7  # tolerance on the scaled gradient for declaring a boundary optimum


@dataclass(frozen=True, eq=False)
class MixedFit:
    """A REML fit of a variance-component model.

    ``components`` maps each random factor's name (and ``"residual"``) to its
    estimated variance. ``cov_beta`` is ``s2_e (X'H^{-1}X)^{-1}``.
    ``reml_deviance`` is the REML criterion as reported by lme4's ``REMLcrit``.
    ``boundary`` names the components estimated at exactly 0.

    The Satterthwaite ingredients are stored as arrays: ``varpar_names`` /
    ``varpar`` are the variance parameters left after dropping boundary
    components (the residual variance last), ``vcov_varpar`` their asymptotic
    covariance (2 x inverse Hessian of the REML deviance) and ``jac_cov_beta``
    has shape ``(len(varpar), p, p)`` with ``d cov_beta / d varpar[i]``.

    ``theta`` holds lme4's relative standard deviations ``sqrt(s2_k / s2_e)``.
    ``converged`` is the first-order optimality check; ``hessian_ok`` is False
    when the Hessian was not positive definite (Satterthwaite df are then
    unreliable); ``messages`` explains any problem.
    """

    components: dict[str, float]
    beta: np.ndarray
    cov_beta: np.ndarray
    fixed_names: tuple[str, ...]
    reml_deviance: float
    n_obs: int
    n_fixed: int
    converged: bool
    boundary: tuple[str, ...]
    theta: dict[str, float]
    n_levels: dict[str, int]
    varpar_names: tuple[str, ...]
    varpar: np.ndarray
    vcov_varpar: np.ndarray
    jac_cov_beta: np.ndarray
    hessian_ok: bool
    messages: tuple[str, ...] = field(default=())

    @property
    def se_beta(self) -> np.ndarray:
        """Standard errors of the fixed effects."""
        return np.sqrt(np.diag(self.cov_beta))


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


@dataclass(frozen=True, eq=False)
class _Design:
    """Fixed quantities of the problem, computed once.

    ``Z'Z = U diag(e) U'`` with the ``r`` positive eigenvalues kept; ``Q = Z U e^{-1/2}``
    (never formed) has orthonormal columns spanning ``col(Z)``. ``xb = Q'X``,
    ``yb = Q'y``; ``xw``, ``yw`` are the projections of X and y on the orthogonal
    complement of ``col(Z)`` (computed in n-space). ``t_mats[k] = Q' Z_k Z_k' Q``
    (a vector, the unit sizes, when there is a single factor).
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

    def n_matrix(self, lam: np.ndarray) -> np.ndarray:
        """N = I + sum_k lam_k T_k (a vector in the single-factor case)."""
        if self.diagonal:
            return 1.0 + lam[0] * self.t_mats[0]
        out = np.eye(self.r)
        for k, t in enumerate(self.t_mats):
            out += lam[k] * t
        return out


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
        resid = np.diag(m_k) - zkx @ np.linalg.solve(xx.T @ xx, zkx.T)
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


def _check_residual_identifiable(design: _Design) -> None:
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


@dataclass(frozen=True, eq=False)
class _Eval:
    lam: np.ndarray
    solver: _NSolver
    c_h: np.ndarray  # (X'H^{-1}X)^{-1}
    logdet_x: float
    beta: np.ndarray
    r_w: np.ndarray  # within part of r = y - X beta (n-vector)
    u_b: np.ndarray  # N^{-1} Q'r
    w_b: np.ndarray  # N^{-1} Q'X
    rhr: float  # r'H^{-1}r
    deviance: float  # profiled REML criterion (lme4's REMLcrit)


def _evaluate(design: _Design, lam: np.ndarray) -> _Eval:
    """H^{-1} = (I - QQ') + Q N^{-1} Q' splits every quantity into a within part
    (fixed) and a between part (r-dimensional)."""
    lam = np.asarray(lam, dtype=float)
    solver = _NSolver(design, lam)
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


def _second_order(design: _Design, ev: _Eval, active: Sequence[int], sigma2: float) -> _Second:
    """Score, Hessian of -2 log L_R and d cov(beta) / d s2 at (lam, sigma2).

    With ``P_H = s2_e P``, ``T_k = Q'V_kQ``, ``P_bb = Q'P_H Q``,
    ``K = N^{-1} Q'X C``, ``S_w = X_w'X_w``, ``g_w = X_w'r_w``:

    * ``tr(P_H V_k P_H V_l) = tr(P_bb T_k P_bb T_l)``,
      ``y'P_H V_k P_H V_l P_H y = u'T_k P_bb T_l u``;
    * ``tr(P_H V_k P_H) = tr(T_k (P_bb^2 + K S_w K'))``,
      ``y'P_H V_k P_H^2 y = u'P_bb T_k u - g_w'K'T_k u``;
    * ``tr(P_H^2) = n_w - 2 tr(C S_w) + tr((C S_w)^2) + 2 tr(K S_w K') + tr(P_bb^2)``,
      ``y'P_H^3 y = r_w'r_w - g_w'C g_w - 2 g_w'C h + u'P_bb u`` with ``h = W'u``.

    No term is a difference of quantities much larger than the result, so the
    Hessian stays accurate when the residual variance is tiny compared with
    the unit variances (large lam).
    """
    p = design.p
    c = ev.c_h
    w = ev.w_b
    u = ev.u_b
    ninv = ev.solver.inverse()
    pbb = (np.diag(ninv) if design.diagonal else ninv) - w @ c @ w.T
    pbb = 0.5 * (pbb + pbb.T)
    kb = w @ c  # N^{-1} Q'X C
    sw = design.sw
    g_w = design.xw.T @ ev.r_w
    h = w.T @ u
    m = len(active) + 1
    g_mat = np.empty((m, m))
    q_mat = np.empty((m, m))
    pt = [design.t_times(k, pbb).T for k in active]  # P_bb T_k
    tu = [design.t_times(k, u) for k in active]  # T_k u
    for i, k in enumerate(active):
        for j in range(i, len(active)):
            g_mat[i, j] = g_mat[j, i] = float(np.sum(pt[i] * pt[j].T))
            q_mat[i, j] = q_mat[j, i] = float(tu[i] @ pbb @ tu[j])
        ktk = kb.T @ design.t_times(k, kb)
        g_mat[i, -1] = g_mat[-1, i] = float(np.sum(pt[i] * pbb) + np.sum(ktk * sw))
        q_mat[i, -1] = q_mat[-1, i] = float(u @ pbb @ tu[i] - g_w @ (kb.T @ tu[i]))
    csw = c @ sw
    ksk = float(np.sum((kb.T @ kb) * sw))
    tr_pbb = float(np.trace(pbb))
    g_mat[-1, -1] = (
        design.n_within
        - 2.0 * float(np.trace(csw))
        + float(np.sum(csw * csw.T))
        + 2.0 * ksk
        + float(np.sum(pbb * pbb))
    )
    q_mat[-1, -1] = (
        float(ev.r_w @ ev.r_w)
        - float(g_w @ c @ g_w)
        - 2.0 * float(g_w @ c @ h)
        + float(u @ pbb @ u)
    )
    s2 = sigma2
    hessian = -g_mat / s2**2 + 2.0 * q_mat / s2**3
    score = np.empty(m)
    for i, _k in enumerate(active):
        score[i] = float(np.trace(pt[i])) / s2 - float(u @ tu[i]) / s2**2
    tr_p = design.n_within - float(np.trace(csw)) + tr_pbb
    yp2y = float(ev.r_w @ ev.r_w + u @ u)
    score[-1] = tr_p / s2 - yp2y / s2**2
    jac = np.empty((m, p, p))
    for i, k in enumerate(active):
        jac[i] = kb.T @ design.t_times(k, kb)
    jac[-1] = c @ (sw + w.T @ w) @ c
    jac = 0.5 * (jac + np.transpose(jac, (0, 2, 1)))
    return _Second(score=score, hessian=hessian, jac=jac, cov_beta=s2 * c)


def _unprofiled_deviance(design: _Design, ev: _Eval, sigma2: float) -> float:
    nmp = design.n - design.p
    return float(
        nmp * np.log(sigma2) + ev.solver.logdet + ev.logdet_x + ev.rhr / sigma2 + nmp * _LOG_2PI
    )


def _lam_from_s2(design: _Design, active: Sequence[int], s: np.ndarray) -> np.ndarray:
    lam = np.zeros(len(design.sizes))
    for i, k in enumerate(active):
        lam[k] = s[i] / s[-1]
    return lam


def _newton_polish(
    design: _Design, lam: np.ndarray, active: Sequence[int], max_iter: int = 40
) -> np.ndarray:
    """Newton steps on the unprofiled REML deviance in log(s2_active), log(s2_e).

    Log coordinates keep the Hessian well scaled when the variances differ by
    orders of magnitude and keep every variance positive.
    """
    ev = _evaluate(design, lam)
    sigma2 = ev.rhr / (design.n - design.p)
    s = np.array([lam[k] * sigma2 for k in active] + [sigma2])
    dev = _unprofiled_deviance(design, ev, sigma2)
    for _ in range(max_iter):
        sec = _second_order(design, ev, active, s[-1])
        grad = sec.score * s
        hess = sec.hessian * np.outer(s, s) + np.diag(grad)
        try:
            chol = linalg.cho_factor(hess, lower=True)
        except linalg.LinAlgError:
            break
        step = np.asarray(linalg.cho_solve(chol, grad))
        t = 1.0
        accepted = False
        while t > 1e-6:
            s_new = s * np.exp(-t * np.clip(step, -20.0, 20.0))
            try:
                ev_new = _evaluate(design, _lam_from_s2(design, active, s_new))
            except (linalg.LinAlgError, DesignError):
                t *= 0.5
                continue
            dev_new = _unprofiled_deviance(design, ev_new, s_new[-1])
            if dev_new <= dev + 1e-10 * max(1.0, abs(dev)):
                accepted = True
                break
            t *= 0.5
        if not accepted:
            break
        rel = float(np.max(np.abs(t * step)))
        s, ev, dev = s_new, ev_new, dev_new
        if rel < 1e-13:
            break
    return _lam_from_s2(design, active, s)


def _minimise(design: _Design, fixed_zero: Sequence[int], starts: list[np.ndarray]) -> np.ndarray:
    """L-BFGS-B over theta = sqrt(lam) >= 0 with some components pinned at 0.

    Returns lam.
    """
    k_all = len(design.sizes)
    free = [k for k in range(k_all) if k not in set(fixed_zero)]
    if not free:
        return np.zeros(k_all)

    def expand(x: np.ndarray) -> np.ndarray:
        th = np.zeros(k_all)
        th[free] = x
        return th

    def fun(x: np.ndarray) -> tuple[float, np.ndarray]:
        th = expand(x)
        try:
            ev = _evaluate(design, th * th)
        except (linalg.LinAlgError, DesignError):
            return float("inf"), np.zeros_like(x)
        g_lam = _gradient_lam(design, ev)
        return ev.deviance, 2.0 * x * g_lam[free]

    best_x: np.ndarray | None = None
    best_f = float("inf")
    for start in starts:
        res = optimize.minimize(
            fun,
            np.sqrt(np.asarray(start, dtype=float))[free],
            jac=True,
            method="L-BFGS-B",
            bounds=[(0.0, None)] * len(free),
            options={"ftol": 1e-15, "gtol": 1e-10, "maxiter": 2000},
        )
        if float(res.fun) < best_f:
            best_f = float(res.fun)
            best_x = np.asarray(res.x, dtype=float)
    if best_x is None:
        raise DesignError("REML optimisation failed: the criterion could not be evaluated")
    th = expand(best_x)
    return th * th


def _minimise_lam(design: _Design, fixed_zero: Sequence[int], start: np.ndarray) -> np.ndarray:
    """L-BFGS-B over lam >= 0 (scaled by the mean level size), some pinned at 0.

    Unlike the theta parametrisation, whose gradient vanishes at theta = 0,
    the gradient in lam is informative at the boundary: a component stays at
    0 only if the criterion increases into the interior.
    """
    k_all = len(design.sizes)
    free = [k for k in range(k_all) if k not in set(fixed_zero)]
    if not free:
        return np.zeros(k_all)
    scale = np.array([design.mean_sizes[k] for k in free])

    def expand(x: np.ndarray) -> np.ndarray:
        lam = np.zeros(k_all)
        lam[free] = x / scale
        return lam

    def fun(x: np.ndarray) -> tuple[float, np.ndarray]:
        try:
            ev = _evaluate(design, expand(x))
        except (linalg.LinAlgError, DesignError):
            return float("inf"), np.zeros_like(x)
        return ev.deviance, _gradient_lam(design, ev)[free] / scale

    res = optimize.minimize(
        fun,
        np.asarray(start, dtype=float)[free] * scale,
        jac=True,
        method="L-BFGS-B",
        bounds=[(0.0, None)] * len(free),
        options={"ftol": 1e-15, "gtol": 1e-12, "maxiter": 2000},
    )
    return expand(np.asarray(res.x, dtype=float))


def _kkt(design: _Design, lam: np.ndarray, active: Sequence[int]) -> bool:
    """First-order optimality: zero gradient for active, non-negative for pinned."""
    g = _gradient_lam(design, _evaluate(design, lam))
    ok = True
    for k in range(len(design.sizes)):
        if k in active:
            # dimensionless: change in deviance for a relative change in lam_k
            ok = ok and abs(g[k] * lam[k]) < 1e-5
        else:
            ok = ok and g[k] >= -_KKT_TOL * design.mean_sizes[k]
    return ok


def fit_reml(
    y: np.ndarray,
    X: np.ndarray,
    factors: Mapping[str, np.ndarray],
    fixed_names: Sequence[str],
) -> MixedFit:
    """Fit ``y = X beta + sum_k Z_k u_k + e`` by REML (random intercepts only).

    ``factors`` maps a name to an integer code array per random factor; nested
    and crossed factors are both allowed (for nesting, codes must identify the
    inner unit uniquely, e.g. cask-within-batch as its own factor). ``X`` must
    have full column rank. See the module docstring for the method (Patterson &
    Thompson 1971, Biometrika 58:545-554; Bates et al. 2015, J. Stat. Software
    67(1)). Raises :class:`DesignError` for unusable input.
    """
    design = _build_design(y, X, factors, fixed_names)
    _check_residual_identifiable(design)
    k_all = len(design.sizes)
    # several starts for small problems; one (lme4's theta = 1) when every
    # evaluation costs a large dense factorisation
    values = (1.0, 0.0625, 16.0) if design.r <= 300 or design.diagonal else (1.0,)
    starts = [np.full(k_all, v) for v in values]
    lam0 = _minimise(design, [], starts)
    # the theta search can stall at theta_k = 0 (zero gradient there): continue
    # in lam, where the gradient at the boundary is informative
    lam1 = _minimise_lam(design, [], lam0)
    dev0 = _evaluate(design, lam0).deviance
    if _evaluate(design, lam1).deviance <= dev0:
        lam0, dev0 = lam1, _evaluate(design, lam1).deviance

    # Active-set refinement: pin negligible components at exactly 0, polish the
    # others by Newton's method, release a pinned component whose gradient at 0
    # is negative (it then stays free), repeat.
    def negligible(lam: np.ndarray, k: int) -> bool:
        return bool(lam[k] * design.mean_sizes[k] < _TINY)

    never_pin: set[int] = set()
    lam = lam0.copy()
    messages: list[str] = []
    pinned: set[int] = set()
    for _ in range(k_all + 2):
        pinned = {k for k in range(k_all) if negligible(lam, k) and k not in never_pin}
        if pinned:
            lam = _minimise_lam(design, sorted(pinned), lam)
        active = [k for k in range(k_all) if k not in pinned]
        if any(lam[k] <= 0.0 for k in active):
            # a released component: move it off 0 along its (negative) gradient
            lam = _minimise_lam(design, sorted(pinned), lam)
        if all(lam[k] > 0.0 for k in active):
            lam = _newton_polish(design, lam, active)
        g = _gradient_lam(design, _evaluate(design, lam))
        release = {k for k in pinned if g[k] < -_KKT_TOL * design.mean_sizes[k]}
        if not release:
            break
        never_pin |= release
    pinned = {k for k in range(k_all) if lam[k] == 0.0}
    active = [k for k in range(k_all) if k not in pinned]
    ev = _evaluate(design, lam)
    if ev.deviance > dev0 + 1e-8 * max(1.0, abs(dev0)):
        # should not happen; keep the better optimum and report it
        messages.append("active-set refinement did not improve the L-BFGS-B optimum")
        lam = lam0
        pinned = {k for k in range(k_all) if lam[k] == 0.0}
        active = [k for k in range(k_all) if k not in pinned]
        ev = _evaluate(design, lam)
    converged = _kkt(design, lam, active)
    if not converged:
        messages.append("REML optimisation did not meet the first-order optimality check")

    sigma2 = ev.rhr / (design.n - design.p)
    sec = _second_order(design, ev, active, sigma2)
    # invert in log-variance coordinates, where the Hessian is well scaled
    # (s_i s_j H_ij; the gradient term vanishes at the optimum)
    s_act = np.array([lam[k] * sigma2 for k in active] + [sigma2])
    h_log = sec.hessian * np.outer(s_act, s_act)
    evals, evecs = np.linalg.eigh(0.5 * (h_log + h_log.T))
    pos = evals > 1e-10 * max(float(np.max(np.abs(evals))), 1e-300)
    hessian_ok = bool(np.all(pos))
    if not hessian_ok:
        messages.append("Hessian of the REML deviance is not positive definite")
    h_log_inv = (evecs[:, pos] / evals[pos]) @ evecs[:, pos].T
    vcov_varpar = 2.0 * h_log_inv * np.outer(s_act, s_act)

    components = {name: float(lam[k] * sigma2) for k, name in enumerate(design.names)}
    for k in pinned:
        components[design.names[k]] = 0.0
    components["residual"] = float(sigma2)
    varpar_names = (*(design.names[k] for k in active), "residual")
    varpar = np.array([components[nm] for nm in varpar_names])
    return MixedFit(
        components=components,
        beta=ev.beta.copy(),
        cov_beta=sec.cov_beta,
        fixed_names=tuple(str(s) for s in fixed_names),
        reml_deviance=ev.deviance,
        n_obs=design.n,
        n_fixed=design.p,
        converged=bool(converged),
        boundary=tuple(design.names[k] for k in sorted(pinned)),
        theta={name: float(np.sqrt(lam[k])) for k, name in enumerate(design.names)},
        n_levels=dict(zip(design.names, design.sizes, strict=True)),
        varpar_names=varpar_names,
        varpar=varpar,
        vcov_varpar=vcov_varpar,
        jac_cov_beta=sec.jac,
        hessian_ok=hessian_ok,
        messages=tuple(messages),
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
        p_value=float(2.0 * stats.t.sf(abs(t), df)),
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
            p_value=float(stats.f.sf(f, 1.0, tt.df)),
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
        return FTest(f, 1.0, tt.df, float(stats.f.sf(f, 1.0, tt.df)), "Satterthwaite")
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
        p_value=float(stats.f.sf(f, q, ddf)),
        method="Satterthwaite (Fai-Cornelius)",
    )
