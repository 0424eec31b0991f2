"""Model terms from the treatment columns: main effects and their interactions."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from itertools import combinations

import numpy as np
import pandas as pd

SEPARATOR = ":"


@dataclass(frozen=True)
class Term:
    """A model term: one treatment column, or the interaction of several."""

    name: str
    factors: tuple[str, ...]

    @property
    def is_interaction(self) -> bool:
        return len(self.factors) > 1


def interaction_levels(data: pd.DataFrame, factors: Sequence[str]) -> pd.Series:
    """The levels of an interaction contrast: rows alike in its sum-to-zero coded columns.

    For factors with more than two levels these are the combinations of levels;
    for two-level factors the contrast has two levels (the sign of the product
    of the +1/-1 codes), so that an interaction the design confounds with
    blocks (N:P:K constant within every block) is seen as constant there.
    """
    n = len(data)
    coded = [pd.factorize(data[f], sort=True) for f in factors]
    sizes = [max(len(uniques) - 1, 1) for _, uniques in coded]
    if n * float(np.prod(sizes, dtype=float)) > _DENSE_CELLS:
        return _interaction_keys(data.index, [(c, len(u)) for c, u in coded])
    block = np.ones((n, 1))
    for codes, uniques in coded:
        k = len(uniques)
        cols = np.zeros((n, max(k - 1, 1)))
        for j in range(k - 1):
            cols[:, j] = (codes == j).astype(float) - (codes == k - 1)
        block = (block[:, :, None] * cols[:, None, :]).reshape(n, -1)
    keys = [" ".join(f"{v:+.0f}" for v in row) for row in block]
    return pd.Series(keys, index=data.index)


#: Cells of the dense contrast product above which the same partition is formed
#: from the levels directly (a term of many-level factors).
_DENSE_CELLS = 5_000_000


def _interaction_keys(index: pd.Index, coded: Sequence[tuple[np.ndarray, int]]) -> pd.Series:
    """The partition of :func:`interaction_levels` without the dense product.

    The row of the contrast product is the Kronecker product of each factor's
    contrast vector. A factor of three or more levels has a distinct vector for
    each level, none the negative of another, so the product fixes its level; a
    two-level factor's vector is +1 or -1, and only the product of these signs
    is fixed. So the partition is by the sign of the two-level factors' product
    and the levels of the others; a factor of one level makes the term constant,
    and rows missing a factor (an audit's frame has none) are put together.
    """
    n = len(index)
    if any(k <= 1 for _, k in coded):
        return pd.Series(["0"] * n, index=index)
    missing = np.zeros(n, dtype=bool)
    sign = np.ones(n, dtype=np.int64)
    parts: list[np.ndarray] = []
    for codes, k in coded:
        missing |= codes < 0
        if k == 2:
            sign *= np.where(codes == 0, 1, -1)
        else:
            parts.append(codes)
    table = np.column_stack([sign, *parts]) if parts else sign[:, None]
    keys = [" ".join(map(str, row)) for row in table.tolist()]
    return pd.Series(["0" if m else key for m, key in zip(missing, keys, strict=True)], index=index)


def unreplicated(data: pd.DataFrame, treatments: Sequence[str]) -> bool:
    """Whether every combination of the treatments occurs at most once (no replication)."""
    if len(treatments) < 2:
        return False
    return int(data[list(treatments)].drop_duplicates().shape[0]) == len(data)


def drop_unreplicated(
    data: pd.DataFrame, terms: Sequence[Term], treatments: Sequence[str]
) -> tuple[list[Term], list[Term]]:
    """Without replication, the highest interaction is the only error: drop it from the model.

    Returns the terms kept and the interaction terms dropped (they cannot be
    tested; their variation is the residual of the main-effects model).
    """
    if not unreplicated(data, treatments):
        return list(terms), []
    top = len(treatments)
    kept = [t for t in terms if len(t.factors) < top]
    dropped = [t for t in terms if len(t.factors) == top]
    if not dropped:
        dropped = [Term(SEPARATOR.join(treatments), tuple(treatments))]
    return kept, dropped


def model_terms(data: pd.DataFrame, treatments: Sequence[str]) -> list[Term]:
    """Main effects, and every interaction when all combinations of levels occur.

    A factorial with empty cells cannot estimate its full interaction; such
    designs are modelled with main effects only.
    """
    terms = [Term(t, (t,)) for t in treatments]
    if len(treatments) < 2:
        return terms
    cells = data[list(treatments)].drop_duplicates().shape[0]
    full = 1
    for t in treatments:
        full *= int(data[t].nunique())
    if cells < full:
        return terms
    for size in range(2, len(treatments) + 1):
        for combo in combinations(treatments, size):
            terms.append(Term(SEPARATOR.join(combo), tuple(combo)))
    return terms
