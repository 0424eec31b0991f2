"""Limits on the size of what one audit reads and fits.

replicheck treats every input as possibly hostile, so the work of one audit
is bounded: a file too large, a table too wide, a text cell too long, a
workbook that unpacks to too much, a treatment with too many levels, or a
claimed model with too many fixed-effect parameters ends in one line and
exit 2, naming the limit and how to raise it (``--limit KEY=N``, or a
``[limits]`` table in the spec). The defaults cover every documented design
in docs/real-designs.md with room to spare; docs/reliability.md gives the
times measured on files at the limits.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, fields, replace

from replicheck.advice import option
from replicheck.errors import InputError, LimitExceeded


@dataclass(frozen=True)
class Limits:
    """The limits of one audit (see the module docstring); each key is ``--limit KEY=N``."""

    #: Size of the data file on disk, in MB (10^6 bytes).
    file_mb: float = 4000.0
    #: Columns of the table.
    columns: int = 20_000
    #: Characters in one text cell.
    cell_chars: int = 10_000
    #: Uncompressed size of a workbook (.xlsx, all its parts), in MB.
    workbook_mb: float = 1000.0
    #: Cells of a workbook sheet's grid (rows times columns, up to its farthest cell).
    sheet_cells: int = 50_000_000
    #: Levels of one categorical treatment or fixed-effect factor.
    levels: int = 1000
    #: Fixed-effect parameters of the claimed model (intercept, levels, slopes, interactions).
    parameters: int = 2000
    #: Levels of crossed random groupings outside the one with the most levels, for the
    #: REML fit (its work grows as their square); past it the fit is not run (the
    #: report says so and rests on the unit means), not an error.
    crossed_levels: int = 2000

    @staticmethod
    def keys() -> tuple[str, ...]:
        """The keys as written on the command line (``file-mb``, ``columns``, ...)."""
        return tuple(f.name.replace("_", "-") for f in fields(Limits))

    def exceeded(self, key: str, what: str) -> LimitExceeded:
        """The one-line error for ``what`` (a clause giving the size) exceeding limit ``key``."""
        limit = getattr(self, key)
        shown = f"{limit:g}" if isinstance(limit, float) else f"{limit:,}"
        flag = key.replace("_", "-")
        return LimitExceeded(
            f"{what}, more than the limit of {shown} {_UNITS[key]}: "
            f"raise it with {option('limit', flag)} (or [limits] in the spec) if the file is "
            "what "
            "it should be"
        )


_UNITS = {
    "file_mb": "MB",
    "columns": "columns",
    "cell_chars": "characters",
    "workbook_mb": "MB",
    "sheet_cells": "cells",
    "levels": "levels",
    "parameters": "parameters",
    "crossed_levels": "levels",
}


def _number(key: str, value: object, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float | str):
        raise InputError(f"limit '{key}' {where} must be a positive number, not {value!r}")
    try:
        number = float(str(value).replace("_", "")) if isinstance(value, str) else float(value)
    except ValueError:
        raise InputError(
            f"limit '{key}' {where} must be a positive number, not {value!r}"
        ) from None
    if not number > 0 or number == float("inf"):
        raise InputError(f"limit '{key}' {where} must be a positive number, not {value!r}")
    return number


def make_limits(
    given: Mapping[str, object] | Iterable[str] | None, where: str, base: Limits | None = None
) -> Limits:
    """Limits from ``KEY=N`` texts (the command line) or a mapping (a spec), over ``base``.

    >>> make_limits(["columns=20000"], "on the command line").columns
    20000
    """
    out = base or Limits()
    if given is None:
        return out
    items: list[tuple[str, object]]
    if isinstance(given, Mapping):
        items = [(str(k), v) for k, v in given.items()]
    else:
        items = []
        for text in given:
            key, sep, raw = str(text).partition("=")
            if not sep:
                raise InputError(
                    f"a limit is written KEY=N, e.g. columns=20000, not {text!r}; keys: "
                    f"{', '.join(Limits.keys())}"
                )
            items.append((key.strip(), raw.strip()))
    for key, value in items:
        name = key.replace("-", "_")
        if name not in _UNITS:
            raise InputError(f"unknown limit '{key}' {where}; keys: {', '.join(Limits.keys())}")
        number = _number(key, value, where)
        kind = type(getattr(Limits, name))
        out = replace(out, **{name: kind(number) if kind is float else max(1, int(number))})
    return out
