"""Logistic and Poisson regression as claimed: every row an independent trial or count.

A claimed yes/no or count model is a generalised linear model (Nelder &
Wedderburn 1972, J. R. Stat. Soc. A 135:370-384): logit link and binomial
errors, or log link and Poisson errors, fitted by maximum likelihood
(statsmodels' GLM, iteratively reweighted least squares). Papers report a term
in one of three ways, all computed here:

* the Wald z of a one-coefficient term (the coefficient over its standard
  error, as regression summaries print it), and its odds or rate ratio
  exp(coefficient) with the Wald 95% interval;
* the Wald chi-squared of a term, b' V^-1 b on as many df as the term has
  coefficients (z squared for one);
* the likelihood-ratio chi-squared, the drop in deviance when the term is
  left out (the "analysis of deviance" table).

Reference values: R's ``glm``, ``summary`` and ``drop1(test = "Chisq")``
(fixtures/audit/claimed_glm.R).
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from replicheck.stats import dist
from replicheck.stats.classic import DesignError

__all__ = ["GlmTerm", "glm_start", "glm_term_tests"]


@dataclass(frozen=True)
class GlmTerm:
    """The tests of one term of a generalised linear model."""

    wald_chi2: float
    df: int
    wald_p: float
    lr_chi2: float
    lr_p: float
    z: float | None = None  # one coefficient: coefficient / standard error
    coefficient: float | None = None  # one coefficient: log odds or log rate ratio
    ratio_ci: tuple[float, float] | None = None  # Wald 95% interval of exp(coefficient)


def _fit(y: np.ndarray, X: np.ndarray, family: str) -> Any:
    import statsmodels.api as sm
    from statsmodels.tools.sm_exceptions import (
        ConvergenceWarning,
        DomainWarning,
        PerfectSeparationWarning,
        SingularMatrixWarning,
    )

    fam = sm.families.Binomial() if family == "binomial" else sm.families.Poisson()
    with warnings.catch_warnings():
        warnings.simplefilter("error", PerfectSeparationWarning)
        warnings.simplefilter("ignore", DomainWarning)
        warnings.simplefilter("error", ConvergenceWarning)
        warnings.simplefilter("ignore", RuntimeWarning)
        warnings.simplefilter("error", SingularMatrixWarning)
        try:
            return sm.GLM(y, X, family=fam).fit(maxiter=100, tol=1e-12)
        except SingularMatrixWarning:
            raise DesignError(
                "the model's design is rank-deficient (some terms are aliased): its "
                "coefficients are not all estimable"
            ) from None
        except PerfectSeparationWarning:
            raise DesignError(
                "the levels separate the outcomes perfectly (a level with all 0s or all 1s): "
                "the model's estimates are infinite"
            ) from None
        except ConvergenceWarning:
            raise DesignError("the model fit did not converge") from None
        except (ValueError, np.linalg.LinAlgError) as err:
            raise DesignError(f"the model could not be fitted ({err})") from None


def glm_start(y: np.ndarray, X: np.ndarray, family: str) -> np.ndarray:
    """The GLM's estimates (a start for a mixed model's search)."""
    return np.asarray(_fit(y, X, family).params, dtype=np.float64)


def glm_term_tests(
    y: np.ndarray, X: np.ndarray, index: Mapping[str, Sequence[int]], family: str
) -> dict[str, GlmTerm]:
    """Wald and likelihood-ratio tests of every term (``index``: its columns of ``X``).

    ``family`` is ``binomial`` (``y`` of 0s and 1s) or ``poisson`` (counts).
    Raises :class:`DesignError` when the model cannot be fitted (perfect
    separation, no convergence).
    """
    if family not in ("binomial", "poisson"):
        raise DesignError(f"unknown family {family!r}: binomial or poisson")
    full = _fit(y, X, family)
    beta = np.asarray(full.params, dtype=np.float64)
    cov = np.asarray(full.cov_params(), dtype=np.float64)
    deviance = float(full.deviance)
    rank = int(np.linalg.matrix_rank(X))
    out: dict[str, GlmTerm] = {}
    for term, cols in index.items():
        cols = list(cols)
        keep = [j for j in range(X.shape[1]) if j not in set(cols)]
        q = rank - int(np.linalg.matrix_rank(X[:, keep]))
        if q < 1:
            continue  # aliased with other terms: not estimable
        b = beta[cols]
        v = cov[np.ix_(cols, cols)]
        wald = float(b @ np.linalg.solve(v, b)) if len(cols) else 0.0
        reduced = _fit(y, X[:, keep], family)
        lr = max(float(reduced.deviance) - deviance, 0.0)
        z = coef = ci = None
        if len(cols) == 1:
            coef = float(b[0])
            se = float(np.sqrt(v[0, 0]))
            z = coef / se
            half = float(dist.norm_ppf(0.975)) * se
            ci = (float(np.exp(coef - half)), float(np.exp(coef + half)))
        out[term] = GlmTerm(
            wald,
            q,
            float(dist.chi2_sf(wald, q)),
            lr,
            float(dist.chi2_sf(lr, q)),
            z,
            coef,
            ci,
        )
    return out
