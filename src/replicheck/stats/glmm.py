"""Logistic and Poisson mixed models with random intercepts, by the Laplace approximation.

Model: ``eta = X beta + Z Lambda u``, ``u ~ N(0, I)``, ``Lambda`` diagonal with
one standard deviation ``theta_k`` per grouping (random intercepts only), and
``y`` given ``eta`` binomial (logit link, 0/1 trials) or Poisson (log link).

The likelihood integral over ``u`` is taken by the Laplace approximation, the
default of mixed-model software (Bates, Maechler, Bolker & Walker 2015, J.
Stat. Software 67(1), section 5): for given ``(theta, beta)`` the conditional
mode ``u*`` is found by Newton's method (penalised iteratively reweighted least
squares), and::

    D(theta, beta) = -2 log p(y | u*) + |u*|^2 + log|Lambda'Z'W Z Lambda + I|,

with ``W`` the working weights at ``u*``. ``D`` is minimised over ``(theta,
beta)`` jointly (L-BFGS-B from the GLM estimates and ``theta = 1``, then
Powell's method). The covariance of ``beta`` is the ``beta`` block of
``2 H^-1``, ``H`` the Hessian of ``D`` in ``(theta, beta)`` (four-point central
differences, Richardson-extrapolated), as lme4 reports it by default. lme4
takes that Hessian by plain finite differences of a deviance evaluated to its
iteration tolerance, so its standard errors move in the third digit (its own
RX-based ones differ as much); estimates agree to about 1e-3, standard errors
to about 1% (fixtures/audit/claimed_glmm.R).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import linalg, special

from replicheck.stats import dist
from replicheck.stats.classic import DesignError
from replicheck.stats.glm import GlmTerm
from replicheck.stats.numderiv import hessian, minimise

__all__ = ["GlmmFit", "fit_glmm", "glmm_term_tests"]

MAX_GLMM_EFFECTS = 2000  # random effects in the dense Laplace computation


@dataclass(frozen=True)
class GlmmFit:
    """A Laplace fit: estimates, their covariance, the standard deviations, the deviance."""

    beta: np.ndarray
    cov_beta: np.ndarray
    sd: dict[str, float]
    deviance: float
    converged: bool


def _z(codes: Sequence[np.ndarray]) -> tuple[np.ndarray, list[int]]:
    n = codes[0].size
    sizes = [int(c.max()) + 1 for c in codes]
    z = np.zeros((n, sum(sizes)))
    at = 0
    for c, m in zip(codes, sizes, strict=True):
        z[np.arange(n), at + c] = 1.0
        at += m
    return z, sizes


def _loglik(y: np.ndarray, eta: np.ndarray, family: str) -> float:
    if family == "binomial":
        return float(np.sum(y * eta - np.logaddexp(0.0, eta)))
    return float(np.sum(y * eta - np.exp(eta) - special.gammaln(y + 1)))


def _mean_var(eta: np.ndarray, family: str) -> tuple[np.ndarray, np.ndarray]:
    if family == "binomial":
        mu = special.expit(eta)
        return mu, mu * (1 - mu)
    mu = np.exp(np.clip(eta, -700, 700))
    return mu, mu


class _Laplace:
    """The Laplace deviance, warm-starting each conditional mode from the last."""

    def __init__(
        self, y: np.ndarray, X: np.ndarray, z: np.ndarray, sizes: list[int], family: str
    ) -> None:
        self.y, self.X, self.z, self.sizes, self.family = y, X, z, sizes, family
        self.u = np.zeros(z.shape[1])

    def deviance(self, theta: np.ndarray, beta: np.ndarray) -> float:
        zl = self.z * np.repeat(theta, self.sizes)
        offset = self.X @ beta
        u = self.u.copy()
        eye = np.eye(u.size)
        for _ in range(100):
            mu, w = _mean_var(offset + zl @ u, self.family)
            step = np.linalg.solve((zl.T * w) @ zl + eye, zl.T @ (self.y - mu) - u)
            u = u + step
            if np.max(np.abs(step)) < 1e-11:
                break
        eta = offset + zl @ u
        _, w = _mean_var(eta, self.family)
        chol = linalg.cholesky((zl.T * w) @ zl + eye, lower=True)
        self.u = u
        log_det = 2 * float(np.sum(np.log(np.diag(chol))))
        return -2 * _loglik(self.y, eta, self.family) + float(u @ u) + log_det


def fit_glmm(
    y: np.ndarray,
    X: np.ndarray,
    groupings: Mapping[str, np.ndarray],
    family: str,
    start: np.ndarray | None = None,
) -> GlmmFit:
    """Laplace fit of a logistic or Poisson model with random intercepts (see the module).

    ``groupings`` maps names to codes 0..m-1; ``start`` is a starting ``beta``
    (the GLM's estimates). Raises :class:`DesignError` when there are too many
    random effects or the fit fails.
    """
    y = np.asarray(y, dtype=float)
    X = np.asarray(X, dtype=float)
    codes = list(groupings.values())
    z, sizes = _z(codes)
    if z.shape[1] > MAX_GLMM_EFFECTS:
        raise DesignError(f"{z.shape[1]} random effects exceed the {MAX_GLMM_EFFECTS} fitted")
    lap = _Laplace(y, X, z, sizes, family)
    k = len(codes)
    p = X.shape[1]
    beta0 = np.zeros(p) if start is None else np.asarray(start, dtype=float)

    def crit(par: np.ndarray) -> float:
        try:
            value = lap.deviance(par[:k], par[k:])
        except (linalg.LinAlgError, np.linalg.LinAlgError, ValueError):
            lap.u = np.zeros_like(lap.u)
            return float("inf")
        return value if np.isfinite(value) else float("inf")

    x0 = np.concatenate([np.ones(k), beta0])
    bounds = [(0.0, None)] * k + [(None, None)] * p
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        best = minimise(crit, x0, bounds, 1e-9, 1e-13, 40000)
        if not np.isfinite(best.fun):
            raise DesignError("the mixed model could not be fitted")
        par = np.asarray(best.x, dtype=float)
        hess = hessian(crit, par, 1e-3)
    if not np.all(np.isfinite(hess)):
        raise DesignError("the mixed model's estimates have no finite standard errors")
    cov_beta = (2.0 * np.linalg.pinv(hess))[k:, k:]
    if np.any(np.diag(cov_beta) <= 0):
        raise DesignError("the mixed model's estimates have no finite standard errors")
    return GlmmFit(
        beta=par[k:],
        cov_beta=cov_beta,
        sd={name: float(par[i]) for i, name in enumerate(groupings)},
        deviance=float(best.fun),
        converged=bool(best.success),
    )


def glmm_term_tests(fit: GlmmFit, index: Mapping[str, Sequence[int]]) -> dict[str, GlmTerm]:
    """Wald tests of every term of a Laplace fit (no likelihood-ratio test: NaN)."""
    out: dict[str, GlmTerm] = {}
    for term, cols in index.items():
        cols = list(cols)
        b = fit.beta[cols]
        v = fit.cov_beta[np.ix_(cols, cols)]
        wald = float(b @ np.linalg.solve(v, b))
        q = len(cols)
        z = coef = ci = None
        if q == 1:
            coef = float(b[0])
            se = float(np.sqrt(v[0, 0]))
            z = coef / se
            half = float(dist.norm_ppf(0.975)) * se
            ci = (float(np.exp(coef - half)), float(np.exp(coef + half)))
        nan = float("nan")
        out[term] = GlmTerm(wald, q, float(dist.chi2_sf(wald, q)), nan, nan, z, coef, ci)
    return out
