"""Binary and count responses: detection, GEE, a unit-level test and overdispersion.

The rest of the package analyses a continuous response by (i) the means of the
experimental units and (ii) a REML mixed model with a random unit effect, and
measures clustering by the ICC. For a 0/1 or count response this module gives
the direct analogues, so that the same verdict logic can be kept:

* :func:`unit_summary_test` is the exact analogue of the unit-means analysis:
  one value per experimental unit (the proportion of 1s, or the mean count per
  row), then Student's t (two levels) or one-way ANOVA (more) on those values.
  This is the standard cluster-level analysis of a cluster-randomised
  comparison (Donner & Klar 2000, *Design and Analysis of Cluster
  Randomization Trials in Health Research*, chapter on binary outcomes;
  Hayes & Moulton 2017, *Cluster Randomised Trials*, 2nd ed., chapter on
  analysis by cluster-level summaries). Every unit counts once, whatever its
  size.
* :func:`gee_test` is the analogue of the mixed model: a marginal logistic or
  log-linear model fitted by generalised estimating equations (Liang & Zeger
  1986, Biometrika 73:13-22) with an exchangeable working correlation, the
  treatment term tested by a Wald F with the bias-reduced sandwich covariance
  of Mancl & DeRouen (2001, Biometrics 57:126-134) and F(q, G - p) as
  reference distribution (G units, p coefficients). Bias-corrected sandwich
  estimators with a t / F reference on G - p df are what Li & Redden (2015,
  Statistics in Medicine 34:281-296) studied and recommend for cluster-
  randomised trials with few clusters and a binary outcome; the F extension to
  q > 1 numerator df is common practice.
* :func:`unit_overdispersion` is the analogue of the ICC: the Pearson chi-square
  of the unit totals about the binomial / Poisson expectation of their
  treatment level. A dispersion (chi2 / df) above 1 with p < alpha is evidence
  that rows of one unit resemble each other more than independent rows would,
  i.e. of clustering. For a binary response and equal unit sizes m the
  dispersion is approximately the design effect 1 + (m - 1) rho
  (:func:`icc_from_dispersion`).

:func:`response_kind` decides which family applies.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Literal

import numpy as np
from scipy import special

from replicheck.partitions import group_means
from replicheck.stats import dist
from replicheck.stats.classic import DesignError, _as_codes, oneway_anova, two_sample_t

__all__ = [
    "COUNT_MEAN_LIMIT",
    "GeeTest",
    "Overdispersion",
    "ResponseKind",
    "UnitSummaryTest",
    "gee_test",
    "icc_from_dispersion",
    "response_kind",
    "unit_overdispersion",
    "unit_summary_test",
]

ResponseKind = Literal["continuous", "binary", "count"]
Family = Literal["binomial", "poisson"]

#: Largest overall mean for which a non-negative integer response is treated as
#: a count. Above it the Poisson distribution is close to normal and a normal-
#: theory (continuous) analysis is adequate; a mean of about 20 is the usual
#: threshold for the normal approximation to the Poisson (common practice).
COUNT_MEAN_LIMIT = 20.0

# Fitted means closer than this to 0 (or to 1 for binomial) signal separation:
# some design cell has only 0s (or only 1s) and its coefficient runs off to
# infinity, so the Wald test is meaningless (Hauck & Donner 1977, JASA 72:851-853).
_BOUNDARY = 1e-6
# A unit whose rows have (numerically) leverage 1 alone determines a coefficient.
_FULL_LEVERAGE = 1.0 - 1e-8
_LONE_UNIT = (
    "the bias-reduced GEE covariance is undefined: some experimental unit alone "
    "determines a coefficient (e.g. a treatment level or block with a single unit)"
)


# ----------------------------------------------------------------------------
# detection


def response_kind(y: np.ndarray) -> ResponseKind:
    """Classify a response as ``"binary"``, ``"count"`` or ``"continuous"``.

    Rules (applied to the values after missing values were removed):

    * **binary**: a boolean array, or exactly the two values 0 and 1. A
      two-valued numeric response coded otherwise (e.g. 1/2) is *not* treated
      as binary, since which value means "success" is unknown; the reader is
      expected to recode a two-level text column to 0/1.
    * **count**: every value a non-negative integer, at least 3 distinct values
      and an overall mean of at most :data:`COUNT_MEAN_LIMIT` (20). Larger
      integer responses are close enough to normal for a continuous analysis
      (common practice), and integer-valued measurements such as weights in
      grams (e.g. ``datasets::ChickWeight``, mean 122 g) stay continuous. So
      ``datasets::warpbreaks`` (mean 28 breaks) is classified continuous, while
      ``datasets::InsectSprays`` (mean 9.5) and ``MASS::epil`` (mean 8.3) are
      counts. A small integer score (e.g. 1-5) is also classified as a count.
    * **continuous**: everything else.

    Raises :class:`DesignError` for an empty, non-1-D or non-finite response,
    and for a constant one (nothing can be tested).
    """
    arr = np.asarray(y)
    if arr.ndim != 1:
        raise DesignError(f"response must be one-dimensional, got shape {arr.shape}")
    if arr.size == 0:
        raise DesignError("response is empty")
    if arr.dtype == bool:
        if np.unique(arr).size < 2:
            raise DesignError("response has the same value in every row; nothing to test")
        return "binary"
    try:
        vals = arr.astype(float)
    except (TypeError, ValueError) as exc:
        raise DesignError(f"response must be numeric, got dtype {arr.dtype}") from exc
    if not np.all(np.isfinite(vals)):
        raise DesignError("response contains missing or non-finite values")
    # min, max and equality tests instead of the sorted distinct values (one pass each)
    lowest, highest = float(vals.min()), float(vals.max())
    if lowest == highest:
        raise DesignError("response has the same value in every row; nothing to test")
    if lowest == 0.0 and highest == 1.0 and bool(np.all((vals == 0.0) | (vals == 1.0))):
        return "binary"
    integer = bool(np.all(vals == np.round(vals)))
    # three or more distinct values: not two (binary has been ruled out above for 0/1)
    several = not bool(np.all((vals == lowest) | (vals == highest)))
    if integer and lowest >= 0.0 and several and float(vals.mean()) <= COUNT_MEAN_LIMIT:
        return "count"
    return "continuous"


# ----------------------------------------------------------------------------
# shared input checks


def _response(y: np.ndarray) -> np.ndarray:
    arr = np.asarray(y, dtype=float)
    if arr.ndim != 1:
        raise DesignError(f"response must be one-dimensional, got shape {arr.shape}")
    if arr.size == 0:
        raise DesignError("response is empty")
    if not np.all(np.isfinite(arr)):
        raise DesignError("response contains missing or non-finite values")
    return arr


def _codes(group: np.ndarray, n: int, what: str) -> tuple[np.ndarray, int]:
    return _as_codes(group, n, what)


def _family(family: str) -> Family:
    if family == "binomial":
        return "binomial"
    if family == "poisson":
        return "poisson"
    raise DesignError(f"family must be 'binomial' or 'poisson', got {family!r}")


def _check_family_values(y: np.ndarray, family: Family) -> None:
    if family == "binomial" and not np.all((y == 0.0) | (y == 1.0)):
        raise DesignError("a binomial analysis needs a 0/1 response")
    if family == "poisson" and np.any(y < 0.0):
        raise DesignError("a Poisson analysis needs a non-negative (count) response")


def _unit_levels(unit: np.ndarray, level: np.ndarray, g: int) -> np.ndarray:
    """Level code of each unit; the level must be constant within a unit."""
    first = np.full(g, -1, dtype=np.intp)
    first[unit[::-1]] = level[::-1]
    if np.any(first[unit] != level):
        raise DesignError(
            "the treatment level varies within an experimental unit; "
            "a unit-level analysis needs units nested in treatment levels"
        )
    return first


# ----------------------------------------------------------------------------
# GEE


@dataclass(frozen=True)
class GeeTest:
    """Wald test of ``L beta = 0`` in a marginal GEE model.

    ``statistic`` is the Wald F = chi2 / q (``df_den`` = G - p) or, when
    ``df_den`` is ``None``, the Wald chi-square on ``df_num`` df. ``estimate``
    and ``std_error`` are ``L beta`` and its standard error on the link scale
    (log odds ratio or log rate ratio) when q = 1, else ``None``.
    ``coefficients`` are all of beta and ``covariance`` is their bias-reduced
    (Mancl-DeRouen) covariance. ``working_correlation`` is the estimated
    exchangeable correlation (0 for an independence working model).
    ``converged`` is ``False`` when the estimating-equation iterations hit
    their limit; the numbers are then the last iterate and should not be
    trusted.
    """

    statistic: float
    df_num: float
    df_den: float | None
    p_value: float
    estimate: float | None
    std_error: float | None
    working_correlation: float
    family: str
    n_clusters: int
    converged: bool
    method: str
    coefficients: np.ndarray
    covariance: np.ndarray


def _design(x: np.ndarray, n: int) -> np.ndarray:
    mat = np.asarray(x, dtype=float)
    if mat.ndim != 2 or mat.shape[0] != n:
        raise DesignError(f"design matrix must be 2-D with {n} rows")
    if not np.all(np.isfinite(mat)):
        raise DesignError("design matrix contains non-finite values")
    if np.linalg.matrix_rank(mat) < mat.shape[1]:
        raise DesignError("design matrix is rank-deficient (some columns are redundant)")
    return mat


def _hypothesis(lmat: np.ndarray, p: int) -> np.ndarray:
    mat = np.asarray(lmat, dtype=float)
    if mat.ndim == 1:
        mat = mat[None, :]
    if mat.ndim != 2 or mat.shape[1] != p or mat.shape[0] < 1:
        raise DesignError(f"hypothesis matrix must have {p} columns and at least one row")
    if not np.all(np.isfinite(mat)) or np.linalg.matrix_rank(mat) < mat.shape[0]:
        raise DesignError("hypothesis matrix has non-finite values or redundant rows")
    return mat


def _max_unit_leverage(x: np.ndarray, codes: np.ndarray, g: int) -> float:
    """Largest eigenvalue over units of the unit block of the OLS hat matrix.

    It is 1 exactly when dropping that unit leaves ``X`` rank-deficient, i.e.
    when the unit alone determines some coefficient. Because GEE weights are
    positive, the GEE leverage matrix ``H_i`` of Mancl & DeRouen then also has
    an eigenvalue 1 and ``I - H_i`` is singular.
    """
    q, _ = np.linalg.qr(x)
    order = np.argsort(codes, kind="stable")
    bounds = np.cumsum(np.bincount(codes, minlength=g))[:-1]
    worst = 0.0
    for qi in np.split(q[order], bounds):
        worst = max(worst, float(np.linalg.eigvalsh(qi.T @ qi)[-1]))
    return worst


def gee_test(
    y: np.ndarray,
    X: np.ndarray,
    cluster: np.ndarray,
    L: np.ndarray,
    family: str,
    *,
    working: Literal["exchangeable", "independence"] = "exchangeable",
    small_sample: bool = True,
) -> GeeTest:
    """GEE Wald test of a fixed-effects term for a binary or count response.

    Fits ``E[y] = g^-1(X beta)`` (logit link for ``family="binomial"``, log link
    for ``"poisson"``) by generalised estimating equations (Liang & Zeger 1986,
    Biometrika 73:13-22) with ``cluster`` as the experimental unit, using
    statsmodels' ``GEE``. The working correlation is exchangeable by default;
    its moment estimator is the one without degrees-of-freedom adjustment
    (``ddof_scale=0``), which reproduces R geepack's ``geeglm`` estimates.
    The scale is fixed at 1 (binomial / Poisson variance).

    The covariance of beta is the bias-reduced sandwich of Mancl & DeRouen
    (2001, Biometrics 57:126-134; statsmodels ``cov_type="bias_reduced"``):
    ``A^-1 [sum_i D_i' V_i^-1 (I - H_i)^-1 r_i r_i' (I - H_i)^-T V_i^-1 D_i] A^-1``
    with ``A = sum_i D_i' V_i^-1 D_i`` and ``H_i = D_i A^-1 D_i' V_i^-1``.
    For an independence working model it equals the CR3 cluster-robust
    covariance (checked against R clubSandwich in the tests).

    The Wald statistic ``chi2 = (L b)' (L C L')^-1 (L b)`` is referred, as
    F = chi2 / q, to F(q, G - p) when ``small_sample`` (Li & Redden 2015,
    Statistics in Medicine 34:281-296, for q = 1; common practice for q > 1),
    otherwise to chi2(q).

    Raises :class:`DesignError` for bad input, for separation (fitted means at
    0 or 1: a design cell with only 0s or only 1s, or a count cell with only
    0s), when some unit alone determines a coefficient (bias-reduced covariance
    undefined, e.g. a treatment level with a single unit), and when the fit
    fails. Non-convergence of the iterations is not an error: it is reported
    with ``converged=False``. statsmodels warnings are suppressed.
    """
    fam = _family(family)
    arr = _response(y)
    n = arr.shape[0]
    _check_family_values(arr, fam)
    xmat = _design(X, n)
    p = xmat.shape[1]
    lmat = _hypothesis(L, p)
    q = lmat.shape[0]
    codes, g = _codes(cluster, n, "cluster")
    if working not in ("exchangeable", "independence"):
        raise DesignError(
            f"working correlation must be exchangeable or independence, got {working!r}"
        )
    if g < 2:
        raise DesignError("GEE needs at least 2 experimental units")
    sizes = np.bincount(codes, minlength=g)
    if working == "exchangeable" and not np.any(sizes >= 2):
        raise DesignError(
            "every experimental unit has a single row; there is no clustering to model"
        )
    df_den = float(g - p)
    if small_sample and df_den < 1:
        raise DesignError(
            f"{g} experimental units leave no degrees of freedom for {p} coefficients"
        )

    if _max_unit_leverage(xmat, codes, g) >= _FULL_LEVERAGE:
        raise DesignError(_LONE_UNIT)

    # imported here: the GEE module costs a fifth of a second to load and only
    # yes/no and count responses need it
    from statsmodels.genmod import cov_struct as structures
    from statsmodels.genmod import families
    from statsmodels.genmod.generalized_estimating_equations import GEE

    fam_obj = families.Binomial() if fam == "binomial" else families.Poisson()
    cov_struct = (
        structures.Exchangeable() if working == "exchangeable" else structures.Independence()
    )
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            model = GEE(arr, xmat, groups=codes, family=fam_obj, cov_struct=cov_struct)
            res = model.fit(maxiter=100, ctol=1e-8, cov_type="bias_reduced", ddof_scale=0)
        except np.linalg.LinAlgError as exc:
            raise DesignError(_LONE_UNIT) from exc
        except (ValueError, FloatingPointError) as exc:
            raise DesignError(f"the GEE fit failed: {exc}") from exc
    if res is None or res.cov_robust_bc is None:
        raise DesignError("the GEE fit failed: singular working covariance or update")
    from statsmodels.tools.sm_exceptions import ConvergenceWarning, IterationLimitWarning

    converged = not any(
        issubclass(w.category, ConvergenceWarning | IterationLimitWarning) for w in caught
    )

    beta = np.asarray(res.params, dtype=float)
    cov = np.asarray(res.cov_robust_bc, dtype=float)
    with np.errstate(over="ignore"):
        eta = xmat @ beta
        mu = special.expit(eta) if fam == "binomial" else np.exp(eta)
    if not (np.all(np.isfinite(beta)) and np.all(np.isfinite(cov))):
        raise DesignError(
            "the GEE fit gave non-finite estimates (separation or a degenerate design)"
        )
    edge = np.minimum(mu, 1.0 - mu) if fam == "binomial" else mu
    if float(edge.min()) < _BOUNDARY:
        what = (
            "only 0s or only 1s (separation)"
            if fam == "binomial"
            else "only zero counts (log rate minus infinity)"
        )
        raise DesignError(
            f"some treatment level or design cell has {what}; "
            "the GEE Wald test is undefined, use the unit-level test"
        )

    est = lmat @ beta
    lcl = lmat @ cov @ lmat.T
    try:
        chi2 = float(est @ np.linalg.solve(lcl, est))
    except np.linalg.LinAlgError as exc:
        raise DesignError("the covariance of the tested contrasts is singular") from exc
    if not np.isfinite(chi2) or chi2 < 0:
        raise DesignError("the covariance of the tested contrasts is not positive definite")
    alpha = float(np.asarray(res.model.cov_struct.dep_params)) if working == "exchangeable" else 0.0
    link = "logit" if fam == "binomial" else "log"
    if small_sample:
        stat = chi2 / q
        pval = float(dist.f_sf(stat, q, df_den))
        ref = f"F({q}, {g} - {p})"
        den: float | None = df_den
    else:
        stat = chi2
        pval = float(dist.chi2_sf(chi2, q))
        ref = f"chi-square({q})"
        den = None
    return GeeTest(
        statistic=float(stat),
        df_num=float(q),
        df_den=den,
        p_value=pval,
        estimate=float(est[0]) if q == 1 else None,
        std_error=float(np.sqrt(lcl[0, 0])) if q == 1 else None,
        working_correlation=alpha,
        family=fam,
        n_clusters=g,
        converged=converged,
        method=(
            f"GEE ({fam}, {link} link, {working} working correlation), Wald test with "
            f"Mancl-DeRouen bias-reduced covariance, {ref}"
        ),
        coefficients=beta,
        covariance=cov,
    )


# ----------------------------------------------------------------------------
# unit-level summary test


@dataclass(frozen=True)
class UnitSummaryTest:
    """Test on one summary value per experimental unit.

    ``statistic`` is the one-way ANOVA F on the unit values with ``df`` =
    (k - 1, G - k); for two levels it equals the square of Student's pooled t,
    given signed in ``t_statistic`` together with ``estimate`` = mean unit value
    of the second level minus that of the first (``None`` for k > 2).
    ``unit_values[i]`` and ``unit_level[i]`` belong to unit code i (units
    numbered ``0..G-1`` in increasing order of the input codes; levels likewise).
    """

    statistic: float
    df: tuple[float, float]
    p_value: float
    unit_values: np.ndarray
    unit_level: np.ndarray
    measure: str
    method: str
    t_statistic: float | None = None
    estimate: float | None = None


def unit_summary_test(y: np.ndarray, unit: np.ndarray, level: np.ndarray) -> UnitSummaryTest:
    """Compare treatment levels on per-unit proportions or mean counts.

    Each experimental unit is reduced to the mean of its rows: the proportion
    of 1s for a 0/1 response, the mean count per row otherwise. Those G values
    are compared by Student's pooled two-sample t test (2 levels) or one-way
    ANOVA (more levels), with G - k residual df - the cluster-level analysis of
    Donner & Klar (2000) and Hayes & Moulton (2017), and the
    exact analogue of the unit-means analysis of a continuous response. Units
    are weighted equally.

    The treatment level must be constant within each unit. Raises
    :class:`DesignError` when it is not, when there are fewer than 2 levels or
    no residual df (every level has a single unit), when the unit values do
    not vary within levels, or when the response is negative.
    """
    arr = _response(y)
    n = arr.shape[0]
    if np.any(arr < 0.0):
        raise DesignError("a unit-level proportion / count test needs a non-negative response")
    binary = bool(np.all((arr == 0.0) | (arr == 1.0)))
    ucodes, g = _codes(unit, n, "unit")
    lcodes, _ = _codes(level, n, "treatment level")
    per_unit = _unit_levels(ucodes, lcodes, g)
    k = int(np.unique(per_unit).size)
    if k < 2:
        raise DesignError("a unit-level comparison needs at least 2 treatment levels")
    if g - k < 1:
        raise DesignError(
            f"every treatment level has a single experimental unit ({g} units, {k} levels); "
            "treatment is confounded with unit and cannot be tested"
        )
    values, _ = group_means(ucodes, arr)
    level_means, _ = group_means(per_unit, values)
    if float(np.sum((values - level_means[per_unit]) ** 2)) == 0.0:
        raise DesignError(
            "the unit values do not vary within any treatment level; "
            "the unit-level test is undefined"
        )
    measure = "proportion" if binary else "mean count"
    if k == 2:
        res = two_sample_t(values, per_unit, equal_var=True)
        t = res.statistic
        return UnitSummaryTest(
            statistic=float(t * t),
            df=(1.0, float(res.df[0])),
            p_value=res.p_value,
            unit_values=values,
            unit_level=per_unit,
            measure=measure,
            method=f"Student two-sample t on unit {measure}s (reported as F = t^2)",
            t_statistic=float(t),
            estimate=res.estimate,
        )
    res = oneway_anova(values, per_unit)
    return UnitSummaryTest(
        statistic=res.statistic,
        df=(float(res.df[0]), float(res.df[1])),
        p_value=res.p_value,
        unit_values=values,
        unit_level=per_unit,
        measure=measure,
        method=f"one-way ANOVA on unit {measure}s",
    )


# ----------------------------------------------------------------------------
# overdispersion at the unit level


@dataclass(frozen=True)
class Overdispersion:
    """Pearson test of extra-binomial / extra-Poisson variation between units.

    ``dispersion`` = ``chi2 / df`` (1 when unit totals vary as binomial /
    Poisson counts would). ``p_value`` is the upper tail of chi2(df).
    ``n_units`` counts the units that enter the statistic (units in a
    treatment level whose pooled proportion is 0 or 1, or whose pooled rate is
    0, carry no information and are left out); ``mean_unit_size`` is their
    mean number of rows.
    """

    family: str
    dispersion: float
    chi2: float
    df: int
    p_value: float
    n_units: int
    mean_unit_size: float


def unit_overdispersion(
    y: np.ndarray, unit: np.ndarray, level: np.ndarray, family: str
) -> Overdispersion:
    """Heterogeneity of unit totals beyond binomial / Poisson variation.

    Binomial (0/1 response): unit i has s_i successes in m_i rows; with p_l
    the pooled proportion of its treatment level,
    ``X^2 = sum_i (s_i - m_i p_l)^2 / (m_i p_l (1 - p_l))`` on ``G - k`` df
    (the Pearson chi-square test of homogeneity of binomial proportions within
    levels, Cochran 1954, Biometrics 10:417-451; its ratio to df estimates the
    dispersion parameter, Collett 2003, *Modelling Binary Data*, 2nd ed.,
    ch. 6). Poisson: unit total t_i over m_i rows, expected
    ``E_i = m_i * rate_l`` with rate_l the level's pooled rate per row,
    ``X^2 = sum_i (t_i - E_i)^2 / E_i`` on ``G - k`` df (the Poisson index of
    dispersion test, Cochran 1954). These are the Pearson statistics of a
    binomial / Poisson GLM of the unit totals on treatment level
    (McCullagh & Nelder 1989, *Generalized Linear Models*, 2nd ed.).

    Within a level whose pooled proportion is 0 or 1 (rate 0) all units are
    identical; such levels are left out of X^2 and df. Units must be nested in
    levels; pass a constant ``level`` to test heterogeneity among all units.
    Raises :class:`DesignError` when no df remain.
    """
    fam = _family(family)
    arr = _response(y)
    n = arr.shape[0]
    _check_family_values(arr, fam)
    ucodes, g = _codes(unit, n, "unit")
    lcodes, _ = _codes(level, n, "treatment level")
    per_unit = _unit_levels(ucodes, lcodes, g)
    k = int(per_unit.max()) + 1
    totals = np.bincount(ucodes, weights=arr, minlength=g)
    sizes = np.bincount(ucodes, minlength=g).astype(float)
    level_tot = np.bincount(per_unit, weights=totals, minlength=k)
    level_size = np.bincount(per_unit, weights=sizes, minlength=k)
    rate = level_tot / level_size
    informative = (rate > 0.0) & (rate < 1.0) if fam == "binomial" else rate > 0.0
    keep = informative[per_unit]
    g_used = int(keep.sum())
    k_used = int(informative.sum())
    df = g_used - k_used
    if df < 1:
        raise DesignError(
            "overdispersion needs more experimental units than treatment levels "
            "among levels whose responses are not all identical"
        )
    r = rate[per_unit][keep]
    expected = sizes[keep] * r
    var = expected * (1.0 - r) if fam == "binomial" else expected
    chi2 = float(np.sum((totals[keep] - expected) ** 2 / var))
    return Overdispersion(
        family=fam,
        dispersion=chi2 / df,
        chi2=chi2,
        df=df,
        p_value=float(dist.chi2_sf(chi2, df)),
        n_units=g_used,
        mean_unit_size=float(sizes[keep].mean()),
    )


def icc_from_dispersion(dispersion: float, m: float) -> float:
    """Intraclass correlation implied by a binomial dispersion for unit size m.

    Under the extra-binomial variance model ``Var(s_i) = m p (1 - p) [1 + (m - 1) rho]``
    (Williams 1982, Applied Statistics 31:144-148; the variance inflation
    factor or design effect of Donner & Klar 2000), dispersion = 1 + (m - 1) rho, so
    ``rho = (dispersion - 1) / (m - 1)``. Not truncated: a dispersion below 1
    gives a negative value. With unequal unit sizes pass the mean size; the
    result is then approximate.
    """
    if not np.isfinite(dispersion) or dispersion < 0:
        raise DesignError(f"dispersion must be a non-negative number, got {dispersion}")
    if not np.isfinite(m) or m <= 1:
        raise DesignError(f"unit size must exceed 1 to define an ICC, got {m}")
    return float((dispersion - 1.0) / (m - 1.0))
