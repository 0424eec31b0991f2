"""The codes of a table's columns, computed once per audit.

Every stage of an audit groups the rows by columns of the same table: the
structure search, the hidden-grouping scans, the refit and the report data
each ask for the integer codes of the treatment, the candidate units and the
other recorded columns, and ``pandas.factorize`` of a column of a million
text values takes tens of milliseconds. Inside :func:`shared_codes` (an audit
opens one) the codes of a column are computed once and handed out again;
outside it every call computes them afresh, with the same result.

A column is recognised by the memory that holds its values (the same column
read again from the same frame, or from a frame that shares it, is the same
column); the book keeps a reference to those values so that the memory
cannot be reused by another array while the book is open. Codes handed out
are read-only, so that no caller can change what another receives.
"""

from __future__ import annotations

from collections.abc import Callable, Hashable, Iterator, Sequence
from contextlib import contextmanager
from contextvars import ContextVar
from dataclasses import dataclass
from typing import Any, TypeVar

import numpy as np
import pandas as pd

from replicheck.partitions import already_dense

# A book stops taking new entries beyond this many bytes (codes and the values
# they keep alive), or four times the table's size when that is more
# (:func:`allow_for`): past it, later columns are coded anew each time instead
# of being held.
MAX_BOOK_BYTES = 2 << 30


@dataclass(frozen=True)
class ColumnCodes:
    """Codes ``0..k-1`` of a column's values in increasing order (-1 where missing)."""

    codes: np.ndarray  # read-only, int64
    uniques: Any  # the k distinct values, in code order (as pandas.factorize gives them)

    @property
    def n_levels(self) -> int:
        return len(self.uniques)


@dataclass
class _Book:
    entries: dict[Hashable, tuple[object, object]]
    nbytes: int = 0
    limit: int = MAX_BOOK_BYTES


T = TypeVar("T")

_BOOK: ContextVar[_Book | None] = ContextVar("replicheck_codebook", default=None)


@contextmanager
def shared_codes() -> Iterator[None]:
    """Within this block the codes of each column are computed once (nested blocks share)."""
    if _BOOK.get() is not None:
        yield
        return
    token = _BOOK.set(_Book({}))
    try:
        yield
    finally:
        _BOOK.reset(token)


def allow_for(frame: pd.DataFrame) -> None:
    """Let the open book (if any) hold codes up to four times the frame's size
    (never less than ``MAX_BOOK_BYTES``), so that a wide table is coded once too."""
    book = _BOOK.get()
    if book is not None:
        size = int(frame.memory_usage(index=False, deep=False).sum())
        book.limit = max(book.limit, 4 * size)


def _values_of(values: pd.Series | pd.Index | np.ndarray) -> object:
    if isinstance(values, pd.Series | pd.Index):
        return values.array if isinstance(values, pd.Index) else values._values
    return values


def _key(raw: object) -> Hashable:
    """What identifies a column's values: their memory (numpy) or their array object."""
    if isinstance(raw, np.ndarray):
        face = raw.__array_interface__
        return ("numpy", face["data"][0], raw.shape, raw.strides, raw.dtype.str)
    arrow = getattr(raw, "_pa_array", None)  # pandas' Arrow-backed arrays: the Arrow data
    if arrow is not None:
        return ("arrow", id(arrow), len(arrow))
    return ("array", id(raw), len(raw))  # type: ignore[arg-type]


def _remember(book: _Book, key: Hashable, keep: object, value: object, nbytes: int) -> None:
    # what the entry holds alive counts too (a column's values outlive their frame here)
    nbytes += sum(
        k.nbytes
        for k in (keep if isinstance(keep, tuple) else (keep,))
        if isinstance(k, np.ndarray)
    )
    if book.nbytes + nbytes > book.limit:
        return
    book.entries[key] = (keep, value)
    book.nbytes += nbytes


def _frozen(codes: np.ndarray) -> np.ndarray:
    out = np.asarray(codes, dtype=np.int64)
    out.flags.writeable = False
    return out


def column_codes(values: pd.Series | pd.Index | np.ndarray) -> ColumnCodes:
    """``pandas.factorize(values, sort=True)``, remembered while a book is open."""
    raw = _values_of(values)
    book = _BOOK.get()
    key = None
    if book is not None:
        key = ("codes", _key(raw))
        hit = book.entries.get(key)
        if hit is not None:
            return hit[1]  # type: ignore[return-value]
    if isinstance(raw, np.ndarray) and already_dense(raw.reshape(-1)):
        # integer codes 0..k-1 with every code used are their own sorted codes
        out = ColumnCodes(_frozen(raw.astype(np.int64)), np.arange(int(raw.max()) + 1))
    else:
        codes, uniques = pd.factorize(values, sort=True)
        out = ColumnCodes(_frozen(codes), uniques)
    if book is not None:
        _remember(book, key, raw, out, out.codes.nbytes)
    return out


def first_seen_codes_of(values: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """``pandas.factorize(values, sort=False)`` (values numbered in order of first
    appearance, -1 where missing), from the column's shared codes."""
    coded = column_codes(values)
    known = coded.codes >= 0
    order = pd.unique(coded.codes[known])  # sorted codes in order of first appearance
    rank = np.full(coded.n_levels, -1, dtype=np.int64)
    rank[order] = np.arange(order.size)
    codes = np.where(known, rank[np.maximum(coded.codes, 0)], -1)
    return codes, np.asarray(coded.uniques, dtype=object)[order]


def combined_codes(columns: Sequence[pd.Series]) -> np.ndarray:
    """Codes ``0..k-1`` of the observed combinations of several columns, in increasing
    lexicographic order of the columns' values (-1 where any is missing); remembered."""
    raws = [_values_of(c) for c in columns]
    book = _BOOK.get()
    key = None
    if book is not None:
        key = ("combined", tuple(_key(r) for r in raws))
        hit = book.entries.get(key)
        if hit is not None:
            return hit[1]  # type: ignore[return-value]
    if len(columns) == 1:
        single = column_codes(columns[0]).codes
        if single.size == 0 or int(single.min()) >= 0:
            return single  # one column with no missing value: its own codes, not a copy
    n = len(columns[0]) if columns else 0
    combined = np.zeros(n, dtype=np.int64)
    missing = np.zeros(n, dtype=bool)
    for col in columns:
        cc = column_codes(col)
        missing |= cc.codes < 0
        combined = combined * (cc.n_levels + 1) + cc.codes
        if len(columns) > 1:
            combined = pd.factorize(combined, sort=True)[0].astype(np.int64)
    if len(columns) == 1:
        combined = combined.copy()
    if missing.any():
        combined[missing] = -1
        kept = combined >= 0
        combined[kept] = pd.factorize(combined[kept], sort=True)[0]
    out = _frozen(combined)
    if book is not None:
        _remember(book, key, tuple(raws), out, out.nbytes)
    return out


def remembered(
    kind: str, values: pd.Series, extra: Hashable, compute: Callable[[], T], nbytes: int = 0
) -> T:
    """``compute()``, remembered per column (and ``extra``) while a book is open.

    For results that depend on a column's values only (a reading of a text
    column as time stamps); callers must not change what they receive.
    """
    book = _BOOK.get()
    if book is None:
        return compute()
    raw = _values_of(values)
    key = (kind, _key(raw), extra)
    hit = book.entries.get(key)
    if hit is not None:
        return hit[1]  # type: ignore[return-value]
    out = compute()
    _remember(book, key, raw, out, nbytes or 8 * len(values))
    return out
