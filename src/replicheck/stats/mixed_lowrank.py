"""REML for crossed random intercepts with the largest grouping eliminated first.

The model, the notation (``lam_k``, ``H``, ``N``, ``T_k``, ``Q``) and the
within/between split are those of :mod:`replicheck.stats.mixed`; only the
basis of ``col(Z)`` and the algebra of the between part differ. The dense
algorithm there factorises the ``r x r`` matrix ``N`` (``r`` = levels of all
groupings) at every evaluation, which costs ``r^3``: minutes at a few thousand
levels. Here nothing of order ``r x r`` is formed.

Basis. Let ``a`` be the grouping with the most levels and ``s`` the levels of
all the others (``n_s`` of them), ``D_a`` the level sizes of ``a`` and
``C = Z_a'Z_s`` (``n_a x n_s``, one pass of ``bincount``). ``Q_a = Z_a D_a^{-1/2}``
has orthonormal columns; ``Q_s = (I - P_a) Z_s U g^{-1/2}`` is an orthonormal
basis of the part of ``col(Z_s)`` orthogonal to ``col(Z_a)``, from the
eigen-decomposition ``G_s = Z_s'(I - P_a)Z_s = Z_s'Z_s - C'D_a^{-1}C = U diag(g) U'``
(``n_s x n_s``; eigenvalues above ``1e-9`` of the largest level size kept).
``Q = [Q_a, Q_s]`` spans ``col(Z)``, and since ``Q_s'Z_a = 0``::

    T_a = Q'Z_a Z_a'Q = diag(D_a, 0),
    T_b = F_b F_b',   F_b = Q'Z_b = [D_a^{-1/2} C_b ; g^{-1/2} U'G_s[:, b]]  (r x n_b),

so ``N = I + sum_k lam_k T_k = Delta + F F'`` is diagonal plus a matrix of rank at
most ``n_s`` (``Delta = I + lam_a T_a``, ``F`` the columns ``sqrt(lam_b) F_b`` of the
components not at 0). With ``F~ = Delta^{-1/2} F`` and the eigen-decomposition
``F~'F~ = W diag(mu) W'`` (``n_s x n_s``; its columns ``F~ w_i / sqrt(mu_i)`` are an
orthonormal basis ``B`` of ``col(F~)``), the Woodbury identity gives::

    N^{-1} = Delta^{-1} - V Omega V',   V = Delta^{-1/2} B,
    Omega = diag(mu / (1 + mu)),        log|N| = sum log Delta + sum log(1 + mu)

(components at 0 simply contribute no columns). Holding ``V`` with columns of
unit scale and ``Omega`` between 0 and 1 matters: with ``V = Delta^{-1/2} F~`` and
``Omega = (I + F~'F~)^{-1}`` (the same matrix) the traces below become
differences of terms of order ``lam_b`` and lose about ``eps lam_b^2`` where a
small grouping's variance dwarfs the residual (1e-5 against 1e-9 at
``lam_b = 1.7e5`` in the tests). The REML criterion,
its gradient, the Hessian of the unprofiled deviance and the Jacobian of
``cov(beta)`` are the formulas of :mod:`replicheck.stats.mixed` with ``N^{-1}``
and ``P_bb = N^{-1} - W C W'`` held as *diagonal plus low rank*,
``diag(d) + Y S Y'`` with ``m = n_s + p`` columns in ``Y``, and every trace
(``tr(P T_k)``, ``tr(P T_k P)``, ``tr(P T_k P T_l)``, ``tr(P^2)``) computed from
``r x m`` and ``m x m`` products.

Cost of one evaluation: ``O(r n_s^2)`` for ``F~'F~`` and ``F~ W``, and
``O(r m^2)`` for the second-order quantities, with ``O(r m)`` memory. This is
the cost of a sparse Cholesky factorisation of ``Z'Z + Lambda^{-1}`` ordered with
the largest grouping first: that grouping's block is diagonal, so it is
eliminated without fill and the fill falls in the ``n_s x n_s`` block of the
other groupings, which is dense for crossed designs anyway. No sparse Cholesky
package is needed for this structure (scipy.sparse has no Cholesky
factorisation, and scikit-sparse's needs the SuiteSparse C library, which a
machine with only Python lacks); numpy's dense routines do the small parts. For
two crossed groupings of 5,000 and 50 levels ``r = 5,050`` and ``n_s = 50``: the
dense algorithm factorises a 5,050 x 5,050 matrix per evaluation, this one
decomposes a 50 x 50 matrix.

Accuracy: the Woodbury form loses about ``eps * lam_b * (level size of b)`` in
the directions of a small grouping whose variance dwarfs the residual, the same
order as the forward error of the dense Cholesky solve with ``N``
(condition number ``1 + lam_b`` times a level size). tests/test_stats_mixed_crossed.py
checks this path equal to the dense one to 1e-6 on designs from balanced to
unbalanced, with three groupings, components at the boundary and a residual
variance about 10^5 times smaller than a grouping's, and against lme4 on
lme4::InstEval (2,972 students crossed with 1,128 teachers).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from replicheck.stats.mixed import (
    BetweenTraces,
    SearchInterface,
    _check_inputs,
    _Eval,
    _Second,
    _zt,
    assemble_second,
)

__all__ = ["LowRankDesign", "build_low_rank"]


@dataclass(frozen=True, eq=False)
class LowRankDesign(SearchInterface):
    """The fixed quantities of the problem in the basis ``[Q_a, Q_s]``.

    ``t_large`` is the diagonal of ``T_a`` (``D_a`` then zeros); ``factors[k]`` is
    ``F_k`` for every other grouping (``None`` at ``large``). ``xb``, ``yb``,
    ``xw``, ``yw``, ``sw`` and ``n_within`` are as in :mod:`replicheck.stats.mixed`.
    Implements :class:`replicheck.stats.reml_search.RemlProblem`.
    """

    n: int
    p: int
    names: tuple[str, ...]
    sizes: tuple[int, ...]
    mean_sizes: tuple[float, ...]
    large: int
    r: int
    t_large: np.ndarray
    factors: tuple[np.ndarray | None, ...]
    xb: np.ndarray
    yb: np.ndarray
    xw: np.ndarray
    yw: np.ndarray
    sw: np.ndarray
    n_within: int

    def t_times(self, k: int, mat: np.ndarray) -> np.ndarray:
        """T_k @ mat."""
        f = self.factors[k]
        if f is None:
            return self.t_large * mat if mat.ndim == 1 else self.t_large[:, None] * mat
        return np.asarray(f @ (f.T @ mat))

    def solver(self, lam: np.ndarray) -> LowRankSolver:
        """N^{-1} at ``lam``."""
        return LowRankSolver(self, lam)

    def gradient(self, ev: _Eval) -> np.ndarray:
        """Gradient of the profiled criterion in ``lam`` at an evaluation."""
        return _gradient_lam(self, ev)

    def second_order(self, ev: _Eval, active: Sequence[int], sigma2: float) -> _Second:
        """Score, Hessian and Jacobian at an evaluation."""
        return _second_order(self, ev, active, sigma2)


def build_low_rank(
    y: np.ndarray,
    x: np.ndarray,
    factors: Mapping[str, np.ndarray],
    fixed_names: Sequence[str],
) -> LowRankDesign:
    """Check the inputs and compute the basis ``[Q_a, Q_s]`` (module docstring)."""
    yy, xx, names, codes_list, sizes = _check_inputs(y, x, factors, fixed_names)
    n, p = xx.shape
    large = int(np.argmax(sizes))
    others = [k for k in range(len(sizes)) if k != large]
    n_a = sizes[large]
    codes_a = codes_list[large]
    d_a = np.bincount(codes_a, minlength=n_a).astype(float)
    # the other groupings' levels side by side: codes into 0..n_s-1
    offsets = np.concatenate([[0], np.cumsum([sizes[k] for k in others])]).astype(int)
    n_s = int(offsets[-1])
    codes_s = [codes_list[k] + offsets[i] for i, k in enumerate(others)]
    c = np.zeros((n_a, n_s))
    zs_zs = np.zeros((n_s, n_s))
    for i, ci in enumerate(codes_s):
        c += np.bincount(codes_a * n_s + ci, minlength=n_a * n_s).reshape(n_a, n_s)
        for cj in codes_s[i:]:
            block = np.bincount(ci * n_s + cj, minlength=n_s * n_s).reshape(n_s, n_s)
            zs_zs += block if cj is ci else block + block.T
    c_over_d = c / d_a[:, None]
    g_s = zs_zs - c.T @ c_over_d
    g_s = 0.5 * (g_s + g_s.T)
    g_vals, g_vecs = np.linalg.eigh(g_s)
    keep = g_vals > 1e-9 * float(np.max(d_a))
    g_vals = g_vals[keep]
    u_s = g_vecs[:, keep]
    r = n_a + int(keep.sum())
    inv_sqrt_g = 1.0 / np.sqrt(g_vals)
    inv_sqrt_d = 1.0 / np.sqrt(d_a)

    def zs_t(v: np.ndarray) -> np.ndarray:
        return sum(
            (_zt([ci], [n_s], v) for ci in codes_s),
            start=np.zeros((n_s, *v.shape[1:])),
        )

    def between_within(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(Q'v, v projected on the orthogonal complement of col(Z))."""
        za_v = _zt([codes_a], [n_a], v)
        b_v = zs_t(v) - c_over_d.T @ za_v  # Z_s'(I - P_a) v
        qs_v = inv_sqrt_g[:, None] * (u_s.T @ b_v) if v.ndim > 1 else inv_sqrt_g * (u_s.T @ b_v)
        coef_s = u_s @ ((u_s.T @ b_v) / (g_vals if v.ndim == 1 else g_vals[:, None]))
        coef_a = (za_v - c @ coef_s) / (d_a if v.ndim == 1 else d_a[:, None])
        fitted = coef_a[codes_a]
        for ci in codes_s:
            fitted = fitted + coef_s[ci]
        qa_v = inv_sqrt_d * za_v if v.ndim == 1 else inv_sqrt_d[:, None] * za_v
        return np.concatenate([qa_v, qs_v], axis=0), v - fitted

    xb, xw = between_within(xx)
    yb, yw = between_within(yy)
    q_s_part = inv_sqrt_g[:, None] * (u_s.T @ g_s)  # Q_s'Z_s
    f_list: list[np.ndarray | None] = [None] * len(sizes)
    for i, k in enumerate(others):
        cols = slice(int(offsets[i]), int(offsets[i + 1]))
        f_list[k] = np.vstack([inv_sqrt_d[:, None] * c[:, cols], q_s_part[:, cols]])
    return LowRankDesign(
        n=n,
        p=p,
        names=tuple(names),
        sizes=tuple(sizes),
        mean_sizes=tuple(n / k for k in sizes),
        large=large,
        r=r,
        t_large=np.concatenate([d_a, np.zeros(r - n_a)]),
        factors=tuple(f_list),
        xb=xb,
        yb=yb,
        xw=xw,
        yw=yw,
        sw=xw.T @ xw,
        n_within=n - r,
    )


class LowRankSolver:
    """N^{-1} = Delta^{-1} - V Omega V' for ``N = Delta + F F'`` (module docstring)."""

    def __init__(self, design: LowRankDesign, lam: np.ndarray) -> None:
        delta = 1.0 + lam[design.large] * design.t_large
        isd = 1.0 / np.sqrt(delta)
        cols = [
            np.sqrt(lam[k]) * f
            for k, f in enumerate(design.factors)
            if f is not None and lam[k] > 0.0
        ]
        self.d = 1.0 / delta
        logdet = float(np.sum(np.log(delta)))
        if cols:
            ft = isd[:, None] * np.hstack(cols)
            mu, w = np.linalg.eigh(ft.T @ ft)
            mu = np.maximum(mu, 0.0)
            logdet += float(np.sum(np.log1p(mu)))
            keep = mu > 0.0
            # unit columns ft w_i / sqrt(mu_i): an orthonormal basis of col(F~)
            self.omega = mu[keep] / (1.0 + mu[keep])  # the diagonal of Omega
            self.v = isd[:, None] * ((ft @ w[:, keep]) / np.sqrt(mu[keep]))
        else:
            self.omega = np.zeros(0)
            self.v = np.zeros((design.r, 0))
        self.logdet = logdet
        # diagonal of V Omega V' (the traces of the gradient read it)
        self.low_diag = (self.v**2) @ self.omega

    def __call__(self, v: np.ndarray) -> np.ndarray:
        if v.ndim == 1:
            return np.asarray(self.d * v - self.v @ (self.omega * (self.v.T @ v)))
        return np.asarray(self.d[:, None] * v - self.v @ (self.omega[:, None] * (self.v.T @ v)))


class _DiagLowRank:
    """A symmetric matrix ``diag(d) + Y S Y'`` and the traces the Hessian needs."""

    def __init__(self, d: np.ndarray, y: np.ndarray, s: np.ndarray) -> None:
        self.d = d
        self.y = y
        self.ys = y @ s
        self.s = s
        self.diag = d + np.sum(self.ys * y, axis=1)
        self.gram = y.T @ y

    def times(self, mat: np.ndarray) -> np.ndarray:
        """P @ mat."""
        if mat.ndim == 1:
            return np.asarray(self.d * mat + self.ys @ (self.y.T @ mat))
        return np.asarray(self.d[:, None] * mat + self.ys @ (self.y.T @ mat))

    def row_norms2(self) -> np.ndarray:
        """Squared Euclidean norm of each row."""
        cross = np.sum((self.ys @ self.gram) * self.ys, axis=1)
        return np.asarray(self.d**2 + 2.0 * self.d * (self.diag - self.d) + cross)

    def weighted_frobenius2(self, t: np.ndarray) -> float:
        """sum_ij t_i t_j P_ij^2 = |T^{1/2} P T^{1/2}|_F^2 for T = diag(t), t >= 0."""
        root = np.sqrt(t)
        yt = root[:, None] * self.y
        yst = root[:, None] * self.ys
        dt = t * self.d
        sg = self.s @ (yt.T @ yt)
        return float(
            np.sum(dt**2) + 2.0 * np.sum(dt * np.sum(yst * yt, axis=1)) + np.sum(sg * sg.T)
        )


def _trace_ninv_t(design: LowRankDesign, solver: LowRankSolver, k: int) -> float:
    """tr(N^{-1} T_k)."""
    f = design.factors[k]
    if f is None:
        t = design.t_large
        return float(np.sum(t * solver.d) - np.sum(t * solver.low_diag))
    vf = solver.v.T @ f
    return float(np.sum(f * (solver.d[:, None] * f)) - np.sum(vf * (solver.omega[:, None] * vf)))


def _gradient_lam(design: LowRankDesign, ev: _Eval) -> np.ndarray:
    """Gradient of the profiled REML criterion in ``lam`` (as in mixed._gradient_lam)."""
    sigma2 = ev.rhr / (design.n - design.p)
    solver = ev.solver
    assert isinstance(solver, LowRankSolver)
    grad = np.empty(len(design.sizes))
    for k in range(len(design.sizes)):
        wtw = ev.w_b.T @ design.t_times(k, ev.w_b)
        tr_pbb_t = _trace_ninv_t(design, solver, k) - float(np.sum(ev.c_h * wtw))
        grad[k] = tr_pbb_t - float(ev.u_b @ design.t_times(k, ev.u_b)) / sigma2
    return grad


def _low_rank_traces(design: LowRankDesign, ev: _Eval, active: Sequence[int]) -> BetweenTraces:
    """:class:`~replicheck.stats.mixed.BetweenTraces` with ``P_bb`` diagonal plus low rank."""
    solver = ev.solver
    assert isinstance(solver, LowRankSolver)
    p = design.p
    u = ev.u_b
    n_v = solver.v.shape[1]
    s_mat = np.zeros((n_v + p, n_v + p))
    s_mat[:n_v, :n_v] = -np.diag(solver.omega)
    s_mat[n_v:, n_v:] = -ev.c_h
    pbb = _DiagLowRank(solver.d, np.hstack([solver.v, ev.w_b]), s_mat)
    rn2 = pbb.row_norms2()
    t = design.t_large
    # P_bb F_k for the low-rank groupings
    pf = {k: pbb.times(f) for k in active if (f := design.factors[k]) is not None}
    tu = [design.t_times(k, u) for k in active]
    a = len(active)
    ptpt = np.empty((a, a))
    tu_p_tu = np.empty((a, a))
    for i, k in enumerate(active):
        fk = design.factors[k]
        for j in range(i, a):
            fl = design.factors[active[j]]
            if fk is None and fl is None:
                g = pbb.weighted_frobenius2(t)
            elif fk is None or fl is None:
                other = active[j] if fk is None else k
                g = float(np.sum(t[:, None] * pf[other] ** 2))
            else:
                g = float(np.sum((fk.T @ pf[active[j]]) ** 2))
            ptpt[i, j] = ptpt[j, i] = g
            tu_p_tu[i, j] = tu_p_tu[j, i] = float(tu[i] @ pbb.times(tu[j]))
    ptp = [
        float(np.sum(t * rn2)) if design.factors[k] is None else float(np.sum(pf[k] ** 2))
        for k in active
    ]
    tp = [
        float(np.sum(t * pbb.diag))
        if (f := design.factors[k]) is None
        else float(np.sum(f * pf[k]))
        for k in active
    ]
    return BetweenTraces(
        ptpt=ptpt,
        tu_p_tu=tu_p_tu,
        ptp=np.array(ptp),
        u_p_tu=np.array([float(u @ pbb.times(tu_i)) for tu_i in tu]),
        tp=np.array(tp),
        tr_p=float(np.sum(pbb.diag)),
        tr_p2=float(np.sum(rn2)),
        u_p_u=float(u @ pbb.times(u)),
    )


def _second_order(
    design: LowRankDesign, ev: _Eval, active: Sequence[int], sigma2: float
) -> _Second:
    """Score, Hessian and Jacobian as in mixed.assemble_second, with ``P_bb`` low rank."""
    return assemble_second(design, ev, active, sigma2, _low_rank_traces(design, ev, active))
