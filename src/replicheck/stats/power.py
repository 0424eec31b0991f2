"""Units a valid design would need: power of the unit-level F test.

With unit variance s2_u, residual variance s2_e and m observations per unit,
a unit mean has variance s2_u + s2_e / m (Donner & Klar 2000, Design and
Analysis of Cluster Randomization Trials, ch. 5; the design effect
1 + (m - 1) rho in other words). For t levels with k units each, the unit-level
one-way F test has df (t - 1, t(k - 1)) and noncentrality t k f^2, where
f^2 = sum_i (mu_i - mu)^2 / t / (s2_u + s2_e / m) is Cohen's f on unit means
(Cohen 1988, Statistical Power Analysis, ch. 8). More observations per unit
stop helping once s2_e / m is small beside s2_u, that is once m rho / (1 - rho)
is large.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from replicheck.stats import dist

MAX_UNITS = 10_000


@dataclass(frozen=True)
class DesignNeeds:
    """Units per level needed for a target power, at the observed and other unit sizes."""

    units_per_level: int | None  # None when even MAX_UNITS would not do
    power: float
    alpha: float
    effect_f: float  # Cohen's f on unit means
    observations_per_unit: float
    icc: float
    by_unit_size: tuple[tuple[int, int | None], ...]  # (observations per unit, units per level)
    effect_kind: str = "observed"  # observed | stated
    difference: float | None = None  # the stated difference between two level means


def stated_effect_means(difference: float, levels: int) -> list[float]:
    """Level means for a stated difference between two levels, the others halfway.

    This is the least favourable configuration for a given range of means
    (Cohen 1988, sec. 8.2, pattern 1): Cohen's f^2 = difference^2 / (2 levels).
    """
    return [0.0, difference, *([difference / 2] * (levels - 2))]


def f_test_power(f2: float, levels: int, units: int, alpha: float) -> float:
    """Power of the unit-level one-way F test with ``units`` units per level."""
    df1, df2 = levels - 1, levels * (units - 1)
    if df2 < 1:
        return 0.0
    crit = dist.f_isf(alpha, df1, df2)
    return dist.ncf_sf(crit, df1, df2, levels * units * f2)


def units_needed(f2: float, levels: int, alpha: float, power: float) -> int | None:
    """Smallest number of units per level whose F test reaches ``power``."""
    if f2 <= 0:
        return None
    lo, hi = 2, 2
    while f_test_power(f2, levels, hi, alpha) < power:
        if hi >= MAX_UNITS:
            return None
        lo, hi = hi, min(hi * 2, MAX_UNITS)
    while lo < hi:
        mid = (lo + hi) // 2
        if f_test_power(f2, levels, mid, alpha) >= power:
            hi = mid
        else:
            lo = mid + 1
    return hi


def design_needs(
    level_means: Sequence[float],
    var_unit: float,
    var_residual: float,
    observations_per_unit: float,
    alpha: float = 0.05,
    power: float = 0.8,
    unit_sizes: Sequence[int] = (1, 2, 5, 10, 20, 50, 100),
) -> DesignNeeds:
    """Units per level needed to detect the given level means (the observed effect)."""
    mu = np.asarray(level_means, dtype=float)
    t = mu.size
    with np.errstate(over="ignore"):  # an effect too large to square: detected by any design
        spread = float(np.mean((mu - mu.mean()) ** 2))

    def f2_at(m: float) -> float:
        var_mean = var_unit + var_residual / m
        return spread / var_mean if var_mean > 0 else float("inf")

    f2 = f2_at(observations_per_unit)
    total = var_unit + var_residual
    icc = var_unit / total if total > 0 else 0.0
    by_size = tuple((m, units_needed(f2_at(m), t, alpha, power)) for m in unit_sizes)
    return DesignNeeds(
        units_needed(f2, t, alpha, power),
        power,
        alpha,
        float(np.sqrt(f2)),
        float(observations_per_unit),
        float(icc),
        by_size,
    )
