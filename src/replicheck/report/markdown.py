"""Markdown rendering of a report dictionary, for pasting into a review letter."""

from __future__ import annotations

import re
from typing import Any

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


def _esc(text: object) -> str:
    """Escape table pipes and anything that could open an HTML tag; keep 'p < 0.05' readable."""
    return re.sub(r"<(?=[A-Za-z/!?])", "&lt;", str(text).replace("|", "\\|"))


def _yes_no(flag: bool | None) -> str:
    return "unknown" if flag is None else ("yes" if flag else "no")


def render_markdown(doc: dict[str, Any]) -> str:
    """Render the report dictionary as Markdown."""
    v, c, inp = doc["verdict"], doc["claim"], doc["input"]
    changed = v["conclusion_changed"]
    lines = [
        f"## replicheck audit: `{_esc(inp['source'])}`",
        "",
        f"**Verdict: {STATUS_WORDS.get(v['status'], v['status'])}.** Conclusion changed at "
        f"alpha = {c['alpha']}: **{_yes_no(changed)}**.",
        "",
        _esc(v["summary"]),
        "",
        "### Key figures",
        "",
        "| | value |",
        "|---|---|",
        f"| response | `{_esc(c['response'])}` |",
        f"| treatment | {', '.join('`' + _esc(t) + '`' for t in c['treatments'])} |",
    ]
    for u in doc["experimental_units"]:
        lines.append(
            f"| experimental unit of `{_esc(u['treatment'])}` | "
            f"{'`' + _esc(u['unit']) + '`' if u['unit'] else 'each row'} ({u['relation']}, "
            f"{u['n_units']} units, {u['n_observations']} observations) |"
        )
    cl = doc["clustering"]
    if cl.get("icc") is not None:
        lo, hi = cl["icc_ci"]
        lines += [
            f"| ICC | {cl['icc']:.3f} (ANOVA {cl['icc_anova']:.3f}, 95% CI {lo:.3f} to {hi:.3f}) |",
            f"| design effect | {cl['design_effect']:.2f} |",
            f"| effective n | {cl['effective_n']:.1f} of {cl['n_observations']} |",
        ]
    if c["reported"]:
        lines.append(f"| reported | {_esc(c['reported']['text'])} |")
    rc = doc["reported_check"]
    if rc["explanation"]:
        lines.append(f"| reported df | {_esc(rc['explanation'])} |")
    lines += ["", "### What was read", ""]
    lines += [f"- {label}: {_esc(text)}" for label, text in reading_lines(inp)]
    lines += effects_lines(doc)
    if len(doc["terms"]) > 1:
        lines += [
            "",
            "### Terms: claimed and corrected",
            "",
            "| " + " | ".join(TERMS_HEADER) + " |",
            "|" + "---|" * len(TERMS_HEADER),
        ]
        for r in terms_rows(doc):
            lines.append("| " + " | ".join(_esc(x) for x in r) + " |")
    alts = alternative_items(doc)
    if alts:
        lines += ["", "### Other readings of the unit (each refitted)", ""]
        for term, head, why, settle in alts:
            lines.append(
                f"- `{_esc(term)}`: {_esc(head)}. {_esc(why)}. *Settled by:* {_esc(settle)}."
            )
    roles = roles_rows(doc)
    if roles:
        lines += ["", "### Roles of the columns", "", "| column | role | source | why |"]
        lines.append("|---|---|---|---|")
        for col, role, source, why in roles:
            lines.append(f"| `{_esc(col)}` | {role} | {_esc(source)} | {_esc(why)} |")
    lines += [
        "",
        "### Analyses",
        "",
        "| " + " | ".join(analyses_header(doc)) + " |",
        "|" + "---|" * len(analyses_header(doc)),
    ]
    for r in analyses_rows(doc):
        lines.append("| " + " | ".join(_esc(x) for x in r) + " |")
    lines.append("")
    lines.append("`*` marks the analysis the corrected verdict rests on.")
    if doc["findings"]:
        lines += ["", "### Findings", ""]
        for f in doc["findings"]:
            lines.append(
                f"- **{f['severity']}** `{f['rule']}`: {_esc(f['message'])} "
                f"*What to do:* {_esc(f['advice'])}"
            )
    derived = (doc.get("hidden") or {}).get("derived", [])
    if derived:
        lines += ["", "### Groupings found in the data (no column names them)", ""]
        for g in derived:
            use = f"unit of {', '.join(g['unit_of'])}" if g["unit_of"] else "candidate"
            lines.append(f"- `{_esc(g['name'])}` ({g['n_groups']} groups; {use}): {_esc(g['how'])}")
    needs = needs_sentence(doc)
    if needs:
        lines += ["", "### What a valid design would need", "", _esc(needs)]
    lines += ["", "### Suggested wording", "", "> " + _esc(suggested_wording(doc))]
    lines += ["", "### Caution", "", _esc(doc["caution"]), ""]
    return "\n".join(lines)


def _interval(iv: dict[str, Any] | None) -> str:
    if iv is None:
        return "no interval"
    if iv["low"] is None:
        return f"{fmt_num(iv['estimate'], 4)} (no error df)"
    return (
        f"{fmt_num(iv['estimate'], 4)} ({fmt_num(iv['low'], 4)} to {fmt_num(iv['high'], 4)}; "
        f"df {fmt_df([iv['df']])})"
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
        f"### Effects of `{_esc(d['term'])}` ({conf} confidence intervals)",
        "",
        "| comparison | every row a replicate (as claimed) | unit as replicate (corrected) |",
        "|---|---|---|",
    ]
    for r in e["rows"]:
        out.append(
            f"| {_esc(r['level'])} − {_esc(r['reference'])} | {_interval(r['claimed'])} | "
            f"{_interval(r['corrected'])} |"
        )
    out += ["", f"Corrected intervals: {_esc(e['corrected_method'])}."]
    return out


def suggested_wording(doc: dict[str, Any]) -> str:
    """A sentence a reviewer can adapt for a report to authors or editors."""
    v = doc["verdict"]
    units = doc["experimental_units"][-1]
    trt = ", ".join(doc["claim"]["treatments"])
    if v["status"] == "confounded":
        return (
            f"Each level of {trt} appears to have been applied to a single {units['unit']}; "
            f"if so, the treatment effect cannot be separated from differences between "
            f"{units['unit']} levels, and the statistical test reported does not support the "
            f"conclusion. Could the authors clarify how treatments were allocated?"
        )
    if v["status"] == "pseudoreplicated":
        corrected = next((a for a in doc["analyses"] if a["corrected"]), None)
        extra = ""
        if corrected and corrected["p_value"] is not None:
            extra = (
                f" Reanalysed with {units['unit']} as the replicate, the data give "
                f"F({fmt_df(corrected['df'])}) = {fmt_num(corrected['statistic'])}, "
                f"p = {fmt_p(corrected['p_value'])}."
            )
        random = doc["claim"].get("random_effects") or []
        how = (
            f"while the claimed mixed model's random effects ({', '.join(random)}) do not "
            f"include {units['unit']}, so its test treats finer levels as independent "
            f"replicates."
            if random
            else f"while the analysis treats the {units['n_observations']} individual "
            f"observations as independent replicates."
        )
        return (
            f"The treatment ({trt}) appears to have been applied to {units['unit']} units "
            f"({units['n_units']} in all), {how}"
            f"{extra} Please analyse the data with {units['unit']} as the experimental unit "
            f"(or a mixed model with a random effect for it) and report n accordingly."
        )
    if v["status"] == "unclear":
        return (
            "From the data file alone it is not clear what the experimental unit was. Could "
            "the authors state how treatments were allocated and which unit the analysis "
            "treats as the replicate?"
        )
    return (
        "The data file gives no sign that observations were counted as replicates of a larger unit."
    )
