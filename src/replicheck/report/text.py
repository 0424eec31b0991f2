"""Plain terminal text rendering of a report dictionary (content from ``content``)."""

from __future__ import annotations

import textwrap
from typing import Any

from replicheck.report import content as C
from replicheck.report.reading import reading_lines

WIDTH = 88


def _wrap(text: str, indent: str = "  ", first: str | None = None) -> str:
    return textwrap.fill(
        text,
        WIDTH,
        initial_indent=indent if first is None else first,
        subsequent_indent=indent,
        break_on_hyphens=False,
        break_long_words=False,
    )


def _table(rows: list[list[str]], header: list[str]) -> list[str]:
    widths = [max(len(str(r[i])) for r in [header, *rows]) for i in range(len(header))]
    line = "  " + "  ".join(h.ljust(w) for h, w in zip(header, widths, strict=True))
    out = [line.rstrip(), "  " + "  ".join("-" * w for w in widths)]
    for r in rows:
        out.append(
            ("  " + "  ".join(str(c).ljust(w) for c, w in zip(r, widths, strict=True))).rstrip()
        )
    return out


def _title(key: str) -> str:
    return C.TITLES[key].upper()


def _section(doc: dict[str, Any], key: str) -> list[str]:
    """The lines of one section, heading first."""
    if key == "verdict":
        v = doc["verdict"]
        out = [f"VERDICT: {C.STATUS_WORDS.get(v['status'], v['status'])}"]
        out += [_wrap(line) for line in C.verdict_lines(doc)]
        if len(doc["terms"]) > 1:
            out += ["", _title("terms"), *_table(C.terms_rows(doc), C.TERMS_HEADER)]
        return [*out, "", _wrap(v["summary"])]
    if key == "terms":
        return []  # in the verdict section: the per-term table comes first
    out = [_title(key)]
    if key == "claim":
        out += [_wrap(f"{label}: {text}", "      ", "  ") for label, text in C.claim_rows(doc)]
    elif key == "read":
        out += [_wrap(f"{label}: {text}") for label, text in reading_lines(doc["input"])]
    elif key == "unit":
        out += [_wrap(line, "      ", "  ") for line in C.unit_lines(doc)]
        tree = C.design_tree(doc)
        if tree:
            out.append("  design structure (each grouping under the one it is nested in):")
            out += [f"    {'  ' * depth}{line}" for depth, line in tree]
        items = C.candidate_items(doc)
        if items:
            out.append("  candidate units (coarsest credible first):")
            for head, reasons in items:
                out.append(_wrap(head, "        ", "    "))
                out += [_wrap(r, "        ", "      - ") for r in reasons]
        alts = C.alternative_items(doc)
        if alts:
            out.append("  other readings of the unit (each refitted):")
            for term, head, why, settle in alts:
                out.append(_wrap(f"'{term}': {head}", "        ", "    "))
                out.append(_wrap(f"why: {why}", "        ", "      - "))
                out.append(_wrap(f"settled by: {settle}", "        ", "      - "))
    elif key == "roles":
        for col, role, source, why in C.roles_rows(doc):
            out.append(_wrap(f"{col}: {role} ({source}) - {why}", "      ", "  "))
    elif key == "clustering":
        for unit, sentences in C.clustering_blocks(doc):
            if len(doc["terms"]) > 1:
                out.append(f"  unit '{unit}':")
            out += [_wrap(s, "      ", "  ") for s in sentences]
    elif key == "analyses":
        rows, header = C.analyses_rows(doc), C.analyses_header(doc)
        if len(doc["terms"]) > 1:  # one block per term: the table stays narrow
            terms = list(dict.fromkeys(r[0] for r in rows))
            for term in terms:
                out.append(f"  '{term}':")
                out += _table([r[1:] for r in rows if r[0] == term], header[1:])
        else:
            out += _table(rows, header)
        out.append(f"  {C.ANALYSES_KEY}")
        out += [_wrap(n, "        ", "  note: ") for n in C.analysis_notes(doc)]
    elif key == "findings":
        for f in doc["findings"]:
            out.append(f"  [{f['severity']}] {f['rule']}")
            out.append(_wrap(f["message"], "    "))
            out.append(_wrap("what to do: " + f["advice"], "    "))
    elif key == "hidden":
        out.append("  (no column names these groupings)")
        out += [_wrap(item, "    ", "  - ") for item in C.hidden_items(doc)]
    elif key == "needs":
        out.append(_wrap(C.needs_sentence(doc) or ""))
    elif key == "wording":
        out.append(_wrap(C.suggested_wording(doc)))
    elif key == "caution":
        out.append(_wrap(doc["caution"]))
    return out


def render_text(doc: dict[str, Any]) -> str:
    """Render the report dictionary as terminal text."""
    out: list[str] = [f"replicheck {doc['tool']['version']}: {doc['input']['source']}"]
    keys = C.sections(doc)
    for key in keys:
        if key in ("terms", "glossary", "caution"):
            continue
        out += ["", *_section(doc, key)]
    entries = C.glossary_entries("\n".join(out))
    out += ["", _title("glossary")]
    out.append(
        _wrap(
            ", ".join(e.term for e in entries)
            + ". 'replicheck explain TERM' defines each, with its source."
        )
        if entries
        else "  none"
    )
    out += ["", *_section(doc, "caution")]
    return "\n".join(out) + "\n"
