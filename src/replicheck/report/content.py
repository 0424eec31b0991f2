"""What every report says, whatever its format: sections, their sentences and rows.

The renderers (text, Markdown, HTML) lay this content out; none of them writes a
sentence of its own about the audit, so the three formats say the same thing. Each
section has one title used by every format (:data:`SECTIONS`); :func:`sections`
gives the ones a report carries. Numbers follow the rule of :mod:`replicheck.numbers`.
"""

from __future__ import annotations

from typing import Any

from replicheck.glossary import Entry, unit_noun, used_in
from replicheck.numbers import format_df, format_number, format_p, p_phrase
from replicheck.verdict import SIGNAL_P
from replicheck.words import counted, joined

SECTIONS: tuple[tuple[str, str], ...] = (
    ("verdict", "Verdict"),
    ("terms", "Terms: claimed and corrected"),
    ("findings", "Findings and what to do"),
    ("claim", "Claim"),
    ("read", "What was read"),
    ("unit", "Experimental unit and evidence"),
    ("roles", "Roles of the columns"),
    ("clustering", "Clustering within units"),
    ("analyses", "Analyses"),
    ("hidden", "Groupings found in the data"),
    ("needs", "What a valid design would need"),
    ("wording", "Suggested wording"),
    ("glossary", "Terms used"),
    ("caution", "Caution"),
)
TITLES = dict(SECTIONS)

STATUS_WORDS = {
    "ok": "OK - no pseudo-replication found",
    "pseudoreplicated": "PSEUDO-REPLICATED - rows were counted as replicates of a larger unit",
    "confounded": "CONFOUNDED - treatment cannot be separated from the unit",
    "unclear": "UNCLEAR - the data alone cannot settle the unit",
}
STATUS_NAMES = {
    "ok": "ok",
    "pseudoreplicated": "pseudo-replicated",
    "confounded": "confounded",
    "unclear": "unclear",
}
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
STRATUM_WORDS = {"unit": "unit", "block": "block", "subunit": "sub-unit", "rows": "rows"}

fmt_p = format_p
fmt_num = format_number


def fmt_df(df: list[float] | None) -> str:
    """Degrees of freedom as 'num, den'."""
    if not df:
        return "-"
    return ", ".join(format_df(d) for d in df)


def yes_no(flag: bool | None) -> str:
    return "unknown" if flag is None else ("yes" if flag else "no")


def test_text(test: str | None, statistic: float | None, df: list[float] | None) -> str:
    """``F(2, 6) = 3.11`` or ``chi-squared(1) = 4.20``; ``no test`` without one."""
    if statistic is None or not df:
        return "no test"
    name = "chi-squared" if test == "chi2" else "F"
    return f"{name}({fmt_df(df)}) = {fmt_num(statistic)}"


# ---------------------------------------------------------------------------
# which sections a report carries


def sections(doc: dict[str, Any]) -> list[str]:
    """The ids of the sections this report carries, in order."""
    present = {
        "verdict": True,
        "terms": len(doc["terms"]) > 1,
        "claim": True,
        "read": True,
        "unit": True,
        "roles": bool(roles_rows(doc)),
        "clustering": bool(clustering_blocks(doc)),
        "analyses": bool(doc["analyses"]),
        "findings": bool(doc["findings"]),
        "hidden": bool(hidden_items(doc)),
        "needs": needs_sentence(doc) is not None,
        "wording": True,
        "glossary": True,
        "caution": True,
    }
    return [key for key, _ in SECTIONS if present[key]]


def headline(doc: dict[str, Any]) -> dict[str, Any]:
    """The term the verdict speaks of (the verdict's ``term``: decisions.headline_term)."""
    return next(t for t in doc["terms"] if t["term"] == doc["verdict"]["term"])


# ---------------------------------------------------------------------------
# verdict


def verdict_lines(doc: dict[str, Any]) -> list[str]:
    """The short lines under the verdict: the change of conclusion and the analysis used."""
    v, c = doc["verdict"], doc["claim"]
    out = [f"Conclusion changed at alpha = {c['alpha']:g}: {yes_no(v['conclusion_changed'])}."]
    if v.get("method_title"):
        out.append(f"Analysis behind the verdict: {v['method_title']}.")
    return out


# ---------------------------------------------------------------------------
# terms


TERMS_HEADER = ["term", "status", "claimed p", "corrected test", "p", "error stratum", "changed"]


def terms_rows(doc: dict[str, Any]) -> list[list[str]]:
    """One row per term: claimed p beside the corrected test and its error stratum."""
    rows = []
    for t in doc["terms"]:
        changed = t["conclusion_changed"]
        rows.append(
            [
                t["term"],
                STATUS_NAMES.get(t["status"], t["status"]),
                fmt_p(t["claimed_p_value"]),
                test_text(t.get("test"), t["statistic"], t["df"]),
                fmt_p(t["p_value"]),
                t["error_term"] or "-",
                "-" if changed is None else ("YES" if changed else "no"),
            ]
        )
    return rows


# ---------------------------------------------------------------------------
# claim


def claim_rows(doc: dict[str, Any]) -> list[tuple[str, str]]:
    """``(label, text)`` rows of the claim."""
    c = doc["claim"]
    several = len(doc["terms"]) > 1
    rows = [("response", c["response"]), ("treatment", ", ".join(c["treatments"]))]
    if c["unit"]:
        rows.append(("stated unit", c["unit"]))
    if c.get("random_effects"):
        rows.append(("random effects of the claimed model", ", ".join(c["random_effects"])))
    if c["reported"]:
        where = f" (read as the result for '{c['reported_term']}')" if several else ""
        rows.append(("reported", f"{c['reported']['text']}{where}"))
    rc = doc["reported_check"]
    if rc and rc["explanation"]:
        rows.append(("reading of the reported df", rc["explanation"]))
    stated = settings_text(c.get("settings", []))
    if stated:
        rows.append(("settings", stated))
    return rows


def settings_text(settings: list[dict[str, Any]]) -> str:
    """The settings that differ from their defaults, each with where it came from."""
    from replicheck.options import option_field

    parts = []
    for s in settings:
        if s["value"] == option_field(s["name"]).default:
            continue
        value = s["value"]
        shown = "off" if value is False else "on" if value is True else str(value)
        parts.append(f"{s['name']} {shown} ({s['source']})")
    return "; ".join(parts)


# ---------------------------------------------------------------------------
# experimental unit and evidence


def unit_lines(doc: dict[str, Any]) -> list[str]:
    """One line per term: its unit, how it relates to the term, and where it came from."""
    out = []
    for u in doc["experimental_units"]:
        if not u["unit"]:
            out.append(
                f"'{u['treatment']}': each row is its own unit "
                f"({counted(u['n_observations'], 'row')})"
            )
            continue
        unit = f"'{u['unit']}'"
        source = {"stated": "as stated", "inferred": "found in the data"}.get(
            u["source"], u["source"]
        )
        out.append(
            f"'{u['treatment']}': {unit} ({u['relation']}; {counted(u['n_units'], 'unit')}, "
            f"{counted(u['n_observations'], 'observation')}; {source})"
        )
    return out


def design_tree(doc: dict[str, Any]) -> list[tuple[int, str]]:
    """The strata as ``(depth, line)`` pairs, each grouping under the one it is nested in."""
    strata = doc.get("design", {}).get("strata", [])
    if len(strata) <= 1 and not any(s["terms"] for s in strata if s["kind"] != "rows"):
        return []
    children: dict[str | None, list[dict[str, Any]]] = {}
    for s in strata:
        children.setdefault(s["parent"], []).append(s)
    out: list[tuple[int, str]] = []

    def walk(parent: str | None, depth: int) -> None:
        for s in children.get(parent, []):
            tests = f"; tests {', '.join(s['terms'])}" if s["terms"] else ""
            kind = STRATUM_WORDS.get(s["kind"], s["kind"])
            out.append((depth, f"{s['name']} ({kind}, {counted(s['n_levels'], 'level')}{tests})"))
            walk(s["name"], depth + 1)

    walk(None, 0)
    return out


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


def candidate_items(doc: dict[str, Any]) -> list[tuple[str, list[str]]]:
    """Each candidate unit shown: a heading and its reasons."""
    several = len(doc["terms"]) > 1
    out = []
    for k in shown_candidates(doc):
        of = f" for '{k['treatment']}'" if several else ""
        flag = "" if k["credible"] else "; not taken"
        out.append((f"'{k['grouping']}'{of} (score {k['score']:g}{flag})", list(k["reasons"])))
    return out


def alternative_items(doc: dict[str, Any]) -> list[tuple[str, str, str, str]]:
    """Each other reading of a term's unit: (term, unit and its test, why, what settles it)."""
    out = []
    for t in doc["terms"]:
        for a in t.get("alternatives", []):
            unit = f"'{a['unit']}'" if a["unit"] else "each row"
            kind = "the unit found in the data" if a["kind"] == "stated" else "another reading"
            method = a.get("method_title") or a["method"] or "no analysis"
            if a["p_value"] is not None and a["test"]:
                test = (
                    f"{method}: {test_text(a['test'], a['statistic'], a['df'])}, "
                    f"{p_phrase(a['p_value'])}"
                )
            else:
                test = f"{method}: no test"
            head = f"{unit} ({kind}; {a['relation']}, {counted(a['n_units'], 'unit')}; {test})"
            out.append((t["term"], head, a["why"], a["settle"]))
    return out


ROLES_SHOWN = 3  # columns named in a row of columns with the same role and reason


def roles_rows(doc: dict[str, Any]) -> list[list[str]]:
    """Column, role, where the role came from, and why: every column but the claimed ones.

    Columns with the same role, source and reason share one row (a wide table of
    measurements reads as one line, not thousands), naming the first few.
    """
    groups: dict[tuple[str, str, str], list[str]] = {}
    for r in doc.get("roles", []):
        if r["role"] in ("response", "treatment"):
            continue
        key = (ROLE_WORDS.get(r["role"], r["role"]), r["source"], r["evidence"])
        groups.setdefault(key, []).append(r["column"])
    rows = []
    for (role, source, why), cols in groups.items():
        if len(cols) <= ROLES_SHOWN + 1:
            rows += [[c, role, source, why] for c in cols]
        else:
            more = f"{len(cols) - ROLES_SHOWN:,} more"
            rows.append([joined([*cols[:ROLES_SHOWN], more]), role, source, why])
    return rows


# ---------------------------------------------------------------------------
# clustering: one ICC, explained


ICC_AGREE = 0.05  # estimates closer than this are the same for a reader (a chosen margin)


def icc_sentences(cl: dict[str, Any], others: list[str]) -> list[str]:
    """The ICC the verdict uses, and the second estimate only when it differs, with why.

    ``others`` names the model terms besides the unit (other treatments, blocks) that
    REML allows for and the one-way ANOVA estimate does not.
    """
    lo, hi = cl["icc_ci"]
    ci = f"95% CI {fmt_num(lo)} to {fmt_num(hi)}"
    if cl["icc_method"] != "REML":
        return [f"ICC {fmt_num(cl['icc'])} (one-way ANOVA estimate, {ci})."]
    if abs(cl["icc"] - cl["icc_anova"]) <= ICC_AGREE:
        return [
            f"ICC {fmt_num(cl['icc'])} (REML, from the corrected mixed model; {ci}, from the "
            f"one-way ANOVA estimate, which agrees)."
        ]
    why = (
        f"it compares units within treatment levels only and ignores {joined(others)}, "
        f"which the mixed model allows for"
        if others
        else "the units differ in size, and the two estimators weigh them differently"
        if cl.get("cv_unit_size")
        else "the mixed model allows for terms the one-way estimate leaves out"
    )
    return [
        f"ICC {fmt_num(cl['icc'])} (REML, from the corrected mixed model), the estimate the "
        f"verdict uses.",
        f"The one-way ANOVA estimate is {fmt_num(cl['icc_anova'])} ({ci}); it differs "
        f"because {why}.",
    ]


def clustering_sentences(cl: dict[str, Any], others: list[str]) -> list[str]:
    """The clustering of one unit in sentences: ICC, variances, design effect, effective n."""
    vc = cl["variance_components"]
    unit = unit_noun(cl["unit"])
    out = icc_sentences(cl, others)
    if vc["unit"] is not None and vc["residual"] is not None:
        out.append(
            f"Variance between {unit} units {fmt_num(vc['unit'])}, within units "
            f"{fmt_num(vc['residual'])}."
        )
    size = f"mean unit size {fmt_num(cl['mean_unit_size'])}"
    if cl["cv_unit_size"] and cl["cv_unit_size"] > 0.005:
        size += f", coefficient of variation {fmt_num(cl['cv_unit_size'])}"
    n_eff, n = cl["effective_n"], cl["n_observations"]
    if round(n_eff) >= n:
        out.append(
            f"Design effect {fmt_num(cl['design_effect'])} ({size}): the {n:,} observations "
            f"are effectively independent of each other."
        )
    else:
        out.append(
            f"Design effect {fmt_num(cl['design_effect'])} ({size}): the {n:,} observations "
            f"carry the information of about {fmt_num(n_eff)} independent ones."
        )
    od = cl.get("overdispersion")
    if od:
        out.append(
            f"Spread between units against {od['family']} chance: dispersion "
            f"{fmt_num(od['dispersion'])}, chi-squared({od['df']}) = {fmt_num(od['chi2'])}, "
            f"{p_phrase(od['p_value'])}."
        )
    return out


def clustering_blocks(doc: dict[str, Any]) -> list[tuple[str, list[str]]]:
    """``(unit, sentences)`` for each term's unit with a measured clustering (each unit once)."""
    out: list[tuple[str, list[str]]] = []
    seen: set[str] = set()
    design = doc.get("design", {})
    within = [r["column"] for r in doc.get("roles", []) if r["role"] == "within"]
    blocks = [b["name"] for b in design.get("blocks", []) if b["name"] not in within]
    finer: dict[str, list[str]] = {}
    for st in design.get("strata", []):
        if st["kind"] == "subunit" and st["parent"]:
            finer.setdefault(st["parent"], []).append(st["name"])
    for t in doc["terms"]:
        cl = t["clustering"]
        if cl.get("icc") is None or cl["unit"] in seen:
            continue
        seen.add(cl["unit"])
        others = [f"'{o['term']}'" for o in doc["terms"] if o["term"] != t["term"]]
        others += [f"the block '{b}'" for b in blocks]
        others += [f"the finer grouping '{name}'" for name in finer.get(cl["unit"], [])]
        others += [f"the within-unit factor '{w}'" for w in within]
        out.append((cl["unit"], clustering_sentences(cl, others)))
    return out


# ---------------------------------------------------------------------------
# analyses


def analyses_header(doc: dict[str, Any]) -> list[str]:
    """Column names of the analyses table (a term column when there are several terms)."""
    head = ["analysis", "replicates", "statistic", "df", "p", "below alpha"]
    return ["term", *head] if len(doc["terms"]) > 1 else head


def analyses_rows(doc: dict[str, Any]) -> list[list[str]]:
    """Rows of the analyses table: the reader's name of each analysis, * on the one used."""
    several = len(doc["terms"]) > 1
    rows = []
    for a in doc["analyses"]:
        mark = " *" if a["corrected"] else ""
        chi = a.get("test") == "chi2" and a["statistic"] is not None
        row = [
            (a.get("title") or a["name"]) + mark,
            f"{a['n_replicates']:,} {a['level']}",
            ("chi-squared " if chi else "") + fmt_num(a["statistic"]),
            fmt_df(a["df"]),
            fmt_p(a["p_value"]),
            yes_no(a["significant"]) if a["significant"] is not None else "-",
        ]
        rows.append([a["term"], *row] if several else row)
    return rows


ANALYSES_KEY = "* marks the analysis the verdict rests on."


def analysis_notes(doc: dict[str, Any]) -> list[str]:
    """The notes of the analyses, each under the analysis's reader's name."""
    several = len(doc["terms"]) > 1
    out = []
    for a in doc["analyses"]:
        of = f" ('{a['term']}')" if several else ""
        for note in a["notes"]:
            out.append(f"{a.get('title') or a['name']}{of}: {note}")
    return out


# ---------------------------------------------------------------------------
# groupings found in the data


def hidden_items(doc: dict[str, Any]) -> list[str]:
    """Derived groupings with how they were found, and the signals worth reading."""
    h = doc.get("hidden") or {}
    out: list[str] = []
    for g in h.get("derived", []):
        use = (
            f"the unit of {', '.join(repr(t) for t in g['unit_of'])}"
            if g["unit_of"]
            else "a candidate unit"
        )
        out.append(f"'{g['name']}' ({counted(g['n_groups'], 'group')}; {use}): {g['how']}")
    for sig in h.get("signals", []):
        p = sig["p_value"]
        if p is not None and p > SIGNAL_P:  # the findings' threshold
            continue
        out.append(sig["message"])
    return out


# ---------------------------------------------------------------------------
# design needs


def needs_sentence(doc: dict[str, Any]) -> str | None:
    """A sentence on the units a design would need (from the report's design_needs)."""
    n = doc.get("design_needs")
    if not n:
        return None
    unit, term = unit_noun(n["unit"]), n["term"]
    m = n["observations_per_unit"]
    stated = n["effect"].get("kind") == "stated"
    what = (
        f"a difference of {fmt_num(n['effect']['difference'])} between two levels of '{term}'"
        if stated
        else f"differences between levels of '{term}' as large as those observed"
    )
    if n["units_per_level"] is None:
        size = (
            f"A difference of {fmt_num(n['effect']['difference'])} between levels of '{term}' is"
            if stated
            else f"The observed differences between levels of '{term}' are"
        )
        return (
            f"{size} too small beside the variation between {unit} units for any practical "
            f"number of units to detect them with {n['power']:.0%} power."
        )
    sizes = {row["observations_per_unit"]: row["units_per_level"] for row in n["by_unit_size"]}
    many = sizes.get(100)
    tail = (
        f"; with 100 observations per {unit} it would still need {many}, so more "
        f"observations per unit barely help (ICC {fmt_num(n['icc'])})"
        if many is not None
        else ""
    )
    each = f"{m:g}" if float(m).is_integer() else fmt_num(m)
    return (
        f"To detect {what}, with {n['power']:.0%} power at alpha = {n['alpha']:g}, a design "
        f"would need about {n['units_per_level']} independent {unit} units per level with "
        f"{each} observations each (it has {n['units_now']}){tail}."
    )


# ---------------------------------------------------------------------------
# suggested wording


def suggested_wording(doc: dict[str, Any]) -> str:
    """A paragraph a reviewer can adapt for a report to authors or editors.

    It speaks of the headline term (:func:`headline`), the one the verdict speaks of.
    """
    v = doc["verdict"]
    t = headline(doc)
    term = f"'{t['term']}'"
    unit_entry = next(
        (u for u in doc["experimental_units"] if u["treatment"] == t["term"]),
        doc["experimental_units"][0],
    )
    unit = unit_noun(unit_entry["unit"])
    if v["status"] == "confounded":
        return (
            f"Each level of {term} appears to have been applied to a single {unit}; if so, the "
            f"treatment effect cannot be separated from differences between {unit} units, and "
            f"the statistical test reported does not support the conclusion. Could the authors "
            f"clarify how treatments were allocated?"
        )
    if v["status"] == "pseudoreplicated":
        extra = ""
        if t["p_value"] is not None:
            extra = (
                f" Reanalysed with {unit} as the replicate, the data give "
                f"{test_text(t.get('test'), t['statistic'], t['df'])}, {p_phrase(t['p_value'])}."
            )
        random = doc["claim"].get("random_effects") or []
        how = (
            f"while the claimed mixed model's random effects ({', '.join(random)}) do not "
            f"include {unit}, so its test treats finer levels as independent replicates."
            if random
            else f"while the analysis treats the {unit_entry['n_observations']:,} individual "
            f"observations as independent replicates."
        )
        return (
            f"The treatment {term} appears to have been applied to {unit} units "
            f"({unit_entry['n_units']:,} in all), {how}{extra} Please analyse the data with "
            f"{unit} as the experimental unit (or a mixed model with a random effect for it) "
            f"and report n accordingly."
        )
    if v["status"] == "unclear":
        return (
            "From the data file alone it is not clear what the experimental unit was. Could "
            "the authors state how treatments were allocated and which unit the analysis "
            "treats as the replicate?"
        )
    return (
        "The data file gives no sign that observations were counted as replicates of a larger "
        "unit: the analysis's replicates match the experimental units found in the data."
    )


# ---------------------------------------------------------------------------
# glossary


def glossary_entries(text: str) -> list[Entry]:
    """The glossary entries for the terms that appear in a report's text."""
    return used_in(text)
