"""Cut a text file or a sheet to its table, as :mod:`replicheck.io.layout` finds it.

:func:`cut_text` returns the text the CSV parser reads (the header line and
the data lines, without titles, a units row or footnotes) and
:func:`cut_grid` the rows and names of a sheet's table; both say how they
read it as a :class:`~replicheck.io.table.Layout`. A tidy file comes back
unchanged.
"""

from __future__ import annotations

import csv
import re
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import pandas as pd

from replicheck.errors import InputError
from replicheck.io.layout import HEAD_ROWS, TAIL_ROWS, Box, Cell, cell_kind, cell_text, find_box
from replicheck.io.table import FilledColumn, Layout

_RANGE = re.compile(
    r"^\s*([A-Za-z]{1,3})([1-9]\d{0,6})\s*(?::\s*([A-Za-z]{1,3})([1-9]\d{0,6})?)?\s*$"
)
#: Characters at each end of a large text searched for its first and last rows.
_EDGE_CHARS = 1 << 20


@dataclass(frozen=True)
class CellRange:
    """A block of cells, 0-based, ends exclusive (``None``: to the end)."""

    top: int
    left: int
    bottom: int | None
    right: int | None


def parse_range(text: str, label: str = "the range") -> CellRange:
    """``"A3:F130"`` (or ``"A3:F"``, ``"A3"``: to the end) as a :class:`CellRange`.

    >>> parse_range("B5:F15")
    CellRange(top=4, left=1, bottom=15, right=6)
    """
    match = _RANGE.match(text)
    if not match:
        raise InputError(
            f"{label} must be cells in spreadsheet notation such as A3:F130 "
            f"(or A3 to read from there on), got {text!r}"
        )
    c0, r0, c1, r1 = match.groups()
    top, left = int(r0) - 1, column_number(c0)
    right = None if c1 is None else column_number(c1) + 1
    bottom = None if r1 is None else int(r1)
    if (right is not None and right <= left) or (bottom is not None and bottom <= top + 1):
        raise InputError(
            f"{label} {text.strip()!r} must run right and down from its first cell "
            "and hold a header row and at least one data row"
        )
    return CellRange(top, left, bottom, right)


def column_number(letters: str) -> int:
    """0-based number of a spreadsheet column (``A`` -> 0, ``AA`` -> 26)."""
    n = 0
    for ch in letters.upper():
        n = n * 26 + ord(ch) - 64
    return n - 1


def column_letters(number: int) -> str:
    """Spreadsheet letters of a 0-based column number (26 -> ``AA``)."""
    out = ""
    n = number + 1
    while n:
        n, rem = divmod(n - 1, 26)
        out = chr(65 + rem) + out
    return out


@dataclass(frozen=True)
class TextCut:
    """The text to parse, names to put on it (``None``: its header's), columns to keep."""

    text: str
    layout: Layout
    names: tuple[str, ...] | None = None
    units: dict[int, str] | None = None
    columns: slice | None = None
    blocks: tuple[tuple[int, int, str], ...] = ()


def split_line(line: str, delimiter: str) -> list[Cell]:
    """One line of delimited text as cells (an empty field ``None``)."""
    try:
        row = next(csv.reader([line.rstrip("\r\n")], delimiter=delimiter), [])
    except csv.Error:
        row = line.rstrip("\r\n").split(delimiter)
    return [v if v.strip() else None for v in row]


def cut_text(
    text: str,
    delimiter: str,
    missing: frozenset[str],
    *,
    header_row: int | None = None,
    cell_range: CellRange | None = None,
    label: str = "the file",
) -> TextCut:
    """The parts of a text file that hold the table (see :func:`find_box`)."""
    if len(text) <= 2 * _EDGE_CHARS:
        lines = text.splitlines(keepends=True)
        n_lines = len(lines)
        head = lines[:HEAD_ROWS] if n_lines > HEAD_ROWS + TAIL_ROWS else lines
        tail = lines[-TAIL_ROWS:] if n_lines > HEAD_ROWS + TAIL_ROWS else []
    else:
        head = text[:_EDGE_CHARS].splitlines(keepends=True)[:HEAD_ROWS]
        tail = text[-_EDGE_CHARS:].splitlines(keepends=True)[1:][-TAIL_ROWS:]
        breaks = text.count("\n") or text.count("\r")
        n_lines = breaks + (not text.endswith(("\n", "\r")))
    starts = [0]
    for line in head:
        starts.append(starts[-1] + len(line))
    tail_starts = [len(text)]
    for line in reversed(tail):
        tail_starts.insert(0, tail_starts[0] - len(line))

    def offset(row: int) -> int:
        """Character offset of the start of line ``row`` (0-based)."""
        if row < len(starts):
            return starts[row]
        first_tail = n_lines - len(tail)
        if tail and row >= first_tail:
            return tail_starts[row - first_tail]
        raise InputError(f"{label}: cannot find line {row + 1}")

    stated: tuple[str, ...] = ()
    if cell_range is not None:
        top = cell_range.top
        if top >= len(head):
            raise InputError(f"{label}: the range starts at line {top + 1}, past the first lines")
        bottom = n_lines if cell_range.bottom is None else min(cell_range.bottom, n_lines)
        rows = [split_line(line, delimiter) for line in head[top:bottom]]
        rows = [r[cell_range.left : cell_range.right] for r in rows]
        box = find_box(rows, header_row=0, missing=missing)
        box = _shift(box, top, bottom if cell_range.bottom is not None else None)
        stated = ("range",)
    else:
        rows = [split_line(line, delimiter) for line in head]
        tail_rows = [split_line(line, delimiter) for line in tail]
        if header_row is not None:
            if header_row > n_lines:
                raise InputError(f"{label}: no line {header_row} (the file has {n_lines} lines)")
            if header_row > len(head):
                raise InputError(
                    f"{label}: the header row can be one of the first {HEAD_ROWS} lines"
                )
            stated = ("header row",)
        box = find_box(
            rows,
            tail_rows,
            n_lines,
            header_row=None if header_row is None else header_row - 1,
            missing=missing,
        )
    if box.tidy and cell_range is None:
        return TextCut(text, _text_layout(box, stated, None))
    body_end = len(text) if box.end is None else offset(box.end)
    cut = text[offset(box.header) : offset(box.header + 1)] + text[offset(box.start) : body_end]
    if cell_range is not None:
        columns = slice(cell_range.left, cell_range.right)
        layout = _text_layout(box, stated, cell_range)
        return TextCut(cut, layout, box.names, box.unit_labels, columns, box.blocks)
    layout = _text_layout(box, stated, None)
    return TextCut(cut, layout, box.names, box.unit_labels, None, box.blocks)


def _shift(box: Box, top: int, end: int | None) -> Box:
    """A box found in rows starting at ``top``, renumbered in the whole file."""
    return replace(
        box,
        header=box.header + top,
        units=None if box.units is None else box.units + top,
        end=end if end is not None else (None if box.end is None else box.end + top),
    )


def _text_layout(box: Box, stated: tuple[str, ...], cell_range: CellRange | None) -> Layout:
    shown = None
    if cell_range is not None:
        shown = _range_text(cell_range.top, cell_range.left, cell_range.bottom, cell_range.right)
    return Layout(
        header_row=box.header + 1,
        header_rows=box.header_rows,
        units_row=None if box.units is None else box.units + 1,
        first_row=box.start + 1,
        last_row=box.end,
        cell_range=shown,
        skipped_above=box.above,
        skipped_below=box.below,
        stated=stated,
    )


def _range_text(top: int, left: int, bottom: int | None, right: int | None) -> str:
    first = f"{column_letters(left)}{top + 1}"
    if right is None and bottom is None:
        return first
    last_col = "" if right is None else column_letters(right - 1)
    return f"{first}:{last_col}{'' if bottom is None else bottom}"


@dataclass(frozen=True)
class GridCut:
    """A sheet's table: its header cells (or joined names) and its data rows."""

    header: list[Cell]
    frame: pd.DataFrame
    layout: Layout
    units: dict[int, str]


def cut_grid(
    grid: pd.DataFrame,
    missing: frozenset[str],
    *,
    header_row: int | None = None,
    cell_range: CellRange | None = None,
    label: str = "the sheet",
    merges: Sequence[tuple[int, int, int, int]] = (),
) -> GridCut:
    """The table in a sheet read as a grid (``header=None``, starting at cell A1).

    ``merges`` are the sheet's merged ranges (0-based first row, first column,
    last row, last column): a range whose first cell lies in the data and that
    spans rows gives its value to the empty cells below it in its first column,
    as a spreadsheet shows it.
    """
    top = left = 0
    right: int | None = None
    stated: tuple[str, ...] = ()
    if cell_range is not None:
        if cell_range.top >= len(grid) or cell_range.left >= grid.shape[1]:
            raise InputError(f"{label}: the range starts past the last cell of the sheet")
        top, left, right = cell_range.top, cell_range.left, cell_range.right
        grid = grid.iloc[top : cell_range.bottom, left:right]
        stated = ("range",)
    elif header_row is not None:
        if header_row > len(grid):
            raise InputError(f"{label}: no row {header_row} (the sheet has {len(grid)} rows)")
        if header_row > HEAD_ROWS:
            raise InputError(f"{label}: the header row can be one of the first {HEAD_ROWS} rows")
        stated = ("header row",)
    n = len(grid)
    small = n <= HEAD_ROWS + TAIL_ROWS
    head = grid.iloc[: n if small else HEAD_ROWS].to_numpy(dtype=object).tolist()
    tail = [] if small else grid.iloc[-TAIL_ROWS:].to_numpy(dtype=object).tolist()
    if cell_range is not None:
        box = find_box(head, header_row=0, missing=missing)
        if cell_range.bottom is not None:
            box = replace(box, end=None, below=())
    else:
        box = find_box(
            head,
            tail,
            n,
            header_row=None if header_row is None else header_row - 1,
            missing=missing,
        )
    header = list(grid.iloc[box.header]) if box.names is None else list(box.names)
    frame = grid.iloc[box.start : box.end].reset_index(drop=True)
    merged = _fill_merged(frame, merges, top + box.start, left)
    units = dict(box.unit_labels)
    width = _named_width(header)
    side: Layout | None = None
    if box.blocks:
        frame.columns = pd.RangeIndex(frame.shape[1])
        width = box.blocks[-1][1]
        header, frame, units, side = stack_blocks(header, frame, box.blocks, units)
        if side.skipped_tables:
            width = box.blocks[0][1]
    end = n if box.end is None else box.end
    if box.end is not None:  # the last row that holds a value, not the empty rows before a note
        body = grid.iloc[box.start : box.end]
        held = (body.notna().to_numpy() & (body != "").to_numpy()).any(axis=1)
        end = box.start + (int(held.nonzero()[0][-1]) + 1 if held.any() else 0)
    right_edge = left + width
    layout = Layout(
        header_row=top + box.header + 1,
        header_rows=box.header_rows,
        units_row=None if box.units is None else top + box.units + 1,
        first_row=top + box.start + 1,
        last_row=top + end if box.end is not None or cell_range is not None else None,
        cell_range=_range_text(top + box.header + 1 - box.header_rows, left, top + end, right_edge)
        if (cell_range is not None or not box.tidy or left or box.blocks)
        else None,
        skipped_above=box.above,
        skipped_below=box.below,
        stated=stated,
    )
    if merged:
        names = [cell_text(v) for v in grid.iloc[box.header]]
        filled = tuple(
            FilledColumn(names[j] or f"Unnamed: {j}", cells, blocks, merged=True)
            for j, (cells, blocks) in sorted(merged.items())
            if j < len(names)
        )
        layout = replace(layout, filled=filled)
    if side is not None:
        layout = replace(
            layout,
            tables=side.tables,
            table_column=side.table_column,
            skipped_tables=side.skipped_tables,
        )
    return GridCut(header, frame, layout, units)


def _fill_merged(
    frame: pd.DataFrame,
    merges: Sequence[tuple[int, int, int, int]],
    first_row: int,
    first_col: int,
) -> dict[int, tuple[int, int]]:
    """Fill ``frame`` (the data rows, from sheet row ``first_row`` and column
    ``first_col``) from merged ranges; cells and ranges filled by frame column."""
    done: dict[int, tuple[int, int]] = {}
    n_rows, n_cols = frame.shape
    for r0, c0, r1, _ in merges:
        i0, j = r0 - first_row, c0 - first_col
        if r1 <= r0 or not (0 <= i0 < n_rows and 0 <= j < n_cols):
            continue
        value: Any = frame.iat[i0, j]
        if cell_kind(value) == "empty":
            continue
        cells = 0
        for i in range(i0 + 1, min(r1 - first_row, n_rows - 1) + 1):
            if cell_kind(frame.iat[i, j]) == "empty":
                frame.iat[i, j] = value
                cells += 1
        if cells:
            before = done.get(j, (0, 0))
            done[j] = (before[0] + cells, before[1] + 1)
    return done


def _shown(cells: Sequence[Cell]) -> str:
    return ", ".join(f"'{cell_text(v)}'" for v in cells if cell_text(v))


def stack_blocks(
    header: list[Cell],
    frame: pd.DataFrame,
    blocks: tuple[tuple[int, int, str], ...],
    units: dict[int, str],
) -> tuple[list[Cell], pd.DataFrame, dict[int, str], Layout]:
    """Tables set side by side as one table.

    ``frame`` has positional columns (as the grid). When every table names the
    same columns, they are stacked, each row's table title in a new first column
    ``table``; otherwise the first table is read and the others are named in
    the layout. Returns the header, the frame, the units by new position and a
    layout holding only the side-by-side fields.
    """
    names = [tuple(cell_text(header[c]) for c in range(a, b)) for a, b, _ in blocks]
    a0, b0, _ = blocks[0]
    if any(n != names[0] for n in names):
        skipped = tuple(f"{title} ({_shown(header[a:b])})" for a, b, title in blocks[1:])
        kept = {j - a0: u for j, u in units.items() if a0 <= j < b0}
        part = frame.iloc[:, a0:b0]
        part.columns = pd.RangeIndex(b0 - a0)
        return list(header[a0:b0]), part, kept, Layout(skipped_tables=skipped)
    key = "table" if "table" not in names[0] else "table (side by side)"
    parts = []
    for a, b, title in blocks:
        part = frame.iloc[:, a:b].copy()
        part.columns = pd.RangeIndex(1, b - a + 1)
        filled = part.apply(lambda col: col.map(lambda v: cell_kind(v) != "empty")).any(axis=1)
        part = part[filled.to_numpy(dtype=bool)]
        part.insert(0, 0, title)
        parts.append(part)
    stacked = pd.concat(parts, ignore_index=True)
    shifted = {j - a0 + 1: u for j, u in units.items() if a0 <= j < b0}
    titles = tuple(title for _, _, title in blocks)
    return [key, *header[a0:b0]], stacked, shifted, Layout(tables=titles, table_column=key)


def _named_width(header: Sequence[Cell]) -> int:
    named = [j for j, v in enumerate(header) if cell_text(v)]
    return (named[-1] + 1) if named else len(header)
