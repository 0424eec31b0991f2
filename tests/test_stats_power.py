"""Units a valid design would need, against statsmodels' power solver and the
closed-form design-effect sample size of Donner & Klar (2000, ch. 5)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.power import FTestAnovaPower

from replicheck.stats.power import design_needs, f_test_power, stated_effect_means, units_needed


@pytest.mark.parametrize(("f", "levels"), [(0.25, 3), (0.4, 2), (0.8, 4), (1.5, 3)])
def test_units_needed_matches_statsmodels(f: float, levels: int) -> None:
    # statsmodels' FTestAnovaPower uses noncentrality f^2 * N and df (k - 1, N - k): the
    # smallest whole number of units per level reaching 80% is ceil(N / k).
    n_total = FTestAnovaPower().solve_power(effect_size=f, k_groups=levels, alpha=0.05, power=0.8)
    expected = max(2, math.ceil(n_total / levels - 1e-9))
    assert units_needed(f * f, levels, 0.05, 0.8) == expected
    pw = FTestAnovaPower().power(effect_size=f, nobs=expected * levels, alpha=0.05, k_groups=levels)
    assert f_test_power(f * f, levels, expected, 0.05) == pytest.approx(pw, rel=1e-9)


def test_two_arms_close_to_the_design_effect_formula() -> None:
    # Donner & Klar (2000): clusters per arm k = (z_{a/2} + z_b)^2 2 (s2_u + s2_e/m) / d^2,
    # a normal approximation; the exact F (t) solution is at most a couple of units more.
    d, s2u, s2e, m = 2.0, 1.5, 9.0, 10
    z = stats.norm.isf(0.025) + stats.norm.isf(0.2)
    approx = z**2 * 2 * (s2u + s2e / m) / d**2
    needs = design_needs([0.0, d], s2u, s2e, m)
    assert needs.units_per_level is not None
    assert math.ceil(approx) <= needs.units_per_level <= math.ceil(approx) + 2
    # the same via the design effect 1 + (m - 1) rho on individual observations
    rho = s2u / (s2u + s2e)
    n_ind = z**2 * 2 * (s2u + s2e) / d**2
    assert approx == pytest.approx(n_ind * (1 + (m - 1) * rho) / m, rel=1e-12)


def test_more_observations_per_unit_stop_helping() -> None:
    needs = design_needs([0.0, 1.0], 1.0, 4.0, 10)
    sizes = dict(needs.by_unit_size)
    assert sizes[1] is not None and sizes[100] is not None
    assert sizes[1] >= sizes[10] >= sizes[100]
    # with m rho large the gain from 10 to 100 observations is small beside 1 to 10
    assert sizes[10] - sizes[100] < sizes[1] - sizes[10]
    assert np.isclose(needs.icc, 0.2)


def test_stated_difference_at_chosen_power_matches_statsmodels_t_power() -> None:
    # Two levels, a stated difference d between the means, 90% power: statsmodels'
    # TTestIndPower on unit means (standardised effect d / sd of a unit mean) solves
    # the same two-sample t test; the whole number of units is its ceiling.
    from statsmodels.stats.power import TTestIndPower

    d, s2u, s2e, m = 1.2, 0.8, 6.0, 8
    sd_mean = math.sqrt(s2u + s2e / m)
    n1 = TTestIndPower().solve_power(effect_size=d / sd_mean, alpha=0.05, power=0.9)
    needs = design_needs(stated_effect_means(d, 2), s2u, s2e, m, power=0.9)
    assert needs.units_per_level == math.ceil(n1 - 1e-9)


def test_stated_difference_with_three_levels_is_cohens_least_favourable_pattern() -> None:
    # Cohen (1988, sec. 8.2.1, pattern 1: two extreme means, the rest at the midpoint)
    # gives f = d / (sd sqrt(2k)); statsmodels' FTestAnovaPower then gives the units.
    d, s2u, s2e, m, k = 2.0, 1.0, 4.0, 5, 3
    sd_mean = math.sqrt(s2u + s2e / m)
    f = d / sd_mean / math.sqrt(2 * k)
    n_total = FTestAnovaPower().solve_power(effect_size=f, k_groups=k, alpha=0.05, power=0.8)
    needs = design_needs(stated_effect_means(d, k), s2u, s2e, m)
    assert needs.effect_f == pytest.approx(f, rel=1e-12)
    assert needs.units_per_level == max(2, math.ceil(n_total / k - 1e-9))
