"""Read a data file (CSV/TSV, Excel, Parquet) or a DataFrame into a :class:`Table`.

The file is never opened for writing, and its SHA-256 is computed by reading
it in chunks. How it is parsed depends on its kind and size:

* a text file below :data:`LARGE_TEXT_BYTES` and a workbook are read into
  memory and parsed from the bytes (pandas' C parser for text);
* a larger text file is streamed through pyarrow's CSV reader
  (:mod:`replicheck.io.arrow_csv`) with the encoding, delimiter and decimal mark
  the sniffers find in its first megabyte, giving the same table; when pyarrow
  cannot read it the way pandas does (ragged rows, ...) the in-memory parser is
  used after all;
* a Parquet file is read by pyarrow from the path, only the requested columns.

Every problem with the input becomes one :class:`~replicheck.errors.InputError`
line naming the file.
"""

from __future__ import annotations

import csv
import hashlib
import io
import os
import re
import warnings
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import IO, TYPE_CHECKING, cast

import numpy as np
import pandas as pd
from pandas.api.types import (
    is_bool_dtype,
    is_datetime64_any_dtype,
    is_numeric_dtype,
    is_object_dtype,
    is_string_dtype,
    is_timedelta64_dtype,
)

from replicheck.advice import option
from replicheck.codebook import column_codes
from replicheck.errors import InputError, LimitExceeded, SheetChoice, brief
from replicheck.io.arrow_csv import Dialect, read_delimited
from replicheck.io.columns import (
    check_names,
    clean_names,
    parse_numbers,
    pick_columns,
    quote_list,
    resolve_column,
)
from replicheck.io.layout import HEAD_ROWS, TAIL_ROWS, find_box
from replicheck.io.locate import (
    CellRange,
    cut_grid,
    cut_text,
    parse_range,
    split_line,
    stack_blocks,
)
from replicheck.io.scan import (
    FileStart,
    Meter,
    ProgressCallback,
    probe_file,
    scan_encodings,
    scan_file,
)
from replicheck.io.table import DEFAULT_NA, Layout, Table
from replicheck.io.text import _SAMPLE_CHARS as _SNIFF_CHARS
from replicheck.io.text import (
    EncodingScan,
    EncodingScanner,
    choose_encoding,
    decode_text,
    first_record,
    sniff_decimal,
    sniff_delimiter,
)
from replicheck.io.workbook import workbook_grid, workbook_sheets
from replicheck.limits import Limits

if TYPE_CHECKING:
    import pyarrow as pa

#: Text files of at least this many bytes are parsed by pyarrow, streaming.
LARGE_TEXT_BYTES = 20 * 1024 * 1024

_TEXT_EXTENSIONS: dict[str, str | None] = {".csv": ",", ".tsv": "\t", ".tab": "\t", ".txt": None}
_EXCEL_EXTENSIONS = frozenset({".xlsx", ".xlsm"})
_PARQUET_EXTENSIONS = frozenset({".parquet", ".pq"})
_ZIP_MAGIC = b"PK\x03\x04"
_PARQUET_MAGIC = b"PAR1"
_OLE2_MAGIC = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"  # legacy .xls
_ODS_MIMETYPE = b"mimetypeapplication/vnd.oasis.opendocument.spreadsheet"


@dataclass(frozen=True)
class _MissingCodes:
    """Cell texts read as missing, and user codes that also match as numbers."""

    texts: frozenset[str]
    numbers: tuple[float, ...]


@dataclass(frozen=True)
class _Parsed:
    """A parsed frame before missing codes are applied, with how it was parsed."""

    frame: pd.DataFrame
    blank: set[int]
    format: str
    encoding: str | None = None
    delimiter: str | None = None
    decimal: str = "."
    sheet: str | None = None
    layout: Layout = field(default_factory=Layout)
    units: tuple[tuple[str, str], ...] = ()


@dataclass(frozen=True)
class _Where:
    """Where the user says the table is (``None``: found by the reader)."""

    header_row: int | None = None
    cell_range: CellRange | None = None

    @property
    def stated(self) -> bool:
        return self.header_row is not None or self.cell_range is not None


#: The layout of a table that has no rows in a file (Parquet, a DataFrame).
_NO_LAYOUT = Layout(header_row=None, first_row=None)


def read_table(
    source: str | os.PathLike[str] | pd.DataFrame,
    *,
    sheet: str | int | Sequence[str] | None = None,
    na_values: Sequence[str] = (),
    columns: Sequence[str] | None = None,
    progress: ProgressCallback | None = None,
    limits: Limits | None = None,
    header_row: int | None = None,
    cell_range: str | None = None,
    needed: Sequence[str] = (),
) -> Table:
    """Read ``source`` into a :class:`Table`.

    Parameters
    ----------
    source:
        A path to a ``.csv``/``.tsv``/``.txt``/``.tab``, ``.xlsx``/``.xlsm`` or
        ``.parquet``/``.pq`` file (other extensions: the content decides), or a
        DataFrame.
    sheet:
        Workbook sheet, by name or 0-based index; by default the one sheet
        that holds a table (two or more named columns and a data row), or,
        when several do, the one whose table has the ``needed`` columns (an
        input error asks for a choice when that does not settle it). ``"all"``
        or a list of names stacks the sheets that hold tables with the same
        columns, each row marked with its sheet in a new column ``sheet``; the
        other sheets are skipped and named in the layout.
    na_values:
        Missing-value codes in addition to :data:`DEFAULT_NA`. Codes that are
        numbers (e.g. ``"-99"``) also match numeric cells (-99, -99.0).
    columns:
        Read only these columns (``None``: all). Names are matched as
        :func:`~replicheck.io.columns.resolve_column` does (``"Tank ID"`` finds
        ``"tank_id"``); the table keeps file order. Large text and Parquet
        files then skip the other columns while parsing. Rows are dropped when
        all *read* cells are missing, so a row that has values only in columns
        left out is dropped too.
    progress:
        Called as ``progress(done, total)`` while a file is read; ``total`` is
        twice the file size (one pass to hash, one to parse) and the last call
        has ``done == total``. Not called for a DataFrame.
    limits:
        The file size, column count, text cell length and workbook size that
        end in :class:`InputError` when passed (default :class:`Limits`).
    header_row, cell_range:
        The row of the column names (counting from 1, as a spreadsheet or an
        editor shows it), or the cells that hold the table in spreadsheet
        notation (``"A3:F130"``; its first row is the header); by default the
        table is found (:mod:`replicheck.io.layout`): title and note rows above
        the header, a units row under it and footnotes below the data are
        skipped, and the table's :attr:`~Table.layout` says what was read.
    needed:
        Columns the caller needs (the claimed treatments), used only to choose
        the sheet of a workbook whose sheets hold several tables.

    Raises
    ------
    InputError
        The file is missing, empty, binary, corrupt, has no data rows or has
        duplicate column names; it passes a limit; the sheet does not exist; a requested column
        does not exist (the message names the closest columns).

    Examples
    --------
    >>> import pandas as pd
    >>> t = read_table(pd.DataFrame({" y ": ["1", "-99", "."]}), na_values=["-99"])
    >>> t.columns, t.data["y"].tolist()
    (['y'], [1.0])
    """
    codes = _missing_codes(na_values)
    wanted = _wanted_columns(columns)
    limits = limits or Limits()
    where = _Where(header_row, None if cell_range is None else parse_range(cell_range))
    if header_row is not None and cell_range is not None:
        raise InputError("state either the header row or the range of cells, not both")
    if header_row is not None and (isinstance(header_row, bool) or header_row < 1):
        raise InputError(f"the header row counts from 1, got {header_row!r}")
    if isinstance(source, pd.DataFrame):
        label = "<dataframe>"
        if sheet is not None:
            raise InputError("a sheet can be chosen only when reading an Excel workbook")
        if header_row is not None or cell_range is not None:
            raise InputError("a header row or a range can be stated only when reading a file")
        names, blank = clean_names(list(source.columns))
        check_names(names, blank, "the DataFrame")
        keep = pick_columns(names, wanted, "the DataFrame")
        frame = source.copy() if len(keep) == len(names) else source.iloc[:, keep].copy()
        frame.columns = pd.Index([names[i] for i in keep])
        parsed = _Parsed(frame, _remap(blank, keep), "dataframe", layout=_NO_LAYOUT)
        digest = None
    elif isinstance(source, str | os.PathLike):
        label = os.fspath(source)
        digest, parsed = _read_file(
            Path(label), label, sheet, codes, wanted, progress, limits, where, needed
        )
    else:
        raise InputError(f"expected a file path or a DataFrame, got {type(source).__name__}")
    if parsed.frame.shape[1] > limits.columns:
        raise limits.exceeded(
            "columns", f"{label}: the table has {parsed.frame.shape[1]:,} columns"
        )
    holder = [parsed.frame]
    n_read = len(parsed.frame)
    parsed = replace(parsed, frame=pd.DataFrame())  # the holder keeps the only reference
    data = _apply_missing(holder, parsed.blank, codes, parsed.decimal, consume=digest is not None)
    layout = replace(
        parsed.layout,
        empty_rows=n_read - len(data),
        units=tuple((name, unit) for name, unit in parsed.units if name in data.columns),
    )
    if len(data) == 0:
        place = "the DataFrame" if digest is None else f"{label}:"
        raise InputError(f"{place} has no data rows")
    _check_cells(data, label, limits)
    is_text = parsed.format in ("csv", "tsv")
    return Table(
        data=data,
        source=label,
        sha256=digest,
        format=parsed.format,
        encoding=parsed.encoding,
        delimiter=parsed.delimiter,
        decimal=parsed.decimal if is_text else None,
        sheet=parsed.sheet,
        layout=layout,
    )


def read_header(
    source: str | os.PathLike[str] | pd.DataFrame, *, sheet: str | int | None = None
) -> list[str]:
    """The column names :func:`read_table` would give, without reading the data.

    Names are cleaned as in the table (surrounding whitespace and byte-order
    marks removed; a blank header is ``"Unnamed: i"``). A text file is sniffed
    from its first megabyte (the whole file is scanned only when the header
    has non-ASCII characters, whose decoding depends on the whole file's
    encoding); a Parquet file's schema and a workbook's first row are read.
    Unnamed columns are listed even when :func:`read_table` would drop them
    for being empty, and problems in the data rows are not looked for.

    Raises
    ------
    InputError
        As :func:`read_table` for a missing, empty, binary or corrupt file,
        an unknown sheet, or duplicate column names.
    """
    if isinstance(source, pd.DataFrame):
        if sheet is not None:
            raise InputError("a sheet can be chosen only when reading an Excel workbook")
        names, blank = clean_names(list(source.columns))
        check_names(names, blank, "the DataFrame")
        return names
    if not isinstance(source, str | os.PathLike):
        raise InputError(f"expected a file path or a DataFrame, got {type(source).__name__}")
    label = os.fspath(source)
    path = Path(label)
    start = probe_file(path, label)
    kind = _file_kind(start, path, label, sheet)
    if kind == "parquet":
        return _parquet_header(path, label)
    if kind in ("xlsx", "xls", "ods"):
        raw = _read_bytes(path, label)
        parsed = _read_sheets(raw, kind, label, sheet, Limits(), _missing_codes(()), _Where())
        return [str(c) for c in parsed.frame.columns]
    head_text = _header_text(path, start, label)
    delimiter = sniff_delimiter(head_text, _hint(path))
    cut = cut_text(head_text, delimiter, frozenset(DEFAULT_NA), label=label)
    if cut.names is not None:
        return clean_names(list(cut.names))[0]
    return _text_header(cut.text, delimiter, label)[0]


def _wanted_columns(columns: Sequence[str] | None) -> tuple[str, ...] | None:
    if columns is None:
        return None
    wanted = (columns,) if isinstance(columns, str) else tuple(str(c) for c in columns)
    if not wanted:
        raise InputError("no columns requested (pass None to read all columns)")
    return wanted


def _remap(blank: set[int], positions: Sequence[int]) -> set[int]:
    """Blank-header positions renumbered after keeping the columns at ``positions``."""
    return {new for new, old in enumerate(positions) if old in blank}


def _missing_codes(user: Sequence[str]) -> _MissingCodes:
    if isinstance(user, str):  # one code, not a sequence of one-letter codes
        user = (user,)
    extra = [str(code).strip() for code in user]
    numbers = parse_numbers(pd.Series(extra, dtype=object)).dropna()
    return _MissingCodes(frozenset(DEFAULT_NA) | frozenset(extra), tuple(numbers))


def _file_kind(
    start: FileStart, path: Path, label: str, sheet: str | int | Sequence[str] | None
) -> str:
    """``"xlsx"``, ``"xls"``, ``"ods"``, ``"parquet"`` or ``"text"``: unmistakable
    content first, then the extension."""
    suffix = path.suffix.lower()
    if start.head.startswith(_OLE2_MAGIC) or suffix == ".xls":
        return "xls"
    if _ODS_MIMETYPE in start.head[:120] or (
        suffix == ".ods" and not start.head.startswith(_PARQUET_MAGIC)
    ):
        return "ods"
    if start.head.startswith(_ZIP_MAGIC) or suffix in _EXCEL_EXTENSIONS:
        return "xlsx"
    if sheet is not None:
        raise InputError(f"{label}: a sheet can be chosen only for a workbook (.xlsx, .xls, .ods)")
    if (start.head.startswith(_PARQUET_MAGIC) and start.tail.endswith(_PARQUET_MAGIC)) or (
        suffix in _PARQUET_EXTENSIONS
    ):
        return "parquet"
    return "text"


def _read_bytes(path: Path, label: str) -> bytes:
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(f"{label}: cannot read the file ({exc.strerror or exc})") from exc
    if not raw:
        raise InputError(f"{label}: the file is empty (0 bytes)")
    return raw


def _read_file(
    path: Path,
    label: str,
    sheet: str | int | Sequence[str] | None,
    codes: _MissingCodes,
    wanted: tuple[str, ...] | None,
    progress: ProgressCallback | None,
    limits: Limits,
    where: _Where,
    needed: Sequence[str] = (),
) -> tuple[str, _Parsed]:
    """The file's SHA-256 and its parsed frame (only the ``wanted`` columns)."""
    start = probe_file(path, label)
    if start.size > limits.file_mb * 1e6:
        raise limits.exceeded("file_mb", f"{label}: the file holds {start.size / 1e6:,.0f} MB")
    meter = Meter(progress, 2 * start.size)
    kind = _file_kind(start, path, label, sheet)
    parsed: _Parsed | None = None
    if kind == "parquet":
        if where.stated:
            raise InputError(
                f"{label}: a header row or a range can be stated only for text files and "
                "workbooks (a Parquet file names its columns)"
            )
        digest = scan_file(path, start, label, meter, text=False).sha256
        parsed = _parse_parquet(path, label, wanted)
    elif kind == "text" and start.size >= LARGE_TEXT_BYTES:
        scan = scan_file(path, start, label, meter, text=True)
        digest = scan.sha256
        assert scan.encodings is not None
        parsed = None
        if not where.stated:
            parsed = _parse_large_text(path, start, scan.encodings, label, codes, wanted, meter)
        if parsed is None:  # pyarrow cannot read it as pandas would: parse in memory
            parsed = _parse_text(_read_bytes(path, label), label, _hint(path), codes, wanted, where)
    else:
        raw = _read_bytes(path, label)
        meter.to(len(raw))
        digest = hashlib.sha256(raw).hexdigest()
        if kind in ("xlsx", "xls", "ods"):
            parsed = _select(
                _read_sheets(raw, kind, label, sheet, limits, codes, where, needed), wanted, label
            )
        else:
            parsed = _parse_text(raw, label, _hint(path), codes, wanted, where)
        del raw
    meter.finish()
    return digest, parsed


def _hint(path: Path) -> str | None:
    return _TEXT_EXTENSIONS.get(path.suffix.lower())


def _select(parsed: _Parsed, wanted: tuple[str, ...] | None, label: str) -> _Parsed:
    """Keep only the ``wanted`` columns of a parsed frame."""
    if wanted is None:
        return parsed
    names = [str(c) for c in parsed.frame.columns]
    positions = pick_columns(names, wanted, label)
    if len(positions) == len(names):
        return parsed
    frame = parsed.frame.iloc[:, positions]
    return replace(parsed, frame=frame, blank=_remap(parsed.blank, positions))


def _text_header(head_text: str, delimiter: str, label: str) -> tuple[list[str], set[int], bool]:
    """Cleaned header names, blank positions, and whether pandas splits the header alike.

    The names come from the first record as the csv module splits it; when
    pandas' parser finds a different number of fields there (odd quoting), the
    in-memory parser trusts pandas, and so does this.
    """
    names, blank = clean_names(first_record(head_text, delimiter))
    check_names(names, blank, label)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            seen = pd.read_csv(
                io.StringIO(head_text),
                sep=delimiter,
                header=0,
                nrows=0,
                index_col=False,
                engine="c",
            ).columns
    except Exception:  # the in-memory parser will report any real problem
        return names, blank, False
    if len(seen) == len(names):
        return names, blank, True
    names, blank = clean_names(list(seen))
    return names, blank, False


def _header_text(path: Path, start: FileStart, label: str) -> str:
    """The decoded start of a text file, as decoded with the whole file's encoding.

    The whole file is scanned only when its encoding can change the header's
    characters: a non-ASCII header in a file without a byte-order mark.
    """
    if start.size <= len(start.head):
        return decode_text(start.head, label)[0]
    scanner = EncodingScanner(start.head, start.size)
    scanner.update(start.head)
    head_text, encoding = choose_encoding(
        start.head, start.size, scanner.finish(final=False), label
    )
    if encoding in ("utf-8", "cp1252", "latin-1"):
        delimiter = sniff_delimiter(head_text, _hint(path))
        if not all(field.isascii() for field in first_record(head_text, delimiter)):
            scan = scan_encodings(path, start, label)
            head_text = choose_encoding(start.head, start.size, scan, label)[0]
    return head_text


def _parse_large_text(
    path: Path,
    start: FileStart,
    scan: EncodingScan,
    label: str,
    codes: _MissingCodes,
    wanted: tuple[str, ...] | None,
    meter: Meter,
) -> _Parsed | None:
    """Parse a large text file with pyarrow; ``None`` when it must be parsed in memory."""
    head_text, encoding = choose_encoding(start.head, start.size, scan, label)
    if not head_text.strip():
        return None
    if start.size > len(start.head) and len(head_text) <= _SNIFF_CHARS:
        return None  # the sniffers would not see what they see in the whole text
    if start.size > len(start.head) and not re.search(r"[\r\n]", head_text):
        return None  # the header line runs past the head (a very wide table)
    delimiter = sniff_delimiter(head_text, _hint(path))
    decimal = sniff_decimal(head_text, delimiter)
    names, blank, pandas_agrees = _text_header(head_text, delimiter, label)
    first_line = re.split(r"\r\n|\r|\n", head_text, maxsplit=1)[0]
    if not pandas_agrees or next(csv.reader([first_line], delimiter=delimiter), []) != (
        first_record(head_text, delimiter)
    ):
        return None  # the header is not simply the first line
    if not _plain_edges(path, start, head_text, encoding, delimiter, codes):
        return None  # titles, a units row or notes: cut in memory
    positions = pick_columns(names, wanted, label)
    frame = read_delimited(
        str(path),
        Dialect(encoding, delimiter, decimal, len(names)),
        positions,
        [names[i] for i in positions],
        sorted(codes.texts),
        head_text,
        meter,
        offset=start.size,
    )
    if frame is None:
        return None
    kind = "tsv" if delimiter == "\t" else "csv"
    return _Parsed(frame, _remap(blank, positions), kind, encoding, delimiter, decimal)


def _plain_edges(
    path: Path,
    start: FileStart,
    head_text: str,
    encoding: str,
    delimiter: str,
    codes: _MissingCodes,
) -> bool:
    """Whether a large text file starts with its header and ends with data rows."""
    try:
        with path.open("rb") as handle:
            handle.seek(max(0, start.size - 65536))
            tail_raw = handle.read()
    except OSError:
        return False
    tail_text = tail_raw.decode(encoding, errors="replace")
    tail = tail_text.splitlines(keepends=True)[1:][-TAIL_ROWS:]
    head = head_text.splitlines(keepends=True)[:HEAD_ROWS]
    if len(head) < HEAD_ROWS:
        return False
    box = find_box(
        [split_line(line, delimiter) for line in head],
        [split_line(line, delimiter) for line in tail],
        10**12,
        missing=codes.texts,
    )
    return box.tidy


def _parse_text(
    raw: bytes,
    label: str,
    hint: str | None,
    codes: _MissingCodes,
    wanted: tuple[str, ...] | None = None,
    where: _Where | None = None,
) -> _Parsed:
    text, encoding = decode_text(raw, label)
    if not text.strip():
        raise InputError(f"{label}: the file is empty (only whitespace)")
    where = where or _Where()
    delimiter = sniff_delimiter(text, hint)
    decimal = sniff_decimal(text, delimiter)
    cut = cut_text(
        text,
        delimiter,
        codes.texts,
        header_row=where.header_row,
        cell_range=where.cell_range,
        label=label,
    )
    if cut.text is not text:
        del text
        text = cut.text
        decimal = sniff_decimal(text, delimiter)
    names, blank = clean_names(first_record(text, delimiter))
    if cut.names is None and not cut.blocks:
        check_names(names, blank, label)
    try:
        with warnings.catch_warnings():
            # rows longer than the header would be cut silently: make it an error
            warnings.simplefilter("error", pd.errors.ParserWarning)
            frame = pd.read_csv(
                io.StringIO(text),
                sep=delimiter,
                decimal=decimal,
                header=0,
                index_col=False,
                na_values=sorted(codes.texts),
                keep_default_na=False,
                low_memory=False,
                engine="c",
            )
    except pd.errors.EmptyDataError as exc:
        raise InputError(f"{label}: has no data rows") from exc
    except (pd.errors.ParserError, pd.errors.ParserWarning, csv.Error, ValueError) as exc:
        shown = "tab" if delimiter == "\t" else repr(delimiter)
        raise InputError(
            f"{label}: cannot be read as {shown}-delimited text; some rows have more fields "
            f"than the header or quotes are unbalanced ({brief(exc)})"
        ) from exc
    header_cells: list[object] = list(first_record(text, delimiter)) if cut.blocks else []
    del text
    if cut.blocks and len(frame.columns) == len(header_cells):
        frame.columns = pd.RangeIndex(frame.shape[1])
        cells, frame, units_at, side = stack_blocks(
            header_cells, frame, cut.blocks, dict(cut.units or {})
        )
        names, blank = clean_names(cells)
        check_names(names, blank, label)
        frame.columns = pd.Index(names)
        layout = replace(
            cut.layout,
            tables=side.tables,
            table_column=side.table_column,
            skipped_tables=side.skipped_tables,
        )
        cut = replace(cut, layout=layout, units=units_at, names=None)
    elif cut.names is not None and len(frame.columns) == len(cut.names):
        names, blank = clean_names(list(cut.names))
        check_names(names, blank, label)
        frame.columns = pd.Index(names)
    elif len(frame.columns) == len(names):
        frame.columns = pd.Index(names)
    else:  # the header split differently from pandas' view (odd quoting): trust pandas
        names, blank = clean_names(list(frame.columns))
        frame.columns = pd.Index(names)
    if cut.columns is not None:
        positions = list(range(len(names)))[cut.columns]
        if not positions:
            raise InputError(f"{label}: the range holds no columns of the table")
        frame = frame.iloc[:, positions]
        names = [names[i] for i in positions]
        blank = _remap(blank, positions)
        if cut.units is not None:
            shift = cut.columns.start or 0
            cut = replace(cut, units={j - shift: u for j, u in cut.units.items()})
        check_names(names, blank, label)
    units = tuple(
        (names[j], unit) for j, unit in sorted((cut.units or {}).items()) if j < len(names)
    )
    kind = "tsv" if delimiter == "\t" else "csv"
    parsed = _Parsed(
        frame, blank, kind, encoding, delimiter, decimal, layout=cut.layout, units=units
    )
    return _select(parsed, wanted, label)


def _pick_sheet(available: list[str], sheet: str | int | None, label: str) -> str:
    listing = f"available sheets: {quote_list(available)}"
    if sheet is None:
        return available[0]
    if isinstance(sheet, int):
        if 0 <= sheet < len(available):
            return available[sheet]
        raise InputError(f"{label}: no sheet number {sheet} (counting from 0); {listing}")
    if sheet in available:
        return sheet
    folded = [name for name in available if name.casefold() == sheet.strip().casefold()]
    if len(folded) == 1:
        return folded[0]
    if sheet.strip().isdigit() and int(sheet) < len(available):
        return available[int(sheet)]
    raise InputError(f"{label}: no sheet '{sheet}'; {listing}")


def _check_cells(frame: pd.DataFrame, label: str, limits: Limits) -> None:
    """Every text cell within the length limit."""
    for col, dtype in frame.dtypes.items():
        if not (is_object_dtype(dtype) or is_string_dtype(dtype)):
            continue
        distinct = pd.unique(frame[col].to_numpy(dtype=object))
        longest = max((len(v) for v in distinct if isinstance(v, str)), default=0)
        if longest > limits.cell_chars:
            raise limits.exceeded(
                "cell_chars",
                f"{label}: a text cell of column '{col}' holds {longest:,} characters",
            )


def _excel_extent(
    raw: bytes, name: str, label: str, limits: Limits
) -> list[tuple[int, int, int, int]]:
    """Refuse a workbook that unpacks to too much, or a sheet whose grid is too large;
    return the sheet's merged cell ranges.

    A sheet's grid runs to its farthest cell, so one cell in the last column or
    row of a sheet makes a grid of millions of empty cells; the extent is found
    by streaming the rows (openpyxl's read-only mode, declared dimensions
    ignored) before the sheet is read. The merged ranges (0-based first row,
    first column, last row, last column) are streamed from the sheet's XML.
    """
    import zipfile

    import openpyxl

    with zipfile.ZipFile(io.BytesIO(raw)) as archive:
        unpacked = sum(item.file_size for item in archive.infolist())
    if unpacked > limits.workbook_mb * 1e6:
        raise limits.exceeded(
            "workbook_mb", f"{label}: the workbook unpacks to {unpacked / 1e6:,.0f} MB"
        )
    book = openpyxl.load_workbook(io.BytesIO(raw), read_only=True, data_only=True)
    try:
        ws = book[name]
        ws.reset_dimensions()
        width = 0
        for rows, row in enumerate(ws.iter_rows(values_only=True), start=1):
            used = len(row)
            while used and row[used - 1] is None:
                used -= 1
            width = max(width, used)
            if width > limits.columns:
                raise limits.exceeded(
                    "columns", f"{label}: sheet '{name}' runs to column {width:,}"
                )
            if rows * max(width, 1) > limits.sheet_cells:
                raise limits.exceeded(
                    "sheet_cells",
                    f"{label}: sheet '{name}' spans more than {rows:,} rows by {width:,} columns",
                )
        member = getattr(ws, "_worksheet_path", None)
    finally:
        book.close()
    if not isinstance(member, str):
        return []
    with zipfile.ZipFile(io.BytesIO(raw)) as archive, archive.open(member) as xml:
        return _merged_ranges(xml)


_MERGE = re.compile(rb'<(?:\w+:)?mergeCell\s+ref="([A-Z]{1,3})(\d{1,7}):([A-Z]{1,3})(\d{1,7})"')
#: Merged ranges read from one sheet at most (a sheet of notes may merge many).
_MAX_MERGES = 100_000


def _merged_ranges(xml: IO[bytes]) -> list[tuple[int, int, int, int]]:
    """The merged ranges declared in a sheet's XML, streamed in blocks."""
    from replicheck.io.locate import column_number

    found: list[tuple[int, int, int, int]] = []
    carry = b""
    while block := xml.read(1 << 20):
        text = carry + block
        last_end = 0
        for m in _MERGE.finditer(text):
            c0, r0, c1, r1 = m.groups()
            first = (int(r0) - 1, column_number(c0.decode()))
            last = (int(r1) - 1, column_number(c1.decode()))
            found.append((*first, *last))
            last_end = m.end()
            if len(found) >= _MAX_MERGES:
                return found
        carry = text[max(last_end, len(text) - 64) :]  # a tag cut by the block's end
    return found


#: A sheet holds a table when it has at least this many named columns.
_TABLE_COLUMNS = 2


def _sheet_names(raw: bytes, kind: str, label: str, limits: Limits) -> list[str]:
    if kind != "xlsx":
        return workbook_sheets(raw, kind, label, limits)
    try:
        with pd.ExcelFile(io.BytesIO(raw), engine="openpyxl") as book:
            return [str(name) for name in book.sheet_names]
    except Exception as exc:
        raise InputError(f"{label}: not a readable Excel workbook ({brief(exc)})") from exc


def _holds_table(parsed: _Parsed) -> bool:
    named = [i for i in range(parsed.frame.shape[1]) if i not in parsed.blank]
    return len(named) >= _TABLE_COLUMNS and len(parsed.frame) > 0


def _read_sheets(
    raw: bytes,
    kind: str,
    label: str,
    sheet: str | int | Sequence[str] | None,
    limits: Limits,
    codes: _MissingCodes,
    where: _Where,
    needed: Sequence[str] = (),
) -> _Parsed:
    """The chosen sheet, the first that holds a table, or several stacked."""
    if sheet is not None and not _several(sheet):
        return _parse_workbook(raw, kind, label, cast("str | int", sheet), limits, codes, where)
    available = _sheet_names(raw, kind, label, limits)
    if not available:
        raise InputError(f"{label}: the workbook has no sheets")
    if sheet is None and len(available) == 1:
        return _parse_workbook(raw, kind, label, available[0], limits, codes, where)
    listed = [] if isinstance(sheet, str | int | None) else [str(s) for s in sheet]
    names = [_pick_sheet(available, s, label) for s in listed] if listed else available
    tables: list[_Parsed] = []
    skipped: list[str] = []
    for name, parsed in _tables(raw, kind, label, names, limits, codes, where):
        if parsed is None:
            skipped.append(name)
        else:
            tables.append(parsed)
    if sheet is None:
        return _default_sheet(tables, skipped, needed, label, available)
    return _stacked(tables, skipped, label)


def _default_sheet(
    tables: list[_Parsed],
    skipped: list[str],
    needed: Sequence[str],
    label: str,
    available: list[str],
) -> _Parsed:
    """The one sheet that holds a table, or the one whose table has the ``needed``
    columns; several candidates are not guessed between."""
    if not tables:
        raise InputError(
            f"{label}: no sheet holds a table of two or more named columns; "
            f"sheets: {quote_list(available)}"
        )
    chosen = tables
    if len(tables) > 1 and needed:
        chosen = [t for t in tables if _has_columns(t, needed)]
    if len(chosen) != 1:
        names = tuple(str(t.sheet) for t in (chosen or tables))
        raise SheetChoice(
            f"{label}: sheets {quote_list(names)} each hold a table: choose one with "
            f"{option('sheet')}, or stack those with the same columns with "
            f"{option('sheet', 'all')}",
            names,
        )
    pick = chosen[0]
    others = [str(t.sheet) for t in tables if t is not pick]
    layout = replace(pick.layout, skipped_sheets=tuple([*skipped, *others]))
    return replace(pick, layout=layout)


def _has_columns(parsed: _Parsed, needed: Sequence[str]) -> bool:
    columns = [str(c) for c in parsed.frame.columns]
    for name in needed:
        try:
            resolve_column(columns, name)
        except InputError:
            return False
    return True


def _tables(
    raw: bytes,
    kind: str,
    label: str,
    names: Sequence[str],
    limits: Limits,
    codes: _MissingCodes,
    where: _Where,
) -> Iterator[tuple[str, _Parsed | None]]:
    """Each sheet with its table, or ``None`` when it holds none (a limit still stops)."""
    for name in names:
        try:
            parsed = _parse_workbook(raw, kind, label, name, limits, codes, where)
        except LimitExceeded:
            raise
        except InputError:
            yield name, None
            continue
        yield name, parsed if _holds_table(parsed) else None


def _several(sheet: str | int | Sequence[str]) -> bool:
    if isinstance(sheet, str):
        return sheet.strip().casefold() == "all"
    return not isinstance(sheet, int)


def _stacked(tables: list[_Parsed], skipped: list[str], label: str) -> _Parsed:
    """Sheets with the same columns, one under the other, with a ``sheet`` column."""
    if not tables:
        raise InputError(f"{label}: none of the sheets holds a table of two or more named columns")
    groups: dict[tuple[str, ...], list[_Parsed]] = {}
    for t in tables:
        groups.setdefault(tuple(str(c) for c in t.frame.columns), []).append(t)
    columns, chosen = max(groups.items(), key=lambda kv: len(kv[1]))
    others = [t.sheet for t in tables if all(t is not c for c in chosen)]
    if len(chosen) == 1 and len(tables) > 1:
        raise InputError(
            f"{label}: the sheets hold tables with different columns "
            f"({quote_list(str(t.sheet) for t in tables)}): choose one with {option('sheet')}"
        )
    key = "sheet" if "sheet" not in columns else "sheet (workbook)"
    frames = []
    for t in chosen:
        frame = t.frame.copy()
        frame.insert(0, key, str(t.sheet))
        frames.append(frame)
    frame = pd.concat(frames, ignore_index=True)
    first = chosen[0]
    blank = {i + 1 for i in first.blank}
    layout = replace(
        first.layout,
        sheets=tuple(str(t.sheet) for t in chosen),
        sheet_column=key,
        skipped_sheets=tuple(str(s) for s in [*skipped, *others]),
    )
    return _Parsed(frame, blank, first.format, layout=layout, units=first.units)


def _parse_workbook(
    raw: bytes,
    kind: str,
    label: str,
    sheet: str | int | None,
    limits: Limits,
    codes: _MissingCodes | None = None,
    where: _Where | None = None,
) -> _Parsed:
    """A sheet of a workbook (``kind``: xlsx, xls or ods) read as a grid, cut to its table."""
    merges: list[tuple[int, int, int, int]] = []
    if kind == "xlsx":
        name, grid, merges = _xlsx_grid(raw, label, sheet, limits)
    else:
        available = workbook_sheets(raw, kind, label, limits)
        if not available:
            raise InputError(f"{label}: the workbook has no sheets")
        name = _pick_sheet(available, sheet, label)
        grid = workbook_grid(raw, kind, name, label, limits)
    if grid.empty:
        raise InputError(f"{label}: sheet '{name}' has no data rows")
    return _sheet_table(
        grid, label, name, kind, codes or _missing_codes(()), where or _Where(), merges
    )


def _xlsx_grid(
    raw: bytes, label: str, sheet: str | int | None, limits: Limits
) -> tuple[str, pd.DataFrame, list[tuple[int, int, int, int]]]:
    """The chosen sheet of an .xlsx workbook as a grid from cell A1."""
    # openpyxl and zipfile raise many exception types on damaged files
    # (BadZipFile, KeyError, ValueError, XML errors): any failure here means corrupt input.
    try:
        with pd.ExcelFile(io.BytesIO(raw), engine="openpyxl") as book:
            available = [str(name) for name in book.sheet_names]
            name = _pick_sheet(available, sheet, label)
            merges = _excel_extent(raw, name, label, limits)
            grid = pd.read_excel(book, sheet_name=name, header=None, keep_default_na=False)
    except InputError:
        raise
    except Exception as exc:
        raise InputError(f"{label}: not a readable Excel workbook ({brief(exc)})") from exc
    return name, grid, merges


def _sheet_table(
    grid: pd.DataFrame,
    label: str,
    name: str,
    fmt: str,
    codes: _MissingCodes,
    where: _Where,
    merges: Sequence[tuple[int, int, int, int]] = (),
) -> _Parsed:
    """The table in a sheet's grid, found or as stated."""
    where_label = f"{label} (sheet '{name}')"
    cut = cut_grid(
        grid,
        codes.texts,
        header_row=where.header_row,
        cell_range=where.cell_range,
        label=where_label,
        merges=merges,
    )
    names, blank = clean_names(cut.header)
    check_names(names, blank, where_label)
    frame = cut.frame.infer_objects()
    frame = frame.iloc[:, : len(names)] if frame.shape[1] > len(names) else frame
    frame.columns = pd.Index(names[: frame.shape[1]])
    units = tuple((names[j], u) for j, u in sorted(cut.units.items()) if j < len(names))
    return _Parsed(frame, blank, fmt, sheet=name, layout=cut.layout, units=units)


def _parquet_frame(arrow: pa.Table, label: str) -> tuple[pd.DataFrame, set[int]]:
    """A Parquet table as a frame with cleaned names; consumes ``arrow``.

    A pandas index stored in the file comes back as the index: named levels
    are kept as (leading) columns, an unnamed index is dropped. A text column
    whose bytes are not UTF-8 (as Parquet requires) is an input error.
    """
    import pyarrow as pa

    for name, column in zip(arrow.column_names, arrow.columns, strict=True):
        if pa.types.is_string(column.type) or pa.types.is_large_string(column.type):
            try:
                column.validate(full=True)
            except pa.ArrowInvalid:
                raise InputError(
                    f"{label}: text column '{name}' holds bytes that are not UTF-8, as "
                    "Parquet requires: the file is damaged or was written wrongly"
                ) from None
    frame = arrow.to_pandas(split_blocks=True, self_destruct=True)
    named_index = any(level is not None for level in frame.index.names)
    frame = frame.reset_index(drop=not named_index)
    names, blank = clean_names(list(frame.columns))
    check_names(names, blank, label)
    frame.columns = pd.Index(names)
    return frame, blank


def _unreadable_parquet(label: str, exc: Exception) -> InputError:
    return InputError(f"{label}: not a readable Parquet file ({brief(exc)})")


def _parquet_header(path: Path, label: str) -> list[str]:
    import pyarrow.parquet as pq

    try:
        schema = pq.read_schema(str(path))
        check_names(*clean_names(schema.names), label)
        return list(_parquet_frame(schema.empty_table(), label)[0].columns)
    except InputError:
        raise
    except Exception as exc:  # pyarrow raises ArrowInvalid, OSError, ... on damaged files
        raise _unreadable_parquet(label, exc) from exc


def _parse_parquet(path: Path, label: str, wanted: tuple[str, ...] | None) -> _Parsed:
    """Read a Parquet file; with ``wanted``, only the file's columns of those names."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    def read(fields: list[str] | None) -> tuple[pd.DataFrame, set[int]]:
        with pa.OSFile(str(path)) as handle:
            arrow = pq.read_table(handle, columns=fields)
        return _parquet_frame(arrow, label)

    try:
        schema = pq.read_schema(str(path))
        check_names(*clean_names(schema.names), label)
        if wanted is None:
            frame, blank = read(None)
            return _Parsed(frame, blank, "parquet", layout=_NO_LAYOUT)
        header = list(_parquet_frame(schema.empty_table(), label)[0].columns)
        chosen = [header[i] for i in pick_columns(header, wanted, label)]
        frame, blank = read([f for f in schema.names if clean_names([f])[0][0] in chosen])
        if not set(chosen) <= set(frame.columns):
            # a column not stored under its name (e.g. an index range): read them all
            frame, blank = read(None)
    except InputError:
        raise
    except Exception as exc:  # pyarrow raises ArrowInvalid, OSError, ... on damaged files
        raise _unreadable_parquet(label, exc) from exc
    names = list(frame.columns)
    positions = [names.index(name) for name in chosen]
    return _Parsed(frame.iloc[:, positions], _remap(blank, positions), "parquet", layout=_NO_LAYOUT)


def _missing_in_column(series: pd.Series, codes: _MissingCodes, decimal: str) -> pd.Series:
    """Turn missing codes into NA; a text column whose other cells are all numbers
    becomes float.

    Text cells are judged once per distinct value when the column repeats its
    values (labels, codes), which gives the same result faster.
    """
    if is_bool_dtype(series) or is_datetime64_any_dtype(series) or is_timedelta64_dtype(series):
        return series
    if is_numeric_dtype(series) and not isinstance(series.dtype, pd.CategoricalDtype):
        return series.mask(series.isin(codes.numbers)) if codes.numbers else series
    if _blank(series):  # e.g. the empty columns before a stray cell far out in a sheet
        return pd.Series(np.nan, index=series.index, dtype=float)
    keys, cells = _distinct_cells(series)
    text = cells.astype("string").str.strip()
    numbers = parse_numbers(text, decimal)
    missing = text.isna() | text.isin(codes.texts) | numbers.isin(codes.numbers)
    if (numbers.notna() | missing).all():
        values = numbers.mask(missing)
        if keys is None:
            return values
        spread = np.append(values.to_numpy(dtype=float), np.nan)[keys]  # key -1: missing
        return pd.Series(spread, index=series.index)
    labels = text.mask(missing).astype(str)
    if keys is None:
        return labels
    if (
        series.dtype == labels.dtype
        and not bool(missing.any())
        and bool((labels.to_numpy(dtype=object) == cells.to_numpy(dtype=object)).all())
    ):
        return series  # a text column with nothing to change: kept as it is, not rebuilt
    return pd.Series(labels.array.take(keys, allow_fill=True), index=series.index)


def _blank(series: pd.Series) -> bool:
    """Whether every cell is missing or white space (stops at the first that is not)."""
    for v in series.to_numpy(dtype=object):
        if v is None or (isinstance(v, float) and v != v) or v is pd.NA or v is pd.NaT:
            continue
        if isinstance(v, str) and not v.strip():
            continue
        return False
    return True


# a column is judged by distinct value when its first cells repeat this much
_DISTINCT_SAMPLE = 10_000
_DISTINCT_SHARE = 0.1


def _distinct_cells(series: pd.Series) -> tuple[np.ndarray | None, pd.Series]:
    """``(keys, cells)`` with ``series == cells[keys]`` (key -1: a missing cell),
    or ``(None, series)`` when the values hardly repeat or cannot be hashed."""
    head = series.iloc[:_DISTINCT_SAMPLE]
    try:
        if head.nunique(dropna=True) > _DISTINCT_SHARE * max(len(head), 1):
            return None, series
        coded = column_codes(series)  # shared with the later stages of an audit
    except TypeError:  # unhashable cells (lists, ...)
        return None, series
    return np.asarray(coded.codes), pd.Series(coded.uniques)


def _apply_missing(
    holder: list[pd.DataFrame],
    blank: set[int],
    codes: _MissingCodes,
    decimal: str,
    consume: bool = True,
) -> pd.DataFrame:
    """Apply missing codes; drop all-missing rows and unnamed all-missing columns.

    ``holder`` holds the frame. With ``consume``, the frame is taken out of it
    and let go once its columns are taken as views, so each column's memory
    is freed once it is converted and a frame with one block per column (as
    pyarrow gives) is never held twice; without it (a DataFrame given by the
    caller), the holder keeps the frame.
    """
    frame = holder.pop() if consume else holder[0]
    names = [str(c) for c in frame.columns]
    # Popping columns one by one instead costs columns x blocks: minutes for a few
    # thousand columns.
    n_rows = len(frame)
    taken: list[pd.Series | None] = [frame.iloc[:, i] for i in range(len(names))]
    del frame
    filled = np.zeros(n_rows, dtype=bool)
    converted: dict[str, pd.Series] = {}
    for i, name in enumerate(names):
        raw = taken[i]
        taken[i] = None
        assert raw is not None
        column = _missing_in_column(raw, codes, decimal)
        present = column.notna().to_numpy(dtype=bool)
        if i in blank and not present.any():
            continue
        filled |= present
        converted[name] = column
    rows = None if filled.all() else np.flatnonzero(filled)
    arrays = {}
    for name in list(converted):
        column = converted.pop(name)
        arrays[name] = (column if rows is None else column.take(rows)).array
    index = pd.RangeIndex(len(filled) if rows is None else len(rows))
    return pd.DataFrame(arrays, index=index, copy=False)
