"""Read a data file (CSV/TSV, Excel, Parquet) or a DataFrame into a :class:`Table`.

The file is read once into memory, hashed, and parsed from the bytes; it is
never opened for writing. Every problem with the input becomes one
:class:`~replicheck.errors.InputError` line naming the file.
"""

from __future__ import annotations

import csv
import hashlib
import io
import os
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
from pandas.api.types import (
    is_bool_dtype,
    is_datetime64_any_dtype,
    is_numeric_dtype,
    is_timedelta64_dtype,
)

from replicheck.errors import InputError
from replicheck.io.columns import check_names, clean_names, parse_numbers, quote_list
from replicheck.io.table import DEFAULT_NA, Table
from replicheck.io.text import decode_text, first_record, sniff_decimal, sniff_delimiter

_TEXT_EXTENSIONS: dict[str, str | None] = {".csv": ",", ".tsv": "\t", ".tab": "\t", ".txt": None}
_EXCEL_EXTENSIONS = frozenset({".xlsx", ".xlsm"})
_PARQUET_EXTENSIONS = frozenset({".parquet", ".pq"})
_ZIP_MAGIC = b"PK\x03\x04"
_PARQUET_MAGIC = b"PAR1"
_OLE2_MAGIC = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"  # legacy .xls


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


def read_table(
    source: str | os.PathLike[str] | pd.DataFrame,
    *,
    sheet: str | int | None = None,
    na_values: Sequence[str] = (),
) -> Table:
    """Read ``source`` into a :class:`Table`.

    Parameters
    ----------
    source:
        A path to a ``.csv``/``.tsv``/``.txt``/``.tab``, ``.xlsx``/``.xlsm`` or
        ``.parquet``/``.pq`` file (other extensions: the content decides), or a
        DataFrame.
    sheet:
        Workbook sheet, by name or 0-based index; the first sheet by default.
    na_values:
        Missing-value codes in addition to :data:`DEFAULT_NA`. Codes that are
        numbers (e.g. ``"-99"``) also match numeric cells (-99, -99.0).

    Raises
    ------
    InputError
        The file is missing, empty, binary, corrupt, has no data rows or has
        duplicate column names; or the sheet does not exist.

    Examples
    --------
    >>> import pandas as pd
    >>> t = read_table(pd.DataFrame({" y ": ["1", "-99", "."]}), na_values=["-99"])
    >>> t.columns, t.data["y"].tolist()
    (['y'], [1.0])
    """
    codes = _missing_codes(na_values)
    if isinstance(source, pd.DataFrame):
        label = "<dataframe>"
        if sheet is not None:
            raise InputError("a sheet can be chosen only when reading an Excel workbook")
        names, blank = clean_names(list(source.columns))
        check_names(names, blank, "the DataFrame")
        frame = source.copy()
        frame.columns = pd.Index(names)
        parsed = _Parsed(frame, blank, "dataframe")
        digest = None
    elif isinstance(source, str | os.PathLike):
        label = os.fspath(source)
        raw = _read_bytes(Path(label), label)
        digest = hashlib.sha256(raw).hexdigest()
        parsed = _parse_bytes(raw, Path(label), label, sheet, codes)
    else:
        raise InputError(f"expected a file path or a DataFrame, got {type(source).__name__}")
    data = _apply_missing(parsed.frame, parsed.blank, codes, parsed.decimal)
    if len(data) == 0:
        where = "the DataFrame" if digest is None else f"{label}:"
        raise InputError(f"{where} has no data rows")
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
    )


def _missing_codes(user: Sequence[str]) -> _MissingCodes:
    if isinstance(user, str):  # one code, not a sequence of one-letter codes
        user = (user,)
    extra = [str(code).strip() for code in user]
    numbers = parse_numbers(pd.Series(extra, dtype=object)).dropna()
    return _MissingCodes(frozenset(DEFAULT_NA) | frozenset(extra), tuple(numbers))


def _read_bytes(path: Path, label: str) -> bytes:
    if not path.exists():
        raise InputError(f"{label}: file not found")
    if path.is_dir():
        raise InputError(f"{label}: is a directory, not a data file")
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(f"{label}: cannot read the file ({exc.strerror or exc})") from exc
    if not raw:
        raise InputError(f"{label}: the file is empty (0 bytes)")
    return raw


def _parse_bytes(
    raw: bytes, path: Path, label: str, sheet: str | int | None, codes: _MissingCodes
) -> _Parsed:
    """Dispatch on unmistakable content first, then on the extension."""
    suffix = path.suffix.lower()
    if raw.startswith(_OLE2_MAGIC) or suffix == ".xls":
        raise InputError(f"{label}: legacy .xls workbooks are not supported; save as .xlsx or .csv")
    if raw.startswith(_ZIP_MAGIC) or suffix in _EXCEL_EXTENSIONS:
        return _parse_excel(raw, label, sheet)
    if sheet is not None:
        raise InputError(f"{label}: a sheet can be chosen only for an Excel workbook")
    if (raw.startswith(_PARQUET_MAGIC) and raw.endswith(_PARQUET_MAGIC)) or (
        suffix in _PARQUET_EXTENSIONS
    ):
        return _parse_parquet(raw, label)
    return _parse_text(raw, label, _TEXT_EXTENSIONS.get(suffix), codes)


def _brief(exc: BaseException) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= 160 else text[:157] + "..."


def _parse_text(raw: bytes, label: str, hint: str | None, codes: _MissingCodes) -> _Parsed:
    text, encoding = decode_text(raw, label)
    if not text.strip():
        raise InputError(f"{label}: the file is empty (only whitespace)")
    delimiter = sniff_delimiter(text, hint)
    decimal = sniff_decimal(text, delimiter)
    names, blank = clean_names(first_record(text, delimiter))
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
            f"than the header or quotes are unbalanced ({_brief(exc)})"
        ) from exc
    if len(frame.columns) == len(names):
        frame.columns = pd.Index(names)
    else:  # the header split differently from pandas' view (odd quoting): trust pandas
        names, blank = clean_names(list(frame.columns))
        frame.columns = pd.Index(names)
    kind = "tsv" if delimiter == "\t" else "csv"
    return _Parsed(frame, blank, kind, encoding, delimiter, decimal)


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


def _parse_excel(raw: bytes, label: str, sheet: str | int | None) -> _Parsed:
    # openpyxl and zipfile raise many exception types on damaged files
    # (BadZipFile, KeyError, ValueError, XML errors): any failure here means corrupt input.
    try:
        with pd.ExcelFile(io.BytesIO(raw), engine="openpyxl") as book:
            available = [str(name) for name in book.sheet_names]
            name = _pick_sheet(available, sheet, label)
            grid = pd.read_excel(book, sheet_name=name, header=None, keep_default_na=False)
    except InputError:
        raise
    except Exception as exc:
        raise InputError(f"{label}: not a readable Excel workbook ({_brief(exc)})") from exc
    if grid.empty:
        raise InputError(f"{label}: sheet '{name}' has no data rows")
    names, blank = clean_names(grid.iloc[0].tolist())
    check_names(names, blank, f"{label} (sheet '{name}')")
    frame = grid.iloc[1:].reset_index(drop=True).infer_objects()
    frame.columns = pd.Index(names)
    return _Parsed(frame, blank, "xlsx", sheet=name)


def _parse_parquet(raw: bytes, label: str) -> _Parsed:
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        arrow = pq.read_table(pa.BufferReader(raw))
        check_names(*clean_names(arrow.column_names), label)
        frame = arrow.to_pandas()
    except InputError:
        raise
    except Exception as exc:  # pyarrow raises ArrowInvalid, OSError, ... on damaged files
        raise InputError(f"{label}: not a readable Parquet file ({_brief(exc)})") from exc
    # a pandas index stored in the file comes back as the index: keep named levels as columns
    named_index = any(level is not None for level in frame.index.names)
    frame = frame.reset_index(drop=not named_index)
    names, blank = clean_names(list(frame.columns))
    check_names(names, blank, label)
    frame.columns = pd.Index(names)
    return _Parsed(frame, blank, "parquet")


def _missing_in_column(series: pd.Series, codes: _MissingCodes, decimal: str) -> pd.Series:
    """Turn missing codes into NA; a text column whose other cells are all numbers
    becomes float."""
    if is_bool_dtype(series) or is_datetime64_any_dtype(series) or is_timedelta64_dtype(series):
        return series
    if is_numeric_dtype(series) and not isinstance(series.dtype, pd.CategoricalDtype):
        return series.mask(series.isin(codes.numbers)) if codes.numbers else series
    text = series.astype("string").str.strip()
    numbers = parse_numbers(text, decimal)
    missing = text.isna() | text.isin(codes.texts) | numbers.isin(codes.numbers)
    if (numbers.notna() | missing).all():
        return numbers.mask(missing)
    return text.mask(missing).astype(str)


def _apply_missing(
    frame: pd.DataFrame, blank: set[int], codes: _MissingCodes, decimal: str
) -> pd.DataFrame:
    """Apply missing codes; drop all-missing rows and unnamed all-missing columns."""
    columns = {
        name: _missing_in_column(frame.iloc[:, i], codes, decimal)
        for i, name in enumerate(frame.columns)
    }
    data = pd.DataFrame(columns, index=frame.index)
    keep = [
        name for i, name in enumerate(data.columns) if i not in blank or data[name].notna().any()
    ]
    return data[keep].dropna(how="all").reset_index(drop=True)
