"""Tests of the large-file path of the read stage (pyarrow streaming, chunked hashing).

Source of truth, as in tests/test_io.py: every file is written here by a
general-purpose writer outside replicheck (Python's csv and codecs modules,
pyarrow.csv.write_csv) from values generated in the test, and the reader must
give those values back. Where a file is read twice -- by the large-file path
(pyarrow) and by the in-memory path (pandas' C parser, what read_table used for
every text file before) -- the two tables must be identical, with exact
equality for numbers. The size thresholds are lowered by monkeypatching so
that small files take the large-file path and span many pyarrow blocks. The
data are invented.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pv
import pytest

import replicheck.io.arrow_csv as arrow_csv
import replicheck.io.reader as reader
import replicheck.io.scan as scan
from replicheck.errors import InputError
from replicheck.io import Table, read_table

SRC = Path(__file__).resolve().parent.parent / "src"

# ---------------------------------------------------------------- helpers


@pytest.fixture
def fast(monkeypatch: pytest.MonkeyPatch) -> list[bool]:
    """Send every text file down the large-file path, in 4 KB blocks.

    Returns a list that gets True each time pyarrow parsed a file and False
    each time the large-file path gave up and left the file to pandas.
    """
    monkeypatch.setattr(reader, "LARGE_TEXT_BYTES", 0)
    monkeypatch.setattr(scan, "HEAD_BYTES", 300_000)
    monkeypatch.setattr(arrow_csv, "BLOCK_BYTES", 4096)
    monkeypatch.setattr(arrow_csv, "SAMPLE_CHARS", 4096)
    used: list[bool] = []
    parse = reader.read_delimited

    def spy(*args: object, **kwargs: object) -> pd.DataFrame | None:
        frame = parse(*args, **kwargs)  # type: ignore[arg-type]
        used.append(frame is not None)
        return frame

    monkeypatch.setattr(reader, "read_delimited", spy)
    return used


def _in_memory(monkeypatch: pytest.MonkeyPatch, path: Path, **kwargs: object) -> Table:
    """Read with the in-memory (pandas) path."""
    with monkeypatch.context() as m:
        m.setattr(reader, "LARGE_TEXT_BYTES", 10**15)
        return read_table(path, **kwargs)  # type: ignore[arg-type]


def _assert_same_table(large: Table, small: Table) -> None:
    pd.testing.assert_frame_equal(large.data, small.data, check_exact=True)
    assert (large.sha256, large.format, large.encoding, large.delimiter, large.decimal) == (
        small.sha256,
        small.format,
        small.encoding,
        small.delimiter,
        small.decimal,
    )


def _write(path: Path, rows: list[list[str]], delimiter: str, encoding: str) -> None:
    # writer: Python's csv module, then Python's codec for `encoding`
    buffer = io.StringIO()
    csv.writer(buffer, delimiter=delimiter, lineterminator="\r\n").writerows(rows)
    path.write_bytes(buffer.getvalue().encode(encoding))


MISSING = ["", "NA", ".", "-99"]


def _tank_rows(n: int, decimal: str, seed: int = 7) -> tuple[list[list[str]], dict[str, list]]:
    """Rows of a tank experiment as text, and the values they hold."""
    rng = np.random.default_rng(seed)
    truth: dict[str, list] = {
        "tank": [f"T{k:02d}" for k in rng.integers(1, 41, n)],
        "diet": list(rng.choice(["control", "fed, high", 'say "fed"', "Müller's"], n)),
        "Länge °C": [round(float(v), 2) for v in rng.normal(12.0, 3.0, n)],
        "count": [int(v) for v in rng.integers(0, 500, n)],
        "flag": [int(v) for v in rng.integers(0, 2, n)],
        "note": list(rng.choice(["ok", "naïve", "x y", "°C drift"], n)),
    }
    count_missing = rng.random(n) < 0.1
    note_missing = rng.random(n) < 0.1
    rows = [list(truth)]
    for i in range(n):
        length = f"{truth['Länge °C'][i]:.2f}".replace(".", decimal)
        count = MISSING[i % 4] if count_missing[i] else str(truth["count"][i])
        note = MISSING[i % 3] if note_missing[i] else truth["note"][i]
        rows.append(
            [truth["tank"][i], truth["diet"][i], length, count, str(truth["flag"][i]), note]
        )
    truth["count"] = [
        math.nan if m else c for m, c in zip(count_missing, truth["count"], strict=True)
    ]
    truth["note"] = [None if m else v for m, v in zip(note_missing, truth["note"], strict=True)]
    return rows, truth


# ---------------------------------------------------------------- same table both ways


@pytest.mark.parametrize(
    ("delimiter", "decimal", "encoding", "reported"),
    [
        (",", ".", "utf-8", "utf-8"),
        (";", ",", "utf-8", "utf-8"),  # continental spreadsheet CSV, decimal comma
        (";", ",", "cp1252", "cp1252"),
        (",", ".", "utf-8-sig", "utf-8-sig"),  # UTF-8 with a byte-order mark
        ("\t", ".", "utf-16", "utf-16"),  # spreadsheet "Unicode text"
    ],
)
def test_large_path_gives_the_in_memory_table(
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    fast: list[bool],
    delimiter: str,
    decimal: str,
    encoding: str,
    reported: str,
) -> None:
    rows, truth = _tank_rows(6000, decimal)
    path = tmp_path / ("tanks.txt" if delimiter == "\t" else "tanks.csv")
    _write(path, rows, delimiter, encoding)
    large = read_table(path, na_values=["-99"])
    assert fast == [True]  # pyarrow parsed it; no silent fall-back
    small = _in_memory(monkeypatch, path, na_values=["-99"])
    _assert_same_table(large, small)
    assert (large.encoding, large.delimiter, large.decimal) == (reported, delimiter, decimal)
    # and both equal the values written
    data = large.data
    assert large.columns == list(truth)
    assert data["tank"].tolist() == truth["tank"]
    assert data["diet"].tolist() == truth["diet"]  # quoted delimiters and quotes
    assert data["Länge °C"].dtype == np.float64
    assert data["Länge °C"].tolist() == truth["Länge °C"]
    assert data["count"].dtype == np.float64  # integers with missing cells
    np.testing.assert_array_equal(data["count"].to_numpy(), np.array(truth["count"]))
    assert data["flag"].dtype == np.int64
    assert data["flag"].tolist() == truth["flag"]
    assert data["note"].isna().tolist() == [v is None for v in truth["note"]]
    assert data["note"].dropna().tolist() == [v for v in truth["note"] if v is not None]
    # reference: hashlib's SHA-256 of the file bytes
    assert large.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()


def test_cells_pyarrow_types_differently_from_pandas(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, fast: list[bool]
) -> None:
    """Columns whose type the first 4 KB block does not tell, or tells wrongly."""
    n = 3000
    header = ["late_float", "late_text", "empty_start", "signed", "late_sign", "day", "yes"]
    rows = [header]
    for i in range(n):
        late = i >= n - 10
        rows.append(
            [
                "2.5" if late else str(i % 7),  # int64 for pyarrow until the end
                "n/a yet" if late else f"{i / 8:.3f}",  # text at the end
                str(i % 5) if i > n // 2 else "",  # empty for the first half
                "+1" if i % 2 else "-2",  # pandas reads signed integers as int64
                "+3" if late else str(i % 3),
                f"2021-03-{1 + i % 28:02d}",  # pyarrow would read a date
                "True" if i % 3 else "false",
            ]
        )
    path = tmp_path / "late.csv"
    _write(path, rows, ",", "utf-8")
    large = read_table(path)
    assert fast == [True]
    _assert_same_table(large, _in_memory(monkeypatch, path))
    data = large.data
    assert data["late_float"].dtype == np.float64
    assert data["late_float"].iloc[-1] == 2.5
    assert data["late_text"].iloc[-1] == "n/a yet"
    assert data["late_text"].iloc[0] == "0.000"  # a text column keeps the cells as written
    assert data["empty_start"].dtype == np.float64
    assert data["empty_start"].isna().sum() == n // 2 + 1
    assert data["signed"].dtype == np.int64
    assert data["signed"].tolist()[:2] == [-2, 1]
    assert data["late_sign"].dtype == np.int64
    assert data["late_sign"].iloc[-1] == 3
    assert data["day"].iloc[0] == "2021-03-01"  # text, not a date
    assert data["yes"].dtype == np.bool_
    assert data["yes"].tolist()[:3] == [False, True, True]


def test_late_byte_not_in_utf8_makes_the_file_cp1252(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, fast: list[bool]
) -> None:
    # the first 300 KB are ASCII; one cp1252 "ä" (byte E4) near the end makes
    # the whole file cp1252, as decoding all of it at once does
    rows = [["tank", "y"]] + [[f"T{i % 40}", f"{i / 4}"] for i in range(40000)]
    rows[-1][0] = "Bär"
    path = tmp_path / "late.csv"
    _write(path, rows, ",", "cp1252")
    assert path.read_bytes()[:300_000].isascii()
    large = read_table(path)
    assert fast == [True]
    assert large.encoding == "cp1252"
    assert large.data["tank"].iloc[-1] == "Bär"
    _assert_same_table(large, _in_memory(monkeypatch, path))


def test_files_pyarrow_cannot_read_fall_back(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, fast: list[bool]
) -> None:
    rows, _ = _tank_rows(3000, ".")
    body = rows[1:]
    # a blank line before the header, a whitespace-only line, a short row
    path = tmp_path / "odd.csv"
    _write(
        path,
        [[], rows[0], *body[:2000], ["   "], *body[2000:2500], ["T1"], *body[2500:]],
        ",",
        "utf-8",
    )
    large = read_table(path, na_values=["-99"])
    assert not any(fast)  # pyarrow did not give the table
    _assert_same_table(large, _in_memory(monkeypatch, path, na_values=["-99"]))
    # the short row is a row; the whitespace-only line is a row of missing cells, dropped
    assert large.n_rows == 3001
    assert large.data["tank"].iloc[2500] == "T1"
    # a row longer than the header: the same one-line error either way
    ragged = tmp_path / "ragged.csv"
    _write(
        ragged,
        [*rows[:2500], ["T1", "fed", "1", "2", "3", "4", "extra"], *rows[2500:]],
        ",",
        "utf-8",
    )
    with pytest.raises(InputError) as large_error:
        read_table(ragged)
    with pytest.raises(InputError) as small_error:
        _in_memory(monkeypatch, ragged)
    assert str(large_error.value) == str(small_error.value)
    assert "ragged.csv: cannot be read as ','-delimited text" in str(large_error.value)


def test_late_nul_byte_is_binary_either_way(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, fast: list[bool]
) -> None:
    rows = [["tank", "y"]] + [[f"T{i % 40}", str(i)] for i in range(40000)]
    path = tmp_path / "image.csv"
    raw = io.StringIO()
    csv.writer(raw, lineterminator="\n").writerows(rows)
    path.write_bytes(raw.getvalue().encode() + b"\x00\x01")
    for read in (read_table, lambda p: _in_memory(monkeypatch, p)):
        with pytest.raises(InputError, match=r"image\.csv: .*binary.*NUL"):
            read(path)


def test_column_pruning_on_the_large_path(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, fast: list[bool]
) -> None:
    rows, truth = _tank_rows(4000, ",")
    path = tmp_path / "tanks.csv"
    _write(path, rows, ";", "utf-8")
    positions: list[list[int]] = []
    parse = arrow_csv.read_delimited

    def spy(
        path: str, dialect: arrow_csv.Dialect, wanted: list[int], *rest: object, **kw: object
    ) -> object:
        positions.append(list(wanted))
        return parse(path, dialect, wanted, *rest, **kw)  # type: ignore[arg-type]

    monkeypatch.setattr(reader, "read_delimited", spy)
    table = read_table(path, na_values=["-99"], columns=["NOTE", "Länge °C", "tank"])
    assert positions == [[0, 2, 5]]  # only these columns were converted by pyarrow
    assert table.columns == ["tank", "Länge °C", "note"]  # file order
    assert table.data["Länge °C"].tolist() == truth["Länge °C"]
    full = _in_memory(monkeypatch, path, na_values=["-99"])
    pd.testing.assert_frame_equal(table.data, full.data[table.columns], check_exact=True)


def test_progress_reports_bytes_of_both_passes(tmp_path: Path, fast: list[bool]) -> None:
    rows, _ = _tank_rows(6000, ".")
    path = tmp_path / "tanks.csv"
    _write(path, rows, ",", "utf-8")
    size = os.path.getsize(path)  # reference: the file system's size
    calls: list[tuple[int, int]] = []
    read_table(path, progress=lambda done, total: calls.append((done, total)))
    assert fast == [True]
    assert len(calls) >= 3
    assert {total for _, total in calls} == {2 * size}
    done = [d for d, _ in calls]
    assert done == sorted(done)
    assert done[-1] == 2 * size
    assert any(size < d < 2 * size for d in done)  # reported during parsing too


# ---------------------------------------------------------------- memory


# The child measures with /proc/self/status: VmHWM is the peak resident size of
# this process image (ru_maxrss would start at the parent's size, since Linux
# keeps it across fork and exec), reset to the current size before reading.
_CHILD = """
import json, sys
import pyarrow.csv, pyarrow.parquet  # imports are not part of the read
from replicheck.io import read_table

def status_kib(key):
    with open("/proc/self/status") as handle:
        for line in handle:
            if line.startswith(key + ":"):
                return int(line.split()[1])

try:
    with open("/proc/self/clear_refs", "w") as handle:
        handle.write("5")  # peak := current resident size
except OSError:
    pass
before = status_kib("VmRSS")
table = read_table(sys.argv[1], na_values=["-99"])
peak = status_kib("VmHWM")
data = table.data
print(json.dumps({
    "increase_kib": peak - before,
    "frame_kib": int(data.memory_usage(deep=True).sum()) // 1024,
    "n_rows": table.n_rows,
    "x0_sum": float(data["x0"].sum()),
    "code_missing": int(data["code"].isna().sum()),
    "dtypes": [str(t) for t in data.dtypes],
}))
"""


@pytest.mark.skipif(sys.platform != "linux", reason="/proc/self/status is Linux-specific")
def test_peak_memory_of_a_large_csv(tmp_path: Path) -> None:
    # 1.5 million rows x 20 columns: 16 measurements, a tank number, a code
    # with missing cells, two short text columns (about 200 MB of CSV). To
    # keep the test quick, a block of 10,000 rows is written once and repeated.
    block, repeats = 10_000, 150
    n = block * repeats
    rng = np.random.default_rng(11)
    columns: dict[str, pa.Array] = {
        f"x{i}": pa.array(np.round(rng.normal(10.0, 3.0, block), 4)) for i in range(16)
    }
    columns["tank"] = pa.array(rng.integers(1, 500, block))
    missing = rng.random(block) < 0.01
    columns["code"] = pa.array(rng.integers(0, 40, block), mask=missing)
    columns["diet"] = pa.array(np.array(["ctrl", "fed", "high"])[rng.integers(0, 3, block)])
    columns["site"] = pa.array(np.array(["A1", "B2", "C3", "D4"])[rng.integers(0, 4, block)])
    # writer: pyarrow.csv.write_csv (empty cells for the missing codes)
    text = io.BytesIO()
    pv.write_csv(pa.table(columns), text)
    header, _, rows = text.getvalue().partition(b"\n")
    path = tmp_path / "large.csv"
    with path.open("wb") as handle:
        handle.write(header + b"\n")
        for _ in range(repeats):
            handle.write(rows)
    assert path.stat().st_size > reader.LARGE_TEXT_BYTES
    x0_sum = float(pd.Series(np.tile(columns["x0"].to_numpy(), repeats)).sum())

    env = {**os.environ, "PYTHONPATH": str(SRC)}
    out = subprocess.run(
        [sys.executable, "-c", _CHILD, str(path)],
        env=env,
        capture_output=True,
        text=True,
        check=True,
    )
    report = json.loads(out.stdout)
    assert report["n_rows"] == n
    assert report["x0_sum"] == x0_sum  # same values as written, summed the same way
    assert report["code_missing"] == int(missing.sum()) * repeats
    assert report["dtypes"] == ["float64"] * 16 + ["int64", "float64", "str", "str"]
    # the requirement: peak memory of a read within 3x the table it gives
    assert report["increase_kib"] <= 3 * report["frame_kib"], report
