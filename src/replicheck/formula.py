"""Model formulas in Wilkinson-Rogers notation: the fixed terms the authors claim.

A formula such as ``"weight ~ feed * temp + block"`` names the response on the
left of ``~`` and the fixed-effect terms on the right. The notation is that of
Wilkinson & Rogers (1973), "Symbolic description of factorial models for
analysis of variance", *Applied Statistics* 22:392-399, as used by R's
``stats::formula`` and by the Python libraries patsy and formulaic:

* ``a + b``: both terms; ``a:b``: the interaction of a and b;
* ``a * b`` = ``a + b + a:b`` (crossing);
* ``a / b`` = ``a + a:b`` (b nested in a); ``(a + b) / c`` = ``a + b + a:b:c``;
* ``(a + b + c) ** 2`` or ``^ 2``: all terms up to two-way interactions;
* ``- term`` removes a term; ``1``, ``0``, ``-1`` (the intercept) are ignored;
* ``C(a)`` and ``C(a, Sum)`` mean column ``a`` read as categories (recorded
  in ``ModelFormula.categorical``: a numeric column otherwise enters with one
  slope, see :mod:`replicheck.structure.numbers`); ``Q("odd name")`` and
  ```odd name``` name columns that are not plain identifiers.

Random effects, as the claimed model states them (the syntax that
mixed-model software shares, and the ``Error()`` strata of classical ANOVA):

* ``(1|g)``: a random intercept for each level of ``g``; ``(1|a:b)`` for each
  ``a`` x ``b`` combination; ``(1|a/b)`` = ``(1|a) + (1|a:b)``;
* ``Error(a/b)``: the error strata ``a`` and ``a:b`` (``aov``'s form).

* ``(x|g)`` = ``(1 + x|g)``: a random intercept and slope of ``x`` for each
  level of ``g``, correlated; ``(0 + x|g)`` the slope alone; ``(x||g)`` the
  intercept and slope independent (``ModelFormula.slopes``).

The random terms are the claim's, judged against the experimental units the
data show; they are never taken as the design (a random effect for the fish
does not make the fish the unit of a feed given to tanks).

Parsing and term expansion are done by the formulaic library; this module
takes out the random terms, unwraps ``C()``/``Q()`` so that removal (``-``)
and duplicates work on column names, and refuses what replicheck cannot
use: other expressions (``log(x + 1)``, ``I(x * 2)``), ``%in%`` and ``.``.
Terms that transform one number, ``log(x)``, ``log10(x)``, ``log2(x)``,
``log1p(x)``, ``sqrt(x)``, ``exp(x)``, ``scale(x)``, ``I(x^k)`` and
``poly(x, k)`` (one term with k df), are kept as
terms named by their normalised text (``ModelFormula.transforms``); the audit
adds their values as columns.
"""

from __future__ import annotations

import ast
import re
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, TypeVar

import numpy as np

from replicheck.errors import InputError

if TYPE_CHECKING:
    from formulaic.parser.types import Token

# formulaic is imported where a formula is read (loading it takes a noticeable
# part of a second, and most audits name their columns instead)

__all__ = ["ModelFormula", "factor_name", "parse_formula", "rename_columns", "replace_response"]

_T = TypeVar("_T")
# formulaic raises its own errors for bad formulas (caught first), and on some
# malformed input (unbalanced brackets in Python code, stray operators) Python's
# own exceptions
_PARSE_ERRORS = (SyntaxError, ValueError, IndexError, AttributeError, TypeError)
_RANDOM = "give Error() as a term of its own, e.g. 'y ~ feed + Error(tank)'"
_ANSI = re.compile(r"\x1b\[[0-9;]*m")


TRANSFORMS = ("log", "log10", "log2", "log1p", "sqrt", "exp", "scale", "I", "poly")


@dataclass(frozen=True)
class Transform:
    """A term that transforms one numeric column: ``log(dose)``, ``I(day^2)``."""

    name: str  # the term as written, normalised: "log(dose)", "I(day^2)", "poly(day, 2)"
    function: str  # one of TRANSFORMS
    column: str
    power: float = 1.0  # I(x^k); the degree of poly(x, k)

    def apply(self, x: np.ndarray) -> np.ndarray:
        """The transformed values (non-finite where the function is undefined)."""
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            if self.function == "poly":  # the number itself; its powers enter the design
                return np.asarray(x, dtype=float)
            if self.function == "I":
                return np.asarray(np.power(x, self.power), dtype=float)
            if self.function == "scale":
                return np.asarray((x - np.nanmean(x)) / np.nanstd(x, ddof=1), dtype=float)
            functions = {
                "log": np.log,
                "log10": np.log10,
                "log2": np.log2,
                "log1p": np.log1p,
                "sqrt": np.sqrt,
                "exp": np.exp,
            }
            return np.asarray(functions[self.function](x), dtype=float)


_TRANSFORM = re.compile(
    rf"^\s*(?P<f>{'|'.join(TRANSFORMS)})\s*\(\s*(?P<col>[A-Za-z_.][A-Za-z0-9_.]*)\s*"
    r"(?:(?:\^|\*\*)\s*(?P<k>\d+(?:\.\d+)?))?\s*\)\s*$"
)


_POLY = re.compile(
    r"^\s*poly\s*\(\s*(?P<col>[A-Za-z_.][A-Za-z0-9_.]*)\s*,\s*(?:degree\s*=\s*)?(?P<k>\d+)"
    r"\s*\)\s*$"
)


def transform_of(code: str) -> Transform | None:
    """The transform a term such as ``log(dose)`` or ``I(day^2)`` writes, else None.

    A power is read only inside ``I()``; ``poly(x, k)`` takes a degree from 1 to 5;
    every other function takes a bare column.
    """
    poly = _POLY.match(code)
    if poly is not None:
        degree = int(poly["k"])
        if not 1 <= degree <= 5:
            return None
        return Transform(f"poly({poly['col']}, {degree})", "poly", poly["col"], float(degree))
    m = _TRANSFORM.match(code)
    if m is None or m["f"] == "poly":
        return None
    func, col, k = m["f"], m["col"], m["k"]
    if (func == "I") != (k is not None):
        return None
    if func == "I":
        power = float(k)
        return Transform(f"I({col}^{power:g})", func, col, power)
    return Transform(f"{func}({col})", func, col)


@dataclass(frozen=True)
class RandomSlope:
    """A random term with slopes: ``(1 + x|g)``, ``(0 + x|g)``, ``(x||g)``."""

    grouping: tuple[str, ...]
    effects: tuple[str, ...]  # columns with a random slope
    intercept: bool  # a random intercept too
    diagonal: bool  # written ||: independent effects

    @property
    def text(self) -> str:
        parts = ["1" if self.intercept else "0", *self.effects]
        bar = "||" if self.diagonal else "|"
        return f"({' + '.join(parts)}{bar}{':'.join(self.grouping)})"


@dataclass(frozen=True)
class ModelFormula:
    """A parsed model formula.

    ``terms`` lists every fixed term as a tuple of column names, main effects
    first, then two-way interactions, and so on; within an order, terms keep
    the order in which the expanded formula gives them. The intercept is not a
    term. ``factors`` are the distinct column names of the terms, in order of
    first appearance in the text.
    """

    text: str
    response: str
    terms: tuple[tuple[str, ...], ...]
    factors: tuple[str, ...]
    random: tuple[tuple[str, ...], ...] = ()  # groupings with a random intercept or stratum
    categorical: tuple[str, ...] = ()  # columns written C(x): categories whatever their values
    # a binomial response cbind(successes, failures): (successes, failures, "failures"),
    # or cbind(successes, n - successes): (successes, n, "total")
    trials: tuple[str, str, str] | None = None
    slopes: tuple[RandomSlope, ...] = ()  # random terms with slopes: (x|g), (0 + x||g), ...
    transforms: tuple[Transform, ...] = ()  # terms that transform a number: log(dose), I(t^2)

    @property
    def labels(self) -> tuple[str, ...]:
        """Term labels as written in ANOVA tables: ``("a", "b", "a:b")``."""
        return tuple(":".join(term) for term in self.terms)


def _fail(text: str, problem: str) -> InputError:
    return InputError(f"cannot use the formula {text!r}: {problem}")


def _called(node: ast.expr) -> str:
    if isinstance(node, ast.Name):
        return node.id
    if isinstance(node, ast.Attribute):
        return f"{_called(node.value)}.{node.attr}"
    return ast.unparse(node)


def _from_python(code: str, text: str) -> str:
    """The column named by a Python factor ``C(...)`` or ``Q(...)``."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", SyntaxWarning)
            node = ast.parse(code.strip(), mode="eval").body
    except SyntaxError:
        raise _fail(text, f"cannot read {code!r}") from None
    if not isinstance(node, ast.Call):
        raise _fail(
            text,
            f"{code!r} is an expression, not a column; give column names joined by "
            "+ * : / ** and -, with C() and Q() if needed",
        )
    func = _called(node.func)
    if func == "Q":
        arg = node.args[0] if len(node.args) == 1 and not node.keywords else None
        if not (isinstance(arg, ast.Constant) and isinstance(arg.value, str)):
            raise _fail(text, f"Q() takes one quoted column name, e.g. Q('dry mass'), not {code!r}")
        return arg.value
    if func == "C":
        first = node.args[0] if node.args else None
        if isinstance(first, ast.Name):
            return first.id
        if isinstance(first, ast.Call) and _called(first.func) == "Q":
            return _from_python(ast.unparse(first), text)
        raise _fail(text, f"C() takes a column name as its first argument, not {code!r}")
    if func == "poly":
        raise _fail(
            text,
            f"poly() takes a column and a degree from 1 to 5, e.g. poly(dose, 2), not {code!r}",
        )
    if func == "Error":
        raise _fail(text, f"{code} is an error-stratum term: {_RANDOM}")
    raise _fail(
        text,
        f"the function {func}() is not supported (only C() and Q() are); "
        "transform the column in the data file first",
    )


def _quoted(name: str, text: str) -> str:
    if "`" in name:
        raise _fail(text, f"the column name {name!r} contains a backtick")
    return f"`{name}`"


def _quietly(text: str, run: Callable[[], _T]) -> _T:
    """Run a formulaic step, turning its exceptions into one-line InputErrors."""
    from formulaic.errors import FormulaicError

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", SyntaxWarning)
            return run()
    except FormulaicError as err:
        raise _fail(text, _first_line(err)) from None
    except _PARSE_ERRORS:
        raise _fail(text, "cannot read it; check brackets, quotes and operators") from None


def _tokens(text: str) -> list[Token]:
    from formulaic.parser import DefaultFormulaParser

    return _quietly(text, lambda: list(DefaultFormulaParser().get_tokens(text)))


def _first_line(err: Exception) -> str:
    lines = [ln for ln in _ANSI.sub("", str(err)).splitlines() if ln.strip()]
    return lines[0].strip() if lines else type(err).__name__


def _rewrite(text: str) -> tuple[str, list[str], list[str], list[Transform]]:
    """Check the tokens, replace C()/Q() by quoted names; also the names in text order
    and the names written in C()."""
    from formulaic.parser.types import Token

    tokens = _tokens(text)
    tildes = [t for t in tokens if t.kind is Token.Kind.OPERATOR and t.token == "~"]
    if not tildes:
        raise _fail(text, "no '~': write it as 'response ~ treatment', e.g. 'weight ~ feed'")
    if len(tildes) > 1:
        raise _fail(text, "more than one '~'")
    if tokens[0] is tildes[0]:
        raise _fail(text, "no response before '~'")
    pieces: list[str] = []
    names: list[str] = []
    categorical: list[str] = []
    transforms: list[Transform] = []
    cursor = 0
    after_tilde = False
    for tok in tokens:
        kind, word = tok.kind, tok.token
        if kind is Token.Kind.OPERATOR:
            if "|" in word:
                raise _fail(text, "write random effects as terms of their own, e.g. (1|tank)")
            if word == "~":
                after_tilde = True
            elif word == ".":
                raise _fail(text, "'.' (all other columns) is not supported: name the treatments")
            elif word == "in":
                raise _fail(text, "%in% is not supported: write nesting as a/b")
        if kind is Token.Kind.NAME and after_tilde:
            names.append(word)
        if kind is not Token.Kind.PYTHON:
            continue
        start, end = tok.source_start, tok.source_end
        if start is None or end is None:  # pragma: no cover - formulaic always sets both
            raise _fail(text, f"cannot locate {word!r}")
        found = transform_of(word) if after_tilde else None
        if found is not None:
            name = found.name
            transforms.append(found)
        else:
            name = _from_python(word, text)
        if after_tilde:
            names.append(name)
            if re.match(r"C\s*\(", word.strip()):
                categorical.append(name)
        pieces.extend([text[cursor:start], _quoted(name, text)])
        cursor = end + 1
    pieces.append(text[cursor:])
    return "".join(pieces), names, categorical, transforms


MAX_CROSSED = 10  # columns crossed in one formula: 2^10 - 1 terms at most


def _bounded(rewritten: str, n_names: int, text: str) -> str:
    """Bound the expansion before it runs: a power above the number of columns adds no
    term (it is lowered to that number), and crossing more than MAX_CROSSED columns is
    refused (the terms would number in the thousands)."""
    rhs = rewritten.partition("~")[2]
    if n_names > MAX_CROSSED and re.search(r"\*|\^|/", rhs):
        raise _fail(
            text,
            f"it crosses or nests {n_names} columns; at most {MAX_CROSSED} can be crossed "
            "(their interactions would number in the thousands)",
        )

    def lower(m: re.Match[str]) -> str:
        return f"{m.group(1)}{min(int(m.group(2)), max(n_names, 1))}"

    return re.sub(r"(\*\*\s*|\^\s*)(\d+)", lower, rewritten)


def parse_formula(text: str) -> ModelFormula:
    """Read a model formula such as ``"yield ~ variety * nitrogen + block"``.

    Returns the response, the expanded fixed terms and the factor names (see
    :class:`ModelFormula`). Raises :class:`InputError` for a formula without
    ``~``, with no response or no terms, with functions other than ``C()`` and
    ``Q()``, or with random-effect syntax.
    """
    if not isinstance(text, str) or not text.strip():
        raise InputError("the formula is empty: write it as 'response ~ treatment'")
    text = text.strip()
    text_as_written = text
    text, trials = _split_cbind(text)
    fixed, random, slopes = _split_random(text)
    rewritten, names, categorical, transforms = _rewrite(fixed)
    rewritten = _bounded(rewritten, len(set(names)), text)
    from formulaic import Formula

    parsed = _quietly(text, lambda: Formula(rewritten, _ordering="none"))
    lhs = getattr(parsed, "lhs", None)
    rhs = getattr(parsed, "rhs", None)
    if lhs is None or rhs is None or not hasattr(rhs, "__iter__") or isinstance(rhs, tuple):
        raise _fail(text, "expected one response and one right-hand side")
    response = _response(list(lhs), text)
    terms: dict[frozenset[str], tuple[str, ...]] = {}
    for term in rhs:
        factors = list(term.factors)
        if all(f.eval_method.value == "literal" and f.expr == "1" for f in factors):
            continue  # the intercept
        for f in factors:
            if f.eval_method.value != "lookup":
                raise _fail(text, f"{f.expr!r} is not a column name")
        cols = tuple(dict.fromkeys(str(f.expr) for f in factors))
        terms.setdefault(frozenset(cols), cols)
    if not terms:
        raise _fail(
            text, "no terms on the right of '~': name the treatment columns, e.g. 'weight ~ feed'"
        )
    ordered = tuple(sorted(terms.values(), key=len))
    if any(response in term for term in ordered):
        raise _fail(text, f"the response {response!r} also appears on the right of '~'")
    used = {c for term in ordered for c in term}
    factors = [n for n in dict.fromkeys(names) if n in used]
    factors += [c for term in ordered for c in term if c not in factors]
    if any(response in g for g in random) or any(
        response in (*s.grouping, *s.effects) for s in slopes
    ):
        raise _fail(text, f"the response {response!r} also appears in a random-effect term")
    if trials is not None and trials[1] in used:
        raise _fail(text_as_written, f"the column {trials[1]!r} of cbind() is also a term")
    return ModelFormula(
        text_as_written,
        response,
        ordered,
        tuple(dict.fromkeys(factors)),
        random,
        tuple(dict.fromkeys(c for c in categorical if c in used)),
        trials,
        slopes,
        tuple(dict.fromkeys(t for t in transforms if t.name in used)),
    )


_NAME = r"(?:`[^`]+`|[A-Za-z_.][A-Za-z0-9_.]*)"
_GROUPING = re.compile(rf"^\s*{_NAME}(?:\s*[:/]\s*{_NAME})*\s*$")


def _pieces(rhs: str) -> list[str]:
    """The right-hand side split at '+' outside brackets."""
    out, depth, start = [], 0, 0
    for i, ch in enumerate(rhs):
        if ch in "([{":
            depth += 1
        elif ch in ")]}":
            depth -= 1
        elif ch == "+" and depth == 0:
            out.append(rhs[start:i])
            start = i + 1
    out.append(rhs[start:])
    return out


def _groupings(expr: str, text: str) -> list[tuple[str, ...]]:
    """``a/b`` -> (a,), (a, b); ``a:b`` -> (a, b); backticks name odd columns."""
    if not _GROUPING.match(expr):
        raise _fail(
            text,
            f"cannot read the grouping {expr.strip()!r}: give column names joined by ':' "
            "(combination) or '/' (nesting), e.g. (1|tank) or (1|site/plot)",
        )
    out: list[tuple[str, ...]] = []
    so_far: list[str] = []
    for level in expr.split("/"):
        so_far += [n.strip().strip("`") for n in level.split(":")]
        out.append(tuple(dict.fromkeys(so_far)))
    return out


def _effects(expr: str, text: str) -> tuple[bool, tuple[str, ...]]:
    """The intercept and the slope columns of a random term's left of ``|``."""
    intercept = True
    names: list[str] = []
    for raw in re.split(r"\+", expr):
        part = raw.strip()
        if part in ("1", ""):
            continue
        if part in ("0", "-1"):
            intercept = False
            continue
        if not re.fullmatch(_NAME, part):
            raise _fail(
                text,
                f"cannot read {part!r} in a random term: give 1, 0 and column names, "
                "e.g. (1 + dose|tank)",
            )
        names.append(part.strip("`"))
    return intercept, tuple(dict.fromkeys(names))


def _split_random(
    text: str,
) -> tuple[str, tuple[tuple[str, ...], ...], tuple[RandomSlope, ...]]:
    """The formula without its random-effect terms, their intercept groupings in order,
    and the random terms with slopes."""
    if "|" not in text and "Error" not in text:
        return text, (), ()
    lhs, sep, rhs = text.partition("~")
    if not sep:
        return text, (), ()
    fixed: list[str] = []
    random: list[tuple[str, ...]] = []
    slopes: list[RandomSlope] = []
    for piece in _pieces(rhs):
        part = piece.strip()
        while part.startswith("((") and part.endswith("))") and _pieces(part[1:-1]) == [part[1:-1]]:
            part = part[1:-1].strip()  # redundant brackets: ((1|tank))
        bar = re.fullmatch(r"\((.*?)(\|\|?)(.*)\)", part, flags=re.S)
        err = re.fullmatch(r"Error\s*\((.*)\)", part, flags=re.S)
        if bar is not None and "|" not in bar.group(3):
            intercept, names = _effects(bar.group(1), text)
            if not names:
                if not intercept:
                    raise _fail(text, f"{part} has neither an intercept nor a slope")
                random += _groupings(bar.group(3), text)
            else:
                for g in _groupings(bar.group(3), text):
                    if any(n in g for n in names):
                        raise _fail(text, f"in {part} a column is both a slope and the grouping")
                    slopes.append(RandomSlope(g, names, intercept, bar.group(2) == "||"))
        elif err is not None:
            random += _groupings(err.group(1), text)
        elif "|" in part:
            raise _fail(
                text,
                f"cannot read {part!r}: write random effects in brackets, e.g. (1|tank)",
            )
        else:
            fixed.append(piece)
    if not "".join(fixed).strip():
        raise _fail(
            text,
            "no fixed terms on the right of '~': name the treatments, e.g. 'y ~ feed + (1|tank)'",
        )
    return (
        f"{lhs}~{'+'.join(fixed)}",
        tuple(dict.fromkeys(random)),
        tuple(dict.fromkeys(slopes)),
    )


_CBIND = re.compile(
    rf"^\s*cbind\s*\(\s*(?P<s>{_NAME})\s*,\s*(?:(?P<n>{_NAME})\s*-\s*(?P<s2>{_NAME})"
    rf"|(?P<f>{_NAME}))\s*\)\s*~"
)


def _split_cbind(text: str) -> tuple[str, tuple[str, str, str] | None]:
    """A ``cbind(successes, failures) ~ ...`` formula as ``successes ~ ...`` and its trials."""
    if "cbind" not in text:
        return text, None
    m = _CBIND.match(text)
    if m is None:
        raise _fail(
            text,
            "write a binomial response as cbind(successes, failures) or "
            "cbind(successes, total - successes), with column names",
        )

    def col(name: str) -> str:
        return name.strip("`")

    successes = col(m["s"])
    if m["n"] is not None:
        if col(m["s2"]) != successes:
            raise _fail(text, "in cbind(s, n - s) the same column must be subtracted")
        trials = (successes, col(m["n"]), "total")
    else:
        trials = (successes, col(m["f"]), "failures")
    if trials[1] == successes:
        raise _fail(text, "cbind() needs two different columns")
    return f"{_quoted(successes, text)} ~{text[m.end() :]}", trials


def _response(lhs_terms: list[object], text: str) -> str:
    if len(lhs_terms) != 1:
        raise _fail(text, "give exactly one response column before '~'")
    factors = list(getattr(lhs_terms[0], "factors", ()))
    if len(factors) != 1 or factors[0].eval_method.value != "lookup":
        raise _fail(text, "give exactly one response column before '~'")
    return str(factors[0].expr)


def factor_name(expr: str) -> str:
    """The column named by ``a``, ```odd name```, ``Q("odd name")`` or ``C(a, Sum)``.

    Anything else, including a malformed ``C(``, is returned stripped but unchanged.
    """
    s = expr.strip()
    if len(s) >= 2 and s[0] == s[-1] == "`":
        return s[1:-1]
    if re.match(r"[CQ]\s*\(", s) and s.endswith(")"):
        try:
            return _from_python(s, s)
        except InputError:
            return s
    return s


def replace_response(formula: ModelFormula, response: str) -> ModelFormula:
    """The same right-hand side with another response column (like R's ``update(f, y2 ~ .)``)."""
    from formulaic.parser.types import Token

    tokens = _tokens(formula.text)
    tilde = next(t for t in tokens if t.kind is Token.Kind.OPERATOR and t.token == "~")
    end = tilde.source_end if tilde.source_end is not None else formula.text.index("~")
    rhs = formula.text[end + 1 :].strip()
    return parse_formula(f"{_quoted(response, formula.text)} ~ {rhs}")


def rename_columns(formula: ModelFormula, names: Mapping[str, str]) -> ModelFormula:
    """The formula with column names replaced (e.g. by the data file's spelling).

    ``names`` maps names as written to new names; names not in it are kept.
    The text is kept as written. Raises :class:`InputError` when two columns
    of the formula would become one.
    """
    response = names.get(formula.response, formula.response)
    factors = tuple(names.get(c, c) for c in formula.factors)
    if len(set(factors)) != len(factors) or response in factors:
        raise _fail(formula.text, "two of its names refer to the same column")
    terms = tuple(tuple(names.get(c, c) for c in term) for term in formula.terms)
    random = tuple(tuple(names.get(c, c) for c in g) for g in formula.random)
    categorical = tuple(names.get(c, c) for c in formula.categorical)
    trials = formula.trials
    if trials is not None:
        trials = (response, names.get(trials[1], trials[1]), trials[2])
    transforms = tuple(
        Transform(t.name, t.function, names.get(t.column, t.column), t.power)
        for t in formula.transforms
    )
    slopes = tuple(
        RandomSlope(
            tuple(names.get(c, c) for c in s.grouping),
            tuple(names.get(c, c) for c in s.effects),
            s.intercept,
            s.diagonal,
        )
        for s in formula.slopes
    )
    return ModelFormula(
        formula.text, response, terms, factors, random, categorical, trials, slopes, transforms
    )
