"""How strongly a grouping column lines up with a treatment factor.

``relations.classify`` names the relation of a column to a treatment (nested,
confounded, partial, ...). This module puts numbers on it, so that a column
that is *almost* nested in the treatment (a tank column with two mistyped
rows, a sample code whose letter carries the treatment but for a few rows)
can be reported with its strength and the rows that break it.

* **Adjusted mutual information** (Vinh, Epps & Bailey 2010, JMLR 11:2837-2854):
  the mutual information of the two partitions corrected for chance under the
  hypergeometric model of random labelling, as computed by
  ``sklearn.metrics.adjusted_mutual_info_score`` (arithmetic-mean
  normalisation). 1 for identical partitions, about 0 for unrelated ones.
  Symmetric in the two partitions.
* **Cramér's V** (Cramér 1946, *Mathematical Methods of Statistics*, §21.9):
  ``sqrt(X² / (n (min(r, c) - 1)))`` with Pearson's X² of the r x c
  contingency table, without continuity or small-sample bias correction (as
  ``scipy.stats.contingency.association(method="cramer")``). Undefined (NaN)
  when either partition has a single level. Symmetric.
* **Share aligned** (direction: the column inside the treatment): each level of
  the column is assigned its *majority treatment*, the treatment level holding
  most of its rows; ties go to the treatment level with the lowest code (the
  first in sorted order), as in ``relations.classify``. The share aligned is
  the share of rows whose treatment equals the majority treatment of their
  column level. It is 1 exactly when the column is nested in the treatment
  (every level inside one treatment level), whatever the number of levels.
* **Exceptions**: the 0-based positions (in the arrays passed in) of the rows
  that are not in their column level's majority treatment, i.e. the rows whose
  removal leaves the column nested in the treatment. For the other direction
  (each treatment level inside one column level, a confounded unit) call the
  function with the roles swapped.

Rows where either code is negative (missing) are left out of every number and
are never exceptions.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from replicheck.errors import InputError


@dataclass(frozen=True)
class Alignment:
    """Strength of the alignment of one column with one treatment factor."""

    column: str
    treatment: str
    ami: float  # adjusted mutual information (NaN when no row has both codes)
    cramers_v: float  # bias-uncorrected Cramér's V (NaN when a side has one level)
    share_aligned: float  # share of rows in their column level's majority treatment
    exceptions: tuple[int, ...]  # 0-based row positions that break the alignment
    n_rows: int = 0  # rows with both codes present


def _dense(codes: np.ndarray) -> np.ndarray:
    """Codes renumbered 0..k-1 in sorted order of the original codes."""
    return np.asarray(pd.factorize(codes, sort=True)[0], dtype=np.int64)


def contingency_table(column_codes: np.ndarray, treatment_codes: np.ndarray) -> np.ndarray:
    """Counts of column level (rows) by treatment level (columns); codes 0..k-1, no missing."""
    k_c = int(column_codes.max()) + 1
    k_t = int(treatment_codes.max()) + 1
    table = np.zeros((k_c, k_t), dtype=np.int64)
    np.add.at(table, (column_codes, treatment_codes), 1)
    return table


def cramers_v(table: np.ndarray) -> float:
    """Bias-uncorrected Cramér's V of a contingency table (NaN with a single row or column).

    Empty rows or columns (levels without counts) are dropped first.
    """
    obs = np.asarray(table, dtype=float)
    obs = obs[obs.sum(axis=1) > 0][:, obs.sum(axis=0) > 0]
    n = float(obs.sum())
    r, c = obs.shape
    if n <= 0 or min(r, c) < 2:
        return float("nan")
    expected = np.outer(obs.sum(axis=1), obs.sum(axis=0)) / n
    chi2 = float(((obs - expected) ** 2 / expected).sum())
    return float(np.sqrt(chi2 / (n * (min(r, c) - 1))))


def alignment(
    column_codes: np.ndarray,
    treatment_codes: np.ndarray,
    column: str,
    treatment: str,
) -> Alignment:
    """Alignment of a column with a treatment, both given as integer codes per row.

    Codes need not be contiguous; negative codes mark missing rows, which are
    left out. See the module docstring for the definitions and references.
    """
    col = np.asarray(column_codes)
    trt = np.asarray(treatment_codes)
    if col.shape != trt.shape or col.ndim != 1:
        raise InputError(
            f"alignment of '{column}' with '{treatment}' needs two code arrays of equal length"
        )
    present = (col >= 0) & (trt >= 0)
    positions = np.flatnonzero(present)
    n = int(positions.size)
    if n == 0:
        nan = float("nan")
        return Alignment(column, treatment, nan, nan, nan, (), 0)
    c = _dense(col[present])
    t = _dense(trt[present])
    table = contingency_table(c, t)
    from sklearn.metrics import adjusted_mutual_info_score  # loaded when first needed

    ami = float(adjusted_mutual_info_score(t, c))
    majority = table.argmax(axis=1)  # ties: lowest treatment code
    aligned = t == majority[c]
    exceptions = tuple(int(p) for p in positions[~aligned])
    return Alignment(
        column=column,
        treatment=treatment,
        ami=ami,
        cramers_v=cramers_v(table),
        share_aligned=float(aligned.mean()),
        exceptions=exceptions,
        n_rows=n,
    )
