"""Tests for model formulas (Wilkinson-Rogers notation).

Sources of the expected expansions:
* Wilkinson, G. N. & Rogers, C. E. (1973). Symbolic description of factorial models
  for analysis of variance. Applied Statistics 22:392-399 (the notation itself;
  citation recalled from memory).
* R documentation, ?stats::formula ("Model Formulae"): a*b is a + b + a:b;
  (a+b+c)^2 gives the main effects and second-order interactions; (a+b+c)^2 - a:b
  is a + b + c + b:c + a:c; a/b is a + b %in% a = a + a:b; y ~ x - 1, y ~ x + 0 and
  y ~ 0 + x remove the intercept; names may be quoted with backticks.
* patsy documentation, "How formulas work" (doc/formulas.rst): a + a is a;
  a / (b + c) is a + a:b + a:c; (a + b)/c is a + b + a:b:c; (a + b):(c + d) is
  a:c + a:d + b:c + b:d; a:a is a; (a:b):(a:c) is a:b:c; (a+b+c+d)**3 equals
  a*b*c*d - a:b:c:d; y ~ x - 1, x + -1, -1 + x, 0 + x all drop the intercept.
  patsy documentation, "Built-in functions": Q("name") looks up an odd column name;
  C(x, Sum) marks x categorical with sum-to-zero contrasts (recalled from memory).
As an independent check, term sets are compared with patsy's own parser
(patsy.ModelDesc.from_formula), which shares no code with the parser used here
(formulaic).
"""

from __future__ import annotations

import ast

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from replicheck.errors import InputError
from replicheck.formula import (
    ModelFormula,
    factor_name,
    parse_formula,
    rename_columns,
    replace_response,
)

Terms = tuple[tuple[str, ...], ...]

# formula -> (response, terms in the documented order: main effects, then 2-way, ...)
EXPANSIONS: list[tuple[str, str, Terms]] = [
    # R ?formula: a*b = a + b + a:b
    ("y ~ a*b", "y", (("a",), ("b",), ("a", "b"))),
    ("y ~ a * b + block", "y", (("a",), ("b",), ("block",), ("a", "b"))),
    ("y ~ a + b + a:b", "y", (("a",), ("b",), ("a", "b"))),
    # full three-way factorial (Wilkinson & Rogers 1973)
    (
        "y ~ a*b*c",
        "y",
        (("a",), ("b",), ("c",), ("a", "b"), ("a", "c"), ("b", "c"), ("a", "b", "c")),
    ),
    # R ?formula: (a+b+c)^2; patsy writes the same with **
    ("y ~ (a+b+c)^2", "y", (("a",), ("b",), ("c",), ("a", "b"), ("a", "c"), ("b", "c"))),
    ("y ~ (a + b + c)**2", "y", (("a",), ("b",), ("c",), ("a", "b"), ("a", "c"), ("b", "c"))),
    # R ?formula: (a+b+c)^2 - a:b = a + b + c + b:c + a:c
    ("y ~ (a+b+c)^2 - a:b", "y", (("a",), ("b",), ("c",), ("a", "c"), ("b", "c"))),
    # R ?formula and patsy: a/b = a + a:b (b nested in a)
    ("y ~ a/b", "y", (("a",), ("a", "b"))),
    ("y ~ a/b/c", "y", (("a",), ("a", "b"), ("a", "b", "c"))),
    # patsy: a/(b + c) = a + a:b + a:c; (a + b)/c = a + b + a:b:c
    ("y ~ a/(b + c)", "y", (("a",), ("a", "b"), ("a", "c"))),
    ("y ~ (a + b)/c", "y", (("a",), ("b",), ("a", "b", "c"))),
    # patsy: (a + b):(c + d) = a:c + a:d + b:c + b:d
    ("y ~ (a + b):(c + d)", "y", (("a", "c"), ("a", "d"), ("b", "c"), ("b", "d"))),
    # patsy: a + a is a; a:a is a; (a:b):(a:c) is a:b:c
    ("y ~ a + a", "y", (("a",),)),
    ("y ~ a:a", "y", (("a",),)),
    ("y ~ (a:b):(a:c)", "y", (("a", "b", "c"),)),
    # removal of main effects leaves the interaction (patsy: "-" is set difference)
    ("y ~ a*b - a", "y", (("b",), ("a", "b"))),
    # intercept markers are not terms (R ?formula; patsy "Intercept handling")
    ("y ~ x - 1", "y", (("x",),)),
    ("y ~ x + -1", "y", (("x",),)),
    ("y ~ -1 + x", "y", (("x",),)),
    ("y ~ 0 + x", "y", (("x",),)),
    ("y ~ x + 0", "y", (("x",),)),
    ("y ~ 1 + x", "y", (("x",),)),
    ("y ~ a*b - 1", "y", (("a",), ("b",), ("a", "b"))),
    # C() and Q() wrappers (patsy built-ins) and backticks (R ?formula) name columns
    ("y ~ C(a) + C(b, Sum)", "y", (("a",), ("b",))),
    ("y ~ C(a, Treatment(reference='x')) * b", "y", (("a",), ("b",), ("a", "b"))),
    ('y ~ Q("my col") + `odd name`', "y", (("my col",), ("odd name",))),
    (
        'Q("weight (g)") ~ C(Q("feed type"), Sum) * temp',
        "weight (g)",
        (("feed type",), ("temp",), ("feed type", "temp")),
    ),
    ("`dry mass` ~ `tank id`", "dry mass", (("tank id",),)),
    # a wrapper and the bare name are the same column, so removal works across them
    ("y ~ C(a)*b - a:b", "y", (("a",), ("b",))),
    ("y ~ a + C(a)", "y", (("a",),)),
    # non-ASCII and dotted names as plain identifiers
    ("Masse ~ Fütterung * Becken", "Masse", (("Fütterung",), ("Becken",), ("Fütterung", "Becken"))),
    ("y ~ a.b + c_d", "y", (("a.b",), ("c_d",))),
]


@pytest.mark.parametrize(("text", "response", "terms"), EXPANSIONS, ids=[e[0] for e in EXPANSIONS])
def test_expansion_table(text: str, response: str, terms: Terms) -> None:
    f = parse_formula(text)
    assert f.text == text
    assert f.response == response
    assert f.terms == terms


def test_patsy_documented_equivalence() -> None:
    # patsy docs: (a + b + c + d) ** 3 equals a*b*c*d - a:b:c:d (the same set of terms)
    cubed = parse_formula("y ~ (a + b + c + d) ** 3").terms
    assert set(cubed) == set(parse_formula("y ~ a*b*c*d - a:b:c:d").terms)
    assert len(cubed) == 4 + 6 + 4  # C(4,1) + C(4,2) + C(4,3)
    assert [len(t) for t in cubed] == sorted(len(t) for t in cubed)


@pytest.mark.parametrize(
    ("text", "factors"),
    [
        ("y ~ a * b + block", ("a", "b", "block")),
        ("y ~ a:b + c", ("a", "b", "c")),  # text order, not term order (c comes first there)
        ("y ~ c + a*b", ("c", "a", "b")),
        ("y ~ b:a", ("b", "a")),
        ("y ~ a + b - b", ("a",)),  # a removed term leaves no factor behind
        ("y ~ C(variety, Sum) * Q('N rate')", ("variety", "N rate")),
    ],
)
def test_factors_in_order_of_appearance(text: str, factors: tuple[str, ...]) -> None:
    assert parse_formula(text).factors == factors


def test_labels_and_frozen() -> None:
    f = parse_formula("yield ~ variety * nitrogen")
    assert f.labels == ("variety", "nitrogen", "variety:nitrogen")
    with pytest.raises(AttributeError):
        f.response = "x"  # type: ignore[misc]


def test_replace_response_keeps_terms() -> None:
    f = replace_response(parse_formula("y ~ a*b + `tank id`"), "dry mass")
    assert f == ModelFormula(
        "`dry mass` ~ a*b + `tank id`",
        "dry mass",
        (("a",), ("b",), ("tank id",), ("a", "b")),
        ("a", "b", "tank id"),
    )
    with pytest.raises(InputError, match="also appears on the right"):
        replace_response(parse_formula("y ~ a*b"), "a")


def test_rename_columns() -> None:
    f = parse_formula("Mass ~ Feed * tank_id")
    g = rename_columns(f, {"Mass": "mass", "Feed": "feed", "tank_id": "Tank ID"})
    assert g == ModelFormula(
        "Mass ~ Feed * tank_id",
        "mass",
        (("feed",), ("Tank ID",), ("feed", "Tank ID")),
        ("feed", "Tank ID"),
    )
    assert rename_columns(f, {}) == f
    with pytest.raises(InputError, match="refer to the same column"):
        rename_columns(parse_formula("y ~ Feed + feed"), {"Feed": "feed"})
    with pytest.raises(InputError, match="refer to the same column"):
        rename_columns(parse_formula("y ~ Y2"), {"Y2": "y"})


@pytest.mark.parametrize(
    ("expr", "name"),
    [
        ("feed", "feed"),
        ("  feed ", "feed"),
        ("`tank id`", "tank id"),
        ('Q("tank id")', "tank id"),
        ("C(feed)", "feed"),
        ("C(feed, Sum)", "feed"),
        ("C(Q('feed type'))", "feed type"),
        ("C(", "C("),  # not a wrapper: returned as written
    ],
)
def test_factor_name(expr: str, name: str) -> None:
    assert factor_name(expr) == name


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        ("", "empty"),
        ("   ", "empty"),
        ("weight", "no '~'"),
        ("~ feed", "no response"),
        ("weight ~", "no terms"),
        ("weight ~ 1", "no terms"),
        ("weight ~ 0", "no terms"),
        ("weight ~ feed - feed", "no terms"),
        ("weight + length ~ feed", "exactly one response"),
        ("1 ~ feed", "exactly one response"),
        ("weight ~ feed ~ tank", "more than one '~'"),
        ("np.log(weight) ~ feed", r"function np\.log\(\) is not supported"),
        ("weight ~ log(dose + 1)", r"function log\(\) is not supported.*transform the column"),
        ("weight ~ I(dose * 2)", r"function I\(\) is not supported"),
        ("weight ~ feed + (log(feed)|tank)", "cannot read 'log"),
        ("weight ~ feed + (0|tank)", "neither an intercept nor a slope"),
        ("weight ~ feed + (tank|tank)", "both a slope and the grouping"),
        ("weight ~ feed | tank", "write random effects in brackets"),
        ("weight ~ (1|tank)", "no fixed terms"),
        ("weight ~ feed + (1|log(tank))", "cannot read the grouping"),
        ("weight ~ feed * Error(tank)", r"give Error\(\) as a term of its own"),
        ("weight ~ feed + (1|weight)", "also appears in a random-effect term"),
        ("weight ~ .", "'.'"),
        ("weight ~ feed %in% tank", "%in%"),
        ("weight ~ {dose + 1}", "expression, not a column"),
        ("weight ~ dose[1]", "expression, not a column"),
        ("weight ~ 2:feed", "not a column name"),
        ("weight ~ 'feed'", "String literals"),
        ("weight ~ weight + feed", "also appears on the right"),
        ("weight ~ feed +", "cannot use the formula"),
        ("weight ~ (feed", "cannot use the formula"),
        ("weight ~ feed**tank", "cannot use the formula"),
        ("weight ~ Q(feed)", r"Q\(\) takes one quoted column name"),
        ("weight ~ C()", r"C\(\) takes a column name"),
        ("weight ~ C('feed')", r"C\(\) takes a column name"),
        ("weight ~ `feed", "cannot use the formula"),
    ],
)
def test_parse_formula_rejects(text: str, pattern: str) -> None:
    with pytest.raises(InputError, match=pattern) as info:
        parse_formula(text)
    assert "\n" not in str(info.value)
    assert "\x1b" not in str(info.value)


def test_parse_formula_rejects_non_string() -> None:
    with pytest.raises(InputError, match="empty"):
        parse_formula(None)  # type: ignore[arg-type]


# --- independent check against patsy's parser ------------------------------------

patsy = pytest.importorskip("patsy")


def _patsy_name(code: str) -> str:
    """Column named by a patsy factor's code: plain name, C(name, ...) or Q('name')."""
    node = ast.parse(code, mode="eval").body
    while isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
        if node.func.id == "Q":
            arg = node.args[0]
            assert isinstance(arg, ast.Constant) and isinstance(arg.value, str)
            return arg.value
        node = node.args[0]
    return ast.unparse(node)


def _patsy_terms(text: str) -> tuple[str, Terms]:
    desc = patsy.ModelDesc.from_formula(text)
    (lhs,) = desc.lhs_termlist
    terms = [
        tuple(dict.fromkeys(_patsy_name(f.name()) for f in t.factors))
        for t in desc.rhs_termlist
        if t.factors
    ]
    # patsy keeps terms in the order the expansion gives them; order them by degree
    return _patsy_name(lhs.factors[0].name()), tuple(sorted(terms, key=len))


PATSY_FORMULAS = [
    "y ~ a*b + block",
    "y ~ a*b*c",
    "y ~ a*b*c - a:b:c",
    "y ~ (a + b + c + d)**2",
    "y ~ (a + b + c + d)**3",
    "y ~ a/b",
    "y ~ a/b/c",
    "y ~ a/(b + c)",
    "y ~ (a + b)/c",
    "y ~ (a + b):(c + d)",
    "y ~ a:b + c",
    "y ~ c + b:a + a",
    "y ~ a*b - a",
    "y ~ a*b - 1",
    "y ~ 0 + a*b",
    "y ~ C(a) * C(b, Sum)",
    "Q('dry mass') ~ C(Q('feed type')) * temp + block",
    "y ~ block + a/b + a:c",
]


@pytest.mark.parametrize("text", PATSY_FORMULAS)
def test_same_terms_and_order_as_patsy(text: str) -> None:
    response, terms = _patsy_terms(text)
    f = parse_formula(text)
    assert f.response == response
    assert [frozenset(t) for t in f.terms] == [frozenset(t) for t in terms]
    assert set(f.factors) == {c for t in terms for c in t}


_NAMES = st.sampled_from(["a", "b", "c", "d"])


@st.composite
def _rhs(draw: st.DrawFn, depth: int = 0) -> str:
    if depth >= 3 or draw(st.integers(0, 9)) < 3:
        return draw(_NAMES)
    op = draw(st.sampled_from(["+", "*", ":", "/", "**"]))
    if op == "**":
        return f"({draw(_rhs(depth + 1))})**{draw(st.integers(1, 3))}"
    return f"({draw(_rhs(depth + 1))} {op} {draw(_rhs(depth + 1))})"


@settings(max_examples=150, deadline=None)
@given(rhs=_rhs(), removed=st.lists(_NAMES, max_size=2, unique=True))
def test_random_formulas_match_patsy(rhs: str, removed: list[str]) -> None:
    # random formulas from + * : / ** and removal of a main effect; patsy is the reference
    text = "y ~ " + rhs + "".join(f" - {r}" for r in removed)
    response, terms = _patsy_terms(text)
    if not terms:
        with pytest.raises(InputError, match="no terms"):
            parse_formula(text)
        return
    f = parse_formula(text)
    assert f.response == response
    assert {frozenset(t) for t in f.terms} == {frozenset(t) for t in terms}
    assert len(f.terms) == len(terms)
    assert [len(t) for t in f.terms] == [len(t) for t in terms]  # main effects first, ...


@settings(max_examples=300, deadline=None)
@given(st.text(alphabet=list("ab y~+-*/:^()012`'\"{}[]|.%,CQ"), max_size=16))
def test_any_text_gives_formula_or_one_line_input_error(text: str) -> None:
    try:
        f = parse_formula(text)
    except InputError as err:
        assert "\n" not in str(err)
    else:
        assert f.terms and all(f.terms)
        assert f.response not in f.factors


@pytest.mark.parametrize(
    ("text", "terms", "random"),
    [
        ("weight ~ feed + (1|tank)", [("feed",)], [("tank",)]),
        ("weight ~ feed + (1 | tank) + (1|day)", [("feed",)], [("tank",), ("day",)]),
        ("y ~ a*b + (1|site/plot)", [("a",), ("b",), ("a", "b")], [("site",), ("site", "plot")]),
        ("y ~ a + (1|block:plot)", [("a",)], [("block", "plot")]),
        ("y ~ a + Error(block/plot)", [("a",)], [("block",), ("block", "plot")]),
        ("y ~ a + (1||g) + Error(g)", [("a",)], [("g",)]),
        ("y ~ a + (1|`dry tank`)", [("a",)], [("dry tank",)]),
        ("y ~ a + ((1|g))", [("a",)], [("g",)]),
    ],
)
def test_random_effect_terms_are_read(
    text: str, terms: list[tuple[str, ...]], random: list[tuple[str, ...]]
) -> None:
    # the syntax of lme4's lmer formulas and of aov's Error() strata (Bates et al.
    # 2015, J. Stat. Softw. 67(1), table 2; R's ?aov)
    f = parse_formula(text)
    assert list(f.terms) == terms
    assert list(f.random) == random
    assert not set(f.factors) & {c for g in random for c in g}
