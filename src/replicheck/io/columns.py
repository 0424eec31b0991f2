"""Column names: cleaning, uniqueness, lookup by a user's spelling, numeric access."""

from __future__ import annotations

import difflib
import math
import re
from collections.abc import Iterable, Sequence

import numpy as np
import pandas as pd
from pandas.api.types import (
    is_bool_dtype,
    is_datetime64_any_dtype,
    is_numeric_dtype,
    is_timedelta64_dtype,
)

from replicheck.errors import InputError
from replicheck.io.table import Table
from replicheck.io.text import COMMA_DECIMAL, DOT_DECIMAL

_SEPARATORS = re.compile(r"[\s_.\-]+")
_LIST_ALL_UP_TO = 8


def quote_list(names: Iterable[object], limit: int | None = None) -> str:
    """``'a', 'b', 'c'``; with ``limit``, the first ``limit`` then ``... (N in all)``."""
    items = [f"'{name}'" for name in names]
    if limit is not None and len(items) > limit:
        return ", ".join(items[:limit]) + f", ... ({len(items)} in all)"
    return ", ".join(items)


def clean_names(raw: Sequence[object]) -> tuple[list[str], set[int]]:
    """Strip whitespace and byte-order marks; name blank headers ``"Unnamed: i"``.

    Returns the names and the positions whose header was blank.
    """
    names: list[str] = []
    blank: set[int] = set()
    for i, value in enumerate(raw):
        missing = value is None or (isinstance(value, float) and math.isnan(value))
        name = "" if missing else str(value).replace("\ufeff", "").strip()
        if not name:
            blank.add(i)
            name = f"Unnamed: {i}"
        names.append(name)
    return names, blank


def check_names(names: Sequence[str], blank: set[int], label: str) -> None:
    """Raise :class:`InputError` for a header without names or with duplicates.

    Names are duplicates when they are equal after surrounding spaces are
    stripped. Names that differ only in case (``class`` and ``Class``) are
    distinct columns, as in the source: :func:`resolve_column` matches a name
    exactly first and ignores case only when that is unambiguous.
    """
    if len(names) == len(blank):
        raise InputError(f"{label}: no column names (the header row is empty)")
    groups: dict[str, list[str]] = {}
    for i, name in enumerate(names):
        if i not in blank:
            groups.setdefault(name, []).append(name)
    duplicates = [repr(name) for name, group in groups.items() if len(group) > 1]
    if duplicates:
        raise InputError(
            f"{label}: duplicate column names (ignoring surrounding spaces): "
            + ", ".join(duplicates)
        )


def normalise_name(name: str) -> str:
    """A name without case and the separators space, underscore, dot and hyphen."""
    return _SEPARATORS.sub("", name).casefold()


def _column_label(role: str) -> str:
    return "column" if role == "column" else f"{role} column"


def resolve_column(columns: Sequence[str], name: str, role: str = "column") -> str:
    """Find the column a user meant by ``name``.

    Tries an exact match, then a match ignoring case, then a match ignoring case
    and the separators space, underscore, dot and hyphen (``"Tank ID"`` finds
    ``"tank_id"``). Raises :class:`InputError` naming the candidates when the
    match is ambiguous, or the closest names (``difflib``) when there is none.
    """
    columns = [str(c) for c in columns]
    if name in columns:
        return name
    wanted = name.strip()
    what = _column_label(role)
    for key in (str.casefold, normalise_name):
        hits = [c for c in columns if key(c) == key(wanted)]
        if len(hits) == 1:
            return hits[0]
        if len(hits) > 1:
            raise InputError(f"ambiguous {what} '{name}': it matches {quote_list(hits)}")
    if not columns:
        raise InputError(f"unknown {what} '{name}'; the table has no columns")
    by_key: dict[str, list[str]] = {}
    for c in columns:
        by_key.setdefault(normalise_name(c), []).append(c)
    close = difflib.get_close_matches(normalise_name(wanted), list(by_key), n=3, cutoff=0.6)
    if close:
        suggestions = [c for key in close for c in by_key[key]]
        raise InputError(f"unknown {what} '{name}'; closest: {quote_list(suggestions)}")
    raise InputError(
        f"unknown {what} '{name}'; columns are: {quote_list(columns, limit=_LIST_ALL_UP_TO)}"
    )


def pick_columns(names: Sequence[str], wanted: Sequence[str] | None, label: str) -> list[int]:
    """Positions, in file order, of the columns a user asked for (all for ``None``).

    Each requested name is found with :func:`resolve_column`; an unknown or
    ambiguous name is an :class:`InputError` that starts with ``label``.
    """
    if wanted is None:
        return list(range(len(names)))
    found: set[int] = set()
    for name in wanted:
        try:
            hit = resolve_column(names, str(name))
        except InputError as exc:
            raise InputError(f"{label}: {exc}") from None
        found.add(list(names).index(hit))
    return sorted(found)


# pd.to_numeric reads a (stripped) cell as a number only if it is made of
# digits, signs, points, exponent letters and blanks, or spells "inf"; other
# cells are NaN without asking it, which keeps text columns fast.
# (no \s: pandas would then run the pattern in Python instead of pyarrow)
_MAYBE_NUMBER = r"^[-0-9+.eE \t\n\r\f\v]+$|[iI][nN][fF]"


def parse_numbers(values: pd.Series, decimal: str = ".") -> pd.Series:
    """Parse cells as floats (NaN where a cell is missing or not a number).

    With ``decimal=","`` cells like ``-12,5`` are read as -12.5. Cells are
    parsed by :func:`pandas.to_numeric` after stripping surrounding whitespace.
    """
    text = values.astype("string").str.strip()
    if decimal == ",":
        text = text.str.replace(r"^([+-]?\d+),(\d+)$", r"\1.\2", regex=True)
    out = np.full(len(text), np.nan)
    maybe = text.str.contains(_MAYBE_NUMBER, regex=True).fillna(False).to_numpy(dtype=bool)
    if maybe.any():
        parsed = pd.to_numeric(text[maybe], errors="coerce").astype("Float64")
        out[maybe] = parsed.to_numpy(dtype=float, na_value=np.nan)
    return pd.Series(out, index=values.index)


def column_decimal(values: pd.Series) -> str:
    """``","`` when text cells use a decimal comma and none uses a decimal point."""
    text = values.dropna().astype("string").str.strip()
    uses_comma = bool(text.str.match(COMMA_DECIMAL.pattern).any())
    uses_dot = bool(text.str.match(DOT_DECIMAL.pattern).any())
    return "," if uses_comma and not uses_dot else "."


# Words that mark the "1" of a yes/no response written as text (common usage).
_YES = frozenset(
    {
        "yes",
        "y",
        "true",
        "t",
        "present",
        "positive",
        "pos",
        "success",
        "alive",
        "survived",
        "germinated",
        "infected",
        "dead",
        "died",
        "1",
    }
)
_NO = frozenset(
    {
        "no",
        "n",
        "false",
        "f",
        "absent",
        "negative",
        "neg",
        "failure",
        "fail",
        "0",
        "none",
        "dead",
        "died",
    }
)


def yes_no_coding(series: pd.Series) -> tuple[str, str] | None:
    """The (0, 1) labels of a text column holding a yes/no outcome, else None.

    The column must hold exactly two distinct values, at least one of which
    reads as "yes" (yes, y, true, present, positive, success, alive, survived,
    germinated, infected, ...) or "no" (no, n, false, absent, negative,
    failure, dead, ...); the "yes" value is 1. Values written with a code,
    such as ``0_no``/``1_yes``, ``1 = yes``/``0 = no`` or ``No (0)``/``Yes (1)``,
    are read by their word, and two words coded 0 and 1 (``0_absent``,
    ``1_present``) by their code. Two other words (male/female) are not a
    yes/no outcome.
    """
    if is_bool_dtype(series) or is_numeric_dtype(series):
        return None
    if is_datetime64_any_dtype(series) or is_timedelta64_dtype(series):
        return None
    values = sorted(set(series.dropna().astype(str).str.strip()))
    if len(values) != 2:
        return None
    a, b = values
    (ca, la), (cb, lb) = _coded_word(a), _coded_word(b)
    if la in _YES and lb not in _YES:
        return b, a
    if lb in _YES and la not in _YES:
        return a, b
    if la in _NO and lb not in _NO:
        return a, b
    if lb in _NO and la not in _NO:
        return b, a
    if {ca, cb} == {"0", "1"}:  # '0_absent' / '1_present': the code says which is 1
        return (a, b) if ca == "0" else (b, a)
    return None


_CODED = (
    re.compile(r"^(?P<code>\d+)\s*[_=:.)\]\-]*\s*(?P<word>[^\d\s].*)$"),
    re.compile(r"^(?P<word>[^\d\s].*?)\s*[(\[=:_\-]\s*(?P<code>\d+)\s*[)\]]?$"),
)


def _coded_word(value: str) -> tuple[str | None, str]:
    """A value's numeric code and its word: '1_yes' -> ('1', 'yes'), 'No (0)' -> ('0', 'no')."""
    for pattern in _CODED:
        m = pattern.match(value)
        if m:
            return m.group("code"), m.group("word").strip().lower()
    return None, value.lower()


def numeric_column(table: Table, column: str, role: str = "response") -> pd.Series:
    """The column as a float Series (NaN for missing), or :class:`InputError`.

    ``column`` is looked up with :func:`resolve_column`. Text cells are parsed
    as numbers, with a decimal comma when the column writes numbers that way;
    any cell that is neither missing nor a number makes the column non-numeric.
    A response written as two text values (yes/no, present/absent, ...) becomes
    0/1 as :func:`yes_no_coding` says.
    """
    name = resolve_column(table.columns, column, role)
    what = f"{_column_label(role)} '{name}'"
    series = table.data[name]
    if is_bool_dtype(series) or is_numeric_dtype(series):
        values = series.astype(float)
    else:
        if is_datetime64_any_dtype(series) or is_timedelta64_dtype(series):
            values = pd.Series(np.nan, index=series.index)
        elif role == "response" and (coding := yes_no_coding(series)) is not None:
            text = series.astype("string").str.strip()
            values = text.map({coding[0]: 0.0, coding[1]: 1.0}).astype(float)
        else:
            values = parse_numbers(series, column_decimal(series))
        bad = series[series.notna() & values.isna()]
        if len(bad):
            shown = pd.unique(bad.astype(str).str.strip())[:3]
            # an invisible character is what makes a cell that looks like a number text
            examples = quote_list(s if s.isprintable() else repr(s)[1:-1] for s in shown)
            raise InputError(f"{what} is not numeric (examples: {examples})")
    if values.notna().sum() == 0:
        raise InputError(f"{what} has no non-missing values")
    if np.isinf(values.to_numpy()).any():
        raise InputError(f"{what} has infinite values")
    return values.rename(name)
