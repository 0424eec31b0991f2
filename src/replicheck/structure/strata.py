"""Blocks, implicit plots and the strata of the design.

A grouping crossed with a treatment (a block, a day, a subject that saw every
level) is not that treatment's unit, but its cells (block x treatment) may be:
in a split plot without a plot column, or in randomised blocks with
subsamples, the cell is the plot that received the treatment. The data cannot
fully tell a plot from rows randomised one by one inside a block; replicheck
takes the cells as units when they cluster beyond the block and treatment
effects (an F test of the block x treatment cells against the rows within
cells, p < 0.01: common practice), and otherwise reports the alternative
reading.

The strata of the design are the groupings that become random effects: every
term's experimental unit, blocks crossed with the treatments, and sub-units
nested below a unit (wells in plates). They form a tree by nesting, which the
text report prints (the Hasse diagram of the block structure: Lohr 1995, The
American Statistician 49:16-23; Bailey 2008, Design of Comparative
Experiments, ch. 10).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from functools import partial
from itertools import combinations

import numpy as np
import pandas as pd

from replicheck.partitions import dense_codes, is_nested, pair_codes
from replicheck.stats.classic import DesignError, cell_term_f
from replicheck.structure.evidence import on_every_scale
from replicheck.structure.relations import classify, group_codes

# Common practice (no published threshold): cells or blocks count as real
# groupings when their F test against the rows within them has p < 0.01.
EVIDENCE_P = 0.01
# Dense least squares on more cell columns than this is too slow for a screen.
MAX_CELLS = 2000
# Occasions (within-unit factors, times) with more levels than this are a fine time scale,
# not occasions: they enter neither the cell tests nor the random strata (a chosen value).
MAX_OCCASIONS = 50
# A series over time has at least this many points per cell on average (a chosen value).
SERIES_POINTS = 3
# Cells of a block with combinations of at most this many treatments.
MAX_CELL_FACTORS = 3


@dataclass(frozen=True)
class CellGrouping:
    """The cells of a crossed grouping and a treatment, as a candidate unit."""

    name: str  # "block:treatment"
    block: str
    treatment: str
    n_cells: int
    mean_size: float
    p_value: float | None  # F test of the cells beyond block + treatments
    credible: bool
    other_treatments_inside: bool  # another treatment varies within the cells


@dataclass(frozen=True, kw_only=True)
class Stratum:
    """A grouping of the rows that is a random effect of the corrected model."""

    name: str
    columns: tuple[str, ...]
    n_levels: int
    kind: str  # unit | block | subunit | rows
    parent: str | None
    terms: tuple[str, ...]  # terms whose error stratum this is


def _dummies(codes: np.ndarray) -> np.ndarray:
    k = int(codes.max()) + 1
    out = np.zeros((codes.size, k))
    out[np.arange(codes.size), codes] = 1.0
    return out


def cell_evidence(
    y: np.ndarray,
    block: np.ndarray,
    cells: np.ndarray,
    treatments: Sequence[np.ndarray],
    within: np.ndarray | None = None,
    containers: Sequence[np.ndarray] = (),
    additive: Sequence[np.ndarray] = (),
) -> float | None:
    """p-value of the block x treatment cells beyond additive block and full treatment effects.

    ``treatments`` are the codes of every treatment column; the reduced model
    holds the block and every combination of the treatments, the full model
    adds the cells. ``within`` is a grouping nested in the cells (plates inside
    a run x compound cell, sub-plots inside main plots): the test is then made
    on its means, with the treatments that are constant within it, so that
    clustering inside the cells is not mistaken for differences between cells.
    ``containers`` are groupings already taken as units that hold whole cells
    (main plots around sub-plot cells); they enter the reduced model so that
    their effects are not mistaken for differences between the cells.
    ``additive`` factors (measurement occasions) enter both models additively.
    """
    ok = (block >= 0) & (cells >= 0)
    for t in [*treatments, *additive]:
        ok &= t >= 0
    for c in containers:
        ok &= c >= 0
    if within is not None:
        ok &= within >= 0
    if not ok.all():
        y, block, cells = y[ok], dense_codes(block[ok]), dense_codes(cells[ok])
        treatments = [dense_codes(t[ok]) for t in treatments]
        additive = [dense_codes(t[ok]) for t in additive]
        containers = [dense_codes(c[ok]) for c in containers]
        within = None if within is None else dense_codes(within[ok])
    if y.size == 0 or int(cells.max()) + 1 > MAX_CELLS:
        return None
    kept = list(treatments)
    extra = list(additive)
    if within is not None:
        k = int(within.max()) + 1
        sizes = np.bincount(within, minlength=k)
        y = np.bincount(within, weights=y, minlength=k) / sizes
        first = np.zeros(k, dtype=np.int64)
        first[within[::-1]] = np.arange(within.size)[::-1]
        kept = [t[first] for t in treatments if is_nested(within, t)]
        extra = [dense_codes(t[first]) for t in additive if is_nested(within, t)]
        block = np.unique(block[first], return_inverse=True)[1]
        cells = np.unique(cells[first], return_inverse=True)[1]
        containers = [np.unique(c[first], return_inverse=True)[1] for c in containers]
    combined = np.zeros(y.size, dtype=np.int64)
    for t in kept:
        combined = combined * (int(t.max()) + 1) + t
    treatment_cells = dense_codes(combined)
    # every column of both models is constant within the cells x treatment cells
    # (the block and the containers hold whole cells): fit on those
    if int(treatment_cells.max()) + 1 > MAX_CELLS:
        return None
    key = pair_codes(dense_codes(cells), treatment_cells)
    for x in extra:
        key = pair_codes(dense_codes(key), x)
    cell, one = _collapse(key)
    reduced = np.hstack(
        [
            _dummies(dense_codes(block[one])),
            _dummies(dense_codes(treatment_cells[one])),
            *(_dummies(dense_codes(c[one])) for c in containers),
            *(_dummies(dense_codes(x[one])) for x in extra),
        ]
    )
    full = np.hstack([reduced, _dummies(dense_codes(cells[one]))])
    try:
        return float(cell_term_f(y, cell, full, reduced).p_value)
    except DesignError:
        return None


def _time_series(cells: np.ndarray, times: Sequence[np.ndarray]) -> bool:
    """Whether the rows of every cell are one series over time: a time named as such
    indexes them, one row per time point, three or more points per cell on average,
    and the time points are occasions that cells share (each held by two cells or more
    on average; in a rotation each period's days are shared by the cells of that
    period only): a subject under one formulation sampled over hours is one occasion,
    one unit of the formulation; two years of one variety at one site are two trials,
    not a series, and ages that differ from row to row are no time points."""
    for t in times:
        ok = (cells >= 0) & (t >= 0)
        if not ok.all():
            continue
        c, tt = dense_codes(cells), dense_codes(t)
        pair = dense_codes(pair_codes(c, tt))
        n_pairs = int(pair.max()) + 1
        k_cells, k_times = int(c.max()) + 1, int(tt.max()) + 1
        shared = n_pairs >= 2 * k_times  # each time point held by two cells or more on average
        if n_pairs == cells.size and n_pairs >= SERIES_POINTS * k_cells and shared:
            return True
    return False


def _cells_p(
    block: np.ndarray,
    cells: np.ndarray,
    treatments: Sequence[np.ndarray],
    inner: np.ndarray | None,
    holders: Sequence[np.ndarray],
    occasions: Sequence[np.ndarray],
    y: np.ndarray,
) -> float | None:
    return cell_evidence(y, block, cells, treatments, inner, holders, occasions)


def _collapse(codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Codes ``0..C-1`` of the distinct values of ``codes`` and one row of each."""
    cell = dense_codes(codes)
    one = np.empty(int(cell.max()) + 1 if cell.size else 0, dtype=np.int64)
    one[cell] = np.arange(cell.size)
    return cell, one


def crossed_cells(
    data: pd.DataFrame,
    y: np.ndarray,
    cols: Sequence[str],
    treatments: Sequence[str],
    stated: Sequence[tuple[str, ...]],
    groupings: Sequence[str] = (),
    guard: Callable[[np.ndarray, str], bool] | None = None,
    adjust: Sequence[str] = (),
    times: Sequence[str] = (),
) -> tuple[pd.DataFrame, list[str], dict[str, tuple[str, ...]], list[CellGrouping]]:
    """Add block x treatment cell columns for groupings crossed with treatments.

    Cells are formed with every combination of up to three treatments the
    grouping is crossed with (block x irrigation are main plots, block x
    irrigation x variety sub-plots in a split-split plot). The evidence for
    each is measured on the means of the coarsest grouping inside its cells.

    The caller passes the groupings that may carry plots (blocks and places,
    stated or named; the stated unit's parts). Cells whose rows are one series
    over time (one row per time point of ``times``, columns named as times) are
    units without further evidence: a subject sampled over hours under one
    formulation is one occasion of it. The evidence has to hold on
    every scale the response allows (:func:`replicheck.structure.evidence.scales`:
    an interaction that the log scale removes is a scale effect, not plots).
    ``guard(cells, treatment)`` may refuse cells, e.g. cells that would split a
    recorded unit of the treatment (cells of week x diet around pigs).

    Returns the data with the cell columns added, their names, the columns
    each is made of, and the evidence for each.
    """
    all_trt = [group_codes(data, (t,)) for t in treatments]
    # within-unit factors and times enter both models additively: the cells are judged
    # on what they add beyond the measurement occasions too
    occasions = [
        c for c in (group_codes(data, (a,)) for a in adjust) if int(c.max()) + 1 <= MAX_OCCASIONS
    ]
    crossed = {
        (col, trt): classify(col, trt, data[col], data[trt]).relation == "crossed"
        for col in cols
        for trt in treatments
    }
    subsets = [
        combo
        for size in range(1, min(len(treatments), MAX_CELL_FACTORS) + 1)
        for combo in combinations(treatments, size)
    ]
    made: list[tuple[str, str, tuple[str, ...], np.ndarray]] = []
    for col in cols:
        for combo in subsets:
            if not all(crossed[(col, t)] for t in combo):
                continue
            cells = group_codes(data, (col, *combo))
            if len(data) / (int(cells.max()) + 1) < 1.5:
                continue
            made.append((f"{col}:{':'.join(combo)}", col, combo, cells))
    extra = {name: pd.Series(cells, index=data.index) for name, _, _, cells in made}
    if extra:
        data = data.assign(**extra)
    derived: dict[str, tuple[str, ...]] = {}
    found: list[CellGrouping] = []
    inner_pool = [*groupings, *extra]
    taken: list[np.ndarray] = []
    for name, col, combo, cells in sorted(made, key=lambda m: int(m[3].max())):
        n_cells = int(cells.max()) + 1
        inner = coarsest_inside(data, cells, [g for g in inner_pool if g != name])
        holders = [c for c in taken if is_nested(cells, c) and int(c.max()) < n_cells - 1]
        block_codes = group_codes(data, (col,))
        p = on_every_scale(
            partial(_cells_p, block_codes, cells, all_trt, inner, holders, occasions), y
        )
        is_stated = any(set(st) == {col, *combo} for st in stated)
        allowed = guard is None or all(guard(cells, t) for t in combo)
        series = allowed and _time_series(cells, [group_codes(data, (t,)) for t in times])
        credible = is_stated or series or (allowed and p is not None and p < EVIDENCE_P)
        if credible:
            taken.append(cells)
        derived[name] = (col, *combo)
        inside = int(np.unique(group_codes(data, (col, *treatments))).size) > n_cells
        found.append(
            CellGrouping(
                name, col, ":".join(combo), n_cells, len(data) / n_cells, p, credible, inside
            )
        )
    return data, list(extra), derived, found


def coarsest_inside(
    data: pd.DataFrame, cells: np.ndarray, groupings: Sequence[str]
) -> np.ndarray | None:
    """The coarsest grouping nested in the cells with more levels than cells and fewer than rows."""
    n_cells = int(cells.max()) + 1
    best: np.ndarray | None = None
    for g in groupings:
        codes = group_codes(data, (g,))
        k = int(codes.max()) + 1
        if k <= n_cells or k >= len(data) or not is_nested(codes, cells):
            continue
        if best is None or k < int(best.max()) + 1:
            best = codes
    return best


def block_evidence(y: np.ndarray, block: np.ndarray, treatment_cells: np.ndarray) -> float | None:
    """p-value of a crossed grouping beyond the full treatment model (OLS F test)."""
    if int(block.max()) + 1 > MAX_CELLS:
        return None
    # both models are constant within the block x treatment cells: fit on those
    cell, one = _collapse(pair_codes(dense_codes(block), dense_codes(treatment_cells)))
    reduced = _dummies(dense_codes(treatment_cells[one]))
    full = np.hstack([reduced, _dummies(dense_codes(block[one]))])
    try:
        return float(cell_term_f(y, cell, full, reduced).p_value)
    except DesignError:
        return None


def build_strata(
    groupings: Mapping[str, tuple[tuple[str, ...], np.ndarray, str]],
    term_strata: Mapping[str, str | None],
    n_rows: int,
) -> tuple[Stratum, ...]:
    """Order groupings coarse to fine, link each to the finest grouping it is nested in.

    ``groupings`` maps a name to (columns, codes, kind); ``term_strata`` maps
    every term to the name of its error stratum (None for the rows).
    """
    names = sorted(groupings, key=lambda g: (int(groupings[g][1].max()) + 1, g))
    out: list[Stratum] = []
    for g in names:
        cols, codes, kind = groupings[g]
        parents = [
            h
            for h in names
            if h != g
            and int(groupings[h][1].max()) < int(codes.max())
            and is_nested(codes, groupings[h][1])
        ]
        parent = max(parents, key=lambda h: int(groupings[h][1].max())) if parents else None
        terms = tuple(t for t, s in term_strata.items() if s == g)
        out.append(
            Stratum(
                name=g,
                columns=cols,
                n_levels=int(codes.max()) + 1,
                kind=kind,
                parent=parent,
                terms=terms,
            )
        )
    rows_terms = tuple(t for t, s in term_strata.items() if s is None)
    finest = [s.name for s in out]
    out.append(
        Stratum(
            name="rows",
            columns=(),
            n_levels=n_rows,
            kind="rows",
            parent=finest[-1] if finest else None,
            terms=rows_terms,
        )
    )
    return tuple(out)
