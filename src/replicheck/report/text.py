"""Plain terminal text rendering of a report dictionary."""

from __future__ import annotations

import textwrap
from typing import Any

from replicheck.numbers import format_p, p_phrase
from replicheck.report.reading import reading_lines

WIDTH = 88

STATUS_WORDS = {
    "ok": "OK - no pseudo-replication found",
    "pseudoreplicated": "PSEUDO-REPLICATED - rows were counted as replicates of a larger unit",
    "confounded": "CONFOUNDED - treatment cannot be separated from the unit",
    "unclear": "UNCLEAR - the data alone cannot settle the unit",
}


fmt_p = format_p


def fmt_num(x: float | None, digits: int = 3) -> str:
    """A number with a few significant digits, '-' for None."""
    return "-" if x is None else f"{x:.{digits}g}"


def fmt_df(df: list[float] | None) -> str:
    """Degrees of freedom as 'num, den'."""
    if not df:
        return "-"
    return ", ".join(f"{d:.4g}" if abs(d - round(d)) > 1e-9 else f"{round(d)}" for d in df)


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


def analyses_header(doc: dict[str, Any]) -> list[str]:
    """Column names of the analyses table (a term column when there are several terms)."""
    head = ["analysis", "replicates", "statistic", "df", "p", "signif."]
    return ["term", *head] if len(doc["terms"]) > 1 else head


def analyses_rows(doc: dict[str, Any]) -> list[list[str]]:
    """Rows of the analyses table shared by the text and Markdown renderers."""
    several = len(doc["terms"]) > 1
    rows = []
    for a in doc["analyses"]:
        mark = " *" if a["corrected"] else ""
        row = [
            a["name"] + mark,
            f"{a['n_replicates']} {a['level']}",
            ("chi2 " if a.get("test") == "chi2" and a["statistic"] is not None else "")
            + fmt_num(a["statistic"], 4),
            fmt_df(a["df"]),
            fmt_p(a["p_value"]),
            "-" if a["significant"] is None else ("yes" if a["significant"] else "no"),
        ]
        rows.append([a["term"], *row] if several else row)
    return rows


def shown_candidates(doc: dict[str, Any], limit: int = 6) -> list[dict[str, Any]]:
    """Candidates worth showing: credible ones, and the others of the claimed term."""
    first = doc["claim"]["reported_term"]
    seen: set[tuple[str, str]] = set()
    out = []
    for k in doc["candidates"]:
        key = (k["treatment"], k["grouping"])
        if key in seen or not (k["credible"] or k["treatment"] == first):
            continue
        seen.add(key)
        out.append(k)
    return out[:limit]


def _clustering_lines(cl: dict[str, Any], title: str) -> list[str]:
    lo, hi = cl["icc_ci"]
    vc = cl["variance_components"]
    lines = [
        title,
        f"  ICC {cl['icc']:.3f} ({cl['icc_method']}); one-way ANOVA estimate "
        f"{cl['icc_anova']:.3f}, 95% CI {lo:.3f} to {hi:.3f}",
        f"  variance: between units {fmt_num(vc['unit'], 4)}, "
        f"within units {fmt_num(vc['residual'], 4)}",
        f"  design effect {cl['design_effect']:.2f} (mean unit size {cl['mean_unit_size']:.1f}, "
        f"CV {cl['cv_unit_size']:.2f}); effective n {cl['effective_n']:.1f} of "
        f"{cl['n_observations']}",
    ]
    od = cl.get("overdispersion")
    if od:
        lines.append(
            f"  spread between units against {od['family']} chance: dispersion "
            f"{od['dispersion']:.2f}, chi2({od['df']}) = {fmt_num(od['chi2'], 4)}, "
            f"{p_phrase(od['p_value'])}"
        )
    return lines


def terms_rows(doc: dict[str, Any]) -> list[list[str]]:
    """One row per term: claimed p beside the corrected test and its error stratum."""
    rows = []
    for t in doc["terms"]:
        changed = t["conclusion_changed"]
        rows.append(
            [
                t["term"],
                t["status"],
                fmt_p(t["claimed_p_value"]),
                f"{'chi2' if t.get('test') == 'chi2' else 'F'}({fmt_df(t['df'])}) = "
                f"{fmt_num(t['statistic'])}"
                if t["df"]
                else "no test",
                fmt_p(t["p_value"]),
                t["error_term"] or "-",
                "-" if changed is None else ("YES" if changed else "no"),
            ]
        )
    return rows


TERMS_HEADER = ["term", "status", "claimed p", "corrected test", "p", "error stratum", "changed"]


def terms_table(doc: dict[str, Any]) -> list[str]:
    """The per-term table of the text report."""
    return _table(terms_rows(doc), TERMS_HEADER)


def design_tree(doc: dict[str, Any]) -> list[str]:
    """The strata as an indented tree, each with the terms tested in it."""
    strata = doc.get("design", {}).get("strata", [])
    if len(strata) <= 1 and not any(s["terms"] for s in strata if s["kind"] != "rows"):
        return []
    children: dict[str | None, list[dict[str, Any]]] = {}
    for s in strata:
        children.setdefault(s["parent"], []).append(s)
    lines = ["  design structure (each grouping under the one it is nested in):"]

    def walk(parent: str | None, depth: int) -> None:
        for s in children.get(parent, []):
            what = {"unit": "unit", "block": "block", "subunit": "sub-unit", "rows": "rows"}
            terms = f"  <- tests {', '.join(s['terms'])}" if s["terms"] else ""
            lines.append(
                f"  {'  ' * (depth + 1)}{s['name']} ({what.get(s['kind'], s['kind'])}, "
                f"{s['n_levels']}){terms}"
            )
            walk(s["name"], depth + 1)

    walk(None, 0)
    return lines


ROLE_WORDS = {
    "unit": "experimental unit",
    "subunit": "sub-unit",
    "block": "block",
    "within": "within-unit factor",
    "covariate": "covariate",
    "label": "label of the treatments",
    "identifier": "row identifier",
    "ignored": "ignored",
    "other": "no role",
}


def roles_rows(doc: dict[str, Any]) -> list[list[str]]:
    """Column, role, where the role came from, and why: every column but the claimed ones."""
    return [
        [r["column"], ROLE_WORDS.get(r["role"], r["role"]), r["source"], r["evidence"]]
        for r in doc.get("roles", [])
        if r["role"] not in ("response", "treatment")
    ]


def alternative_items(doc: dict[str, Any]) -> list[tuple[str, str, str, str]]:
    """Each other reading of a term's unit: (term, unit and its test, why, what settles it)."""
    out = []
    for t in doc["terms"]:
        for a in t.get("alternatives", []):
            unit = a["unit"] or "each row"
            kind = "the unit found in the data" if a["kind"] == "stated" else "another reading"
            if a["p_value"] is not None and a["test"]:
                test = (
                    f"{a['method']}: {a['test']}({fmt_df(a['df'])}) = "
                    f"{fmt_num(a['statistic'])}, {p_phrase(a['p_value'])}"
                )
            else:
                test = f"{a['method']}: no test"
            head = f"{unit} ({kind}; {a['relation']}, {a['n_units']} units; {test})"
            out.append((t["term"], head, a["why"], a["settle"]))
    return out


def hidden_lines(doc: dict[str, Any]) -> list[str]:
    """Derived groupings with how they were found, and the signals worth reading."""
    h = doc.get("hidden") or {}
    out: list[str] = []
    for g in h.get("derived", []):
        use = f"unit of {', '.join(g['unit_of'])}" if g["unit_of"] else "candidate"
        out.append(_wrap(f"{g['name']} ({g['n_groups']} groups; {use}): {g['how']}", "    ", "  "))
    for sig in h.get("signals", []):
        p = sig["p_value"]
        if p is not None and p > 0.001:
            continue
        out.append(_wrap(f"{sig['check']}: {sig['message']}", "    ", "  "))
    return out


def needs_sentence(doc: dict[str, Any]) -> str | None:
    """A sentence on the units a design would need (from the report's design_needs)."""
    n = doc.get("design_needs")
    if not n:
        return None
    unit, term = n["unit"], n["term"]
    m = n["observations_per_unit"]
    stated = n["effect"].get("kind") == "stated"
    what = (
        f"a difference of {n['effect']['difference']:g} between two levels of '{term}'"
        if stated
        else f"differences between levels of '{term}' as large as those observed"
    )
    if n["units_per_level"] is None:
        size = (
            f"A difference of {n['effect']['difference']:g} between levels of '{term}' is"
            if stated
            else f"The observed differences between levels of '{term}' are"
        )
        return (
            f"{size} too small beside the "
            f"variation between {unit} units for any practical number of units to detect them "
            f"with {n['power']:.0%} power."
        )
    sizes = {row["observations_per_unit"]: row["units_per_level"] for row in n["by_unit_size"]}
    many = sizes.get(100)
    tail = (
        f"; with 100 observations per {unit} it would still need {many}, so more "
        f"observations per unit barely help (ICC {n['icc']:.2f})"
        if many is not None
        else ""
    )
    return (
        f"To detect {what}, with "
        f"{n['power']:.0%} power at alpha = {n['alpha']:g}, a design would need about "
        f"{n['units_per_level']} independent {unit} units per level with {m:.3g} observations "
        f"each (it has {n['units_now']}){tail}."
    )


def render_text(doc: dict[str, Any]) -> str:
    """Render the report dictionary as terminal text."""
    v = doc["verdict"]
    c = doc["claim"]
    inp = doc["input"]
    several = len(doc["terms"]) > 1
    out: list[str] = [f"replicheck {doc['tool']['version']}: {inp['source']}", ""]
    out.append(f"VERDICT: {STATUS_WORDS.get(v['status'], v['status'])}")
    changed = v["conclusion_changed"]
    yes_no = "unknown" if changed is None else ("YES" if changed else "no")
    out.append(f"  conclusion changed at alpha {c['alpha']}: {yes_no}")
    if v["method"]:
        out.append(f"  corrected verdict rests on: {v['method']}")
    if several:
        out += ["", *terms_table(doc)]
    out += ["", _wrap(v["summary"]), "", "CLAIM"]
    out.append(
        f"  response: {c['response']}   treatment: {', '.join(c['treatments'])}"
        + (f"   stated unit: {c['unit']}" if c["unit"] else "")
    )
    if c["reported"]:
        where = f" (read as the result for '{c['reported_term']}')" if several else ""
        out.append(f"  reported: {c['reported']['text']}{where}")
    rc = doc["reported_check"]
    if rc["explanation"]:
        out.append(_wrap(f"reading: {rc['explanation']}"))
    out += ["", "WHAT WAS READ"]
    out += [_wrap(f"{label}: {text}") for label, text in reading_lines(inp)]
    out += ["", "EXPERIMENTAL UNIT"]
    for u in doc["experimental_units"]:
        unit = u["unit"] or "(each row)"
        out.append(
            f"  {u['treatment']}: {unit} - {u['relation']}, {u['n_units']} units, "
            f"{u['n_observations']} observations ({u['source']})"
        )
    out += design_tree(doc)
    cands = shown_candidates(doc)
    if cands:
        out.append("  candidates (coarsest credible first):")
        for k in cands:
            flag = "" if k["credible"] else " [not taken]"
            of = f" for {k['treatment']}" if several else ""
            out.append(f"    {k['grouping']}{of} (score {k['score']:g}){flag}")
            for r in k["reasons"]:
                out.append(_wrap(r, "        ", "      - "))
    alts = alternative_items(doc)
    if alts:
        out.append("  other readings of the unit (each refitted):")
        for term, head, why, settle in alts:
            out.append(_wrap(f"{term}: {head}", "        ", "    "))
            out.append(_wrap(f"why: {why}", "        ", "      - "))
            out.append(_wrap(f"settled by: {settle}", "        ", "      - "))
    roles = roles_rows(doc)
    if roles:
        out += ["", "ROLES OF THE COLUMNS"]
        for col, role, source, why in roles:
            out.append(_wrap(f"{col}: {role} ({source}) - {why}", "      ", "  "))
    for t in doc["terms"]:
        cl = t["clustering"]
        if cl.get("icc") is not None:
            title = (
                f"CLUSTERING WITHIN UNITS ({cl['unit']})" if several else "CLUSTERING WITHIN UNITS"
            )
            out += ["", *_clustering_lines(cl, title)]
    out += ["", "ANALYSES (* = corrected verdict)"]
    out += _table(analyses_rows(doc), analyses_header(doc))
    for a in doc["analyses"]:
        for note in a["notes"]:
            out.append(_wrap(f"{a['name']} ({a['term']}): {note}", "        ", "  note: "))
    found = hidden_lines(doc)
    if found:
        out += ["", "GROUPINGS FOUND IN THE DATA (no column names them)", *found]
    needs = needs_sentence(doc)
    if needs:
        out += ["", "WHAT A VALID DESIGN WOULD NEED", _wrap(needs)]
    if doc["findings"]:
        out += ["", "FINDINGS"]
        for f in doc["findings"]:
            out.append(f"  [{f['severity']}] {f['rule']}")
            out.append(_wrap(f["message"], "    "))
            out.append(_wrap("what to do: " + f["advice"], "    "))
    out += ["", "CAUTION", _wrap(doc["caution"])]
    return "\n".join(out) + "\n"
