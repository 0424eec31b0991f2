"""Wide layouts to long form: one column per replicate, time or unit.

A supplement often gives one row per animal or per measurement index and one
column per replicate, time point or unit (``rep1 rep2 rep3``, ``day0 day7
day14``, ``tank A`` ... ``tank F``). The audit needs one row per observation
with the replicate, time or unit in a column of its own, where it can be
judged like any other grouping. The rules (docs/method.md, "Wide tables"):

* **A family** is two or more numeric columns whose names are the same but for
  one token that is a number or a single letter (``day0``/``day7``,
  ``rep_1``/``rep_2``, ``tank A``/``tank B``, ``tankA``/``tankB``), whose
  varying tokens are all numbers or all letters, and whose typical sizes are
  within a factor of 100 of each other (one measurement, not several).
* **When.** A family is turned into long form when the user says so
  (``long`` patterns), or when the claimed response is not a column of the
  table: then the family named like the response (``length_1 length_2`` for
  ``length``) or, failing that, the only family in the table. Families with the
  same varying tokens are reshaped alongside it (``length_d0 mass_d0
  length_d7 mass_d7``), each into a column named by its stem. Names with two
  varying parts (``tank A fish 1`` ... ``tank B fish 3``, as two header rows
  join) are reshaped twice, the last part first: when no family is named like
  the response, several families alike but for the other part (same varying
  tokens) are reshaped together, and the columns they give (``tank A``,
  ``tank B``) form the family of the second pass. Families that differ only in
  a heading in front of the same name (``control T1 T2 T3`` and ``enriched T4
  T5 T6``, joined from a row of group headings) are reshaped into a column
  ``group`` holding the heading and one holding the varying part.
* **New columns.** The varying token goes to a column named by the word before
  it in the names (``day``, ``rep``, ``tank``; ``part`` when there is none),
  as numbers when every token is one (as a tidy table would hold them), but
  whole after a one-letter word (``T1``, ``P3``, ``d7``: a label as written);
  the values to a column named by the rest of the name, else the claimed
  response, else ``value``.
* **Rows.** The other columns are kept on every new row. When the varying
  token is a time (the word is day, week, time, visit, hour, month, year,
  session, period, or the names are dates) a wide row is one subject measured
  again: a column ``row`` numbering the wide rows is added unless the kept
  columns already tell the rows apart. When it is a replicate or a unit, a
  wide row is only a measurement index (fish 1 of tank A and fish 1 of tank B
  are not the same fish) and no such column is added.
"""

from __future__ import annotations

import fnmatch
import re
from collections import defaultdict
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from pandas.api.types import is_bool_dtype, is_numeric_dtype

from replicheck.errors import InputError
from replicheck.io.columns import normalise_name
from replicheck.io.table import Reshaped

_TOKEN = re.compile(r"\d+(?:\.\d+)?|[A-Za-z]+|[^A-Za-z\d]+")
_TIME_WORDS = frozenset(
    {"day", "days", "d", "week", "weeks", "wk", "time", "t", "visit", "hour", "hours", "h", "hr"}
    | {"month", "months", "year", "years", "session", "period", "min", "minute", "timepoint"}
)
_SEPARATORS = " _.-/"


@dataclass(frozen=True)
class _Family:
    stem: tuple[str, ...]  # tokens with the varying one replaced by ""
    position: int
    columns: tuple[str, ...]
    parts: tuple[str, ...]  # the varying token of each column
    dated: bool = False  # the names are dates

    @property
    def word(self) -> str:
        """The word before the varying token (``day`` in ``day0``), else ``""``."""
        before = [t for t in self.stem[: self.position] if t.strip(_SEPARATORS)]
        return before[-1].strip(_SEPARATORS) if before else ""

    @property
    def rest(self) -> str:
        """The name without the varying token and its word (``length`` in ``length_d7``)."""
        tokens = list(self.stem)
        word = self.word
        if word:
            i = max(j for j in range(self.position) if tokens[j].strip(_SEPARATORS) == word)
            tokens[i] = ""
        text = "".join(tokens)
        return re.sub(r"[\s_.\-/]+", " ", text).strip()


def _tokens(name: str) -> list[str]:
    out: list[str] = []
    for tok in _TOKEN.findall(name):
        # "tankA": a word ending in one capital letter after lower-case letters
        m = re.fullmatch(r"([a-z]{2,})([A-Z])", tok)
        out.extend([m.group(1), m.group(2)] if m else [tok])
    return out


def _varying(tok: str) -> bool:
    return bool(re.fullmatch(r"\d+(?:\.\d+)?|[A-Za-z]", tok))


def find_families(data: pd.DataFrame) -> list[_Family]:
    """Families of numeric columns that differ in one number or letter, largest first."""
    groups: dict[tuple[tuple[str, ...], int], list[tuple[str, str]]] = defaultdict(list)
    for name in data.columns:
        col = str(name)
        series = data[name]
        if not is_numeric_dtype(series) or is_bool_dtype(series):
            continue
        tokens = _tokens(col)
        for p, tok in enumerate(tokens):
            if _varying(tok):
                stem = tuple("" if i == p else t for i, t in enumerate(tokens))
                groups[(stem, p)].append((col, tok))
    families: list[_Family] = []
    taken: set[str] = set()
    for (stem, p), members in sorted(groups.items(), key=lambda kv: -len(kv[1])):
        members = [(c, t) for c, t in members if c not in taken]
        parts = [t for _, t in members]
        if len(members) < 2 or len(set(parts)) < len(parts):
            continue
        if not (all(t[0].isdigit() for t in parts) or all(t.isalpha() for t in parts)):
            continue
        columns = tuple(c for c, _ in members)
        if not _same_scale(data, columns):
            continue
        families.append(_Family(stem, p, columns, tuple(parts)))
        taken.update(columns)
    return families


def _same_scale(data: pd.DataFrame, columns: Sequence[str]) -> bool:
    typical = []
    for col in columns:
        values = np.abs(data[col].to_numpy(dtype=float))
        values = values[np.isfinite(values) & (values > 0)]
        if len(values):
            typical.append(float(np.median(values)))
    return not typical or max(typical) <= 100 * min(typical)


def _date_family(data: pd.DataFrame) -> _Family | None:
    """Numeric columns named by dates (``2021-03-01``, ...)."""
    named = []
    for name in data.columns:
        col = str(name)
        if not re.fullmatch(r"\d{4}-\d{2}-\d{2}|\d{1,2}/\d{1,2}/\d{2,4}", col.strip()):
            continue
        if is_numeric_dtype(data[name]) and not is_bool_dtype(data[name]):
            named.append(col)
    if len(named) < 2:
        return None
    return _Family(("",), 0, tuple(named), tuple(named), dated=True)


def reshape_long(
    data: pd.DataFrame,
    *,
    response: str | None = None,
    patterns: Sequence[str] = (),
    ids: Sequence[str] = (),
) -> tuple[pd.DataFrame, tuple[Reshaped, ...]]:
    """The table in long form when a wide family of columns calls for it.

    Parameters
    ----------
    data:
        The table as read. Not modified.
    response:
        The claimed response as written; when it is not a column, a family is
        looked for to hold it.
    patterns:
        Shell-style patterns (``"day*"``) naming the wide columns to reshape,
        as the user states them; they decide instead of the search.
    ids:
        Columns that identify a wide row (a subject measured at each time): no
        numbering column is added. Every column outside the family is kept on
        each long row, named or not.

    Examples
    --------
    >>> wide = pd.DataFrame({"diet": ["a", "b"], "rep1": [1.0, 2.0], "rep2": [1.5, 2.5]})
    >>> long, done = reshape_long(wide, response="length")
    >>> long.columns.tolist(), long["rep"].tolist(), done[0].levels
    (['diet', 'rep', 'length'], [1, 2, 1, 2], 2)
    """
    stated = bool(patterns)
    if stated:
        chosen = [str(c) for c in data.columns if any(fnmatch.fnmatch(str(c), p) for p in patterns)]
        if len(chosen) < 2:
            raise InputError(
                f"the wide-column pattern {', '.join(repr(p) for p in patterns)} matches "
                f"{len(chosen)} column(s); it must match two or more"
            )
        families = [f for f in find_families(data[chosen]) if set(f.columns) <= set(chosen)]
        dated = _date_family(data[chosen])
        family = (
            families[0]
            if families and len(families[0].columns) == len(chosen)
            else dated
            if dated is not None and len(dated.columns) == len(chosen)
            else _Family(("",), 0, tuple(chosen), tuple(chosen))
        )
        group = [family]
    else:
        if response is None or response in data.columns:
            return data, ()
        families = find_families(data)
        dated = _date_family(data)
        if dated is not None:
            families.append(dated)
        if not families:
            return data, ()
        target = normalise_name(response)
        named = [f for f in families if normalise_name(f.rest) == target]
        if named:
            family = named[0]
        elif len(families) == 1:
            family = families[0]
        elif _alike(families):
            # two varying parts (``tank A fish 1`` ... ``tank B fish 2``): the last
            # one first, then the family its value columns make
            first, done = _melt(data, families, response, ids, stated)
            second, more = reshape_long(first, response=response, ids=ids)
            return (second, done + more) if more else (data, ())
        elif _grouped(families):
            return _melt_grouped(data, families, response, ids)
        else:
            return data, ()
        group = [family] + [
            f
            for f in families
            if f is not family and sorted(f.parts) == sorted(family.parts) and f.rest
        ]
    return _melt(data, group, response, ids, stated)


def _with_rows(
    data: pd.DataFrame, kept: list[str], ids: Sequence[str], time_like: bool, key: str
) -> tuple[pd.DataFrame, list[str], str | None]:
    """The table, its identifying columns, and the column numbering the wide rows
    when one is added (a time: each wide row is one subject measured again)."""
    if time_like and not ids and (not kept or data[kept].duplicated().any()):
        row_column = "row" if "row" not in kept and key != "row" else "wide row"
        frame = data.assign(**{row_column: [f"row {i + 1}" for i in range(len(data))]})
        return frame, [*kept, row_column], row_column
    return data, kept, None


def _labels(parts: Sequence[str], word: str = "") -> list[object]:
    """The varying parts as a tidy table holds them: numbers when all are numbers,
    except after a one-letter word (``T1``, ``P3``, ``d7``: a letter and a number
    written together are a label, kept whole as the file writes it)."""
    if len(word) == 1:
        return [f"{word}{p}" for p in parts]
    if not all(re.fullmatch(r"\d+(?:\.\d+)?", p) for p in parts):
        return list(parts)
    numbers = [float(p) for p in parts]
    whole = [int(v) for v in numbers if v.is_integer()]
    return list(whole) if len(whole) == len(numbers) else list(numbers)


def _heading(f: _Family) -> tuple[str, str]:
    """A family's name split at its word: ``("control", "T#")`` for ``control T1 ..``."""
    tokens = list(f.stem)
    word = f.word
    cut = f.position
    if word:
        cut = max(j for j in range(f.position) if tokens[j].strip(_SEPARATORS) == word)
    head = re.sub(r"[\s_.\-/]+", " ", "".join(tokens[:cut])).strip()
    return head, "".join(tokens[cut:])


def _grouped(families: Sequence[_Family]) -> bool:
    """Families under group headings: the same name but for a heading in front
    (``control T1 T2 T3``, ``enriched T4 T5 T6``), as two header rows join."""
    if len(families) < 2 or any(f.dated for f in families):
        return False
    split = [_heading(f) for f in families]
    heads = [h for h, _ in split]
    return all(heads) and len(set(heads)) == len(heads) and len({c for _, c in split}) == 1


def _melt_grouped(
    data: pd.DataFrame, families: Sequence[_Family], response: str | None, ids: Sequence[str]
) -> tuple[pd.DataFrame, tuple[Reshaped, ...]]:
    """Columns under group headings in long form: a ``group`` column for the
    heading and one for the varying part."""
    wide = [c for f in families for c in f.columns]
    kept = [str(c) for c in data.columns if str(c) not in wide]
    for col in ids:
        if col not in kept:
            raise InputError(f"the identifier column '{col}' is not a kept column of the table")
    word = families[0].word
    key = word or "part"
    group_key = "group"
    key, group_key = (f"{k} (wide)" if k in kept else k for k in (key, group_key))
    value = response if response and response not in kept else "value"
    frame, id_columns, row_column = _with_rows(data, kept, ids, word.casefold() in _TIME_WORDS, key)
    labels = _labels([p for f in families for p in f.parts], word)
    pieces = []
    i = 0
    for f in families:
        head = _heading(f)[0]
        for col in f.columns:
            piece = frame[id_columns].copy()
            piece[group_key] = head
            piece[key] = pd.Series([labels[i]] * len(piece), index=piece.index)
            piece[value] = frame[col].to_numpy()
            piece["__order"] = np.arange(len(frame)) * len(wide) + i
            pieces.append(piece)
            i += 1
    long = pd.concat(pieces, ignore_index=True).sort_values("__order", kind="stable")
    long = long.drop(columns="__order").dropna(subset=[value]).reset_index(drop=True)
    done = Reshaped(
        columns=tuple(wide),
        key=key,
        values=(value,),
        levels=len(wide),
        rows_before=len(data),
        rows_after=len(long),
        row_column=row_column,
        stated=False,
        group=group_key,
    )
    return long, (done,)


def _alike(families: Sequence[_Family]) -> bool:
    """Families that differ only in another varying part: the same parts, distinct rests."""
    rests = [f.rest for f in families]
    parts = {tuple(sorted(f.parts)) for f in families}
    return len(families) > 1 and len(parts) == 1 and all(rests) and len(set(rests)) == len(rests)


def _melt(
    data: pd.DataFrame,
    group: list[_Family],
    response: str | None,
    ids: Sequence[str],
    stated: bool,
) -> tuple[pd.DataFrame, tuple[Reshaped, ...]]:
    main = group[0]
    wide = [c for f in group for c in f.columns]
    kept = [str(c) for c in data.columns if str(c) not in wide]
    for col in ids:
        if col not in kept:
            raise InputError(f"the identifier column '{col}' is not a kept column of the table")
    word = main.word
    dated = main.dated
    key = word or ("date" if dated else "part")
    if key in kept:
        key = f"{key} (wide)"
    names: list[str] = []
    for f in group:
        name = f.rest or (response if response and response not in kept else "value")
        if name in kept or name == key or name in names:
            name = f"{name} (wide)"
        names.append(name)
    time_like = dated or word.casefold() in _TIME_WORDS
    frame, id_columns, row_column = _with_rows(data, kept, ids, time_like, key)
    labels = _labels(main.parts, word)
    pieces = []
    for i, part in enumerate(main.parts):
        piece = frame[id_columns].copy()
        piece[key] = pd.Series([labels[i]] * len(piece), index=piece.index)
        for f, name in zip(group, names, strict=True):
            j = f.parts.index(part) if part in f.parts else None
            piece[name] = frame[f.columns[j]].to_numpy() if j is not None else np.nan
        piece["__order"] = np.arange(len(frame)) * len(main.parts) + i
        pieces.append(piece)
    long = pd.concat(pieces, ignore_index=True).sort_values("__order", kind="stable")
    long = long.drop(columns="__order").reset_index(drop=True)
    long = long.dropna(subset=names, how="all").reset_index(drop=True)
    done = Reshaped(
        columns=tuple(wide),
        key=key,
        values=tuple(names),
        levels=len(main.parts),
        rows_before=len(data),
        rows_after=len(long),
        row_column=row_column,
        stated=stated,
    )
    return long, (done,)
