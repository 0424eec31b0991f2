"""Time read_table on large generated CSV and Parquet files, next to plain pandas.

Run: python benchmarks/read_time.py [--rows 1000000 10000000] [--dir DIR]

For each size, writes a CSV and a Parquet file of that many rows and 20
columns (16 measurements, a tank number, a code with 1% missing cells, two
short text columns; generated data) into DIR (a temporary directory by
default; existing files there are reused), then reads each file in a fresh
Python process with

* ``read_table`` (all columns, and 3 columns),
* ``pandas.read_csv(engine="pyarrow")`` / ``pandas.read_parquet`` (the same),

and prints the seconds of the read, the peak resident memory the read added
(peak resident size, ``VmHWM``, minus the resident size after imports; Linux)
and the size of the resulting frame (``memory_usage(deep=True)``). Timings
belong here, never in tests.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pv
import pyarrow.parquet as pq

SRC = Path(__file__).resolve().parent.parent / "src"
THREE = ["x0", "tank", "diet"]

# Peak memory from /proc/self/status: VmHWM is the peak resident size of the
# child's own image, reset before reading (ru_maxrss would start at the size of
# the parent, as Linux keeps it across fork and exec).
_CHILD = """
import json, sys, time
import pandas as pd
import pyarrow.csv, pyarrow.parquet
from replicheck.io import read_table

def status_kib(key):
    with open("/proc/self/status") as handle:
        for line in handle:
            if line.startswith(key + ":"):
                return int(line.split()[1])

how, path, columns = sys.argv[1], sys.argv[2], json.loads(sys.argv[3])
try:
    with open("/proc/self/clear_refs", "w") as handle:
        handle.write("5")
except OSError:
    pass
before = status_kib("VmRSS")
start = time.perf_counter()
if how == "read_table":
    frame = read_table(path, columns=columns).data
elif how == "pandas.read_csv":
    frame = pd.read_csv(path, engine="pyarrow", usecols=columns)
else:
    frame = pd.read_parquet(path, columns=columns)
seconds = time.perf_counter() - start
peak = status_kib("VmHWM")
print(json.dumps({
    "seconds": seconds,
    "added_mib": (peak - before) / 1024,
    "frame_mib": frame.memory_usage(deep=True).sum() / 2**20,
    "rows": len(frame),
}))
"""


def _block(rng: np.random.Generator, n: int) -> pa.Table:
    """``n`` rows of the benchmark table (generated data)."""
    columns: dict[str, pa.Array] = {
        f"x{i}": pa.array(np.round(rng.normal(10.0, 3.0, n), 4)) for i in range(16)
    }
    columns["tank"] = pa.array(rng.integers(1, 500, n))
    columns["code"] = pa.array(rng.integers(0, 40, n), mask=rng.random(n) < 0.01)
    columns["diet"] = pa.array(np.array(["ctrl", "fed", "high"])[rng.integers(0, 3, n)])
    columns["site"] = pa.array(np.array(["A1", "B2", "C3", "D4"])[rng.integers(0, 4, n)])
    return pa.table(columns)


def make_files(folder: Path, rows: int) -> tuple[Path, Path]:
    """Write (or reuse) ``rows``-row CSV and Parquet files, one million rows at a time."""
    csv_path = folder / f"bench_{rows}.csv"
    parquet_path = folder / f"bench_{rows}.parquet"
    if csv_path.exists() and parquet_path.exists():
        return csv_path, parquet_path
    rng = np.random.default_rng(2024)
    schema = _block(rng, 1).schema
    csv_part, parquet_part = (p.with_suffix(p.suffix + ".part") for p in (csv_path, parquet_path))
    with (
        pv.CSVWriter(str(csv_part), schema) as csv_out,
        pq.ParquetWriter(str(parquet_part), schema) as parquet_out,
    ):
        left = rows
        while left > 0:
            block = _block(rng, min(left, 1_000_000))
            csv_out.write_table(block)
            parquet_out.write_table(block)
            left -= block.num_rows
    csv_part.replace(csv_path)  # complete files only: an interrupted run is not reused
    parquet_part.replace(parquet_path)
    return csv_path, parquet_path


def measure(how: str, path: Path, columns: list[str] | None) -> dict[str, float]:
    """Run one read in a fresh interpreter and return its report."""
    env = {**os.environ, "PYTHONPATH": str(SRC)}
    out = subprocess.run(
        [sys.executable, "-c", _CHILD, how, str(path), json.dumps(columns)],
        env=env,
        capture_output=True,
        text=True,
        check=True,
    )
    report: dict[str, float] = json.loads(out.stdout)
    return report


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--rows", type=int, nargs="+", default=[1_000_000, 10_000_000])
    parser.add_argument("--dir", type=Path, default=None)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as scratch:
        folder = args.dir or Path(scratch)
        folder.mkdir(parents=True, exist_ok=True)
        print(
            f"{'rows':>10} {'file':>7} {'MB':>7} {'reader':>18} {'columns':>7} "
            f"{'seconds':>8} {'added MiB':>10} {'frame MiB':>10} {'ratio':>6}"
        )
        for rows in args.rows:
            csv_path, parquet_path = make_files(folder, rows)
            for path, other in ((csv_path, "pandas.read_csv"), (parquet_path, "read_parquet")):
                size = path.stat().st_size / 1e6
                for how in ("read_table", other):
                    for columns in (None, THREE):
                        r = measure(how, path, columns)
                        assert r["rows"] == rows, r
                        print(
                            f"{rows:>10} {path.suffix[1:]:>7} {size:>7.0f} {how:>18} "
                            f"{'all' if columns is None else len(columns):>7} "
                            f"{r['seconds']:>8.2f} {r['added_mib']:>10.0f} "
                            f"{r['frame_mib']:>10.0f} {r['added_mib'] / r['frame_mib']:>6.2f}",
                            flush=True,
                        )


if __name__ == "__main__":
    main()
