"""Variance-component linear mixed models fitted by REML, with Satterthwaite tests.

Model (random intercepts only, nested or crossed factors)::

    y = X beta + sum_k Z_k u_k + e,   u_k ~ N(0, s2_k I),   e ~ N(0, s2_e I)

where ``Z_k`` is the indicator matrix of factor ``k``. Write ``lam_k = s2_k / s2_e``,
``Lam`` the diagonal matrix holding ``lam_k`` for every column of ``Z = [Z_1..Z_K]``,
``H = I + Z Lam Z'`` so that ``V = s2_e H``. With ``D = Lam^{1/2}`` and
``M = I_q + D Z'Z D`` the Woodbury identity gives::

    H^{-1} = I - Z D M^{-1} D Z',      log|H| = log|M|,

so every quantity below is computed from the cross-products ``Z'Z, Z'X, Z'y, X'X,
X'y`` (sizes q x q, q x p, ...) and never from an n x n matrix. Profiling out
``s2_e`` gives the REML criterion that lme4 reports (Bates, Maechler, Bolker &
Walker 2015, J. Stat. Software 67(1), eq. 41)::

    d(theta) = log|M| + log|X'H^{-1}X| + (n-p) [1 + log(2 pi r'H^{-1}r / (n-p))],

minimised over ``theta_k = sqrt(lam_k) >= 0`` (the relative standard deviations
lme4 calls theta) by L-BFGS-B from several starts with the analytic gradient
``d d / d lam_k = tr(Z_k' P_H Z_k) - ||Z_k' P_H y||^2 / s2_e``. The optimum is
then refined by Newton steps on the unprofiled REML deviance in the variance
parameters; components whose optimum lies on the boundary are set to exactly 0
(detected by the Karush-Kuhn-Tucker condition ``d d / d lam_k >= 0`` at 0).

Satterthwaite degrees of freedom follow lmerTest (Kuznetsova, Brockhoff &
Christensen 2017, J. Stat. Software 82(13); Satterthwaite 1946, Biometrics
Bulletin 2:110-114; Fai & Cornelius 1996, J. Stat. Comput. Simul. 54:363-378).
The covariance of the variance parameters is ``A = 2 * inverse Hessian`` of the
REML deviance ``-2 log L_R`` (observed information), and the Jacobian of
``cov(beta)`` with respect to the variance parameters is analytic::

    d C / d s2_k = C X'V^{-1} Z_k Z_k' V^{-1} X C,   d C / d s2_e = C X'V^{-2} X C,
    d^2 (-2 log L_R) / d s2_i d s2_j = -tr(P V_i P V_j) + 2 y'P V_i P V_j P y,

with ``V_k = Z_k Z_k'``, ``V_e = I`` and ``P = V^{-1} - V^{-1}X C X'V^{-1}``. The
traces are reduced to q x q matrices with ``P_H H P_H = P_H`` (``P_H = s2_e P``).
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
_BOUNDARY_THETA = 1e-2  # relative sd below which a component is tried at exactly 0
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
# design and cross-products


@dataclass(frozen=True, eq=False)
class _Design:
    n: int
    p: int
    names: tuple[str, ...]
    sizes: tuple[int, ...]
    col_factor: np.ndarray  # (q,) factor index of every column of Z
    diagonal: bool  # Z'Z is diagonal (a single factor)
    ztz: np.ndarray  # (q, q), or (q,) when diagonal
    ztx: np.ndarray  # (q, p)
    zty: np.ndarray  # (q,)
    xtx: np.ndarray
    xty: np.ndarray
    yty: float
    x: np.ndarray
    y: np.ndarray
    z_codes: tuple[np.ndarray, ...]  # per factor, compressed codes

    @property
    def q(self) -> int:
        return int(self.col_factor.shape[0])

    def blocks(self) -> list[slice]:
        out: list[slice] = []
        start = 0
        for s in self.sizes:
            out.append(slice(start, start + s))
            start += s
        return out

    def zt(self, v: np.ndarray) -> np.ndarray:
        """Z'v for a vector or matrix v with n rows."""
        parts = []
        for codes, size in zip(self.z_codes, self.sizes, strict=True):
            if v.ndim == 1:
                parts.append(np.bincount(codes, weights=v, minlength=size))
            else:
                parts.append(
                    np.column_stack(
                        [np.bincount(codes, weights=v[:, j], minlength=size)
                         for j in range(v.shape[1])]
                    ).reshape(size, v.shape[1])
                )
        return np.concatenate(parts, axis=0)


def _build_design(
    y: np.ndarray,
    x: np.ndarray,
    factors: Mapping[str, np.ndarray],
    fixed_names: Sequence[str],
) -> _Design:
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
            raise DesignError(f"random factor {name!r} has a single level; its variance is "
                              "not estimable")
        if k == n:
            raise DesignError(f"random factor {name!r} has one observation per level; its "
                              "variance cannot be separated from the residual")
        names.append(name)
        codes_list.append(codes)
        sizes.append(k)
    q = sum(sizes)
    col_factor = np.repeat(np.arange(len(sizes)), sizes)
    offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    diagonal = len(sizes) == 1
    if diagonal:
        ztz: np.ndarray = np.bincount(codes_list[0], minlength=sizes[0]).astype(float)
    else:
        ztz = np.zeros((q, q))
        for a, (ca, sa, oa) in enumerate(zip(codes_list, sizes, offsets, strict=True)):
            for b, (cb, sb, ob) in enumerate(zip(codes_list, sizes, offsets, strict=True)):
                if b < a:
                    continue
                block = np.bincount(ca * sb + cb, minlength=sa * sb).reshape(sa, sb)
                ztz[oa : oa + sa, ob : ob + sb] = block
                ztz[ob : ob + sb, oa : oa + sa] = block.T
    design = _Design(
        n=n,
        p=p,
        names=tuple(names),
        sizes=tuple(sizes),
        col_factor=col_factor,
        diagonal=diagonal,
        ztz=ztz,
        ztx=np.empty((0, 0)),
        zty=np.empty(0),
        xtx=xx.T @ xx,
        xty=xx.T @ yy,
        yty=float(yy @ yy),
        x=xx,
        y=yy,
        z_codes=tuple(codes_list),
    )
    object.__setattr__(design, "ztx", design.zt(xx))
    object.__setattr__(design, "zty", design.zt(yy))
    return design


# ---------------------------------------------------------------------------
# evaluation at a given theta


@dataclass(frozen=True, eq=False)
class _Eval:
    theta: np.ndarray
    lam_col: np.ndarray
    d_col: np.ndarray
    logdet_m: float
    logdet_x: float
    beta: np.ndarray
    rhr: float  # r'H^{-1}r
    deviance: float  # profiled REML criterion
    chol_x: tuple[np.ndarray, bool]


class _MSolver:
    """Applies M^{-1} for M = I + D Z'Z D (diagonal or dense Cholesky)."""

    def __init__(self, design: _Design, d_col: np.ndarray) -> None:
        self.diagonal = design.diagonal
        if design.diagonal:
            self.m = 1.0 + d_col * d_col * design.ztz
            self.logdet = float(np.sum(np.log(self.m)))
            self.chol: tuple[np.ndarray, bool] | None = None
        else:
            mat = d_col[:, None] * design.ztz * d_col[None, :]
            mat[np.diag_indices_from(mat)] += 1.0
            self.chol = linalg.cho_factor(mat, lower=True, check_finite=False)
            self.logdet = float(2.0 * np.sum(np.log(np.diag(self.chol[0]))))
            self.m = np.empty(0)

    def diag_inverse(self) -> np.ndarray:
        """Diagonal of M^{-1} (from the inverse Cholesky factor, q^3/3 flops)."""
        if self.diagonal:
            return 1.0 / self.m
        assert self.chol is not None
        lower = np.tril(self.chol[0])
        linv = linalg.solve_triangular(lower, np.eye(lower.shape[0]), lower=True,
                                       check_finite=False)
        return np.asarray(np.sum(linv * linv, axis=0))

    def __call__(self, v: np.ndarray) -> np.ndarray:
        if self.diagonal:
            return v / (self.m if v.ndim == 1 else self.m[:, None])
        assert self.chol is not None
        return np.asarray(linalg.cho_solve(self.chol, v, check_finite=False))


def _ztz_times(design: _Design, v: np.ndarray) -> np.ndarray:
    if design.diagonal:
        return design.ztz * v if v.ndim == 1 else design.ztz[:, None] * v
    return np.asarray(design.ztz @ v)


def _evaluate(design: _Design, theta: np.ndarray) -> tuple[_Eval, _MSolver]:
    d_col = np.asarray(theta, dtype=float)[design.col_factor]
    solver = _MSolver(design, d_col)
    dztx = d_col[:, None] * design.ztx
    wx = solver(dztx)
    xhx = design.xtx - dztx.T @ wx
    chol_x = linalg.cho_factor(xhx, lower=True, check_finite=False)
    logdet_x = float(2.0 * np.sum(np.log(np.diag(chol_x[0]))))
    dzty = d_col * design.zty
    wy = solver(dzty)
    xhy = design.xty - dztx.T @ wy
    beta = np.asarray(linalg.cho_solve(chol_x, xhy, check_finite=False))
    # r'H^{-1}r from the residual itself (avoids cancellation in y'H^{-1}y - b'X'H^{-1}y)
    r = design.y - design.x @ beta
    dztr = d_col * (design.zty - design.ztx @ beta)
    rhr = float(r @ r - dztr @ solver(dztr))
    nmp = design.n - design.p
    if not rhr > 0.0:
        raise DesignError("the model fits the response exactly; residual variance is zero")
    dev = solver.logdet + logdet_x + nmp * (1.0 + _LOG_2PI + np.log(rhr / nmp))
    ev = _Eval(
        theta=np.asarray(theta, dtype=float).copy(),
        lam_col=d_col * d_col,
        d_col=d_col,
        logdet_m=solver.logdet,
        logdet_x=logdet_x,
        beta=beta,
        rhr=rhr,
        deviance=float(dev),
        chol_x=chol_x,
    )
    return ev, solver


def _gradient_lam(
    design: _Design, ev: _Eval, solver: _MSolver, *, all_columns: bool = True
) -> np.ndarray:
    """Gradient of the profiled REML criterion with respect to lam_k.

    ``d d / d lam_k = tr(Z_k' P_H Z_k) - ||Z_k' P_H y||^2 / s2_e``. With
    ``all_columns=False`` (used inside the optimiser, where the gradient with
    respect to theta_k = 2 theta_k d d / d lam_k is needed) the diagonal of
    ``Z'H^{-1}Z`` is taken from ``D^{-1}(I - M^{-1})D^{-1}``, which is exact for
    ``theta_k > 0``; entries of components at ``theta_k = 0`` are then left at 0.
    """
    d = ev.d_col
    sigma2 = ev.rhr / (design.n - design.p)
    dztx = d[:, None] * design.ztx
    f = design.ztx - _ztz_times(design, d[:, None] * solver(dztx))  # Z'H^{-1}X
    zhy = design.zty - _ztz_times(design, d * solver(d * design.zty))  # Z'H^{-1}y
    a = zhy - f @ ev.beta  # Z'P_H y
    c_h = linalg.cho_solve(ev.chol_x, np.eye(design.p), check_finite=False)
    if design.diagonal:
        diag_b = design.ztz / solver.m
    elif all_columns:
        t = solver(d[:, None] * design.ztz)
        diag_b = np.diag(design.ztz) - np.einsum("ij,ji->i", design.ztz * d[None, :], t)
    else:
        pos = d > 0
        diag_b = np.zeros(design.q)
        diag_b[pos] = (1.0 - solver.diag_inverse()[pos]) / (d[pos] * d[pos])
    diag_a = diag_b - np.einsum("ij,jk,ik->i", f, c_h, f)
    grad = np.empty(len(design.sizes))
    for k, sl in enumerate(design.blocks()):
        grad[k] = float(np.sum(diag_a[sl]) - np.sum(a[sl] ** 2) / sigma2)
    return grad


# ---------------------------------------------------------------------------
# second-order quantities (Hessian of the REML deviance, Jacobian of cov(beta))


@dataclass(frozen=True, eq=False)
class _Second:
    score: np.ndarray  # gradient of -2 log L_R w.r.t. active s2 (residual last)
    hessian: np.ndarray
    jac: np.ndarray  # (m, p, p)
    cov_beta: np.ndarray
    sigma2: float


def _second_order(
    design: _Design, ev: _Eval, solver: _MSolver, active: Sequence[int], sigma2: float
) -> _Second:
    """Score, Hessian of -2 log L_R and d cov(beta) / d s2 at (theta, sigma2).

    ``active`` lists the random factors kept as parameters; the residual
    variance is always the last parameter.
    """
    d = ev.d_col
    lam = ev.lam_col
    p = design.p
    n = design.n
    c_h = np.asarray(linalg.cho_solve(ev.chol_x, np.eye(p), check_finite=False))
    lower = np.tril(ev.chol_x[0])
    xhx = lower @ lower.T  # X'H^{-1}X
    dztx = d[:, None] * design.ztx
    f = design.ztx - _ztz_times(design, d[:, None] * solver(dztx))  # Z'H^{-1}X
    zhy = design.zty - _ztz_times(design, d * solver(d * design.zty))
    a = zhy - f @ ev.beta  # Z'P_H y
    if design.diagonal:
        b_mat = np.diag(design.ztz / solver.m)
    else:
        t = solver(d[:, None] * design.ztz)
        b_mat = design.ztz - (design.ztz * d[None, :]) @ t
        b_mat = 0.5 * (b_mat + b_mat.T)
    a_mat = b_mat - f @ c_h @ f.T  # Z'P_H Z
    a2_mat = a_mat - a_mat @ (lam[:, None] * a_mat)  # Z'P_H^2 Z
    b_vec = a - a_mat @ (lam * a)  # Z'P_H^2 y
    blocks = design.blocks()
    sl = [blocks[k] for k in active]
    m = len(active) + 1
    g_mat = np.empty((m, m))
    q_mat = np.empty((m, m))
    for i, si in enumerate(sl):
        for j, sj in enumerate(sl):
            if j < i:
                continue
            blk = a_mat[si, sj]
            g_mat[i, j] = g_mat[j, i] = float(np.sum(blk * blk))
            q_mat[i, j] = q_mat[j, i] = float(a[si] @ blk @ a[sj])
        g_mat[i, -1] = g_mat[-1, i] = float(np.trace(a2_mat[si, si]))
        q_mat[i, -1] = q_mat[-1, i] = float(a[si] @ b_vec[si])
    tr_p = n - p - float(np.sum(lam * np.diag(a_mat)))
    tr_p2 = tr_p - float(np.sum(lam * np.diag(a2_mat)))
    ypy = ev.rhr
    yp2y = ypy - float(a @ (lam * a))
    yp3y = yp2y - float((lam * a) @ b_vec)
    g_mat[-1, -1] = tr_p2
    q_mat[-1, -1] = yp3y
    s2 = sigma2
    hessian = -g_mat / s2**2 + 2.0 * q_mat / s2**3
    score = np.empty(m)
    for i, si in enumerate(sl):
        score[i] = float(np.trace(a_mat[si, si])) / s2 - float(a[si] @ a[si]) / s2**2
    score[-1] = tr_p / s2 - yp2y / s2**2
    jac = np.empty((m, p, p))
    for i, si in enumerate(sl):
        fk = f[si]
        jac[i] = c_h @ (fk.T @ fk) @ c_h
    jac[-1] = c_h @ (xhx - f.T @ (lam[:, None] * f)) @ c_h
    jac = 0.5 * (jac + np.transpose(jac, (0, 2, 1)))
    return _Second(score=score, hessian=hessian, jac=jac, cov_beta=s2 * c_h, sigma2=s2)


def _unprofiled_deviance(design: _Design, ev: _Eval, sigma2: float) -> float:
    nmp = design.n - design.p
    return float(
        nmp * np.log(sigma2) + ev.logdet_m + ev.logdet_x + ev.rhr / sigma2 + nmp * _LOG_2PI
    )


def _theta_from_s2(design: _Design, active: Sequence[int], s: np.ndarray) -> np.ndarray:
    theta = np.zeros(len(design.sizes))
    for i, k in enumerate(active):
        theta[k] = np.sqrt(s[i] / s[-1])
    return theta


def _newton_polish(
    design: _Design, theta: np.ndarray, active: Sequence[int], max_iter: int = 40
) -> np.ndarray:
    """Newton steps on the unprofiled REML deviance in (s2_active, s2_e)."""
    ev, solver = _evaluate(design, theta)
    sigma2 = ev.rhr / (design.n - design.p)
    s = np.array([theta[k] ** 2 * sigma2 for k in active] + [sigma2])
    dev = _unprofiled_deviance(design, ev, sigma2)
    for _ in range(max_iter):
        sec = _second_order(design, ev, solver, active, s[-1])
        try:
            chol = linalg.cho_factor(sec.hessian, lower=True)
        except linalg.LinAlgError:
            break
        step = np.asarray(linalg.cho_solve(chol, sec.score))
        t = 1.0
        accepted = False
        while t > 1e-6:
            s_new = s - t * step
            if np.all(s_new > 0):
                th_new = _theta_from_s2(design, active, s_new)
                try:
                    ev_new, solver_new = _evaluate(design, th_new)
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
        rel = float(np.max(np.abs(s_new - s) / s))
        s, ev, solver, dev = s_new, ev_new, solver_new, dev_new
        if rel < 1e-13:
            break
    return _theta_from_s2(design, active, s)


def _minimise(design: _Design, fixed_zero: Sequence[int], starts: list[np.ndarray]) -> np.ndarray:
    """L-BFGS-B over theta >= 0 with some components pinned at 0."""
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
            ev, solver = _evaluate(design, th)
        except linalg.LinAlgError:
            return float("inf"), np.zeros_like(x)
        g_lam = _gradient_lam(design, ev, solver, all_columns=False)
        return ev.deviance, 2.0 * x * g_lam[free]

    best_x: np.ndarray | None = None
    best_f = float("inf")
    for start in starts:
        res = optimize.minimize(
            fun,
            np.asarray(start, dtype=float)[free],
            jac=True,
            method="L-BFGS-B",
            bounds=[(0.0, None)] * len(free),
            options={"ftol": 1e-15, "gtol": 1e-10, "maxiter": 2000},
        )
        if float(res.fun) < best_f:
            best_f = float(res.fun)
            best_x = np.asarray(res.x, dtype=float)
    assert best_x is not None
    return expand(best_x)


def _kkt(design: _Design, theta: np.ndarray, active: Sequence[int]) -> tuple[bool, np.ndarray]:
    """Check first-order optimality; returns (ok, gradient w.r.t. lam)."""
    ev, solver = _evaluate(design, theta)
    g = _gradient_lam(design, ev, solver)
    ok = True
    for k in range(len(design.sizes)):
        if k in active:
            # dimensionless: change in deviance for a relative change in lam_k
            ok = ok and abs(g[k] * theta[k] ** 2) < 1e-5
        else:
            ok = ok and g[k] >= -_KKT_TOL * max(1.0, float(np.max(design.ztz)))
    return ok, g


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
    k_all = len(design.sizes)
    starts = [np.full(k_all, v) for v in (1.0, 0.25, 4.0)]
    theta0 = _minimise(design, [], starts)
    dev0 = _evaluate(design, theta0)[0].deviance

    # Active-set refinement: pin small components at 0, polish the others by
    # Newton's method, release any pinned component whose gradient says it
    # should be positive, repeat.
    pinned = {k for k in range(k_all) if theta0[k] < _BOUNDARY_THETA}
    theta = theta0
    messages: list[str] = []
    for _ in range(k_all + 2):
        if pinned:
            theta = _minimise(design, sorted(pinned), [np.where(theta > 0, theta, 0.5)])
        active = [k for k in range(k_all) if k not in pinned]
        theta = _newton_polish(design, theta, active)
        ev, solver = _evaluate(design, theta)
        g = _gradient_lam(design, ev, solver)
        release = {k for k in pinned
                   if g[k] < -_KKT_TOL * max(1.0, float(np.max(design.ztz)))}
        if not release:
            break
        pinned -= release
        for k in release:
            theta[k] = _BOUNDARY_THETA
    active = [k for k in range(k_all) if k not in pinned]
    ev, solver = _evaluate(design, theta)
    if ev.deviance > dev0 + 1e-8 * max(1.0, abs(dev0)):
        # should not happen; keep the better optimum and report it
        messages.append("active-set refinement did not improve the L-BFGS-B optimum")
        theta = theta0
        pinned = {k for k in range(k_all) if theta[k] == 0.0}
        active = [k for k in range(k_all) if k not in pinned]
        ev, solver = _evaluate(design, theta)
    converged, _ = _kkt(design, theta, active)
    if not converged:
        messages.append("REML optimisation did not meet the first-order optimality check")

    sigma2 = ev.rhr / (design.n - design.p)
    sec = _second_order(design, ev, solver, active, sigma2)
    evals, evecs = np.linalg.eigh(sec.hessian)
    pos = evals > 1e-10 * max(float(np.max(np.abs(evals))), 1e-300)
    hessian_ok = bool(np.all(pos))
    if not hessian_ok:
        messages.append("Hessian of the REML deviance is not positive definite")
    h_inv = (evecs[:, pos] / evals[pos]) @ evecs[:, pos].T
    vcov_varpar = 2.0 * h_inv

    components = {name: float(theta[k] ** 2 * sigma2) for k, name in enumerate(design.names)}
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
        theta={name: float(theta[k]) for k, name in enumerate(design.names)},
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
    :func:`_fstat_ddf`.
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
