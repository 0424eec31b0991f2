"""Experimental units betrayed by covariates measured once per unit.

A data file may hold one row per fish and no tank column, yet a water
temperature read once per tank and copied to every fish of it; or one row per
pup and no litter column, yet the litter size. Such a *group-constant
covariate* takes few values, each shared by a run of rows, and its value
classes within each treatment cell trace the unrecorded units.

**Candidates.** Numeric (not boolean) columns other than the response, the
treatments and the excluded ones, whose name is not made only of unit or
identifier words (``tank``, ``Litter``, ``cage_no`` are groupings for the
structure stage to weigh, not covariates), with at least 3 distinct values and
at most half as many distinct values as rows (a per-row measurement such as a
body weight has nearly one value per row).

**Value classes.** Rows of one treatment cell (the combination of the treatment
factors) sharing a value form a class; a value seen in two cells gives two
classes, since no unit straddles two treatment levels. The classes are
nested in the treatment by construction. They are read as a grouping when

1. every cell holds at least 2 classes, the classes hold 2 rows or more on
   average and at most 10 % of the rows sit alone in their class (chosen
   floors: values are *shared*);
2. the values are not a grid common to all cells: at most half of the rows
   carry a value that occurs in every cell. A time point (day 0, 7, 14 in every
   group), a score (1 to 5), an age in years or a sex code recur under every
   treatment level; a temperature read per tank does not (a chosen threshold,
   response-free);
3. either the values recur within treatment cells far more than chance allows
   (the share of rows, among those whose value recurs, whose value stays in one
   cell, at least 0.5, with a permutation p <= 0.001 over shuffled cells: a
   response-free test, strict levels chosen as common practice), or rows
   sharing a class are more alike in the response than a smooth effect of
   the covariate explains: the lack-of-fit F test (Draper & Smith 1998,
   *Applied Regression Analysis*, 3rd ed., §2.1) of the linear model
   ``response ~ cell + value`` (one common slope) against the class means
   ``response ~ class``, with ``k - c - 1`` and ``n - k`` degrees of freedom
   (``k`` classes, ``c`` cells, ``n`` rows), has p < 0.01 (a strict level is
   common practice when screening many columns). A per-row covariate with a
   linear effect on the response has no lack of fit; units with their own
   effects have;
4. no recorded column explains them: the classes are not the partition of an
   existing column, alone or within the treatment cells, and no recorded
   grouping (2 rows or more per level within the cells) has the covariate
   constant within its levels (a litter-size column next to the litter column
   is no hidden unit);
5. the column is not an integer label: an integer column whose every value lies
   in one cell (chick 1 to 50, each on one diet) is a unit number, which the
   structure stage weighs as a grouping itself.

The classes are derived as ``container[<col>]`` with kind ``container`` (the
name carries a container word, so the name hints read it as a unit that
received a treatment as a whole; the integrator also passes the kind). Units
that happen to share a value within a cell are merged, so the grouping can be
coarser than the true unit (several litters of the same size under one
treatment); it is never finer, as long as the covariate is really constant
within the unit.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from replicheck.codebook import column_codes
from replicheck.errors import InputError
from replicheck.numbers import p_phrase
from replicheck.partitions import (
    dense_codes,
    is_nested,
    pair_codes,
    same_partition,
    units_per_level,
)
from replicheck.stats import dist
from replicheck.structure.hidden.base import DerivedGrouping, HiddenScan
from replicheck.structure.names import (
    BLOCK_WORDS,
    CONTAINER_WORDS,
    ID_WORDS,
    INDIVIDUAL_WORDS,
    LOCATION_WORDS,
    PROCESS_WORDS,
    TIME_WORDS,
    tokens,
)
from replicheck.structure.relations import group_codes

MIN_DISTINCT = 3
MAX_DISTINCT_SHARE = 0.5  # distinct values at most half the rows
MIN_CLASSES_PER_CELL = 2
MIN_ROWS_PER_CLASS = 2.0  # mean rows per class
MAX_SINGLETON_SHARE = 0.10  # rows alone in their class
MAX_GRID_SHARE = 0.5  # rows whose value occurs in every treatment cell
ALPHA = 0.01  # lack-of-fit screening level
MIN_ROWS = 8

_GROUPING_WORDS = (
    CONTAINER_WORDS
    | BLOCK_WORDS
    | LOCATION_WORDS
    | PROCESS_WORDS
    | TIME_WORDS
    | INDIVIDUAL_WORDS
    | ID_WORDS
)


def _grouping_name(name: str) -> bool:
    """Whether a column name is made only of unit or identifier words."""
    toks = tokens(name)
    return bool(toks) and all(
        t in _GROUPING_WORDS or (t.endswith("s") and t[:-1] in _GROUPING_WORDS) for t in toks
    )


def _dense(codes: np.ndarray) -> np.ndarray:
    return np.asarray(pd.factorize(codes, sort=True)[0], dtype=np.int64)


def lack_of_fit(
    y: np.ndarray, value: np.ndarray, cells: np.ndarray, classes: np.ndarray
) -> tuple[float, int, int, float] | None:
    """Lack-of-fit F test of ``y ~ cell + value`` against the class means ``y ~ class``.

    ``classes`` must be nested in ``cells`` with ``value`` constant within a
    class; all codes 0..k-1 without missing rows. Returns (F, df1, df2, p) or
    None when a degree of freedom is missing or the pure error is zero.
    Draper & Smith (1998), *Applied Regression Analysis*, 3rd ed., §2.1.
    """
    n = y.size
    k = int(classes.max()) + 1
    c = int(cells.max()) + 1

    def centred(x: np.ndarray, groups: np.ndarray, size: int) -> np.ndarray:
        sums = np.bincount(groups, weights=x, minlength=size)
        counts = np.bincount(groups, minlength=size)
        return np.asarray(x - (sums / counts)[groups], dtype=float)

    with np.errstate(over="ignore", invalid="ignore"):  # values too large to square
        v_c = centred(value.astype(float), cells, c)
        y_c = centred(y.astype(float), cells, c)
        sxx = float(v_c @ v_c)
        if not (np.isfinite(sxx) and sxx > 0):
            return None
        slope = float(v_c @ y_c) / sxx
        rss_line = float(((y_c - slope * v_c) ** 2).sum())
        rss_pure = float((centred(y.astype(float), classes, k) ** 2).sum())
    if not (np.isfinite(rss_line) and np.isfinite(rss_pure)):
        return None
    df1, df2 = k - c - 1, n - k
    if df1 < 1 or df2 < 1 or rss_pure <= 0:
        return None
    f = ((rss_line - rss_pure) / df1) / (rss_pure / df2)
    f = max(f, 0.0)
    return f, df1, df2, float(dist.f_sf(f, df1, df2))


def _validate(frame: pd.DataFrame, response: str, treatments: Sequence[str]) -> np.ndarray:
    if not isinstance(frame, pd.DataFrame):
        raise InputError("the covariate scan needs a data frame")
    if response not in frame.columns:
        raise InputError(f"response column '{response}' is not in the data")
    if not treatments:
        raise InputError("the covariate scan needs at least one treatment column")
    for t in treatments:
        if t not in frame.columns:
            raise InputError(f"treatment column '{t}' is not in the data")
    y = pd.to_numeric(frame[response], errors="coerce")
    if frame[response].notna().sum() > y.notna().sum():
        raise InputError(f"response column '{response}' is not numeric")
    if not y.notna().any():
        raise InputError(f"response column '{response}' has no values")
    return np.asarray(y.to_numpy(dtype=float, na_value=np.nan))


def _is_candidate(series: pd.Series) -> bool:
    return pd.api.types.is_numeric_dtype(series) and not pd.api.types.is_bool_dtype(series)


def scan_covariates(
    frame: pd.DataFrame,
    response: str,
    treatments: Sequence[str],
    *,
    exclude: Sequence[str] = (),
) -> HiddenScan:
    """Derive the unrecorded units traced by covariates constant within them.

    See the module docstring for the rules. Each derived grouping has codes per
    row (-1 where the covariate, the response or a treatment is missing).
    """
    y_all = _validate(frame, response, treatments)
    cells_all = group_codes(frame, tuple(treatments))
    skip = {response, *treatments, *exclude}
    trt_label = (
        f"level of '{treatments[0]}'"
        if len(treatments) == 1
        else "cell of " + " x ".join(f"'{t}'" for t in treatments)
    )
    derived: list[DerivedGrouping] = []
    groupings: dict[object, np.ndarray] | None = None  # coded once, when first needed
    for col in frame.columns:
        if col in skip or not _is_candidate(frame[col]) or _grouping_name(str(col)):
            continue
        values = frame[col].to_numpy(dtype=float, na_value=np.nan)
        ok = np.isfinite(values) & np.isfinite(y_all) & (cells_all >= 0)
        n = int(ok.sum())
        if n < MIN_ROWS:
            continue
        v, y, cells = values[ok], y_all[ok], _dense(cells_all[ok])
        # the values' codes (in increasing order of value) from the column's
        # shared codes, which are sorted by value too: no sort of the rows here
        own = dense_codes(column_codes(frame[col]).codes[ok])
        n_values = int(own.max()) + 1
        if n_values < MIN_DISTINCT or n_values > MAX_DISTINCT_SHARE * n:
            continue
        found = _classes(v, own, y, cells)
        if found is None:
            continue
        classes, test = found
        if groupings is None:
            groupings = {
                other: group_codes(frame, (other,))
                for other in frame.columns
                if other != response
                and other not in treatments
                and _is_grouping_column(frame, other)
            }
        if _explained(groupings, col, ok, classes, cells):
            continue
        integer = bool(np.all(v == np.round(v)))
        if integer and same_partition(own, classes):
            continue  # an integer unit number, not a covariate
        codes = np.full(len(frame), -1, dtype=np.int64)
        codes[ok] = classes
        if any(same_partition(classes, _dense(d.codes[ok])) for d in derived):
            continue  # another covariate of the same units came first
        derived.append(
            _derive(str(col), response, codes, classes, own, test, trt_label, treatments)
        )
    return HiddenScan(derived=tuple(derived))


def _classes(
    v: np.ndarray, own: np.ndarray, y: np.ndarray, cells: np.ndarray
) -> tuple[np.ndarray, tuple[float, int, int, float]] | None:
    """Value classes within cells and their lack-of-fit test, when they pass rules 1 to 3.

    ``own`` codes the covariate's values ``v`` ``0..k-1`` in increasing order of value.
    """
    n = v.size
    n_cells = int(cells.max()) + 1
    classes = _dense(cells * (int(own.max()) + 1) + own)
    k = int(classes.max()) + 1
    sizes = np.bincount(classes, minlength=k)
    cell_of_class = np.empty(k, dtype=np.int64)
    cell_of_class[classes] = cells  # each class lies in one cell
    per_cell = np.bincount(cell_of_class, minlength=n_cells)
    if int(per_cell.min()) < MIN_CLASSES_PER_CELL or n / k < MIN_ROWS_PER_CLASS:
        return None
    if float(sizes[sizes == 1].sum()) > MAX_SINGLETON_SHARE * n:
        return None
    cells_of_value = units_per_level(cells, own, int(own.max()) + 1)
    grid = cells_of_value[own] == n_cells
    if n_cells < 2 or float(grid.mean()) > MAX_GRID_SHARE:
        return None
    test = lack_of_fit(y, v, cells, classes)
    if test is not None and test[3] < ALPHA:
        return classes, test
    confined = confinement(own, cells)
    if confined is not None and confined[1] <= CONFINED_ALPHA and confined[0] >= MIN_CONFINED:
        return classes, (confined[0], 0, 0, confined[1])
    return None


CONFINED_ALPHA = 0.001  # strict screening level (common practice)
MIN_CONFINED = 0.5  # share of value-sharing rows whose value stays in one cell (chosen)
CONFINED_DRAWS = 999


def confinement(
    own: np.ndarray, cells: np.ndarray, seed: int = 20261201
) -> tuple[float, float] | None:
    """Share of rows, among those whose value recurs, whose value occurs in one cell only,
    and its permutation p-value (cells shuffled over rows; Phipson & Smyth 2010).

    A covariate read once per unit repeats within a treatment cell and only by
    coincidence across cells; a per-row measurement with ties repeats across
    cells as often as chance allows. The test uses the response not at all.
    """
    sizes = np.bincount(own)
    shared = sizes[own] >= 2
    if int(shared.sum()) < 4:
        return None
    order = np.argsort(own[shared], kind="stable")
    groups = own[shared][order]
    starts = np.flatnonzero(np.concatenate([[True], groups[1:] != groups[:-1]]))
    weights = np.diff(np.concatenate([starts, [groups.size]]))

    def stat(c: np.ndarray) -> np.ndarray:
        lo = np.minimum.reduceat(c, starts, axis=-1)
        hi = np.maximum.reduceat(c, starts, axis=-1)
        return np.asarray(((lo == hi) * weights).sum(axis=-1) / groups.size)

    observed = float(stat(cells[shared][order]))
    rng = np.random.default_rng(seed)
    draws = rng.permuted(np.tile(cells, (CONFINED_DRAWS, 1)), axis=1)[:, shared][:, order]
    hits = int(np.sum(stat(draws) >= observed - 1e-12))
    return observed, (1 + hits) / (1 + CONFINED_DRAWS)


def _is_grouping_column(frame: pd.DataFrame, col: object) -> bool:
    """Whether a recorded column can stand for units: text, a unit name or integer codes."""
    series = frame[col]
    if not _is_candidate(series) or _grouping_name(str(col)):
        return True
    values = series.to_numpy(dtype=float, na_value=np.nan)
    values = values[np.isfinite(values)]
    return bool(values.size and np.all(values == np.round(values)))


def _explained(
    groupings: dict[object, np.ndarray],
    col: object,
    ok: np.ndarray,
    classes: np.ndarray,
    cells: np.ndarray,
) -> bool:
    """Whether a recorded grouping column (``groupings``: codes of every grouping
    column but the response and treatments) gives the classes or holds the
    covariate constant."""
    for other, codes in groupings.items():
        if other == col:
            continue
        raw = codes[ok]
        keep = raw >= 0
        if not keep.any():
            continue
        sub_raw, sub_classes = _dense(raw[keep]), _dense(classes[keep])
        local = dense_codes(pair_codes(cells[keep], sub_raw))
        if same_partition(sub_raw, sub_classes) or same_partition(local, sub_classes):
            return True
        if local.size / (int(local.max()) + 1) >= MIN_ROWS_PER_CLASS and is_nested(
            local, sub_classes
        ):
            return True
    return False


def _derive(
    col: str,
    response: str,
    codes: np.ndarray,
    classes: np.ndarray,
    own: np.ndarray,
    test: tuple[float, int, int, float],
    trt_label: str,
    treatments: Sequence[str],
) -> DerivedGrouping:
    k = int(classes.max()) + 1
    sizes = np.bincount(classes, minlength=k)
    lo, hi = int(sizes.min()), int(sizes.max())
    span = f"{lo}" if lo == hi else f"{lo} to {hi}"
    n_values = int(own.max()) + 1
    f, df1, df2, p = test
    if n_values == k:
        seen = (
            f"'{col}' takes {n_values} values, each shared by {span} rows and each within "
            f"one {trt_label}"
        )
    else:
        seen = (
            f"'{col}' takes {n_values} values, which within each {trt_label} form {k} "
            f"groups of {span} rows"
        )
    why = (
        f"rows of a group differ in '{response}' beyond a linear trend in '{col}' "
        f"(lack-of-fit F({df1}, {df2}) = {f:.1f}, {p_phrase(p)})"
        if df1 > 0
        else f"{f:.0%} of the rows whose value recurs keep it within one {trt_label}, far "
        f"more than chance ({p_phrase(p)}, permutation)"
    )
    how = f"{seen}; {why}: it looks measured once per unrecorded unit of {k} groups"
    if n_values < k:
        how += " (units sharing a value are merged, so the groups can be coarser than the units)"
    return DerivedGrouping(
        name=f"container[{col}]",
        codes=codes,
        sources=(col, *treatments),
        kind="container",
        how=how,
        strength={
            "n_groups": float(k),
            "mean_rows": float(classes.size / k),
            "f_lack_of_fit": float(f),
            "p_lack_of_fit": float(p),
        },
    )
