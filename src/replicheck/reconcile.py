"""Reconcile the reported result with the data.

From the reported degrees of freedom we infer which level the authors must
have analysed: the error df of a one-way analysis is (number of replicates -
number of groups), so rows, units and every other grouping give different
values. The reported statistic and p-value are compared with the analysis
reproduced from the data.
"""

from __future__ import annotations

from collections.abc import Sequence
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
    reported_p: float | None = None  # the reported p-value (its bound for "p < x")


def _p_matches(reported: float, computed: float) -> bool:
    """Whether a printed p-value is consistent with a computed one (common practice:
    agreement to two decimals, or within a factor of 1.5 for small p)."""
    if abs(reported - computed) < 0.005 + 1e-12:
        return True
    return reported / 1.5 <= computed <= reported * 1.5


def _error_df(reported: ReportedResult) -> float | None:
    if reported.df is None:
        return None
    if reported.test == "F" and len(reported.df) >= 2:
        return float(reported.df[1])
    if reported.test == "t":
        return float(reported.df[0])
    return None


@dataclass(frozen=True)
class Level:
    """One level of the data at which the claimed term could have been analysed."""

    name: str  # "rows" or a grouping's name
    kind: str  # rows | units | other
    replicates: int
    error_df: float  # replicates minus the parameters of the model at that level
    removed: str  # what the parameters are, e.g. "3 groups"
    per_group: tuple[int, ...] = ()  # replicates in each level of the term


def _meaning(lv: Level, verb: str) -> str:
    if lv.kind == "rows":
        return f"every row was {verb} as a replicate"
    return f"each level of '{lv.name}' was {verb} as a replicate"


def reconcile(
    reported: ReportedResult | None,
    alpha: float,
    levels: Sequence[Level],
    as_claimed: Analysis,
    num_df: int,
    unit_analyses: Sequence[Analysis] = (),
) -> Reconciliation:
    """Compare a reported result with the data.

    ``levels`` lists the levels the claimed term could have been analysed at,
    rows first. The reported error df are matched against each level's error
    df; failing that, a reported "n = K per group" against the replicates per
    group; failing that, an exactly reported p-value that matches one of
    ``unit_analyses`` (and not the row-level analysis) points to the units.
    ``num_df`` is the term's numerator df.
    """
    if reported is None:
        return Reconciliation("unknown", None, None, (), as_claimed.significant(alpha))
    mismatches: list[str] = []
    level, grouping, explanation = "unknown", None, None
    rows = levels[0]
    err = _error_df(reported)
    if err is not None:
        for lv in levels:
            if abs(lv.error_df - err) < 0.5:
                level, grouping = lv.kind, (None if lv.kind == "rows" else lv.name)
                what = "rows" if lv.kind == "rows" else f"levels of '{lv.name}'"
                explanation = (
                    f"error df {err:g} = {lv.replicates} {what} - {lv.removed}: "
                    + _meaning(lv, "treated")
                )
                break
        if explanation is None:
            nearest = min(levels, key=lambda lv: abs(lv.error_df - err))
            explanation = (
                f"error df {err:g} matches no level of the data (rows give {rows.error_df:g}; "
                f"closest: '{nearest.name}' with {nearest.error_df:g}); rows may have been "
                f"excluded or another model fitted"
            )
    if explanation is None and reported.n_per_group is not None:
        k = reported.n_per_group
        for lv in levels:
            if lv.per_group and all(s == k for s in lv.per_group):
                level, grouping = lv.kind, (None if lv.kind == "rows" else lv.name)
                what = "rows" if lv.kind == "rows" else f"levels of '{lv.name}'"
                explanation = f"n = {k} per group is the number of {what} in each group: " + (
                    _meaning(lv, "counted")
                )
                break
    if explanation is None and reported.p_relation == "=" and reported.p_value is not None:
        q = reported.p_value
        if as_claimed.p_value is not None and not _p_matches(q, as_claimed.p_value):
            for a in unit_analyses:
                if a.p_value is not None and _p_matches(q, a.p_value):
                    unit = next((lv for lv in levels if lv.kind == "units"), None)
                    level, grouping = "units", (unit.name if unit else None)
                    explanation = (
                        f"reported p = {q:g} matches the {a.name.replace('_', ' ')} analysis "
                        f"(p = {a.p_value:.3g}), not the row-level one: the units were "
                        f"probably the replicates"
                    )
                    break
    if (
        reported.df is not None
        and reported.test == "F"
        and len(reported.df) >= 2
        and abs(reported.df[0] - num_df) > 0.5
    ):
        mismatches.append(f"numerator df {reported.df[0]:g} differs from {num_df} in the data")
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
        if reported.p_relation == "=" and not _p_matches(q, p):
            mismatches.append(f"reported p = {q:g}, but the data give p = {p:.3g}")
        if reported.p_relation in {"<", "<="} and p > q * 1.05:
            mismatches.append(f"reported p < {q:g}, but the data give p = {p:.3g}")
    claimed_sig = reported.significant_at(alpha)
    if claimed_sig is None:
        claimed_sig = as_claimed.significant(alpha)
    return Reconciliation(
        level, grouping, explanation, tuple(mismatches), claimed_sig, reported.p_value
    )
