"""Reconcile the reported result with the data.

From the reported degrees of freedom we infer which level the authors must
have analysed: the error df of a one-way analysis is (number of replicates -
number of groups), so rows, units and every other grouping give different
values. The reported statistic and p-value are compared with the analysis
reproduced from the data.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np

from replicheck.claim import ReportedResult
from replicheck.decisions import shown_term
from replicheck.glossary import short_title
from replicheck.numbers import beside_reported, format_number, p_beside, p_phrase, plain
from replicheck.partitions import is_nested, units_per_level
from replicheck.ranks import rank_tests
from replicheck.refit import Analysis, Refit, TermInput, row_model_size, within_block_tests
from replicheck.structure.units import Structure, UnitChoice, complete_codes

# Common practice for comparing a reported, rounded statistic with a
# recomputed one: allow 3% relative or the rounding of the last printed digit.
STAT_REL_TOL = 0.03
STAT_ABS_TOL = 0.051


@dataclass(frozen=True, kw_only=True)
class Reconciliation:
    """What the reported numbers say about the analysis the authors ran."""

    level: str  # rows | units | other | unknown
    level_grouping: str | None  # the grouping whose count matches the reported df
    explanation: str | None
    mismatches: tuple[str, ...]
    claimed_significant: bool | None
    reported_p: float | None = None  # the reported p-value (its bound for "p < x")
    reproduced_by: str | None = None  # the analysis that gives the reported statistic and df


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


def _t_of(a: Analysis) -> float | None:
    """|t| of a one-df test (t squared is F)."""
    if a.t_statistic is not None:
        return abs(a.t_statistic)
    if a.test == "F" and a.df is not None and abs(a.df[0] - 1) < 1e-9 and a.statistic is not None:
        return math.sqrt(max(a.statistic, 0.0))
    return None


def _close(mine: float, theirs: float) -> bool:
    return abs(mine - theirs) <= max(STAT_ABS_TOL, STAT_REL_TOL * abs(theirs))


def _compared(reported: ReportedResult, a: Analysis) -> tuple[float, float] | None:
    """(computed, reported) statistics on the reported scale, or None when not comparable."""
    if reported.statistic is None or a.statistic is None:
        return None
    if a.test == "chi2":  # a Wald or likelihood-ratio chi-squared; z is its root on 1 df
        if reported.test == "chi2":
            return a.statistic, reported.statistic
        if reported.test == "z" and a.t_statistic is not None:
            return abs(a.t_statistic), abs(reported.statistic)
        return None
    if a.test != "F":
        return None
    if reported.test == "t":
        t = _t_of(a)
        return None if t is None else (t, abs(reported.statistic))
    if reported.test == "F":
        return a.statistic, reported.statistic
    return None


def _ratio(a: Analysis) -> float | None:
    """The odds or rate ratio of a one-coefficient logistic or Poisson term."""
    if a.test != "chi2" or a.estimate is None or a.df is None or abs(a.df[0] - 1) > 1e-9:
        return None
    return math.exp(a.estimate)


def _ratio_matches(reported: ReportedResult, a: Analysis) -> bool:
    """Whether a reported odds or rate ratio is the term's, either way round (which level
    is the reference differs between papers), to its printed rounding (common practice:
    3% or 0.006)."""
    mine, theirs = _ratio(a), reported.ratio
    if mine is None or theirs is None:
        return False
    return any(abs(r - theirs) <= max(0.006, 0.03 * theirs) for r in (mine, 1 / mine))


def reproduces(reported: ReportedResult, a: Analysis) -> bool:
    """Whether an analysis gives the reported statistic on the reported df.

    The error df must agree to the printed integer (Satterthwaite df are often
    printed rounded), the numerator df exactly, and the statistic within the
    tolerance of a rounded printed value.
    """
    if reported.statistic is None and reported.ratio is not None:
        return _ratio_matches(reported, a)
    err = _error_df(reported)
    pair = _compared(reported, a)
    if pair is not None and a.test == "chi2" and a.df is not None:
        if reported.test == "z":
            return abs(a.df[0] - 1) < 1e-9 and _close(*pair)
        if reported.df is None or abs(reported.df[0] - a.df[0]) > 0.5:
            return False
        return _close(*pair)
    if err is None or pair is None or a.df is None or len(a.df) < 2:
        return False
    if abs(a.df[1] - err) >= 0.5 + 1e-9:
        return False
    if reported.test == "F" and reported.df is not None and abs(reported.df[0] - a.df[0]) > 0.5:
        return False
    return _close(*pair)


# The analyses a paired, blocked or unit-level claim is matched against, in order of
# preference (the exact classical analyses first).
_MATCH_ORDER = ("within_blocks", "strata_anova", "unit_means", "mixed_model")  # then the rest


# the row-level analysis is compared first; a lack-of-fit test is not a test of the effect
NOT_MATCHED = ("as_claimed", "lack_of_fit")


def _short(a: Analysis) -> str:
    if a.name == "likelihood_ratio":
        return "the row-level likelihood-ratio test"
    return "the row-level analysis" if a.name == "as_claimed" else f"the {a.label.split(':')[0]}"


def _rank_p_matches(reported: ReportedResult, a: Analysis) -> bool:
    """Whether a named rank test gives the reported p-value (exact, or within a bound)."""
    if a.name != reported.method or a.p_value is None or reported.p_value is None:
        return False
    if reported.p_relation == "=":
        return _p_matches(reported.p_value, a.p_value)
    if reported.p_relation in {"<", "<="}:
        return a.p_value <= reported.p_value * 1.05
    return False


def _shown(a: Analysis, test: str | None) -> str:
    """An analysis and its result, e.g. "the unit means (F(1, 14) = 4.61, p = 0.0497)"."""
    if a.test == "rank" and a.statistic is not None:
        stat = "V" if a.name == "signed_rank" else "W"
        return f"{_short(a)} ({stat} = {beside_reported(a.statistic)}, {p_phrase(a.p_value)})"
    if a.df is None or a.statistic is None:
        return _short(a)
    if a.test == "chi2":
        if test == "z" and a.t_statistic is not None:
            return f"{_short(a)} (z = {beside_reported(a.t_statistic)}, {p_phrase(a.p_value)})"
        chi2 = beside_reported(a.statistic)
        return f"{_short(a)} (chi2({plain(a.df[0])}) = {chi2}, {p_phrase(a.p_value)})"
    den = beside_reported(a.df[1])
    t = _t_of(a)
    if test == "t" and t is not None:
        return f"{_short(a)} (t({den}) = {beside_reported(t)}, {p_phrase(a.p_value)})"
    f = beside_reported(a.statistic)
    return f"{_short(a)} (F({plain(a.df[0])}, {den}) = {f}, {p_phrase(a.p_value)})"


@dataclass(frozen=True)
class Level:
    """One level of the data at which the claimed term could have been analysed."""

    name: str  # "rows" or a grouping's name
    kind: str  # rows | units | other
    replicates: int
    error_df: float  # replicates minus the parameters of the model at that level
    removed: str  # what the parameters are, e.g. "3 groups"
    per_group: tuple[int, ...] = ()  # replicates in each level of the term


def levels_of(
    n: int,
    term: TermInput,
    n_params: int,
    choice: UnitChoice,
    structure: Structure,
    single: bool,
    unit_analyses: Sequence[Analysis],
) -> list[Level]:
    """Levels at which a term could have been analysed, rows first.

    A number entering with one slope removes two parameters at a level (the
    intercept and the slope); a factor removes one per group.
    """
    k = len(term.labels)
    used = term.degree + 1 if term.numeric else k
    groups = (
        "an intercept and a slope"
        if term.numeric and term.degree == 1
        else f"an intercept and {term.degree} polynomial coefficients"
        if term.numeric
        else f"{k} groups"
    )
    rows_removed = groups if single else f"{n_params} model parameters"
    levels = [Level("rows", "rows", n, n - n_params, rows_removed, tuple(np.bincount(term.codes)))]
    if term.unit is not None and choice.unit is not None:
        per = tuple(int(c) for c in units_per_level(term.unit, term.codes, k))
        levels.append(
            Level(choice.unit, "units", choice.n_units, choice.n_units - used, groups, per)
        )
        for a in unit_analyses:
            if a.df is not None and abs(a.df[1] - (choice.n_units - k)) > 0.5:
                removed = (
                    f"{format_number(choice.n_units - a.df[1])} parameters of the "
                    f"{choice.unit} level"
                )
                levels.append(Level(choice.unit, "units", choice.n_units, a.df[1], removed, per))
    seen = {lv.name for lv in levels}
    for cand in structure.candidates:
        if cand.treatment == term.term and cand.name not in seen:
            seen.add(cand.name)
            levels.append(Level(cand.name, "other", cand.n_units, cand.n_units - used, groups))
    return levels


def _meaning(lv: Level, verb: str) -> str:
    if lv.kind == "rows":
        return f"the analysis {verb} each row as a replicate"
    return f"the analysis {verb} each level of '{lv.name}' as a replicate"


def reconcile(
    reported: ReportedResult | None,
    alpha: float,
    levels: Sequence[Level],
    as_claimed: Analysis,
    num_df: int,
    unit_analyses: Sequence[Analysis] = (),
    analyses: Sequence[Analysis] = (),
) -> Reconciliation:
    """Compare a reported result with the data.

    ``levels`` lists the levels the claimed term could have been analysed at,
    rows first. A reported statistic with its df is first matched against
    every analysis of the term (``analyses``: the row-level one, blocks as
    fixed effects, the multi-stratum ANOVA, unit means, the mixed model): a
    paired or blocked test that one of them reproduces is read as that
    analysis, and its level (rows or units) is the level of the claim.
    Otherwise the reported error df are matched against each level's error
    df; failing that, a reported "n = K per group" against the replicates per
    group; failing that, an exactly reported p-value that matches one of
    ``unit_analyses`` (and not the row-level analysis) points to the units.
    ``num_df`` is the term's numerator df.
    """
    if reported is None:
        return Reconciliation(
            level="unknown",
            level_grouping=None,
            explanation=None,
            mismatches=(),
            claimed_significant=as_claimed.significant(alpha),
        )
    mismatches: list[str] = []
    level, grouping, explanation = "unknown", None, None
    rows = levels[0]
    err = _error_df(reported)
    reference = as_claimed
    others = sorted(
        (a for a in analyses if a.name not in NOT_MATCHED),
        key=lambda a: _MATCH_ORDER.index(a.name) if a.name in _MATCH_ORDER else len(_MATCH_ORDER),
    )
    match = None
    reproduced_by = "as_claimed" if reproduces(reported, as_claimed) else None
    if reproduced_by is None:
        match = next((a for a in others if reproduces(reported, a)), None)
        if match is None and reported.method is not None:
            match = next((a for a in others if _rank_p_matches(reported, a)), None)
        reproduced_by = None if match is None else match.name
    if match is not None:
        reference = match
        level = "units" if match.level == "units" else "rows"
        unit = next((lv for lv in levels if lv.kind == "units"), None)
        grouping = unit.name if level == "units" and unit is not None else None
        how = (
            "which allows for the blocks"
            if match.name in {"within_blocks", "signed_rank"}
            else "which counts every row as a replicate"
            if match.name in {"rank_sum", "likelihood_ratio"}
            else "which takes the units as the replicates"
            if level == "units"
            else "which allows for the design's strata"
        )
        explanation = (
            f"the reported {reported.test or 'p-value'} is reproduced by "
            f"{_shown(match, reported.test)}, "
            f"{how}, not by {_shown(as_claimed, reported.test)}"
        )
        same = [lv for lv in levels if err is not None and abs(lv.error_df - err) < 0.5]
        if same and same[0].kind != "rows" and err is not None:
            lv = same[0]
            explanation = (
                f"error df {plain(err)} = {lv.replicates} levels of '{lv.name}' - {lv.removed}: "
                + explanation
            )
    elif err is not None:
        for lv in levels:
            if abs(lv.error_df - err) < 0.5:
                level, grouping = lv.kind, (None if lv.kind == "rows" else lv.name)
                what = "rows" if lv.kind == "rows" else f"levels of '{lv.name}'"
                explanation = (
                    f"error df {plain(err)} = {lv.replicates} {what} - {lv.removed}: "
                    + _meaning(lv, "took")
                )
                break
        if explanation is None:
            nearest = min(levels, key=lambda lv: abs(lv.error_df - err))
            explanation = (
                f"error df {plain(err)} matches no level of the data "
                f"(rows give {plain(rows.error_df)}; "
                f"closest: '{nearest.name}' with {plain(nearest.error_df)}); rows may have been "
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
                        f"reported p = {plain(q)} matches the {short_title(a.name)} "
                        f"(p = {p_beside(a.p_value)}), not the row-level one: the units were "
                        f"probably the replicates"
                    )
                    break
    if (
        reported.df is not None
        and reported.test == "F"
        and len(reported.df) >= 2
        and abs(reported.df[0] - num_df) > 0.5
    ):
        mismatches.append(f"numerator df {plain(reported.df[0])} differs from {num_df} in the data")
    if (
        explanation is None
        and reproduced_by == "as_claimed"
        and (reported.test in {"chi2", "z"} or reported.ratio is not None)
        and as_claimed.level == "rows"
    ):
        what = reported.test or "ratio"
        shown = (
            _shown(as_claimed, reported.test)
            if reported.test
            else f"the row-level analysis (ratio {beside_reported(_ratio(as_claimed) or 0)})"
        )
        if as_claimed.label.startswith("as claimed: mixed"):  # judged by its random effects
            shown = shown.replace("the row-level analysis", "the claimed mixed model")
            explanation = f"the reported {what} is reproduced by {shown}"
        else:
            level = "rows"
            explanation = (
                f"the reported {what} is reproduced by {shown}: the analysis took each row as a "
                "replicate"
            )
    checked = match is not None or level in {"rows", "unknown"}
    if reported.statistic is not None and reference.statistic is not None and checked:
        mine = reference.statistic
        theirs = reported.statistic
        if reported.test == "t" and _t_of(reference) is not None:
            mine, theirs = _t_of(reference) or 0.0, abs(theirs)
        elif reported.test in {"chi2", "z"} and _compared(reported, reference) is not None:
            mine, theirs = _compared(reported, reference) or (0.0, 0.0)
        if not _close(mine, theirs):
            tried = [_shown(a, reported.test) for a in others if a.statistic is not None]
            mismatches.append(
                f"reported {reported.test} = {plain(reported.statistic)}, but the data give "
                f"{beside_reported(mine, 3)} for the row-level analysis"
                + (f" (also tried: {'; '.join(tried)})" if tried else "")
            )
    if reported.ratio is not None and checked:
        mine_ratio = _ratio(reference)
        if mine_ratio is not None and not _ratio_matches(reported, reference):
            mismatches.append(
                f"reported ratio {plain(reported.ratio)}, "
                f"but the data give {beside_reported(mine_ratio, 3)} "
                f"(or {beside_reported(1 / mine_ratio, 3)} the other way round)"
            )
    if (
        reported.p_value is not None
        and reference.p_value is not None
        and checked
        and reported.p_relation in {"=", "<", "<="}
    ):
        p, q = reference.p_value, reported.p_value
        if reported.p_relation == "=" and not _p_matches(q, p):
            mismatches.append(f"reported p = {plain(q)}, but the data give p = {p_beside(p)}")
        if reported.p_relation in {"<", "<="} and p > q * 1.05:
            mismatches.append(f"reported p < {plain(q)}, but the data give p = {p_beside(p)}")
    claimed_sig = reported.significant_at(alpha)
    if claimed_sig is None:
        claimed_sig = as_claimed.significant(alpha)
    return Reconciliation(
        level=level,
        level_grouping=grouping,
        explanation=explanation,
        mismatches=tuple(mismatches),
        claimed_significant=claimed_sig,
        reported_p=reported.p_value,
        reproduced_by=reproduced_by,
    )


def _replicates_term(codes: np.ndarray, ti: TermInput) -> bool:
    """Whether a grouping within whose levels a term is constant leaves the term's test
    residual degrees of freedom between its levels.

    A factor needs two levels of the grouping in every level of its own: a grouping
    with one level per term level is the term itself and tests nothing. A number
    entering with a slope needs more levels of the grouping than parameters of its
    curve and the intercept (a patient-level baseline count in a model with a random
    intercept per patient is tested between the patients, whether or not two patients
    share a value).
    """
    if ti.numeric:
        return int(codes.max()) + 1 > ti.degree + 1
    return int(units_per_level(codes, ti.codes, len(ti.labels)).min()) >= 2


def claimed_model_level(
    ti: TermInput,
    random: Mapping[str, np.ndarray],
    rec: Reconciliation | None,
    as_claimed: Analysis | None,
    alpha: float,
) -> Reconciliation | None:
    """Where the claimed mixed model tests a term, against the term's experimental unit.

    The model tests a term against the coarsest of its random groupings within
    which the term is constant; when that grouping holds whole experimental
    units (the unit itself, or a coarser grouping), the claim is at the units.
    A grouping inside the unit (fish within tanks), or none, leaves the finer
    levels or the rows counted as replicates.
    """
    if ti.unit is None or ti.unit_name is None:
        return rec
    term_codes = ti.codes
    inside = [
        (name, codes)
        for name, codes in random.items()
        if is_nested(codes, term_codes)
        and int(codes.max()) + 1 < codes.size
        and _replicates_term(codes, ti)
    ]
    if inside:
        name, codes = min(inside, key=lambda nc: int(nc[1].max()))
        n_g = int(codes.max()) + 1
        if is_nested(ti.unit, codes):
            level, grouping = "units", name
            why = (
                f"the claimed model's random effect for '{name}' ({n_g} levels) holds whole "
                f"experimental units of '{ti.term}' ('{ti.unit_name}'), so its test of "
                f"'{ti.term}' takes them as the replicates"
            )
        else:
            level, grouping = "other", name
            why = (
                f"the claimed model's random effect for '{name}' ({n_g} levels) lies within "
                f"the experimental unit of '{ti.term}' ('{ti.unit_name}', "
                f"{int(ti.unit.max()) + 1} units), so its test of '{ti.term}' still counts "
                f"the {name} levels as replicates"
            )
    else:
        level, grouping = "rows", None
        why = (
            f"none of the claimed model's random effects ({', '.join(random)}) groups the rows "
            f"within the levels of '{ti.term}' (each of its levels inside one level of "
            f"'{ti.term}', several per level), so its test of '{ti.term}' counts the rows as "
            f"replicates of the '{ti.unit_name}' units"
        )
    if rec is None:
        significant = None if as_claimed is None else as_claimed.significant(alpha)
        return Reconciliation(
            level=level,
            level_grouping=grouping,
            explanation=why,
            mismatches=(),
            claimed_significant=significant,
        )
    explanation = why if rec.explanation is None else f"{why}; {rec.explanation}"
    return replace(rec, level=level, level_grouping=grouping, explanation=explanation)


@dataclass(frozen=True)
class Reconciled:
    """The reconcile stage's result."""

    terms: dict[str, Reconciliation | None]  # by term: None when nothing was reported for it
    overall: Reconciliation  # that of the term the claim section speaks of (decisions.shown_term)


def reconcile_terms(
    y: np.ndarray,
    inputs: Sequence[TermInput],
    fits: Refit,
    structure: Structure,
    reported: Mapping[str, ReportedResult],
    alpha: float,
    blocks: Mapping[str, np.ndarray],
    fixed_blocks: Sequence[np.ndarray],
    judged: Mapping[str, np.ndarray],
) -> Reconciled:
    """What each reported result says about the analysis behind it.

    A term's candidates are every analysis of its refit, the test within blocks
    (a paired t or a randomised-block ANOVA), and, when the report names a
    method, the rank tests; the levels are the rows, the term's unit and every
    other candidate grouping. A claimed mixed model is then placed by its
    random effects (:func:`claimed_model_level`).
    """
    n_params, columns = row_model_size(inputs, fixed_blocks)
    single = len(inputs) == 1 and not fixed_blocks
    in_blocks = within_block_tests(y, inputs, blocks) if reported else {}
    completed = {k: complete_codes(v) for k, v in judged.items()}
    out: dict[str, Reconciliation | None] = {}
    for ti in inputs:
        tr = fits.term(ti.term)
        rec = None
        if ti.term in reported:
            as_claimed = tr.get("as_claimed")
            assert as_claimed is not None
            unit_level = [a for a in tr.analyses if a.level == "units" and a.p_value is not None]
            levels = levels_of(
                int(y.size), ti, n_params, structure.unit_of(ti.term), structure, single, unit_level
            )
            rec = reconcile(
                reported[ti.term],
                alpha,
                levels,
                as_claimed,
                columns[ti.term],
                unit_level,
                [
                    *tr.analyses,
                    *([in_blocks[ti.term]] if ti.term in in_blocks else []),
                    *(rank_tests(y, ti, blocks) if reported[ti.term].method else []),
                ],
            )
        if judged:
            rec = claimed_model_level(ti, completed, rec, tr.get("as_claimed"), alpha)
        out[ti.term] = rec
    shown = inputs[shown_term([out[ti.term] is not None for ti in inputs])].term
    overall = out[shown]
    if overall is None:
        first = fits.term(shown).get("as_claimed")
        assert first is not None
        overall = reconcile(None, alpha, [], first, columns[shown])
    return Reconciled(out, overall)
