"""Claim stage: what the authors say they analysed and what they report.

A claim names the response column, the treatment column(s), optionally the
experimental unit the authors state, and the reported result as text
("F(2, 57) = 8.31, p = .001"). Values come from the command line and from a
TOML spec file; command-line values win.

The reported-result reader accepts the in-text style of the APA Publication
Manual (7th ed.), e.g. ``F(2, 57) = 8.31, p = .001``, ``t(38) = -2.90``,
``chi2(1, N = 90) = 0.89``, and common variants: brackets or subscript-like
``F2,57``, unicode minus and dashes, ``df =`` given separately, capital
``P``, ``1.2 x 10^-4`` and ``1.2e-4``, trailing stars, and "n.s.".

Reading rules (documented choices):

* The first statistic in the text is the one read. Its p-value is the first
  p after it and before the next statistic; when no p follows it, the nearest
  p before it. Other statistics and p-values are ignored.
* "ns", "n.s.", "not significant" without a p-value give ``p_relation ==
  "ns"`` and ``p_value is None``; :meth:`ReportedResult.significant_at` then
  returns False at any alpha (the authors' own verdict is taken as is).
* "p = .000" (as printed by some software) is read as "p < .001", the form
  the APA manual asks for.
* Lower-case ``f = 0.25`` without df is Cohen's f and ``R = .45``/``R2``
  without brackets is a multiple correlation; both are ignored.
* ``n = K ... per WORD`` gives ``n_per_group`` unless WORD names a container,
  a time block or a subject (tank, cage, day, animal, ...), or the counted noun
  is a container ("n = 3 tanks per feed"); such phrases are ignored. Any other
  ``n = K`` / ``N = K`` (the first one) gives ``n_total``. A bare "20 per
  group" counts only with a group-like word (group, treatment, arm, ...).
* Decimal commas ("p = 0,01") are not supported: commas separate parts.

Results for single terms of a factorial or nested model are written with the
term name and a colon before the result, as in an ANOVA table:
``"variety: F(2, 55) = 3.51, p = .037"`` or ``"variety:nitrogen: F(6, 45) =
0.30, p = .93"`` (see :func:`parse_term_claim`). Interaction names may be
written ``a:b``, ``a x b`` or ``a × b``, in any order (:func:`normalise_term`).

The analysis is given either as a model formula (``--formula "yield ~
variety * nitrogen"``, see :mod:`replicheck.formula`) or as a response and
treatment columns; see :func:`build_claim` for how they combine.
"""

from __future__ import annotations

import math
import os
import re
import stat
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import NamedTuple, cast

from replicheck.advice import option
from replicheck.errors import InputError, kind_of
from replicheck.formula import ModelFormula, factor_name, parse_formula, replace_response
from replicheck.io.table import ReadOptions
from replicheck.limits import Limits, make_limits
from replicheck.options import OPTION_FIELDS, Options, option_field, stated_options
from replicheck.roles import ROLE_FIELDS, Roles, stated_roles
from replicheck.vocab import UNIT_LABEL_MODES

__all__ = [
    "LIST_KEYS",
    "SPEC_KEYS",
    "SPEC_SUFFIX",
    "Claim",
    "ReportedResult",
    "build_claim",
    "load_spec",
    "match_term",
    "normalise_term",
    "parse_reported",
    "parse_term_claim",
    "spec_beside",
]

SPEC_SUFFIX = ".replicheck.toml"
SPEC_KEYS = tuple(
    sorted(
        (
            "claim",
            "family",
            "fill_down",
            "formula",
            "header_row",
            "id",
            "limits",
            "long",
            "na",
            "range",
            "response",
            "sheet",
            "treatment",
            "unit_labels",
            *(f.key for f in ROLE_FIELDS),
            *(f.key for f in OPTION_FIELDS),
        )
    )
)
# keys whose value may be a list (in an index cell, values separated by ';')
LIST_KEYS = (
    "treatment",
    "claim",
    "na",
    "limits",
    "fill_down",
    "long",
    "id",
    *(f.key for f in ROLE_FIELDS),
)
FAMILIES = ("binomial", "poisson")  # claimed logistic and Poisson regressions
_EXAMPLE = "expected text such as 'F(2, 57) = 8.31, p = .001'"


def _check_alpha(alpha: object) -> float:
    return cast(float, option_field("alpha").check(alpha, ""))


@dataclass(frozen=True)
class ReportedResult:
    """A reported test result as read from text; fields are None when not given."""

    text: str
    test: str | None = None  # "F", "t", "chi2", "z", "r"
    statistic: float | None = None
    df: tuple[float, ...] | None = None  # F: (num, den); t, chi2, r: (df,)
    p_value: float | None = None
    p_relation: str | None = None  # "=", "<", "<=", ">", ">=", "ns"
    n_per_group: int | None = None
    n_total: int | None = None
    method: str | None = None  # a rank test named in the text: "signed_rank" or "rank_sum"
    adjusted: bool = False  # the text says the analysis was adjusted for covariates (ANCOVA)
    ratio: float | None = None  # a reported odds or rate ratio ("OR = 2.1")
    ratio_ci: tuple[float, float] | None = None  # its 95% interval, when given

    def significant_at(self, alpha: float) -> bool | None:
        """What the report says about ``p < alpha``; None when it cannot tell.

        "=" on the boundary (p = .05 at alpha .05) is None because the printed
        value is rounded; "p < .10" or "p > .01" at alpha .05 are None; "ns" is
        False; no p-value is None (the caller may compute p from the statistic).
        """
        a = _check_alpha(alpha)
        rel, p = self.p_relation, self.p_value
        if rel == "ns":
            return False
        if rel is None or p is None:
            return None
        if rel == "=":
            return None if p == a else p < a
        if rel == "<":
            return True if p <= a else None
        if rel == "<=":
            return True if p < a else None
        return False if p >= a else None  # ">" or ">="


# --- reading reported text -------------------------------------------------

_TRANSLATE = str.maketrans(
    {
        **{c: "-" for c in "\u2212\u2010\u2011\u2012\u2013\u2014\u2015\ufe63\uff0d\u207b\u208b"},
        **{c: " " for c in "\u00a0\u2002\u2003\u2009\u200a\u202f"},
        **{c: str(i) for i, c in enumerate("⁰¹²³⁴⁵⁶⁷⁸⁹")},
        **{c: str(i) for i, c in enumerate("₀₁₂₃₄₅₆₇₈₉")},
        "≤": "<=",
        "≦": "<=",
        "≥": ">=",
        "≧": ">=",
        "＝": "=",
        "＜": "<",
        "＞": ">",
        "Χ": "χ",
        "∗": "*",
        "⁺": "+",
        "₊": "+",
    }
)
_NUM = r"[-+]?\s?(?:\d+(?:\.\d+)?|\.\d+)(?:e[-+]?\d+)?(?:\s*[x×*·]\s*10\s*(?:\^|\*\*)?\s*[-+]?\d+)?"
_NUM_PARTS = re.compile(
    r"(?P<sign>[-+]?)\s?(?P<mant>(?:\d+(?:\.(?P<dec>\d+))?|\.(?P<dec2>\d+))(?:e[-+]?\d+)?)"
    r"(?:\s*[x×*·]\s*10\s*(?:\^|\*\*)?\s*(?P<exp>[-+]?\d+))?",
    re.I,
)
_STAT = re.compile(
    r"(?<![\w.])(?P<name>chi[-\s]?squared?|chi\s*\^?\s*2|χ\s*\^?\s*2|x\^?2|F|t|z|r)"
    r"(?:\s*[(\[](?P<dfb>[^()\[\]]*)[)\]]|(?P<dfbare>\d+(?:\.\d+)?(?:\s*,\s*\d+(?:\.\d+)?)?))?"
    rf"\s*=\s*(?P<stat>{_NUM})",
    re.I,
)
_DF_PART = re.compile(rf"(?:dfs?\s*=\s*)?(?P<df>{_NUM})|n\s*=\s*(?P<n>\d+)", re.I)
_DF_SEP = re.compile(
    r"(?<![\w.])d\.?fs?\.?\s*[=:]?\s*[(\[]?\s*(?P<a>\d+(?:\.\d+)?)(?:\s*[,/;]\s*(?P<b>\d+(?:\.\d+)?))?",
    re.I,
)
_P = re.compile(
    rf"(?<![\w.])ps?(?:[-\s]?values?)?\s*(?P<rel><=|>=|=<|=>|<|>|=)\s*(?P<num>{_NUM})", re.I
)
_NS = re.compile(
    r"(?<![\w.])(?:n\.\s?s\b\.?|ns\b|not\s+(?:statistically\s+)?significant"
    r"|non-?significant|no\s+(?:statistically\s+)?significant)",
    re.I,
)
_N = re.compile(r"(?<![\w.])n\s*=\s*(?P<k>\d{1,3}(?:,\d{3})+(?!\d)|\d+)(?![.]\d|\d)", re.I)
_COUNT = re.compile(r"(?<![\w.,])(?P<k>\d+)(?![.]\d|\d)")
_PER = re.compile(
    r"\s*(?:(?P<noun>[^\W\d_]+)\s+){0,2}?"
    r"(?:(?:(?:per|in\s+each|for\s+each)\s+|/\s*)(?P<word>[^\W\d_]+)|(?P<each>each)\b(?!\s*[^\W\d_]))",
    re.I,
)
_CONTAINERS = frozenset(
    {
        "tank",
        "aquarium",
        "cage",
        "pen",
        "enclosure",
        "pond",
        "plate",
        "well",
        "dish",
        "flask",
        "jar",
        "tube",
        "pot",
        "tray",
        "plot",
        "block",
        "batch",
        "run",
        "day",
        "session",
        "litter",
        "nest",
        "hive",
        "colony",
        "room",
        "chamber",
        "replicate",
        "bench",
        "shelf",
        "site",
        "farm",
        "herd",
        "school",
        "class",
        "classroom",
        "hospital",
        "clinic",
        "ward",
        "household",
        "family",
        "cluster",
        "unit",
    }
)
_SUBJECTS = frozenset(
    {
        "animal",
        "subject",
        "individual",
        "participant",
        "patient",
        "mouse",
        "mice",
        "rat",
        "fish",
        "plant",
        "tree",
        "leaf",
        "leave",
        "bird",
        "dog",
        "cow",
        "pig",
        "sample",
        "specimen",
        "mother",
        "dam",
    }
)
_GROUP_WORDS = frozenset(
    {"group", "treatment", "condition", "arm", "level", "cell", "diet", "feed", "dose", "genotype"}
)


class _Stat(NamedTuple):
    test: str
    statistic: float
    df: tuple[float, ...] | None
    start: int
    end: int


def _singular_in(word: str | None, words: frozenset[str]) -> bool:
    if not word:
        return False
    w = word.lower()
    forms = {w, w[:-1] if w.endswith("s") else w, w[:-2] if w.endswith("es") else w}
    if w.endswith("ies"):
        forms.add(w[:-3] + "y")
    return bool(forms & words)


def _number(s: str, what: str) -> float:
    m = _NUM_PARTS.fullmatch(s.strip())
    if m is None:  # pragma: no cover - _NUM and _NUM_PARTS accept the same strings
        raise InputError(f"cannot read the number {s!r} for {what}")
    value = float(m["mant"]) * (10.0 ** int(m["exp"]) if m["exp"] else 1.0)
    return -value if m["sign"] == "-" else value


def _read_stat(m: re.Match[str], src: str) -> _Stat | None:
    raw = m["name"]
    name = raw.lower()
    test = "chi2" if name[0] in "cχx" else ("F" if name == "f" else name)
    bracket, bare = m["dfb"], m["dfbare"]
    if bracket is None and bare is None and raw in ("f", "R"):
        return None  # Cohen's f / multiple R, not a test statistic
    if bare is not None and test not in ("F", "t"):
        return None  # e.g. "R2 = .45"
    df_text = bracket if bracket is not None else bare
    dfs: list[float] = []
    for part in re.split(r"[,;/]", df_text) if df_text is not None else []:
        pm = _DF_PART.fullmatch(part.strip())
        if pm is None:
            return None  # brackets hold something other than df, e.g. "t (two-tailed)"
        if pm["df"] is not None:
            dfs.append(_number(pm["df"], "degrees of freedom"))
    statistic = _number(m["stat"], test)
    df = tuple(dfs) or None
    _check_stat(test, statistic, df, src)
    return _Stat(test, statistic, df, m.start(), m.end())


def _check_stat(test: str, statistic: float, df: tuple[float, ...] | None, src: str) -> None:
    if df is not None:
        wanted = {"F": 2, "z": 0}.get(test, 1)
        if len(df) != wanted:
            need = (
                "two degrees of freedom (numerator, denominator)"
                if wanted == 2
                else ("no degrees of freedom" if wanted == 0 else "one degree-of-freedom value")
            )
            raise InputError(f"{test} takes {need}, got {len(df)} in {src!r}")
        if not all(math.isfinite(d) and d > 0 for d in df):
            raise InputError(f"degrees of freedom must be positive in {src!r}")
    if test in ("F", "chi2") and statistic < 0:
        raise InputError(f"{test} cannot be negative in {src!r}")
    if test == "r" and abs(statistic) > 1:
        raise InputError(f"a correlation r must lie between -1 and 1 in {src!r}")


def _read_p(m: re.Match[str], src: str) -> tuple[float, str]:
    rel = {"=<": "<=", "=>": ">="}.get(m["rel"], m["rel"])
    p = _number(m["num"], "p")
    if not 0 <= p <= 1 or (p == 0 and rel in ("<", "<=")):
        raise InputError(f"p-value {m['num'].strip()} is impossible in {src!r}")
    if p == 0 and rel == "=":  # "p = .000": read as p < .001 (APA manual's advice)
        parts = _NUM_PARTS.fullmatch(m["num"].strip())
        decimals = len((parts["dec"] or parts["dec2"] or "") if parts else "")
        return 10.0**-decimals, "<"
    return p, rel


def _read_n(norm: str, src: str) -> tuple[int | None, int | None]:
    per_group: int | None = None
    total: int | None = None
    for m in _N.finditer(norm):
        k = int(m["k"].replace(",", ""))
        if k < 1:
            raise InputError(f"sample size n = {k} is impossible in {src!r}")
        per = _PER.match(norm, m.end())
        if per is None:
            total = k if total is None else total
        elif per_group is None and not (
            _singular_in(per["word"], _CONTAINERS | _SUBJECTS)
            or _singular_in(per["noun"], _CONTAINERS)
        ):
            per_group = k
    if per_group is None:  # bare "20 per group"
        for m in _COUNT.finditer(norm):
            per = _PER.match(norm, m.end())
            if (
                per is not None
                and _singular_in(per["word"], _GROUP_WORDS)
                and not _singular_in(per["noun"], _CONTAINERS)
                and int(m["k"]) > 0
            ):
                per_group = int(m["k"])
                break
    return per_group, total


def parse_reported(text: str) -> ReportedResult:
    """Read a reported result such as ``"F(2, 57) = 8.31, p = .001"``.

    See the module docstring for the accepted styles and reading rules.
    Raises :class:`InputError` when the text holds no statistic, p-value,
    "n.s." or sample size, or when a value is impossible (p > 1, F < 0, ...).
    """
    if not isinstance(text, str) or not text.strip():
        raise InputError(f"the reported result is empty: {_EXAMPLE}")
    norm = " ".join(text.translate(_TRANSLATE).split())
    stats = [s for s in (_read_stat(m, text) for m in _STAT.finditer(norm)) if s is not None]
    first = stats[0] if stats else None
    test: str | None = None
    statistic: float | None = None
    df: tuple[float, ...] | None = None
    ps = list(_P.finditer(norm))
    chosen = ps[0] if ps else None
    if first is not None:
        test, statistic, df = first.test, first.statistic, first.df
        seg_end = stats[1].start if len(stats) > 1 else len(norm)
        if df is None and test != "z":
            sep = _DF_SEP.search(norm, first.end, seg_end) or _DF_SEP.search(norm, 0, first.start)
            if sep is not None:
                vals = [float(v) for v in (sep["a"], sep["b"]) if v is not None]
                df = tuple(vals[:2] if test == "F" else vals[:1])
                _check_stat(test, statistic, df, text)
        after = [p for p in ps if first.end <= p.start() < seg_end]
        before = [p for p in ps if p.start() < first.start]
        chosen = after[0] if after else (before[-1] if before else None)
    p_value, p_relation = _read_p(chosen, text) if chosen is not None else (None, None)
    if p_relation is None and _NS.search(norm):
        p_relation = "ns"
    n_per_group, n_total = _read_n(norm, text)
    ratio, ratio_ci = _read_ratio(norm)
    if (
        test is None
        and p_relation is None
        and n_per_group is None
        and n_total is None
        and ratio is None
    ):
        raise InputError(f"no statistic, p-value or sample size recognised in {text!r}: {_EXAMPLE}")
    method = (
        "signed_rank"
        if _SIGNED_RANK.search(norm)
        else "rank_sum"
        if _RANK_SUM.search(norm)
        else None
    )
    return ReportedResult(
        text,
        test,
        statistic,
        df,
        p_value,
        p_relation,
        n_per_group,
        n_total,
        method,
        bool(_ADJUSTED.search(norm)),
        ratio,
        ratio_ci,
    )


# odds and rate ratios as papers give them: "OR = 2.1, 95% CI 1.2 to 3.4",
# "odds ratio 0.45 (0.21-0.97)", "IRR = 0.86 [0.78, 0.94]"
_RATIO = re.compile(
    r"(?<![\w.])(?:a?OR|IRR|RR|HR|odds[-\s]ratio|rate[-\s]ratio|risk[-\s]ratio)\s*[=:]?\s*"
    r"(?P<r>\d+(?:\.\d+)?|\.\d+)"
    r"(?:\s*[,;]?\s*[(\[]?\s*(?:95\s*%\s*)?(?:c\.?i\.?|confidence interval)?\s*[:=]?\s*"
    r"(?P<lo>\d+(?:\.\d+)?|\.\d+)\s*(?:-|–|to|,)\s*(?P<hi>\d+(?:\.\d+)?|\.\d+))?",
    re.I,
)


def _read_ratio(norm: str) -> tuple[float | None, tuple[float, float] | None]:
    m = _RATIO.search(norm)
    if m is None:
        return None, None
    ratio = float(m["r"])
    if ratio <= 0:
        return None, None
    ci = None
    if m["lo"] is not None and m["hi"] is not None:
        lo, hi = float(m["lo"]), float(m["hi"])
        if 0 < lo <= ratio <= hi:
            ci = (lo, hi)
    return ratio, ci


# Rank tests named as papers name them (Wilcoxon 1945; Mann & Whitney 1947).
_SIGNED_RANK = re.compile(
    r"signed[-\s]?ranks?|matched[-\s]?pairs?\s+wilcoxon|paired\s+wilcoxon|wilcoxon\s+paired",
    re.I,
)
_RANK_SUM = re.compile(r"rank[-\s]?sum|mann[-\s]?whitney|wilcoxon", re.I)
# an analysis of covariance as papers name it
_ADJUSTED = re.compile(
    r"\bancova\b|analysis of covariance|\badjust(?:ed|ing)? for\b|\bcontrolling for\b|"
    r"\bcovariates?\b",
    re.I,
)


# --- results for single terms --------------------------------------------------

_TERM_COLON = re.compile(r"\s*:\s*")
_TERM_SPLIT = re.compile(r"\s*:\s*|\s+x\s+|\s*×\s*", re.I)
_NAME_SEPARATORS = re.compile(r"[\s_.\-]+")  # as for column names (io.columns)


def _starts_with_result(text: str) -> bool:
    norm = " ".join(text.translate(_TRANSLATE).split())
    m = _STAT.match(norm)
    if m is not None and _read_stat(m, text) is not None:
        return True
    return bool(_P.match(norm) or _NS.match(norm))


def parse_term_claim(text: str) -> tuple[str | None, ReportedResult]:
    """Split ``"TERM: RESULT"`` into the term name and the reported result.

    The term name is the text before the first colon that is directly followed
    (after optional spaces) by a statistic, a p-value or "n.s.", so that
    interaction names written with colons work: ``"variety:nitrogen: F(6, 45)
    = 0.30, p = .93"`` gives ``("variety:nitrogen", ...)``. A text without such
    a colon, e.g. ``"F(2, 57) = 8.31, p = .001"``, gives ``(None, ...)``. The
    result's ``text`` is the part after the colon. Two term results in one
    text are refused (give one claim per term). Names containing ``=``, ``<``
    or ``>`` are not term names (the colon then belongs to the result).
    """
    if not isinstance(text, str) or not text.strip():
        raise InputError(f"the reported result is empty: {_EXAMPLE}")
    starts = [m for m in _TERM_COLON.finditer(text) if _starts_with_result(text[m.end() :])]
    for i, m in enumerate(starts):
        name = text[: m.start()].strip()
        if re.search(r"[=<>≤≥]", name):
            continue
        if not name:
            raise InputError(f"no term name before ':' in {text!r}: write 'feed: F(2, 57) = 8.31'")
        if len(starts) > i + 1:
            raise InputError(
                f"more than one term result in {text!r}: give one claim per term, "
                "e.g. 'feed: F(2, 57) = 8.31, p = .001'"
            )
        return name, parse_reported(text[m.end() :].strip())
    return None, parse_reported(text)


# words that name an analysis rather than a term, in the text before a colon
_METHOD_WORDS = re.compile(
    r"\b(?:an(?:c)?ova|regression|t[-\s]?test|paired|repeated|wilcoxon|mann|kruskal|"
    r"mixed|model|analysis|covariance|covariates?|adjusted|test)\b",
    re.I,
)


def _names_a_method(name: str, model: ModelFormula | None, treatment_keys: set[str]) -> bool:
    """Whether the text before a result's colon names the analysis, not a term."""
    if not _METHOD_WORDS.search(name):
        return False
    if model is not None:
        try:
            match_term(name, model.terms)
        except InputError:
            return True
        return False
    return not normalise_term(name) <= treatment_keys


def _name_key(name: str) -> str:
    return _NAME_SEPARATORS.sub("", factor_name(name)).casefold()


def normalise_term(name: str) -> frozenset[str]:
    """The factors of a term name, for matching claims to model terms.

    ``"variety:nitrogen"``, ``"Nitrogen:Variety"``, ``"variety x nitrogen"``
    and ``"variety × nitrogen"`` all give ``{"variety", "nitrogen"}``. As for
    column names, case and the separators space, underscore, dot and hyphen are
    ignored; ``C(a)``, ``Q("a")`` and ```a``` mean ``a``. ``*`` is not an
    interaction sign here (``a*b`` is a formula, not one term).
    """
    if not isinstance(name, str) or not name.strip():
        raise InputError("a term name is empty")
    keys = [_name_key(part) for part in _TERM_SPLIT.split(name.strip())]
    if not all(keys):
        raise InputError(f"cannot read the term name {name!r}: write 'a' or 'a:b'")
    return frozenset(keys)


def match_term(name: str, terms: Sequence[Sequence[str]]) -> tuple[str, ...]:
    """The model term (a tuple of column names) that a claimed term name means.

    Raises :class:`InputError` naming the model's terms when none matches.
    """
    key = normalise_term(name)
    hits = [tuple(t) for t in terms if frozenset(_name_key(c) for c in t) == key]
    if len(hits) == 1:
        return hits[0]
    labels = ", ".join(":".join(t) for t in terms)
    if hits:
        raise InputError(f"the claimed term {name!r} matches several model terms: {labels}")
    raise InputError(f"the claimed term {name!r} is not in the model; its terms are: {labels}")


# --- spec files and the claim -------------------------------------------------


@dataclass(frozen=True)
class Claim:
    """The analysis the authors claim, with the reported results if given.

    ``reported`` is the result given without a term name (the one test of a
    one-way design, or the authors' headline result); ``reported_terms`` holds
    ``(term name as written, result)`` pairs for results given per term.
    ``formula`` is the model formula when one was given; ``treatments`` are
    then its factors.
    """

    response: str
    treatments: tuple[str, ...]
    roles: Roles = field(default_factory=Roles)
    reported: ReportedResult | None = None
    alpha: float = 0.05
    na_values: tuple[str, ...] = ()
    sheet: str | tuple[str, ...] | None = None  # a name or number, "all", or several names
    spec_path: str | None = None
    reported_terms: tuple[tuple[str, ReportedResult], ...] = ()
    formula: ModelFormula | None = None
    unit_labels: str | None = None  # auto | local | global, from the spec
    family: str | None = None  # binomial | poisson: a claimed logistic or Poisson regression
    limits: Limits = field(default_factory=Limits)
    reading: ReadOptions = field(default_factory=ReadOptions)
    options: Options = field(default_factory=Options)  # alpha among them, with its source

    @property
    def unit(self) -> str | None:
        """The first stated unit as written ('a:b' for a combination), if any."""
        units = self.roles.units
        return units[0].text if units else None


def spec_beside(data_path: str | os.PathLike[str]) -> Path | None:
    """The spec file next to a data file (``trial.csv`` -> ``trial.replicheck.toml``), if any."""
    p = Path(data_path)
    try:
        candidate = p.with_name(p.stem + SPEC_SUFFIX)
        return candidate if candidate.is_file() else None
    except (OSError, ValueError):  # a name the file system refuses: no spec beside it
        return None


def _text(value: object, key: str, source: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise InputError(f"'{key}' in {source} must be a non-empty string, not {kind_of(value)}")
    return value


def _agree(
    formula: ModelFormula,
    response: str | None,
    treatments: Sequence[str],
    formula_label: str,
    where: str,
) -> None:
    """Refuse a response or treatments that differ from the formula's."""
    if response is not None and response != formula.response:
        raise InputError(
            f"the response {response!r} {where} differs from the response "
            f"{formula.response!r} of {formula_label}: give the formula or the columns, not both"
        )
    if treatments and sorted(treatments) != sorted(formula.factors):
        raise InputError(
            f"the treatments {', '.join(treatments)} {where} differ from the columns "
            f"{', '.join(formula.factors)} of {formula_label}: give the formula or the columns, "
            "not both"
        )


def _check_spec(spec: Mapping[str, object], source: str) -> dict[str, object]:
    unknown = sorted(set(spec) - set(SPEC_KEYS))
    if unknown:
        names = ", ".join(repr(k) for k in unknown)
        raise InputError(f"unknown key {names} in {source}; allowed keys: {', '.join(SPEC_KEYS)}")
    out: dict[str, object] = {}
    for key in ("response", "formula"):
        if key in spec:
            out[key] = _text(spec[key], key, source)
    roles = stated_roles({}, source, spec=spec, spec_source=f"in {source}")
    for role in ROLE_FIELDS:
        values = tuple(s.text for s in roles.of(role.key))
        if values:
            out[role.key] = values
    if "family" in spec:
        value = spec["family"]
        if value not in FAMILIES:
            raise InputError(
                f"'family' in {source} must be one of {', '.join(FAMILIES)}, not {value!r}"
            )
        out["family"] = value
    if "unit_labels" in spec:
        value = spec["unit_labels"]
        if value not in UNIT_LABEL_MODES:
            raise InputError(
                f"'unit_labels' in {source} must be one of {', '.join(UNIT_LABEL_MODES)}, "
                f"not {value!r}"
            )
        out["unit_labels"] = value
    if "claim" in spec:
        value = spec["claim"]
        if isinstance(value, list | tuple):
            if not value:
                raise InputError(f"'claim' in {source} is an empty list: give at least one result")
            for v in value:
                if not isinstance(v, str) or not v.strip():
                    raise InputError(
                        f"'claim' in {source} must hold non-empty strings, not {kind_of(v)}"
                    )
            out["claim"] = tuple(value)
        elif isinstance(value, str) and value.strip():
            out["claim"] = value
        else:
            raise InputError(
                f"'claim' in {source} must be a string or a list of strings, not {kind_of(value)}"
            )
    if "treatment" in spec:
        value = spec["treatment"]
        items = list(value) if isinstance(value, list | tuple) else [value]
        if not items:
            raise InputError(f"'treatment' in {source} is an empty list: name at least one column")
        out["treatment"] = tuple(_text(v, "treatment", source) for v in items)
    if "formula" in out:
        try:
            spec_formula = parse_formula(cast(str, out["formula"]))
        except InputError as err:
            raise InputError(f"'formula' in {source}: {err}") from None
        _agree(
            spec_formula,
            cast("str | None", out.get("response")),
            cast("tuple[str, ...]", out.get("treatment", ())),
            f"'formula' in {source}",
            f"in {source}",
        )
    for setting in OPTION_FIELDS:
        if spec.get(setting.key) is not None:
            out[setting.key] = setting.check(spec[setting.key], f" in {source}")
    if "na" in spec:
        value = spec["na"]
        items = list(value) if isinstance(value, list | tuple) else [value]
        for v in items:
            if isinstance(v, bool) or not isinstance(v, str | int | float):
                raise InputError(f"'na' in {source} must hold strings or numbers, not {kind_of(v)}")
        out["na"] = tuple(str(v) for v in items)
    if "sheet" in spec:
        value = spec["sheet"]
        if isinstance(value, list | tuple) and value and all(isinstance(v, str) for v in value):
            value = tuple(value)
        elif (
            isinstance(value, bool)
            or not isinstance(value, str | int)
            or (isinstance(value, int) and value < 0)
        ):
            raise InputError(
                f"'sheet' in {source} must be a sheet name, a number >= 0, \"all\", "
                "or a list of sheet names"
            )
        out["sheet"] = value
    if "header_row" in spec:
        value = spec["header_row"]
        if isinstance(value, bool) or not isinstance(value, int) or value < 1:
            raise InputError(f"'header_row' in {source} must be a row number (1 or more)")
        out["header_row"] = value
    if "range" in spec:
        out["range"] = _text(spec["range"], "range", source)
    if "fill_down" in spec:
        value = spec["fill_down"]
        if isinstance(value, str) and value.strip().casefold() in ("false", "no", "off"):
            value = False  # as written in a cell of a screening index
        if isinstance(value, bool):
            out["fill_down"] = value
        else:
            columns: object = [value] if isinstance(value, str) else value
            if not isinstance(columns, list | tuple) or not columns:
                raise InputError(
                    f"'fill_down' in {source} must be false, true, or a list of columns"
                )
            out["fill_down"] = tuple(_text(v, "fill_down", source) for v in columns)
    for key in ("long", "id"):
        if key in spec:
            value = spec[key]
            given: object = [value] if isinstance(value, str) else value
            if not isinstance(given, list | tuple) or not given:
                raise InputError(f"'{key}' in {source} must be a column pattern or a list")
            out[key] = tuple(_text(v, key, source) for v in given)
    if "limits" in spec:
        value = spec["limits"]
        if isinstance(value, str):
            value = [value]
        if isinstance(value, Limits):  # already checked (a spec read by load_spec)
            out["limits"] = value
        elif not isinstance(value, Mapping | list | tuple):
            raise InputError(
                f"'limits' in {source} must be a table such as {{ columns = 20000 }}, "
                f"not {kind_of(value)}"
            )
        else:
            out["limits"] = make_limits(value, f"in {source}")
    return out


MAX_SPEC_BYTES = 1_000_000  # a spec is a few lines; anything this large is not one


def load_spec(path: str | os.PathLike[str]) -> dict[str, object]:
    """Read and check a TOML spec file; values are normalised (treatment and na as tuples)."""
    p = Path(path)
    try:
        mode = p.stat().st_mode
        if stat.S_ISREG(mode) and p.stat().st_size > MAX_SPEC_BYTES:
            raise InputError(
                f"spec file {p} is larger than {MAX_SPEC_BYTES // 1_000_000} MB: not a spec"
            )
        if not stat.S_ISREG(mode):
            raise InputError(f"spec file {p} is not a regular file (a folder, device or pipe)")
        raw = p.read_bytes()
    except FileNotFoundError:
        raise InputError(f"spec file not found: {p}") from None
    except OSError as err:
        raise InputError(f"cannot read spec file {p}: {err.strerror or err}") from None
    try:
        data = tomllib.loads(raw.decode("utf-8-sig"))
    except UnicodeDecodeError:
        raise InputError(f"spec file {p} is not UTF-8 text, as TOML requires") from None
    except tomllib.TOMLDecodeError as err:
        raise InputError(f"spec file {p} is not valid TOML: {err}") from None
    except RecursionError:
        raise InputError(f"spec file {p} nests its values too deeply to be a spec") from None
    return _check_spec(data, str(p))


def _model(
    response: str | None,
    treatments: tuple[str, ...],
    formula: str | None,
    s: Mapping[str, object],
) -> tuple[str | None, tuple[str, ...], ModelFormula | None]:
    """Response, treatments and formula from the command line and the checked spec."""
    if formula is not None:
        model = parse_formula(formula)
        _agree(model, response, treatments, "--formula", "on the command line")
        return model.response, model.factors, model
    spec_formula = parse_formula(cast(str, s["formula"])) if "formula" in s else None
    resp = response if response is not None else cast("str | None", s.get("response"))
    treats = treatments or cast("tuple[str, ...]", s.get("treatment", ()))
    if spec_formula is None:
        return resp, treats, None
    resp = resp if resp is not None else spec_formula.response
    treats = treats or spec_formula.factors
    if sorted(treats) != sorted(spec_formula.factors):
        return resp, treats, None  # the command line's treatments replace the spec's formula
    return resp, treats, spec_formula


def _results(
    texts: Sequence[str], model: ModelFormula | None, treatments: tuple[str, ...]
) -> tuple[ReportedResult | None, tuple[tuple[str, ReportedResult], ...]]:
    """Split claims into the one without a term name and those per term; check term names."""
    reported: ReportedResult | None = None
    per_term: list[tuple[str, ReportedResult]] = []
    seen: dict[frozenset[str], str] = {}
    treatment_keys = {_name_key(t) for t in treatments}
    for text in texts:
        name, result = parse_term_claim(text)
        if name is not None and _names_a_method(name, model, treatment_keys):
            name, result = None, parse_reported(text)  # "ANCOVA: F(2, 68) = 7.87"
        if name is None:
            if reported is not None:
                raise InputError(
                    f"two results without a term name ({reported.text!r} and {text!r}): "
                    "start each with its term, e.g. 'feed: F(2, 57) = 8.31, p = .001'"
                )
            reported = result
            continue
        key = normalise_term(name)
        if key in seen:
            raise InputError(f"two results for the same term: {seen[key]!r} and {name!r}")
        seen[key] = name
        if model is not None:
            match_term(name, model.terms)
        elif not key <= treatment_keys:
            raise InputError(
                f"the claimed term {name!r} names a column that is not a treatment; "
                f"treatments: {', '.join(treatments)}"
            )
        per_term.append((name, result))
    return reported, tuple(per_term)


def build_claim(
    *,
    response: str | None,
    treatments: Sequence[str],
    unit: str | Sequence[str] | None = None,
    claim_text: str | None,
    alpha: float | None,
    na_values: Sequence[str],
    sheet: str | Sequence[str] | None,
    spec: Mapping[str, object] | None,
    spec_path: str | None = None,
    formula: str | None = None,
    claim_texts: Sequence[str] = (),
    roles: Mapping[str, object] | None = None,
    unit_labels: str | None = None,
    family: str | None = None,
    limits: Sequence[str] | Mapping[str, object] | None = None,
    reading: ReadOptions | None = None,
    options: Mapping[str, object] | None = None,
) -> Claim:
    """Merge command-line values with a spec; command-line values win.

    The model is given by a formula or by response and treatment columns:

    * ``formula`` (``--formula``) sets the response and the treatments (the
      formula's factors, in order of appearance); a ``response`` or
      ``treatments`` given with it must agree (same response, same set of
      columns), else :class:`InputError`. The spec's model keys are then unused.
      The same rule holds within a spec for its ``formula``, ``response`` and
      ``treatment`` keys.
    * Without ``formula``, the response and treatments come from the command
      line, else from the spec (its formula included). A spec formula is kept
      when the treatments are its factors; a different command-line response
      then replaces its left-hand side. Command-line treatments naming other
      columns replace the spec's formula (the claim then has no formula).

    Reported results: ``claim_text`` and ``claim_texts`` (``--claim``,
    repeatable) together replace the spec's ``claim`` (a string or a list).
    Each is read by :func:`parse_term_claim`; at most one may lack a term name
    (it becomes ``reported``), the others go to ``reported_terms`` in the order
    given. Term names must name a formula term, or treatments when there is no
    formula; two results for the same term are refused.

    Stated roles (``unit`` and ``roles``, a mapping of :data:`replicheck.roles.ROLE_FIELDS`
    keys to a column or a list of columns) replace the spec's values of the same
    role; see :func:`replicheck.roles.stated_roles`. ``unit_labels`` (auto, local,
    global) replaces the spec's. ``family`` (binomial, poisson) replaces the
    spec's; a formula whose response is ``cbind(successes, failures)`` implies
    binomial.

    Treatments given on the command line replace the spec's list; na values
    are the union (spec first). ``options`` are the settings of
    :data:`replicheck.options.OPTION_FIELDS` (None: not given), ``alpha`` among
    them (the ``alpha`` argument wins); each replaces the spec's, and each takes
    its default when neither gives it (alpha 0.05). An integer sheet from
    the spec becomes its string form (the reader decides name or position).
    ``limits`` (``KEY=N`` texts or a mapping, see :mod:`replicheck.limits`)
    replace the spec's limits of the same keys. ``reading`` (header row, range,
    columns to fill down, whether to look for them) replaces the spec's
    ``header_row``, ``range`` and ``fill_down`` where it states them; a header
    row on one side and a range on the other: the command line's is used.
    """
    s = _check_spec(spec or {}, spec_path or "the spec")
    if isinstance(treatments, str):
        treatments = (treatments,)
    cli_treats = tuple(_text(t, "treatment", "the command line") for t in treatments)
    if response is not None:
        _text(response, "response", "the command line")
    if formula is not None:
        _text(formula, "formula", "the command line")
    resp, treats, model = _model(response, cli_treats, formula, s)
    if resp is None:
        raise InputError(
            f"no response column given: use {option('response')}, {option('formula')} "
            "or 'response' in the spec"
        )
    if not treats:
        raise InputError(
            f"no treatment column given: use {option('treatment')}, {option('formula')} "
            "or 'treatment' in the spec"
        )
    if len(set(treats)) != len(treats):
        raise InputError(f"a treatment column is given twice: {', '.join(treats)}")
    if resp in treats:
        raise InputError(f"column {resp!r} cannot be both the response and a treatment")
    if model is not None and model.response != resp:
        model = replace_response(model, resp)
    given = dict(roles or {})
    if unit is not None:
        given["unit"] = unit
    stated = stated_roles(
        given,
        "in the options",
        spec=s,
        spec_source=f"in {spec_path or 'the spec'}",
        response=resp,
        treatments=treats,
    )
    labels = unit_labels if unit_labels is not None else cast("str | None", s.get("unit_labels"))
    fam = family if family is not None else cast("str | None", s.get("family"))
    if fam is not None and fam not in FAMILIES:
        raise InputError(f"{option('family')} must be one of {', '.join(FAMILIES)}, not {fam!r}")
    if model is not None and model.trials is not None:
        if fam == "poisson":
            raise InputError(
                "a cbind(successes, failures) response is binomial: it cannot be claimed "
                "as a Poisson regression"
            )
        fam = "binomial"
    if labels is not None and labels not in UNIT_LABEL_MODES:
        raise InputError(f"{option('unit-labels')} must be one of {', '.join(UNIT_LABEL_MODES)}")
    if isinstance(claim_texts, str):
        claim_texts = (claim_texts,)
    texts = [*([claim_text] if claim_text is not None else []), *claim_texts]
    if not texts and "claim" in s:
        spec_claim = cast("str | tuple[str, ...]", s["claim"])
        texts = [spec_claim] if isinstance(spec_claim, str) else list(spec_claim)
    reported, per_term = _results(texts, model, treats)
    stated_settings = dict(options or {})
    if alpha is not None:
        stated_settings["alpha"] = alpha
    settings = stated_options(stated_settings, spec=s, spec_source=f"in {spec_path or 'the spec'}")
    spec_na = cast("tuple[str, ...]", s.get("na", ()))
    na = tuple(dict.fromkeys([*spec_na, *(str(v) for v in na_values)]))
    sh = sheet if sheet is not None else cast("str | int | tuple[str, ...] | None", s.get("sheet"))
    if isinstance(sh, list | tuple):
        sh = sh[0] if len(sh) == 1 else tuple(str(v) for v in sh)
    return Claim(
        response=resp,
        treatments=treats,
        roles=stated,
        reported=reported,
        alpha=settings.alpha,
        na_values=na,
        sheet=None if sh is None else sh if isinstance(sh, tuple) else str(sh),
        spec_path=spec_path,
        reported_terms=per_term,
        formula=model,
        unit_labels=labels,
        family=fam,
        limits=make_limits(limits, "in the options", cast("Limits", s.get("limits", Limits()))),
        reading=_reading(reading or ReadOptions(), s),
        options=settings,
    )


def _reading(given: ReadOptions, spec: Mapping[str, object]) -> ReadOptions:
    """The command line's reading options, completed from the spec's."""
    header_row, cell_range = given.header_row, given.cell_range
    if header_row is None and cell_range is None:
        header_row = cast("int | None", spec.get("header_row"))
        cell_range = cast("str | None", spec.get("range"))
    spec_fill = spec.get("fill_down", True)
    fill = given.fill_down
    if not fill and isinstance(spec_fill, tuple):
        fill = cast("tuple[str, ...]", spec_fill)
    find = given.find_fill and spec_fill is not False
    long = given.long or cast("tuple[str, ...]", spec.get("long", ()))
    ids = given.ids or cast("tuple[str, ...]", spec.get("id", ()))
    return ReadOptions(header_row, cell_range, fill, find, long, ids)
