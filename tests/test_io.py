"""Tests of the read stage (replicheck.io).

Source of truth: every input file here is written by a general-purpose writer
outside replicheck -- Python's codecs/csv modules, pandas' to_csv/to_excel,
openpyxl and pyarrow -- from values spelled out literally in this file, and the
reader must give those values back. The values are invented. Files are written
into pytest's tmp_path; the committed files in fixtures/io/ come from
fixtures/io/make_fixtures.py (same writers).
"""

from __future__ import annotations

import codecs
import hashlib
import io
import math
import os
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from replicheck.errors import InputError
from replicheck.io import (
    DEFAULT_NA,
    Table,
    numeric_column,
    read_header,
    read_table,
    resolve_column,
)

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures" / "io"

# The table every writer below writes; non-ASCII in the header and in a cell.
HEADER = ["tank", "diet", "Länge °C", "note"]
ROWS = [
    ["T1", "control", 12.5, "Müller"],
    ["T1", "control", 13.25, "ok"],
    ["T2", "fed", 15.0, "ok"],
    ["T2", "fed", -3.75, "naïve"],
]


def _frame() -> pd.DataFrame:
    return pd.DataFrame(ROWS, columns=HEADER)


def _assert_table_values(table: Table) -> None:
    """The table read equals ROWS cell by cell, with a float numeric column."""
    assert table.columns == HEADER
    assert table.n_rows == 4
    assert table.data["Länge °C"].dtype == np.float64
    assert table.data["Länge °C"].tolist() == [12.5, 13.25, 15.0, -3.75]
    assert table.data["tank"].tolist() == ["T1", "T1", "T2", "T2"]
    assert table.data["note"].tolist() == ["Müller", "ok", "ok", "naïve"]


def _missing_flags(series: pd.Series) -> list[bool]:
    return series.isna().tolist()


# ---------------------------------------------------------------- encodings


@pytest.mark.parametrize(
    ("encoding", "expected", "first_bytes"),
    [
        ("utf-8", "utf-8", b"tank"),
        ("utf-8-sig", "utf-8-sig", codecs.BOM_UTF8),
        ("cp1252", "cp1252", b"tank"),
    ],
)
def test_comma_csv_in_each_encoding(
    tmp_path: Path, encoding: str, expected: str, first_bytes: bytes
) -> None:
    # writer: pandas.to_csv with Python's codec for `encoding`
    path = tmp_path / "tanks.csv"
    _frame().to_csv(path, index=False, encoding=encoding)
    raw = path.read_bytes()
    assert raw.startswith(first_bytes)
    if encoding == "cp1252":
        assert "Länge".encode("cp1252") in raw and b"L\xe4nge" in raw  # one byte for ä
    table = read_table(path)
    assert (table.format, table.encoding, table.delimiter, table.decimal) == (
        "csv",
        expected,
        ",",
        ".",
    )
    _assert_table_values(table)


def test_utf16_unicode_text_export(tmp_path: Path) -> None:
    # writer: pandas.to_csv(encoding="utf-16") writes a BOM, like a spreadsheet
    # program's "Unicode text" export (UTF-16 LE, tab-delimited, CRLF)
    path = tmp_path / "tanks.txt"
    _frame().to_csv(path, index=False, sep="\t", encoding="utf-16", lineterminator="\r\n")
    assert path.read_bytes()[:2] in (codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)
    table = read_table(path)
    assert (table.format, table.encoding, table.delimiter) == ("tsv", "utf-16", "\t")
    _assert_table_values(table)


@pytest.mark.parametrize(
    ("prefix", "codec", "expected"),
    [
        (codecs.BOM_UTF16_BE, "utf-16-be", "utf-16"),
        (b"", "utf-16-le", "utf-16-le"),  # no BOM: NULs on every other byte
    ],
)
def test_utf16_big_endian_and_without_bom(
    tmp_path: Path, prefix: bytes, codec: str, expected: str
) -> None:
    # writer: Python's utf-16 codecs on text produced by pandas.to_csv
    text = _frame().to_csv(index=False, sep="\t")
    path = tmp_path / "tanks.txt"
    path.write_bytes(prefix + text.encode(codec))
    table = read_table(path)
    assert table.encoding == expected
    _assert_table_values(table)


# ---------------------------------------------------------------- delimiters and decimals


@pytest.mark.parametrize(
    ("name", "sep", "decimal", "fmt"),
    [
        ("tanks.csv", ";", ",", "csv"),  # continental spreadsheet CSV
        ("tanks.tsv", "\t", ".", "tsv"),
        ("tanks.txt", "\t", ",", "tsv"),  # tab export with decimal comma
        ("tanks.txt", "|", ".", "csv"),
        ("tanks.dat", ";", ".", "csv"),  # unknown extension: content decides
    ],
)
def test_delimiter_and_decimal_detection(
    tmp_path: Path, name: str, sep: str, decimal: str, fmt: str
) -> None:
    # writer: pandas.to_csv(sep=..., decimal=...)
    path = tmp_path / name
    _frame().to_csv(path, index=False, sep=sep, decimal=decimal)
    if decimal == ",":
        assert "12,5" in path.read_text(encoding="utf-8")
    table = read_table(path)
    assert (table.format, table.delimiter, table.decimal) == (fmt, sep, decimal)
    _assert_table_values(table)


def test_comma_never_decimal_when_delimiter(tmp_path: Path) -> None:
    # writer: Python's csv module quotes fields containing the delimiter
    path = tmp_path / "quoted.csv"
    path.write_text('tank,y\nA,"1,5"\nB,"2,25"\nC,3\n', encoding="utf-8")
    table = read_table(path)
    assert (table.delimiter, table.decimal) == (",", ".")
    assert table.data["y"].tolist() == ["1,5", "2,25", "3"]  # kept as text on reading
    # numeric_column reads the decimal comma: 1,5 -> 1.5
    assert numeric_column(table, "y").tolist() == [1.5, 2.25, 3.0]


def test_whitespace_and_bom_stripped_from_names(tmp_path: Path) -> None:
    path = tmp_path / "spaces.csv"
    path.write_bytes(codecs.BOM_UTF8 + b" tank , y \nA, 1.5\n")
    table = read_table(path)
    assert table.columns == ["tank", "y"]
    assert table.data["y"].tolist() == [1.5]


# ---------------------------------------------------------------- Excel and Parquet


def _two_sheet_workbook(path: Path) -> None:
    # writer: pandas.ExcelWriter with the openpyxl engine
    with pd.ExcelWriter(path, engine="openpyxl") as writer:
        pd.DataFrame({"comment": ["invented", "data"]}).to_excel(
            writer, sheet_name="notes", index=False
        )
        _frame().to_excel(writer, sheet_name="data", index=False)


@pytest.mark.parametrize("sheet", ["data", 1, "DATA", "1"])
def test_xlsx_sheet_selection(tmp_path: Path, sheet: str | int) -> None:
    path = tmp_path / "tanks.xlsx"
    _two_sheet_workbook(path)
    table = read_table(path, sheet=sheet)
    assert (table.format, table.sheet, table.encoding, table.delimiter) == (
        "xlsx",
        "data",
        None,
        None,
    )
    _assert_table_values(table)


def test_xlsx_first_sheet_holding_a_table_by_default(tmp_path: Path) -> None:
    path = tmp_path / "tanks.xlsx"
    _two_sheet_workbook(path)
    table = read_table(path)  # 'notes' holds one column: a readme, not a table
    assert table.sheet == "data" and table.layout.skipped_sheets == ("notes",)
    _assert_table_values(table)
    notes = read_table(path, sheet="notes")  # still read when chosen
    assert notes.data["comment"].tolist() == ["invented", "data"]


@pytest.mark.parametrize("sheet", ["results", 5])
def test_xlsx_unknown_sheet_lists_available(tmp_path: Path, sheet: str | int) -> None:
    path = tmp_path / "tanks.xlsx"
    _two_sheet_workbook(path)
    with pytest.raises(InputError, match=r"tanks\.xlsx.*no sheet.*'notes', 'data'"):
        read_table(path, sheet=sheet)


def test_parquet_written_by_pyarrow(tmp_path: Path) -> None:
    # writer: pyarrow.parquet.write_table
    path = tmp_path / "tanks.parquet"
    pq.write_table(pa.Table.from_pandas(_frame(), preserve_index=False), path)
    table = read_table(path)
    assert table.format == "parquet"
    _assert_table_values(table)


def test_parquet_named_index_becomes_a_column(tmp_path: Path) -> None:
    # writer: pandas.to_parquet stores the named index "tank" as index metadata
    path = tmp_path / "indexed.parquet"
    _frame().set_index("tank").to_parquet(path, engine="pyarrow")
    table = read_table(path)
    assert sorted(table.columns) == sorted(HEADER)
    assert table.data["tank"].tolist() == ["T1", "T1", "T2", "T2"]


def test_content_sniffed_for_unknown_extension(tmp_path: Path) -> None:
    parquet = tmp_path / "export.bin"
    pq.write_table(pa.Table.from_pandas(_frame(), preserve_index=False), parquet)
    workbook = tmp_path / "export.dat"
    _frame().to_excel(workbook, index=False, engine="openpyxl")
    assert read_table(parquet).format == "parquet"
    assert read_table(workbook).format == "xlsx"
    _assert_table_values(read_table(workbook))


# ---------------------------------------------------------------- missing values


def test_default_na_codes_include_the_common_ones() -> None:
    for code in ("", ".", "NA", "N/A"):
        assert code in DEFAULT_NA


def test_missing_codes_in_csv(tmp_path: Path) -> None:
    path = tmp_path / "na.csv"
    # -99 written three ways; "." and NA and an empty cell in the text column
    path.write_text(
        "tank,y,label\nA,1.5,x\nA,-99,.\nB, -99.0 ,NA\nB,-99.00,\nC,2,-99\nC,.,y\n",
        encoding="utf-8",
    )
    table = read_table(path, na_values=["-99"])
    assert _missing_flags(table.data["y"]) == [False, True, True, True, False, True]
    assert table.data["y"].dtype == np.float64
    assert _missing_flags(table.data["label"]) == [False, True, True, True, True, False]
    # without the user code -99 is a value, "." still missing
    plain = read_table(path)
    assert plain.data["y"].tolist()[:2] == [1.5, -99.0]
    assert math.isnan(plain.data["y"].tolist()[5])


def test_missing_codes_in_xlsx(tmp_path: Path) -> None:
    # writer: openpyxl; -99 is a numeric cell, "." and "NA" are text cells
    path = tmp_path / "na.xlsx"
    book = openpyxl.Workbook()
    sheet = book.active
    assert sheet is not None
    for row in [["tank", "y"], ["A", 1.5], ["A", -99], ["B", "."], ["B", "NA"], ["C", 2.0]]:
        sheet.append(row)
    book.save(path)
    table = read_table(path, na_values=["-99"])
    assert _missing_flags(table.data["y"]) == [False, True, True, True, False]
    assert table.data["y"].dtype == np.float64
    assert table.data["y"].dropna().tolist() == [1.5, 2.0]


def test_missing_codes_in_parquet(tmp_path: Path) -> None:
    # writer: pyarrow; -99 stored as int64 and as float64, "." stored as a string
    path = tmp_path / "na.parquet"
    arrow = pa.table(
        {
            "count": pa.array([3, -99, 5, 7], pa.int64()),
            "y": pa.array([1.5, 2.0, -99.0, 2.5], pa.float64()),
            "label": pa.array(["a", ".", "b", "-99"], pa.string()),
        }
    )
    pq.write_table(arrow, path)
    table = read_table(path, na_values=["-99"])
    assert _missing_flags(table.data["count"]) == [False, True, False, False]
    assert _missing_flags(table.data["y"]) == [False, False, True, False]
    assert _missing_flags(table.data["label"]) == [False, True, False, True]
    assert table.data["count"].dropna().tolist() == [3, 5, 7]
    assert table.data["label"].dropna().tolist() == ["a", "b"]


def test_rows_and_unnamed_columns_that_are_all_missing_are_dropped(tmp_path: Path) -> None:
    # spreadsheet exports often end rows with a delimiter and add ";;" lines
    path = tmp_path / "trailing.csv"
    path.write_text("tank;y;\nA;1,5;\n;;\nB;2,5;\n", encoding="utf-8")
    table = read_table(path)
    assert table.columns == ["tank", "y"]
    assert table.data["y"].tolist() == [1.5, 2.5]


# ---------------------------------------------------------------- DataFrame input


def test_dataframe_input() -> None:
    frame = pd.DataFrame({"\ufeff Tank ": ["A", "B"], "y": ["1", "-99"]})
    table = read_table(frame, na_values=["-99"])
    assert (table.source, table.sha256, table.format) == ("<dataframe>", None, "dataframe")
    assert table.columns == ["Tank", "y"]
    assert _missing_flags(table.data["y"]) == [False, True]
    assert frame.columns.tolist() == ["\ufeff Tank ", "y"]  # caller's frame untouched
    # a single code given as a string is one code, not the codes "-", "9", "9"
    single = read_table(pd.DataFrame({"u": [1, 2, 3], "y": [9.0, -99.0, 1.0]}), na_values="-99")
    assert _missing_flags(single.data["y"]) == [False, True, False]


def test_dataframe_with_duplicate_columns() -> None:
    frame = pd.DataFrame([[1, 2]], columns=["y", "y"])
    with pytest.raises(InputError, match=r"duplicate column names.*'y'"):
        read_table(frame)
    # names that differ only in case are distinct columns, as in the source
    both = read_table(pd.DataFrame([[1, 2]], columns=["class", "Class"]))
    assert both.columns == ["class", "Class"]


# ---------------------------------------------------------------- errors


def test_missing_file(tmp_path: Path) -> None:
    with pytest.raises(InputError, match=r"nothere\.csv: file not found"):
        read_table(tmp_path / "nothere.csv")


def test_directory(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="is a directory"):
        read_table(tmp_path)


@pytest.mark.parametrize(
    ("content", "words"),
    [
        (b"", "empty"),
        (b"  \r\n\n", "empty"),
        (b"tank,y\n", "no data rows"),
        (b"tank,y\r\n\r\n", "no data rows"),
        (b"tank;y\n;\n;\n", "no data rows"),
    ],
)
def test_empty_and_header_only(tmp_path: Path, content: bytes, words: str) -> None:
    path = tmp_path / "empty.csv"
    path.write_bytes(content)
    with pytest.raises(InputError, match=rf"empty\.csv: .*{words}"):
        read_table(path)


def test_header_only_xlsx(tmp_path: Path) -> None:
    path = tmp_path / "header.xlsx"
    pd.DataFrame(columns=["tank", "y"]).to_excel(path, index=False, engine="openpyxl")
    with pytest.raises(InputError, match="no data rows"):
        read_table(path)


@pytest.mark.parametrize(
    "content",
    [
        bytes(range(256)) * 4,  # contains NUL bytes
        b"\x01\x02\x03\x04\x05\x06\x07\x08\x0e\x0f" * 50,  # control bytes, no NUL
        b"\xff\xfe\x00\xd8" * 20,  # UTF-16 BOM followed by an unpaired surrogate
    ],
)
def test_binary_file(tmp_path: Path, content: bytes) -> None:
    path = tmp_path / "image.csv"
    path.write_bytes(content)
    with pytest.raises(InputError, match=r"image\.csv: .*binary"):
        read_table(path)


def test_corrupt_xlsx(tmp_path: Path) -> None:
    good = tmp_path / "good.xlsx"
    _frame().to_excel(good, index=False, engine="openpyxl")
    truncated = tmp_path / "cut.xlsx"
    truncated.write_bytes(good.read_bytes()[:300])
    garbage = tmp_path / "garbage.xlsx"
    garbage.write_bytes(b"this is not a workbook\n")
    for path in (truncated, garbage):
        with pytest.raises(InputError, match=rf"{path.name}: not a readable Excel workbook"):
            read_table(path)


def test_corrupt_parquet(tmp_path: Path) -> None:
    good = tmp_path / "good.parquet"
    pq.write_table(pa.Table.from_pandas(_frame()), good)
    raw = good.read_bytes()
    cut = tmp_path / "cut.parquet"
    cut.write_bytes(raw[: len(raw) // 2])
    with pytest.raises(InputError, match=r"cut\.parquet: not a readable Parquet file"):
        read_table(cut)


def test_damaged_legacy_xls_is_one_input_error(tmp_path: Path) -> None:
    path = tmp_path / "old.xls"
    path.write_bytes(b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + b"\x00" * 100)
    with pytest.raises(InputError, match=r"old\.xls: not a readable \.xls workbook"):
        read_table(path)


@pytest.mark.parametrize(
    ("header", "named"),
    [
        ("tank,y,tank", "'tank'"),
        ("tank, y ,tank ", "'tank'"),  # surrounding spaces ignored
    ],
)
def test_duplicate_names_in_csv(tmp_path: Path, header: str, named: str) -> None:
    # pandas would silently rename the second one to "tank.1"
    path = tmp_path / "dups.csv"
    path.write_text(f"{header}\nA,1,B\n", encoding="utf-8")
    with pytest.raises(InputError, match=rf"dups\.csv: duplicate column names.*{named}"):
        read_table(path)


def test_names_differing_in_case_are_distinct_columns(tmp_path: Path) -> None:
    # class and Class are two columns in the source (a school's class number and a
    # class of the pupil, say): both are read, and a name matches exactly first
    path = tmp_path / "case.csv"
    path.write_text("class,Class,y\n1,a,2.5\n2,b,3.5\n", encoding="utf-8")
    table = read_table(path)
    assert table.columns == ["class", "Class", "y"]
    assert resolve_column(table.columns, "Class") == "Class"
    assert resolve_column(table.columns, "class") == "class"
    with pytest.raises(InputError, match="ambiguous"):
        resolve_column(table.columns, "CLASS")


def test_duplicate_names_in_xlsx(tmp_path: Path) -> None:
    path = tmp_path / "dups.xlsx"
    book = openpyxl.Workbook()
    sheet = book.active
    assert sheet is not None
    sheet.append(["y", "y "])
    sheet.append([1, 2])
    book.save(path)
    with pytest.raises(InputError, match=r"dups\.xlsx.*duplicate column names.*'y'"):
        read_table(path)


def test_row_longer_than_header(tmp_path: Path) -> None:
    path = tmp_path / "ragged.csv"
    path.write_text("tank,y\nA,1\nB,2,3\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"ragged\.csv: cannot be read"):
        read_table(path)


def test_sheet_on_a_csv(tmp_path: Path) -> None:
    path = tmp_path / "t.csv"
    _frame().to_csv(path, index=False)
    with pytest.raises(InputError, match="only for a workbook"):
        read_table(path, sheet="data")


def test_errors_are_one_line(tmp_path: Path) -> None:
    path = tmp_path / "ragged.csv"
    path.write_text("tank,y\nA,1\nB,2,3\n", encoding="utf-8")
    with pytest.raises(InputError) as info:
        read_table(path)
    assert "\n" not in str(info.value)


# ---------------------------------------------------------------- the input file stays untouched


def test_file_not_modified_and_hash(tmp_path: Path) -> None:
    path = tmp_path / "tanks.csv"
    _frame().to_csv(path, index=False)
    os.utime(path, ns=(1_000_000_000_000_000_000, 1_000_000_000_000_000_000))
    before_bytes, before = path.read_bytes(), path.stat()
    table = read_table(path, na_values=["-99"])
    after = path.stat()
    assert path.read_bytes() == before_bytes
    assert after.st_mtime_ns == before.st_mtime_ns == 1_000_000_000_000_000_000
    assert after.st_size == before.st_size
    # reference: hashlib's SHA-256 of the same bytes
    assert table.sha256 == hashlib.sha256(before_bytes).hexdigest()
    assert table.source == str(path)


def test_read_only_file_can_be_read(tmp_path: Path) -> None:
    path = tmp_path / "locked.csv"
    _frame().to_csv(path, index=False)
    path.chmod(0o444)
    _assert_table_values(read_table(str(path)))


# ---------------------------------------------------------------- committed fixtures


@pytest.mark.parametrize(
    ("name", "sheet", "fmt", "encoding", "decimal"),
    [
        ("tanks_utf16.txt", None, "tsv", "utf-16", "."),
        ("tanks_semicolon.csv", None, "csv", "cp1252", ","),
        ("tanks.xlsx", "data", "xlsx", None, None),
        ("tanks.parquet", None, "parquet", None, None),
    ],
)
def test_committed_fixtures(
    name: str, sheet: str | None, fmt: str, encoding: str | None, decimal: str | None
) -> None:
    # written by fixtures/io/make_fixtures.py with codecs/csv, openpyxl, pyarrow;
    # the missing cells there are "." and -99
    table = read_table(FIXTURES / name, sheet=sheet, na_values=["-99"])
    assert (table.format, table.encoding, table.decimal) == (fmt, encoding, decimal)
    assert table.columns == ["tank", "diet", "Länge mm", "note"]
    length = table.data["Länge mm"]
    assert length.dtype == np.float64
    assert _missing_flags(length) == [False, True, False, False]
    assert length.dropna().tolist() == [12.5, 15.0, -3.75]
    assert table.data["note"].isna().tolist() == [False, False, True, False]
    assert table.data["note"].dropna().tolist() == ["Müller", "ok", "°C drift"]


# ---------------------------------------------------------------- resolve_column


COLUMNS = ["tank_id", "diet", "Temp °C", "tank", "length"]


@pytest.mark.parametrize(
    ("query", "found"),
    [
        ("diet", "diet"),
        ("DIET", "diet"),
        ("Tank ID", "tank_id"),
        ("tank-id", "tank_id"),
        ("TANK.ID", "tank_id"),
        ("temp_°c", "Temp °C"),
        (" length ", "length"),
    ],
)
def test_resolve_column_matches(query: str, found: str) -> None:
    assert resolve_column(COLUMNS, query) == found


def test_resolve_column_exact_beats_loose() -> None:
    assert resolve_column(["Tank", "tank id", "tank_id"], "tank_id") == "tank_id"


def test_resolve_column_ambiguous() -> None:
    with pytest.raises(InputError, match=r"ambiguous unit column 'tankid'.*'Tank ID', 'tank_id'"):
        resolve_column(["Tank ID", "tank_id", "y"], "tankid", role="unit")


def test_resolve_column_suggestions() -> None:
    with pytest.raises(InputError) as info:
        resolve_column(COLUMNS, "tnak", role="response")
    assert str(info.value) == "unknown response column 'tnak'; closest: 'tank', 'tank_id'"


def test_resolve_column_lists_columns_when_nothing_is_close() -> None:
    with pytest.raises(InputError, match="unknown column 'zzz'; columns are: 'tank_id', 'diet'"):
        resolve_column(COLUMNS, "zzz")


# ---------------------------------------------------------------- numeric_column


def _table(frame: pd.DataFrame) -> Table:
    return read_table(frame)


def test_numeric_column_int_to_float() -> None:
    values = numeric_column(_table(pd.DataFrame({"y": [1, 2, 3]})), "Y")
    assert values.dtype == np.float64
    assert values.tolist() == [1.0, 2.0, 3.0]
    assert values.name == "y"


def test_numeric_column_decimal_comma_text() -> None:
    frame = pd.DataFrame({"y": pd.Series(["1,5", "-2,25", "3", None], dtype=object)})
    assert numeric_column(_table(frame), "y").tolist()[:3] == [1.5, -2.25, 3.0]


def test_numeric_column_not_numeric() -> None:
    frame = pd.DataFrame({"y": ["high", "low", "high", "1"]})
    with pytest.raises(InputError) as info:
        numeric_column(_table(frame), "y")
    assert str(info.value) == "response column 'y' is not numeric (examples: 'high', 'low')"


def test_numeric_column_all_missing(tmp_path: Path) -> None:
    path = tmp_path / "gaps.csv"
    path.write_text("tank,y\nA,.\nB,NA\n", encoding="utf-8")
    with pytest.raises(InputError, match="response column 'y' has no non-missing values"):
        numeric_column(read_table(path), "y")


def test_numeric_column_unknown_name_uses_role() -> None:
    with pytest.raises(InputError, match="unknown response column 'yy'"):
        numeric_column(_table(pd.DataFrame({"y": [1.0], "tank": ["a"]})), "yy")


def test_other_source_types_refused() -> None:
    # read_table takes paths and DataFrames only; anything else is a usage error
    with pytest.raises(InputError, match="expected a file path or a DataFrame"):
        read_table(io.StringIO("a,b\n1,2\n"))  # type: ignore[arg-type]


@pytest.mark.parametrize(
    ("values", "coding"),
    [
        (["y", "n", "y"], ("n", "y")),
        (["Present", "absent"], ("absent", "Present")),
        (["alive", "dead"], ("dead", "alive")),
        (["germinated", "dormant"], ("dormant", "germinated")),
        (["male", "female"], None),  # two words that are not a yes/no outcome
        (["yes", "no", "maybe"], None),
    ],
)
def test_yes_no_text_coding(values: list[str], coding: tuple[str, str] | None) -> None:
    # Pure labelling logic on tiny hand-written columns (no statistics involved).
    from replicheck.io.columns import yes_no_coding

    assert yes_no_coding(pd.Series(values, dtype="string")) == coding


# ---------------------------------------------------------------- reading some columns


def test_columns_of_a_csv_in_file_order(tmp_path: Path) -> None:
    # writer: pandas.to_csv; names matched as resolve_column matches them
    path = tmp_path / "tanks.csv"
    _frame().to_csv(path, index=False)
    table = read_table(path, columns=["NOTE", "länge °c", "tank"])
    assert table.columns == ["tank", "Länge °C", "note"]
    assert table.data["Länge °C"].tolist() == [12.5, 13.25, 15.0, -3.75]
    assert table.data["note"].tolist() == ["Müller", "ok", "ok", "naïve"]
    # one name may be given as a string
    assert read_table(path, columns="diet").columns == ["diet"]


def test_unknown_column_names_the_closest(tmp_path: Path) -> None:
    path = tmp_path / "tanks.csv"
    _frame().to_csv(path, index=False)
    with pytest.raises(InputError) as info:
        read_table(path, columns=["tank", "tnak_id"])
    assert str(info.value) == f"{path}: unknown column 'tnak_id'; closest: 'tank'"
    with pytest.raises(InputError, match="no columns requested"):
        read_table(path, columns=[])


def test_rows_missing_in_every_read_column_are_dropped(tmp_path: Path) -> None:
    # documented: the all-missing-row rule applies to the columns read
    path = tmp_path / "gaps.csv"
    path.write_text("tank,y\nA,1.5\nB,.\nC,2\n", encoding="utf-8")
    assert read_table(path).n_rows == 3
    table = read_table(path, columns=["y"])
    assert table.data["y"].tolist() == [1.5, 2.0]


def test_columns_of_a_parquet_file_are_pruned_in_the_file(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # writer: pandas.to_parquet; the named index "tank" comes back as a column
    path = tmp_path / "tanks.parquet"
    _frame().set_index("tank").to_parquet(path, engine="pyarrow")
    asked: list[object] = []
    read = pq.read_table

    def spy(source: object, *args: object, **kwargs: object) -> pa.Table:
        asked.append(kwargs.get("columns"))
        return read(source, *args, **kwargs)

    monkeypatch.setattr(pq, "read_table", spy)
    table = read_table(path, columns=["note", "TANK"])
    assert asked == [["note", "tank"]]  # only these columns were read from the file
    assert table.columns == ["tank", "note"]
    assert table.data["tank"].tolist() == ["T1", "T1", "T2", "T2"]
    assert table.data["note"].tolist() == ["Müller", "ok", "ok", "naïve"]


def test_columns_of_a_workbook_and_a_dataframe(tmp_path: Path) -> None:
    path = tmp_path / "tanks.xlsx"
    _two_sheet_workbook(path)
    table = read_table(path, sheet="data", columns=["Länge °C"])
    assert table.columns == ["Länge °C"]
    assert table.data["Länge °C"].tolist() == [12.5, 13.25, 15.0, -3.75]
    frame = _frame()
    picked = read_table(frame, columns=["diet", "tank"])
    assert picked.columns == ["tank", "diet"]
    assert picked.data["diet"].tolist() == ["control", "control", "fed", "fed"]
    assert frame.columns.tolist() == HEADER  # caller's frame untouched


# ---------------------------------------------------------------- read_header


def test_read_header_of_each_format(tmp_path: Path) -> None:
    # names written literally; cleaned as read_table cleans them
    csv_path = tmp_path / "spaces.csv"
    csv_path.write_bytes(codecs.BOM_UTF8 + " tank ;Länge °C; \n A;1,5;\n".encode())
    assert read_header(csv_path) == ["tank", "Länge °C", "Unnamed: 2"]
    assert read_table(csv_path).columns == ["tank", "Länge °C"]  # the empty one is dropped
    parquet = tmp_path / "indexed.parquet"
    _frame().set_index("tank").to_parquet(parquet, engine="pyarrow")
    assert read_header(parquet) == read_table(parquet).columns == HEADER
    workbook = tmp_path / "tanks.xlsx"
    _two_sheet_workbook(workbook)
    assert read_header(workbook) == HEADER  # as read_table: the first sheet holding a table
    assert read_header(workbook, sheet="notes") == ["comment"]
    assert read_header(_frame()) == HEADER


def test_read_header_errors(tmp_path: Path) -> None:
    dups = tmp_path / "dups.csv"
    dups.write_text("tank,y,tank\nA,1,B\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"dups\.csv: duplicate column names.*'tank'"):
        read_header(dups)
    with pytest.raises(InputError, match="file not found"):
        read_header(tmp_path / "nothere.csv")
    workbook = tmp_path / "tanks.xlsx"
    _two_sheet_workbook(workbook)
    with pytest.raises(InputError, match="no sheet 'results'"):
        read_header(workbook, sheet="results")


def test_read_header_decodes_as_the_whole_file_is_decoded(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The header is valid UTF-8 ("Länge" as C3 A4), but a lone cp1252 byte far
    # into the file makes the whole file cp1252, so the header reads "LÃ¤nge"
    # (Python's cp1252 codec on the same bytes) in read_table; read_header,
    # which sees only the first bytes, must scan the file to agree.
    import replicheck.io.scan as scan

    monkeypatch.setattr(scan, "HEAD_BYTES", 4096)
    path = tmp_path / "mixed.csv"
    body = "".join(f"T{i % 9},{i}\n" for i in range(2000))
    path.write_bytes("Länge,y\n".encode() + body.encode() + b"B\xe4r,1\n")
    expected = "Länge".encode().decode("cp1252")
    assert expected == "LÃ¤nge"
    assert read_header(path) == [expected, "y"]
    assert read_table(path).columns == [expected, "y"]


def test_read_header_does_not_scan_for_an_ascii_header(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    import replicheck.io.reader as reader
    import replicheck.io.scan as scan

    monkeypatch.setattr(scan, "HEAD_BYTES", 4096)
    scanned: list[Path] = []
    monkeypatch.setattr(reader, "scan_encodings", lambda path, *a: scanned.append(path))
    path = tmp_path / "big.csv"
    path.write_text("tank,y\n" + "".join(f"T{i},{i}\n" for i in range(5000)), encoding="utf-8")
    assert read_header(path) == ["tank", "y"]
    assert scanned == []


# ---------------------------------------------------------------- progress


def test_progress_on_a_small_file(tmp_path: Path) -> None:
    path = tmp_path / "tanks.csv"
    _frame().to_csv(path, index=False)
    size = os.path.getsize(path)  # reference: the file system's size
    calls: list[tuple[int, int]] = []
    read_table(path, progress=lambda done, total: calls.append((done, total)))
    assert calls[-1] == (2 * size, 2 * size)
    assert [d for d, _ in calls] == sorted(d for d, _ in calls)
    silent: list[tuple[int, int]] = []
    read_table(_frame(), progress=lambda done, total: silent.append((done, total)))
    assert silent == []
