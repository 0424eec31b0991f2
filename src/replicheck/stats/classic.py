"""Classical tests at whatever level the caller aggregated the data to.

These are the analyses a paper typically reports (Student's t, one-way ANOVA,
a nested-model F test from ordinary least squares). They are written out from
the textbook formulas (e.g. Snedecor & Cochran 1989, *Statistical Methods*,
ch. 6, 12; Welch 1947, Biometrika 34:28-35) and checked against scipy and
statsmodels in the tests.

Groups are given as integer codes; any integer labels are accepted and mapped
to ``0..k-1`` in increasing order.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from replicheck.errors import InputError
from replicheck.partitions import dense_codes
from replicheck.stats import dist

__all__ = [
    "DesignError",
    "TestResult",
    "ols_term_f",
    "oneway_anova",
    "pearson_chi2",
    "two_sample_t",
]


class DesignError(InputError, ValueError):
    """The data or design cannot support the requested analysis.

    Subclasses both :class:`replicheck.errors.InputError` (one-line message for
    the user) and :class:`ValueError` (for callers that pass a malformed design
    matrix).
    """


@dataclass(frozen=True)
class TestResult:
    """Result of a classical test.

    ``df`` holds one entry for t tests and (numerator, denominator) for F tests.
    ``estimate`` is the mean difference (t tests) or ``None``; ``ci`` is its
    confidence interval or ``None``.
    """

    __test__ = False  # not a pytest test class

    test: str
    statistic: float
    df: tuple[float, ...]
    p_value: float
    estimate: float | None = None
    ci: tuple[float, float] | None = None


def _as_response(y: np.ndarray) -> np.ndarray:
    arr = np.asarray(y, dtype=float)
    if arr.ndim != 1:
        raise DesignError(f"response must be one-dimensional, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise DesignError("response contains missing or non-finite values")
    return arr


def _as_codes(group: np.ndarray, n: int, what: str = "group") -> tuple[np.ndarray, int]:
    arr = np.asarray(group)
    if arr.ndim != 1 or arr.shape[0] != n:
        raise DesignError(f"{what} codes must be one-dimensional with {n} entries")
    if not np.issubdtype(arr.dtype, np.integer):
        raise DesignError(f"{what} codes must be integers, got dtype {arr.dtype}")
    codes = dense_codes(arr).astype(np.intp, copy=False)
    return codes, int(codes.max()) + 1 if codes.size else 0


def two_sample_t(
    y: np.ndarray,
    group: np.ndarray,
    *,
    equal_var: bool = True,
    conf_level: float = 0.95,
) -> TestResult:
    """Two-sample t test of the difference in means between two groups.

    The estimate is ``mean(second group) - mean(first group)`` (groups ordered
    by code), which is the treatment-coded regression coefficient; the t
    statistic has the same sign. ``equal_var=True`` gives Student's pooled
    variance test with ``n1 + n2 - 2`` df; ``equal_var=False`` gives Welch's
    test with the Welch-Satterthwaite df (Welch 1947, Biometrika 34:28-35).
    The confidence interval is ``estimate ± t_{1-a/2, df} * se``.
    """
    arr = _as_response(y)
    codes, k = _as_codes(group, arr.shape[0])
    if k != 2:
        raise DesignError(f"a two-sample t test needs exactly 2 groups, found {k}")
    if not 0.0 < conf_level < 1.0:
        raise DesignError(f"confidence level must be between 0 and 1, got {conf_level}")
    a = arr[codes == 0]
    b = arr[codes == 1]
    n1, n2 = a.size, b.size
    if equal_var and n1 + n2 < 3:
        raise DesignError("a pooled t test needs at least 3 observations")
    if not equal_var and (n1 < 2 or n2 < 2):
        raise DesignError("Welch's t test needs at least 2 observations per group")
    diff = float(b.mean() - a.mean())
    v1 = float(a.var(ddof=1)) if n1 > 1 else 0.0
    v2 = float(b.var(ddof=1)) if n2 > 1 else 0.0
    if equal_var:
        df = float(n1 + n2 - 2)
        pooled = ((n1 - 1) * v1 + (n2 - 1) * v2) / df
        se = float(np.sqrt(pooled * (1.0 / n1 + 1.0 / n2)))
        name = "Student two-sample t (pooled variance)"
    else:
        s1, s2 = v1 / n1, v2 / n2
        se = float(np.sqrt(s1 + s2))
        df = (s1 + s2) ** 2 / (s1**2 / (n1 - 1) + s2**2 / (n2 - 1)) if se > 0 else np.nan
        name = "Welch two-sample t"
    if se == 0.0:
        raise DesignError("response has no variation within groups; the t test is undefined")
    t = diff / se
    p = float(2.0 * dist.t_sf(abs(t), df))
    half = float(dist.t_ppf(0.5 + conf_level / 2.0, df)) * se
    return TestResult(
        test=name,
        statistic=float(t),
        df=(float(df),),
        p_value=p,
        estimate=diff,
        ci=(diff - half, diff + half),
    )


def oneway_anova(y: np.ndarray, group: np.ndarray) -> TestResult:
    """One-way ANOVA F test of equal group means.

    F = [SS_between / (k - 1)] / [SS_within / (n - k)] with df ``(k - 1, n - k)``
    (Fisher's one-way layout; e.g. Snedecor & Cochran 1989, ch. 12).
    """
    arr = _as_response(y)
    codes, k = _as_codes(group, arr.shape[0])
    n = arr.shape[0]
    if k < 2:
        raise DesignError("one-way ANOVA needs at least 2 groups")
    if n - k < 1:
        raise DesignError("one-way ANOVA needs more observations than groups")
    sizes = np.bincount(codes, minlength=k).astype(float)
    means = np.bincount(codes, weights=arr, minlength=k) / sizes
    grand = arr.mean()
    ss_between = float(np.sum(sizes * (means - grand) ** 2))
    ss_within = float(np.sum((arr - means[codes]) ** 2))
    if ss_within == 0.0:
        raise DesignError("response has no variation within groups; the F test is undefined")
    df1, df2 = float(k - 1), float(n - k)
    f = (ss_between / df1) / (ss_within / df2)
    return TestResult(
        test="one-way ANOVA F",
        statistic=float(f),
        df=(df1, df2),
        p_value=float(dist.f_sf(f, df1, df2)),
    )


def _rss_and_rank(y: np.ndarray, x: np.ndarray) -> tuple[float, int, np.ndarray]:
    coef, _, rank, _ = np.linalg.lstsq(x, y, rcond=None)
    resid = y - x @ coef
    return float(resid @ resid), int(rank), coef


def ols_term_f(y: np.ndarray, x_full: np.ndarray, x_reduced: np.ndarray) -> TestResult:
    """Nested-model F test from ordinary least squares.

    F = [(RSS_r - RSS_f) / (r_f - r_r)] / [RSS_f / (n - r_f)] where r are the
    column ranks of the two design matrices (the extra-sum-of-squares principle;
    e.g. Draper & Smith 1998, *Applied Regression Analysis*, sec. 6.1). The
    column space of ``x_reduced`` must lie inside that of ``x_full``.
    """
    arr = _as_response(y)
    xf = np.asarray(x_full, dtype=float)
    xr = np.asarray(x_reduced, dtype=float)
    n = arr.shape[0]
    for name, mat in (("full", xf), ("reduced", xr)):
        if mat.ndim != 2 or mat.shape[0] != n:
            raise DesignError(f"{name} design matrix must be 2-D with {n} rows")
        if not np.all(np.isfinite(mat)):
            raise DesignError(f"{name} design matrix contains non-finite values")
    rss_f, rank_f, _ = _rss_and_rank(arr, xf)
    rss_r, rank_r, _ = _rss_and_rank(arr, xr)
    return _extra_sum_f(xf, xr, n, (rss_f, rank_f), (rss_r, rank_r))


def _extra_sum_f(
    xf: np.ndarray, xr: np.ndarray, n: int, full: tuple[float, int], reduced: tuple[float, int]
) -> TestResult:
    """The extra-sum-of-squares F from both fits' (RSS, rank); checks that ``xr`` is in ``xf``."""
    (rss_f, rank_f), (rss_r, rank_r) = full, reduced
    # The reduced model must be nested in the full one.
    if xr.shape[1] > 0:
        coef, *_ = np.linalg.lstsq(xf, xr, rcond=None)
        leftover = xr - xf @ coef
        scale = max(float(np.max(np.abs(xr))), 1.0)
        if float(np.max(np.abs(leftover))) > 1e-8 * scale * np.sqrt(n):
            raise DesignError("the reduced model is not nested in the full model")
    df1 = float(rank_f - rank_r)
    df2 = float(n - rank_f)
    if df1 < 1:
        raise DesignError("the full model adds no columns beyond the reduced model")
    if df2 < 1:
        raise DesignError("no residual degrees of freedom left in the full model")
    if rss_f <= 0.0:
        raise DesignError("the full model fits the response exactly; the F test is undefined")
    f = ((rss_r - rss_f) / df1) / (rss_f / df2)
    f = max(f, 0.0)
    return TestResult(
        test="OLS nested-model F",
        statistic=float(f),
        df=(df1, df2),
        p_value=float(dist.f_sf(f, df1, df2)),
    )


def cell_term_f(
    y: np.ndarray, cell: np.ndarray, cell_full: np.ndarray, cell_reduced: np.ndarray
) -> TestResult:
    """:func:`ols_term_f` for designs whose rows are constant within cells, from the cells.

    ``cell`` codes the rows ``0..C-1``; row ``c`` of ``cell_full`` and
    ``cell_reduced`` is the design row of every observation in cell ``c`` (for
    example dummies of a block and of the treatment cells, collapsed to the
    block x treatment cells). The result equals ``ols_term_f(y,
    cell_full[cell], cell_reduced[cell])`` without forming the n-row
    matrices: the residual sum of squares of a design constant within cells
    splits as ``sum_i (y_i - ybar_c(i))^2 + sum_c n_c (ybar_c - x_c'b)^2``, the
    first part (computed from deviations, one pass) fixed, the second a
    least-squares fit of the cell means weighted by the cell sizes. Ranks and
    nesting are those of the distinct rows, which span the same row space.
    """
    arr = _as_response(y)
    n = arr.shape[0]
    codes = np.asarray(cell)
    if codes.ndim != 1 or codes.shape[0] != n or not np.issubdtype(codes.dtype, np.integer):
        raise DesignError(f"cell codes must be one-dimensional integers with {n} entries")
    xf = np.asarray(cell_full, dtype=float)
    xr = np.asarray(cell_reduced, dtype=float)
    k = xf.shape[0] if xf.ndim == 2 else -1
    for name, mat in (("full", xf), ("reduced", xr)):
        if mat.ndim != 2 or mat.shape[0] != k:
            raise DesignError(f"{name} design matrix must be 2-D with one row per cell")
        if not np.all(np.isfinite(mat)):
            raise DesignError(f"{name} design matrix contains non-finite values")
    if n and (int(codes.min()) < 0 or int(codes.max()) >= k):
        raise DesignError(f"cell codes must lie in 0..{k - 1}")
    sizes = np.bincount(codes, minlength=k).astype(float)
    if np.any(sizes == 0):
        raise DesignError("every cell must hold at least one row")
    means = np.bincount(codes, weights=arr, minlength=k) / sizes
    dev = arr - means[codes]
    ss_within = float(dev @ dev)
    root = np.sqrt(sizes)
    rss_f, rank_f, _ = _rss_and_rank(root * means, root[:, None] * xf)
    rss_r, rank_r, _ = _rss_and_rank(root * means, root[:, None] * xr)
    full = (rss_f + ss_within, rank_f)
    reduced = (rss_r + ss_within, rank_r)
    return _extra_sum_f(xf, xr, n, full, reduced)


def pearson_chi2(y: np.ndarray, group: np.ndarray) -> TestResult:
    """Pearson's chi-squared test of independence of a 0/1 response and the groups.

    X^2 = sum over the 2 x k table of (observed - expected)^2 / expected, with
    k - 1 df and no continuity correction (Pearson 1900; Agresti 2013,
    *Categorical Data Analysis*, 3rd ed., sec. 3.2). Every row counts as an
    independent trial: this is the row-level analysis of a yes/no response.
    """
    arr = _as_response(y)
    codes, k = _as_codes(group, arr.shape[0])
    if k < 2:
        raise DesignError("a chi-squared test needs at least 2 groups")
    if not np.all((arr == 0.0) | (arr == 1.0)):
        raise DesignError("a chi-squared test of a yes/no response needs 0/1 values")
    n_k = np.bincount(codes, minlength=k).astype(float)
    yes = np.bincount(codes, weights=arr, minlength=k)
    observed = np.vstack([yes, n_k - yes])
    expected = np.outer(observed.sum(axis=1), n_k) / arr.size
    if np.any(expected.sum(axis=1) == 0.0):
        raise DesignError("the response takes a single value: the chi-squared test is undefined")
    x2 = float(np.sum((observed - expected) ** 2 / expected))
    df = float(k - 1)
    return TestResult(
        test="Pearson chi-squared", statistic=x2, df=(df,), p_value=float(dist.chi2_sf(x2, df))
    )
