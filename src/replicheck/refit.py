"""Refit stage: the analysis as claimed, and the analyses that respect the unit.

For every term (a treatment, or an interaction of treatments):

* ``as_claimed``: every row a replicate. One treatment: Student t for two
  levels, one-way ANOVA otherwise. Several: ordinary least squares with
  sum-to-zero coded main effects and interactions, F test of each term (the
  "type III" test; balanced designs give the classical ANOVA table);
* ``unit_means``: a one-way test of the term on the means of its experimental
  units;
* ``mixed_model``: random intercepts for every experimental unit found, fitted
  by REML, with an F test whose denominator degrees of freedom are
  Satterthwaite's (Satterthwaite 1946, Biometrics Bulletin 2:110-114;
  Kuznetsova, Brockhoff & Christensen 2017, J. Stat. Softw. 82(13));
* ``strata_anova``: the exact multi-stratum ANOVA when the design is balanced
  and orthogonal;
* ``randomisation``: treatment labels re-assigned among the units;
* ``cluster_robust`` and ``wild_bootstrap``: cross-checks that assume no model
  for the within-unit correlation: CR2 standard errors with Satterthwaite-type
  df, and the wild cluster bootstrap (:mod:`replicheck.stats.robust`);
* ``gee`` (yes/no and count responses): generalised estimating equations with
  an exchangeable working correlation and the bias-reduced covariance
  (:mod:`replicheck.stats.discrete`);
* ``no_test``: when each level of the term sits in a single unit: no p-value.

The analysis the corrected verdict rests on (``TermRefit.corrected``) is chosen
by regime in :func:`replicheck.decisions.verdict_method`, as the calibration
study in docs/calibration.md supports: the exact multi-stratum ANOVA when the
design is balanced and orthogonal; otherwise the mixed model for a continuous
response (the unit means when the unit variance is estimated at zero or REML
fails) and the unit means (proportions or mean counts per unit) for a yes/no or
count response.
"""

from __future__ import annotations

import itertools
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from replicheck.decisions import MethodRegime, verdict_method
from replicheck.numbers import count_text, format_number, p_phrase
from replicheck.partitions import (
    dense_codes,
    group_means,
    is_nested,
    same_partition,
    units_per_level,
)
from replicheck.stats import dist
from replicheck.stats.classic import (
    DesignError,
    TestResult,
    ols_term_f,
    oneway_anova,
    pearson_chi2,
    two_sample_t,
)
from replicheck.stats.discrete import ResponseKind, gee_test
from replicheck.stats.glm import GlmTerm, glm_start, glm_term_tests
from replicheck.stats.glmm import fit_glmm, glmm_term_tests
from replicheck.stats.mixed import MAX_CROSSED_LEVELS, MixedFit, fit_reml, satterthwaite_test
from replicheck.stats.nested import fit_nested_reml, summarise
from replicheck.stats.random_slopes import RandomTerm, fit_random_slopes
from replicheck.stats.randomisation import (
    DEFAULT_SEED,
    MONTE_CARLO_DRAWS,
    RandomisationResult,
    randomisation_test,
)
from replicheck.stats.robust import cr2_test, wild_cluster_bootstrap
from replicheck.stats.strata import MultiStratumAnova, is_balanced_orthogonal, multistratum_anova
from replicheck.vocab import AnalysisName


@dataclass(frozen=True, kw_only=True)
class Analysis:
    """One test of one term."""

    name: AnalysisName
    label: str
    term: str
    level: str  # rows | units
    n_replicates: int
    statistic: float | None  # F (t squared for two levels), or chi-squared when test is chi2
    df: tuple[float, ...] | None  # (numerator, denominator) for F, (df,) for chi2
    p_value: float | None
    t_statistic: float | None = None
    estimate: float | None = None  # second level's mean minus the first's (two levels)
    notes: tuple[str, ...] = ()
    stratum: str | None = None  # error stratum of a multi-stratum ANOVA
    test: str = "F"  # F | chi2

    def significant(self, alpha: float) -> bool | None:
        """Whether the p-value is below ``alpha`` (None when there is no test)."""
        return None if self.p_value is None else bool(self.p_value < alpha)


@dataclass(frozen=True, kw_only=True)
class TermInput:
    """What the refit needs to know about one term."""

    term: str
    factors: tuple[str, ...]
    codes: np.ndarray  # level codes 0..k-1 of the term
    labels: list[str]
    unit: np.ndarray | None  # unit codes, None when each row is its own unit
    unit_name: str | None
    confounded: bool
    values: np.ndarray | None = None  # a number entering with one slope (a covariate or dose)
    degree: int = 1  # poly(x, k): a polynomial of degree k in the number

    @property
    def numeric(self) -> bool:
        """Whether the term is one slope on a number rather than a set of levels."""
        return self.values is not None

    def number_columns(self) -> np.ndarray:
        """The term's columns: the number itself, or for a polynomial the centred powers
        1..k (the same fit and tests as orthogonal polynomials)."""
        assert self.values is not None
        x = self.values.astype(float)
        if self.degree == 1:
            return x.reshape(-1, 1)
        c = x - x.mean()
        return np.column_stack([c**k for k in range(1, self.degree + 1)])


@dataclass(frozen=True)
class UnitVariance:
    """The mixed model's variance estimate for one experimental unit."""

    unit: str
    var_unit: float
    var_residual: float
    at_boundary: bool
    converged: bool


@dataclass(frozen=True)
class TermRefit:
    """All analyses of one term and the one its corrected verdict rests on."""

    term: str
    analyses: tuple[Analysis, ...]
    corrected: AnalysisName | None  # None when no valid test exists
    unit_variance: UnitVariance | None
    randomisation: RandomisationResult | None = None

    def get(self, name: str) -> Analysis | None:
        for a in self.analyses:
            if a.name == name:
                return a
        return None


@dataclass(frozen=True)
class Refit:
    """The refits of every term."""

    terms: tuple[TermRefit, ...]

    @property
    def analyses(self) -> tuple[Analysis, ...]:
        return tuple(a for t in self.terms for a in t.analyses)

    def term(self, name: str) -> TermRefit:
        for t in self.terms:
            if t.term == name:
                return t
        raise KeyError(name)


LABELS = {
    "as_claimed": "as claimed: every row a replicate",
    "unit_means": "unit means: one value per experimental unit",
    "mixed_model": "mixed model: random intercept per unit, REML, Satterthwaite df",
    "no_test": "no valid test: each level sits in a single unit",
    "strata_anova": "multi-stratum ANOVA: each term against the residual of its own stratum",
    "randomisation": "randomisation test: labels re-assigned among units (within blocks)",
    "cluster_robust": "cluster-robust: CR2 errors, Satterthwaite-type df, units as clusters",
    "wild_bootstrap": "wild cluster bootstrap: null imposed, units as clusters",
    "gee": "GEE: exchangeable correlation within units, bias-reduced covariance",
    "within_blocks": "analysis within blocks: every row a replicate, blocks as fixed effects",
    "lack_of_fit": "lack of fit: unit means of each value against the straight line",
    "likelihood_ratio": "as claimed, likelihood-ratio test: every row a replicate",
}
WEIGHT_NAMES = {"webb": "Webb's six-point weights", "rademacher": "Rademacher (+1/-1) weights"}
FAMILY_NAMES = {"binomial": "logistic regression", "poisson": "Poisson regression"}

BOOTSTRAP_DRAWS = 9_999  # wild cluster bootstrap draws (when not enumerated)
# Monte Carlo cross-checks (randomisation, wild bootstrap) cost draws x units. Beyond a
# budget the number of draws shrinks, to no fewer than MIN_MC_DRAWS (a p-value near 0.05
# then has a Monte Carlo standard error of about 0.005); with more units than that
# allows they are not run: the unit-level F and CR2 tests they cross-check are then
# accurate (a chosen budget; see docs/scale.md).
MC_WORK = 40_000_000
MIN_MC_DRAWS = 1_999
MAX_MC_UNITS = MC_WORK // MIN_MC_DRAWS
# The small-sample corrected cluster-robust test (CR2 with the HTZ degrees of freedom)
# for q contrasts among p coefficients over G clusters forms q x q x p x p arrays and
# costs about G q^2 p^2; the wild bootstrap solves a q x q system per draw (B q^3).
# Beyond these bounds (a term with scores of levels) the check is not run and the
# unit-level F, mixed-model and randomisation tests stand (chosen budgets: a few seconds
# and at most about 200 MB per array on a 2-core machine; docs/reliability.md).
ROBUST_WORK = 2_000_000_000
ROBUST_CELLS = 25_000_000


def mc_draws(default: int, n_units: int) -> int:
    """Monte Carlo draws for ``n_units`` units within the work budget (see MC_WORK)."""
    return max(MIN_MC_DRAWS, min(default, MC_WORK // max(n_units, 1)))


def _too_many_units(name: AnalysisName, t: TermInput) -> Analysis:
    n = int(t.unit.max()) + 1 if t.unit is not None else 0
    return _untested(
        name,
        t,
        f"not run: {n} units exceed the Monte Carlo budget ({MAX_MC_UNITS} units); with so "
        "many units the unit-level F and cluster-robust tests are accurate",
    )


MIN_DISCRETE_UNITS = 3  # fewest units per level for a calibrated yes/no or count test
FEW_DISCRETE_UNITS = (
    "with a yes/no or count response and fewer than 3 units in a level, no test on the "
    "units holds its error rate (docs/calibration.md): the verdict gives no corrected p-value"
)


def _too_few_discrete(t: TermInput) -> bool:
    """Too few units for a calibrated yes/no or count test: fewer than 3 in a level, or
    for a number's slope fewer than 6 in all (about 3 on either side of its mean)."""
    if t.numeric:
        return t.unit is not None and int(t.unit.max()) + 1 < 2 * MIN_DISCRETE_UNITS
    return _fewest_units(t) < MIN_DISCRETE_UNITS


def _fewest_units(t: TermInput) -> int:
    """The fewest distinct units in any level of the term."""
    assert t.unit is not None
    return min(int(np.unique(t.unit[t.codes == k]).size) for k in range(len(t.labels)))


UNIT_MEANS_LABELS = {
    "continuous": LABELS["unit_means"],
    "binary": "unit proportions: one proportion per experimental unit",
    "count": "unit mean counts: one mean count per experimental unit",
}


def _plain_test(
    name: AnalysisName, term: str, level: str, y: np.ndarray, groups: np.ndarray
) -> Analysis:
    k = int(groups.max()) + 1
    n = int(y.size)
    if k == 2:
        r = two_sample_t(y, groups)
        t = float(r.statistic)
        est = None if r.estimate is None else float(r.estimate)
        df = (1.0, float(r.df[0]))
        return Analysis(
            name=name,
            label=LABELS[name],
            term=term,
            level=level,
            n_replicates=n,
            statistic=t * t,
            df=df,
            p_value=float(r.p_value),
            t_statistic=t,
            estimate=est,
        )
    r = oneway_anova(y, groups)
    df = (float(r.df[0]), float(r.df[1]))
    return Analysis(
        name=name,
        label=LABELS[name],
        term=term,
        level=level,
        n_replicates=n,
        statistic=float(r.statistic),
        df=df,
        p_value=float(r.p_value),
    )


def _unit_table(
    t: TermInput, y: np.ndarray, blocks: Mapping[str, np.ndarray] | None
) -> tuple[np.ndarray, np.ndarray, list[np.ndarray]]:
    """Unit means, the term level of each unit, and each block that holds whole units."""
    assert t.unit is not None
    means, _ = group_means(t.unit, y)
    n_units = means.size
    level = np.zeros(n_units, dtype=np.int64)
    level[t.unit] = t.codes
    unit_blocks = []
    for codes in (blocks or {}).values():
        if same_partition(codes, t.unit) or not is_nested(t.unit, codes):
            continue
        per = np.zeros(n_units, dtype=np.int64)
        per[t.unit] = codes
        unit_blocks.append(per)
    return means, level, unit_blocks


def _per_unit(unit: np.ndarray, values: np.ndarray) -> np.ndarray:
    """The mean of ``values`` in each unit (the value itself when constant within units)."""
    return group_means(unit, values)[0]


def unit_covariates(t: TermInput, terms: Sequence[TermInput]) -> dict[str, np.ndarray]:
    """The other main effects constant within the units of ``t``, as columns of rows.

    For a categorical ``t``: the numeric terms (its unit-level covariates).
    For a numeric ``t`` (a slope): every other main effect, as the claimed
    regression holds them (a dose given to dams beside the litter size).
    """
    if t.unit is None:
        return {}
    out: dict[str, np.ndarray] = {}
    for o in terms:
        if o is t or len(o.factors) != 1 or (o.values is None and t.values is None):
            continue
        cols = o.number_columns() if o.values is not None else _coded(o.codes, len(o.labels), "sum")
        if cols.shape[1] and all(np.allclose(_per_unit(t.unit, c)[t.unit], c) for c in cols.T):
            out[o.term] = cols
    return out


def _randomise(
    t: TermInput,
    y: np.ndarray,
    blocks: Mapping[str, np.ndarray] | None,
    seed: int,
    covariates: Mapping[str, np.ndarray] | None = None,
) -> RandomisationResult | None:
    """Labels re-assigned among units; unit-level covariates first regressed out of the
    unit means (the residuals are fixed under the null, so the test stays exact)."""
    means, level, unit_blocks = _unit_table(t, y, blocks)
    if np.unique(level).size < 2 or means.size - np.unique(level).size < 1:
        return None
    if covariates:
        assert t.unit is not None
        z = np.column_stack(
            [np.ones(means.size), *(_per_unit(t.unit, c) for v in covariates.values() for c in v.T)]
        )
        means = means - z @ np.linalg.lstsq(z, means, rcond=None)[0]
    within = None
    for b in unit_blocks:  # labels move only within the cells of every block
        within = b if within is None else within * (int(b.max()) + 1) + b
    return randomisation_test(
        means, level, within, seed=seed, draws=mc_draws(MONTE_CARLO_DRAWS, means.size)
    )


def _randomisation_analysis(
    t: TermInput, r: RandomisationResult, covariates: Sequence[str] = ()
) -> Analysis:
    how = (
        f"exact over all {count_text(r.n_assignments)} assignments"
        if r.exact
        else f"Monte Carlo, {r.draws} draws of {count_text(r.n_assignments)} assignments "
        f"(seed {r.seed})"
    )
    name: AnalysisName = "randomisation"
    return Analysis(
        name=name,
        label=LABELS[name],
        term=t.term,
        level="units",
        n_replicates=int(t.unit.max()) + 1 if t.unit is not None else 0,
        statistic=r.statistic if np.isfinite(r.statistic) else None,
        df=None,
        p_value=r.p_value,
        notes=(
            f"{how}; smallest attainable {p_phrase(r.min_attainable_p)}",
            *(
                [
                    "unit means first adjusted for "
                    + " and ".join(f"'{c}'" for c in covariates)
                    + " (regressed out)"
                ]
                if covariates
                else []
            ),
        ),
    )


def _fitted_first(
    unit: np.ndarray,
    unit_blocks: Sequence[np.ndarray],
    covariates: Mapping[str, np.ndarray] | None,
) -> np.ndarray:
    """Columns of the units fitted before a term: intercept, blocks, unit-level covariates."""
    n_units = int(unit.max()) + 1
    return np.hstack(
        [
            np.ones((n_units, 1)),
            *(_coded(b, int(b.max()) + 1, "sum") for b in unit_blocks),
            *(_per_unit(unit, c).reshape(-1, 1) for v in (covariates or {}).values() for c in v.T),
        ]
    )


def _unit_means(
    t: TermInput,
    y: np.ndarray,
    blocks: Mapping[str, np.ndarray] | None = None,
    covariates: Mapping[str, np.ndarray] | None = None,
) -> Analysis:
    """The term tested on one mean per unit; blocks and covariates of whole units first.

    Each unit lies in one level of the term (units are nested in it). A block
    constant within every unit (the unit is nested in the block, as whole plots
    in blocks) is fitted first, so the test is the randomised-block analysis of
    the unit means (in a balanced split plot, the whole-plot F test). So are
    the other numeric terms constant within the units (``covariates``, e.g. a
    litter size beside a dose given to the dam): the analysis of covariance of
    the unit means. A numeric term is tested by the regression of the unit
    means on its value in each unit: its slope has the units' degrees of
    freedom (the units less the intercept, blocks, covariates and the slope).
    """
    means, unit_level, unit_blocks = _unit_table(t, y, blocks)
    n_units = means.size
    covariates = covariates or {}
    if t.values is None and not unit_blocks and not covariates:
        return _plain_test("unit_means", t.term, "units", means, unit_level)
    assert t.unit is not None
    reduced = _fitted_first(t.unit, unit_blocks, covariates)
    if t.values is not None:
        tested = np.column_stack([_per_unit(t.unit, c) for c in t.number_columns().T])
    else:
        tested = _coded(unit_level, int(unit_level.max()) + 1, "sum")
    full = np.hstack([reduced, tested])
    try:
        r = ols_term_f(means, full, reduced)
    except DesignError:
        if t.values is not None:
            raise
        return _plain_test("unit_means", t.term, "units", means, unit_level)
    first = [*(["blocks"] if unit_blocks else []), *(f"'{c}'" for c in covariates)]
    label = LABELS["unit_means"]
    if t.values is not None:
        label += f", regressed on '{t.term}'"
    if first:
        label += f", {' and '.join(first)} fitted first"
    slope = t_stat = None
    if t.values is not None and t.degree == 1:
        slope = float(np.linalg.lstsq(full, means, rcond=None)[0][-1])
        t_stat = float(np.sign(slope) * np.sqrt(max(float(r.statistic), 0.0)))
    return _unit_f("unit_means", label, t, n_units, r, t_statistic=t_stat, estimate=slope)


def _unit_f(
    name: AnalysisName, label: str, t: TermInput, n_units: int, r: TestResult, **extra: Any
) -> Analysis:
    """A unit-level analysis from an F test result."""
    df = (float(r.df[0]), float(r.df[1]))
    return Analysis(
        name=name,
        label=label,
        term=t.term,
        level="units",
        n_replicates=n_units,
        statistic=float(r.statistic),
        df=df,
        p_value=float(r.p_value),
        **extra,
    )


def _lack_of_fit(
    t: TermInput,
    y: np.ndarray,
    blocks: Mapping[str, np.ndarray] | None,
    covariates: Mapping[str, np.ndarray] | None,
) -> Analysis | None:
    """Whether the unit means depart from the straight line in a number's values.

    The level-by-level analysis of a dose set against its slope: the means of
    the units regressed on the dose, then on the dose as categories (blocks and
    unit-level covariates first in both); the F test of the extra k - 2
    parameters, on the units' residual. None when the number has fewer than
    three values or the units leave no residual.
    """
    if t.values is None or t.unit is None or len(t.labels) < t.degree + 2:
        return None
    means, unit_level, unit_blocks = _unit_table(t, y, blocks)
    n_units = means.size
    line = np.hstack(
        [
            _fitted_first(t.unit, unit_blocks, covariates),
            *(_per_unit(t.unit, c).reshape(-1, 1) for c in t.number_columns().T),
        ]
    )
    full = np.hstack([line, _coded(unit_level, len(t.labels), "sum")])
    try:
        r = ols_term_f(means, full, line)
    except DesignError:
        return None
    name: AnalysisName = "lack_of_fit"
    why = ("departure from a straight line; not a test of the effect itself",)
    return _unit_f(name, LABELS[name], t, n_units, r, notes=why)


def whitened(L: np.ndarray, X: np.ndarray) -> np.ndarray:
    """The rows of ``L`` re-expressed so that L (X'X)^-1 L' = I.

    The multi-df Satterthwaite F of Fai & Cornelius (1996) rotates the
    contrasts to the eigenvectors of L C L', so its denominator df depend on
    the basis chosen for the hypothesis (lmerTest's type III contrasts depend
    on the order of the levels). Whitening with respect to (X'X)^-1 fixes the
    basis up to an orthogonal rotation, under which the eigen-contrasts do not
    change: the df then do not depend on how levels are named or ordered. The
    F statistic is the same for every basis.
    """
    if L.shape[0] == 1:
        return L
    s = L @ np.linalg.pinv(X.T @ X) @ L.T
    w, v = np.linalg.eigh(s)
    return np.asarray((v / np.sqrt(w)) @ v.T @ L)


def _coded(codes: np.ndarray, k: int, coding: str) -> np.ndarray:
    """Treatment (first level as baseline) or sum-to-zero (last level -1) coding."""
    cols = np.zeros((codes.size, k - 1))
    for j in range(k - 1):
        if coding == "treatment":
            cols[:, j] = codes == j + 1
        else:
            cols[:, j] = (codes == j).astype(float) - (codes == k - 1)
    return cols


def with_blocks(X: np.ndarray, blocks: Sequence[np.ndarray]) -> np.ndarray:
    """The design with every block added as a sum-to-zero coded fixed effect."""
    if not blocks:
        return X
    return np.hstack([X, *(_coded(b, int(b.max()) + 1, "sum") for b in blocks)])


def design_matrix(
    terms: Sequence[TermInput], coding: str
) -> tuple[np.ndarray, dict[str, list[int]], list[str]]:
    """Intercept, main effects and interactions; column indices of each term; names."""
    n = terms[0].codes.size
    blocks: dict[str, np.ndarray] = {}
    main = {t.factors[0]: t for t in terms if len(t.factors) == 1}

    def columns_of(t: TermInput) -> np.ndarray:
        if t.values is not None:  # a number: one slope on its values, as written
            return t.number_columns()
        return _coded(t.codes, len(t.labels), coding)

    for t in terms:
        if len(t.factors) == 1:
            blocks[t.term] = columns_of(t)
        else:
            block = np.ones((n, 1))
            for f in t.factors:
                part = columns_of(main[f])
                block = (block[:, :, None] * part[:, None, :]).reshape(n, -1)
            blocks[t.term] = block
    columns = [np.ones((n, 1))]
    index: dict[str, list[int]] = {}
    names = ["(Intercept)"]
    at = 1
    for term, block in blocks.items():
        columns.append(block)
        index[term] = list(range(at, at + block.shape[1]))
        names += [f"{term}[{j}]" for j in range(block.shape[1])]
        at += block.shape[1]
    return np.hstack(columns), index, names


def model_design(
    terms: Sequence[TermInput],
) -> tuple[np.ndarray, dict[str, list[int]], list[str]]:
    """The terms' design matrix as every row-level model here codes it: treatment coding
    for one term (its coefficient is the difference of the second level from the first,
    as a t test gives it), sum-to-zero for several (so that no term's test depends on
    another's baseline level)."""
    return design_matrix(terms, "treatment" if len(terms) == 1 else "sum")


def row_model_size(
    terms: Sequence[TermInput], fixed_blocks: Sequence[np.ndarray] = ()
) -> tuple[int, dict[str, int]]:
    """The parameters of the row-level model of the terms and the fixed blocks (the rank
    of the design the analysis as claimed fits), and the columns of each term."""
    X, index, _ = model_design(terms)
    rank = int(np.linalg.matrix_rank(with_blocks(X, fixed_blocks)))
    return rank, {term: len(cols) for term, cols in index.items()}


def _contrast(index: list[int], p: int) -> np.ndarray:
    L = np.zeros((len(index), p))
    L[np.arange(len(index)), index] = 1.0
    return L


def _rss_rank(y: np.ndarray, X: np.ndarray) -> tuple[float, int]:
    coef = np.linalg.lstsq(X, y, rcond=None)[0]
    resid = y - X @ coef
    return float(resid @ resid), int(np.linalg.matrix_rank(X))


def _type2_extra(
    y: np.ndarray,
    X: np.ndarray,
    index: Mapping[str, list[int]],
    factor_sets: Mapping[str, frozenset[str]],
    t: TermInput,
) -> tuple[float, int]:
    """Type II extra sum of squares of term ``t`` and its df (the rank it adds).

    The base model holds every column except those of the terms whose factors
    include all of ``t``'s (``t`` and the interactions containing it).
    """
    mine = factor_sets[t.term]
    dropped = {j for key, cols in index.items() if mine <= factor_sets[key] for j in cols}
    base = [j for j in range(X.shape[1]) if j not in dropped]
    with_t = sorted([*base, *index[t.term]])
    rss_base, rank_base = _rss_rank(y, X[:, base])
    rss_t, rank_t = _rss_rank(y, X[:, with_t])
    return max(rss_base - rss_t, 0.0), rank_t - rank_base


def _ols_term_tests(
    y: np.ndarray, X: np.ndarray, index: dict[str, list[int]], terms: Sequence[TermInput]
) -> list[Analysis]:
    """Row-level F test of every term in the OLS fit of all terms."""
    xtx_inv = np.linalg.pinv(X.T @ X)
    beta = xtx_inv @ (X.T @ y)
    resid = y - X @ beta
    rank = int(np.linalg.matrix_rank(X))
    df_res = y.size - rank

    def untested(t: TermInput, why: str) -> Analysis:
        n = int(y.size)
        return _without_test("as_claimed", LABELS["as_claimed"], t.term, "rows", n, why)

    if df_res < 1:  # as many parameters as rows: no residual to test against
        why = "the claimed model has as many parameters as rows: no residual, no test"
        return [untested(t, why) for t in terms]
    s2 = float(resid @ resid) / df_res
    factor_sets = {key: frozenset(key.split(":")) for key in index}
    factor_sets.update({t.term: frozenset(t.factors) for t in terms})
    out = []
    for t in terms:
        others = [j for j in range(X.shape[1]) if j not in set(index[t.term])]
        if int(np.linalg.matrix_rank(X[:, others])) == rank:
            why = "aliased with other terms or blocks of the claimed model: not estimable there"
            out.append(untested(t, why))
            continue
        L = _contrast(index[t.term], X.shape[1])
        lb = L @ beta
        q = L.shape[0]
        notes: tuple[str, ...] = ()
        if rank == X.shape[1]:
            f = float(lb @ np.linalg.solve(L @ xtx_inv @ L.T, lb)) / q / s2
        else:
            # A design matrix short of full rank (an empty cell of a factorial, a level
            # met only with one level of another factor): not every coefficient is
            # estimable, so each term is tested as the type II ANOVA does (marginality):
            # the extra sum of squares of adding it to every term that does not contain
            # it, on the df it adds to the rank, over the full model's residual.
            ss, estimable = _type2_extra(y, X, index, factor_sets, t)
            f = ss / estimable / s2
            if estimable < q:
                notes = (
                    f"partly aliased with other terms of the claimed model: tested on the "
                    f"{estimable} df the data can estimate, not {q} (type II extra sum of "
                    "squares)",
                )
            else:
                notes = (
                    "the claimed model's design is rank-deficient: tested by the type "
                    "II extra sum of squares",
                )
            q = estimable
        p = float(dist.f_sf(f, q, df_res))
        name: AnalysisName = "as_claimed"
        slope = q == 1 and t.numeric
        out.append(
            Analysis(
                name=name,
                label=LABELS[name],
                term=t.term,
                level="rows",
                n_replicates=int(y.size),
                statistic=f,
                df=(float(q), float(df_res)),
                p_value=p,
                t_statistic=float(np.sign(lb[0]) * np.sqrt(f)) if slope else None,
                estimate=float(lb[0]) if slope else None,
                notes=notes,
            )
        )
    return out


def within_block_tests(
    y: np.ndarray, terms: Sequence[TermInput], blocks: Mapping[str, np.ndarray]
) -> dict[str, Analysis]:
    """Each term's row-level test with every block as a fixed effect.

    The analysis a paired t test or a randomised-block (or repeated-measures)
    ANOVA reports: with pairs as blocks, the F of a two-level term is the
    square of the paired t. Used to recognise such a reported result, not for
    the verdict.
    """
    if not blocks:
        return {}
    X, index, _ = model_design(terms)
    width = X.shape[1] + sum(int(b.max()) for b in blocks.values())
    if y.size * width > ROBUST_CELLS:
        # only used to recognise a reported result; a dense design of blocks with
        # thousands of levels would not fit in memory (docs/reliability.md)
        return {}
    x = with_blocks(X, list(blocks.values()))
    if int(np.linalg.matrix_rank(x)) >= y.size:
        return {}
    name: AnalysisName = "within_blocks"
    return {
        a.term: replace(a, name=name, label=LABELS[name])
        for a in _ols_term_tests(y, x, index, terms)
        if a.statistic is not None
    }


def _random_units(terms: Sequence[TermInput], n: int) -> dict[str, np.ndarray]:
    """One random intercept per distinct grouping of the rows (the same grouping once)."""
    units: dict[str, np.ndarray] = {}
    for t in terms:
        if t.unit is None or t.unit_name is None or t.confounded:
            continue
        if int(t.unit.max()) + 1 >= n or t.unit_name in units:
            continue
        if any(same_partition(t.unit, other) for other in units.values()):
            continue
        units[t.unit_name] = t.unit
    return units


def _strata_table(
    y: np.ndarray,
    X: np.ndarray,
    index: Mapping[str, list[int]],
    terms: Sequence[TermInput],
    random: Mapping[str, np.ndarray],
) -> MultiStratumAnova | None:
    """The exact multi-stratum ANOVA when the design is balanced and orthogonal, else None."""
    if not random:
        return None
    columns = [(t.term, X[:, index[t.term]]) for t in terms]
    try:
        if not is_balanced_orthogonal(random, columns):
            return None
        return multistratum_anova(y, random, columns)
    except DesignError:
        return None


def _strata_analysis(table: MultiStratumAnova, t: TermInput, n: int) -> Analysis | None:
    """The term's row of the multi-stratum table, when it lies wholly in one stratum."""
    rows = [r for r in table.terms if r.term == t.term]
    if len(rows) != 1 or rows[0].efficiency < 1 - 1e-9:
        return None
    r = rows[0]
    name: AnalysisName = "strata_anova"
    level = "rows" if r.stratum == "residual" else "units"
    n_rep = n if t.unit is None or level == "rows" else int(t.unit.max()) + 1
    testable = (
        r.f_statistic is not None and r.error_df is not None and bool(np.isfinite(r.f_statistic))
    )  # an error stratum with no variation at all (yes/no data) gives no test
    return Analysis(
        name=name,
        label=LABELS[name],
        term=t.term,
        level=level,
        n_replicates=n_rep,
        statistic=float(r.f_statistic) if testable and r.f_statistic is not None else None,
        df=(float(r.df), float(r.error_df)) if testable and r.error_df is not None else None,
        p_value=float(r.p_value) if testable and r.p_value is not None else None,
        notes=()
        if testable
        else (
            f"the '{r.stratum}' stratum has no residual degrees of freedom or no variation: "
            "untestable",
        ),
        stratum=r.stratum,
    )


def _distinct(strata: Mapping[str, np.ndarray], n: int) -> dict[str, np.ndarray]:
    out: dict[str, np.ndarray] = {}
    for name, codes in strata.items():
        if int(codes.max()) + 1 >= n or any(same_partition(codes, c) for c in out.values()):
            continue
        out[name] = codes
    return out


ENGINE_NOTES = {
    "summaries": "fitted from per-unit sums (nested random intercepts: one pass over the rows)",
    "general": "fitted by the general REML algorithm (groupings not nested in one chain)",
    "": "",
}


def nested_chain(random: Mapping[str, np.ndarray]) -> list[str] | None:
    """The random groupings ordered outermost first when each is nested in the one
    before it (a chain such as plate > well), else None."""
    names = sorted(random, key=lambda k: int(random[k].max()))
    for outer, inner in itertools.pairwise(names):
        if not is_nested(random[inner], random[outer]):
            return None
    return names


def fit_mixed(
    y: np.ndarray,
    X: np.ndarray,
    random: Mapping[str, np.ndarray],
    names: Sequence[str],
    max_levels: int = MAX_CROSSED_LEVELS,
) -> tuple[MixedFit, str]:
    """REML fit of the random intercepts, and which engine fitted it.

    Nested chains (the common case) are fitted from per-unit summaries
    (:mod:`replicheck.stats.nested`), whose cost after one pass over the rows
    depends on the number of units only; crossed groupings by the general
    algorithm (:func:`replicheck.stats.mixed.fit_reml`). Both give the same fit
    where both apply (tests/test_stats_nested.py).
    """
    chain = nested_chain(random)
    if chain is None:
        return fit_reml(y, X, random, names, max_levels), "general"
    levels = [dense_codes(random[k]) for k in chain]
    summaries = summarise(y, X, levels, chain, names)
    return fit_nested_reml(summaries), "summaries"


def _mixed_analysis(
    fit: MixedFit,
    X: np.ndarray,
    index: list[int],
    t: TermInput,
    rname: str | None,
    n_rep: int,
    two: bool,
) -> Analysis:
    L = _contrast(index, X.shape[1])
    test = satterthwaite_test(fit, whitened(L, X))
    notes = []
    if rname is not None and rname in fit.boundary:
        notes.append(
            f"the variance between {rname} units was estimated at zero, so the mixed "
            "model treats their rows as independent"
        )
    if not fit.converged:
        notes.append("the REML optimiser reported no convergence")
    t_stat = estimate = None
    if (two or t.numeric) and len(index) == 1:
        estimate = float(fit.beta[index[0]])
        t_stat = float(np.sign(estimate) * np.sqrt(test.statistic))
    name: AnalysisName = "mixed_model"
    return Analysis(
        name=name,
        label=LABELS[name],
        term=t.term,
        level="units" if rname is not None else "rows",
        n_replicates=n_rep,
        statistic=float(test.statistic),
        df=(float(test.df_num), float(test.df_den)),
        p_value=float(test.p_value),
        t_statistic=t_stat,
        estimate=estimate,
        notes=tuple(notes),
    )


def _claimed_mixed(
    y: np.ndarray,
    X: np.ndarray,
    index: Mapping[str, list[int]],
    terms: Sequence[TermInput],
    random: Mapping[str, np.ndarray],
    row_level: Sequence[Analysis],
    two: bool,
    slopes: Sequence[RandomTerm] = (),
    max_levels: int = MAX_CROSSED_LEVELS,
) -> list[Analysis]:
    """The claimed mixed model's test of every term (REML, Satterthwaite df).

    ``slopes`` are the claimed random terms with slopes (fitted with the random
    intercepts by :func:`replicheck.stats.random_slopes.fit_random_slopes`).
    When the model cannot be fitted, the row-level tests stand, with a note
    saying why.
    """
    names = [f"x{j}" for j in range(X.shape[1])]
    parts = []
    if random:
        parts.append(f"random intercepts for {', '.join(random)}")
    if slopes:
        parts.append(f"random {' and '.join(s.name for s in slopes)}")
    label = f"as claimed: mixed model, {'; '.join(parts)} (REML, Satterthwaite df)"
    known, random = known_groupings({**random, **{s.name: s.codes for s in slopes}})
    slopes = [RandomTerm(s.name, random.pop(s.name), s.columns[known], s.diagonal) for s in slopes]
    y, X = y[known], X[known]
    dropped = (
        [
            f"{int((~known).sum())} rows with a missing grouping value left out, as mixed-model "
            "software does by default"
        ]
        if not known.all()
        else []
    )
    try:
        if y.size <= X.shape[1]:
            raise DesignError(
                f"only {y.size} rows have a value of every claimed grouping, not more than "
                f"the {X.shape[1]} fixed-effect parameters"
            )
        if slopes:
            intercepts = [
                RandomTerm(g, codes, np.ones((y.size, 1)))
                for g, codes in _distinct(random, int(y.size)).items()
            ]
            fit = fit_random_slopes(y, X, [*intercepts, *slopes], names)
        else:
            fit, _ = fit_mixed(y, X, _distinct(random, int(y.size)) or random, names, max_levels)
    except DesignError as err:
        why = f"the claimed mixed model could not be fitted ({err}); the row-level test is shown"
        return [replace(a, notes=(*a.notes, why)) for a in row_level]
    out = []
    for t in terms:
        a = _mixed_analysis(fit, X, index[t.term], t, None, int(y.size), two)
        notes = [f"the variance of {g} was estimated at zero" for g in random if g in fit.boundary]
        if slopes and fit.boundary:
            notes.append("some random-effect variance was estimated at zero (a singular fit)")
        out.append(replace(a, name="as_claimed", label=label, notes=(*a.notes, *notes, *dropped)))
    return out


def _claimed_glm(
    y: np.ndarray,
    X: np.ndarray,
    index: Mapping[str, list[int]],
    terms: Sequence[TermInput],
    family: str,
) -> tuple[list[Analysis], dict[str, Analysis]]:
    """The claimed logistic or Poisson regression: each term's Wald chi-squared (with its
    z for one coefficient) and, apart, its likelihood-ratio chi-squared."""
    what = FAMILY_NAMES[family]
    label = f"as claimed: {what}, every row a replicate (Wald test)"
    n = int(y.size)
    try:
        tests = glm_term_tests(y, X, index, family)
    except DesignError as err:
        why = f"the claimed {what} could not be fitted: {err}"
        return [_without_test("as_claimed", label, t.term, "rows", n, why) for t in terms], {}
    claimed: list[Analysis] = []
    ratio: dict[str, Analysis] = {}
    for t in terms:
        g = tests.get(t.term)
        if g is None:
            why = "aliased with other terms of the claimed model: not estimable there"
            claimed.append(_without_test("as_claimed", label, t.term, "rows", n, why))
            continue
        claimed.append(_wald_analysis(label, t, n, g, family, ()))
        name: AnalysisName = "likelihood_ratio"
        ratio[t.term] = Analysis(
            name=name,
            label=f"as claimed: {what}, every row a replicate (likelihood-ratio test)",
            term=t.term,
            level="rows",
            n_replicates=n,
            statistic=g.lr_chi2,
            df=(float(g.df),),
            p_value=g.lr_p,
            test="chi2",
        )
    return claimed, ratio


def _claimed_glmm(
    y: np.ndarray,
    X: np.ndarray,
    index: Mapping[str, list[int]],
    terms: Sequence[TermInput],
    family: str,
    random: Mapping[str, np.ndarray],
) -> list[Analysis]:
    """The claimed mixed logistic or Poisson model (random intercepts, Laplace): Wald tests."""
    what = FAMILY_NAMES[family]
    label = (
        f"as claimed: mixed {what}, random intercepts for {', '.join(random)} "
        "(Laplace approximation, Wald test)"
    )
    known, random = known_groupings(random)
    y, X = y[known], X[known]
    n = int(y.size)
    notes: tuple[str, ...] = ()
    if not known.all():
        notes = (
            f"{int((~known).sum())} rows with a missing grouping value left out, as mixed-model "
            "software does by default",
        )
    try:
        start = glm_start(y, X, family)
        fit = fit_glmm(y, X, _distinct(random, n) or random, family, start)
        tests = glmm_term_tests(fit, index)
    except DesignError as err:
        why = f"the claimed mixed {what} could not be fitted: {err}"
        return [_without_test("as_claimed", label, t.term, "rows", n, why) for t in terms]
    return [_wald_analysis(label, t, n, tests[t.term], family, notes) for t in terms]


def _wald_analysis(
    label: str, t: TermInput, n: int, g: GlmTerm, family: str, notes: tuple[str, ...]
) -> Analysis:
    """A claimed logistic or Poisson model's Wald test of a term, with its ratio when one
    coefficient."""
    if g.ratio_ci is not None and g.coefficient is not None:
        kind = "odds" if family == "binomial" else "rate"
        notes = (
            *notes,
            f"{kind} ratio {np.exp(g.coefficient):.4g} (95% Wald interval "
            f"{g.ratio_ci[0]:.4g} to {g.ratio_ci[1]:.4g})",
        )
    return Analysis(
        name="as_claimed",
        label=label,
        term=t.term,
        level="rows",
        n_replicates=n,
        statistic=g.wald_chi2,
        df=(float(g.df),),
        p_value=g.wald_p,
        t_statistic=g.z,
        estimate=g.coefficient,
        notes=notes,
        test="chi2",
    )


def known_groupings(
    random: Mapping[str, np.ndarray],
) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """The rows where every grouping is known (code >= 0), and the groupings recoded there."""
    known = np.ones(next(iter(random.values())).size, dtype=bool)
    for codes in random.values():
        known &= codes >= 0
    return known, {name: dense_codes(codes[known]) for name, codes in random.items()}


def _row_chi2(t: TermInput, y: np.ndarray) -> Analysis:
    """Pearson's chi-squared test of a yes/no response, every row a trial."""
    r = pearson_chi2(y, t.codes)
    name: AnalysisName = "as_claimed"
    return Analysis(
        name=name,
        label="as claimed: every row a replicate (Pearson chi-squared)",
        term=t.term,
        level="rows",
        n_replicates=int(y.size),
        statistic=float(r.statistic),
        df=(float(r.df[0]),),
        p_value=float(r.p_value),
        test="chi2",
    )


def _cluster_design(
    X: np.ndarray, t: TermInput, blocks: Mapping[str, np.ndarray] | None
) -> np.ndarray:
    """The model's columns plus, as fixed effects, the blocks that hold whole units."""
    assert t.unit is not None
    extra = [
        _coded(b, int(b.max()) + 1, "sum")
        for b in (blocks or {}).values()
        if not same_partition(b, t.unit) and is_nested(t.unit, b) and int(b.max()) > 0
    ]
    if not extra:
        return X
    full = np.hstack([X, *extra])
    return full if np.linalg.matrix_rank(full) == full.shape[1] else X


def _canonical_units(unit: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Unit codes renumbered by the unit's distance from the grand mean, then its size.

    The wild bootstrap draws one weight per unit in code order; numbering the
    units canonically makes its p-value the same whatever the units are called,
    however the rows are ordered and under an affine change of the response
    (as for the randomisation test). Exact ties keep the given order.
    """
    means, sizes = group_means(unit, y)
    n_units = means.size
    spread = float(np.std(y)) or 1.0
    distance = np.round(np.abs(means - y.mean()) / spread, 12)
    order = np.lexsort((sizes, distance))
    rank = np.empty(n_units, dtype=np.int64)
    rank[order] = np.arange(n_units)
    return rank[unit]


class _SkipBootstrap(Exception):
    """The wild bootstrap is over the Monte Carlo budget."""


class _SkipRobust(Exception):
    """A cluster-robust check is over its work bound (already recorded as untested)."""


# From this many units in every level of a term, the wild cluster bootstrap is not run:
# the calibration study (docs/calibration.md) finds the small-sample CR2 test at its
# level for every number of units, and the bootstrap near it from 10 units per level
# and at it by 30, the largest number studied; past that point the two agree up to the
# bootstrap's own Monte Carlo error, so its draws (the costliest cross-check: draws x
# units) add nothing the CR2 row does not already say.
BOOTSTRAP_SETTLED_UNITS = 30


def _bootstrap_settled(t: TermInput) -> bool:
    """Whether every level of the term has enough units for CR2 to settle the check."""
    if t.unit is None:
        return False
    if t.numeric:
        return int(t.unit.max()) + 1 >= 2 * BOOTSTRAP_SETTLED_UNITS
    k = int(t.codes.max()) + 1
    return int(units_per_level(t.unit, t.codes, k).min()) >= BOOTSTRAP_SETTLED_UNITS


def _without_test(
    name: AnalysisName, label: str, term: str, level: str, n_replicates: int, why: str
) -> Analysis:
    """An analysis that gives no test, and why (its statistic, df and p are None)."""
    return Analysis(
        name=name,
        label=label,
        term=term,
        level=level,
        n_replicates=n_replicates,
        statistic=None,
        df=None,
        p_value=None,
        notes=(why,),
    )


def _untested(name: AnalysisName, t: TermInput, why: str) -> Analysis:
    n_rep = int(t.unit.max()) + 1 if t.unit is not None else 0
    return _without_test(name, LABELS[name], t.term, "units", n_rep, why)


def _cross_checks(
    y: np.ndarray,
    X: np.ndarray,
    index: list[int],
    t: TermInput,
    blocks: Mapping[str, np.ndarray] | None,
    kind: ResponseKind,
    seed: int,
) -> list[Analysis]:
    """CR2, the wild cluster bootstrap and (yes/no or count responses) GEE, units as clusters."""
    assert t.unit is not None
    Xc = _cluster_design(X, t, blocks)
    L = _contrast(index, Xc.shape[1])
    n_units = int(t.unit.max()) + 1
    out: list[Analysis] = []
    q, p = int(L.shape[0]), int(L.shape[1])
    if n_units * q * q * p * p > ROBUST_WORK or max(q * q * p * p, n_units * q * q) > ROBUST_CELLS:
        why = (
            f"not run: {q} contrasts among {p} coefficients over {n_units} units pass the "
            "work bound of the small-sample cluster-robust test (its cost grows as units x "
            "contrasts^2 x coefficients^2); the unit-level tests stand"
        )
        out.append(_untested("cluster_robust", t, why))

    def unit_level(
        name: AnalysisName,
        stat: float,
        df: tuple[float, ...] | None,
        p: float,
        t_statistic: float | None = None,
        estimate: float | None = None,
        notes: tuple[str, ...] = (),
        test: str = "F",
    ) -> None:
        out.append(
            Analysis(
                name=name,
                label=LABELS[name],
                term=t.term,
                level="units",
                n_replicates=n_units,
                statistic=stat,
                df=df,
                p_value=p,
                t_statistic=t_statistic,
                estimate=estimate,
                notes=notes,
                test=test,
            )
        )

    try:
        if out:
            raise _SkipRobust
        r = cr2_test(y, Xc, t.unit, L)
        unit_level(
            "cluster_robust",
            float(r.statistic),
            (float(r.df_num), float(r.df_den)),
            float(r.p_value),
            t_statistic=r.t_statistic,
            estimate=r.estimate,
        )
    except _SkipRobust:
        pass
    except DesignError as err:
        out.append(_untested("cluster_robust", t, f"not computed: {err}"))
    draws = mc_draws(BOOTSTRAP_DRAWS, n_units)
    try:
        if draws * q**3 > ROBUST_WORK:
            out.append(
                _untested(
                    "wild_bootstrap",
                    t,
                    f"not run: {q} contrasts pass the work bound of the bootstrap (its cost "
                    "grows as draws x contrasts^3); the unit-level tests stand",
                )
            )
            raise _SkipRobust
        if n_units > MAX_MC_UNITS:
            raise _SkipBootstrap
        if _bootstrap_settled(t):
            out.append(
                _untested(
                    "wild_bootstrap",
                    t,
                    f"not run: with at least {BOOTSTRAP_SETTLED_UNITS} units in every level "
                    "the cluster-robust (CR2) test holds its level (docs/calibration.md), and "
                    "the bootstrap would only repeat it with Monte Carlo error",
                )
            )
            raise _SkipRobust
        b = wild_cluster_bootstrap(
            y,
            Xc,
            _canonical_units(t.unit, y),
            L,
            draws=draws,
            seed=seed,
        )
        how = (
            f"all {b.draws:,} sign patterns"
            if b.enumerated
            else f"{b.draws:,} draws, {WEIGHT_NAMES.get(b.weights, b.weights)} (seed {b.seed})"
        )
        if b.undefined:
            how += (
                f"; {b.undefined} of them left out: their weights cancel the contrast and its "
                "variance (the statistic is 0/0)"
            )
        unit_level("wild_bootstrap", float(b.statistic), None, float(b.p_value), notes=(how,))
    except _SkipRobust:
        pass
    except _SkipBootstrap:
        out.append(_too_many_units("wild_bootstrap", t))
    except DesignError as err:
        out.append(_untested("wild_bootstrap", t, f"not computed: {err}"))
    if kind in ("binary", "count"):
        name: AnalysisName = "gee"
        family = "binomial" if kind == "binary" else "poisson"
        try:
            g = gee_test(y, Xc, t.unit, L, family)
            notes = [f"{family} family, working correlation {format_number(g.working_correlation)}"]
            if not g.converged:
                notes.append("the GEE fit did not converge")
            unit_level(
                name,
                float(g.statistic),
                (float(g.df_num), float(g.df_den)) if g.df_den is not None else (float(g.df_num),),
                float(g.p_value),
                estimate=g.estimate,
                notes=tuple(notes),
                test="F" if g.df_den is not None else "chi2",
            )
        except DesignError as err:
            out.append(_untested(name, t, f"not computed: {err}"))
    return out


def refit(
    y: np.ndarray,
    terms: Sequence[TermInput],
    strata: Mapping[str, np.ndarray] | None = None,
    blocks: Mapping[str, np.ndarray] | None = None,
    fixed_blocks: Sequence[np.ndarray] = (),
    seed: int = DEFAULT_SEED,
    kind: ResponseKind = "continuous",
    row_chi2: bool | None = None,
    claimed_random: Mapping[str, np.ndarray] | None = None,
    family: str | None = None,
    claimed_slopes: Sequence[RandomTerm] = (),
    crossed_levels: int = MAX_CROSSED_LEVELS,
) -> Refit:
    """Run every analysis of every term.

    With one term the row-level test is Student's t or one-way ANOVA and the
    mixed model uses treatment coding (its estimate is the difference of the
    second level from the first); with several, all tests come from models
    holding every term, sum-to-zero coded. ``strata`` are the random
    groupings of the design (units, blocks, sub-units) as codes; by default
    the terms' units. ``blocks`` are the strata that are blocks (crossed
    with the treatments); the unit-means test fits those that hold whole units.
    ``fixed_blocks`` are blocks the claimed model held as fixed effects: they
    enter the row-level (as claimed) model. ``seed`` drives the Monte Carlo
    randomisation test when exact enumeration is too large and the wild
    cluster bootstrap. ``kind`` is the response's kind (continuous, binary,
    count): it selects GEE as a cross-check and the analysis the corrected
    verdict rests on. ``row_chi2`` makes the row-level test of a single term
    on a yes/no response Pearson's chi-squared (default: for binary responses).
    ``claimed_random`` are the groupings the claimed model holds as random
    intercepts: the analysis as claimed is then that mixed model (REML,
    Satterthwaite df), fitted as claimed whatever the units are. ``family``
    (binomial or poisson) makes the analysis as claimed a logistic or Poisson
    regression of the rows (Wald tests; the likelihood-ratio test beside it);
    a claimed mixed version is judged by its random terms, not fitted.
    """
    n = int(y.size)
    single = len(terms) == 1
    X, index, names = model_design(terms)
    if fixed_blocks:
        x_rows = with_blocks(X, fixed_blocks)
        claimed = [
            replace(a, label=LABELS["as_claimed"] + ", blocks as fixed effects")
            for a in _ols_term_tests(y, x_rows, index, terms)
        ]
    elif single and not terms[0].numeric:
        t0 = terms[0]
        use_chi2 = kind == "binary" and (row_chi2 is None or row_chi2)
        row = _row_chi2(t0, y) if use_chi2 else None
        claimed = [row or _plain_test("as_claimed", t0.term, "rows", y, t0.codes)]
    else:
        claimed = _ols_term_tests(y, X, index, terms)
    ratio_tests: dict[str, Analysis] = {}
    if family is not None:
        # main effects alone: treatment coding, so that a two-level term's coefficient is
        # the log odds (or rate) ratio of its second level to its first, as printed
        x_glm, index_glm, _ = (
            design_matrix(terms, "treatment")
            if all(len(t.factors) == 1 for t in terms)
            else (X, index, names)
        )
        claimed, ratio_tests = _claimed_glm(
            y, with_blocks(x_glm, fixed_blocks), index_glm, terms, family
        )
        if claimed_slopes:
            why = (
                f"the claimed mixed {FAMILY_NAMES[family]} with random slopes is not fitted "
                "here: its row-level fit is shown, and where its random effects sit is judged"
            )
            claimed = [replace(a, notes=(*a.notes, why)) for a in claimed]
        elif claimed_random:
            claimed, ratio_tests = (
                _claimed_glmm(
                    y, with_blocks(x_glm, fixed_blocks), index_glm, terms, family, claimed_random
                ),
                {},
            )
    elif claimed_random or claimed_slopes:
        x_claimed = with_blocks(X, fixed_blocks)
        claimed = _claimed_mixed(
            y,
            x_claimed,
            index,
            terms,
            claimed_random or {},
            claimed,
            single,
            claimed_slopes,
            crossed_levels,
        )
    random = _random_units(terms, n) if strata is None else _distinct(strata, n)
    fit: MixedFit | None = None
    not_fitted = None
    engine = None
    if random:
        try:
            fit, engine = fit_mixed(y, X, random, names, crossed_levels)
        except DesignError as err:
            not_fitted = f"the mixed model could not be fitted ({err}); the unit means are used"
    table = _strata_table(y, X, index, terms, random)
    out: list[TermRefit] = []
    for t, row_test in zip(terms, claimed, strict=True):
        analyses = [row_test, *([ratio_tests[t.term]] if t.term in ratio_tests else [])]
        if t.confounded:
            name: AnalysisName = "no_test"
            analyses.append(
                _without_test(
                    name,
                    LABELS[name],
                    t.term,
                    "units",
                    len(t.labels),
                    "the term and its unit cannot be separated, so no p-value is given",
                )
            )
            none = verdict_method(MethodRegime(kind=kind, has_unit=False, confounded=True))
            out.append(TermRefit(t.term, tuple(analyses), none, None))
            continue
        rname = None
        if t.unit is not None:
            rname = next((k for k, u in random.items() if same_partition(t.unit, u)), None)
        has_unit = rname is not None
        rand = None
        if has_unit:
            try:
                um = _unit_means(t, y, blocks, unit_covariates(t, terms))
            except DesignError as err:  # e.g. every unit's proportion the same within levels
                um = _untested("unit_means", t, f"not computed: {err}")
            if kind != "continuous":
                um = replace(
                    um, label=um.label.replace(LABELS["unit_means"], UNIT_MEANS_LABELS[kind])
                )
            if not_fitted is not None:
                um = replace(um, notes=(*um.notes, not_fitted))
            analyses.append(um)
            if t.unit is not None and int(t.unit.max()) + 1 > MAX_MC_UNITS:
                analyses.append(_too_many_units("randomisation", t))
            elif t.numeric:
                curve = _lack_of_fit(t, y, blocks, unit_covariates(t, terms))
                if curve is not None:
                    analyses.append(curve)
                analyses.append(
                    _untested(
                        "randomisation",
                        t,
                        "not run for a number entering with one slope; the cluster-robust "
                        "test and the wild bootstrap cross-check its unit-level test",
                    )
                )
            else:
                adjust = unit_covariates(t, terms)
                rand = _randomise(t, y, blocks, seed, adjust)
                if rand is not None:
                    analyses.append(_randomisation_analysis(t, rand, list(adjust)))
        variance = None
        if fit is not None:
            n_rep = int(t.unit.max()) + 1 if has_unit and t.unit is not None else n
            mixed = _mixed_analysis(fit, X, index[t.term], t, rname, n_rep, single)
            analyses.append(replace(mixed, notes=(*mixed.notes, ENGINE_NOTES[engine or ""])))
            if rname is not None:
                at_zero = rname in fit.boundary
                variance = UnitVariance(
                    rname,
                    float(fit.components[rname]),
                    float(fit.components["residual"]),
                    at_zero,
                    bool(fit.converged),
                )
        if has_unit:
            analyses.extend(_cross_checks(y, X, index[t.term], t, blocks, kind, seed))
        exact = _strata_analysis(table, t, n) if table is not None else None
        if exact is not None:
            analyses.append(exact)
        too_few = has_unit and kind != "continuous" and _too_few_discrete(t)
        corrected = verdict_method(
            MethodRegime(
                kind=kind,
                has_unit=has_unit,
                mixed_fitted=fit is not None,
                mixed_converged=fit is not None and bool(fit.converged),
                unit_variance_at_zero=variance is not None and variance.at_boundary,
                strata_row=exact is not None,
                too_few_discrete=too_few,
            )
        )
        if too_few:
            analyses = [
                replace(a, notes=(*a.notes, FEW_DISCRETE_UNITS)) if a.name == "unit_means" else a
                for a in analyses
            ]
        out.append(TermRefit(t.term, tuple(analyses), corrected, variance, rand))
    return Refit(tuple(out))
