"""The read stage: files and DataFrames in, a :class:`Table` out.

>>> from replicheck.io import read_table, read_header, resolve_column, numeric_column
"""

from replicheck.io.columns import numeric_column, resolve_column
from replicheck.io.filldown import fill_down
from replicheck.io.reader import read_header, read_table
from replicheck.io.table import DEFAULT_NA, FilledColumn, Layout, ReadOptions, Table

__all__ = [
    "DEFAULT_NA",
    "FilledColumn",
    "Layout",
    "ReadOptions",
    "Table",
    "fill_down",
    "numeric_column",
    "read_header",
    "read_table",
    "resolve_column",
]
