"""How strongly observations cluster within experimental units.

* :func:`anova_components` - one-way random-effects ANOVA (method-of-moments)
  estimator of the between-unit variance, units nested in fixed groups, with
  the intraclass correlation and its F-based confidence interval.
* :func:`icc_from_components` - ICC from two variance components.
* :func:`design_effect` - Kish's design effect and the unequal-cluster-size form.
* :func:`icc_oneway` - Shrout & Fleiss ICC(1,1) for a targets x judges table.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from replicheck.partitions import dense_codes, is_nested
from replicheck.stats import dist
from replicheck.stats.classic import DesignError

__all__ = [
    "AnovaComponents",
    "DesignEffect",
    "anova_components",
    "design_effect",
    "icc_from_components",
    "icc_oneway",
]


@dataclass(frozen=True)
class AnovaComponents:
    """One-way random-effects ANOVA of units nested in groups.

    ``s2_unit`` is truncated at 0, ``s2_unit_raw`` is not; ``icc`` / ``icc_raw``
    likewise. ``ci_low`` / ``ci_high`` is the F-based interval for the ICC,
    clipped to [0, 1]. ``f_statistic`` = MS_between / MS_within tests
    ``s2_unit = 0`` with ``p_value``; ``ci_low_raw`` / ``ci_high_raw`` are the
    interval ends before clipping. Undefined quantities (no variation at all)
    are ``nan``.
    """

    s2_unit: float
    s2_unit_raw: float
    s2_within: float
    icc: float
    icc_raw: float
    ci_low: float
    ci_high: float
    ci_low_raw: float
    ci_high_raw: float
    conf_level: float
    ms_between: float
    ms_within: float
    df_between: int
    df_within: int
    n0: float
    f_statistic: float
    p_value: float
    n_obs: int
    n_units: int
    n_groups: int


@dataclass(frozen=True)
class DesignEffect:
    """Design effect for clustered observations.

    ``deff`` uses the unequal-size form, ``deff_equal`` Kish's form with the
    mean cluster size; ``effective_n = n / deff``.
    """

    deff: float
    deff_equal: float
    mean_size: float
    cv_size: float
    n: int
    effective_n: float
    icc: float


def _codes(values: np.ndarray, n: int, what: str) -> np.ndarray:
    arr = np.asarray(values)
    if arr.ndim != 1 or arr.shape[0] != n:
        raise DesignError(f"{what} codes must be one-dimensional with {n} entries")
    if not np.issubdtype(arr.dtype, np.integer):
        raise DesignError(f"{what} codes must be integers, got dtype {arr.dtype}")
    return dense_codes(arr).astype(np.intp, copy=False)


def anova_components(
    y: np.ndarray,
    unit: np.ndarray,
    group: np.ndarray | None = None,
    *,
    conf_level: float = 0.95,
) -> AnovaComponents:
    """Between-unit variance by one-way random-effects ANOVA, units nested in groups.

    With ``U`` units in ``g`` groups and ``m_u`` observations in unit ``u``::

        MS_B = sum_u m_u (ybar_u - ybar_group(u))^2 / (U - g)
        MS_W = sum_i (y_i - ybar_unit(i))^2 / (n - U)
        n0   = (n - sum_groups sum_{u in group} m_u^2 / n_group) / (U - g)
        s2_unit = max(0, (MS_B - MS_W) / n0),  ICC = s2_unit / (s2_unit + MS_W)

    (Searle, Casella & McCulloch 1992, *Variance Components*, ch. 3, for the
    unbalanced one-way classification; with groups the between-unit sum of
    squares is pooled within groups.) The interval for the ICC inverts
    ``F = MS_B / MS_W`` (Searle 1971, *Linear Models*; Donner 1986, Int. Stat.
    Rev. 54:67-82): with ``F_L = F / F_{1-a/2}(U-g, n-U)`` and
    ``F_U = F / F_{a/2}(U-g, n-U)``, ``lo = (F_L - 1) / (F_L + n0 - 1)`` and
    ``hi = (F_U - 1) / (F_U + n0 - 1)``, clipped to [0, 1]. It is exact for equal
    unit sizes and approximate otherwise.
    """
    arr = np.asarray(y, dtype=float)
    if arr.ndim != 1:
        raise DesignError(f"response must be one-dimensional, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise DesignError("response contains missing or non-finite values")
    if not 0.0 < conf_level < 1.0:
        raise DesignError(f"confidence level must be between 0 and 1, got {conf_level}")
    n = arr.shape[0]
    ucodes = _codes(unit, n, "unit")
    n_units = int(ucodes.max()) + 1 if n else 0
    gcodes = np.zeros(n, dtype=np.intp) if group is None else _codes(group, n, "group")
    n_groups = int(gcodes.max()) + 1 if n else 0
    # every unit must sit in exactly one group
    if not is_nested(ucodes, gcodes):
        raise DesignError(
            "some units appear in more than one group; units must be nested in groups"
        )
    unit_group = np.empty(n_units, dtype=np.intp)
    unit_group[ucodes] = gcodes
    df_b = n_units - n_groups
    df_w = n - n_units
    if df_b < 1:
        raise DesignError("need more units than groups to estimate the between-unit variance")
    if df_w < 1:
        raise DesignError("need more observations than units to estimate the within-unit variance")
    m_u = np.bincount(ucodes, minlength=n_units).astype(float)
    unit_mean = np.bincount(ucodes, weights=arr, minlength=n_units) / m_u
    n_g = np.bincount(gcodes, minlength=n_groups).astype(float)
    group_mean = np.bincount(gcodes, weights=arr, minlength=n_groups) / n_g
    ss_b = float(np.sum(m_u * (unit_mean - group_mean[unit_group]) ** 2))
    ss_w = float(np.sum((arr - unit_mean[ucodes]) ** 2))
    ms_b = ss_b / df_b
    ms_w = ss_w / df_w
    n0 = float((n - np.sum(m_u**2 / n_g[unit_group])) / df_b)
    s2_raw = (ms_b - ms_w) / n0
    s2_unit = max(0.0, s2_raw)
    nan = float("nan")
    if ms_w > 0.0:
        f = ms_b / ms_w
        p_value = float(dist.f_sf(f, df_b, df_w))
        icc_raw = s2_raw / (s2_raw + ms_w)
        icc = s2_unit / (s2_unit + ms_w)
        alpha = 1.0 - conf_level
        f_lo = f / float(dist.f_ppf(1.0 - alpha / 2.0, df_b, df_w))
        f_hi = f / float(dist.f_ppf(alpha / 2.0, df_b, df_w))
        lo = (f_lo - 1.0) / (f_lo + n0 - 1.0)
        hi = (f_hi - 1.0) / (f_hi + n0 - 1.0)
        ci_low, ci_high = min(max(lo, 0.0), 1.0), min(max(hi, 0.0), 1.0)
    elif ms_b > 0.0:
        # no variation within units: all variation is between units
        f, p_value = math.inf, 0.0
        icc = icc_raw = 1.0
        ci_low = ci_high = lo = hi = 1.0
    else:
        f = p_value = icc = icc_raw = ci_low = ci_high = lo = hi = nan
    return AnovaComponents(
        s2_unit=float(s2_unit),
        s2_unit_raw=float(s2_raw),
        s2_within=float(ms_w),
        icc=float(icc),
        icc_raw=float(icc_raw),
        ci_low=float(ci_low),
        ci_high=float(ci_high),
        ci_low_raw=float(lo),
        ci_high_raw=float(hi),
        conf_level=float(conf_level),
        ms_between=float(ms_b),
        ms_within=float(ms_w),
        df_between=int(df_b),
        df_within=int(df_w),
        n0=n0,
        f_statistic=float(f),
        p_value=float(p_value),
        n_obs=int(n),
        n_units=n_units,
        n_groups=n_groups,
    )


def icc_from_components(s2_unit: float, s2_resid: float) -> float:
    """Intraclass correlation ``s2_unit / (s2_unit + s2_resid)``.

    Returns ``nan`` when both components are 0 (no variation).
    """
    if s2_unit < 0.0 or s2_resid < 0.0 or not (math.isfinite(s2_unit) and math.isfinite(s2_resid)):
        raise DesignError("variance components must be finite and non-negative")
    total = s2_unit + s2_resid
    return float(s2_unit / total) if total > 0.0 else float("nan")


def design_effect(sizes: np.ndarray, icc: float) -> DesignEffect:
    """Design effect of cluster sampling (variance inflation of a mean).

    ``deff_equal = 1 + (m_bar - 1) * icc`` (Kish 1965, *Survey Sampling*,
    sec. 5.4) and, for unequal sizes, ``deff = 1 + ((CV^2 + 1) m_bar - 1) * icc``
    (Eldridge, Ashby & Kerry 2006, Int. J. Epidemiol. 35:1292-1300) with ``CV``
    the coefficient of variation of the cluster sizes. The population standard
    deviation (ddof = 0) is used: then ``(CV^2 + 1) m_bar = sum m^2 / sum m`` and
    ``deff`` is exactly the variance ratio of the overall mean under an
    exchangeable correlation ``icc``. ``effective_n = n / deff``.
    """
    m = np.asarray(sizes, dtype=float)
    if m.ndim != 1 or m.size == 0:
        raise DesignError("cluster sizes must be a non-empty one-dimensional array")
    if not np.all(np.isfinite(m)) or np.any(m < 1):
        raise DesignError("cluster sizes must be finite and at least 1")
    if not math.isfinite(icc) or icc < -1.0 or icc > 1.0:
        raise DesignError(f"intraclass correlation must be in [-1, 1], got {icc}")
    n = float(m.sum())
    mean = float(m.mean())
    cv = float(m.std(ddof=0) / mean)
    deff_equal = 1.0 + (mean - 1.0) * icc
    deff = 1.0 + ((cv**2 + 1.0) * mean - 1.0) * icc
    return DesignEffect(
        deff=float(deff),
        deff_equal=float(deff_equal),
        mean_size=mean,
        cv_size=cv,
        n=round(n),
        effective_n=float(n / deff) if deff > 0 else float("inf"),
        icc=float(icc),
    )


def icc_oneway(table: np.ndarray) -> float:
    """Shrout & Fleiss ICC(1,1) for an ``n targets x k judges`` table.

    ``ICC(1,1) = (BMS - WMS) / (BMS + (k - 1) WMS)`` (Shrout & Fleiss 1979,
    Psychol. Bull. 86:420-428, Case 1).
    """
    tab = np.asarray(table, dtype=float)
    if tab.ndim != 2 or tab.shape[0] < 2 or tab.shape[1] < 2:
        raise DesignError("ICC(1,1) needs a table with at least 2 targets and 2 judges")
    if not np.all(np.isfinite(tab)):
        raise DesignError("rating table contains missing or non-finite values")
    n, k = tab.shape
    row_means = tab.mean(axis=1)
    bms = k * float(np.sum((row_means - tab.mean()) ** 2)) / (n - 1)
    wms = float(np.sum((tab - row_means[:, None]) ** 2)) / (n * (k - 1))
    denom = bms + (k - 1) * wms
    return float((bms - wms) / denom) if denom > 0 else float("nan")
