"""Plain terminal text rendering of a report dictionary."""

from __future__ import annotations

import textwrap
from typing import Any

WIDTH = 88

STATUS_WORDS = {
    "ok": "OK - no pseudo-replication found",
    "pseudoreplicated": "PSEUDO-REPLICATED - rows were counted as replicates of a larger unit",
    "confounded": "CONFOUNDED - treatment cannot be separated from the unit",
    "unclear": "UNCLEAR - the data alone cannot settle the unit",
}


def fmt_p(p: float | None) -> str:
    """A p-value as printed in reports."""
    if p is None:
        return "-"
    if p < 1e-4:
        return "<0.0001"
    return f"{p:.4f}" if p < 0.01 else f"{p:.3f}"


def fmt_num(x: float | None, digits: int = 3) -> str:
    """A number with a few significant digits, '-' for None."""
    return "-" if x is None else f"{x:.{digits}g}"


def fmt_df(df: list[float] | None) -> str:
    """Degrees of freedom as 'num, den'."""
    if not df:
        return "-"
    return ", ".join(f"{d:.4g}" if abs(d - round(d)) > 1e-9 else f"{round(d)}" for d in df)


def _wrap(text: str, indent: str = "  ") -> str:
    return textwrap.fill(text, WIDTH, initial_indent=indent, subsequent_indent=indent)


def _table(rows: list[list[str]], header: list[str]) -> list[str]:
    widths = [max(len(str(r[i])) for r in [header, *rows]) for i in range(len(header))]
    line = "  " + "  ".join(h.ljust(w) for h, w in zip(header, widths, strict=True))
    out = [line.rstrip(), "  " + "  ".join("-" * w for w in widths)]
    for r in rows:
        out.append(
            ("  " + "  ".join(str(c).ljust(w) for c, w in zip(r, widths, strict=True))).rstrip()
        )
    return out


def analyses_rows(doc: dict[str, Any]) -> list[list[str]]:
    """Rows of the analyses table shared by the text and Markdown renderers."""
    rows = []
    for a in doc["analyses"]:
        mark = " *" if a["corrected"] else ""
        rows.append(
            [
                a["name"] + mark,
                f"{a['n_replicates']} {a['level']}",
                fmt_num(a["statistic"], 4),
                fmt_df(a["df"]),
                fmt_p(a["p_value"]),
                "-" if a["significant"] is None else ("yes" if a["significant"] else "no"),
            ]
        )
    return rows


def render_text(doc: dict[str, Any]) -> str:
    """Render the report dictionary as terminal text."""
    v = doc["verdict"]
    c = doc["claim"]
    inp = doc["input"]
    out: list[str] = []
    out.append(f"replicheck {doc['tool']['version']}: {inp['source']}")
    out.append("")
    out.append(f"VERDICT: {STATUS_WORDS.get(v['status'], v['status'])}")
    changed = v["conclusion_changed"]
    out.append(
        "  conclusion changed at alpha {}: {}".format(
            c["alpha"], "unknown" if changed is None else ("YES" if changed else "no")
        )
    )
    if v["method"]:
        out.append(f"  corrected verdict rests on: {v['method']}")
    out.append("")
    out.append(_wrap(v["summary"]))
    out.append("")
    out.append("CLAIM")
    out.append(
        f"  response: {c['response']}   treatment: {', '.join(c['treatments'])}"
        + (f"   stated unit: {c['unit']}" if c["unit"] else "")
    )
    if c["reported"]:
        out.append(f"  reported: {c['reported']['text']}")
    rc = doc["reported_check"]
    if rc["explanation"]:
        out.append(_wrap(f"reading: {rc['explanation']}"))
    out.append(f"  rows: {inp['n_rows']} read, {inp['n_rows_used']} analysed")
    out.append("")
    out.append("EXPERIMENTAL UNIT")
    for u in doc["experimental_units"]:
        unit = u["unit"] or "(each row)"
        out.append(
            f"  {u['treatment']}: {unit} - {u['relation']}, {u['n_units']} units, "
            f"{u['n_observations']} observations ({u['source']})"
        )
    cands = [k for k in doc["candidates"]][:5]
    if cands:
        out.append("  candidates (coarsest credible first):")
        for k in cands:
            flag = "" if k["credible"] else " [not taken]"
            out.append(f"    {k['grouping']} (score {k['score']:g}){flag}")
            for r in k["reasons"]:
                out.append(
                    textwrap.fill(r, WIDTH, initial_indent="      - ", subsequent_indent="        ")
                )
    cl = doc["clustering"]
    if cl.get("icc") is not None:
        out.append("")
        out.append("CLUSTERING WITHIN UNITS")
        lo, hi = cl["icc_ci"]
        out.append(
            f"  ICC {cl['icc']:.3f} ({cl['icc_method']}); ANOVA estimate "
            f"{cl['icc_anova']:.3f}, 95% CI {lo:.3f} to {hi:.3f}"
        )
        vc = cl["variance_components"]
        out.append(
            f"  variance: between units {fmt_num(vc['unit'], 4)}, "
            f"within units {fmt_num(vc['residual'], 4)}"
        )
        out.append(
            f"  design effect {cl['design_effect']:.2f} (mean unit size "
            f"{cl['mean_unit_size']:.1f}, CV {cl['cv_unit_size']:.2f}); effective n "
            f"{cl['effective_n']:.1f} of {cl['n_observations']}"
        )
    out.append("")
    out.append("ANALYSES (* = corrected verdict)")
    out += _table(analyses_rows(doc), ["analysis", "replicates", "F", "df", "p", "signif."])
    for a in doc["analyses"]:
        for note in a["notes"]:
            out.append(
                textwrap.fill(
                    f"{a['name']}: {note}",
                    WIDTH,
                    initial_indent="  note: ",
                    subsequent_indent="        ",
                )
            )
    if doc["findings"]:
        out.append("")
        out.append("FINDINGS")
        for f in doc["findings"]:
            out.append(f"  [{f['severity']}] {f['rule']}")
            out.append(_wrap(f["message"], "    "))
            out.append(_wrap("what to do: " + f["advice"], "    "))
    out.append("")
    out.append("CAUTION")
    out.append(_wrap(doc["caution"]))
    return "\n".join(out) + "\n"
