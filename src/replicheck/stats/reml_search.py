"""The REML search shared by the variance-component fits, and the fit it returns.

:func:`replicheck.stats.mixed.fit_reml` (general random intercepts, dense
algebra) and :func:`replicheck.stats.nested.fit_nested_reml` (nested random
intercepts from per-unit summaries) evaluate the same REML criterion in
different ways. Both hand their evaluations to :func:`fit_components` as a
:class:`RemlProblem`; this module holds the one optimisation strategy and the
assembly of the Satterthwaite ingredients into a :class:`MixedFit` (also
importable from :mod:`replicheck.stats.mixed`).

Parameters: ``lam_k = s2_k / s2_e`` (relative variances, ``K`` random
components) for the profiled criterion ``d(lam)`` (lme4's ``REMLcrit``, Bates,
Maechler, Bolker & Walker 2015, J. Stat. Software 67(1), eq. 41), and the
variances ``s = (s2_k for the active components, s2_e)`` for the unprofiled REML
deviance ``D(s) = -2 log L_R``.

Search
------
0. With a single component and a caller that can evaluate the criterion at
   many ``lam`` at once (``grid``): ``d`` on a grid of ``lam`` (0, and
   ``lam n / G`` from ``1e-5`` to ``1e7``, four points a decade); a best point
   at 0 is kept when the gradient there is not negative (step 4's condition),
   any other is polished by the Newton steps of step 3 and kept when the
   result is not negligible, passes step 4's first-order check and is no worse
   than the grid's best. Otherwise steps 1-3 run. (A one-dimensional grid
   sees every basin wider than a quarter decade, where three starts might
   miss one; and it costs one batched evaluation instead of dozens.)
1. L-BFGS-B over ``theta_k = sqrt(lam_k) >= 0`` (lme4's relative standard
   deviations) with the analytic gradient ``2 theta_k d d / d lam_k``, from
   each start ``theta = sqrt(c) 1`` given by the caller (lme4's ``theta = 1``
   first); the lowest criterion wins.
2. L-BFGS-B continued in ``lam`` itself, each ``lam_k`` scaled by the mean
   level size ``n / G_k``. The theta gradient vanishes at ``theta_k = 0``, so
   the theta search can stall there although a small positive variance is
   optimal; the gradient in ``lam`` is informative at the boundary. The better
   of the two optima (by ``d``) is kept.
3. Active set: components with ``lam_k n / G_k < 1e-6`` are pinned at exactly
   0 and the others re-minimised in ``lam``; when all free components are
   positive they are polished by Newton steps on ``D`` in ``log s``
   (log coordinates keep the Hessian well scaled when the variances differ by
   orders of magnitude, and every variance positive; step halving until ``D``
   does not increase, stop once the largest log step is below the caller's
   threshold). A pinned component whose gradient at 0 is negative,
   ``d d / d lam_k < -1e-7 n / G_k``, violates the Karush-Kuhn-Tucker
   condition: it is released (never pinned again) and the step repeats, at
   most ``K + 2`` times. Should the refined point have a criterion worse than
   the L-BFGS-B optimum (relative ``1e-8``), that optimum is kept and a
   message says so.
4. First-order optimality check (``converged``): ``|lam_k d d / d lam_k| < 1e-5``
   for every positive component (a dimensionless change of the criterion for a
   relative change of ``lam_k``) and ``d d / d lam_k >= -1e-7 n / G_k`` for every
   component at 0.

Satterthwaite ingredients
-------------------------
Components at exactly 0 are reported in ``boundary`` and left out of the
variance parameters ``varpar`` (the active ones, residual last). Their
asymptotic covariance is ``vcov_varpar = A = 2 H^{-1}`` with ``H`` the Hessian of
``D`` in ``s`` (observed information), inverted in log-variance coordinates
(``s_i s_j H_ij``; the gradient term vanishes at the optimum), where it is well
scaled, through its eigenvalues: ``hessian_ok`` is False when one is not
positive (relative ``1e-10``), and those directions are dropped. The caller
supplies ``H``, ``cov(beta)`` and its Jacobian ``d cov(beta) / d s``
(``jac_cov_beta``) at the optimum. lmerTest (Kuznetsova, Brockhoff &
Christensen 2017, J. Stat. Software 82(13)) differentiates numerically with
respect to ``(theta, sigma)``; at an interior optimum the Satterthwaite df are
invariant to that change of parameters, and leaving boundary components out
gives the same df: in ``(theta, sigma)`` their Jacobian entries and Hessian
cross terms vanish at ``theta = 0``.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np
from scipy import linalg

from replicheck.stats.classic import DesignError


def _minimize(*args: Any, **kwargs: Any) -> Any:
    """scipy.optimize.minimize, imported when first needed (it loads scipy.spatial)."""
    from scipy import optimize

    return optimize.minimize(*args, **kwargs)


__all__ = [
    "FinalPoint",
    "MixedFit",
    "PolishPoint",
    "RemlProblem",
    "active_variances",
    "fit_components",
    "lam_from_variances",
]

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


@dataclass(frozen=True, eq=False)
class PolishPoint:
    """The unprofiled REML deviance at variances ``variances`` (active, residual last).

    ``derivatives()`` returns its gradient and Hessian in those variances; it
    is called only for points that a Newton step accepts.
    """

    variances: np.ndarray
    deviance: float
    derivatives: Callable[[], tuple[np.ndarray, np.ndarray]]


@dataclass(frozen=True, eq=False)
class FinalPoint:
    """What the fit reports at the optimum (for the given active components).

    ``sigma2`` is the profiled residual variance, ``deviance`` lme4's
    ``REMLcrit``; ``hessian`` is the Hessian of the unprofiled REML deviance and
    ``jac`` is ``d cov_beta / d s`` (shape ``(P, p, p)``), both in the variances
    of the active components and the residual (last).
    """

    sigma2: float
    deviance: float
    beta: np.ndarray
    cov_beta: np.ndarray
    hessian: np.ndarray
    jac: np.ndarray


class RemlProblem(Protocol):
    """One REML problem as the search sees it.

    ``sizes[k]`` is the number of levels of component ``k`` and ``mean_sizes[k]``
    the mean number of observations per level (``n / sizes[k]``). Every
    method may raise one of the exception types passed to
    :func:`fit_components` as ``failures`` where the criterion cannot be
    evaluated; the search then treats the point as infinitely bad.
    """

    @property
    def n(self) -> int: ...

    @property
    def p(self) -> int: ...

    @property
    def names(self) -> tuple[str, ...]: ...

    @property
    def sizes(self) -> tuple[int, ...]: ...

    @property
    def mean_sizes(self) -> tuple[float, ...]: ...

    def profiled(self, lam: np.ndarray) -> tuple[float, np.ndarray]:
        """lme4's REMLcrit at ``lam`` and its gradient in ``lam``."""
        ...

    def profiled_deviance(self, lam: np.ndarray) -> float:
        """lme4's REMLcrit at ``lam`` (no gradient)."""
        ...

    def polish_start(self, lam: np.ndarray, active: Sequence[int]) -> PolishPoint:
        """The first Newton point: the profiled optimum of ``s2_e`` at ``lam``, the
        inactive components at 0; its variances are :func:`active_variances`."""
        ...

    def polish_point(self, variances: np.ndarray, active: Sequence[int]) -> PolishPoint:
        """A Newton trial point at the variances (active components, residual last)."""
        ...

    def final(self, lam: np.ndarray, active: Sequence[int]) -> FinalPoint:
        """The reported quantities at ``lam``, the inactive components at 0."""
        ...


def active_variances(lam: np.ndarray, active: Sequence[int], sigma2: float) -> np.ndarray:
    """``(lam_k s2_e for k in active, s2_e)``."""
    return np.array([lam[k] * sigma2 for k in active] + [sigma2])


def lam_from_variances(variances: np.ndarray, active: Sequence[int], k_all: int) -> np.ndarray:
    """Relative variances ``s2_k / s2_e`` (0 for the inactive components)."""
    lam = np.zeros(k_all)
    for i, k in enumerate(active):
        lam[k] = variances[i] / variances[-1]
    return lam


@dataclass(frozen=True, eq=False)
class _Search:
    problem: RemlProblem
    failures: tuple[type[Exception], ...]

    @property
    def k(self) -> int:
        return len(self.problem.sizes)

    def safe_profiled(self, lam: np.ndarray) -> tuple[float, np.ndarray]:
        try:
            return self.problem.profiled(lam)
        except self.failures:
            return float("inf"), np.zeros(self.k)

    def safe_deviance(self, lam: np.ndarray) -> float:
        try:
            return self.problem.profiled_deviance(lam)
        except self.failures:
            return float("inf")

    def negligible(self, lam: np.ndarray, k: int) -> bool:
        return bool(lam[k] * self.problem.mean_sizes[k] < _TINY)

    def violates_kkt_at_zero(self, g: np.ndarray, k: int) -> bool:
        return bool(g[k] < -_KKT_TOL * self.problem.mean_sizes[k])


def _minimise_theta(search: _Search, starts: Sequence[float]) -> np.ndarray:
    """L-BFGS-B over theta = sqrt(lam) >= 0 from several starts; returns lam."""
    k = search.k

    def fun(x: np.ndarray) -> tuple[float, np.ndarray]:
        dev, g = search.safe_profiled(x * x)
        return dev, 2.0 * x * g

    best_x: np.ndarray | None = None
    best_f = float("inf")
    for start in starts:
        res = _minimize(
            fun,
            np.full(k, np.sqrt(start)),
            jac=True,
            method="L-BFGS-B",
            bounds=[(0.0, None)] * k,
            options={"ftol": 1e-15, "gtol": 1e-10, "maxiter": 2000},
        )
        if float(res.fun) < best_f:
            best_f = float(res.fun)
            best_x = np.asarray(res.x, dtype=float)
    if best_x is None:
        raise DesignError("REML optimisation failed: the criterion could not be evaluated")
    return best_x * best_x


def _minimise_lam(search: _Search, fixed_zero: Sequence[int], start: np.ndarray) -> np.ndarray:
    """L-BFGS-B over lam >= 0 (scaled by the mean level size), some pinned at 0.

    Unlike the theta parametrisation, whose gradient vanishes at theta = 0,
    the gradient in lam is informative at the boundary: a component stays at
    0 only if the criterion increases into the interior.
    """
    k = search.k
    free = [i for i in range(k) if i not in set(fixed_zero)]
    if not free:
        return np.zeros(k)
    scale = np.array([search.problem.mean_sizes[i] for i in free])

    def expand(x: np.ndarray) -> np.ndarray:
        lam = np.zeros(k)
        lam[free] = x / scale
        return lam

    def fun(x: np.ndarray) -> tuple[float, np.ndarray]:
        dev, g = search.safe_profiled(expand(x))
        return dev, g[free] / scale

    res = _minimize(
        fun,
        np.asarray(start, dtype=float)[free] * scale,
        jac=True,
        method="L-BFGS-B",
        bounds=[(0.0, None)] * len(free),
        options={"ftol": 1e-15, "gtol": 1e-12, "maxiter": 2000},
    )
    return expand(np.asarray(res.x, dtype=float))


def _newton_polish(
    search: _Search,
    lam: np.ndarray,
    active: Sequence[int],
    stop: float,
    max_iter: int = 40,
) -> np.ndarray:
    """Newton steps on the unprofiled REML deviance in log(s2_active), log(s2_e).

    Stops when the largest log step falls below ``stop``, when the Hessian in
    log coordinates is not positive definite or when no step length down to
    1e-6 keeps the deviance from increasing.
    """
    point = search.problem.polish_start(lam, active)
    for _ in range(max_iter):
        s = point.variances
        score, hessian = point.derivatives()
        grad = score * s
        hess = hessian * np.outer(s, s) + np.diag(grad)
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
                new = search.problem.polish_point(s_new, active)
            except search.failures:
                t *= 0.5
                continue
            if new.deviance <= point.deviance + 1e-10 * max(1.0, abs(point.deviance)):
                accepted = True
                break
            t *= 0.5
        if not accepted:
            break
        rel = float(np.max(np.abs(t * step)))
        point = new
        if rel < stop:
            break
    return lam_from_variances(point.variances, active, search.k)


# the grid of lam * mean level size scanned for a single component: 0 and four
# points a decade from 1e-5 to 1e7
_GRID = np.concatenate([[0.0], np.logspace(-5.0, 7.0, 49)])


def _optimise_on_grid(
    search: _Search, grid: Callable[[np.ndarray], np.ndarray], newton_stop: float
) -> np.ndarray | None:
    """The single-component search: the grid's best point, polished by Newton.

    Returns None (the caller then runs the general search) when the grid
    cannot be evaluated, when the best point is 0 but the gradient there is
    negative, or when the polished point is negligible, worse than the grid's
    best or fails the first-order check.
    """
    lams = _GRID / search.problem.mean_sizes[0]
    try:
        devs = np.asarray(grid(lams), dtype=float)
    except search.failures:
        return None
    if not np.all(np.isfinite(devs)):
        return None
    best = int(np.argmin(devs))
    if best == 0:
        g = search.safe_profiled(np.zeros(1))[1]
        return None if search.violates_kkt_at_zero(g, 0) else np.zeros(1)
    try:
        lam = _newton_polish(search, lams[best : best + 1], [0], newton_stop)
    except search.failures:
        return None
    if search.negligible(lam, 0) or not _kkt(search, lam, [0]):
        return None
    if not search.safe_deviance(lam) <= devs[best] + 1e-10 * max(1.0, abs(float(devs[best]))):
        return None
    return lam


def _optimise(
    search: _Search,
    starts: Sequence[float],
    newton_stop: float,
    grid: Callable[[np.ndarray], np.ndarray] | None = None,
) -> tuple[np.ndarray, list[str]]:
    """Steps 1-3 of the module docstring (or step 0); returns lam and any messages."""
    k = search.k
    if grid is not None and k == 1:
        found = _optimise_on_grid(search, grid, newton_stop)
        if found is not None:
            return found, []
    problem = search.problem
    lam0 = _minimise_theta(search, starts)
    # the theta search can stall at theta_k = 0 (zero gradient there): continue
    # in lam, where the gradient at the boundary is informative
    lam1 = _minimise_lam(search, [], lam0)
    dev0 = search.safe_deviance(lam0)
    dev1 = search.safe_deviance(lam1)
    if dev1 <= dev0:
        lam0, dev0 = lam1, dev1

    # Active-set refinement: pin negligible components at exactly 0, polish the
    # others by Newton's method, release a pinned component whose gradient at 0
    # is negative (it then stays free), repeat.
    never_pin: set[int] = set()
    lam = lam0.copy()
    messages: list[str] = []
    for _ in range(k + 2):
        pinned = {i for i in range(k) if search.negligible(lam, i) and i not in never_pin}
        if pinned:
            lam = _minimise_lam(search, sorted(pinned), lam)
        active = [i for i in range(k) if i not in pinned]
        if any(lam[i] <= 0.0 for i in active):
            # a released component: move it off 0 along its (negative) gradient
            lam = _minimise_lam(search, sorted(pinned), lam)
        if all(lam[i] > 0.0 for i in active):
            lam = _newton_polish(search, lam, active, newton_stop)
        g = problem.profiled(lam)[1]
        release = {i for i in pinned if search.violates_kkt_at_zero(g, i)}
        if not release:
            break
        never_pin |= release
    dev = search.safe_deviance(lam)
    if dev > dev0 + 1e-8 * max(1.0, abs(dev0)):
        # should not happen; keep the better optimum and report it
        messages.append("active-set refinement did not improve the L-BFGS-B optimum")
        lam = lam0
    return lam, messages


def _kkt(search: _Search, lam: np.ndarray, active: Sequence[int]) -> bool:
    """First-order optimality: zero gradient for active, non-negative for pinned."""
    g = search.problem.profiled(lam)[1]
    ok = True
    for k in range(search.k):
        if k in active:
            # dimensionless: change in deviance for a relative change in lam_k
            ok = ok and abs(g[k] * lam[k]) < 1e-5
        else:
            ok = ok and g[k] >= -_KKT_TOL * search.problem.mean_sizes[k]
    return ok


def fit_components(
    problem: RemlProblem,
    fixed_names: tuple[str, ...],
    starts: Sequence[float],
    newton_stop: float,
    failures: tuple[type[Exception], ...],
    grid: Callable[[np.ndarray], np.ndarray] | None = None,
) -> MixedFit:
    """Minimise the REML criterion of ``problem`` and assemble the fit.

    ``starts`` are the values ``c`` of the theta starts ``sqrt(c) 1``;
    ``newton_stop`` is the largest log step at which the Newton polish stops;
    ``failures`` are the exception types that mark a point where the
    criterion cannot be evaluated; ``grid``, for a single component, evaluates
    the profiled criterion at many ``lam`` at once (step 0 of the module
    docstring). Method in the module docstring. Raises
    :class:`DesignError` when the criterion cannot be evaluated at any start.
    """
    search = _Search(problem, failures)
    k = search.k
    lam, messages = _optimise(search, starts, newton_stop, grid)
    pinned = [i for i in range(k) if lam[i] == 0.0]
    active = [i for i in range(k) if i not in pinned]
    converged = _kkt(search, lam, active)
    if not converged:
        messages.append("REML optimisation did not meet the first-order optimality check")

    fin = problem.final(lam, active)
    sigma2 = fin.sigma2
    # invert in log-variance coordinates, where the Hessian is well scaled
    # (s_i s_j H_ij; the gradient term vanishes at the optimum)
    s_act = active_variances(lam, active, sigma2)
    h_log = fin.hessian * np.outer(s_act, s_act)
    evals, evecs = np.linalg.eigh(0.5 * (h_log + h_log.T))
    pos = evals > 1e-10 * max(float(np.max(np.abs(evals))), 1e-300)
    hessian_ok = bool(np.all(pos))
    if not hessian_ok:
        messages.append("Hessian of the REML deviance is not positive definite")
    h_log_inv = (evecs[:, pos] / evals[pos]) @ evecs[:, pos].T
    vcov_varpar = 2.0 * h_log_inv * np.outer(s_act, s_act)

    names = problem.names
    components = {name: float(lam[i] * sigma2) for i, name in enumerate(names)}
    for i in pinned:
        components[names[i]] = 0.0
    components["residual"] = float(sigma2)
    varpar_names = (*(names[i] for i in active), "residual")
    return MixedFit(
        components=components,
        beta=fin.beta,
        cov_beta=fin.cov_beta,
        fixed_names=fixed_names,
        reml_deviance=float(fin.deviance),
        n_obs=problem.n,
        n_fixed=problem.p,
        converged=bool(converged),
        boundary=tuple(names[i] for i in pinned),
        theta={name: float(np.sqrt(lam[i])) for i, name in enumerate(names)},
        n_levels=dict(zip(names, problem.sizes, strict=True)),
        varpar_names=varpar_names,
        varpar=np.array([components[nm] for nm in varpar_names]),
        vcov_varpar=vcov_varpar,
        jac_cov_beta=fin.jac,
        hessian_ok=hessian_ok,
        messages=tuple(messages),
    )
