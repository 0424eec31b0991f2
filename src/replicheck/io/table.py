"""The table object handed from the read stage to every later stage."""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

#: Cell contents read as missing in every format, in addition to the codes the
#: user passes. "." is the missing value of SAS and Stata exports, "-" a common
#: spreadsheet placeholder, "#N/A" the Excel error value for "not available".
#: Words that can be real labels (e.g. "None" for an untreated control) are left out.
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
)


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
    """

    data: pd.DataFrame
    source: str
    sha256: str | None
    format: str
    encoding: str | None = None
    delimiter: str | None = None
    decimal: str | None = None
    sheet: str | None = None

    @property
    def n_rows(self) -> int:
        """Number of data rows."""
        return len(self.data)

    @property
    def columns(self) -> list[str]:
        """Column names in file order."""
        return [str(c) for c in self.data.columns]
