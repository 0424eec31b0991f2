"""Reading a design as a statistician would: one small design per known failure class.

Invented data, labelled as such: each test builds the smallest design of its
kind with a seeded generator, so that the truth (what received the treatment)
is known by construction. The statistical reference of every number is
computed independently here (pandas group means, scipy's Student t or
statsmodels' OLS ANOVA on the unit means), never taken from replicheck.
Real documented designs of the same classes are in tests/test_real_designs.py.
"""

from __future__ import annotations

from typing import Any

import design_sim as ds
import numpy as np
import pandas as pd
import pytest
import scipy.stats
import statsmodels.formula.api as smf
from statsmodels.stats.anova import anova_lm

from replicheck import audit
from replicheck.numbers import p_phrase

Doc = dict[str, Any]


def _doc(d: pd.DataFrame, **kw: Any) -> Doc:
    return audit(d, find_spec=False, **kw).to_dict()


def _unit(doc: Doc, term: str | None = None) -> dict[str, Any]:
    units = doc["experimental_units"]
    return units[0] if term is None else next(u for u in units if u["treatment"] == term)


def _roles(doc: Doc) -> dict[str, str]:
    return {r["column"]: r["role"] for r in doc["roles"]}


def _rules(doc: Doc) -> set[str]:
    return {f["rule"] for f in doc["findings"]}


def _term(doc: Doc, term: str) -> dict[str, Any]:
    return next(t for t in doc["terms"] if t["term"] == term)


def _anova_f(frame: pd.DataFrame, formula: str, term: str) -> tuple[float, float, float]:
    fit = smf.ols(formula, data=frame).fit()
    tab = anova_lm(fit, typ=1)
    return float(tab.loc[term, "F"]), float(tab.loc[term, "df"]), float(fit.df_resid)


# ---------------------------------------------------------------- class 1


def _pigs(seed: int = 7) -> pd.DataFrame:
    """Invented: 36 pigs, 12 per diet, each weighed in 8 weeks."""
    rng = np.random.default_rng(seed)
    diet = np.repeat(["A", "B", "C"], 12)
    pig_eff = rng.normal(0, 3, 36)
    rows = [
        {
            "pig": f"P{p + 1}",
            "diet": diet[p],
            "week": w + 1,
            "weight": 20 + 5 * w + pig_eff[p] + rng.normal(0, 1),
        }
        for p in range(36)
        for w in range(8)
    ]
    return pd.DataFrame(rows)


@pytest.mark.parametrize("names", [("pig", "week"), ("c1", "c2")])
def test_repeated_measures_are_not_blocks_of_implicit_plots(names: tuple[str, str]) -> None:
    # The diet went to each pig; the weeks index its repeated weighings. The pig, not
    # the week x diet cell, is the unit, whatever the columns are called; the week is a
    # within-unit factor. Reference: one-way ANOVA on the 36 pig means (scipy).
    d = _pigs().rename(columns={"pig": names[0], "week": names[1]})
    doc = _doc(d, response="weight", treatment="diet")
    unit = _unit(doc)
    assert unit["columns"] == [names[0]] and unit["n_units"] == 36
    assert _roles(doc)[names[1]] == "within"
    means = d.groupby(names[0]).agg(y=("weight", "mean"), diet=("diet", "first"))
    ref = scipy.stats.f_oneway(*(g["y"] for _, g in means.groupby("diet")))
    unit_means = next(a for a in doc["analyses"] if a["name"] == "unit_means")
    assert unit_means["statistic"] == pytest.approx(ref.statistic, rel=1e-9)
    assert unit_means["df"] == [2.0, 33.0]
    assert doc["verdict"]["status"] == "pseudoreplicated"


# ---------------------------------------------------------------- class 2


def test_two_racks_with_both_nutrients_are_a_block_not_four_units() -> None:
    # Invented: 600 plants, each given a nutrient level, on two racks that each hold
    # both levels; fruit counts with a rack effect that multiplies (a scale effect).
    # The rack x nutrient cells differ on the raw scale but not on the log scale: no
    # evidence of half-rack units. The plants are the units, the rack a block.
    rng = np.random.default_rng(3)
    n = 600
    rack = rng.integers(0, 2, n)
    nutrient = rng.integers(0, 2, n)
    mu = np.exp(2 + 0.8 * nutrient + 1.0 * rack)
    fruits = rng.poisson(mu * rng.gamma(5, 1 / 5, n))
    d = pd.DataFrame(
        {
            "rack": np.where(rack, "R2", "R1"),
            "nutrient": np.where(nutrient, "high", "low"),
            "fruits": fruits,
        }
    )
    raw = _anova_f(d, "fruits ~ C(rack) * C(nutrient)", "C(rack):C(nutrient)")
    logged = _anova_f(
        d.assign(fruits=np.log(d["fruits"] + 0.5)),
        "fruits ~ C(rack) * C(nutrient)",
        "C(rack):C(nutrient)",
    )
    assert scipy.stats.f.sf(raw[0], raw[1], raw[2]) < 0.01  # the raw-scale interaction
    assert scipy.stats.f.sf(logged[0], logged[1], logged[2]) > 0.01  # gone on the log scale
    doc = _doc(d, response="fruits", treatment="nutrient")
    assert _unit(doc)["unit"] is None and _unit(doc)["n_units"] == 600
    assert _roles(doc)["rack"] == "block"
    assert doc["verdict"]["status"] == "ok"


def test_two_plants_of_each_type_in_one_pot_are_plants_in_a_block() -> None:
    # Invented: 15 pots, two plants of each type in every pot, a strong pot effect and
    # no half-pot effect. The pot is a block; reading "pot 1" as a different pot under
    # each type (half-pots) is a reading of the name alone, shown beside but not taken.
    rng = np.random.default_rng(5)
    rows = []
    for p in range(15):
        pot_eff = rng.normal(0, 3)
        for t in ("cross", "self"):
            for _ in range(2):
                rows.append(
                    {
                        "pot": p + 1,
                        "type": t,
                        "height": 20 + 2 * (t == "cross") + pot_eff + rng.normal(0, 2),
                    }
                )
    d = pd.DataFrame(rows)
    doc = _doc(d, response="height", treatment="type")
    assert _unit(doc)["n_units"] == 60
    assert _roles(doc)["pot"] == "block"
    alt = _term(doc, "type")["alternatives"]
    assert [a["n_units"] for a in alt] == [30]  # the half-pots, kept apart
    assert doc["verdict"]["status"] in {"ok", "unclear"}
    # the same conclusion either way here, so not unclear
    assert doc["verdict"]["status"] == "ok"


def test_crossover_with_five_volunteers_is_paired() -> None:
    # Invented: 5 volunteers, each given the drug in one period and the placebo in the
    # other, measured every hour for 6 hours. The volunteer is a block (the same person
    # under both treatments) and so is the period, each volunteer x treatment period one
    # occasion: the treatment is tested on the 10 period means with the volunteers and
    # the periods fitted first, the crossover analysis, error df 10 - 5 - 1 - 1 = 3
    # (statsmodels OLS on the period means).
    rng = np.random.default_rng(11)
    rows = []
    for v in range(5):
        v_eff = rng.normal(0, 4)
        order = ("drug", "placebo") if v % 2 == 0 else ("placebo", "drug")
        for period, trt in enumerate(order):
            for hour in range(6):
                rows.append(
                    {
                        "volunteer": v + 1,
                        "period": period + 1,
                        "treatment": trt,
                        "hour": hour,
                        "y": 50 + v_eff + 3 * (trt == "drug") + rng.normal(0, 1.5),
                    }
                )
    d = pd.DataFrame(rows)
    doc = _doc(d, response="y", treatment="treatment")
    assert set(_unit(doc)["columns"]) == {"volunteer", "treatment"}
    assert _unit(doc)["n_units"] == 10
    roles = _roles(doc)
    assert roles["volunteer"] == "block" and roles["hour"] == "within"
    means = d.groupby(["volunteer", "period", "treatment"], as_index=False)["y"].mean()
    f, df1, df2 = _anova_f(means, "y ~ C(volunteer) + C(period) + C(treatment)", "C(treatment)")
    assert (df1, df2) == (1.0, 3.0)
    unit_means = next(a for a in doc["analyses"] if a["name"] == "unit_means")
    assert unit_means["df"] == [1.0, 3.0]
    assert unit_means["statistic"] == pytest.approx(f, rel=1e-9)


# ---------------------------------------------------------------- class 3


def test_a_covariate_recorded_per_subject_is_not_the_unit() -> None:
    # Invented: 40 subjects, 20 per arm, 3 visits each; a mean score recorded once per
    # subject (numbers with fractions) merges some subjects with equal scores. The
    # subject, not the score, is the unit.
    rng = np.random.default_rng(2)
    rows = []
    for s in range(40):
        score = float(np.round(rng.normal(50, 2), 1))
        s_eff = rng.normal(0, 2)
        for v in range(3):
            rows.append(
                {
                    "subject": f"S{s + 1:02d}",
                    "arm": "A" if s < 20 else "B",
                    "mean_score": score,
                    "visit": v + 1,
                    "y": 10 + s_eff + 0.1 * score + rng.normal(0, 1),
                }
            )
    d = pd.DataFrame(rows)
    doc = _doc(d, response="y", treatment="arm")
    assert _unit(doc)["unit"] == "subject" and _unit(doc)["n_units"] == 40
    assert _roles(doc)["mean_score"] == "covariate"


def test_a_label_of_treatment_combinations_is_not_a_unit() -> None:
    # Invented: contour (3) x depth (4) in 4 blocks, one sample per cell, and a group
    # code for each contour x depth combination. The group code is a label of the
    # treatments; it leaves the tests of contour and depth intact.
    rng = np.random.default_rng(4)
    rows = []
    for b in range(4):
        for ci, contour in enumerate(("top", "slope", "hollow")):
            for di, depth in enumerate(("0-10", "10-30", "30-60", "60-90")):
                rows.append(
                    {
                        "block": b + 1,
                        "contour": contour,
                        "depth": depth,
                        "group": ci * 4 + di + 1,
                        "ph": 5 + 0.2 * ci + 0.1 * di + rng.normal(0, 0.2),
                    }
                )
    d = pd.DataFrame(rows)
    doc = _doc(d, response="ph", treatment=["contour", "depth"])
    assert _roles(doc)["group"] == "label"
    assert "column-reads-as-treatment-label" in _rules(doc)
    assert all(u["unit"] != "group" for u in doc["experimental_units"])
    assert _term(doc, "contour")["p_value"] is not None


def _dosed(column: str, seed: int = 9) -> pd.DataFrame:
    """Invented: 120 patients randomised one by one to placebo or drug; the drug
    patients at 5, 10 or 20 mg, the amount in a numeric column that is 0 for placebo."""
    rng = np.random.default_rng(seed)
    arm = rng.permutation(np.repeat(["placebo", "drug"], 60))
    amount = np.where(arm == "drug", rng.choice([5, 10, 20], 120), 0)
    y = 10 + 0.05 * amount + rng.normal(0, 1, 120)
    return pd.DataFrame({"arm": arm, column: amount, "y": y})


def test_an_amount_zero_for_the_control_is_part_of_the_treatment() -> None:
    d = _dosed("dose_mg")
    doc = _doc(d, response="y", treatment="arm")
    assert _roles(doc)["dose_mg"] == "label"
    assert _unit(doc)["unit"] is None and doc["verdict"]["status"] == "ok"
    # the claimed test stands: Student's t on the 120 patients (scipy)
    ref = scipy.stats.ttest_ind(d.y[d.arm == "drug"], d.y[d.arm == "placebo"])
    assert _term(doc, "arm")["p_value"] == pytest.approx(float(ref.pvalue), rel=1e-9)


def test_a_unit_named_column_zero_for_the_control_stays_a_unit() -> None:
    # The same numbers named as tanks: all placebo animals in tank 0, the drug in
    # tanks 5, 10 and 20. A name that says unit keeps the reading of units.
    d = _dosed("tank")
    doc = _doc(d, response="y", treatment="arm")
    assert _roles(doc)["tank"] == "unit"
    assert doc["verdict"]["status"] != "ok"


def test_a_nearly_constant_flag_is_never_a_unit() -> None:
    # Invented: a randomised trial of 600 with a yes/no flag that is "yes" on 18 rows.
    rng = np.random.default_rng(6)
    arm = rng.permutation(np.repeat(["control", "treated"], 300))
    flag = np.zeros(600, dtype=int)
    flag[rng.choice(600, 18, replace=False)] = 1
    d = pd.DataFrame(
        {
            "arm": arm,
            "smoker": np.where(flag == 1, "yes", "no"),
            "y": rng.normal(0, 1, 600) + 0.2 * (arm == "treated"),
        }
    )
    doc = _doc(d, response="y", treatment="arm")
    assert doc["verdict"]["status"] == "ok" and _unit(doc)["unit"] is None
    assert "partial-alignment" not in _rules(doc)


# ---------------------------------------------------------------- class 4


def test_teams_nested_in_physique_are_its_unit_whatever_the_name() -> None:
    # Invented: 9 teams, 3 per physique, each testing two methods twice. The team is
    # the unit of physique (found from the nesting, not the name), the row the unit of
    # method. Reference: physique on the 9 team means (statsmodels one-way ANOVA).
    rng = np.random.default_rng(8)
    rows = []
    for ph in ("slight", "average", "heavy"):
        for t in range(3):
            t_eff = rng.normal(0, 2)
            for m in ("M1", "M2"):
                for _ in range(2):
                    rows.append(
                        {
                            "crew": f"{ph[0]}{t + 1}",
                            "physique": ph,
                            "method": m,
                            "rounds": 20 + 3 * (m == "M2") + t_eff + rng.normal(0, 1),
                        }
                    )
    d = pd.DataFrame(rows)
    doc = _doc(d, response="rounds", treatment=["physique", "method"])
    assert _unit(doc, "physique")["unit"] == "crew"
    assert _unit(doc, "method")["unit"] is None
    means = d.groupby("crew", as_index=False).agg(y=("rounds", "mean"), p=("physique", "first"))
    f, df1, df2 = _anova_f(means, "y ~ C(p)", "C(p)")
    term = _term(doc, "physique")
    assert term["df"] == pytest.approx([df1, df2])
    assert term["statistic"] == pytest.approx(f, rel=1e-7)


def test_patient_numbers_restarting_in_each_clinic_are_read_within_it() -> None:
    # Invented: 3 clinics, patients 1..12 in each, allocation alternating by number
    # (patient 1 of every clinic on arm A), 4 visits each. Label 1 is seen three times
    # at visit 1, once in each clinic: one patient is seen once per visit, so the
    # numbers restart within the clinics, which hold both arms (blocks).
    rng = np.random.default_rng(9)
    rows = []
    for c in range(3):
        for p in range(12):
            arm = "A" if p % 2 == 0 else "B"
            p_eff = rng.normal(0, 2)
            for v in range(4):
                rows.append(
                    {
                        "clinic": f"C{c + 1}",
                        "patient": p + 1,
                        "arm": arm,
                        "visit": v + 1,
                        "y": 5 + p_eff + 0.5 * (arm == "B") + rng.normal(0, 1),
                    }
                )
    d = pd.DataFrame(rows)
    doc = _doc(d, response="y", treatment="arm")
    unit = _unit(doc)
    assert set(unit["columns"]) == {"clinic", "patient"} and unit["n_units"] == 36
    roles = _roles(doc)
    assert roles["clinic"] == "block" and roles["visit"] == "within"
    assert "labels-local-to-treatment" in _rules(doc)


# ---------------------------------------------------------------- class 5


@pytest.mark.parametrize("name", ["subject", "id", "shrew", "loc", "occasion"])
def test_blocks_are_found_by_structure_not_by_name(name: str) -> None:
    # Invented: 12 individuals, each measured once under each of 3 conditions. Whatever
    # the column is called, it holds every condition once: a block, and the condition is
    # tested within it (statsmodels randomised-block ANOVA, error df 22).
    rng = np.random.default_rng(10)
    rows = []
    for s in range(12):
        s_eff = rng.normal(0, 3)
        for k, cond in enumerate(("a", "b", "c")):
            rows.append({name: s + 1, "cond": cond, "y": 10 + k + s_eff + rng.normal(0, 1)})
    d = pd.DataFrame(rows)
    doc = _doc(d, response="y", treatment="cond")
    assert _roles(doc)[name] == "block"
    f, df1, df2 = _anova_f(d, f"y ~ C({name}) + C(cond)", "C(cond)")
    term = _term(doc, "cond")
    assert term["df"] == pytest.approx([df1, df2])
    assert term["statistic"] == pytest.approx(f, rel=1e-7)
    assert doc["verdict"]["status"] == "ok"


# ---------------------------------------------------------------- class 6


def test_a_stated_unit_is_used() -> None:
    # The pig of the weighing study, stated: used as stated, reported as stated.
    d = _pigs()
    doc = _doc(d, response="weight", treatment="diet", unit="pig")
    unit = _unit(doc)
    assert unit["unit"] == "pig" and unit["source"] == "stated"
    assert "stated-unit-not-supported" not in _rules(doc)


# ---------------------------------------------------------------- class 7


def test_a_yes_no_response_written_with_codes_is_read() -> None:
    # Invented: a 0/1 outcome written "0_no" / "1_yes".
    rng = np.random.default_rng(12)
    arm = np.repeat(["A", "B"], 40)
    yes = rng.random(80) < np.where(arm == "A", 0.3, 0.6)
    d = pd.DataFrame({"arm": arm, "cured": np.where(yes, "1_yes", "0_no")})
    doc = _doc(d, response="cured", treatment="arm")
    assert doc["claim"]["response_kind"] == "binary"
    assert doc["claim"]["response_coding"] == {"0": "0_no", "1": "1_yes"}


def test_columns_differing_in_case_are_both_read() -> None:
    # Invented: a school's class number ('class') and a pupil's class of age ('Class').
    rng = np.random.default_rng(13)
    d = pd.DataFrame(
        {
            "class": np.repeat(np.arange(8), 5),
            "Class": np.tile(["young", "old"], 20),
            "sector": np.repeat(["public", "private"], 20),
            "y": rng.normal(0, 1, 40),
        }
    )
    doc = _doc(d, response="y", treatment="sector")
    assert _unit(doc)["unit"] == "class"
    assert {"class", "Class"} <= set(_roles(doc))


def test_a_column_that_cannot_be_weighed_is_left_out_not_fatal() -> None:
    # Invented: a partly aligned column beside the real unit; the audit completes.
    rng = np.random.default_rng(14)
    tank = np.repeat(np.arange(9), 6)
    feed = np.repeat(["F1", "F2", "F3"], 18)
    odd = tank.copy()
    odd[3] = 5  # one row mislabelled into a tank of another feed
    d = pd.DataFrame(
        {
            "tank": tank,
            "feed": feed,
            "tank_as_entered": odd,
            "y": rng.normal(0, 1, 54) + rng.normal(0, 1, 9)[tank],
        }
    )
    doc = _doc(d, response="y", treatment="feed")
    assert doc["verdict"]["status"] == "pseudoreplicated"
    assert _unit(doc)["n_units"] == 9


# --------------------------------------------------- split-split plot, no plot columns


def test_main_plots_the_data_do_not_show_are_named_with_the_statement_that_sets_them() -> None:
    """Invented split-split plot without plot columns (tests/design_sim.py, seed 1).

    The sub-plots (block x irrigation x variety cells) differ clearly and are
    taken as units; the main plots (block x irrigation cells) do not differ
    beyond the effects on the sub-plot means, so they are not taken, and the
    note names them with the p-value and the statement that would set them.
    Reference: statsmodels' sequential F of block:irrigation on the 24
    sub-plot means after block + irrigation * variety, the larger p of the raw
    and log scales.
    """
    d = ds.split_split_plot(1, labels="none")
    doc = _doc(d, response="y", treatment=["irrigation", "variety", "nitro"])
    assert _unit(doc, "irrigation")["unit"] == "block:irrigation:variety"
    ps = []
    for scale in (np.asarray, np.log):
        sub = (
            d.assign(s=scale(d["y"]))
            .groupby(["block", "irrigation", "variety"], as_index=False)["s"]
            .mean()
        )
        fit = smf.ols("s ~ block + irrigation * variety + block:irrigation", data=sub).fit()
        ps.append(float(anova_lm(fit, typ=1).loc["block:irrigation", "PR(>F)"]))
    p = max(ps)
    assert p > 0.01
    notes = [
        f["message"]
        for f in doc["findings"]
        if f["rule"] == "unit-reading-uncertain" and "'block' x 'irrigation' cell" in f["message"]
    ]
    assert len(notes) == 1
    assert f"({p_phrase(p)})" in notes[0]  # p-values as every report writes them
    # a Python caller is told the keyword argument (the command line: --unit block:irrigation)
    assert "unit='block:irrigation'" in notes[0]
    stated = _doc(
        d, response="y", treatment=["irrigation", "variety", "nitro"], unit="block:irrigation"
    )
    assert _unit(stated, "irrigation")["n_units"] == 8
