"""Model terms from the treatment columns: main effects and their interactions."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from itertools import combinations

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


def term_values(data: pd.DataFrame, factors: Sequence[str]) -> pd.Series:
    """The levels of a term: a treatment column, or the observed combinations of several."""
    if len(factors) == 1:
        return data[factors[0]]
    parts = [data[f].astype(str) for f in factors]
    out = parts[0]
    for part in parts[1:]:
        out = out + " & " + part
    return out


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
