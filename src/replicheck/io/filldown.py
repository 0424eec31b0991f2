"""Fill down a grouping written once per block of rows.

People type a tank's name in the first row of the tank's block and leave the
cells below it empty, and merged cells export the same way; read as it is,
such a column is mostly missing and the unit it names disappears. A column is
filled down (each empty cell takes the value above it) when the pattern is
clear, that is when all of these hold (docs/method.md, "Filling down"):

1. it is not the response (a measurement is never copied to another row);
2. its first cell holds a value, at least one cell in three is empty, and it
   holds at least two values;
3. it holds labels: text, dates, or whole numbers;
4. a label is written once per block: two values in a row (skipping the empty
   cells between them) are never the same;
5. the blocks (a value and the empty cells under it) look like groups: at least
   three in four span two rows or more, and the longest is at most four times
   as long as the shortest.

A column the user names is filled whatever the pattern, and detection can be
turned off. The table's layout records each filled column and how many cells
were filled, so that the report can say so.
"""

from __future__ import annotations

from collections.abc import Collection, Sequence

import numpy as np
import pandas as pd
from pandas.api.types import is_datetime64_any_dtype, is_numeric_dtype

from replicheck.errors import InputError
from replicheck.io.table import FilledColumn


def fill_pattern(series: pd.Series) -> bool:
    """Whether a column shows the written-once-per-block pattern (rules 2 to 5).

    >>> fill_pattern(pd.Series(["T1", None, None, "T2", None, None]))
    True
    >>> fill_pattern(pd.Series(["dead", None, None, None, None, None, None, "sick"]))
    False
    """
    present = series.notna().to_numpy(dtype=bool)
    n = len(present)
    values = series[present]
    if n < 4 or not present[0] or len(values) < 2 or (n - len(values)) * 3 < n:
        return False
    if is_numeric_dtype(series) and not is_datetime64_any_dtype(series):
        numbers = values.to_numpy(dtype=float)
        if not np.all(np.isfinite(numbers)) or not np.all(numbers == np.round(numbers)):
            return False
    cells = values.to_numpy(dtype=object)
    if bool((cells[1:] == cells[:-1]).any()):
        return False
    starts = np.flatnonzero(present)
    blocks = np.diff(np.append(starts, n))
    return bool(np.mean(blocks >= 2) >= 0.75 and blocks.max() <= 4 * blocks.min())


def fill_down(
    data: pd.DataFrame,
    *,
    protect: Collection[str] = (),
    stated: Sequence[str] = (),
    detect: bool = True,
) -> tuple[pd.DataFrame, tuple[FilledColumn, ...]]:
    """Fill down the columns that show the pattern, and those ``stated``.

    Parameters
    ----------
    data:
        The table as read (missing cells are NA). Not modified.
    protect:
        Columns never filled (the response).
    stated:
        Columns to fill whatever their pattern (exact names).
    detect:
        Whether to look for other columns to fill.

    Returns
    -------
    The table (a new frame when a column was filled) and the filled columns.
    """
    filled: list[FilledColumn] = []
    out = data
    for name in stated:
        if name in protect:
            raise InputError(
                f"column '{name}' is the response: a measurement is never filled down "
                "(each row must hold its own)"
            )
    for name in data.columns:
        col = str(name)
        if col in protect:
            continue
        series = data[name]
        is_stated = col in stated
        if not is_stated and not (detect and fill_pattern(series)):
            continue
        present = series.notna().to_numpy(dtype=bool)
        if present.all():
            continue
        new = series.ffill()
        cells = int(new.notna().sum() - present.sum())
        if cells == 0:
            continue
        if out is data:
            out = data.copy()
        out[name] = new
        first = int(np.argmax(present)) if present.any() else len(present)
        blocks = int(present[first:].sum())
        filled.append(FilledColumn(col, cells, blocks, stated=is_stated))
    return out, tuple(filled)
