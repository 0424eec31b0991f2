"""Numbers in a claimed formula: one slope each, or category labels.

In the model formulas of statistics software a numeric column enters with one
slope (a covariate, or a dose fitted as a linear trend) and a categorical one
with a coefficient per level; ``C(x)`` makes a numeric column categorical.
Data files lose that distinction: a diet numbered 1 to 4 in a spreadsheet was
a factor in the authors' software, while a litter size of 2 to 18 pups, a time
in days or a dose of 0, 5, 10 and 20 mg was a number. The rule, in order:

1. ``C(x)`` in the formula: categories;
2. stated as a covariate (``--covariate``): one slope;
3. two distinct values or fewer: categories (the test is the same either way);
4. a reported result for the number whose numerator df is its number of
   values less one (F(3, 55) for four nitrogen rates): categories, as the
   authors analysed it;
   a number given a random slope in the claimed formula, ``(1 + day|subject)``,
   or transformed in it, ``day + I(day^2)``: one slope (a random slope is
   written on a number, on a category with k levels it would be a k x k
   covariance; a square or a log is taken of a quantity);
5. integers that run consecutively from 0 or 1 (1, 2, 3, 4): categories, as
   levels are numbered by people who code a factor; a note says how to state
   a slope instead;
6. any other number: one slope.

Rule 5 follows how labels are written: a quantity (a dose, a size, a time
since the start) rarely takes exactly the values 1..k, and a factor coded with
numbers almost always does.
"""

from __future__ import annotations

from collections.abc import Collection, Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from replicheck.numbers import format_number
from replicheck.partitions import dense_codes
from replicheck.structure.relations import group_codes
from replicheck.structure.units import Structure, rows_choice

__all__ = ["NumberReading", "read_numbers", "slope_units"]


@dataclass(frozen=True)
class NumberReading:
    """How one numeric column of a formula is read."""

    column: str
    slope: bool  # True: one slope; False: categories
    reason: str
    n_values: int
    low: float
    high: float


def _show(x: float) -> str:
    return format_number(x)


def read_numbers(
    frame: pd.DataFrame,
    columns: Sequence[str],
    categorical: Collection[str] = (),
    covariates: Collection[str] = (),
    reported_df: Mapping[str, float] | None = None,
    random_slopes: Collection[str] = (),
    transformed: Collection[str] = (),
) -> tuple[NumberReading, ...]:
    """The reading of every numeric column among ``columns`` (see the module's rule).

    Columns that are not numeric are left out: they are categories.
    """
    out: list[NumberReading] = []
    for col in columns:
        s = frame[col]
        if s.dtype == bool or not pd.api.types.is_numeric_dtype(s):
            continue
        values = np.unique(s.dropna().to_numpy(dtype=float))
        if values.size == 0:
            continue
        low, high = float(values[0]), float(values[-1])
        span = f"{values.size} values from {_show(low)} to {_show(high)}"

        codes = bool(np.all(values == np.round(values))) and low in (0.0, 1.0)
        if col in categorical:
            slope, reason = False, "written C() in the formula"
        elif col in covariates:
            slope, reason = True, f"stated as a covariate; {span}"
        elif values.size <= 2:
            slope, reason = False, f"{span}: the test is the same either way"
        elif (reported_df or {}).get(col) == values.size - 1:
            slope = False
            reason = (
                f"{span}; the reported result has {values.size - 1} numerator degrees of "
                "freedom, one per value less one, so the authors analysed them as categories"
            )
        elif col in random_slopes:
            slope = True
            reason = f"{span}; the claimed model gives it a random slope, as on a number"
        elif col in transformed:
            slope = True
            reason = f"{span}; the formula also transforms it (a square, a log), as a number"
        elif codes and high - low == values.size - 1:
            slope = False
            reason = (
                f"the integers {_show(low)} to {_show(high)}, numbered as the levels of a "
                "factor are"
            )
        else:
            slope, reason = True, f"a quantity: {span}"
        out.append(NumberReading(col, slope, reason, int(values.size), low, high))
    return tuple(out)


MIN_SLOPE_UNITS = 3  # an intercept and a slope leave at least one df among the units


def slope_units(structure: Structure, frame: pd.DataFrame, slopes: Collection[str]) -> Structure:
    """The structure with each number's unit read as a slope needs it.

    A level of a number is not a comparison of its own: a litter size met in
    one litter only is still a point on the regression line. So a number whose
    every value sits in a single unit is not confounded with the units when the
    value is constant within each unit and there are at least three of them
    (the slope then has units - 2 degrees of freedom); its unit is "nested",
    and no level is reported as sitting in a single unit. A number that varies
    within the grouping whose levels each hold one of its values (every value
    met once: a measurement per row) is replicated by the rows.
    """
    units = []
    for choice in structure.units:
        if choice.treatment not in slopes:
            units.append(choice)
            continue
        fixed = replace(choice, single_unit_levels=())
        if choice.relation == "confounded" and choice.columns:
            codes = group_codes(frame, choice.columns)
            known = codes >= 0
            x = frame[choice.treatment].to_numpy(dtype=float)[known]
            c = dense_codes(codes[known])
            n_units = int(c.max()) + 1 if c.size else 0
            low = np.full(n_units, np.inf)
            high = np.full(n_units, -np.inf)
            np.minimum.at(low, c, x)
            np.maximum.at(high, c, x)
            if n_units >= MIN_SLOPE_UNITS and np.allclose(low, high):
                fixed = replace(fixed, relation="nested", n_units=n_units)
            elif not np.allclose(low, high):
                # the number varies within the grouping: its values are not labels of that
                # grouping's levels, and its slope is replicated below it (the rows)
                fixed = rows_choice(
                    choice.treatment,
                    len(frame),
                    f"'{choice.treatment}' varies within every recorded grouping",
                )
        units.append(fixed)
    return replace(structure, units=tuple(units))
