"""Experimental units hidden in composite sample codes.

Sample codes often spell out where a sample came from: ``F2-T3-07`` is fish 7
of tank 3 under feed 2, ``1988F1`` is plot 1 of variety F in 1988, ``M01`` is
subject 1 of the males. When no column records the tank, the code still does.
This scan cuts such codes into tokens and reads each token position, and each
prefix of positions, as a grouping of the rows.

**Splitting** (:func:`split_code`). A code is cut at the separators ``-``,
``_``, ``.``, ``/``, ``:``, ``|`` and white space; a piece that mixes letters
and digits stays whole, so ``F2-T3-07`` gives ``("F2", "T3", "07")`` and the
letter keeps telling what the number counts. A code without any separator is
cut at the boundaries between letters and digits instead: ``M01`` gives
``("M", "01")`` and ``1988F1`` gives ``("1988", "F", "1")``.

**Which columns.** Text columns other than the response, the treatments and the
excluded ones, with many distinct values (at least 6 and more than twice the
number of treatment cells, so a column holding the treatment's own names never
qualifies) and that split into the same number of tokens, at least 2, for at
least 95 % of the rows with a value (a chosen floor; rows of another length get
no code). Sample codes of repeated measurements repeat on every visit, so the
values need not be distinct per row. Columns that look like dates or times
(``2024-05-01``, ``10:32``) are left to the time scan.

**What is read.** For each token position ``i`` (1-based) the grouping
``col[i]`` and for each prefix the grouping ``col[1..i]`` (tokens 1 to i
together; the full code is the column itself and is not repeated). For each
treatment factor a grouping is

* *the treatment in the code* when it is the treatment's partition, or would
  be but for at most 5 % of the rows (``relations.PARTIAL_SHARE``; each level
  then maps to its own treatment level): a ``code-encodes-treatment`` signal,
  with the exception rows;
* *unit-like* when every one of its values lies inside one treatment level
  (nested), each treatment level holds at least 2 of them and they hold 2 rows
  or more on average: it is derived as a :class:`DerivedGrouping`, unless an
  existing column (alone, or within the levels of a treatment, as local tank
  labels 1 to 3 under every feed are), the treatment, or an earlier token
  grouping already groups the rows the same way (on the rows where both are
  known). A token that restarts within the treatment (tank
  ``T1`` to ``T3`` under every feed) is not nested, but the prefix that joins
  it to the feed token is: the prefix is derived.

**Names and kinds.** The letters of the last token of a grouping (``T`` of
``T3``) are read with the name hints of :mod:`replicheck.structure.names`.
Only a full word or listed abbreviation counts (``TANK3``, ``Cage2``, ``CG2``,
``Rep1``, ``Day3``); single letters such as ``T``, ``C`` or ``P`` are too
ambiguous (tank, cage, pot, plate, plot, patient) and count for nothing. With
a word the grouping is named ``"<word>[<col>:<spec>]"`` (``tank[sample:1..2]``)
and gets the word's kind (container, location, time or process; a block word
gives location, an individual word identifier); without one it is named
``"<col>[<spec>]"`` (``sample_code[1..2]``) with kind ``identifier``, and the
structure stage weighs it on its data. A token with a unit word that restarts
within the treatment and has no nested prefix is derived as it stands, so the
structure stage reads its labels within the treatment as it does for a tank
column.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from replicheck.codebook import column_codes
from replicheck.errors import InputError
from replicheck.partitions import is_nested, same_partition
from replicheck.structure.alignment import alignment
from replicheck.structure.hidden.base import DerivedGrouping, HiddenScan, Signal
from replicheck.structure.names import name_hint
from replicheck.structure.relations import PARTIAL_SHARE, group_codes

MIN_DISTINCT = 6  # fewest distinct codes for a column to be read (a chosen floor)
SAME_LENGTH_SHARE = 0.95  # share of codes that must split into the same number of tokens
MIN_ROWS_PER_GROUP = 2.0  # mean rows per value of a unit-like token
MIN_GROUPS_PER_LEVEL = 2  # values of a unit-like token inside every treatment level

_SEPARATORS = re.compile(r"[-_./:|\s]+")
_LETTER_DIGIT = re.compile(r"(?<=[^\W\d_])(?=\d)|(?<=\d)(?=[^\W\d_])")
_LETTERS = re.compile(r"^[^\W\d_]+")
_DATE_OR_TIME = re.compile(
    r"^\s*(?:\d{4}-\d{1,2}-\d{1,2}|\d{1,2}[./-]\d{1,2}[./-]\d{2,4})\b|\d{1,2}:\d{2}"
)
_KIND_OF_HINT = {
    "container": "container",
    "location": "location",
    "block": "location",
    "time": "time",
    "process": "process",
    "individual": "identifier",
}


def split_code(value: str) -> tuple[str, ...]:
    """Tokens of a composite code.

    Cut at separators (``- _ . / : |`` and white space), keeping letter+digit
    pieces whole (``"F2-T3-07"`` -> ``("F2", "T3", "07")``); a code with no
    separator is cut at letter/digit boundaries instead (``"M01"`` ->
    ``("M", "01")``). Empty pieces are dropped.
    """
    text = str(value).strip()
    pieces = [p for p in _SEPARATORS.split(text) if p]
    if len(pieces) == 1:
        pieces = [p for p in _LETTER_DIGIT.split(pieces[0]) if p]
    return tuple(pieces)


@dataclass(frozen=True)
class _TokenGrouping:
    """One token position or prefix of a code column."""

    spec: str  # "2" (token 2) or "1..2" (tokens 1 to 2)
    last: int  # 0-based index of the last token
    is_prefix: bool
    codes: np.ndarray  # -1 where the code is missing or of another length
    labels: list[str]


def _is_text(series: pd.Series) -> bool:
    return not (
        pd.api.types.is_numeric_dtype(series)
        or pd.api.types.is_bool_dtype(series)
        or pd.api.types.is_datetime64_any_dtype(series)
        or isinstance(series.dtype, pd.PeriodDtype)
        or pd.api.types.is_timedelta64_dtype(series)
    )


def _codes_of_labels(labels: list[str | None]) -> tuple[np.ndarray, list[str]]:
    """Codes of some labels in the sorted order of the distinct ones (None -> -1)."""
    codes, uniques = pd.factorize(pd.Series(labels, dtype=object), sort=True)
    return np.asarray(codes, dtype=np.int64), [str(u) for u in uniques]


def _token_groupings(series: pd.Series, n_cells: int) -> list[_TokenGrouping]:
    """Token positions and prefixes of an identifier-like text column (none if it is not one).

    Everything is decided on the column's distinct values, weighted by how many
    rows hold each, and mapped back to the rows through the column's codes.
    """
    column = column_codes(series)
    # distinct texts (values that print alike, such as 1 and "1", are one code)
    text_codes, texts = _codes_of_labels([str(u) for u in column.uniques])
    known = column.codes >= 0
    row_text = np.where(known, text_codes[np.maximum(column.codes, 0)], -1)
    weight = np.bincount(row_text[known], minlength=len(texts)).astype(float)
    total = float(weight.sum())
    if total == 0 or len(texts) < max(MIN_DISTINCT, 2 * n_cells + 1):
        return []
    dated = np.array([_DATE_OR_TIME.search(t) is not None for t in texts])
    if float(weight[dated].sum()) / total >= SAME_LENGTH_SHARE:
        return []
    split = [split_code(t) for t in texts]
    lengths = np.array([len(toks) for toks in split])
    by_length = np.bincount(lengths, weights=weight)
    m = int(np.argmax(by_length))  # the most frequent length (the shortest among ties)
    if m < 2 or float(by_length[m]) / total < SAME_LENGTH_SHARE:
        return []
    usual = [toks if len(toks) == m else None for toks in split]

    def on_rows(labels: list[str | None]) -> tuple[np.ndarray, list[str]]:
        codes, names = _codes_of_labels(labels)
        return np.where(row_text >= 0, codes[np.maximum(row_text, 0)], -1), names

    out: list[_TokenGrouping] = []
    for i in range(m):
        codes, labels = on_rows([u[i] if u is not None else None for u in usual])
        out.append(_TokenGrouping(str(i + 1), i, False, codes, labels))
        if 0 < i < m - 1:
            codes, labels = on_rows(
                ["-".join(u[: i + 1]) if u is not None else None for u in usual]
            )
            out.append(_TokenGrouping(f"1..{i + 1}", i, True, codes, labels))
    return out


def _on_known(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Both code arrays restricted to rows where both are known, renumbered 0..k-1."""
    ok = (a >= 0) & (b >= 0)
    return (
        np.asarray(pd.factorize(a[ok], sort=True)[0], dtype=np.int64),
        np.asarray(pd.factorize(b[ok], sort=True)[0], dtype=np.int64),
    )


def _same(a: np.ndarray, b: np.ndarray) -> bool:
    if a.size and int(a.min()) >= 0 and int(b.min()) >= 0:
        # both known on every row (and coded 0..k-1): no renumbering needed
        return same_partition(a, b)
    x, y = _on_known(a, b)
    return x.size > 0 and same_partition(x, y)


def _profile(codes: np.ndarray) -> bytes:
    """Sorted group sizes of a complete coding: equal for any two identical partitions."""
    return np.sort(np.bincount(codes)).tobytes()


class _Recorded:
    """The partitions a token grouping must not repeat: every recorded column, each
    treatment, each treatment x column, and the groupings derived so far.

    Whether a grouping repeats one of them is decided on the rows where both are
    known (:func:`_same`). For codings known on every row, the sorted group sizes
    are compared first (identical partitions have the same), and a treatment x
    column coding is formed only for a grouping nested in both the treatment and
    the column (it cannot repeat it otherwise), so that a table of hundreds of
    columns is not crossed column by column.
    """

    def __init__(
        self,
        frame: pd.DataFrame,
        recorded: Sequence[str],
        treatments: Sequence[str],
        trt_codes: dict[str, np.ndarray],
    ) -> None:
        self.frame = frame
        self.columns = {c: group_codes(frame, (c,)) for c in recorded}
        self.complete = {
            c: bool(codes.size and codes.min() >= 0) for c, codes in self.columns.items()
        }
        # For the cheap dismissal in repeats(): each column's known rows, known
        # count and number of distinct values.
        names = list(self.columns)
        self.names = names
        n = len(frame)
        self.known = (
            np.vstack([self.columns[c] >= 0 for c in names]).astype(np.float32)
            if names
            else np.zeros((0, n), dtype=np.float32)
        )
        self.n_known = self.known.sum(axis=1)
        self.n_distinct = np.array(
            [int(self.columns[c].max()) + 1 if self.columns[c].size else 0 for c in names],
            dtype=float,
        )
        self.treatments = list(treatments)
        self.trt_codes = trt_codes
        self.extra: list[np.ndarray] = list(trt_codes.values())
        self.profiles: dict[int, bytes | None] = {}

    def _profile_of(self, codes: np.ndarray) -> bytes | None:
        key = id(codes)
        if key not in self.profiles:
            self.profiles[key] = _profile(codes) if codes.size and codes.min() >= 0 else None
        return self.profiles[key]

    def add(self, codes: np.ndarray) -> None:
        self.extra.append(codes)

    def _same_as(self, codes: np.ndarray, mine: bytes | None, other: np.ndarray) -> bool:
        theirs = self._profile_of(other)
        if mine is not None and theirs is not None:
            return mine == theirs and same_partition(codes, other)
        return _same(codes, other)

    def _possible(self, codes: np.ndarray, rows: np.ndarray) -> np.ndarray:
        """Which columns (or their crossings with a finer coding) could repeat ``codes``
        on ``rows``: on the rows where both are known a column keeps at least its
        number of values less the rows it loses there, and a repeat needs as many
        values as ``codes`` holds (at most). The test costs one matrix product for
        all columns, so a table of thousands of measured columns is dismissed at once.
        """
        if not self.names:
            return np.zeros(0, dtype=bool)
        known = codes[rows]
        groups = float(np.unique(known[known >= 0]).size)
        both = self.known @ ((codes >= 0) & rows).astype(np.float32)
        fewest = self.n_distinct - (self.n_known - both)
        return (both > 0) & (fewest <= groups + 0.5)

    def repeats(self, codes: np.ndarray) -> bool:
        mine = _profile(codes) if codes.size and codes.min() >= 0 else None
        every = np.ones(codes.shape, dtype=bool)
        possible = dict(zip(self.names, self._possible(codes, every), strict=True))
        for c, other in self.columns.items():
            if possible[c] and self._same_as(codes, mine, other):
                return True
        for other in self.extra:
            if self._same_as(codes, mine, other):
                return True
        for t in self.treatments:
            trt = self.trt_codes[t]
            complete = mine is not None and bool(trt.min() >= 0)
            # on rows where everything is known, a repeat of a treatment x column
            # coding is nested in the treatment and in the column
            in_trt = complete and is_nested(codes, trt)
            crossed = dict(zip(self.names, self._possible(codes, trt >= 0), strict=True))
            for c, col in self.columns.items():
                if c == t or not crossed[c]:
                    continue
                if complete and self.complete[c] and not (in_trt and is_nested(codes, col)):
                    continue
                if _same(codes, group_codes(self.frame, (t, c))):
                    return True
        return False


def _word_of(tokens: list[str]) -> tuple[str, str] | None:
    """A unit word spelled by the letters all the tokens share, with its derived-grouping kind."""
    matches = [_LETTERS.match(t) for t in tokens]
    letters = {m.group(0).lower() for m in matches if m is not None}
    if not tokens or None in matches or len(letters) != 1:
        return None
    hint = name_hint(letters.pop())
    if not hint.suggests_unit or hint.word is None:
        return None
    return hint.word, _KIND_OF_HINT[hint.kind]


def _sizes(codes: np.ndarray) -> tuple[int, int]:
    counts = np.bincount(codes[codes >= 0])
    counts = counts[counts > 0]
    return int(counts.min()), int(counts.max())


def _span(lo: int, hi: int) -> str:
    return f"{lo}" if lo == hi else f"{lo} to {hi}"


def _describe(col: str, group: _TokenGrouping) -> str:
    if group.is_prefix:
        return f"tokens {group.spec} of '{col}'"
    return f"token {group.spec} of '{col}'"


def _examples(labels: list[str], limit: int = 4) -> str:
    shown = ", ".join(labels[:limit])
    return shown + (", ..." if len(labels) > limit else "")


def _treatment_signal(
    col: str, group: _TokenGrouping, trt: str, trt_codes: np.ndarray
) -> Signal | None:
    """A code-encodes-treatment signal when the grouping is (nearly) the treatment's partition."""
    c, t = _on_known(group.codes, trt_codes)
    if c.size == 0 or int(c.max()) != int(t.max()) or int(c.max()) == 0:
        return None
    what = f"{_describe(col, group)} (values {_examples(group.labels)})"
    if same_partition(c, t):
        return Signal(
            "code-encodes-treatment",
            (col, trt),
            1.0,
            None,
            f"{what} matches '{trt}' level for level: the code carries the treatment",
        )
    al = alignment(group.codes, trt_codes, col, trt)
    limit = max(1, int(np.floor(PARTIAL_SHARE * al.n_rows)))
    if not 0 < len(al.exceptions) <= limit:
        return None
    # every level of the token must map to its own treatment level
    ok = (group.codes >= 0) & (trt_codes >= 0)
    keep = ok.copy()
    keep[list(al.exceptions)] = False
    if not same_partition(*_on_known(np.where(keep, group.codes, -1), trt_codes)):
        return None
    rows = [p + 1 for p in al.exceptions]
    shown = ", ".join(str(r) for r in rows[:10]) + (" ..." if len(rows) > 10 else "")
    noun = "row" if len(rows) == 1 else "rows"
    return Signal(
        "code-encodes-treatment",
        (col, trt),
        al.share_aligned,
        None,
        f"{what} matches '{trt}' level for level but for {len(rows)} {noun} "
        f"(data {noun} {shown}): the code carries the treatment, or those rows were "
        f"mislabelled",
    )


def _unit_like(group: _TokenGrouping, trt_codes: np.ndarray) -> tuple[int, float] | None:
    """(fewest values per level, mean rows per value) when nested and unit-like, else None."""
    c, t = _on_known(group.codes, trt_codes)
    if c.size == 0 or not is_nested(c, t):
        return None
    k = int(c.max()) + 1
    per_level = np.bincount(t[np.unique(c, return_index=True)[1]], minlength=int(t.max()) + 1)
    mean_rows = c.size / k
    if int(per_level.min()) < MIN_GROUPS_PER_LEVEL or mean_rows < MIN_ROWS_PER_GROUP:
        return None
    return int(per_level.min()), mean_rows


def _restarts(group: _TokenGrouping, trt_codes: np.ndarray) -> bool:
    """Whether the grouping's values repeat under several treatment levels, several rows each."""
    c, t = _on_known(group.codes, trt_codes)
    if c.size == 0 or int(c.max()) == 0 or is_nested(c, t):
        return False
    cells = group_codes(pd.DataFrame({"c": c, "t": t}), ("c", "t"))
    return c.size / (int(cells.max()) + 1) >= MIN_ROWS_PER_GROUP


def _validate(frame: pd.DataFrame, response: str, treatments: Sequence[str]) -> None:
    if not isinstance(frame, pd.DataFrame):
        raise InputError("the code scan needs a data frame")
    if response not in frame.columns:
        raise InputError(f"response column '{response}' is not in the data")
    if not treatments:
        raise InputError("the code scan needs at least one treatment column")
    for t in treatments:
        if t not in frame.columns:
            raise InputError(f"treatment column '{t}' is not in the data")


def scan_codes(
    frame: pd.DataFrame,
    response: str,
    treatments: Sequence[str],
    *,
    exclude: Sequence[str] = (),
) -> HiddenScan:
    """Read composite sample codes for the treatment and for hidden unit-like groupings.

    See the module docstring for the rules. Returns derived groupings (codes per
    row, -1 where a row's code is missing or of another length) and
    ``code-encodes-treatment`` signals.
    """
    _validate(frame, response, treatments)
    skip = {response, *treatments, *exclude}
    trt_codes = {t: group_codes(frame, (t,)) for t in treatments}
    cells = group_codes(frame, tuple(treatments))
    n_cells = int(cells.max()) + 1 if cells.size and cells.max() >= 0 else 0
    known: _Recorded | None = None
    derived: list[DerivedGrouping] = []
    signals: list[Signal] = []
    for col in frame.columns:
        if col in skip or not _is_text(frame[col]):
            continue
        name = str(col)
        groups = _token_groupings(frame[col], n_cells)
        if not groups:
            continue
        if known is None:
            recorded = [str(c) for c in frame.columns if c != response]
            known = _Recorded(frame, recorded, treatments, trt_codes)
        signalled: set[str] = set()
        nested_ends: set[int] = set()
        alone = {g.last: g for g in groups if not g.is_prefix}
        for group in groups:
            if int(group.codes.max()) <= 0:
                continue  # no code of the usual length, or a constant token
            for t in treatments:
                if t in signalled:
                    continue
                sig = _treatment_signal(name, group, t, trt_codes[t])
                if sig is not None:
                    signals.append(sig)
                    signalled.add(t)
            if known.repeats(group.codes):
                continue
            last = alone[group.last]
            for t in treatments:
                found = _unit_like(group, trt_codes[t])
                if found is None:
                    continue
                restart = group.is_prefix and _restarts(last, trt_codes[t])
                word = _word_of(last.labels)
                derived.append(_derive(name, group, t, word, found, restart))
                known.add(group.codes)
                nested_ends.add(group.last)
                break
        for group in alone.values():
            if group.last in nested_ends or int(group.codes.max()) <= 0:
                continue
            word = _word_of(group.labels)
            if word is None or known.repeats(group.codes):
                continue
            parent = next((t for t in treatments if _restarts(group, trt_codes[t])), None)
            if parent is None:
                continue
            derived.append(_derive_restarting(name, group, parent, word))
            known.add(group.codes)
    return HiddenScan(tuple(derived), tuple(signals))


def _derive(
    col: str,
    group: _TokenGrouping,
    trt: str,
    word: tuple[str, str] | None,
    found: tuple[int, float],
    restart: bool,
) -> DerivedGrouping:
    per_level, mean_rows = found
    k = len(group.labels)
    lo, hi = _sizes(group.codes)
    name = f"{word[0]}[{col}:{group.spec}]" if word else f"cluster[{col}:{group.spec}]"
    how = (
        f"{_describe(col, group)} (e.g. '{group.labels[0]}') form {k} groups of "
        f"{_span(lo, hi)} rows, each inside one level of '{trt}' "
        f"(at least {per_level} per level)"
    )
    if restart:
        how += (
            f"; token {group.last + 1} alone repeats under several levels of '{trt}', "
            f"so it counts within the earlier tokens"
        )
    strength = {
        "n_groups": float(k),
        "mean_rows": float(mean_rows),
        "share_coded": float(np.mean(group.codes >= 0)),
    }
    return DerivedGrouping(
        name=name,
        codes=group.codes.copy(),
        sources=(col,),
        kind=word[1] if word else "identifier",
        how=how,
        strength=strength,
    )


def _derive_restarting(
    col: str, group: _TokenGrouping, trt: str, word: tuple[str, str]
) -> DerivedGrouping:
    k = len(group.labels)
    return DerivedGrouping(
        name=f"{word[0]}[{col}:{group.spec}]",
        codes=group.codes.copy(),
        sources=(col,),
        kind=word[1],
        how=(
            f"{_describe(col, group)} (values {_examples(group.labels)}) names a {word[0]}; "
            f"its {k} labels repeat under several levels of '{trt}', so each is likely "
            f"local to a level"
        ),
        strength={"n_groups": float(k), "share_coded": float(np.mean(group.codes >= 0))},
    )
