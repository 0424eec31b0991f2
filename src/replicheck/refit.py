"""Refit stage: the analysis as claimed, and the analyses that respect the unit.

* ``as_claimed``: every row a replicate (Student t for two levels, one-way
  ANOVA otherwise), reproduced from the data;
* ``unit_means``: the same test on the means of the experimental units;
* ``mixed_model``: a random intercept for the unit, fitted by REML, with an F
  test whose denominator degrees of freedom are Satterthwaite's
  (Satterthwaite 1946, Biometrics Bulletin 2:110-114; Kuznetsova, Brockhoff &
  Christensen 2017, J. Stat. Softw. 82(13)).

When each treatment level sits in a single unit no test is possible and no
p-value is given.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from replicheck.stats.classic import oneway_anova, two_sample_t
from replicheck.stats.mixed import MixedFit, fit_reml, satterthwaite_test


@dataclass(frozen=True)
class Analysis:
    """One test of the treatment."""

    name: str  # as_claimed | unit_means | mixed_model | no_test
    label: str
    term: str
    level: str  # rows | units
    n_replicates: int
    statistic: float | None  # F (t squared for two levels)
    df: tuple[float, float] | None
    p_value: float | None
    t_statistic: float | None = None
    estimate: float | None = None  # difference of the second level's mean from the first's
    notes: tuple[str, ...] = ()

    def significant(self, alpha: float) -> bool | None:
        """Whether the p-value is below ``alpha`` (None when there is no test)."""
        return None if self.p_value is None else bool(self.p_value < alpha)


@dataclass(frozen=True)
class MixedSummary:
    """What the verdict and clustering stages need from the mixed model."""

    var_unit: float
    var_residual: float
    at_boundary: bool
    converged: bool


@dataclass(frozen=True)
class Refit:
    """All analyses of the treatment and the one the corrected verdict rests on."""

    analyses: tuple[Analysis, ...]
    corrected: str | None  # name of the analysis the verdict rests on; None when no test exists
    mixed: MixedSummary | None

    def get(self, name: str) -> Analysis | None:
        for a in self.analyses:
            if a.name == name:
                return a
        return None


def _plain_test(
    name: str, label: str, term: str, level: str, y: np.ndarray, groups: np.ndarray
) -> Analysis:
    k = int(groups.max()) + 1
    n = int(y.size)
    if k == 2:
        r = two_sample_t(y, groups)
        t = float(r.statistic)
        return Analysis(
            name,
            label,
            term,
            level,
            n,
            t * t,
            (1.0, float(r.df[0])),
            float(r.p_value),
            t_statistic=t,
            estimate=None if r.estimate is None else float(r.estimate),
        )
    r = oneway_anova(y, groups)
    return Analysis(
        name,
        label,
        term,
        level,
        n,
        float(r.statistic),
        (float(r.df[0]), float(r.df[1])),
        float(r.p_value),
    )


def _design(treatment: np.ndarray, k: int) -> np.ndarray:
    X = np.zeros((treatment.size, k))
    X[:, 0] = 1.0
    for j in range(1, k):
        X[:, j] = treatment == j
    return X


def canonical_contrasts(X: np.ndarray, k: int) -> np.ndarray:
    """Contrasts for "all treatment levels equal", whitened so that L (X'X)^-1 L' = I.

    The multi-df Satterthwaite F of Fai & Cornelius (1996) rotates the
    contrasts to the eigenvectors of L C L', so its denominator df depend on
    the basis chosen for the hypothesis (lmerTest's type III contrasts depend
    on the order of the levels). Whitening with respect to (X'X)^-1 fixes the
    basis up to an orthogonal rotation, under which the eigen-contrasts do not
    change: the df then no longer depend on how the levels are named or
    ordered. The F statistic itself is the same for every basis.
    """
    L = np.zeros((k - 1, k))
    L[:, 1:] = np.eye(k - 1)
    if k <= 2:
        return L
    s = L @ np.linalg.solve(X.T @ X, L.T)
    w, v = np.linalg.eigh(s)
    return np.asarray((v / np.sqrt(w)) @ v.T @ L)


def _mixed(
    y: np.ndarray, treatment: np.ndarray, unit: np.ndarray, term: str, labels: list[str]
) -> tuple[Analysis, MixedFit]:
    k = int(treatment.max()) + 1
    X = _design(treatment, k)
    names = ["(Intercept)", *[f"{term}[{labels[j]}]" for j in range(1, k)]]
    fit = fit_reml(y, X, {"unit": unit}, names)
    test = satterthwaite_test(fit, canonical_contrasts(X, k))
    notes = []
    if "unit" in fit.boundary:
        notes.append(
            "the unit variance was estimated at zero, so the mixed model reduces to the "
            "row-level test"
        )
    if not fit.converged:
        notes.append("the REML optimiser reported no convergence")
    t_stat = None
    estimate = None
    if k == 2:
        estimate = float(fit.beta[1])
        t_stat = float(np.sign(estimate) * np.sqrt(test.statistic))
    analysis = Analysis(
        "mixed_model",
        "mixed model: random intercept per unit, REML, Satterthwaite df",
        term,
        "units",
        int(unit.max()) + 1,
        float(test.statistic),
        (float(test.df_num), float(test.df_den)),
        float(test.p_value),
        t_statistic=t_stat,
        estimate=estimate,
        notes=tuple(notes),
    )
    return analysis, fit


def refit(
    y: np.ndarray,
    treatment: np.ndarray,
    treatment_labels: list[str],
    term: str,
    unit: np.ndarray | None,
    confounded: bool,
) -> Refit:
    """Run every analysis of the treatment.

    ``treatment`` and ``unit`` are integer codes 0..k-1 of the analysed rows;
    ``unit`` is None when each row is its own unit.
    """
    analyses = [
        _plain_test("as_claimed", "as claimed: every row a replicate", term, "rows", y, treatment)
    ]
    k = int(treatment.max()) + 1
    if confounded or (unit is not None and int(unit.max()) + 1 - k < 1):
        analyses.append(
            Analysis(
                "no_test",
                "no valid test: each treatment level sits in a single unit",
                term,
                "units",
                k,
                None,
                None,
                None,
                notes=("treatment and unit cannot be separated, so no p-value is given",),
            )
        )
        return Refit(tuple(analyses), None, None)
    if unit is None:
        return Refit(tuple(analyses), "as_claimed", None)
    n_units = int(unit.max()) + 1
    # Unit means: every unit lies in one treatment level (nested), so its level is well defined.
    sums = np.bincount(unit, weights=y, minlength=n_units)
    sizes = np.bincount(unit, minlength=n_units)
    means = sums / sizes
    unit_trt = np.zeros(n_units, dtype=np.int64)
    unit_trt[unit] = treatment
    analyses.append(
        _plain_test(
            "unit_means",
            "unit means: one value per experimental unit",
            term,
            "units",
            means,
            unit_trt,
        )
    )
    mixed_summary = None
    corrected = "unit_means"
    if y.size > n_units:
        mixed, fit = _mixed(y, treatment, unit, term, treatment_labels)
        analyses.append(mixed)
        at_boundary = "unit" in fit.boundary
        mixed_summary = MixedSummary(
            float(fit.components["unit"]),
            float(fit.components["residual"]),
            at_boundary,
            bool(fit.converged),
        )
        if not at_boundary and fit.converged:
            corrected = "mixed_model"
    return Refit(tuple(analyses), corrected, mixed_summary)
