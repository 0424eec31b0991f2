"""Tests for the claim stage: reported-result reading, spec files, claim building.

Sources of the reporting formats:
* APA Publication Manual, 7th ed., in-text statistics: "F(2, 57) = 8.31, p = .001",
  "t(38) = 2.90", "chi2(1, N = 90) = 0.89", italic p without a leading zero,
  exact p to two or three decimals and "p < .001" below that (recalled from memory).
* Nature-family journals: capital P, "P = 1.2 x 10^-4", "P < 0.001" (recalled from memory).
* SPSS output prints "Sig. .000", copied into papers as "p = .000"; APA asks for
  "p < .001" instead (recalled from memory).
* Older styles: subscript df ("F2,57"), "t = 2.9, df = 38", "n.s." (common practice).
* TOML 1.0.0 specification (toml.io) for what is valid TOML.
* Per-term results as in ANOVA tables and APA-style text, one line per effect:
  "variety: F(2, 55) = 3.51, p = .037", interaction labels "a:b" (R, patsy) and
  "a x b" / "a × b" (common practice in papers).
The expected fields are what the quoted text says, read by a person.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st

from replicheck.claim import (
    SPEC_KEYS,
    SPEC_SUFFIX,
    Claim,
    ReportedResult,
    build_claim,
    load_spec,
    match_term,
    normalise_term,
    parse_reported,
    parse_term_claim,
    spec_beside,
)
from replicheck.errors import InputError
from replicheck.formula import parse_formula

# text -> (test, statistic, df, p_value, p_relation, n_per_group, n_total)
Row = tuple[
    str | None,
    float | None,
    tuple[float, ...] | None,
    float | None,
    str | None,
    int | None,
    int | None,
]
READ_TABLE: list[tuple[str, Row]] = [
    # APA 7th ed. style (recalled from memory)
    ("F(2, 57) = 8.31, p = .001", ("F", 8.31, (2, 57), 0.001, "=", None, None)),
    ("t(38) = 2.90, p = .006", ("t", 2.90, (38,), 0.006, "=", None, None)),
    ("t(38) = -2.90, p = .006", ("t", -2.90, (38,), 0.006, "=", None, None)),
    ("χ2(1, N = 90) = 0.89, p = .35", ("chi2", 0.89, (1,), 0.35, "=", None, 90)),
    ("r(38) = .45, p = .004", ("r", 0.45, (38,), 0.004, "=", None, None)),
    ("F(2, 57) = 8.31, p < .001", ("F", 8.31, (2, 57), 0.001, "<", None, None)),
    ("z = 2.10, p = .036", ("z", 2.10, None, 0.036, "=", None, None)),
    # Welch / Satterthwaite fractional df as printed by R and SPSS (common practice)
    ("t(37.62) = 2.10, p = .043", ("t", 2.10, (37.62,), 0.043, "=", None, None)),
    ("F(2, 57.4) = 8.31", ("F", 8.31, (2, 57.4), None, None, None, None)),
    # layout variants
    ("F(2,57)=8.31", ("F", 8.31, (2, 57), None, None, None, None)),
    ("F [2, 57] = 8.31", ("F", 8.31, (2, 57), None, None, None, None)),
    ("F2,57 = 8.31", ("F", 8.31, (2, 57), None, None, None, None)),
    ("F₂,₅₇ = 8.31", ("F", 8.31, (2, 57), None, None, None, None)),
    ("F = 8.31, df = 2, 57, p < .001", ("F", 8.31, (2, 57), 0.001, "<", None, None)),
    ("t = 2.9, df = 38", ("t", 2.9, (38,), None, None, None, None)),
    ("t(38) = −2.9", ("t", -2.9, (38,), None, None, None, None)),  # unicode minus
    ("t(38) = –2.9; p=.006", ("t", -2.9, (38,), 0.006, "=", None, None)),  # en dash
    ("chi2(1) = 4.2", ("chi2", 4.2, (1,), None, None, None, None)),
    ("X2(1)=4.2", ("chi2", 4.2, (1,), None, None, None, None)),
    ("χ²(1) = 4.2", ("chi2", 4.2, (1,), None, None, None, None)),
    ("chi-square(2) = 7.1, p < .05", ("chi2", 7.1, (2,), 0.05, "<", None, None)),
    # p styles
    ("p=.001", (None, None, None, 0.001, "=", None, None)),
    ("p < 0.05", (None, None, None, 0.05, "<", None, None)),
    ("P = 0.006", (None, None, None, 0.006, "=", None, None)),
    ("p = 1.2e-4", (None, None, None, 1.2e-4, "=", None, None)),
    ("P = 1.2 × 10^-4", (None, None, None, 1.2e-4, "=", None, None)),  # Nature style
    ("P = 1.2 × 10⁻⁴", (None, None, None, 1.2e-4, "=", None, None)),
    ("p < 0.001***", (None, None, None, 0.001, "<", None, None)),
    ("p ≤ .05", (None, None, None, 0.05, "<=", None, None)),
    ("p > .05", (None, None, None, 0.05, ">", None, None)),
    ("p = .000", (None, None, None, 0.001, "<", None, None)),  # SPSS; APA: write p < .001
    ("ns", (None, None, None, None, "ns", None, None)),
    ("n.s.", (None, None, None, None, "ns", None, None)),
    ("F(1, 38) = 2.1, not significant", ("F", 2.1, (1, 38), None, "ns", None, None)),
    # sample sizes
    ("n = 20 per group", (None, None, None, None, None, 20, None)),
    ("n = 20 fish per feed", (None, None, None, None, None, 20, None)),
    ("n=20/group", (None, None, None, None, None, 20, None)),
    ("20 per group", (None, None, None, None, None, 20, None)),
    ("N = 60", (None, None, None, None, None, None, 60)),
    ("n = 20 per group (N = 60)", (None, None, None, None, None, 20, 60)),
    ("n = 20 fish per tank, N = 60", (None, None, None, None, None, None, 60)),  # not per group
    (
        "one-way ANOVA, n = 20 fish per feed, F(2, 57) = 8.3, p < 0.001",
        ("F", 8.3, (2, 57), 0.001, "<", 20, None),
    ),
    # several results: the first statistic and the p that follows it
    ("t(38) = 2.9, p = .006; F(2, 57) = 8.31, p = .001", ("t", 2.9, (38,), 0.006, "=", None, None)),
    (
        "t(38) = 2.9, p = .006 (Bonferroni-adjusted p = .018)",
        ("t", 2.9, (38,), 0.006, "=", None, None),
    ),
    ("p = .02, t(38) = 2.5", ("t", 2.5, (38,), 0.02, "=", None, None)),
    # effect sizes are not test statistics
    (
        "F(2, 57) = 8.31, p = .001, η² = .23, Cohen's f = 0.54",
        ("F", 8.31, (2, 57), 0.001, "=", None, None),
    ),
]


@pytest.mark.parametrize(("text", "expected"), READ_TABLE, ids=[t for t, _ in READ_TABLE])
def test_parse_reported_table(text: str, expected: Row) -> None:
    test, statistic, df, p_value, relation, n_group, n_total = expected
    r = parse_reported(text)
    assert r.text == text
    assert r.test == test
    assert r.statistic == (None if statistic is None else pytest.approx(statistic))
    assert r.df == (None if df is None else pytest.approx(df))
    assert r.p_value == (None if p_value is None else pytest.approx(p_value, rel=1e-12))
    assert r.p_relation == relation
    assert r.n_per_group == n_group
    assert r.n_total == n_total


def test_parse_reported_is_case_insensitive() -> None:
    assert parse_reported("f(2, 57) = 8.31, P < .001") == ReportedResult(
        "f(2, 57) = 8.31, P < .001", "F", 8.31, (2.0, 57.0), 0.001, "<"
    )


@pytest.mark.parametrize(
    "text",
    [
        "",
        "   ",
        "the difference was significant",
        "Cohen's f = 0.25",
        "R² = .45",
        "n = 3 tanks per feed",
        "p = 1.5",
        "p < 0",
        "F(2, 57) = -3.1",
        "r(38) = 1.3",
        "F(2) = 3.1",
        "t(0) = 2.0",
        "z(38) = 2.1",
    ],
)
def test_parse_reported_rejects(text: str) -> None:
    with pytest.raises(InputError) as info:
        parse_reported(text)
    assert "\n" not in str(info.value)


@given(
    f=st.floats(0.01, 999, allow_nan=False),
    d1=st.integers(1, 20),
    d2=st.integers(2, 5000),
    p=st.floats(0.001, 0.999),
    style=st.sampled_from(
        [
            "F({a}, {b}) = {f}, p = {p}",
            "F({a},{b})={f}; p={p}",
            "F[{a}, {b}] = {f}, P = {p}",
            "F{a},{b} = {f}, p = {p}",
        ]
    ),
)
def test_parse_reported_round_trip(f: float, d1: int, d2: int, p: float, style: str) -> None:
    # values come from the generator, formatted as in the APA/variant styles above
    fs, ps = f"{f:.2f}", f"{p:.3f}".lstrip("0")
    r = parse_reported(style.format(a=d1, b=d2, f=fs, p=ps))
    assert (r.test, r.df, r.statistic) == ("F", (float(d1), float(d2)), float(fs))
    assert (r.p_value, r.p_relation) == (float(ps), "=")


# significance: common practice is "significant when p < alpha"; a rounded p printed
# exactly at alpha cannot tell; "ns" is the authors' own verdict.
@pytest.mark.parametrize(
    ("text", "alpha", "expected"),
    [
        ("p = .001", 0.05, True),
        ("p = .049", 0.05, True),
        ("p = .051", 0.05, False),
        ("p = .05", 0.05, None),
        ("p = .03", 0.01, False),
        ("p < .05", 0.05, True),
        ("p < .001", 0.01, True),
        ("p < .10", 0.05, None),
        ("p <= .05", 0.05, None),
        ("p <= .01", 0.05, True),
        ("p > .05", 0.05, False),
        ("p > .01", 0.05, None),
        ("p >= .05", 0.05, False),
        ("n.s.", 0.05, False),
        ("n.s.", 0.10, False),
        ("F(2, 57) = 8.31", 0.05, None),
    ],
)
def test_significant_at(text: str, alpha: float, expected: bool | None) -> None:
    assert parse_reported(text).significant_at(alpha) is expected


@pytest.mark.parametrize("alpha", [0.0, 1.0, -0.1, 1.5, math.nan])
def test_significant_at_rejects_bad_alpha(alpha: float) -> None:
    with pytest.raises(InputError):
        parse_reported("p = .01").significant_at(alpha)


# --- spec files --------------------------------------------------------------


def _write(tmp_path: Path, body: str, name: str = "trial.replicheck.toml") -> Path:
    path = tmp_path / name
    path.write_text(body, encoding="utf-8")
    return path


def test_load_spec_valid(tmp_path: Path) -> None:
    path = _write(
        tmp_path,
        'response = "weight"\ntreatment = ["feed", "temp"]\nunit = "tank"\n'
        'claim = "F(2, 57) = 8.31, p = .001"\nalpha = 0.01\nna = ["NA", -99, 9.5]\nsheet = 1\n',
    )
    assert load_spec(path) == {
        "response": "weight",
        "treatment": ("feed", "temp"),
        "unit": ("tank",),
        "claim": "F(2, 57) = 8.31, p = .001",
        "alpha": 0.01,
        "na": ("NA", "-99", "9.5"),
        "sheet": 1,
    }


def test_load_spec_scalars(tmp_path: Path) -> None:
    spec = load_spec(_write(tmp_path, 'treatment = "feed"\nna = -99\nsheet = "Raw data"\n'))
    assert spec == {"treatment": ("feed",), "na": ("-99",), "sheet": "Raw data"}


def test_load_spec_unknown_key_lists_allowed(tmp_path: Path) -> None:
    with pytest.raises(
        InputError, match=r"unknown key 'respones'.*allowed keys: alpha, block, claim"
    ):
        load_spec(_write(tmp_path, 'respones = "weight"\n'))


@pytest.mark.parametrize(
    ("body", "pattern"),
    [
        ('response = "weight\n', "not valid TOML"),  # unterminated string (TOML 1.0.0)
        ("response = weight\n", "not valid TOML"),  # bare value
        ("response = 3\n", "'response'.*string"),
        ("treatment = []\n", "'treatment'.*empty"),
        ("treatment = [1, 2]\n", "'treatment'.*string"),
        ('alpha = "0.05"\n', "'alpha'.*number"),
        ("alpha = 5\n", "alpha must be.*between 0 and 1"),
        ("alpha = true\n", "'alpha'.*number"),
        ("na = [true]\n", "'na'.*strings or numbers"),
        ("na = [[1]]\n", "'na'.*strings or numbers"),
        ("sheet = -1\n", "'sheet'"),
        ("sheet = 1.5\n", "'sheet'"),
    ],
)
def test_load_spec_rejects(tmp_path: Path, body: str, pattern: str) -> None:
    with pytest.raises(InputError, match=pattern) as info:
        load_spec(_write(tmp_path, body))
    assert "\n" not in str(info.value)


def test_load_spec_missing_file(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="not found"):
        load_spec(tmp_path / "nope.toml")


def test_spec_beside(tmp_path: Path) -> None:
    data = tmp_path / "trial.csv"
    data.write_text("a,b\n1,2\n", encoding="utf-8")
    assert spec_beside(data) is None
    spec = _write(tmp_path, 'response = "b"\n', "trial" + SPEC_SUFFIX)
    assert spec_beside(data) == spec
    assert spec_beside(str(data)) == spec
    tar = _write(tmp_path, "", "data.tar" + SPEC_SUFFIX)
    assert spec_beside(tmp_path / "data.tar.csv") == tar  # only the last suffix is replaced
    assert spec_beside(tmp_path / "other" / "trial.csv") is None


# --- building the claim --------------------------------------------------------

_NONE: dict[str, Any] = dict(
    response=None,
    treatments=(),
    unit=None,
    claim_text=None,
    alpha=None,
    na_values=(),
    sheet=None,
    spec=None,
)


def _claim(**kw: Any) -> Claim:
    return build_claim(**{**_NONE, **kw})


SPEC = {
    "response": "weight",
    "treatment": ["feed"],
    "unit": "tank",
    "alpha": 0.01,
    "na": ["NA", -99],
    "sheet": 2,
    "claim": "F(2, 57) = 8.31, p = .001",
}


def test_build_claim_from_spec_only() -> None:
    c = _claim(spec=SPEC, spec_path="trial.replicheck.toml")
    assert (c.response, c.treatments, c.unit, c.alpha) == ("weight", ("feed",), "tank", 0.01)
    assert c.na_values == ("NA", "-99")
    assert c.sheet == "2"
    assert c.spec_path == "trial.replicheck.toml"
    assert c.reported is not None and c.reported.df == (2.0, 57.0)


def test_build_claim_command_line_wins() -> None:
    c = _claim(
        spec=SPEC,
        response="length",
        treatments=["diet", "temp"],
        unit="cage",
        claim_text="t(38) = 2.9, p = .006",
        alpha=0.1,
        na_values=["-", "NA"],
        sheet="Raw",
    )
    assert (c.response, c.treatments, c.unit, c.alpha, c.sheet) == (
        "length",
        ("diet", "temp"),
        "cage",
        0.1,
        "Raw",
    )
    assert c.na_values == ("NA", "-99", "-")  # union, spec first, no duplicates
    assert c.reported is not None and c.reported.test == "t"


def test_build_claim_defaults() -> None:
    c = _claim(response="y", treatments=["g"])
    assert (c.unit, c.reported, c.alpha, c.na_values, c.sheet, c.spec_path) == (
        None,
        None,
        0.05,
        (),
        None,
        None,
    )


@pytest.mark.parametrize(
    ("kw", "pattern"),
    [
        ({"treatments": ["g"]}, r"no response column given: use response=\.\.\., formula=\.\.\."),
        ({"response": "y"}, "no treatment column given"),
        ({"response": "y", "treatments": ["g"], "alpha": 1.0}, "alpha"),
        ({"response": "y", "treatments": ["g"], "alpha": 0.0}, "alpha"),
        ({"response": "y", "treatments": ["y"]}, "both the response and a treatment"),
        ({"response": "y", "treatments": ["g", "g"]}, "given twice"),
        ({"response": "y", "treatments": ["g"], "unit": "y"}, "both the response and a unit"),
        ({"response": "y", "treatments": ["g"], "unit": "g"}, "both a treatment and a unit"),
        (
            {"response": "y", "treatments": ["g"], "roles": {"block": "b", "unit": "b"}},
            "stated both as",
        ),
        ({"response": "y", "treatments": ["g"], "unit": "a::b"}, "empty part"),
        ({"response": "y", "treatments": ["g"], "unit_labels": "sideways"}, "unit_labels=.* must"),
        ({"response": "y", "treatments": ["g"], "claim_text": "hello"}, "no statistic"),
        ({"response": "y", "treatments": ["g"], "spec": {"colour": 1}}, "unknown key 'colour'"),
    ],
)
def test_build_claim_rejects(kw: dict[str, Any], pattern: str) -> None:
    with pytest.raises(InputError, match=pattern):
        _claim(**kw)


def test_build_claim_single_treatment_string() -> None:
    assert _claim(response="y", treatments="feed").treatments == ("feed",)


# --- results per term ----------------------------------------------------------

# text -> (term, test, statistic, df, p_value, p_relation, result text)
TermRow = tuple[
    str | None, str | None, float | None, tuple[float, ...] | None, float | None, str | None, str
]
TERM_TABLE: list[tuple[str, TermRow]] = [
    (
        "variety: F(2, 55) = 3.51, p = .037",
        ("variety", "F", 3.51, (2, 55), 0.037, "=", "F(2, 55) = 3.51, p = .037"),
    ),
    (
        "variety:nitrogen: F(6, 45) = 0.30, p = .93",
        ("variety:nitrogen", "F", 0.30, (6, 45), 0.93, "=", "F(6, 45) = 0.30, p = .93"),
    ),
    (
        "F(2, 57) = 8.31, p = .001",
        (None, "F", 8.31, (2, 57), 0.001, "=", "F(2, 57) = 8.31, p = .001"),
    ),
    (
        "variety × nitrogen: F(6,45)=0.3",
        ("variety × nitrogen", "F", 0.3, (6, 45), None, None, "F(6,45)=0.3"),
    ),
    ("feed x temp : t(38) = -2.9", ("feed x temp", "t", -2.9, (38,), None, None, "t(38) = -2.9")),
    ("feed:temp:F(2,54)=1.2", ("feed:temp", "F", 1.2, (2, 54), None, None, "F(2,54)=1.2")),
    ("Tank ID: p < .05", ("Tank ID", None, None, None, 0.05, "<", "p < .05")),
    ("feed: n.s.", ("feed", None, None, None, None, "ns", "n.s.")),
    (
        "dose: χ2(1, N = 90) = 0.89",
        ("dose", "chi2", 0.89, (1,), None, None, "χ2(1, N = 90) = 0.89"),
    ),
    # a factor called F or p in an interaction is not taken for the statistic
    ("sex:F: F(1, 20) = 4.1", ("sex:F", "F", 4.1, (1, 20), None, None, "F(1, 20) = 4.1")),
    ("a:p: F(1, 20) = 4.1", ("a:p", "F", 4.1, (1, 20), None, None, "F(1, 20) = 4.1")),
    # a colon inside the result, or before a non-result, is not a term prefix
    (
        "F(2, 57) = 8.31, p = .001; temp: F(1, 57) = 2.0",
        (None, "F", 8.31, (2, 57), 0.001, "=", "F(2, 57) = 8.31, p = .001; temp: F(1, 57) = 2.0"),
    ),
    (
        "Table 2: F(2, 57) = 8.31",  # taken as a term name; matching it to a term fails later
        ("Table 2", "F", 8.31, (2, 57), None, None, "F(2, 57) = 8.31"),
    ),
]


@pytest.mark.parametrize(("text", "expected"), TERM_TABLE, ids=[t for t, _ in TERM_TABLE])
def test_parse_term_claim_table(text: str, expected: TermRow) -> None:
    term, test, statistic, df, p_value, relation, rest = expected
    name, r = parse_term_claim(text)
    assert name == term
    assert (r.text, r.test, r.p_relation) == (rest, test, relation)
    assert r.statistic == (None if statistic is None else pytest.approx(statistic))
    assert r.df == (None if df is None else pytest.approx(df))
    assert r.p_value == (None if p_value is None else pytest.approx(p_value))


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        ("", "empty"),
        (": F(2, 57) = 8.31", "no term name"),
        ("feed: F(2, 57) = 8.31, p = .001; temp: F(1, 57) = 2.0", "one claim per term"),
        ("feed: the effect was large", "no statistic"),
        ("feed: F(2, 57) = -1", "cannot be negative"),
    ],
)
def test_parse_term_claim_rejects(text: str, pattern: str) -> None:
    with pytest.raises(InputError, match=pattern) as info:
        parse_term_claim(text)
    assert "\n" not in str(info.value)


@pytest.mark.parametrize(
    ("name", "factors"),
    [
        ("variety", {"variety"}),
        ("variety:nitrogen", {"variety", "nitrogen"}),
        ("Nitrogen:Variety", {"variety", "nitrogen"}),
        ("variety x nitrogen", {"variety", "nitrogen"}),
        ("Variety X Nitrogen", {"variety", "nitrogen"}),
        ("variety×nitrogen", {"variety", "nitrogen"}),
        ("variety × nitrogen × block", {"variety", "nitrogen", "block"}),
        ("Tank ID", {"tankid"}),  # separators ignored as for column names
        ("tank_id:feed-type", {"tankid", "feedtype"}),
        ("C(feed):Q('tank id')", {"feed", "tankid"}),
        ("`feed`:temp", {"feed", "temp"}),
        ("taxon", {"taxon"}),  # an x inside a word does not split
        ("a*b", {"a*b"}),  # '*' is formula notation, not an interaction label
    ],
)
def test_normalise_term(name: str, factors: set[str]) -> None:
    assert normalise_term(name) == frozenset(factors)


@pytest.mark.parametrize("name", ["", "  ", "a:", ":b", "a × "])
def test_normalise_term_rejects(name: str) -> None:
    with pytest.raises(InputError):
        normalise_term(name)


def test_match_term() -> None:
    terms = parse_formula("yield ~ Variety * N_rate + block").terms
    assert match_term("n rate x variety", terms) == ("Variety", "N_rate")
    assert match_term("BLOCK", terms) == ("block",)
    with pytest.raises(InputError, match="not in the model; its terms are: Variety, N_rate"):
        match_term("variety:block", terms)


# --- spec with formula and several claims ----------------------------------------


def test_spec_keys() -> None:
    assert SPEC_KEYS == (
        "alpha",
        "block",
        "claim",
        "covariate",
        "dates",
        "effect",
        "family",
        "fill_down",
        "formula",
        "header_row",
        "hidden",
        "id",
        "ignore",
        "limits",
        "long",
        "na",
        "order",
        "power",
        "range",
        "response",
        "seed",
        "sheet",
        "treatment",
        "unit",
        "unit_labels",
        "within",
    )


def test_load_spec_formula_and_claim_list(tmp_path: Path) -> None:
    path = _write(
        tmp_path,
        'formula = "yield ~ variety * nitrogen + block"\n'
        "claim = [\n"
        '  "variety: F(2, 10) = 1.49, p = .27",\n'
        '  "variety:nitrogen: F(6, 45) = 0.30, p = .93",\n'
        "]\n",
    )
    assert load_spec(path) == {
        "formula": "yield ~ variety * nitrogen + block",
        "claim": (
            "variety: F(2, 10) = 1.49, p = .27",
            "variety:nitrogen: F(6, 45) = 0.30, p = .93",
        ),
    }
    spec = load_spec(_write(tmp_path, 'formula = "y ~ a"\nresponse = "y"\ntreatment = "a"\n'))
    assert spec["formula"] == "y ~ a"  # agreeing keys are allowed


@pytest.mark.parametrize(
    ("body", "pattern"),
    [
        ("formula = 3\n", "'formula'.*string"),
        ('formula = "yield"\n', r"'formula' in .*trial\.replicheck\.toml: .*no '~'"),
        ('formula = "log(mass) ~ variety"\n', r"log\(\) is not supported"),
        ('formula = "yield ~ variety"\nresponse = "mass"\n', "response 'mass'.*differs"),
        ('formula = "yield ~ variety"\ntreatment = ["block"]\n', "treatments block.*differ"),
        ("claim = []\n", "'claim'.*empty list"),
        ('claim = ["F(1, 8) = 3.1", 3]\n', "'claim'.*non-empty strings"),
        ("claim = 3\n", "'claim'.*string or a list of strings"),
        ('claim = ""\n', "'claim'.*string or a list of strings"),
    ],
)
def test_load_spec_rejects_formula_and_claims(tmp_path: Path, body: str, pattern: str) -> None:
    with pytest.raises(InputError, match=pattern) as info:
        load_spec(_write(tmp_path, body))
    assert "\n" not in str(info.value)


# --- build_claim with formulas and per-term claims ----------------------------------


def test_build_claim_from_formula() -> None:
    c = _claim(formula="yield ~ variety * nitrogen + block")
    assert c.response == "yield"
    assert c.treatments == ("variety", "nitrogen", "block")
    assert c.formula is not None
    assert c.formula.terms == (("variety",), ("nitrogen",), ("block",), ("variety", "nitrogen"))
    assert (c.reported, c.reported_terms) == (None, ())


def test_build_claim_formula_with_agreeing_columns() -> None:
    c = _claim(formula="y ~ a*b", response="y", treatments=["b", "a"])
    assert (c.response, c.treatments) == ("y", ("a", "b"))  # the formula's order


@pytest.mark.parametrize(
    ("kw", "pattern"),
    [
        ({"formula": "y ~ a*b", "response": "z"}, "response 'z' on the command line differs"),
        ({"formula": "y ~ a*b", "treatments": ["a"]}, "treatments a on the command line differ"),
        ({"formula": "y ~ a", "treatments": ["a", "c"]}, "differ"),
        ({"formula": "y ~ a + (log(a)|tank)"}, "in a random term"),
        ({"formula": ""}, "'formula'.*non-empty string"),
        ({"formula": "y ~ a", "claim_texts": ["b: F(1, 8) = 3.1"]}, "'b' is not in the model"),
        (
            {"formula": "y ~ a + b", "claim_texts": ["a:b: F(1, 8) = 3.1"]},
            "'a:b' is not in the model; its terms are: a, b",
        ),
        (
            {"formula": "y ~ a*b", "claim_texts": ["F(3, 8) = 3.1", "t(8) = 2.0"]},
            "two results without a term name",
        ),
        (
            {"formula": "y ~ a*b", "claim_texts": ["a:b: F(1, 8) = 3.1", "B x A: F(1, 8) = 3.1"]},
            "two results for the same term: 'a:b' and 'B x A'",
        ),
        (
            {"response": "y", "treatments": ["a"], "claim_texts": ["tank: F(1, 8) = 3.1"]},
            "'tank' names a column that is not a treatment",
        ),
        ({"response": "y", "treatments": ["a"], "claim_texts": ["a: hello"]}, "no statistic"),
    ],
)
def test_build_claim_formula_conflicts(kw: dict[str, Any], pattern: str) -> None:
    with pytest.raises(InputError, match=pattern) as info:
        _claim(**kw)
    assert "\n" not in str(info.value)


def test_build_claim_per_term_results() -> None:
    c = _claim(
        formula="yield ~ variety * nitrogen",
        claim_text="F(11, 60) = 2.2, p = .03",
        claim_texts=["nitrogen x variety: F(6, 45) = 0.30, p = .93", "Variety: F(2, 10) = 1.49"],
    )
    assert c.reported is not None and c.reported.df == (11.0, 60.0)
    assert [name for name, _ in c.reported_terms] == ["nitrogen x variety", "Variety"]
    first, second = (r for _, r in c.reported_terms)
    assert (first.statistic, first.df, first.p_value) == (0.30, (6.0, 45.0), 0.93)
    assert (second.statistic, second.df, second.p_value) == (1.49, (2.0, 10.0), None)


def test_build_claim_terms_without_formula() -> None:
    c = _claim(
        response="y",
        treatments=["feed", "temp"],
        claim_texts="temp x feed: F(1, 36) = 4.2, p = .048",  # a single string is one claim
    )
    assert c.formula is None and c.reported is None
    assert c.reported_terms[0][0] == "temp x feed"
    assert c.reported_terms[0][1].p_value == 0.048


SPEC_F = {
    "formula": "yield ~ variety * nitrogen",
    "claim": ["variety: F(2, 10) = 1.49, p = .27", "F(11, 45) = 2.2"],
    "unit": "plot",
}


def test_build_claim_spec_formula_and_claims() -> None:
    c = _claim(spec=SPEC_F)
    assert (c.response, c.treatments, c.unit) == ("yield", ("variety", "nitrogen"), "plot")
    assert c.formula is not None and c.formula.text == "yield ~ variety * nitrogen"
    assert c.formula.terms == (("variety",), ("nitrogen",), ("variety", "nitrogen"))
    assert c.reported is not None and c.reported.text == "F(11, 45) = 2.2"
    assert [n for n, _ in c.reported_terms] == ["variety"]


def test_build_claim_command_line_claims_replace_spec_claims() -> None:
    c = _claim(spec=SPEC_F, claim_texts=["nitrogen: F(3, 45) = 37.7, p < .001"])
    assert c.reported is None
    assert [n for n, _ in c.reported_terms] == ["nitrogen"]
    c = _claim(spec={**SPEC_F, "claim": "F(11, 45) = 2.2"}, claim_text="p = .04")
    assert c.reported is not None and c.reported.p_value == 0.04


def test_build_claim_command_line_formula_replaces_spec_model() -> None:
    c = _claim(spec={**SPEC_F, "claim": "block: F(3, 15) = 2.0"}, formula="mass ~ block")
    assert (c.response, c.treatments) == ("mass", ("block",))
    assert c.formula is not None and c.formula.text == "mass ~ block"
    assert [n for n, _ in c.reported_terms] == ["block"]


def test_build_claim_command_line_response_keeps_spec_terms() -> None:
    c = _claim(spec=SPEC_F, response="protein", claim_text="F(11, 45) = 2.2")
    assert c.response == "protein"
    assert c.formula is not None
    assert c.formula.response == "protein"
    assert c.formula.terms == (("variety",), ("nitrogen",), ("variety", "nitrogen"))


def test_build_claim_command_line_treatments_replace_spec_formula() -> None:
    c = _claim(spec=SPEC_F, treatments=["variety"], claim_text="F(2, 10) = 1.49")
    assert (c.response, c.treatments, c.formula) == ("yield", ("variety",), None)
    same = _claim(spec=SPEC_F, treatments=["nitrogen", "variety"], claim_text="p = .2")
    assert same.formula is not None and same.formula.text == "yield ~ variety * nitrogen"


def test_build_claim_spec_response_and_treatment_without_formula_unchanged() -> None:
    c = _claim(spec=SPEC)
    assert (c.formula, c.reported_terms) == (None, ())
