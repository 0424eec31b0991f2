"""A proofreader for the reports' own sentences.

Run over every report the test suite and the real-design benchmark produce (see
``tests/conftest.py`` and ``benchmarks/real_designs.py --prose``), in every format.
It looks for the faults that cost a reader's trust and that a renderer can make
without noticing:

* ``missing``: the words None, nan, null or inf in prose (a missing value printed
  instead of a sentence that says what is missing);
* ``article``: "a" before a vowel sound or "an" before a consonant sound;
* ``not-same``: the same number on both sides of "not" ("about 2287, not 2287");
* ``identifier``: an internal name (an analysis identifier such as ``unit_means``)
  where a reader's name belongs;
* ``repeated``: a word written twice in a row ("the the");
* ``digits``: a number with more than four significant digits after its whole part
  ("0.03236 to 14.21"), against the rule of :mod:`replicheck.numbers`;
* ``contradiction``: a sentence that contradicts the verdict: an ``ok`` report that
  blames the claimed analysis, or a stated unit called "not used" when it was used.

Column names and level labels are quoted in the reports ('tank', `tank`); quoted
names are left out of every check but ``missing`` (a name is the user's, and its
spelling is not ours to judge), so ``'None'`` is still caught.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from replicheck.advice import render
from replicheck.words import article

IDENTIFIERS = (
    "as_claimed",
    "unit_means",
    "mixed_model",
    "no_test",
    "strata_anova",
    "cluster_robust",
    "wild_bootstrap",
    "within_blocks",
    "lack_of_fit",
    "likelihood_ratio",
    "signed_rank",
    "rank_sum",
    "gee",
)

_QUOTED = re.compile(r"(?<![A-Za-z0-9])'[^'\n]*'(?![A-Za-z])|`[^`\n]*`")
_MISSING = re.compile(r"(?<![\w.])(None(?! of\b)|nan|NaN|null(?! hypothes| imposed)|inf)(?![\w(])")
_QUOTED_MISSING = re.compile(r"'(None|nan|NaN|null)'")
_ARTICLE = re.compile(r"(?<![\w'-])([Aa]n?) ([A-Za-z][\w-]*)")
_NUMBER = r"(\d[\d,]*(?:\.\d+)?)"
_NOT_SAME = re.compile(_NUMBER + r"\s*,?\s+not\s+" + _NUMBER)
_IDENTIFIER = re.compile(r"\b(" + "|".join(IDENTIFIERS) + r")\b|\bwebb weights\b")
_DIGITS = re.compile(r"(?<![\w.])-?(\d+)\.(\d+)(?![\w.])")
_REPEATED = re.compile(r"\b([A-Za-z]{2,}) \1\b")
_SENTENCE = re.compile(r"[^.!?\n]+[.!?]?")
# phrases that blame the claimed analysis: out of place in an ``ok`` report
_BLAME = re.compile(
    r"(?<!no )pseudo-?replicat|overstate|conclusion changes|does not support|"
    r"treats all \d[\d,]* rows as independent|treated as independent replicates of",
    re.IGNORECASE,
)


@dataclass(frozen=True)
class Problem:
    """One fault in a rendered report."""

    kind: str
    format: str
    excerpt: str

    def __str__(self) -> str:
        return f"[{self.format}] {self.kind}: {self.excerpt}"


def visible_text(rendered: str, fmt: str) -> str:
    """The words a reader sees: HTML without tags, styles and scripts; others as they are."""
    if fmt != "html":
        return rendered
    from replicheck.report.html import visible_text as page_text

    return page_text(rendered)


def _excerpt(text: str, start: int, end: int) -> str:
    return " ".join(text[max(0, start - 40) : end + 40].split())


def _unquoted(text: str) -> str:
    return _QUOTED.sub(lambda m: " " * len(m.group(0)), text)


_GLOSSARY = re.compile(r"(?ims)^\s*(#+ )?terms used\b.*?(?=^\s*(#+ )?caution\b)")


def _contradictions(text: str, doc: Mapping[str, Any]) -> Iterable[tuple[int, int]]:
    status = doc["verdict"]["status"]
    text = _GLOSSARY.sub(lambda m: " " * len(m.group(0)), text)  # definitions, not claims
    if status == "ok":
        for m in _BLAME.finditer(text):
            yield m.start(), m.end()
    stated = doc["claim"].get("unit")
    used = {u["unit"] for u in doc.get("experimental_units", [])}
    if stated and stated in used:
        for m in _SENTENCE.finditer(text):
            s = m.group(0)
            if f"'{stated}'" not in s:
                continue
            if re.search(r"\bnot used\b|\binstead of\b", s) or (
                "not the coarsest" in s and f"used '{stated}'" in s
            ):
                yield m.start(), m.end()


def problems(rendered: str, fmt: str, doc: Mapping[str, Any]) -> list[Problem]:
    """Every fault found in one rendered report (``fmt``: text, markdown or html)."""
    text = visible_text(rendered, fmt)
    plain = _unquoted(text)
    found: list[Problem] = []

    def add(kind: str, source: str, start: int, end: int) -> None:
        found.append(Problem(kind, fmt, _excerpt(source, start, end)))

    for m in _MISSING.finditer(plain):
        add("missing", text, m.start(), m.end())
    for m in _QUOTED_MISSING.finditer(text):
        add("missing", text, m.start(), m.end())
    for m in _ARTICLE.finditer(plain):
        word = m.group(2)
        if word.isupper() and len(word) > 1:  # an acronym: said as letters or as a word
            continue
        if article(word) != m.group(1).lower():
            add("article", text, m.start(), m.end())
    for m in _NOT_SAME.finditer(plain):
        if m.group(1).replace(",", "") == m.group(2).replace(",", ""):
            add("not-same", text, m.start(), m.end())
    for m in _IDENTIFIER.finditer(plain):
        add("identifier", text, m.start(), m.end())
    for m in _DIGITS.finditer(plain):
        whole, frac = m.group(1), m.group(2)
        significant = (whole.lstrip("0") + frac).lstrip("0")
        if len(significant) > 4 and len(frac) > 1:
            add("digits", text, m.start(), m.end())
    for m in _REPEATED.finditer(plain):
        add("repeated", text, m.start(), m.end())
    for start, end in _contradictions(text, doc):
        add("contradiction", text, start, end)
    for m in re.finditer("⟦[^⟧]*⟧?", text):  # a mention of an option left unrendered
        add("marker", text, m.start(), m.end())
    return found


def proofread(doc: Mapping[str, Any]) -> list[Problem]:
    """Render a report dictionary in text, Markdown and HTML and proofread each."""
    from replicheck.report.html import render_html
    from replicheck.report.markdown import render_markdown
    from replicheck.report.text import render_text

    d = dict(doc)
    return [  # options named as a Python caller reads them (replicheck.advice)
        *problems(render(render_text(d), "api"), "text", doc),
        *problems(render(render_markdown(d), "api"), "markdown", doc),
        *problems(render(render_html(d, figures=False), "api"), "html", doc),
    ]
