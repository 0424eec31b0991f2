"""Parse a large delimited text file with pyarrow's streaming CSV reader.

The reader stage's ordinary parser is pandas' C parser on the decoded text,
which needs the whole file and its decoded copy in memory. For large files
:func:`read_delimited` streams the file through ``pyarrow.csv.open_csv`` in
blocks instead and returns the frame pandas would have returned, so that the
later steps (missing codes, dropping empty rows) give the same table:

* the encoding, delimiter, decimal mark and header come from the same sniffers
  (the caller passes them); the header must be the file's first line;
* the same missing-value texts are null, for text columns too, and only the
  words pandas reads as booleans (``True``/``TRUE``/``true``, ``False``/...)
  are booleans;
* column types are first inferred by pyarrow on the first block, then checked
  against pandas' own reading of the first rows; a column where the two
  disagree (e.g. ``+1`` is an integer for pandas, a float for pyarrow), or
  that pyarrow reads as a date, time or timestamp, or as all-null, is read as
  text, and text cells are turned into numbers later exactly as for the
  ordinary parser. A later cell that does not fit the column's type restarts
  the read with that column as text;
* a text column whose cells are all integers with no missing cell becomes
  int64 (uint64 beyond int64's range), as pandas would read it.

Anything else pyarrow cannot read the way pandas does (rows with a different
number of fields, a header that is not on the first line, ...) makes
:func:`read_delimited` return ``None``, and the caller uses the ordinary parser.

Known difference left: in a column of integers, a cell written in hexadecimal
(``0x1F``) after the first block is read as a number by pyarrow, as text by
pandas.
"""

from __future__ import annotations

import io
import re
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import pandas as pd
from pandas.api.types import is_bool_dtype, is_integer_dtype, is_numeric_dtype

from replicheck.io.scan import Meter

if TYPE_CHECKING:
    import pyarrow as pa

#: Bytes pyarrow parses at a time (its first block is also where it infers types).
BLOCK_BYTES = 1 << 20
#: Characters of the file's start read by pandas to check pyarrow's column types.
SAMPLE_CHARS = 1 << 20

# pandas' C parser reads exactly these words as booleans (pyarrow adds "1"/"0").
_TRUE = ["True", "TRUE", "true"]
_FALSE = ["False", "FALSE", "false"]
_CONVERSION_ERROR = re.compile(r"In CSV column #(\d+): .*CSV conversion error to ")
# cells pandas' C parser reads as int64 (surrounding blanks and a sign allowed)
_INTEGER_TEXT = r"^\s*[+-]?[0-9]+\s*$"


@dataclass(frozen=True)
class Dialect:
    """How a text file is written, as the sniffers found it."""

    encoding: str
    delimiter: str
    decimal: str
    n_fields: int


def _arrow_encoding(encoding: str) -> str:
    # pyarrow reads UTF-8 natively; the header line with any BOM is skipped
    return "utf8" if encoding in ("utf-8", "utf-8-sig") else encoding


def _sample_kinds(sample: str, dialect: Dialect, na_texts: Sequence[str]) -> dict[int, str]:
    """numpy kind letter of each column as pandas reads the first rows ({} if it cannot).

    The sample may end inside a quoted cell that holds a line break; pandas
    then stops with an error, and a sample half as long is tried.
    """
    cut = sample[:SAMPLE_CHARS]
    for _ in range(4):
        if "\n" in cut:
            cut = cut[: cut.rindex("\n") + 1]
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                frame = pd.read_csv(
                    io.StringIO(cut),
                    sep=dialect.delimiter,
                    decimal=dialect.decimal,
                    header=0,
                    index_col=False,
                    na_values=list(na_texts),
                    keep_default_na=False,
                    low_memory=False,
                    engine="c",
                )
        except Exception:  # a cut quoted cell, or worse: try a shorter sample
            cut = cut[: len(cut) // 2]
            continue
        if len(frame.columns) != dialect.n_fields:
            return {}
        kinds: dict[int, str] = {}
        for i in range(dialect.n_fields):
            dtype = frame.dtypes.iloc[i]
            if is_bool_dtype(dtype):
                kinds[i] = "b"
            elif is_integer_dtype(dtype):
                kinds[i] = "i"
            elif is_numeric_dtype(dtype):
                kinds[i] = "f"
            else:
                kinds[i] = "O"
        return kinds
    return {}


def _settle_type(inferred: pa.DataType, pandas_kind: str | None) -> pa.DataType:
    """The type to read a column with, given pyarrow's and pandas' first look."""
    import pyarrow as pa

    text = pa.string()
    if inferred == pa.int64():
        return inferred if pandas_kind in (None, "i", "f") else text
    if inferred == pa.float64():
        return inferred if pandas_kind in (None, "f") else text
    if inferred == pa.bool_():
        return inferred if pandas_kind in (None, "b", "O") else text
    return text  # string, null, dates, times, timestamps, ...


def _integer_column(column: pa.ChunkedArray) -> pa.ChunkedArray | None:
    """The cells as pandas would read them when all are integers and none is missing:
    int64, or uint64 beyond int64's range (None otherwise)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if column.null_count or not pc.all(pc.match_substring_regex(column, _INTEGER_TEXT)).as_py():
        return None
    digits = pc.replace_substring_regex(pc.utf8_trim_whitespace(column), r"^\+", "")
    for kind in (pa.int64(), pa.uint64()):
        try:
            return pc.cast(digits, kind)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):  # out of range
            continue
    return None


def read_delimited(
    path: str,
    dialect: Dialect,
    positions: Sequence[int],
    names: Sequence[str],
    na_texts: Sequence[str],
    sample: str,
    meter: Meter,
    offset: int = 0,
) -> pd.DataFrame | None:
    """The file's columns at ``positions`` (file order) as pandas would parse them.

    ``names`` label the returned columns (one per position); ``na_texts`` are
    the cell texts read as missing; ``sample`` is the decoded start of the
    file. Progress goes to ``meter`` as ``offset`` plus the bytes read. Returns
    ``None`` when pyarrow cannot read the file the way pandas would.
    """
    import pyarrow as pa
    import pyarrow.csv as pv

    fields = [f"c{i}" for i in range(dialect.n_fields)]
    wanted = [fields[i] for i in positions]
    read_options = pv.ReadOptions(
        column_names=fields,
        skip_rows=1,
        encoding=_arrow_encoding(dialect.encoding),
        block_size=BLOCK_BYTES,
    )
    parse_options = pv.ParseOptions(
        delimiter=dialect.delimiter,
        quote_char='"',
        double_quote=True,
        escape_char=False,
        newlines_in_values=True,
        ignore_empty_lines=True,
    )

    def convert(types: dict[str, pa.DataType] | None) -> pv.ConvertOptions:
        return pv.ConvertOptions(
            include_columns=wanted,
            column_types=types,
            null_values=list(na_texts),
            strings_can_be_null=True,
            quoted_strings_can_be_null=True,
            true_values=_TRUE,
            false_values=_FALSE,
            decimal_point=dialect.decimal,
            check_utf8=True,
        )

    kinds: dict[int, str] | None = None
    types: dict[str, pa.DataType] | None = None
    table: pa.Table | None = None
    for _attempt in range(len(wanted) + 2):
        try:
            with pa.OSFile(path) as stream:
                reader = pv.open_csv(
                    stream,
                    read_options=read_options,
                    parse_options=parse_options,
                    convert_options=convert(types),
                )
                if types is None:
                    if kinds is None:
                        kinds = _sample_kinds(sample, dialect, na_texts)
                    inferred = {field.name: field.type for field in reader.schema}
                    types = {
                        name: _settle_type(inferred[name], kinds.get(i))
                        for i, name in zip(positions, wanted, strict=True)
                    }
                    if types != inferred:
                        continue  # read again with the settled types
                batches = []
                for batch in reader:
                    batches.append(batch)
                    meter.to(offset + stream.tell())
                table = pa.Table.from_batches(batches, reader.schema)
                del batches, reader
            break
        except pa.ArrowInvalid as exc:
            failed = _CONVERSION_ERROR.match(str(exc))
            if failed is None or types is None:
                return None  # a parse error (ragged rows, ...): not pyarrow's to fix
            column = fields[int(failed.group(1))]
            if types.get(column, pa.string()) == pa.string():
                return None  # text that is not valid in the encoding
            types = {**types, column: pa.string()}
        except (pa.ArrowException, UnicodeError, LookupError, OSError):
            return None
    if table is None:
        return None
    for i, field in enumerate(table.schema):
        if field.type == pa.string():
            integers = _integer_column(table.column(i))
            if integers is not None:
                table = table.set_column(i, field.name, integers)
    table = table.rename_columns(list(names))
    frame = table.to_pandas(split_blocks=True, self_destruct=True)
    del table
    return frame
