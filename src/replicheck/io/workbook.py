"""Legacy Excel (.xls) and OpenDocument (.ods) workbooks as a raw cell grid.

Two readers, one per format, both chosen so that a hostile file costs bounded
work and every failure is a Python exception (one :class:`InputError`):

* ``.xls`` is read with xlrd, in pure Python, one sheet at a time
  (``on_demand``) and with rows kept ragged, so memory follows the cells the
  file holds, never the sizes it declares. (Calamine's .xls reader reserves
  memory from the declared sheet dimensions: a 6 kB file declaring 4 billion
  rows aborts the whole process.)
* ``.ods`` is read with python-calamine, which parses every sheet of the
  workbook when it opens it and expands ``number-rows-repeated`` /
  ``number-columns-repeated`` into cells. So the archive is first checked
  (unpacked size within ``workbook_mb``) and ``content.xml`` is streamed once
  through expat to find the extent of every sheet without building it; only
  a workbook within the limits reaches calamine, and then as a fresh archive
  holding exactly the bytes that were scanned.

A grid is a DataFrame of object dtype with a RangeIndex of rows and of
columns, starting at the sheet's cell A1 (row i, column j of the grid are
spreadsheet row i+1, column j+1) and ending at the last row and column that
hold a value. An empty cell is None (an error value, such as ``#DIV/0!``, and
an empty text are empty cells too); numbers are int when whole (as pandas'
openpyxl path gives them) or float; text is str, booleans bool, dates and
date-times pandas Timestamp (datetime.datetime outside Timestamp's range),
times of day datetime.time and durations datetime.timedelta.
"""

from __future__ import annotations

import datetime as dt
import io
import re
import warnings
import xml.parsers.expat
import zipfile
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, TypeVar

import pandas as pd

from replicheck.errors import InputError, brief
from replicheck.limits import Limits

__all__ = ["workbook_grid", "workbook_sheets"]

_KINDS = ("xls", "ods")
_T = TypeVar("_T")

# Whole numbers stored as floats become int only where the float is exact.
_EXACT_INT = 2.0**53


def workbook_sheets(raw: bytes, kind: str, label: str, limits: Limits | None = None) -> list[str]:
    """Sheet names in workbook order.

    Parameters
    ----------
    raw : bytes
        The whole file.
    kind : str
        ``"xls"`` or ``"ods"``.
    label : str
        How the file is named in messages (each starts with ``f"{label}: "``).
    limits : Limits, optional
        For an .ods, the unpacked size of the archive is checked against
        ``workbook_mb`` before its content is scanned (default ``Limits()``).

    Returns
    -------
    list of str
        The worksheet names, in the order the workbook lists them.

    Raises
    ------
    InputError
        The file is not a readable workbook of that kind, or an .ods unpacks
        to more than ``limits.workbook_mb``.
    """
    _check_kind(kind)
    bounds = limits or Limits()
    if kind == "xls":
        return _guarded(kind, label, lambda: _xls_sheets(raw))
    return _guarded(kind, label, lambda: _ods_names(raw, label, bounds))


def workbook_grid(raw: bytes, kind: str, name: str, label: str, limits: Limits) -> pd.DataFrame:
    """The named sheet as a grid of cells, from cell A1.

    Parameters
    ----------
    raw : bytes
        The whole file.
    kind : str
        ``"xls"`` or ``"ods"``.
    name : str
        A sheet name as :func:`workbook_sheets` gives it.
    label : str
        How the file is named in messages (each starts with ``f"{label}: "``).
    limits : Limits
        ``columns`` and ``sheet_cells`` bound the sheet's extent (and, for an
        .ods, whose sheets are all parsed to reach one, the cells of all sheets
        together); ``workbook_mb`` bounds the unpacked size of an .ods.

    Returns
    -------
    pandas.DataFrame
        ``header=None``; a RangeIndex of rows and of columns; object dtype.
        Row i / column j are spreadsheet row i+1 / column j+1; the grid ends
        at the last row and column holding a value (an empty sheet gives a
        0 x 0 frame). Cell values as described in the module docstring.

    Raises
    ------
    InputError
        The file is not a readable workbook of that kind, or a limit is
        exceeded (checked before the grid is built).
    """
    _check_kind(kind)
    if kind == "xls":
        rows = _guarded(kind, label, lambda: _xls_rows(raw, name, label, limits))
    else:
        rows = _guarded(kind, label, lambda: _ods_rows(raw, name, label, limits))
    return _frame(rows)


# --------------------------------------------------------------------------- shared


def _check_kind(kind: str) -> None:
    if kind not in _KINDS:
        raise ValueError(f"kind must be 'xls' or 'ods', not {kind!r}")


def _guarded(kind: str, label: str, work: Callable[[], _T]) -> _T:
    """Run ``work``; any failure of the readers on a damaged file becomes one InputError.

    xlrd, zipfile, expat and calamine raise many exception types on damaged
    files; calamine's Rust panics arrive as pyo3's PanicException, which derives
    from BaseException, so it is caught by name. Library warnings are silenced.
    """
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return work()
    except InputError:
        raise
    except BaseException as exc:
        if not isinstance(exc, Exception) and type(exc).__name__ != "PanicException":
            raise
        raise InputError(f"{label}: not a readable .{kind} workbook ({brief(exc)})") from exc


def _check_extent(label: str, name: str, rows: int, width: int, limits: Limits) -> None:
    if width > limits.columns:
        raise limits.exceeded("columns", f"{label}: sheet '{name}' runs to column {width:,}")
    if rows * width > limits.sheet_cells:
        raise limits.exceeded(
            "sheet_cells",
            f"{label}: sheet '{name}' spans {rows:,} rows by {width:,} columns "
            f"({rows * width:,} cells)",
        )


def _number(value: float) -> int | float:
    if value.is_integer() and abs(value) < _EXACT_INT:
        return int(value)
    return value


def _stamp(value: dt.date) -> pd.Timestamp | dt.datetime:
    if not isinstance(value, dt.datetime):
        value = dt.datetime(value.year, value.month, value.day)
    try:
        return pd.Timestamp(value)
    except (ValueError, OverflowError):
        return value


def _trimmed(rows: list[list[Any]]) -> list[list[Any]]:
    """Rows of equal length, without the trailing rows and columns that hold no value."""
    width = 0
    last = -1
    for i, row in enumerate(rows):
        used = len(row)
        while used and row[used - 1] is None:
            used -= 1
        if used:
            last = i
            width = max(width, used)
    out = rows[: last + 1]
    for i, row in enumerate(out):
        if len(row) != width:
            out[i] = row[:width] + [None] * (width - len(row))
    return out


def _frame(rows: list[list[Any]]) -> pd.DataFrame:
    width = len(rows[0]) if rows else 0
    frame = pd.DataFrame(rows, columns=pd.RangeIndex(width), dtype=object)
    frame.index = pd.RangeIndex(len(rows))
    return frame


# --------------------------------------------------------------------------- .xls


def _xls_open(raw: bytes) -> Any:
    import xlrd

    # xlrd reports oddities of a file by printing to its log file: kept out of sight.
    return xlrd.open_workbook(
        file_contents=raw,
        on_demand=True,
        ragged_rows=True,
        formatting_info=True,
        logfile=io.StringIO(),
        verbosity=0,
    )


def _xls_sheets(raw: bytes) -> list[str]:
    book = _xls_open(raw)
    try:
        return [str(name) for name in book.sheet_names()]
    finally:
        book.release_resources()


_ELAPSED = re.compile(r"\[(?:h+|m+|s+)\]", re.IGNORECASE)


def _xls_rows(raw: bytes, name: str, label: str, limits: Limits) -> list[list[Any]]:
    import xlrd

    book = _xls_open(raw)
    try:
        sheet = book.sheet_by_name(name)
        # The extent of the cells that hold something: formatted blank cells
        # (stored by xlrd as BLANK) do not widen the grid.
        rows = 0
        width = 0
        for r in range(sheet.nrows):
            used = len(bytes(sheet.row_types(r)).rstrip(b"\x00\x06"))
            if used:
                rows = r + 1
                width = max(width, used)
        _check_extent(label, name, rows, width, limits)

        elapsed: dict[int, bool] = {}

        def is_elapsed(xf_index: int) -> bool:
            # A duration format ([h]:mm:ss, [mm]:ss) holds a timedelta, not a date.
            if xf_index not in elapsed:
                fmt = book.format_map.get(book.xf_list[xf_index].format_key)
                elapsed[xf_index] = bool(fmt and _ELAPSED.search(fmt.format_str))
            return elapsed[xf_index]

        out: list[list[Any]] = []
        for r in range(rows):
            types = sheet.row_types(r)
            values = sheet.row_values(r)
            row: list[Any] = [None] * width
            for c in range(min(len(types), width)):
                ctype = types[c]
                value = values[c]
                if ctype == xlrd.XL_CELL_NUMBER:
                    row[c] = _number(value)
                elif ctype == xlrd.XL_CELL_TEXT:
                    row[c] = value if value != "" else None
                elif ctype == xlrd.XL_CELL_DATE:
                    row[c] = _xls_date(value, book.datemode, is_elapsed(sheet.cell_xf_index(r, c)))
                elif ctype == xlrd.XL_CELL_BOOLEAN:
                    row[c] = bool(value)
                # XL_CELL_EMPTY, XL_CELL_BLANK, XL_CELL_ERROR: an empty cell
            out.append(row)
        return _trimmed(out)
    finally:
        book.release_resources()


def _xls_date(
    value: float, datemode: int, elapsed: bool
) -> pd.Timestamp | dt.datetime | dt.time | dt.timedelta | int | float:
    from xlrd.xldate import xldate_as_datetime

    try:
        if elapsed:
            return dt.timedelta(days=value)
        stamp = xldate_as_datetime(value, datemode)
    except (ValueError, OverflowError):
        # Outside the calendar: the number as stored, as pandas' xlrd path gives it.
        return _number(value)
    if 0 <= value < 1:
        return stamp.time()
    return _stamp(stamp)


# --------------------------------------------------------------------------- .ods

_ODS_MIMETYPE = b"application/vnd.oasis.opendocument.spreadsheet"
_ODS_MANIFEST = (
    b'<?xml version="1.0" encoding="UTF-8"?>'
    b'<manifest:manifest xmlns:manifest="urn:oasis:names:tc:opendocument:xmlns:manifest:1.0"'
    b' manifest:version="1.2">'
    b'<manifest:file-entry manifest:full-path="/"'
    b' manifest:media-type="application/vnd.oasis.opendocument.spreadsheet"/>'
    b'<manifest:file-entry manifest:full-path="content.xml" manifest:media-type="text/xml"/>'
    b"</manifest:manifest>"
)
_CHUNK = 1 << 20

# A cell is filled (calamine keeps it, and its repeats) when it carries a value
# or a formula, or is a text cell (whose paragraphs are its value).
_FILLED = frozenset(
    (
        "office:value",
        "office:string-value",
        "office:date-value",
        "office:time-value",
        "office:boolean-value",
        "table:formula",
    )
)
_CELLS = frozenset(("table:table-cell", "table:covered-table-cell"))


@dataclass
class _Extent:
    """The extent of one sheet of an .ods, from A1 to its last filled cell."""

    name: str | None
    rows: int = 0
    width: int = 0

    @property
    def cells(self) -> int:
        return self.rows * self.width


def _repeats(attrs: dict[str, str], key: str) -> int:
    text = attrs.get(key)
    if text is None:
        return 1
    count = int(text)
    if count < 0:
        raise ValueError(f"{key}={text!r}")
    return count


class _ContentScan:
    """Stream content.xml through expat, measuring every sheet without building it.

    Rows and cells are counted with their repeats; the width of a row is the
    position after its last filled cell, and the rows of a sheet run to its
    last row with a filled cell (trailing empty rows repeated to the end of the
    sheet, as office suites write them, cost nothing). The contents of a cell
    are skipped. A document type declaration is refused (none in a real .ods).
    """

    def __init__(self) -> None:
        self.tables: list[_Extent] = []
        self._parser = xml.parsers.expat.ParserCreate()
        self._parser.StartDoctypeDeclHandler = self._doctype
        self._normal()
        self._depth = 0
        self._col = 0
        self._used = 0
        self._row_repeats = 1
        self._row_pos = 0

    def feed(self, chunk: bytes) -> None:
        self._parser.Parse(chunk, False)

    def close(self) -> list[_Extent]:
        self._parser.Parse(b"", True)
        return self.tables

    def _normal(self) -> None:
        self._parser.StartElementHandler = self._start
        self._parser.EndElementHandler = self._end

    def _doctype(self, *args: object) -> None:
        raise ValueError("content.xml has a document type declaration")

    def _start(self, name: str, attrs: dict[str, str]) -> None:
        if name in _CELLS:
            self._col += _repeats(attrs, "table:number-columns-repeated")
            if attrs and (
                not _FILLED.isdisjoint(attrs) or attrs.get("office:value-type") == "string"
            ):
                self._used = self._col
            self._depth = 1
            self._parser.StartElementHandler = self._skip_start
            self._parser.EndElementHandler = self._skip_end
        elif name == "table:table-row":
            self._row_repeats = _repeats(attrs, "table:number-rows-repeated")
            self._col = 0
            self._used = 0
        elif name == "table:table":
            self.tables.append(_Extent(attrs.get("table:name")))
            self._row_pos = 0

    def _end(self, name: str) -> None:
        if name == "table:table-row" and self.tables:
            table = self.tables[-1]
            self._row_pos += self._row_repeats
            if self._used:
                table.rows = self._row_pos
                table.width = max(table.width, self._used)

    def _skip_start(self, name: str, attrs: dict[str, str]) -> None:
        self._depth += 1

    def _skip_end(self, name: str) -> None:
        self._depth -= 1
        if not self._depth:
            self._normal()


def _ods_scan(
    raw: bytes, label: str, limits: Limits, copy: bool = False
) -> tuple[list[_Extent], bytes]:
    """The extents of the sheets and, if ``copy``, a fresh archive of the scanned content.

    The fresh archive holds the mimetype, a plain manifest and exactly the
    content.xml bytes scanned here (stored, not compressed), so calamine reads
    what was measured whatever the original archive's entries declare.
    """
    with zipfile.ZipFile(io.BytesIO(raw)) as archive:
        infos = archive.infolist()
        unpacked = sum(item.file_size for item in infos)
        if unpacked > limits.workbook_mb * 1e6:
            raise limits.exceeded(
                "workbook_mb", f"{label}: the workbook unpacks to {unpacked / 1e6:,.0f} MB"
            )
        present = {item.filename for item in infos}
        if "mimetype" not in present or "content.xml" not in present:
            raise ValueError("no OpenDocument mimetype and content.xml in the archive")
        with archive.open("mimetype") as member:
            if member.read(len(_ODS_MIMETYPE)) != _ODS_MIMETYPE:
                raise ValueError("its mimetype is not an OpenDocument spreadsheet")
        manifest = "META-INF/manifest.xml"
        if manifest in present and b"encryption-data" in archive.read(manifest):
            raise ValueError("it is password-protected")
        scan = _ContentScan()
        out = io.BytesIO()
        with archive.open("content.xml") as source:
            if not copy:
                while chunk := source.read(_CHUNK):
                    scan.feed(chunk)
                return scan.close(), b""
            with zipfile.ZipFile(out, "w", zipfile.ZIP_STORED) as fresh:
                fresh.writestr("mimetype", _ODS_MIMETYPE)
                fresh.writestr("META-INF/manifest.xml", _ODS_MANIFEST)
                size = archive.getinfo("content.xml").file_size
                with fresh.open("content.xml", "w", force_zip64=size >= 2**31) as target:
                    while chunk := source.read(_CHUNK):
                        scan.feed(chunk)
                        target.write(chunk)
        tables = scan.close()
    return tables, out.getvalue()


def _ods_names(raw: bytes, label: str, limits: Limits) -> list[str]:
    # A table without a name is not a sheet (calamine skips it too).
    return [t.name for t in _ods_scan(raw, label, limits)[0] if t.name is not None]


def _ods_rows(raw: bytes, name: str, label: str, limits: Limits) -> list[list[Any]]:
    from python_calamine import CalamineWorkbook

    tables, fresh = _ods_scan(raw, label, limits, copy=True)
    extent = max(
        (t for t in tables if t.name == name), key=lambda t: t.cells, default=_Extent(name)
    )
    _check_extent(label, name, extent.rows, extent.width, limits)
    total = sum(t.cells for t in tables)
    if total > limits.sheet_cells:
        raise limits.exceeded(
            "sheet_cells",
            f"{label}: the sheets of the workbook span {total:,} cells in all "
            "(an .ods is read whole to reach one sheet)",
        )
    try:
        book = CalamineWorkbook.from_filelike(io.BytesIO(fresh))
    except Exception as exc:
        # calamine tries every format it knows and reports only that none fit.
        raise ValueError(f"its content.xml is not laid out as a spreadsheet: {exc}") from exc
    # The workbook was read from memory: nothing to close.
    cells = book.get_sheet_by_name(name).to_python(skip_empty_area=False)
    return _trimmed([[_ods_cell(value) for value in row] for row in cells])


def _ods_cell(value: Any) -> Any:
    """One value of calamine's ``to_python`` as a grid cell."""
    kind = type(value)
    if kind is str:
        # calamine gives an empty cell, an error value and an empty text all as "".
        return value if value else None
    if kind is float:
        return _number(value)
    if kind is dt.date or kind is dt.datetime:
        return _stamp(value)
    return value
