"""Markdown rendering of a report dictionary, for pasting into a review letter.

The content comes from :mod:`replicheck.report.content`, as for the other formats.
"""

from __future__ import annotations

import re
from typing import Any

from replicheck.report import content as C
from replicheck.report.reading import reading_lines


def _esc(text: object) -> str:
    """Escape table pipes and anything that could open an HTML tag; keep 'p < 0.05' readable."""
    return re.sub(r"<(?=[A-Za-z/!?])", "&lt;", str(text).replace("|", "\\|"))


def _code(text: object) -> str:
    """A name as inline code; a name with ``<`` is written quoted and escaped instead,
    so no renderer, however lax, can read it as HTML."""
    t = str(text)
    if "<" in t or "`" in t:
        return f"'{_esc(t)}'"
    return f"`{t}`"


def _table(header: list[str], rows: list[list[str]]) -> list[str]:
    return [
        "| " + " | ".join(_esc(h) for h in header) + " |",
        "|" + "---|" * len(header),
        *("| " + " | ".join(_esc(x) for x in r) + " |" for r in rows),
    ]


def _section(doc: dict[str, Any], key: str) -> list[str]:
    out = ["", f"### {C.TITLES[key]}", ""]
    if key == "terms":
        out += _table(C.TERMS_HEADER, C.terms_rows(doc))
    elif key == "claim":
        out += _table(["", "value"], [[k, v] for k, v in C.claim_rows(doc)])
    elif key == "read":
        out += [f"- {label}: {_esc(text)}" for label, text in reading_lines(doc["input"])]
    elif key == "unit":
        out += [f"- {_esc(line)}" for line in C.unit_lines(doc)]
        tree = C.design_tree(doc)
        if tree:
            out += ["", "Design structure (each grouping under the one it is nested in):", ""]
            out += [f"{'  ' * depth}- {_esc(line)}" for depth, line in tree]
        items = C.candidate_items(doc)
        if items:
            out += ["", "Candidate units (coarsest credible first):", ""]
            for head, reasons in items:
                out.append(f"- {_esc(head)}")
                out += [f"  - {_esc(r)}" for r in reasons]
        alts = C.alternative_items(doc)
        if alts:
            out += ["", "Other readings of the unit (each refitted):", ""]
            for term, head, why, settle in alts:
                out.append(
                    f"- {_code(term)}: {_esc(head)}. {_esc(why)}. *Settled by:* {_esc(settle)}."
                )
    elif key == "roles":
        names = {r["column"] for r in doc.get("roles", [])}
        rows = [[_code(c) if c in names else c, *rest] for c, *rest in C.roles_rows(doc)]
        out += _table(["column", "role", "source", "why"], rows)
    elif key == "clustering":
        for unit, sentences in C.clustering_blocks(doc):
            lead = f"Unit {_code(unit)}: " if len(doc["terms"]) > 1 else ""
            out += [lead + _esc(" ".join(sentences)), ""]
        out.pop()
    elif key == "analyses":
        out += _table(C.analyses_header(doc), C.analyses_rows(doc))
        out += ["", C.ANALYSES_KEY.replace("*", "`*`", 1)]
        notes = C.analysis_notes(doc)
        if notes:
            out += ["", *(f"- {_esc(n)}" for n in notes)]
    elif key == "findings":
        for f in doc["findings"]:
            out.append(
                f"- **{f['severity']}** `{f['rule']}`: {_esc(f['message'])} "
                f"*What to do:* {_esc(f['advice'])}"
            )
    elif key == "hidden":
        out += ["No column names these groupings.", ""]
        out += [f"- {_esc(item)}" for item in C.hidden_items(doc)]
    elif key == "needs":
        out.append(_esc(C.needs_sentence(doc)))
    elif key == "wording":
        out.append("> " + _esc(C.suggested_wording(doc)))
    elif key == "caution":
        out.append(_esc(doc["caution"]))
    return out


def _interval(iv: dict[str, Any] | None) -> str:
    if iv is None:
        return "no interval"
    if iv["low"] is None:
        return f"{C.fmt_num(iv['estimate'])} (no error df)"
    return (
        f"{C.fmt_num(iv['estimate'])} ({C.fmt_num(iv['low'])} to {C.fmt_num(iv['high'])}; "
        f"df {C.fmt_df([iv['df']])})"
    )


def effects_lines(doc: dict[str, Any]) -> list[str]:
    """Differences from the first level with their intervals, as claimed and corrected."""
    d = doc.get("display")
    if not d or not d["effects"]["rows"]:
        return []
    e = d["effects"]
    conf = f"{e['confidence']:.0%}"
    out = [
        "",
        f"### Effects of {_code(d['term'])} ({conf} confidence intervals)",
        "",
        "| comparison | every row a replicate (as claimed) | unit as replicate (corrected) |",
        "|---|---|---|",
    ]
    for r in e["rows"]:
        out.append(
            f"| '{_esc(r['level'])}' − '{_esc(r['reference'])}' | {_interval(r['claimed'])} | "
            f"{_interval(r['corrected'])} |"
        )
    out += ["", f"Corrected intervals: {_esc(e['corrected_method'])}."]
    return out


def render_markdown(doc: dict[str, Any]) -> str:
    """Render the report dictionary as Markdown."""
    v = doc["verdict"]
    lines = [
        f"## replicheck audit: {_code(doc['input']['source'])}",
        "",
        f"**Verdict: {C.STATUS_WORDS.get(v['status'], v['status'])}.** "
        + " ".join(_esc(x) for x in C.verdict_lines(doc)),
    ]
    keys = C.sections(doc)
    if "terms" in keys:
        lines += _section(doc, "terms")[1:]  # the per-term table first, under the verdict
    lines += ["", _esc(v["summary"])]
    lines += effects_lines(doc)
    for key in keys:
        if key in ("verdict", "terms", "glossary", "caution"):
            continue
        lines += _section(doc, key)
    entries = C.glossary_entries("\n".join(lines))
    lines += ["", f"### {C.TITLES['glossary']}", ""]
    lines += [f"- **{e.term}**: {_esc(e.definition)} ({_esc(e.source)})" for e in entries]
    if not entries:
        lines.append("No glossary term appears in this report.")
    lines += _section(doc, "caution")
    return "\n".join(lines) + "\n"
