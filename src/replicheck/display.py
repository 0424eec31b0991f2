"""What the reports show that must be computed from the rows.

Renderers never compute statistics, so everything a picture or an interval
needs is prepared here, once, as plain data:

* :func:`unit_view`: the observations of the reported term grouped by
  experimental unit within each level, with the unit means (the picture that
  shows an inflated n at a glance). Large files are thinned for display only:
  each unit keeps at most ``MAX_POINTS`` observations taken at evenly spaced
  ranks (so its spread and median are kept); a level with more than
  ``MAX_UNITS`` units shows that many unit means at evenly spaced ranks and no
  observations. Means of unit means always use every unit.
* :func:`effect_intervals`: each level's difference from the first level, with
  a 95% confidence interval computed twice: as the claimed analysis implies
  (every row a replicate: pooled within-level variance, t on N - k df, the
  interval of the one-way ANOVA or Student's t test) and with the experimental
  unit as the replicate (the unit means: pooled variance of the unit means,
  t on G - k df). For two levels these are the intervals of Student's
  two-sample t test on the rows and on the unit means.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from replicheck.partitions import group_means
from replicheck.stats import dist

MAX_POINTS = 60  # observations drawn per unit (display only)
MAX_UNITS = 400  # units per level beyond which MAX_UNITS unit means are drawn, no observations
CONFIDENCE = 0.95


@dataclass(frozen=True)
class UnitPoints:
    """One experimental unit in the picture."""

    label: str
    n: int
    mean: float
    values: tuple[float, ...]  # all observations, or MAX_POINTS of them at even ranks


@dataclass(frozen=True)
class LevelPoints:
    """One treatment level: its units, in increasing order of their means."""

    label: str
    n_observations: int
    units: tuple[UnitPoints, ...]  # every unit, or MAX_UNITS of them at even ranks of the means
    mean_of_unit_means: float
    n_units: int


@dataclass(frozen=True)
class UnitView:
    """Observations grouped by unit within the levels of one term."""

    term: str
    unit: str | None  # None: each row is its own unit
    n_observations: int
    n_units: int
    thinned: bool  # some units show a subset of their observations
    levels: tuple[LevelPoints, ...]


@dataclass(frozen=True)
class Interval:
    """A difference of means with its confidence interval."""

    estimate: float
    low: float | None
    high: float | None
    df: float
    replicates: int


@dataclass(frozen=True)
class EffectRow:
    """One level compared with the reference (first) level."""

    level: str
    reference: str
    claimed: Interval | None
    corrected: Interval | None


@dataclass(frozen=True)
class Effects:
    """Differences from the first level, as claimed and with the unit as replicate."""

    term: str
    unit: str | None
    confidence: float
    rows: tuple[EffectRow, ...]
    claimed_method: str
    corrected_method: str


@dataclass(frozen=True)
class Display:
    """Everything the reports draw for the reported term."""

    units: UnitView
    effects: Effects


def _even_ranks(values: np.ndarray, k: int) -> np.ndarray:
    """``k`` values at evenly spaced ranks (all of them when there are at most ``k``)."""
    v = np.sort(values)
    if v.size <= k:
        return v
    idx = np.round(np.linspace(0, v.size - 1, k)).astype(np.int64)
    return v[idx]


def _first_rows(codes: np.ndarray, n_codes: int) -> np.ndarray:
    """The first row of every code 0..n_codes-1 (vectorised)."""
    first = np.zeros(n_codes, dtype=np.int64)
    first[codes[::-1]] = np.arange(codes.size)[::-1]
    return first


def _labeller(
    frame: pd.DataFrame | None, columns: Sequence[str], codes: np.ndarray
) -> Callable[[np.ndarray], list[str]]:
    """Labels of chosen unit codes: the unit columns' values at the unit's first row,
    joined by ':' (the row number when no column names the unit)."""
    first = _first_rows(codes, int(codes.max()) + 1 if codes.size else 0)

    def label(chosen: np.ndarray) -> list[str]:
        if frame is None or not columns:
            return [str(int(g) + 1) for g in chosen]
        rows = frame.iloc[first[chosen]]
        # a missing value stays missing under pandas' string dtype: name it instead
        parts = [["(missing)" if pd.isna(v) else str(v) for v in rows[c].tolist()] for c in columns]
        return [":".join(p) for p in zip(*parts, strict=True)]

    return label


def _spread_pick(k_total: int, k: int) -> np.ndarray:
    """``k`` positions at evenly spaced ranks among ``k_total`` (all when fewer)."""
    if k_total <= k:
        return np.arange(k_total)
    return np.unique(np.round(np.linspace(0, k_total - 1, k)).astype(np.int64))


def _values_of(
    y: np.ndarray, pair_codes: np.ndarray, wanted: Sequence[np.ndarray], n_pairs: int
) -> dict[int, np.ndarray]:
    """The values of the rows of each wanted (unit, level) pair, in row order.

    Only the rows of those pairs are sorted (a 16-bit key when there are few,
    which numpy sorts by radix), not every row.
    """
    chosen = np.concatenate(wanted) if wanted else np.zeros(0, dtype=np.int64)
    if chosen.size == 0:
        return {}
    rank = np.full(n_pairs, -1, dtype=np.int64)
    rank[chosen] = np.arange(chosen.size)
    of_row = rank[pair_codes]
    rows = np.flatnonzero(of_row >= 0)
    key = of_row[rows]
    key = key.astype(np.uint16) if chosen.size <= 1 << 16 else key
    rows = rows[np.argsort(key, kind="stable")]
    bounds = np.concatenate([[0], np.cumsum(np.bincount(of_row[rows], minlength=chosen.size))])
    return {int(g): y[rows[bounds[i] : bounds[i + 1]]] for i, g in enumerate(chosen)}


def unit_view(
    term: str,
    y: np.ndarray,
    level_codes: np.ndarray,
    level_labels: Sequence[str],
    unit_codes: np.ndarray | None,
    unit_name: str | None,
    label: Callable[[np.ndarray], list[str]] | None = None,
) -> UnitView:
    """The observations of ``term`` grouped by unit within each level.

    ``unit_codes`` numbers the units 0..G-1 (None: every row its own unit);
    ``label`` names chosen unit codes (default: their numbers from 1). A level
    with more than ``MAX_UNITS`` units shows ``MAX_UNITS`` of them at evenly
    spaced ranks of their means, without observations; its mean of unit means
    uses every unit. Cost: one pass over the rows plus work per unit shown.
    """
    n = y.size
    if unit_codes is None:
        unit_codes = np.arange(n, dtype=np.int64)
    name = label or (lambda chosen: [str(int(g) + 1) for g in chosen])
    k_levels = len(level_labels)
    # a unit that holds several levels (a within-unit treatment) appears in each
    pair = unit_codes.astype(np.int64) * k_levels + level_codes
    pair_codes, keys = pd.factorize(pair, sort=True)
    keys = np.asarray(keys, dtype=np.int64)
    sizes = np.bincount(pair_codes, minlength=keys.size)
    means = np.bincount(pair_codes, weights=y, minlength=keys.size) / sizes
    pair_unit, pair_level = keys // k_levels, keys % k_levels
    n_units = int(unit_codes.max()) + 1 if n else 0
    picked = []
    for k in range(k_levels):
        ids = np.flatnonzero(pair_level == k)
        ids = ids[np.argsort(means[ids], kind="stable")]
        picked.append((ids, ids[_spread_pick(ids.size, MAX_UNITS)], ids.size > MAX_UNITS))
    values = _values_of(y, pair_codes, [c for _, c, many in picked if not many], keys.size)
    thinned = False
    levels = []
    for (ids, chosen, many), level in zip(picked, level_labels, strict=True):
        names = name(pair_unit[chosen])
        units = []
        for j, g in enumerate(chosen):
            shown = np.empty(0) if many else _even_ranks(values[int(g)], MAX_POINTS)
            thinned = thinned or bool(shown.size < sizes[g])
            units.append(
                UnitPoints(
                    str(names[j]),
                    int(sizes[g]),
                    float(means[g]),
                    tuple(float(v) for v in shown),
                )
            )
        levels.append(
            LevelPoints(
                str(level),
                int(sizes[ids].sum()),
                tuple(units),
                float(means[ids].mean()) if ids.size else float("nan"),
                int(ids.size),
            )
        )
    return UnitView(term, unit_name, n, n_units, thinned, tuple(levels))


def _pooled_intervals(
    values: np.ndarray, groups: np.ndarray, k: int, confidence: float
) -> list[Interval | None]:
    """Differences of group means from group 0 with pooled-variance t intervals."""
    sizes = np.bincount(groups, minlength=k).astype(float)
    if (sizes == 0).any():
        return [None] * (k - 1)
    means = np.bincount(groups, weights=values, minlength=k) / sizes
    resid = values - means[groups]
    df = float(values.size - k)
    out: list[Interval | None] = []
    for j in range(1, k):
        est = float(means[j] - means[0])
        if df < 1:
            out.append(Interval(est, None, None, df, int(values.size)))
            continue
        mse = float(resid @ resid) / df
        se = float(np.sqrt(mse * (1 / sizes[j] + 1 / sizes[0])))
        q = float(dist.t_ppf(0.5 + confidence / 2, df))
        out.append(Interval(est, est - q * se, est + q * se, df, int(values.size)))
    return out


def _spans_levels(unit_codes: np.ndarray, level_codes: np.ndarray) -> bool:
    """Whether some unit holds rows of more than one level (one pass, no sorting)."""
    first = _first_rows(unit_codes, int(unit_codes.max()) + 1)
    return bool((level_codes[first[unit_codes]] != level_codes).any())


def effect_intervals(
    term: str,
    y: np.ndarray,
    level_codes: np.ndarray,
    level_labels: Sequence[str],
    unit_codes: np.ndarray | None,
    unit_name: str | None,
    confounded: bool,
    confidence: float = CONFIDENCE,
) -> Effects:
    """Each level's difference from the first, claimed (rows) and corrected (unit means)."""
    k = len(level_labels)
    claimed = _pooled_intervals(y, level_codes, k, confidence)
    if unit_codes is None and not confounded:
        corrected: list[Interval | None] = list(claimed)
        corrected_method = "each row is its own unit: the same as claimed"
    elif confounded or unit_codes is None:
        corrected = [None] * (k - 1)
        corrected_method = "no interval: each level sits in a single unit"
    elif _spans_levels(unit_codes, level_codes):
        corrected = [None] * (k - 1)
        corrected_method = "no unit-means interval: the levels vary within units"
    else:
        means, _ = group_means(unit_codes, y)
        g = means.size
        unit_level = np.zeros(g, dtype=np.int64)
        unit_level[unit_codes] = level_codes
        corrected = _pooled_intervals(means, unit_level, k, confidence)
        corrected_method = f"unit means of {unit_name}: pooled variance, t on units minus levels df"
    rows = tuple(
        EffectRow(str(level_labels[j]), str(level_labels[0]), claimed[j - 1], corrected[j - 1])
        for j in range(1, k)
    )
    return Effects(
        term,
        unit_name,
        confidence,
        rows,
        "every row a replicate: pooled variance, t on rows minus levels df",
        corrected_method,
    )


def display_data(
    frame: pd.DataFrame,
    term: str,
    y: np.ndarray,
    level_codes: np.ndarray,
    level_labels: Sequence[str],
    unit_columns: Sequence[str],
    unit_codes: np.ndarray | None,
    unit_name: str | None,
    confounded: bool,
) -> Display:
    """The picture and the intervals of the reported term.

    ``unit_codes`` are the codes the refit used (None when confounded or when
    every row is a unit); for a confounded unit the picture still groups the
    rows by ``unit_columns``.
    """
    from replicheck.structure.relations import group_codes

    drawn = unit_codes
    if drawn is None and unit_columns:
        drawn = group_codes(frame, unit_columns)
    label = None if drawn is None else _labeller(frame, unit_columns, drawn)
    view = unit_view(term, y, level_codes, level_labels, drawn, unit_name, label)
    effects = effect_intervals(
        term, y, level_codes, level_labels, unit_codes, unit_name, confounded
    )
    return Display(view, effects)
