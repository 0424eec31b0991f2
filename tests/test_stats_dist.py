"""The distribution functions used for p-values equal scipy.stats (the reference library).

replicheck.stats.dist calls the special functions scipy.stats itself calls, so a
short audit need not load scipy.stats; these checks hold it to scipy.stats on grids
that cover the statistics an audit meets (tiny to huge df, fractional Satterthwaite
df, the edges of the support).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats as st

from replicheck.stats import dist

X = np.concatenate(
    [np.random.default_rng(1).lognormal(size=300) * 3, [0.0, -1.0, 1e-12, 1e3, np.inf, np.nan]]
)
Q = np.concatenate([np.linspace(0, 1, 21), [1e-12, 1 - 1e-12]])
DF = [0.5, 1, 2, 3.5, 10, 36.19, 1e4]


@pytest.mark.parametrize("a", DF)
@pytest.mark.parametrize("b", DF)
def test_f(a: float, b: float) -> None:
    np.testing.assert_allclose(dist.f_sf(X, a, b), st.f.sf(X, a, b), rtol=1e-13)
    np.testing.assert_allclose(dist.f_ppf(Q, a, b), st.f.ppf(Q, a, b), rtol=1e-12)


@pytest.mark.parametrize("a", DF)
def test_t_chi2(a: float) -> None:
    np.testing.assert_allclose(dist.t_sf(X - 3, a), st.t.sf(X - 3, a), rtol=1e-13)
    np.testing.assert_allclose(dist.t_ppf(Q, a), st.t.ppf(Q, a), rtol=1e-12)
    np.testing.assert_allclose(dist.chi2_sf(X, a), st.chi2.sf(X, a), rtol=1e-13)


def test_normal_and_invalid_df() -> None:
    np.testing.assert_allclose(dist.norm_ppf(Q), st.norm.ppf(Q), rtol=1e-13)
    np.testing.assert_allclose(dist.norm_sf(X - 3), st.norm.sf(X - 3), rtol=1e-13)
    assert np.isnan(dist.f_sf(1.0, 0, 5)) and np.isnan(st.f.sf(1.0, 0, 5))
    assert np.isnan(dist.chi2_sf(5.0, 0)) and np.isnan(st.chi2.sf(5.0, 0))
    assert isinstance(dist.f_sf(3.11, 2, 6), float)


@pytest.mark.parametrize(("d1", "d2"), [(1, 4), (2, 6), (2, 2997), (5, 40)])
@pytest.mark.parametrize("nc", [0.5, 3.0, 12.0, 80.0])
def test_power_functions(d1: float, d2: float, nc: float) -> None:
    crit = dist.f_isf(0.05, d1, d2)
    assert crit == pytest.approx(st.f.isf(0.05, d1, d2), rel=1e-13)
    assert dist.ncf_sf(crit, d1, d2, nc) == pytest.approx(st.ncf.sf(crit, d1, d2, nc), rel=1e-12)
