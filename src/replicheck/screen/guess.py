"""Propose a response and a treatment for a data file that comes without a spec.

The proposal is a ranking by heuristics (common practice when reading an
unfamiliar data table, not a published method), each candidate with a
confidence in [0, 1] and the reason in words:

* a **response** is a numeric column with many distinct values (a
  measurement); identifiers, row counters, dates and columns whose name says
  unit, place, time or identifier are left out;
* a **treatment** is a column with 2 to 12 levels, each on at least two rows;
  a name such as treatment, group, condition, dose, diet, feed, genotype,
  strain or arm raises the confidence; columns whose name says unit or
  identifier (tank, cage, plate, subject, id, ...) are left out, and
  descriptors of the subjects (sex, age) are ranked low.

The confidence orders candidates and decides whether a guess is made at all
(:data:`MIN_CONFIDENCE`); it is not a probability.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np
import pandas as pd
from pandas.api.types import (
    is_bool_dtype,
    is_datetime64_any_dtype,
    is_numeric_dtype,
    is_timedelta64_dtype,
)

from replicheck.structure.names import name_hint, tokens

#: Most levels a guessed treatment may have.
MAX_LEVELS = 12
#: Least confidence of both the response and the treatment for a guess to be made.
MIN_CONFIDENCE = 0.3

TREATMENT_WORDS: frozenset[str] = frozenset(
    {
        "treatment",
        "treat",
        "trt",
        "tx",
        "group",
        "grp",
        "condition",
        "cond",
        "dose",
        "dosage",
        "diet",
        "feed",
        "genotype",
        "strain",
        "arm",
        "drug",
        "regime",
        "regimen",
        "exposure",
        "therapy",
        "intervention",
        "variety",
        "cultivar",
        "fertiliser",
        "fertilizer",
        "medium",
        "line",
        "manipulation",
        "supplement",
        "additive",
        "level",
    }
)
RESPONSE_WORDS: frozenset[str] = frozenset(
    {
        "weight",
        "wt",
        "mass",
        "length",
        "height",
        "width",
        "diameter",
        "area",
        "volume",
        "yield",
        "growth",
        "biomass",
        "size",
        "response",
        "value",
        "score",
        "count",
        "concentration",
        "conc",
        "rate",
        "activity",
        "expression",
        "intensity",
        "density",
        "abundance",
        "survival",
        "ratio",
        "percent",
        "pct",
        "content",
        "measure",
        "measurement",
    }
)
#: Descriptors of the subjects: rarely the treatment of an experiment.
COVARIATE_WORDS: frozenset[str] = frozenset({"sex", "gender", "age", "male", "female"})
_INDEX_WORDS = frozenset({"rownames", "rowname", "unnamed", "index", "id"})
_DATE_LIKE = re.compile(r"^\s*\d{1,4}[-/.]\d{1,2}[-/.]\d{1,4}([ T]\d{1,2}:\d{2}(:\d{2})?)?\s*$")


@dataclass(frozen=True)
class Candidate:
    """One proposed column."""

    column: str
    confidence: float
    reason: str


@dataclass(frozen=True)
class Proposal:
    """Ranked candidates, best first, and the guess made from them."""

    responses: tuple[Candidate, ...]
    treatments: tuple[Candidate, ...]

    @property
    def best(self) -> tuple[Candidate, Candidate] | None:
        """The best response and the best treatment in another column, when both are
        at least :data:`MIN_CONFIDENCE`; else None."""
        if not self.responses or self.responses[0].confidence < MIN_CONFIDENCE:
            return None
        response = self.responses[0]
        for t in self.treatments:
            if t.column != response.column:
                return (response, t) if t.confidence >= MIN_CONFIDENCE else None
        return None

    def describe(self, limit: int = 3) -> str:
        """One line: ``response: weight (0.95), ...; treatment: group (0.88), ...``."""

        def part(label: str, cands: tuple[Candidate, ...]) -> str:
            if not cands:
                return f"{label}: none"
            shown = ", ".join(f"{c.column} ({c.confidence:.2f})" for c in cands[:limit])
            return f"{label}: {shown}"

        return f"{part('response', self.responses)}; {part('treatment', self.treatments)}"


def _words(name: str) -> set[str]:
    return set(tokens(name)) | {str(name).strip().lower()}


def _excluded(name: str) -> str | None:
    """Why a column's name rules it out as response or treatment, or None."""
    words = _words(name)
    if words & _INDEX_WORDS:
        return "an index or identifier"
    hint = name_hint(name)
    if hint.kind == "identifier":
        return "an identifier"
    if hint.suggests_unit:
        return f"a {hint.kind} ({hint.word})"
    return None


def _is_counter(values: np.ndarray) -> bool:
    """Whole numbers that are all different, or that step by one in file order."""
    if values.size < 3 or not np.all(np.mod(values, 1) == 0):
        return False
    if np.unique(values).size == values.size:
        return True
    return bool(np.all(np.diff(values) == 1))


def _date_like(series: pd.Series) -> bool:
    text = series.dropna().astype(str)
    return bool(len(text)) and bool(text.map(lambda v: bool(_DATE_LIKE.match(v))).all())


def _response(name: str, series: pd.Series) -> Candidate | None:
    if is_bool_dtype(series) or not is_numeric_dtype(series):
        return None
    if _excluded(name) is not None:
        return None
    values = series.dropna().to_numpy(dtype=float)
    values = values[np.isfinite(values)]
    distinct = int(np.unique(values).size)
    if values.size < 4 or distinct < 3 or _is_counter(values):
        return None
    fractional = bool(np.any(np.mod(values, 1) != 0))
    named = bool(_words(name) & RESPONSE_WORDS)
    richness = min(1.0, distinct / 20)
    score = 0.2 + 0.5 * richness + 0.15 * fractional + 0.15 * named
    if distinct <= MAX_LEVELS and not fractional and not named:
        score *= 0.6  # a few whole numbers: more like a dose or a level code
    parts = [f"numeric, {distinct} distinct values in {values.size} rows"]
    if fractional:
        parts.append("fractional values")
    if named:
        parts.append("the name suggests a measurement")
    return Candidate(name, round(min(score, 0.95), 2), "; ".join(parts))


def _treatment(name: str, series: pd.Series) -> Candidate | None:
    if is_datetime64_any_dtype(series) or is_timedelta64_dtype(series):
        return None
    if _excluded(name) is not None:
        return None
    present = series.dropna()
    if present.empty:
        return None
    counts = present.astype(str).value_counts()
    k = len(counts)
    if not 2 <= k <= MAX_LEVELS or int(counts.min()) < 2:
        return None
    if not is_numeric_dtype(series) and _date_like(present):
        return None
    words = _words(name)
    named = bool(words & TREATMENT_WORDS)
    covariate = bool(words & COVARIATE_WORDS)
    balance = float(counts.min()) / float(counts.max())
    score = 0.35 + 0.45 * named - 0.2 * covariate + 0.1 * balance
    if not is_numeric_dtype(series) or is_bool_dtype(series):
        score += 0.05  # labels rather than numbers
    sizes = ", ".join(str(int(c)) for c in counts.sort_index().to_numpy()[:MAX_LEVELS])
    parts = [f"{k} levels ({sizes} rows)"]
    if named:
        parts.append("the name suggests a treatment")
    if covariate:
        parts.append("the name suggests a descriptor of the subjects, not a treatment")
    return Candidate(name, round(max(0.0, min(score, 0.95)), 2), "; ".join(parts))


def propose(data: pd.DataFrame) -> Proposal:
    """Rank the columns of ``data`` as response and treatment candidates.

    Ties keep the column order of the file, so the proposal depends only on the data.

    Examples
    --------
    >>> df = pd.DataFrame({"id": range(8), "group": list("aabbaabb"),
    ...                    "weight": [4.1, 5.2, 3.9, 6.3, 4.4, 5.9, 4.8, 6.1]})
    >>> p = propose(df)
    >>> p.responses[0].column, p.treatments[0].column
    ('weight', 'group')
    """
    responses: list[tuple[float, int, Candidate]] = []
    treatments: list[tuple[float, int, Candidate]] = []
    for i, col in enumerate(data.columns):
        name = str(col)
        series = data.iloc[:, i]
        r = _response(name, series)
        if r is not None:
            responses.append((-r.confidence, i, r))
        t = _treatment(name, series)
        if t is not None:
            treatments.append((-t.confidence, i, t))
    return Proposal(
        tuple(c for *_, c in sorted(responses, key=lambda x: x[:2])),
        tuple(c for *_, c in sorted(treatments, key=lambda x: x[:2])),
    )
