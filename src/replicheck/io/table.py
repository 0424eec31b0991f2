"""The table object handed from the read stage to every later stage."""

from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

#: Cell contents read as missing in every format, in addition to the codes the
#: user passes. "." is the missing value of SAS and Stata exports, "-" a common
#: spreadsheet placeholder, "#N/A" the Excel error value for "not available".
#: Words that can be real labels (e.g. "None" for an untreated control) are left out.
#: A spreadsheet formula that fails stores an error value (#DIV/0!, #VALUE!, ...):
#: the cell holds no value, and is read as missing as R's readxl reads error cells.
DEFAULT_NA: tuple[str, ...] = (
    "",
    ".",
    "-",
    "NA",
    "N/A",
    "n/a",
    "na",
    "NaN",
    "nan",
    "#N/A",
    "NULL",
    "null",
    "#DIV/0!",
    "#VALUE!",
    "#REF!",
    "#NAME?",
    "#NUM!",
    "#NULL!",
)


@dataclass(frozen=True)
class ReadOptions:
    """What the user states about where the table is and how to read it.

    ``header_row`` (counting from 1) or ``cell_range`` (``"A3:F130"``) place
    the table instead of the reader's search; ``fill_down`` names columns to
    fill down whatever their pattern; ``find_fill`` turns the search for
    columns to fill down on or off; ``long`` holds patterns (``"day*"``) of
    wide columns to turn into long form and ``ids`` the columns that identify
    a wide row.
    """

    header_row: int | None = None
    cell_range: str | None = None
    fill_down: tuple[str, ...] = ()
    find_fill: bool = True
    long: tuple[str, ...] = ()
    ids: tuple[str, ...] = ()


@dataclass(frozen=True)
class FilledColumn:
    """A grouping column written once per block and filled down by the reader."""

    column: str
    cells: int
    blocks: int
    stated: bool = False
    merged: bool = False  # filled from the sheet's merged cells


@dataclass(frozen=True)
class Reshaped:
    """One wide-to-long reshape (see :mod:`replicheck.io.reshape`), for the report."""

    columns: tuple[str, ...]  # the wide columns, in file order
    key: str  # the new column holding the varying part
    values: tuple[str, ...]  # the new column(s) holding the measurements
    levels: int  # distinct varying parts
    rows_before: int
    rows_after: int
    row_column: str | None  # the column numbering the wide rows, if added
    stated: bool
    group: str | None = None  # the column holding group headings, if any


@dataclass(frozen=True)
class Layout:
    """How the table was found in the file: what a reviewer checks before the verdict.

    Row numbers count from 1 as a spreadsheet or text editor shows them
    (lines of a text file, rows of a sheet); ``None`` where they do not apply
    (Parquet, a DataFrame).

    Attributes
    ----------
    header_row:
        Row of the column names (the lower one of two header rows).
    header_rows:
        1, or 2 when a row of group headings above the names was joined to them.
    units_row:
        Row of units under the header, if one was found (skipped as data).
    first_row, last_row:
        First and last row read as data (``last_row`` is ``None`` when the
        data run to the end of the file).
    cell_range:
        The cells read, in spreadsheet notation, when they were stated or the
        table does not start in cell A1 of a sheet.
    skipped_above, skipped_below:
        Text of the non-empty rows skipped above the header (titles, notes)
        and below the data (footnotes).
    units:
        ``(column, unit)`` pairs from the units row.
    stated:
        What the user stated instead of leaving it to the reader
        (``"header row"``, ``"range"``).
    empty_rows:
        Rows dropped because every cell read is missing.
    filled:
        Columns filled down (see :mod:`replicheck.io.filldown`).
    reshaped:
        Wide families of columns turned into long form.
    sheets, sheet_column:
        The sheets stacked into one table, and the column naming each row's
        sheet (empty and ``None`` when one sheet was read).
    skipped_sheets:
        Sheets of the workbook not read: they hold no table, or a table with
        other columns than the ones stacked.
    tables, table_column, skipped_tables:
        Tables set side by side with the same columns, stacked (their titles)
        with each row's title in ``table_column``; tables beside the one read
        that have other columns, not read (title and columns).
    """

    header_row: int | None = 1
    header_rows: int = 1
    units_row: int | None = None
    first_row: int | None = 2
    last_row: int | None = None
    cell_range: str | None = None
    skipped_above: tuple[str, ...] = ()
    skipped_below: tuple[str, ...] = ()
    units: tuple[tuple[str, str], ...] = ()
    stated: tuple[str, ...] = ()
    empty_rows: int = 0
    filled: tuple[FilledColumn, ...] = ()
    reshaped: tuple[Reshaped, ...] = ()
    sheets: tuple[str, ...] = ()
    sheet_column: str | None = None
    skipped_sheets: tuple[str, ...] = ()
    tables: tuple[str, ...] = ()
    table_column: str | None = None
    skipped_tables: tuple[str, ...] = ()


@dataclass(frozen=True, eq=False)
class Table:
    """A data table as read, with where it came from and how it was parsed.

    Attributes
    ----------
    data:
        The table; missing-value codes are NA, column names are stripped of
        surrounding whitespace and byte-order marks, rows that are entirely
        missing are dropped.
    source:
        The path as given, or ``"<dataframe>"``.
    sha256:
        Hex SHA-256 of the file bytes (``None`` for a DataFrame).
    format:
        ``"csv"``, ``"tsv"``, ``"xlsx"``, ``"parquet"`` or ``"dataframe"``.
    encoding, delimiter, decimal:
        What was detected for a text file (``None`` otherwise).
    sheet:
        The sheet read from a workbook (``None`` otherwise).
    layout:
        Where the table was found in the file and what was changed in reading it.
    """

    data: pd.DataFrame
    source: str
    sha256: str | None
    format: str
    encoding: str | None = None
    delimiter: str | None = None
    decimal: str | None = None
    sheet: str | None = None
    layout: Layout = field(default_factory=Layout)

    @property
    def n_rows(self) -> int:
        """Number of data rows."""
        return len(self.data)

    @property
    def columns(self) -> list[str]:
        """Column names in file order."""
        return [str(c) for c in self.data.columns]
