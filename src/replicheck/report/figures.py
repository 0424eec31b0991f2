"""Figures of the HTML report, drawn with matplotlib from the report dictionary.

Each function takes parts of the report dictionary and returns an SVG
document as text. Nothing here computes a statistic: the points, unit means
and intervals come from the report (:mod:`replicheck.display`). Figures use
matplotlib's object interface (no global pyplot state), the SVG backend, text
kept as text (``svg.fonttype = none``, generic sans-serif, so no font is
embedded or fetched) and a fixed hash salt and no date, so the same
report gives the same bytes.
"""

from __future__ import annotations

import io
import math
import unicodedata
import warnings
from typing import Any

import matplotlib
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

POINT = "#7f8fa6"  # observations
UNIT_MEAN = "#14213d"  # unit means
LEVEL_MEAN = "#9a3412"  # mean of the unit means
CLAIMED = "#b45309"  # every row a replicate (circles)
CORRECTED = "#1d4e89"  # the unit as replicate (squares)
UNIT_SHARE = "#1d4e89"
RESIDUAL_SHARE = "#cbd5e1"

_RC: Any = {  # matplotlib rc settings for every figure
    "svg.fonttype": "none",
    "svg.hashsalt": "replicheck",
    "font.family": "sans-serif",
    "font.size": 9,
    "axes.spines.top": False,
    "axes.spines.right": False,
}


def safe_label(text: object, limit: int = 28) -> str:
    """A label matplotlib draws literally: '$' escaped (no mathtext), long text cut."""
    s = "".join(
        " " if unicodedata.category(c) in ("Cc", "Cf", "Zl", "Zp") else c for c in str(text)
    )
    if len(s) > limit:
        s = s[: limit - 1] + "…"
    return s.replace("\\", "\\\\").replace("$", r"\$")


def _svg(fig: Figure) -> str:
    buf = io.StringIO()
    with warnings.catch_warnings():
        # the SVG keeps text as text (svg.fonttype none): the browser draws any glyph,
        # so matplotlib's note that its own font lacks one is not a finding
        warnings.filterwarnings("ignore", message=r"Glyph \d+ .*missing from", category=UserWarning)
        fig.savefig(buf, format="svg", bbox_inches="tight", metadata={"Date": None})
    return buf.getvalue()


def units_figure(view: dict[str, Any], response: str) -> str:
    """Observations grouped by unit within each level; unit means as bars.

    Each level is a block of columns, one per unit, sorted by unit mean; the
    dashed line is the mean of the unit means. With many units only the unit
    means are drawn.
    """
    levels = view["levels"]
    n_cols = sum(max(len(lv["units"]), 1) for lv in levels)
    gap = max(1.0, 0.08 * n_cols)
    width = min(11.0, max(5.5, 0.22 * n_cols + 1.2 * len(levels) + 2))
    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(width, 3.8))
        ax = fig.subplots()
        x0 = 0.0
        centres = []
        few_units = n_cols <= 60
        for lv in levels:
            units = lv["units"]
            xs = [x0 + i for i in range(len(units))]
            px: list[float] = []
            py: list[float] = []
            for x, u in zip(xs, units, strict=True):
                vals = u["values"]
                px += [x + ((i * 7) % 11 - 5) * 0.045 for i in range(len(vals))]
                py += vals
            if px:
                ax.scatter(px, py, s=9, color=POINT, alpha=0.65, linewidths=0, zorder=2)
            if units:
                ax.hlines(
                    [u["mean"] for u in units],
                    [x - 0.34 for x in xs],
                    [x + 0.34 for x in xs],
                    color=UNIT_MEAN,
                    linewidth=2.2,
                    zorder=3,
                )
            if units and lv["mean_of_unit_means"] is not None:
                ax.plot(
                    [xs[0] - 0.5, xs[-1] + 0.5],
                    [lv["mean_of_unit_means"]] * 2,
                    color=LEVEL_MEAN,
                    linestyle=(0, (4, 2)),
                    linewidth=1.2,
                    zorder=1,
                )
            centres.append((xs[0] + xs[-1]) / 2 if xs else x0)
            if few_units and view["unit"] is not None:
                for x, u in zip(xs, units, strict=True):
                    ax.annotate(
                        safe_label(u["label"], 10),
                        (x, 0),
                        xycoords=("data", "axes fraction"),
                        xytext=(0, -3),
                        textcoords="offset points",
                        ha="center",
                        va="top",
                        rotation=90,
                        fontsize=6.5,
                        color="#475569",
                    )
            x0 += max(len(units), 1) + gap
        ax.set_xticks(centres)
        ax.set_xticklabels([safe_label(lv["label"]) for lv in levels], fontweight="bold")
        ax.tick_params(axis="x", length=0, pad=34 if few_units and view["unit"] else 4)
        ax.set_xlim(-0.8, x0 - gap + 0.3)
        ax.set_ylabel(safe_label(response, 40))
        unit = view["unit"]
        title = (
            f"{view['n_observations']} observations in {view['n_units']} "
            f"{safe_label(unit, 24)} units"
            if unit
            else f"{view['n_observations']} observations, each its own unit"
        )
        ax.set_title(title, loc="left", fontsize=10)
        ax.grid(axis="y", color="#e2e8f0", linewidth=0.6, zorder=0)
        handles = [
            Line2D([], [], marker="o", linestyle="", color=POINT, markersize=4),
            Line2D([], [], color=UNIT_MEAN, linewidth=2.2),
            Line2D([], [], color=LEVEL_MEAN, linestyle=(0, (4, 2))),
        ]
        ax.legend(
            handles,
            ["observation", "unit mean", "mean of unit means"],
            loc="upper left",
            bbox_to_anchor=(1.0, 1.0),
            frameon=False,
            fontsize=8,
        )
        return _svg(fig)


def effects_figure(effects: dict[str, Any], term: str) -> str:
    """Each level's difference from the reference, claimed and corrected intervals."""
    rows = effects["rows"]
    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(7.0, 0.75 + 0.62 * max(len(rows), 1)))
        ax = fig.subplots()
        labels = []
        for i, r in enumerate(rows):
            y = len(rows) - 1 - i
            labels.append((y, f"{safe_label(r['level'], 18)} − {safe_label(r['reference'], 18)}"))
            for iv, dy, colour, marker in (
                (r["claimed"], 0.14, CLAIMED, "o"),
                (r["corrected"], -0.14, CORRECTED, "s"),
            ):
                if iv is None:
                    continue
                if iv["low"] is not None and iv["high"] is not None:
                    ax.plot([iv["low"], iv["high"]], [y + dy] * 2, color=colour, linewidth=2)
                ax.plot([iv["estimate"]], [y + dy], marker=marker, color=colour, markersize=6)
        ax.axvline(0, color="#64748b", linewidth=0.8)
        ax.set_yticks([y for y, _ in labels])
        ax.set_yticklabels([t for _, t in labels])
        ax.set_ylim(-0.6, len(rows) - 0.4)
        ax.set_xlabel(f"difference in means ({math.floor(effects['confidence'] * 100)}% CI)")
        ax.set_title(f"Effects of {safe_label(term, 30)}", loc="left", fontsize=10)
        handles = [
            Line2D([], [], marker="o", color=CLAIMED, linewidth=2),
            Line2D([], [], marker="s", color=CORRECTED, linewidth=2),
        ]
        ax.legend(
            handles,
            ["every row a replicate (as claimed)", "unit as replicate (corrected)"],
            loc="upper left",
            bbox_to_anchor=(1.0, 1.0),
            frameon=False,
            fontsize=8,
        )
        return _svg(fig)


def variance_figure(unit_share: float, unit: str) -> str:
    """One bar split into the share of variance between units and within units."""
    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(7.0, 1.1))
        ax = fig.subplots()
        ax.barh([0], [unit_share], color=UNIT_SHARE, height=0.6, hatch="//", edgecolor="white")
        ax.barh([0], [1 - unit_share], left=[unit_share], color=RESIDUAL_SHARE, height=0.6)
        ax.spines["left"].set_visible(False)
        ax.set_xlim(0, 1)
        ax.set_ylim(-0.35, 1.0)
        ax.set_yticks([])
        ax.spines["left"].set_visible(False)
        ax.set_xticks([0, 0.25, 0.5, 0.75, 1.0])
        ax.set_xticklabels(["0%", "25%", "50%", "75%", "100%"])
        ax.text(
            0.0,
            0.4,
            f"between {safe_label(unit, 20)} units {unit_share:.0%}",
            va="bottom",
            fontsize=8.5,
        )
        ax.text(
            1.0,
            0.4,
            f"within units {1 - unit_share:.0%}",
            va="bottom",
            ha="right",
            fontsize=8.5,
        )
        return _svg(fig)
