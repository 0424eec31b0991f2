"""Find the data table in a grid of cells: the header row, a units row, notes.

Supplements are laid out for people: a title and notes above the header, a row
of units under it, footnotes below the data. This module looks at the cells of
the first and last rows of a sheet or text file (a *grid*: rows of cells, an
empty cell ``None`` or blank text) and says where the table is. It only
reads; the reader cuts the file or sheet as it says. The rules, with their
reasons, are in docs/method.md ("Reading the layout"):

* **Header.** Row 1 is the header when it names every column that the rows
  below it use (the first column may be unnamed, as in exports with row
  names), as a tidy file does; nothing is then changed. Otherwise the header is
  the first row that names every used column, is mostly words, holds no name
  that recurs as a value in its column, and puts a word over at least one
  column of numbers or dates. The rows above it are skipped as title and notes.
  When no row qualifies, or a row above the one found is itself a complete row
  (the file may have no title at all), row 1 stays the header.
* **Two header rows.** When the header's names repeat (``fish 1 .. fish 3``
  under each of ``tank A``, ``tank B``), or the row directly above heads groups
  of measured columns (two or more words, each over two or more columns of
  numbers or dates: ``control`` over ``T1 T2 T3``, ``enriched`` over ``T4 T5
  T6``), and that row holds two or more words, its headings are carried to the
  right over the columns they span (as merged cells are) and joined to the
  names: ``tank A fish 1``, ``control T1``.
* **Units row.** The row under the header is a units row when its cells are
  unit-like words, such as ``(mm)``, ``g``, ``°C``, ``mg/L``, standing only
  over columns of numbers or dates.
* **Tables side by side.** Columns empty from the header down that split the
  named columns into runs of two or more are the gaps between tables set side
  by side; each table is titled by the one cell above it, if there is one.
* **Notes below.** The candidates are the last rows that fill fewer cells than
  the typical (median) data row. They are notes when one of them puts words in
  a column of numbers or dates or holds a note-like cell (several words, ``=``,
  or a footnote mark) longer than any value of its column; otherwise those set
  off from the data by an empty row are notes, and the rest are kept as
  (sparse) data. A row as full as the typical data row is never a note.
"""

from __future__ import annotations

import datetime as dt
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

#: Rows at the top of a grid searched for the header.
HEAD_ROWS = 200
#: Rows at the bottom of a grid searched for notes.
TAIL_ROWS = 50
#: Rows below a header candidate that decide which columns are used.
_LOOK_BELOW = 50

_NUMBER = re.compile(r"^[+-]?(\d[\d ,.']*|[.,]\d+)([eE][+-]?\d+)?%?$")
_UNIT = re.compile(
    r"^(\(.{1,24}\)|\[.{1,24}\]|[A-Za-zµμ°%‰Ωℓ][A-Za-z0-9µμ°%‰Ωℓ/·.^*⁻¹²³ -]{0,15})$"
)
_NOTE_MARK = re.compile(
    r"^(\*|†|‡|§|¶|#|\(?[a-z]\)|note|notes|source|sources|abbreviations?)\b", re.I
)

Cell = object


def cell_kind(value: Cell, missing: frozenset[str] = frozenset()) -> str:
    """``"empty"``, ``"number"``, ``"date"``, ``"bool"`` or ``"text"``.

    A text cell that is a missing-value code is empty; one that reads as a
    number (``12``, ``-3.5``, ``1,5``, ``4e-3``, ``12%``) is a number.
    """
    if value is None or value is np.nan:
        return "empty"
    if isinstance(value, bool | np.bool_):
        return "bool"
    if isinstance(value, int | np.integer):
        return "number"
    if isinstance(value, float | np.floating):
        return "empty" if math.isnan(float(value)) else "number"
    if isinstance(value, dt.date | dt.datetime | dt.time | np.datetime64):
        return "date"
    text = str(value).strip()
    if not text or text in missing:
        return "empty"
    return "number" if _NUMBER.match(text) else "text"


def cell_text(value: Cell) -> str:
    """The cell as one line of text, for names and for the report."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    return " ".join(str(value).split())


@dataclass(frozen=True)
class Box:
    """Where the table sits in a grid (0-based rows of the grid).

    ``header`` is the row of the names (the lower one when there are two);
    ``units`` the units row or ``None``; data run from ``start`` up to, not
    including, ``end`` (``None``: to the end of the grid). ``names`` are
    the joined names of a two-row header (``None``: the header row's cells).
    ``above`` and ``below`` hold the text of the skipped rows that are not
    empty; ``unit_labels`` maps a column position to its unit. ``blocks`` are
    tables side by side (``(first column, end column, title)``), two or more,
    when empty columns split the header and the data into them.
    """

    header: int = 0
    header_rows: int = 1
    units: int | None = None
    end: int | None = None
    names: tuple[str, ...] | None = None
    above: tuple[str, ...] = ()
    below: tuple[str, ...] = ()
    unit_labels: dict[int, str] = field(default_factory=dict)
    blocks: tuple[tuple[int, int, str], ...] = ()

    @property
    def start(self) -> int:
        """First data row."""
        return self.header + 1 + (self.units is not None)

    @property
    def tidy(self) -> bool:
        """Whether the grid is read as it is: header in row 1, nothing skipped."""
        return (
            self.header == 0
            and self.units is None
            and self.end is None
            and self.names is None
            and not self.above
        )


def find_box(
    head: Sequence[Sequence[Cell]],
    tail: Sequence[Sequence[Cell]] = (),
    n_rows: int | None = None,
    *,
    header_row: int | None = None,
    missing: frozenset[str] = frozenset(),
) -> Box:
    """Where the table sits in a grid whose first rows are ``head``.

    Parameters
    ----------
    head:
        The first rows of the grid (up to :data:`HEAD_ROWS`; all of them for
        a small grid).
    tail:
        The last rows (up to :data:`TAIL_ROWS`) when ``head`` does not reach
        the end; empty otherwise.
    n_rows:
        Rows in the whole grid (default ``len(head)``, with an empty ``tail``).
    header_row:
        The header's row stated by the user (0-based); it is not searched for.
    missing:
        Cell texts that are missing values.

    Examples
    --------
    >>> grid = [["Table S1. Invented growth-chamber trial"], [],
    ...         ["chamber", "light", "height"], ["", "", "(cm)"],
    ...         ["C1", "low", 4.1], ["C2", "high", 5.0], [], ["NA = plant lost"]]
    >>> box = find_box(grid)
    >>> box.header, box.units, box.start, box.end, box.unit_labels
    (2, 3, 4, 6, {2: '(cm)'})
    """
    rows = [list(r) for r in head]
    n_rows = len(rows) if n_rows is None else n_rows
    tail_rows = [list(r) for r in tail]
    kinds = [[cell_kind(v, missing) for v in r] for r in rows]
    header = _find_header(rows, kinds) if header_row is None else header_row
    if header >= len(rows):
        return Box(header=header)
    blocks = _side_by_side(rows, kinds, header)
    names, header_rows = (None, 1) if blocks else _two_rows(rows, kinds, header)
    units = header + 1 if _is_units_row(kinds, rows, header + 1) else None
    start = header + 1 + (units is not None)
    above = tuple(t for t in (_row_text(rows[i]) for i in range(header + 1 - header_rows)) if t)
    unit_labels = (
        {j: cell_text(v) for j, v in enumerate(rows[units]) if cell_text(v)}
        if units is not None
        else {}
    )
    width = max((len(r) for r in rows[header:]), default=0)
    data_rows = [i for i in range(start, len(rows)) if _filled(kinds[i])]
    typical = float(np.median([len(_filled(kinds[i])) for i in data_rows])) if data_rows else 0.0
    dense = [i for i in data_rows if len(_filled(kinds[i])) >= typical]
    col_kinds = _column_kinds([kinds[i] for i in dense], width)
    lengths = _value_lengths([rows[i] for i in dense], [kinds[i] for i in dense], width)
    if tail_rows:  # the notes are among the last rows, numbered from n_rows - len(tail)
        offset = n_rows - len(tail_rows)
        end_local, below = _notes_below(tail_rows, col_kinds, lengths, typical, missing)
        end = None if end_local is None else offset + end_local
    else:
        end_local, below = _notes_below(rows[start:], col_kinds, lengths, typical, missing)
        end = None if end_local is None else start + end_local
    return Box(
        header=header,
        header_rows=header_rows,
        units=units,
        end=end,
        names=names,
        above=above,
        below=below,
        unit_labels=unit_labels,
        blocks=blocks,
    )


def _side_by_side(
    rows: list[list[Cell]], kinds: list[list[str]], header: int
) -> tuple[tuple[int, int, str], ...]:
    """Tables side by side: runs of named columns split by columns empty from the
    header down, each run naming two or more columns; titled by the row above."""
    width = max((len(r) for r in rows[header:]), default=0)
    filled = [False] * width
    for row_kinds in kinds[header:]:
        for j, kind in enumerate(row_kinds):
            if kind != "empty":
                filled[j] = True
    spans: list[tuple[int, int]] = []
    j = 0
    while j < width:
        if not filled[j]:
            j += 1
            continue
        first = j
        while j < width and filled[j]:
            j += 1
        spans.append((first, j))
    named = [
        (a, b)
        for a, b in spans
        if sum(kinds[header][c] != "empty" for c in range(a, min(b, len(kinds[header])))) >= 2
    ]
    if len(named) < 2 or len(named) != len(spans):
        return ()
    above = rows[header - 1] if header > 0 else []
    out = []
    for k, (a, b) in enumerate(named, start=1):
        titles = [cell_text(above[c]) for c in range(a, min(b, len(above))) if cell_text(above[c])]
        out.append((a, b, titles[0] if len(titles) == 1 else f"table {k}"))
    return tuple(out)


def _row_text(row: Sequence[Cell]) -> str:
    text = " ".join(t for t in (cell_text(v) for v in row) if t)
    return text if len(text) <= 80 else text[:77] + "..."


def _filled(kinds: Sequence[str]) -> set[int]:
    return {j for j, k in enumerate(kinds) if k != "empty"}


def _used(kinds: list[list[str]], row: int) -> set[int]:
    used: set[int] = set()
    for k in kinds[row + 1 : row + 1 + _LOOK_BELOW]:
        used |= _filled(k)
    return used


def _names_all(kinds: Sequence[str], used: set[int]) -> bool:
    """Whether a row names every used column (the first may be unnamed)."""
    filled = _filled(kinds)
    missing = used - filled
    return len(filled) >= min(2, len(used) or 1) and missing <= {0}


def _find_header(rows: list[list[Cell]], kinds: list[list[str]]) -> int:
    if not rows:
        return 0
    first = _names_all(kinds[0], _used(kinds, 0)) and "text" in kinds[0]
    if first or len(rows) < 3:
        return 0
    for h in range(1, min(len(rows) - 1, HEAD_ROWS)):
        used = _used(kinds, h)
        if not used or not _names_all(kinds[h], used):
            continue
        if not _header_like(rows, kinds, h, used):
            continue
        if any(_names_all(kinds[i], used) for i in range(h)):
            return 0  # a complete row above: perhaps no title at all
        return h
    return 0


def _header_like(rows: list[list[Cell]], kinds: list[list[str]], h: int, used: set[int]) -> bool:
    """Mostly words, no name recurring below, a word over a column of numbers or dates."""
    row = kinds[h]
    filled = _filled(row)
    words = [j for j in filled if row[j] == "text"]
    if len(words) * 2 < len(filled):
        return False
    first = h + 1 + _is_units_row(kinds, rows, h + 1)
    below = rows[first : first + _LOOK_BELOW]
    below_kinds = kinds[first : first + _LOOK_BELOW]
    over_numbers = False
    for j in words:
        name = cell_text(rows[h][j]).casefold()
        column = [cell_text(r[j]).casefold() for r in below if j < len(r)]
        if name in column:
            return False
        ks = [k[j] for k in below_kinds if j < len(k) and k[j] != "empty"]
        if ks and sum(k in ("number", "date") for k in ks) >= 0.9 * len(ks):
            over_numbers = True
    return over_numbers


def _two_rows(
    rows: list[list[Cell]], kinds: list[list[str]], header: int
) -> tuple[tuple[str, ...] | None, int]:
    """Joined names when the header's names repeat, or the row above heads groups of
    measured columns, and that row heads groups of them."""
    names = [cell_text(v) for v in rows[header]]
    present = [n for n in names if n]
    if header == 0 or sum(k == "text" for k in kinds[header - 1]) < 2:
        return None, 1
    above = rows[header - 1]
    if len(set(present)) == len(present) and not _group_headings(rows, kinds, header):
        return None, 1
    joined: list[str] = []
    group = ""
    for j, name in enumerate(names):
        heading = cell_text(above[j]) if j < len(above) else ""
        if heading:
            group = heading
        if not name:
            joined.append(heading)
        else:
            joined.append(f"{group} {name}".strip() if group else name)
    return tuple(joined), 2


def _group_headings(rows: list[list[Cell]], kinds: list[list[str]], header: int) -> bool:
    """Whether the row above the header heads groups of measured columns: two or
    more words, each followed by empty cells over two or more named columns of
    numbers or dates, and nothing over the columns left of the first."""
    above = kinds[header - 1]
    named = kinds[header]
    width = len(named)
    starts = [j for j in range(min(len(above), width)) if above[j] != "empty"]
    if len(starts) < 2 or any(above[j] != "text" for j in starts):
        return False
    below = kinds[header + 1 : header + 1 + _LOOK_BELOW]
    for a, b in zip(starts, [*starts[1:], width], strict=True):
        span = [j for j in range(a, b) if named[j] != "empty"]
        if len(span) < 2:
            return False
        for j in span:
            ks = [k[j] for k in below if j < len(k) and k[j] != "empty"]
            if not ks or sum(k in ("number", "date") for k in ks) < 0.9 * len(ks):
                return False
    return True


def _is_units_row(kinds: list[list[str]], rows: list[list[Cell]], u: int) -> bool:
    if u >= len(rows) - 1:
        return False
    filled = _filled(kinds[u])
    if not filled or any(kinds[u][j] != "text" for j in filled):
        return False
    below = kinds[u + 1 : u + 1 + _LOOK_BELOW]
    for j in filled:
        if not _UNIT.match(cell_text(rows[u][j])):
            return False
        ks = [k[j] for k in below if j < len(k) and k[j] != "empty"]
        if not ks or sum(k in ("number", "date") for k in ks) < 0.9 * len(ks):
            return False
    return True


def _column_kinds(kinds: list[list[str]], width: int) -> list[str]:
    """Each column's kind in the (dense) data rows: one kind shared by 95% of its values, else text.

    Rows that fill fewer than half the columns are left out, so that notes
    under the data do not blur the kind of the columns they spill into.
    """
    out = []
    for j in range(width):
        ks = [k[j] for k in kinds if j < len(k) and k[j] != "empty"]
        best = max(set(ks), key=ks.count) if ks else "empty"
        out.append(best if ks and ks.count(best) >= 0.95 * len(ks) else "text")
    return out


def _value_lengths(rows: list[list[Cell]], kinds: list[list[str]], width: int) -> list[int]:
    out = [0] * width
    for r, k in zip(rows, kinds, strict=False):
        for j, v in enumerate(r[:width]):
            if k[j] != "empty":
                out[j] = max(out[j], len(cell_text(v)))
    return out


def _consistent(kinds: Sequence[str], col_kinds: Sequence[str]) -> bool:
    for j, k in enumerate(kinds):
        if k == "empty":
            continue
        expected = col_kinds[j] if j < len(col_kinds) else "empty"
        if expected in ("number", "date", "bool") and k != expected:
            return False
        if expected == "empty":
            return False
    return True


def _note_like(value: Cell, column: int, lengths: Sequence[int]) -> bool:
    text = cell_text(value)
    longest = lengths[column] if column < len(lengths) else 0
    if len(text) <= longest:
        return False
    return len(text.split()) >= 3 or "=" in text or bool(_NOTE_MARK.match(text))


def _notes_below(
    rows: list[list[Cell]],
    col_kinds: Sequence[str],
    lengths: Sequence[int],
    typical: float,
    missing: frozenset[str],
) -> tuple[int | None, tuple[str, ...]]:
    """Where the data end among ``rows`` (``None``: they run to the end) and the notes.

    The candidates are the last rows that fill fewer cells than the typical
    (median) data row, with the empty rows among them.
    """
    kinds = [[cell_kind(v, missing) for v in r] for r in rows]
    i = len(rows) - 1
    while i >= 0 and not _filled(kinds[i]):
        i -= 1
    last_filled = i
    while i >= 0 and len(_filled(kinds[i])) < typical:
        i -= 1
    block = list(range(i + 1, last_filled + 1))
    if not block:
        return None, ()
    strong = any(
        not _consistent(kinds[r], col_kinds)
        or any(_note_like(v, j, lengths) for j, v in enumerate(rows[r]) if kinds[r][j] == "text")
        for r in block
    )
    if not strong:
        empties = [r for r in block if not _filled(kinds[r])]
        if not empties:
            return None, ()
        block = list(range(empties[0], last_filled + 1))  # set off by an empty row
    texts = tuple(t for t in (_row_text(rows[r]) for r in block) if t)
    return block[0], texts
