"""Self-contained HTML rendering of a report dictionary.

One file a reviewer can attach: no network access, no scripts, no external
fonts or style sheets (a Content-Security-Policy in the page forbids them),
figures embedded as SVG images in ``data:`` URIs (an SVG shown as an image
never runs scripts). Every string that comes from the data or the user is
escaped. The status is written in words; colour only repeats it. Prints on
paper with the same content (figures are kept whole on a page).
"""

from __future__ import annotations

import base64
import html
import re
from typing import Any

from replicheck.report import content as C
from replicheck.report.figures import effects_figure, units_figure, variance_figure
from replicheck.report.reading import reading_lines

STATUS_TITLES = {
    "ok": "No pseudo-replication found",
    "pseudoreplicated": "Pseudo-replicated",
    "confounded": "Confounded",
    "unclear": "Unclear",
}

SEVERITY_WORDS = {"error": "Problem", "warning": "Warning", "note": "Note"}

CSS = """
:root { --ink: #0f172a; --muted: #475569; --rule: #cbd5e1; --panel: #f8fafc; }
* { box-sizing: border-box; }
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; color: var(--ink);
  max-width: 60rem; margin: 0 auto; padding: 1.5rem 1.25rem 3rem; line-height: 1.45; }
h1 { font-size: 1.35rem; margin: 0 0 .25rem; }
h2 { font-size: 1.1rem; margin: 2rem 0 .5rem; border-bottom: 1px solid var(--rule);
  padding-bottom: .2rem; }
h3 { font-size: 1rem; margin: 1.25rem 0 .4rem; }
.meta { color: var(--muted); font-size: .85rem; margin: 0; word-break: break-all; }
.verdict { border: 2px solid var(--tone); border-left-width: .8rem; border-radius: .3rem;
  padding: .8rem 1rem; margin: 1rem 0; background: var(--panel); }
.verdict .status { font-size: 1.3rem; font-weight: 700; margin: 0 0 .3rem; }
.verdict .status span { color: var(--tone); }
.tone-ok { --tone: #2f6f3e; } .tone-pseudoreplicated { --tone: #a15c00; }
.tone-confounded { --tone: #9f1d2b; } .tone-unclear { --tone: #4b5283; }
.caution-short { font-size: .9rem; color: var(--muted); margin: .5rem 0 0; }
table { border-collapse: collapse; margin: .5rem 0; font-size: .9rem; }
th, td { border-bottom: 1px solid var(--rule); padding: .25rem .6rem; text-align: left;
  vertical-align: top; }
th { background: var(--panel); }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
tr.chosen td { font-weight: 600; }
figure { margin: .8rem 0; page-break-inside: avoid; break-inside: avoid; }
figure img { max-width: 100%; height: auto; display: block; }
figcaption { font-size: .85rem; color: var(--muted); margin-top: .3rem; }
.finding { border-left: .35rem solid var(--rule); padding: .3rem .8rem; margin: .6rem 0;
  background: var(--panel); }
.finding.error { border-color: #9f1d2b; } .finding.warning { border-color: #a15c00; }
.finding .sev { font-weight: 700; }
.finding .rule { font-family: ui-monospace, monospace; font-size: .85rem; color: var(--muted); }
blockquote { margin: .5rem 0; padding: .5rem 1rem; border-left: .3rem solid var(--rule);
  background: var(--panel); }
code { font-family: ui-monospace, monospace; font-size: .9em; }
ul.tree, ul.tree ul { list-style: none; padding-left: 1.2rem; margin: .2rem 0; }
ul.tree li::before { content: "└ "; color: var(--muted); }
dl.glossary dt { font-weight: 600; margin-top: .4rem; }
dl.glossary dd { margin: 0 0 0 1.2rem; }
dl.glossary .source { color: var(--muted); font-size: .85rem; }
.caution { border: 1px solid var(--rule); padding: .6rem 1rem; background: #fffbeb; }
footer { margin-top: 2.5rem; color: var(--muted); font-size: .8rem; }
@media print {
  body { max-width: none; padding: 0; font-size: 10pt; }
  h2 { page-break-after: avoid; break-after: avoid; }
  .verdict, .finding, table { page-break-inside: avoid; break-inside: avoid; }
}
"""

CSP = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"


def _e(x: object) -> str:
    """Escape text for HTML (quotes too, so it is safe in attributes)."""
    return html.escape(str(x), quote=True)


def _img(svg: str | None, alt: str) -> str:
    if svg is None:  # figures left out (the proofreader reads the words only)
        return f'<img alt="{_e(alt)}">'
    data = base64.b64encode(svg.encode("utf-8")).decode("ascii")
    return f'<img src="data:image/svg+xml;base64,{data}" alt="{_e(alt)}">'


def _table(header: list[str], rows: list[list[str]], numeric: set[int] | None = None) -> str:
    numeric = numeric or set()
    head = "".join(f'<th scope="col">{_e(h)}</th>' for h in header)
    body = []
    for r in rows:
        cells = "".join(
            f'<td class="num">{_e(c)}</td>' if i in numeric else f"<td>{_e(c)}</td>"
            for i, c in enumerate(r)
        )
        body.append(f"<tr>{cells}</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _rows_table(rows: list[tuple[str, str]]) -> str:
    body = "".join(f'<tr><th scope="row">{_e(k)}</th><td>{_e(v)}</td></tr>' for k, v in rows)
    return f"<table>{body}</table>"


def _h2(key: str) -> str:
    return f"<h2>{_e(C.TITLES[key])}</h2>"


def _status_reason(status: str) -> str:
    """What the status means, without repeating its name (the heading gives it)."""
    words = C.STATUS_WORDS.get(status, status)
    reason = words.split(" - ", 1)[-1]
    return reason[:1].upper() + reason[1:]


def _verdict(doc: dict[str, Any]) -> str:
    v = doc["verdict"]
    status = v["status"]
    parts = [
        f'<section class="verdict tone-{_e(status)}" aria-label="verdict">',
        f'<p class="status">Verdict: <span>{_e(STATUS_TITLES.get(status, status))}</span></p>',
        ""
        if _status_reason(status).lower() == STATUS_TITLES.get(status, status).lower()
        else f"<p>{_e(_status_reason(status))}.</p>",
        "<p>" + " ".join(_e(x) for x in C.verdict_lines(doc)) + "</p>",
        f"<p>{_e(v['summary'])}</p>",
        '<p class="caution-short">A screening aid, not a judgement: how the experiment was run '
        "decides the unit. See the caution at the end of this report.</p>",
        "</section>",
    ]
    return "\n".join(parts)


def _labelled(doc: dict[str, Any], column: str) -> str:
    """A column's name with its unit from the file's units row, if one was given."""
    unit = ((doc["input"].get("layout") or {}).get("units") or {}).get(column)
    if not unit:
        return column
    return f"{column} {unit}" if unit.startswith(("(", "[")) else f"{column} ({unit})"


def _units_figure(doc: dict[str, Any], figures: bool = True) -> str:
    d = doc.get("display")
    if not d:
        return ""
    levels = d["levels"]
    unit = d["unit"]
    per_level = "; ".join(
        f"{lv['label']}: {lv['n_units']} units, {lv['n_observations']} observations"
        for lv in levels
    )
    alt = (
        f"Observations of {doc['claim']['response']} grouped by {unit or 'row'} within each "
        f"level of {d['term']}. {per_level}."
    )
    caption = (
        f"Each column of points is one unit ({C.unit_noun(unit)}), with its mean as a dark "
        f"bar; the dashed line is the mean of the unit means in each level. The analysis has "
        f"{d['n_units']:,} independent units, not {d['n_observations']:,} observations."
        if unit and d["n_units"] != d["n_observations"]
        else "Each point is one observation and its own unit."
    )
    if d["thinned"]:
        caption += " Large units show an evenly spread subset of their observations."
    if any(lv["n_units"] > len(lv["units"]) for lv in levels):
        caption += (
            " Levels with many units show a selection of unit means at evenly spaced ranks "
            "(the mean of unit means uses every unit)."
        )
    rows = [
        [
            f"'{lv['label']}'",
            f"{lv['n_units']:,}",
            f"{lv['n_observations']:,}",
            C.fmt_num(lv["mean_of_unit_means"]),
        ]
        for lv in levels
    ]
    table = _table(
        ["level", "units", "observations", "mean of unit means"], rows, numeric={1, 2, 3}
    )
    svg = units_figure(d, _labelled(doc, doc["claim"]["response"])) if figures else None
    return f"<figure>{_img(svg, alt)}<figcaption>{_e(caption)}</figcaption></figure>\n{table}"


def _ci(iv: dict[str, Any] | None) -> list[str]:
    if iv is None:
        return ["-", "no interval", "-"]
    if iv["low"] is None:
        return [C.fmt_num(iv["estimate"]), "no interval (no error df)", C.fmt_df([iv["df"]])]
    return [
        C.fmt_num(iv["estimate"]),
        f"{C.fmt_num(iv['low'])} to {C.fmt_num(iv['high'])}",
        C.fmt_df([iv["df"]]),
    ]


def _effects_section(doc: dict[str, Any], figures: bool = True) -> str:
    d = doc.get("display")
    if not d or not d["effects"]["rows"]:
        return ""
    e = d["effects"]
    conf = f"{e['confidence']:.0%}"
    rows = [
        [f"'{r['level']}' − '{r['reference']}'", *_ci(r["claimed"]), *_ci(r["corrected"])]
        for r in e["rows"]
    ]
    header = [
        "comparison",
        "as claimed: difference",
        f"{conf} CI",
        "df",
        "unit as replicate: difference",
        f"{conf} CI",
        "df",
    ]
    caption = f"Circles: {e['claimed_method']}. Squares: {e['corrected_method']}."
    alt = "Differences from the first level with confidence intervals: " + "; ".join(
        f"{r[0]}: as claimed {r[1]} ({r[2]}), unit as replicate {r[4]} ({r[5]})" for r in rows
    )
    return (
        "<h2>Claimed and corrected effects</h2>\n<figure>"
        f"{_img(effects_figure(e, d['term']) if figures else None, alt)}"
        f"<figcaption>{_e(caption)}"
        "</figcaption></figure>\n" + _table(header, rows, numeric={1, 3, 4, 6})
    )


def _variance_figure(doc: dict[str, Any], figures: bool = True) -> str:
    cl = doc["clustering"]
    vc = cl.get("variance_components") if cl.get("icc") is not None else None
    if not vc or vc["unit"] is None or vc["residual"] is None:
        return ""
    total = vc["unit"] + vc["residual"]
    share = vc["unit"] / total if total > 0 else 0.0
    unit = cl["unit"]
    alt = f"Variance between {unit} units {share:.0%}, within units {1 - share:.0%}."
    svg = variance_figure(share, unit) if figures else None
    return f"<figure>{_img(svg, alt)}</figure>"


def _list(items: list[str]) -> str:
    return "<ul>" + "".join(f"<li>{_e(i)}</li>" for i in items) + "</ul>"


def _tree(lines: list[tuple[int, str]]) -> str:
    """Nested lists from (depth, text) pairs in depth-first order."""
    out, depth = ['<ul class="tree">'], 0
    for i, (d, text) in enumerate(lines):
        if i > 0:
            if d > depth:
                out.append('<ul class="tree">')
            else:
                out.append("</li>" + "</ul></li>" * (depth - d))
        out.append(f"<li>{_e(text)}")
        depth = d
    out.append("</li>" + "</ul></li>" * depth + "</ul>")
    return "".join(out)


def _section(doc: dict[str, Any], key: str, figures: bool = True) -> str:
    if key == "verdict":
        return _verdict(doc)
    out = [_h2(key)]
    if key == "terms":
        out.append(_table(C.TERMS_HEADER, C.terms_rows(doc)))
    elif key == "claim":
        out.append(_rows_table(C.claim_rows(doc)))
    elif key == "read":
        out.append(_rows_table(reading_lines(doc["input"])))
    elif key == "unit":
        out.append(_list(C.unit_lines(doc)))
        out.append(_units_figure(doc, figures))
        tree = C.design_tree(doc)
        if tree:
            out.append(
                "<h3>Design structure</h3><p>Each grouping is listed under the one it is "
                "nested in; a term is tested against the variation between the units of its "
                "stratum.</p>" + _tree(tree)
            )
        items = C.candidate_items(doc)
        if items:
            out.append("<h3>Candidate units (coarsest credible first)</h3><ul>")
            out += [f"<li>{_e(head)}{_list(reasons)}</li>" for head, reasons in items]
            out.append("</ul>")
        alts = C.alternative_items(doc)
        if alts:
            out.append("<h3>Other readings of the unit (each refitted)</h3><ul>")
            out += [
                f"<li><strong>{_e(term)}</strong>: {_e(head)}. {_e(why)}. "
                f"<em>Settled by:</em> {_e(settle)}.</li>"
                for term, head, why, settle in alts
            ]
            out.append("</ul>")
    elif key == "roles":
        out.append(_table(["column", "role", "source", "why"], C.roles_rows(doc)))
    elif key == "clustering":
        out.append(_variance_figure(doc, figures))
        several = len(doc["terms"]) > 1
        for unit, sentences in C.clustering_blocks(doc):
            lead = f"<strong>Unit {_e(unit)}:</strong> " if several else ""
            out.append(f"<p>{lead}{_e(' '.join(sentences))}</p>")
    elif key == "analyses":
        out.append(_table(C.analyses_header(doc), C.analyses_rows(doc)))
        out.append(f"<p><small>{_e(C.ANALYSES_KEY)}</small></p>")
        notes = C.analysis_notes(doc)
        if notes:
            out.append(_list(notes))
    elif key == "findings":
        for f in doc["findings"]:
            sev = f["severity"]
            out.append(
                f'<div class="finding {_e(sev)}"><p><span class="sev">'
                f"{_e(SEVERITY_WORDS.get(sev, sev))}:</span> {_e(f['message'])} "
                f'<span class="rule">[{_e(f["rule"])}]</span></p>'
                f"<p><strong>What to do:</strong> {_e(f['advice'])}</p></div>"
            )
    elif key == "hidden":
        out.append("<p>No column names these groupings.</p>" + _list(C.hidden_items(doc)))
    elif key == "needs":
        out.append(f"<p>{_e(C.needs_sentence(doc))}</p>")
    elif key == "wording":
        out.append(f"<blockquote>{_e(C.suggested_wording(doc))}</blockquote>")
    elif key == "caution":
        out.append(f'<p class="caution">{_e(doc["caution"])}</p>')
    return "\n".join(x for x in out if x)


_TAG = re.compile(r"<[^>]+>")
_HIDDEN = re.compile(r"<(style|script)\b.*?</\1>", re.DOTALL | re.IGNORECASE)
_BREAK = re.compile(r"<(br|/p|/li|/h\d|/tr|/td|/th|/div|/figcaption|/blockquote|/dd|/dt)\b[^>]*>")


def visible_text(page: str) -> str:
    """The words a reader sees on a page: no tags, attributes, styles or scripts."""
    text = _BREAK.sub("\n", _HIDDEN.sub(" ", page))
    return html.unescape(_TAG.sub(" ", text))


def _glossary(body: str) -> str:
    entries = C.glossary_entries(visible_text(body))
    items = "".join(
        f"<dt>{_e(e.term)}</dt><dd>{_e(e.definition)} "
        f'<span class="source">({_e(e.source)})</span></dd>'
        for e in entries
    )
    return f'{_h2("glossary")}\n<dl class="glossary">{items}</dl>'


def render_html(doc: dict[str, Any], figures: bool = True) -> str:
    """Render the report dictionary as one self-contained HTML page (``figures=False``
    leaves the images out, keeping their descriptions: for the proofreader)."""
    inp = doc["input"]
    parts = []
    for key in C.sections(doc):
        if key in ("glossary", "caution"):
            continue
        parts.append(_section(doc, key, figures))
        if (key == "verdict" and "terms" not in C.sections(doc)) or key == "terms":
            parts.append(_effects_section(doc, figures))
    body = "\n".join(s for s in parts if s)
    body += "\n" + _glossary(body) + "\n" + _section(doc, "caution")
    sha = inp.get("sha256") or ""
    return (
        '<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        f'<meta http-equiv="Content-Security-Policy" content="{CSP}">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>replicheck audit: {_e(inp['source'])}</title>\n"
        f"<style>{CSS}</style>\n</head>\n<body>\n<header>\n"
        f"<h1>replicheck audit: {_e(inp['source'])}</h1>\n"
        f'<p class="meta">replicheck {_e(doc["tool"]["version"])}'
        + (f" &middot; input SHA-256 {_e(sha)}" if sha else "")
        + "</p>\n</header>\n<main>\n"
        + body
        + "\n</main>\n<footer>Generated by replicheck "
        + _e(doc["tool"]["version"])
        + " from the data file and the claimed analysis only.</footer>\n</body>\n</html>\n"
    )
