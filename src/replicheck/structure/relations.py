"""Relations between a grouping column and a treatment factor.

A relation is read off the contingency of the two partitions of the rows:

* ``alias``: the same partition as the treatment, read as another label of it;
* ``confounded``: every treatment level lies in exactly one level of the column;
* ``nested``: every level of the column lies inside one treatment level and
  treatment levels hold more than one of them;
* ``crossed``: levels of the column hold several treatment levels (a block, a
  subject that saw every treatment, a day);
* ``partial``: nested or confounded except for a few rows (entry errors or a
  mixed design); the rows are reported;
* ``unrelated``: none of the above.

The vocabulary of nesting and crossing follows Bailey (2008) *Design of
Comparative Experiments*, ch. 10, and Lohr (1995) The American Statistician
49:16-23.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from replicheck.codebook import column_codes, combined_codes
from replicheck.numbers import format_number
from replicheck.structure.alignment import alignment, contingency_table, cramers_v
from replicheck.vocab import FactorRelationName, RelationName

# Common practice (no published threshold): at most 5% of the rows, and at
# least one, may break an otherwise clean nesting before we call it partial.
PARTIAL_SHARE = 0.05
# A near-nesting needs a large association (see _real_alignment).
PARTIAL_MIN_V = 0.5


@dataclass(frozen=True)
class Contingency:
    """Counts of the two partitions of the same rows."""

    n_rows: int
    n_column_levels: int
    n_treatment_levels: int
    treatments_per_level: np.ndarray  # distinct treatment levels inside each column level
    levels_per_treatment: np.ndarray  # distinct column levels inside each treatment level


@dataclass(frozen=True)
class Relation:
    """How one column relates to one treatment factor."""

    column: str
    treatment: str
    relation: RelationName
    n_levels: int
    levels_per_treatment: dict[str, int]
    exceptions: tuple[int, ...]  # 1-based data-row numbers that break a partial alignment
    detail: str
    strength: dict[str, float] | None = None  # partial alignment: ami, cramers_v, share_aligned


def codes_of(values: pd.Series) -> tuple[np.ndarray, list[str]]:
    """Integer codes 0..k-1 and level labels of a column (missing -> -1)."""
    cc = column_codes(values)
    return cc.codes, [str(u) for u in cc.uniques]


def group_codes(data: pd.DataFrame, columns: Sequence[str]) -> np.ndarray:
    """Codes 0..k-1 of the observed combinations of several columns (vectorised).

    A row missing any of the columns gets -1. The codes are read-only (shared
    within an audit, :mod:`replicheck.codebook`).
    """
    return combined_codes([data[c] for c in columns])


def _pair_counts(col: np.ndarray, trt: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The (column, treatment) code pairs that occur, and how many rows hold each."""
    k_t = int(trt.max()) + 1 if trt.size else 1
    k_c = int(col.max()) + 1 if col.size else 1
    pair = col.astype(np.int64, copy=False) * k_t + trt
    if k_c * k_t <= 4 * pair.size + 1024:
        counts = np.bincount(pair, minlength=k_c * k_t)
        seen = np.flatnonzero(counts)
        return seen // k_t, seen % k_t, counts[seen]
    codes, seen = pd.factorize(pair)
    return seen // k_t, seen % k_t, np.bincount(codes)


def contingency(col: np.ndarray, trt: np.ndarray) -> Contingency:
    """Contingency summary of two code arrays of equal length without missing codes."""
    k_c = int(col.max()) + 1 if col.size else 0
    k_t = int(trt.max()) + 1 if trt.size else 0
    pc, pt, _ = _pair_counts(col, trt)
    t_per_c = np.bincount(pc, minlength=k_c)
    c_per_t = np.bincount(pt, minlength=k_t)
    return Contingency(col.size, k_c, k_t, t_per_c, c_per_t)


def _misses(inner: np.ndarray, counts: np.ndarray, k_inner: int) -> int:
    """Rows outside the most frequent partner level of their ``inner`` level, from pair counts."""
    best = np.zeros(k_inner, dtype=np.int64)
    np.maximum.at(best, inner, counts)
    return int(counts.sum() - best.sum())


def _majority_exceptions(inner: np.ndarray, outer: np.ndarray) -> np.ndarray:
    """Rows whose ``outer`` code is not the majority ``outer`` code of their ``inner`` level."""
    k_o = int(outer.max()) + 1
    k_i = int(inner.max()) + 1
    pair = inner.astype(np.int64) * k_o + outer
    if k_i * k_o <= 4 * pair.size + 1024:
        counts = np.bincount(pair, minlength=k_i * k_o).reshape(k_i, k_o)
        majority = counts.argmax(axis=1)
    else:  # too many combinations for a table: count the pairs that occur
        codes, seen = pd.factorize(pair)
        n_pair = np.bincount(codes)
        p_in, p_out = seen // k_o, seen % k_o
        # per inner level the most frequent outer level, the smallest among ties
        order = np.lexsort((p_out, -n_pair, p_in))
        lead = order[np.concatenate([[True], p_in[order][1:] != p_in[order][:-1]])]
        majority = np.zeros(k_i, dtype=np.int64)
        majority[p_in[lead]] = p_out[lead]
    return np.flatnonzero(outer != majority[inner])


def _real_alignment(col: np.ndarray, trt: np.ndarray, shape: str) -> bool:
    """Whether a near-nesting is a real association, not a nearly constant column.

    A column with one value on all but a few rows is "confounded but for a few
    rows" with any treatment (every level sits in its common value), and a
    column of nearly distinct values is "nested but for a few rows" with any.
    Real alignment needs replicated levels (half the rows in levels of two or
    more), a large association, Cramer's V of at least 0.5 (large for
    a 2-level table: Cohen 1988, Statistical Power Analysis, ch. 7), and, for
    the confounded shape, treatment levels that sit in different values.
    """
    sizes = np.bincount(col)
    if float(sizes[sizes > 1].sum()) < 0.5 * col.size:
        return False  # most rows alone in their level: aligned by construction, not by design
    table = contingency_table(col, trt)
    if not cramers_v(table) >= PARTIAL_MIN_V:
        return False
    if shape == "confounded":
        return int(np.unique(table.argmax(axis=0)).size) >= 2
    return True


def classify(
    column: str,
    treatment: str,
    col_values: pd.Series,
    trt_values: pd.Series,
) -> Relation:
    """Classify the relation of ``column`` to ``treatment`` on rows where both are present.

    The series share an index; the index + 1 is reported as the data-row number
    of exceptions.
    """
    ok = col_values.notna() & trt_values.notna()
    cv, tv = (col_values, trt_values) if ok.all() else (col_values[ok], trt_values[ok])
    col, _ = codes_of(cv)
    trt, t_labels = codes_of(tv)
    ct = contingency(col, trt)
    lpt = {t_labels[i]: int(n) for i, n in enumerate(ct.levels_per_treatment)}
    n_levels = ct.n_column_levels

    def rel(name: RelationName, detail: str, exceptions: tuple[int, ...] = ()) -> Relation:
        if name != "partial":
            return Relation(column, treatment, name, n_levels, lpt, exceptions, detail)

        al = alignment(col, trt, column, treatment)
        strength = {
            "share_aligned": al.share_aligned,
            "cramers_v": al.cramers_v,
            "ami": al.ami,
        }
        detail += (
            f" ({al.share_aligned:.0%} of rows aligned; Cramer's V {format_number(al.cramers_v)}, "
            f"adjusted mutual information {format_number(al.ami)})"
        )
        return Relation(column, treatment, name, n_levels, lpt, exceptions, detail, strength)

    within_one = bool(np.all(ct.treatments_per_level == 1))
    one_per_trt = bool(np.all(ct.levels_per_treatment == 1))
    if within_one and one_per_trt:
        return rel(
            "confounded",
            f"each level of '{treatment}' sits in exactly one level of '{column}' and vice versa",
        )
    if within_one:
        lo, hi = int(ct.levels_per_treatment.min()), int(ct.levels_per_treatment.max())
        span = f"{lo}" if lo == hi else f"{lo} to {hi}"
        return rel(
            "nested",
            f"each level of '{column}' lies inside one level of '{treatment}'; "
            f"each level of '{treatment}' holds {span} of them",
        )
    if one_per_trt:
        return rel(
            "confounded",
            f"each level of '{treatment}' lies inside one level of '{column}', "
            f"which holds up to {int(ct.treatments_per_level.max())} treatment levels",
        )
    limit = max(1, int(np.floor(PARTIAL_SHARE * ct.n_rows)))
    index = cv.index.to_numpy()
    pc, pt, n_pair = _pair_counts(col, trt)
    miss = {
        "nested": _misses(pc, n_pair, ct.n_column_levels),
        "confounded": _misses(pt, n_pair, ct.n_treatment_levels),
    }
    for inner, outer, shape in ((col, trt, "nested"), (trt, col, "confounded")):
        if not 0 < miss[shape] <= limit:
            continue  # the rows themselves are listed only for a near-clean nesting
        bad = _majority_exceptions(inner, outer)
        if 0 < bad.size <= limit and _real_alignment(col, trt, shape):
            rows = tuple(int(index[i]) + 1 for i in bad)
            shown = ", ".join(str(r) for r in rows[:10]) + (" ..." if len(rows) > 10 else "")
            return rel(
                "partial",
                f"'{column}' would be {shape} with '{treatment}' but for {bad.size} "
                f"{'row' if bad.size == 1 else 'rows'} (data "
                f"{'row' if bad.size == 1 else 'rows'} {shown})",
                rows,
            )
    if np.mean(ct.treatments_per_level >= 2) >= 0.5:
        full = bool(np.all(ct.treatments_per_level == ct.n_treatment_levels))
        return rel(
            "crossed",
            f"levels of '{column}' hold several levels of '{treatment}'"
            + (" (every level sees every treatment)" if full else ""),
        )
    return rel("unrelated", f"'{column}' shows no simple relation to '{treatment}'")


@dataclass(frozen=True)
class PairRelation:
    """How two factors of the design relate."""

    first: str
    second: str
    relation: FactorRelationName


def pair_relation(first: str, second: str, a: pd.Series, b: pd.Series) -> PairRelation:
    """The relation of factor ``first`` to factor ``second`` on rows where both are present.

    ``aliased``: the same partition; ``nested``: every level of the first lies
    inside one level of the second; ``contains``: the reverse; ``crossed``:
    levels of each hold several levels of the other; ``partially aliased``:
    nested or contained but for a few rows.
    """
    r = classify(first, second, a, b)
    same = r.relation == "confounded" and r.n_levels == len(r.levels_per_treatment)
    names: dict[RelationName, FactorRelationName] = {
        "nested": "nested",
        "confounded": "aliased" if same else "contains",
        "partial": "partially aliased",
        "crossed": "crossed",
        "unrelated": "unrelated",
    }
    return PairRelation(first, second, names[r.relation])
