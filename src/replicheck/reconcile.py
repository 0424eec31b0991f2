"""Reconcile the reported result with the data.

From the reported degrees of freedom we infer which level the authors must
have analysed: the error df of a one-way analysis is (number of replicates -
number of groups), so rows, units and every other grouping give different
values. The reported statistic and p-value are compared with the analysis
reproduced from the data.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from replicheck.claim import ReportedResult
from replicheck.refit import Analysis

# Common practice for comparing a reported, rounded statistic with a
# recomputed one: allow 3% relative or the rounding of the last printed digit.
STAT_REL_TOL = 0.03
STAT_ABS_TOL = 0.051


@dataclass(frozen=True)
class Reconciliation:
    """What the reported numbers say about the analysis the authors ran."""

    level: str  # rows | units | other | unknown
    level_grouping: str | None  # the grouping whose count matches the reported df
    explanation: str | None
    mismatches: tuple[str, ...]
    claimed_significant: bool | None


def _error_df(reported: ReportedResult) -> float | None:
    if reported.df is None:
        return None
    if reported.test == "F" and len(reported.df) >= 2:
        return float(reported.df[1])
    if reported.test == "t":
        return float(reported.df[0])
    return None


def reconcile(
    reported: ReportedResult | None,
    alpha: float,
    n_groups: int,
    replicate_counts: Mapping[str, int],
    as_claimed: Analysis,
    unit_name: str | None = None,
) -> Reconciliation:
    """Compare a reported result with the data.

    ``replicate_counts`` maps a level name ("rows", the unit's name, other
    groupings) to its number of replicates among the analysed rows; the first
    entry must be "rows".
    """
    if reported is None:
        return Reconciliation("unknown", None, None, (), as_claimed.significant(alpha))
    mismatches: list[str] = []
    level, grouping, explanation = "unknown", None, None
    err = _error_df(reported)
    if err is not None:
        for name, count in replicate_counts.items():
            if abs(count - n_groups - err) < 0.5:
                what = "rows" if name == "rows" else f"levels of '{name}'"
                level = "rows" if name == "rows" else ("units" if name == unit_name else "other")
                grouping = None if name == "rows" else name
                meaning = (
                    "every row was treated as a replicate"
                    if name == "rows"
                    else f"each level of '{name}' was treated as a replicate"
                )
                explanation = f"error df {err:g} = {count} {what} - {n_groups} groups: {meaning}"
                break
        if explanation is None:
            nearest = min(replicate_counts.items(), key=lambda kv: abs(kv[1] - n_groups - err))
            explanation = (
                f"error df {err:g} matches no level of the data (rows give "
                f"{replicate_counts['rows'] - n_groups:g}; closest: '{nearest[0]}' with "
                f"{nearest[1] - n_groups:g}); rows may have been excluded or another model fitted"
            )
    if (
        reported.df is not None
        and reported.test == "F"
        and len(reported.df) >= 2
        and abs(reported.df[0] - (n_groups - 1)) > 0.5
    ):
            mismatches.append(
                f"numerator df {reported.df[0]:g} differs from {n_groups - 1} "
                f"(number of groups - 1)"
            )
    if (
        reported.statistic is not None
        and as_claimed.statistic is not None
        and level in {"rows", "unknown"}
    ):
        mine = as_claimed.statistic
        theirs = reported.statistic
        if reported.test == "t" and as_claimed.t_statistic is not None:
            mine, theirs = abs(as_claimed.t_statistic), abs(theirs)
        if abs(mine - theirs) > max(STAT_ABS_TOL, STAT_REL_TOL * abs(theirs)):
            mismatches.append(
                f"reported {reported.test} = {reported.statistic:g}, but the data give "
                f"{mine:.3g} for the row-level analysis"
            )
    if (
        reported.p_value is not None
        and as_claimed.p_value is not None
        and level in {"rows", "unknown"}
        and reported.p_relation in {"=", "<", "<="}
    ):
        p, q = as_claimed.p_value, reported.p_value
        if reported.p_relation == "=" and not (q / 3 <= p <= q * 3 or abs(p - q) < 0.005):
            mismatches.append(f"reported p = {q:g}, but the data give p = {p:.3g}")
        if reported.p_relation in {"<", "<="} and p > q * 1.05:
            mismatches.append(f"reported p < {q:g}, but the data give p = {p:.3g}")
    claimed_sig = reported.significant_at(alpha)
    if claimed_sig is None:
        claimed_sig = as_claimed.significant(alpha)
    return Reconciliation(level, grouping, explanation, tuple(mismatches), claimed_sig)
