"""What the reports show that must be computed from the rows.

Renderers never compute statistics, so everything a picture or an interval
needs is prepared here, once, as plain data:

* :func:`unit_view`: the observations of the reported term grouped by
  experimental unit within each level, with the unit means (the picture that
  shows an inflated n at a glance). Large files are thinned for display only:
  each unit keeps at most ``MAX_POINTS`` observations taken at evenly spaced
  ranks (so its spread and median are kept), and the unit means are always
  complete.
* :func:`effect_intervals`: each level's difference from the first level, with
  a 95% confidence interval computed twice: as the claimed analysis implies
  (every row a replicate: pooled within-level variance, t on N - k df, the
  interval of the one-way ANOVA or Student's t test) and with the experimental
  unit as the replicate (the unit means: pooled variance of the unit means,
  t on G - k df). For two levels these are the intervals of Student's
  two-sample t test on the rows and on the unit means.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats as sps

MAX_POINTS = 60  # observations drawn per unit (display only)
MAX_UNITS = 400  # units drawn per level beyond which only unit means are drawn
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
    units: tuple[UnitPoints, ...]
    mean_of_unit_means: float


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


def _unit_labels(frame: pd.DataFrame, columns: Sequence[str], codes: np.ndarray) -> list[str]:
    """A label for every unit code: its columns' values joined by ':'."""
    n = int(codes.max()) + 1 if codes.size else 0
    first = np.full(n, -1, dtype=np.int64)
    order = np.arange(codes.size)[::-1]
    first[codes[order]] = order  # the first row of each unit
    labels = []
    for row in first:
        parts = [str(frame[c].iloc[int(row)]) for c in columns]
        labels.append(":".join(parts))
    return labels


def unit_view(
    term: str,
    y: np.ndarray,
    level_codes: np.ndarray,
    level_labels: Sequence[str],
    unit_codes: np.ndarray | None,
    unit_name: str | None,
    unit_labels: Sequence[str] | None,
) -> UnitView:
    """The observations of ``term`` grouped by unit within each level.

    ``unit_codes`` numbers the units 0..G-1 (None: every row its own unit).
    """
    n = y.size
    if unit_codes is None:
        unit_codes = np.arange(n, dtype=np.int64)
        unit_labels = [str(i + 1) for i in range(n)]
    assert unit_labels is not None
    n_units = int(unit_codes.max()) + 1 if n else 0
    sizes = np.bincount(unit_codes, minlength=n_units)
    means = np.bincount(unit_codes, weights=y, minlength=n_units) / np.maximum(sizes, 1)
    order = np.argsort(unit_codes, kind="stable")
    bounds = np.concatenate([[0], np.cumsum(sizes)])
    thinned = False
    levels = []
    for k, label in enumerate(level_labels):
        in_level = level_codes == k
        ids = np.unique(unit_codes[in_level])
        ids = ids[np.argsort(means[ids], kind="stable")]
        many = ids.size > MAX_UNITS
        units = []
        for g in ids:
            rows = order[bounds[g] : bounds[g + 1]]
            rows = rows[level_codes[rows] == k]
            vals = y[rows]
            shown = np.empty(0) if many else _even_ranks(vals, MAX_POINTS)
            thinned = thinned or shown.size < vals.size
            units.append(
                UnitPoints(
                    str(unit_labels[g]),
                    int(vals.size),
                    float(vals.mean()),
                    tuple(float(v) for v in shown),
                )
            )
        unit_means = np.array([u.mean for u in units])
        levels.append(
            LevelPoints(
                str(label),
                int(in_level.sum()),
                tuple(units),
                float(unit_means.mean()) if unit_means.size else float("nan"),
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
        q = float(sps.t.ppf(0.5 + confidence / 2, df))
        out.append(Interval(est, est - q * se, est + q * se, df, int(values.size)))
    return out


def _spans_levels(unit_codes: np.ndarray, level_codes: np.ndarray) -> bool:
    """Whether some unit holds rows of more than one level (one pass, no sorting)."""
    first = np.zeros(int(unit_codes.max()) + 1, dtype=np.int64)
    first[unit_codes[::-1]] = np.arange(unit_codes.size)[::-1]  # first row of each unit
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
        g = int(unit_codes.max()) + 1
        sizes = np.bincount(unit_codes, minlength=g)
        means = np.bincount(unit_codes, weights=y, minlength=g) / sizes
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
    labels = None if drawn is None else _unit_labels(frame, unit_columns, drawn)
    if drawn is not None and not unit_columns:
        labels = [str(i + 1) for i in range(int(drawn.max()) + 1)]
    view = unit_view(term, y, level_codes, level_labels, drawn, unit_name, labels)
    effects = effect_intervals(
        term, y, level_codes, level_labels, unit_codes, unit_name, confounded
    )
    return Display(view, effects)
