"""The refit stage as the audit runs it.

:func:`refit_design` turns the analysis rows and the structure into what the
refit works on (each term's level codes and unit codes; the strata, the
blocks and the formula's fixed blocks as codes; the claimed model's random
terms) and runs :func:`replicheck.refit.refit` for the chosen units, again for
each alternative reading of a term's unit, and the check of a claimed mixed
model's omitted random slopes.
"""

from __future__ import annotations

from collections.abc import Collection, Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from replicheck.claim import ReportedResult
from replicheck.formula import ModelFormula
from replicheck.partitions import same_partition
from replicheck.prepare import Prepared
from replicheck.random_terms import judged_groupings, slope_terms
from replicheck.refit import Refit, TermInput, refit
from replicheck.slopes import SlopeCheck, omitted_slopes
from replicheck.stats.discrete import ResponseKind
from replicheck.structure.relations import codes_of, group_codes
from replicheck.structure.stage import DesignReading
from replicheck.structure.terms import Term
from replicheck.structure.units import Structure, complete_codes, unit_codes
from replicheck.trials import claimed_kind
from replicheck.verdict import AlternativeEvidence


@dataclass(frozen=True, kw_only=True)
class RefitStage:
    """What the refit worked on, and its results."""

    y: np.ndarray  # the response of the analysis rows
    kind: ResponseKind  # continuous, binary or count
    inputs: tuple[TermInput, ...]  # one per term, in the model's order
    strata: Mapping[str, np.ndarray]  # the design's random groupings as codes (not the rows)
    blocks: Mapping[str, np.ndarray]  # the strata that are blocks
    fixed_blocks: tuple[np.ndarray, ...]  # the formula's blocks, held as fixed effects
    claimed_random: Mapping[str, np.ndarray]  # the claimed random intercepts (-1: missing)
    judged: Mapping[str, np.ndarray]  # the claimed groupings as the judgement reads them
    fits: Refit  # every analysis of every term, with the chosen units
    alternatives: Mapping[str, tuple[AlternativeEvidence, ...]]  # by term
    slopes: Mapping[str, SlopeCheck]  # a claimed mixed model's omitted random slopes, by term


def refit_design(prepared: Prepared, design: DesignReading, seed: int) -> RefitStage:
    """Every analysis of every term of ``prepared`` on the rows and units of ``design``."""
    c = prepared.claim
    frame, structure, slopes_on = design.frame, design.structure, prepared.slopes_on
    y = frame[c.response].to_numpy(dtype=float)
    inputs = term_inputs(frame, prepared.terms, structure, slopes_on, c.formula)
    strata = {
        s.name: complete_codes(group_codes(frame, s.columns))
        for s in structure.strata
        if s.kind != "rows"
    }
    blocks = {
        s.name: strata[s.name] for s in structure.strata if s.kind == "block" and s.name in strata
    }
    fixed_blocks = tuple(complete_codes(group_codes(frame, (b,))) for b in prepared.formula_blocks)
    kind = claimed_kind(y, c.family, c.response)
    row_chi2 = _row_chi2(prepared.reported, prepared.terms)
    claimed_random = {  # -1 marks a missing value: those rows leave the claimed model
        ":".join(g): group_codes(frame, g)
        for g in (c.formula.random if c.formula is not None else ())
    }
    claimed_slopes = (
        slope_terms(frame, c.formula, slopes_on, c.treatments) if c.formula is not None else []
    )
    judged = (
        judged_groupings(frame, c.formula.slopes, claimed_random)
        if c.formula is not None
        else claimed_random
    )
    fits = refit(
        y,
        inputs,
        strata,
        blocks,
        fixed_blocks,
        seed,
        kind,
        row_chi2,
        claimed_random,
        c.family,
        claimed_slopes,
        c.limits.crossed_levels,
    )
    alternatives = _alternatives(
        frame, y, structure, inputs, strata, blocks, fixed_blocks, seed, kind, row_chi2
    )
    return RefitStage(
        y=y,
        kind=kind,
        inputs=inputs,
        strata=strata,
        blocks=blocks,
        fixed_blocks=fixed_blocks,
        claimed_random=claimed_random,
        judged=judged,
        fits=fits,
        alternatives=alternatives,
        slopes=omitted_slopes(y, inputs, judged, fixed_blocks) if judged else {},
    )


def term_inputs(
    frame: pd.DataFrame,
    terms: Sequence[Term],
    structure: Structure,
    slopes_on: Collection[str],
    formula: ModelFormula | None,
) -> tuple[TermInput, ...]:
    """Each term's level codes and its unit's codes (None when confounded or when every
    row is a unit); a number entering with one slope keeps its values, a ``poly(x, k)``
    term its degree."""
    inputs: list[TermInput] = []
    for t in terms:
        choice = structure.unit_of(t.name)
        codes, labels = codes_of(frame[t.name])
        confounded = choice.relation == "confounded"
        units = unit_codes(frame, choice) if choice.unit is not None and not confounded else None
        degree = next(
            (
                int(tr.power)
                for tr in (formula.transforms if formula is not None else ())
                if tr.name == t.name and tr.function == "poly"
            ),
            1,
        )
        inputs.append(
            TermInput(
                term=t.name,
                factors=t.factors,
                codes=codes,
                labels=labels,
                unit=units,
                unit_name=choice.unit,
                confounded=confounded,
                values=frame[t.name].to_numpy(dtype=float) if t.name in slopes_on else None,
                degree=degree,
            )
        )
    return tuple(inputs)


def _row_chi2(reported: Mapping[str, ReportedResult], terms: Sequence[Term]) -> bool | None:
    """Whether the first term's reported result is a chi-squared (or z) test of the rows
    (None when nothing was reported for it): a single yes/no term's row-level test."""
    first = reported.get(terms[0].name)
    return None if first is None else first.test in (None, "chi2", "z")


def _alternatives(
    frame: pd.DataFrame,
    y: np.ndarray,
    structure: Structure,
    inputs: Sequence[TermInput],
    strata: Mapping[str, np.ndarray],
    blocks: Mapping[str, np.ndarray],
    fixed_blocks: Sequence[np.ndarray],
    seed: int,
    kind: ResponseKind,
    row_chi2: bool | None,
) -> dict[str, tuple[AlternativeEvidence, ...]]:
    """Each alternative reading of a term's unit, refitted with that unit in its place."""
    out: dict[str, tuple[AlternativeEvidence, ...]] = {}
    for alt in structure.alternatives:
        at = next((i for i, t in enumerate(inputs) if t.term == alt.term), None)
        if at is None:
            continue
        ti = inputs[at]
        choice = alt.choice
        confounded = choice.relation == "confounded"
        codes = unit_codes(frame, choice) if choice.unit is not None and not confounded else None
        new = replace(ti, unit=codes, unit_name=choice.unit, confounded=confounded)
        others = [t for t in inputs if t.term != ti.term and t.unit is not None]
        kept = {
            name: c
            for name, c in strata.items()
            if ti.unit is None
            or not same_partition(c, ti.unit)
            or any(same_partition(c, o.unit) for o in others if o.unit is not None)
        }
        if codes is not None and int(codes.max()) + 1 < len(frame) and choice.unit is not None:
            kept[choice.unit] = codes
        changed = [new if i == at else t for i, t in enumerate(inputs)]
        fit = refit(y, changed, kept, blocks, fixed_blocks, seed, kind, row_chi2)
        out[ti.term] = (*out.get(ti.term, ()), AlternativeEvidence(alt, fit.term(ti.term)))
    return out
