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
from typing import Any

from replicheck.report.figures import effects_figure, units_figure, variance_figure
from replicheck.report.markdown import suggested_wording
from replicheck.report.reading import reading_lines
from replicheck.report.text import (
    STATUS_WORDS,
    TERMS_HEADER,
    alternative_items,
    analyses_header,
    analyses_rows,
    fmt_df,
    fmt_num,
    fmt_p,
    needs_sentence,
    roles_rows,
    terms_rows,
)

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


def _img(svg: str, alt: str) -> str:
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


def _yes_no(flag: bool | None) -> str:
    return "unknown" if flag is None else ("yes" if flag else "no")


def _verdict(doc: dict[str, Any]) -> str:
    v, c = doc["verdict"], doc["claim"]
    status = v["status"]
    parts = [
        f'<section class="verdict tone-{_e(status)}" aria-label="verdict">',
        f'<p class="status">Verdict: <span>{_e(STATUS_TITLES.get(status, status))}</span></p>',
        f"<p>{_e(STATUS_WORDS.get(status, status))}.</p>",
        f"<p>{_e(v['summary'])}</p>",
        f"<p><strong>Conclusion changed at alpha = {_e(c['alpha'])}:</strong> "
        f"{_e(_yes_no(v['conclusion_changed']))}."
        + (f" The corrected verdict rests on: {_e(v['method'])}." if v["method"] else "")
        + "</p>",
        '<p class="caution-short">A screening aid, not a judgement: how the experiment was run '
        "decides the unit. See the caution at the end of this report.</p>",
        "</section>",
    ]
    return "\n".join(parts)


def _key_figures(doc: dict[str, Any]) -> str:
    c = doc["claim"]
    rows: list[list[str]] = [
        ["response", c["response"]],
        ["treatment", ", ".join(c["treatments"])],
    ]
    for u in doc["experimental_units"]:
        rows.append(
            [
                f"experimental unit of {u['treatment']}",
                f"{u['unit'] or 'each row'} ({u['relation']}; {u['n_units']} units, "
                f"{u['n_observations']} observations)",
            ]
        )
    cl = doc["clustering"]
    if cl.get("icc") is not None:
        lo, hi = cl["icc_ci"]
        rows += [
            [
                "ICC",
                f"{cl['icc']:.3f} (one-way ANOVA {cl['icc_anova']:.3f}, "
                f"95% CI {lo:.3f} to {hi:.3f})",
            ],
            ["design effect", f"{cl['design_effect']:.2f}"],
            ["effective n", f"{cl['effective_n']:.1f} of {cl['n_observations']} observations"],
        ]
    if c["reported"]:
        rows.append(["reported", c["reported"]["text"]])
    rc = doc["reported_check"]
    if rc["explanation"]:
        rows.append(["reported df", rc["explanation"]])
    body = "".join(f'<tr><th scope="row">{_e(k)}</th><td>{_e(v)}</td></tr>' for k, v in rows)
    return f"<h2>Key figures</h2>\n<table>{body}</table>"


def _labelled(doc: dict[str, Any], column: str) -> str:
    """A column's name with its unit from the file's units row, if one was given."""
    unit = ((doc["input"].get("layout") or {}).get("units") or {}).get(column)
    if not unit:
        return column
    return f"{column} {unit}" if unit.startswith(("(", "[")) else f"{column} ({unit})"


def _reading_section(doc: dict[str, Any]) -> str:
    body = "".join(
        f'<tr><th scope="row">{_e(k)}</th><td>{_e(v)}</td></tr>'
        for k, v in reading_lines(doc["input"])
    )
    return f"<h2>What was read</h2>\n<table>{body}</table>"


def _units_section(doc: dict[str, Any]) -> str:
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
        f"Each column of points is one {unit} unit, with its mean as a dark bar; the dashed line "
        f"is the mean of the unit means in each level. The analysis has "
        f"{d['n_units']} independent units, not {d['n_observations']} observations."
        if unit
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
            lv["label"],
            str(lv["n_units"]),
            str(lv["n_observations"]),
            fmt_num(lv["mean_of_unit_means"], 4),
        ]
        for lv in levels
    ]
    table = _table(
        ["level", "units", "observations", "mean of unit means"], rows, numeric={1, 2, 3}
    )
    return (
        f"<h2>Observations grouped by experimental unit</h2>\n<figure>"
        f"{_img(units_figure(d, _labelled(doc, doc['claim']['response'])), alt)}"
        f"<figcaption>{_e(caption)}</figcaption></figure>\n{table}"
    )


def _ci(iv: dict[str, Any] | None) -> list[str]:
    if iv is None:
        return ["-", "no interval", "-"]
    if iv["low"] is None:
        return [fmt_num(iv["estimate"], 4), "no interval (no error df)", fmt_df([iv["df"]])]
    return [
        fmt_num(iv["estimate"], 4),
        f"{fmt_num(iv['low'], 4)} to {fmt_num(iv['high'], 4)}",
        fmt_df([iv["df"]]),
    ]


def _effects_section(doc: dict[str, Any]) -> str:
    d = doc.get("display")
    if not d or not d["effects"]["rows"]:
        return ""
    e = d["effects"]
    conf = f"{e['confidence']:.0%}"
    rows = [
        [f"{r['level']} − {r['reference']}", *_ci(r["claimed"]), *_ci(r["corrected"])]
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
        f"{_img(effects_figure(e, d['term']), alt)}"
        f"<figcaption>{_e(caption)}"
        "</figcaption></figure>\n" + _table(header, rows, numeric={1, 3, 4, 6})
    )


def _variance_section(doc: dict[str, Any]) -> str:
    cl = doc["clustering"]
    vc = cl.get("variance_components") if cl.get("icc") is not None else None
    if not vc or vc["unit"] is None or vc["residual"] is None:
        return ""
    total = vc["unit"] + vc["residual"]
    share = vc["unit"] / total if total > 0 else 0.0
    unit = cl["unit"]
    alt = f"Variance between {unit} units {share:.0%}, within units {1 - share:.0%}."
    text = (
        f"Between {unit} units: {fmt_num(vc['unit'], 4)}; within units: "
        f"{fmt_num(vc['residual'], 4)} (ICC {cl['icc']:.3f}, {cl['icc_method']}). "
        f"With a mean of {cl['mean_unit_size']:.1f} observations per unit the design effect is "
        f"{cl['design_effect']:.2f}, so the {cl['n_observations']} observations carry the "
        f"information of about {cl['effective_n']:.1f} independent ones."
    )
    od = cl.get("overdispersion")
    if od:
        text += (
            f" Spread between units against {od['family']} chance: dispersion "
            f"{od['dispersion']:.2f}, chi-squared({od['df']}) = {fmt_num(od['chi2'], 4)}, "
            f"p = {fmt_p(od['p_value'])}."
        )
    return (
        "<h2>Variance partition</h2>\n<figure>"
        f"{_img(variance_figure(share, unit), alt)}</figure>\n<p>{_e(text)}</p>"
    )


def _analyses_section(doc: dict[str, Any]) -> str:
    out = []
    if len(doc["terms"]) > 1:
        out += ["<h2>Terms: claimed and corrected</h2>", _table(TERMS_HEADER, terms_rows(doc))]
    header = analyses_header(doc)
    rows = analyses_rows(doc)
    out += ["<h2>Analyses</h2>", _table(header, rows)]
    out.append("<p><small>* marks the analysis the corrected verdict rests on.</small></p>")
    notes = [f"{a['name']} ({a['term']}): {n}" for a in doc["analyses"] for n in a["notes"]]
    if notes:
        out.append("<ul>" + "".join(f"<li>{_e(n)}</li>" for n in notes) + "</ul>")
    return "\n".join(out)


def _design_section(doc: dict[str, Any]) -> str:
    strata = doc.get("design", {}).get("strata", [])
    if not strata:
        return ""
    children: dict[str | None, list[dict[str, Any]]] = {}
    for s in strata:
        children.setdefault(s["parent"], []).append(s)
    what = {"unit": "unit", "block": "block", "subunit": "sub-unit", "rows": "rows"}

    def walk(parent: str | None) -> str:
        items = []
        for s in children.get(parent, []):
            tests = f"; tests {', '.join(s['terms'])}" if s["terms"] else ""
            label = f"{s['name']} ({what.get(s['kind'], s['kind'])}, {s['n_levels']} levels{tests})"
            items.append(f"<li>{_e(label)}{walk(s['name'])}</li>")
        return f'<ul class="tree">{"".join(items)}</ul>' if items else ""

    out = [
        "<h2>Design structure</h2>",
        "<p>Each grouping is listed under the one it is nested in; a term is tested "
        "against the variation between the units of its stratum.</p>",
        walk(None),
    ]
    blocks = doc["design"].get("blocks", [])
    if blocks:
        out.append(
            "<p>Blocks: "
            + _e("; ".join(f"{b['name']} ({b['n_levels']}): {b['reason']}" for b in blocks))
            + "</p>"
        )
    alts = alternative_items(doc)
    if alts:
        out.append("<h3>Other readings of the unit (each refitted)</h3>")
        out.append(
            "<ul>"
            + "".join(
                f"<li><strong>{_e(term)}</strong>: {_e(head)}. {_e(why)}. "
                f"<em>Settled by:</em> {_e(settle)}.</li>"
                for term, head, why, settle in alts
            )
            + "</ul>"
        )
    roles = roles_rows(doc)
    if roles:
        out.append("<h3>Roles of the columns</h3>")
        out.append(_table(["column", "role", "source", "why"], roles))
    return "\n".join(out)


def _findings_section(doc: dict[str, Any]) -> str:
    if not doc["findings"]:
        return ""
    out = ["<h2>Findings and what to do</h2>"]
    for f in doc["findings"]:
        sev = f["severity"]
        out.append(
            f'<div class="finding {_e(sev)}"><p><span class="sev">'
            f"{_e(SEVERITY_WORDS.get(sev, sev))}:</span> {_e(f['message'])} "
            f'<span class="rule">[{_e(f["rule"])}]</span></p>'
            f"<p><strong>What to do:</strong> {_e(f['advice'])}</p></div>"
        )
    return "\n".join(out)


def _hidden_section(doc: dict[str, Any]) -> str:
    derived = (doc.get("hidden") or {}).get("derived", [])
    if not derived:
        return ""
    items = []
    for g in derived:
        use = f"unit of {', '.join(g['unit_of'])}" if g["unit_of"] else "candidate"
        items.append(
            f"<li><code>{_e(g['name'])}</code> ({g['n_groups']} groups; {_e(use)}): "
            f"{_e(g['how'])}</li>"
        )
    return "<h2>Groupings found in the data</h2>\n<ul>" + "".join(items) + "</ul>"


def render_html(doc: dict[str, Any]) -> str:
    """Render the report dictionary as one self-contained HTML page."""
    inp = doc["input"]
    needs = needs_sentence(doc)
    sections = [
        _verdict(doc),
        _key_figures(doc),
        _reading_section(doc),
        _units_section(doc),
        _effects_section(doc),
        _variance_section(doc),
        _findings_section(doc),
        _analyses_section(doc),
        _design_section(doc),
        _hidden_section(doc),
        f"<h2>What a valid design would need</h2>\n<p>{_e(needs)}</p>" if needs else "",
        f"<h2>Suggested wording</h2>\n<blockquote>{_e(suggested_wording(doc))}</blockquote>",
        f'<h2>Caution</h2>\n<p class="caution">{_e(doc["caution"])}</p>',
    ]
    sha = inp.get("sha256") or ""
    body = "\n".join(s for s in sections if s)
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
