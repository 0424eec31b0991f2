"""Hidden groupings: units that no column names outright.

:func:`scan_hidden` runs every scan over the analysed rows and returns the
groupings they derived (each a new candidate column for the structure stage)
and the signals they measured (treatment clumped in time, space or row order;
residual correlation along time, space or order; sample codes that encode the
treatment). A derived grouping that repeats a column's partition, or another
derived grouping's, is dropped; one that repeats a treatment's is kept (a
treatment applied on its own day is confounded with that day).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from replicheck.codebook import column_codes
from replicheck.partitions import is_nested, same_partition
from replicheck.structure.hidden.base import DerivedGrouping, HiddenScan, Signal
from replicheck.structure.hidden.codes import scan_codes
from replicheck.structure.hidden.covariates import scan_covariates
from replicheck.structure.hidden.order import scan_order
from replicheck.structure.hidden.space import scan_space
from replicheck.structure.hidden.time import scan_time

__all__ = ["DerivedGrouping", "HiddenScan", "Signal", "derived_column", "scan_hidden"]


def _codes(series: pd.Series) -> np.ndarray | None:
    """Integer codes of a fully observed column, else None."""
    codes = column_codes(series).codes
    if (codes < 0).any():
        return None
    return codes


def _repeats(g: DerivedGrouping, known: Sequence[tuple[str, np.ndarray]]) -> bool:
    """Whether the grouping repeats a column's partition (its own source column aside: a
    covariate read once per unit gives the units' partition itself, but only the derived
    reading says that it marks units)."""
    if np.any(g.codes < 0):
        return False
    return any(same_partition(g.codes, k) for name, k in known if name not in g.sources)


def scan_hidden(
    frame: pd.DataFrame,
    response: str,
    treatments: Sequence[str],
    *,
    seed: int,
    dayfirst: bool | None = None,
    order: str | None = None,
    exclude: Sequence[str] = (),
) -> HiddenScan:
    """Every hidden-grouping scan over ``frame`` (the analysed rows)."""
    scans = (
        scan_time(frame, response, treatments, dayfirst=dayfirst, exclude=exclude),
        scan_order(frame, response, treatments, order=order, seed=seed, exclude=exclude),
        scan_space(frame, response, treatments, seed=seed, exclude=exclude),
        scan_codes(frame, response, treatments, exclude=exclude),
        scan_covariates(frame, response, treatments, exclude=exclude),
    )
    known = [
        (str(col), c)
        for col in frame.columns
        if col != response
        and col not in treatments
        and (c := _codes(frame[col])) is not None
        and 1 < int(c.max()) + 1 < len(frame)
    ]
    derived: list[DerivedGrouping] = []
    for scan in scans:
        for g in scan.derived:
            if g.name in frame.columns or _repeats(g, known):
                continue
            derived.append(g)
            if not np.any(g.codes < 0):
                known.append((g.name, g.codes))
    derived = _without_weak_runs(derived, frame, treatments)
    signals = tuple(s for scan in scans for s in scan.signals)
    return HiddenScan(tuple(derived), signals)


def _without_weak_runs(
    derived: list[DerivedGrouping], frame: pd.DataFrame, treatments: Sequence[str]
) -> list[DerivedGrouping]:
    """Drop runs in the file order when another derived grouping already groups the rows
    within a treatment: the file order is the weakest evidence of a unit (listing rows day
    by day makes the days' runs; the days are the better reading)."""
    runs = [g for g in derived if g.name == "run[file order]"]
    if not runs:
        return derived
    others = [g for g in derived if g.name != "run[file order]" and not np.any(g.codes < 0)]
    for t in treatments:
        codes = _codes(frame[t])
        if codes is None:
            continue
        k = int(codes.max()) + 1
        if any(
            k < int(g.codes.max()) + 1 < len(frame) and is_nested(g.codes, codes) for g in others
        ):
            return [g for g in derived if g.name != "run[file order]"]
    return derived


def derived_column(g: DerivedGrouping, index: pd.Index) -> pd.Series:
    """The grouping as a categorical text column (missing where the grouping is unknown),
    built from the codes without a pass of Python over the rows."""
    word = g.name.split("[", 1)[0]
    k = int(g.codes.max()) + 1 if g.codes.size else 0
    labels = pd.Categorical.from_codes(
        np.where(g.codes < 0, -1, g.codes).astype(np.int64),
        categories=pd.Index([f"{word} {c + 1}" for c in range(k)]),
    )
    return pd.Series(labels, index=index, name=g.name)
