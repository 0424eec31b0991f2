"""The random terms of a claimed mixed model, as the refit and the judgement need them.

A random term with slopes, ``(1 + x|g)``, gives each level of ``g`` its own
intercept and its own effect of ``x``: for a number, one column of its values;
for a category, its indicator columns (all but the first level beside an
intercept, every level without one, as mixed-model software codes them).

For judging where the claimed model tests a term, a slope of the term over
``g`` is the ``g`` x term variation: the claimed model then tests the term
against the variation between the levels of ``g`` in their response to it, as
a random intercept for each ``g`` x term cell would (the compound-symmetric
form of the same random slope).
"""

from __future__ import annotations

from collections.abc import Collection, Mapping

import numpy as np
import pandas as pd

from replicheck.formula import ModelFormula, RandomSlope
from replicheck.stats.random_slopes import RandomTerm
from replicheck.structure.relations import group_codes

__all__ = ["judged_groupings", "slope_terms"]


def _effect_columns(frame: pd.DataFrame, col: str, numeric: bool, intercept: bool) -> np.ndarray:
    if numeric:
        return frame[col].to_numpy(dtype=float).reshape(-1, 1)
    codes, levels = pd.factorize(frame[col], sort=True)
    first = 1 if intercept else 0
    return np.column_stack([(codes == k).astype(float) for k in range(first, len(levels))]).reshape(
        len(frame), -1
    )


def _numeric(
    frame: pd.DataFrame, col: str, slopes_on: Collection[str], treatments: Collection[str]
) -> bool:
    if col in slopes_on:
        return True
    if col in treatments:
        return False
    return bool(pd.api.types.is_numeric_dtype(frame[col]) and frame[col].dtype != bool)


def slope_terms(
    frame: pd.DataFrame,
    formula: ModelFormula,
    slopes_on: Collection[str],
    treatments: Collection[str],
) -> list[RandomTerm]:
    """The claimed random terms with slopes, as columns of the rows (codes -1 where the
    grouping is missing)."""
    out: list[RandomTerm] = []
    for s in formula.slopes:
        parts = [np.ones((len(frame), 1))] if s.intercept else []
        for col in s.effects:
            parts.append(
                _effect_columns(
                    frame, col, _numeric(frame, col, slopes_on, treatments), s.intercept
                )
            )
        columns = np.hstack(parts)
        codes = np.array(group_codes(frame, s.grouping), dtype=np.int64)
        missing = ~np.isfinite(columns).all(axis=1)  # those rows leave the claimed model
        codes[missing] = -1
        columns[missing] = 0.0
        out.append(RandomTerm(s.text, codes, columns, s.diagonal))
    return out


def judged_groupings(
    frame: pd.DataFrame,
    slopes: tuple[RandomSlope, ...],
    intercepts: Mapping[str, np.ndarray],
) -> dict[str, np.ndarray]:
    """The claimed groupings as the judgement reads them: the random intercepts, each slope
    term's grouping when it has an intercept, and grouping x effect for every slope."""
    out = dict(intercepts)
    for s in slopes:
        if s.intercept:
            out.setdefault(":".join(s.grouping), group_codes(frame, s.grouping))
        for col in s.effects:
            cols = (*s.grouping, col)
            out.setdefault(":".join(cols), group_codes(frame, cols))
    return out
