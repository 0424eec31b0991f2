"""Time one audit end to end on generated clustered data of growing size.

Run: python benchmarks/audit_time.py [--max-rows 1000000]

Prints rows, units, seconds for the audit (data already in memory) and the
seconds of a pandas groupby mean over the same unit column (a practical
floor). Timings belong here, never in tests.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd

from replicheck import audit


def make(n_rows: int, n_units: int, seed: int = 1) -> pd.DataFrame:
    """Two arms, units nested in arms, unit effect SD 1, residual SD 2 (generated data)."""
    rng = np.random.default_rng(seed)
    unit = rng.integers(0, n_units, size=n_rows)
    arm = unit % 2
    effect = rng.normal(0.0, 1.0, size=n_units)
    y = 10.0 + 0.3 * arm + effect[unit] + rng.normal(0.0, 2.0, size=n_rows)
    return pd.DataFrame({"y": y, "arm": np.where(arm == 1, "B", "A"), "cage": unit})


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--max-rows", type=int, default=1_000_000)
    args = parser.parse_args()
    print(f"{'rows':>10} {'units':>7} {'audit s':>9} {'groupby s':>10}")
    n = 1_000
    while n <= args.max_rows:
        units = max(10, min(2_000, n // 50))
        df = make(n, units)
        t0 = time.perf_counter()
        audit(df, response="y", treatment="arm")
        t1 = time.perf_counter()
        df.groupby("cage")["y"].mean()
        t2 = time.perf_counter()
        print(f"{n:>10} {units:>7} {t1 - t0:>9.3f} {t2 - t1:>10.4f}")
        n *= 10


if __name__ == "__main__":
    main()
