"""The structure stage as the audit runs it.

:func:`read_design` adds the groupings the hidden scans derived and a column
for each interaction term to the analysis rows, infers the structure (see
:func:`replicheck.structure.units.infer_structure` for the order of its
steps), reads each number's unit as a slope needs it, and, when some rows
have no recorded experimental unit, leaves those rows out and reads the
design again without them: a row whose unit is unknown cannot be placed among
the replicates.
"""

from __future__ import annotations

from collections.abc import Collection, Sequence
from dataclasses import dataclass

import pandas as pd

from replicheck.claim import Claim
from replicheck.structure.hidden import HiddenScan, derived_column
from replicheck.structure.numbers import slope_units
from replicheck.structure.terms import Term, interaction_levels
from replicheck.structure.units import Structure, infer_structure


@dataclass(frozen=True, kw_only=True)
class DesignReading:
    """The rows the refit uses and the structure read from them."""

    frame: pd.DataFrame  # analysis rows, with derived groupings and interaction columns
    structure: Structure
    rows_without_unit: int  # rows left out: their experimental unit is not recorded
    unit_columns: tuple[str, ...]  # the unit columns whose missing values left them out


def read_design(
    frame: pd.DataFrame,
    claim: Claim,
    terms: Sequence[Term],
    slopes_on: Collection[str],
    scan: HiddenScan,
) -> DesignReading:
    """The structure of the analysis rows ``frame`` (never changed) for the model ``terms``."""
    added = {g.name: derived_column(g, frame.index) for g in scan.derived}
    for t in terms:
        if t.is_interaction:
            added[t.name] = interaction_levels(frame, t.factors)
    frame = frame.assign(**added) if added else frame

    def read(rows: pd.DataFrame) -> Structure:
        return slope_units(
            infer_structure(
                rows,
                claim.response,
                [t.name for t in terms],
                exclude=claim.treatments,
                interactions=[t.name for t in terms if t.is_interaction],
                roles=claim.roles,
                unit_labels=claim.unit_labels or "auto",
                derived_columns=[g.name for g in scan.derived],
                file_order=[g.name for g in scan.derived if g.name.endswith("[file order]")],
            ),
            rows,
            slopes_on,
        )

    structure = read(frame)
    unit_columns = _unit_columns(structure, terms, frame)
    no_unit = frame[unit_columns].isna().any(axis=1) if unit_columns else None
    if no_unit is None or not no_unit.any() or no_unit.all():
        return DesignReading(frame=frame, structure=structure, rows_without_unit=0, unit_columns=())
    frame = frame[~no_unit.to_numpy()]
    return DesignReading(
        frame=frame,
        structure=read(frame),
        rows_without_unit=int(no_unit.sum()),
        unit_columns=tuple(unit_columns),
    )


def _unit_columns(structure: Structure, terms: Sequence[Term], frame: pd.DataFrame) -> list[str]:
    """The recorded columns that identify the experimental units of the terms."""
    out: list[str] = []
    for t in terms:
        choice = structure.unit_of(t.name)
        if choice.unit is None or choice.relation == "confounded":
            continue
        out += [col for col in choice.columns if col in frame.columns and col not in out]
    return [col for col in out if col not in {t.name for t in terms}]
