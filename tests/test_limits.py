"""Limits on the work of one audit, and the fixes the fuzzing harness led to.

Each limit ends in one line and exit 2 naming the limit and the option that
raises it; the option and the spec's ``[limits]`` table raise it. Invented
tables (logic tests) except where a reference library is named beside the
check. The CLI runs in a subprocess with a time limit.
"""

from __future__ import annotations

import subprocess
import sys
import zipfile
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from replicheck.api import audit
from replicheck.errors import InputError
from replicheck.limits import Limits, make_limits


def _run(args: list[str], cwd: Path, spec: bool = False) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "replicheck", "check", *args, *([] if spec else ["--no-spec"])],
        capture_output=True,
        text=True,
        check=False,
        cwd=cwd,
        timeout=120,
    )


def _one_line(out: subprocess.CompletedProcess[str], *texts: str) -> None:
    assert out.returncode == 2, out.stderr
    assert out.stderr.count("\n") == 1, out.stderr
    for text in texts:
        assert text in out.stderr


def _tanks(n_extra: int = 0, levels: int = 2) -> pd.DataFrame:
    rng = np.random.default_rng(3)
    n = 8 * levels
    d = pd.DataFrame(
        {
            "y": rng.normal(size=n).round(3),
            "feed": [f"F{i % levels}" for i in range(n)],
            "tank": [f"T{i % (2 * levels)}" for i in range(n)],
        }
    )
    for j in range(n_extra):
        d[f"x{j}"] = rng.normal(size=n).round(2)
    return d


def test_limits_from_text_and_mapping() -> None:
    assert make_limits(["columns=20000", "cell-chars=5e4"], "here") == Limits(
        columns=20_000, cell_chars=50_000
    )
    assert make_limits({"levels": 3000, "file-mb": 1.5}, "here").levels == 3000
    assert make_limits({"file_mb": 1.5}, "here").file_mb == 1.5
    # the command line replaces the spec's value of the same key, keeps the others
    base = make_limits({"levels": 3000, "columns": 10}, "in the spec")
    both = make_limits(["columns=40"], "in the options", base)
    assert (both.levels, both.columns) == (3000, 40)
    for bad in (["columns"], ["colour=3"], ["columns=0"], ["columns=-5"], ["columns=inf"]):
        with pytest.raises(InputError):
            make_limits(bad, "in the options")
    with pytest.raises(InputError, match="keys: file-mb, columns"):
        make_limits(["rows=3"], "in the options")


def test_too_many_columns(tmp_path: Path) -> None:
    _tanks(n_extra=30).to_csv(tmp_path / "wide.csv", index=False)
    out = _run(["wide.csv", "-r", "y", "-t", "feed", "--limit", "columns=20"], tmp_path)
    _one_line(out, "the table has 33 columns", "limit of 20 columns", "--limit columns=N")
    out = _run(["wide.csv", "-r", "y", "-t", "feed", "--limit", "columns=40"], tmp_path)
    assert out.returncode in (0, 1), out.stderr


def test_a_spec_raises_or_lowers_a_limit(tmp_path: Path) -> None:
    _tanks(n_extra=30).to_csv(tmp_path / "wide.csv", index=False)
    spec = tmp_path / "wide.replicheck.toml"
    spec.write_text('response = "y"\ntreatment = "feed"\n[limits]\ncolumns = 20\n')
    out = _run(["wide.csv"], tmp_path, spec=True)
    _one_line(out, "limit of 20 columns")
    spec.write_text('response = "y"\ntreatment = "feed"\nlimits = "columns"\n')
    out = _run(["wide.csv"], tmp_path, spec=True)
    _one_line(out, "a limit is written KEY=N")


def test_a_text_cell_too_long(tmp_path: Path) -> None:
    d = _tanks()
    d["note"] = "ok"
    d.loc[3, "note"] = "x" * 20_000
    d.to_csv(tmp_path / "notes.csv", index=False)
    out = _run(["notes.csv", "-r", "y", "-t", "feed"], tmp_path)
    _one_line(out, "column 'note' holds 20,000 characters", "--limit cell-chars=N")
    out = _run(["notes.csv", "-r", "y", "-t", "feed", "--limit", "cell-chars=30000"], tmp_path)
    assert out.returncode in (0, 1), out.stderr


def test_too_many_levels_and_parameters() -> None:
    d = _tanks(levels=12)
    with pytest.raises(InputError, match="'feed' has 12 levels, more than the limit of 10"):
        audit(d, response="y", treatment="feed", limits=["levels=10"], hidden=False)
    rng = np.random.default_rng(4)
    f = pd.DataFrame(
        {
            "y": rng.normal(size=64),
            "a": [f"a{i % 4}" for i in range(64)],
            "b": [f"b{(i // 4) % 4}" for i in range(64)],
        }
    )
    # intercept 1 + a 3 + b 3 + a:b 9 = 16 parameters
    with pytest.raises(InputError, match="has 16 fixed-effect parameters"):
        audit(f, formula="y ~ a * b", limits={"parameters": 15}, hidden=False)
    assert audit(f, formula="y ~ a * b", limits={"parameters": 16}, hidden=False).status


def test_a_workbook_cell_in_the_last_column(tmp_path: Path) -> None:
    # one stray cell in the last column makes a grid 16,384 columns wide, and in the
    # last row too a grid of 17 billion cells: refused before it is built
    wb = openpyxl.Workbook()
    ws = wb.active
    assert ws is not None
    ws.append(["y", "feed"])
    for i in range(8):
        ws.append([float(i), "ab"[i % 2]])
    ws["XFD1"] = 1
    wb.save(tmp_path / "far.xlsx")
    out = _run(["far.xlsx", "-r", "y", "-t", "feed", "--limit", "columns=5000"], tmp_path)
    _one_line(out, "sheet 'Sheet' runs to column 16,384", "--limit columns=N")
    ws["XFD1"] = None
    ws["XFD1048576"] = 1
    wb.save(tmp_path / "far.xlsx")
    out = _run(["far.xlsx", "-r", "y", "-t", "feed"], tmp_path)
    _one_line(out, "rows by 16,384 columns", "--limit sheet-cells=N")


def test_a_workbook_that_unpacks_too_far(tmp_path: Path) -> None:
    _tanks().to_excel(tmp_path / "plain.xlsx", index=False)
    src = zipfile.ZipFile(tmp_path / "plain.xlsx")
    with zipfile.ZipFile(tmp_path / "bomb.xlsx", "w", zipfile.ZIP_DEFLATED) as out:
        for item in src.infolist():
            data = src.read(item.filename)
            if item.filename.endswith("sheet1.xml"):
                data = data.replace(b"<sheetData>", b"<sheetData>" + b" " * 3_000_000, 1)
            out.writestr(item.filename, data)
    assert (tmp_path / "bomb.xlsx").stat().st_size < 100_000
    out = _run(["bomb.xlsx", "-r", "y", "-t", "feed", "--limit", "workbook-mb=2"], tmp_path)
    _one_line(out, "the workbook unpacks to 3 MB", "--limit workbook-mb=N")
    out = _run(["bomb.xlsx", "-r", "y", "-t", "feed"], tmp_path)
    assert out.returncode in (0, 1), out.stderr


def test_a_header_wider_than_the_sniffing_sample(tmp_path: Path) -> None:
    # 9,000 columns: the header line alone is longer than the sample the delimiter is
    # sniffed from; it was cut there, and 'g10...' read as a duplicate of 'g10'
    rng = np.random.default_rng(5)
    d = pd.DataFrame(rng.normal(size=(12, 9000)).round(2), columns=[f"g{i}" for i in range(9000)])
    d["y"] = rng.normal(size=12)
    d["feed"] = list("ab") * 6
    d.to_csv(tmp_path / "omics.csv", index=False)
    out = _run(["omics.csv", "-r", "y", "-t", "feed", "--format", "json"], tmp_path)
    assert out.returncode in (0, 1), out.stderr


@pytest.mark.filterwarnings("ignore:The design matrix is rank-deficient")
def test_a_partly_aliased_claimed_term_is_tested_on_its_estimable_df() -> None:
    # A 3 x 3 factorial with one empty cell: the interaction has 4 columns but 3
    # estimable df. Reference: statsmodels OLS fits of the nested models (type II:
    # each term added to the terms not containing it, over the full model's residual).
    rng = np.random.default_rng(5)
    rows = [
        (a, b, rng.normal() + (a == "q") + (b == "v") * (a == "p"))
        for a in "pqr"
        for b in "uvw"
        if (a, b) != ("r", "w")
        for _ in range(4)
    ]
    d = pd.DataFrame(rows, columns=["A", "B", "y"])
    got = {
        a["term"]: a
        for a in audit(d, formula="y ~ A * B", hidden=False).to_dict()["analyses"]
        if a["name"] == "as_claimed"
    }
    fits = {f: smf.ols(f"y ~ {f}", d).fit() for f in ("C(A)", "C(B)", "C(A)+C(B)", "C(A)*C(B)")}
    s2 = fits["C(A)*C(B)"].ssr / 24
    assert got["A:B"]["df"] == [3.0, 24.0]
    assert got["A:B"]["statistic"] == pytest.approx(
        (fits["C(A)+C(B)"].ssr - fits["C(A)*C(B)"].ssr) / 3 / s2, rel=1e-9
    )
    assert got["A"]["df"] == [2.0, 24.0]
    assert got["A"]["statistic"] == pytest.approx(
        (fits["C(B)"].ssr - fits["C(A)+C(B)"].ssr) / 2 / s2, rel=1e-9
    )
    assert got["B"]["statistic"] == pytest.approx(
        (fits["C(A)"].ssr - fits["C(A)+C(B)"].ssr) / 2 / s2, rel=1e-9
    )
    assert any("3 df the data can estimate, not 4" in n for n in got["A:B"]["notes"])


def test_a_term_with_many_levels_skips_only_the_costly_cross_checks() -> None:
    # 80 levels, 2 tanks each: the small-sample cluster-robust test would form
    # 79 x 79 x 80 x 80 arrays per term; it is reported as not run, with the reason,
    # and the unit-level tests are there
    rng = np.random.default_rng(6)
    n = 320
    d = pd.DataFrame(
        {
            "y": rng.normal(size=n),
            "trt": [f"L{(i // 2) % 80}" for i in range(n)],
            "tank": [f"U{i // 2}" for i in range(n)],
        }
    )
    r = audit(d, response="y", treatment="trt", hidden=False).to_dict()
    by = {a["name"]: a for a in r["analyses"]}
    assert by["cluster_robust"]["p_value"] is None
    assert "work bound" in " ".join(by["cluster_robust"]["notes"])
    assert by["unit_means"]["p_value"] is not None
    assert by["unit_means"]["df"] == [79.0, 80.0]


def test_blank_columns_before_a_stray_cell_are_dropped(tmp_path: Path) -> None:
    # a value at XFD1 of a small sheet: 16,381 blank unnamed columns between (they once
    # took a minute to convert one by one); the table keeps the named ones
    from replicheck.io.reader import read_table

    wb = openpyxl.Workbook()
    ws = wb.active
    assert ws is not None
    ws.append(["y", "feed"])
    for i in range(6):
        ws.append([float(i), "ab"[i % 2]])
    ws["XFD1"] = "stray"
    wb.save(tmp_path / "stray.xlsx")
    table = read_table(tmp_path / "stray.xlsx")
    assert table.columns == ["y", "feed", "stray"]
    assert table.data["y"].tolist() == [0.0, 1.0, 2.0, 3.0, 4.0, 5.0]


def test_an_invisible_character_is_shown_in_the_message(tmp_path: Path) -> None:
    (tmp_path / "tab.csv").write_bytes(b"y,feed\n1.5,a\n2\x0b5,b\n3,a\n4,b\n")
    out = _run(["tab.csv", "-r", "y", "-t", "feed"], tmp_path)
    _one_line(out, "is not numeric (examples: '2\\x0b5')")


def test_within_block_test_of_a_block_too_large_to_code_densely() -> None:
    """Fuzz input 493 (seed 17): a block of 13,340 levels over 200,000 rows made a
    dense design of 19.9 GiB. The within-block test only serves to read a
    reported result; past the cell budget it is left out instead. Invented data."""
    from replicheck.refit import ROBUST_CELLS, TermInput, within_block_tests

    n, levels = 60_000, 600  # 36 million cells of block columns: past the budget
    assert n * levels > ROBUST_CELLS
    rng = np.random.default_rng(3)
    trt = np.repeat([0, 1, 2], n // 3)
    term = TermInput(
        term="glaze",
        factors=("glaze",),
        codes=trt,
        labels=["a", "b", "c"],
        unit=None,
        unit_name=None,
        confounded=False,
    )
    block = np.tile(np.arange(levels), n // levels)
    assert within_block_tests(rng.normal(size=n), [term], {"when": block}) == {}
    small = {"when": block % 20}  # 20 levels: fitted as before
    assert set(within_block_tests(rng.normal(size=n), [term], small)) == {"glaze"}
