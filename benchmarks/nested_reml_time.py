"""Time the summary-statistics REML fit of two nested random intercepts.

Run: python benchmarks/nested_reml_time.py [--max-rows 10000000]

Generated data (two arms applied to tanks, fish nested in tanks, a covariate
varying within fish): for each size prints the seconds to summarise the rows
(``summarise``), to fit from the summaries (``fit_nested_reml``), and of a
pandas groupby sum of the same columns by fish (a practical floor for one
pass over the rows). Timings belong here, never in tests.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd

from replicheck.stats.nested import fit_nested_reml, summarise


def make(
    n_rows: int, n_fish: int, fish_per_tank: int = 10, seed: int = 1
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Tank SD 1, fish SD 0.5, residual SD 1; rows assigned to fish at random."""
    rng = np.random.default_rng(seed)
    n_tanks = n_fish // fish_per_tank
    fish = rng.integers(0, n_fish, size=n_rows)
    tank_of_fish = np.arange(n_fish) // fish_per_tank
    tank = tank_of_fish[fish]
    arm = (tank % 2).astype(float)
    dose = rng.normal(size=n_rows)
    y = (
        10.0
        + 0.3 * arm
        + 0.5 * dose
        + rng.normal(size=n_tanks)[tank]
        + 0.5 * rng.normal(size=n_fish)[fish]
        + rng.normal(size=n_rows)
    )
    x = np.column_stack([np.ones(n_rows), arm, dose])
    return y, x, tank, fish


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--max-rows", type=int, default=10_000_000)
    args = parser.parse_args()
    header = f"{'rows':>10} {'fish':>7} {'tanks':>6} {'summarise s':>12} {'fit s':>7}"
    print(f"{header} {'groupby s':>10} {'tank var':>9} {'fish var':>9} {'resid var':>9}")
    for n_rows in (1_000_000, 10_000_000):
        if n_rows > args.max_rows:
            break
        for n_fish in (1_000, 10_000, 100_000):
            y, x, tank, fish = make(n_rows, n_fish)
            t0 = time.perf_counter()
            s = summarise(y, x, [tank, fish], ["tank", "fish"], ["(Intercept)", "arm", "dose"])
            t1 = time.perf_counter()
            fit = fit_nested_reml(s)
            t2 = time.perf_counter()
            frame = pd.DataFrame({"y": y, "arm": x[:, 1], "dose": x[:, 2], "fish": fish})
            t3 = time.perf_counter()
            frame.groupby("fish")[["y", "arm", "dose"]].sum()
            t4 = time.perf_counter()
            c = fit.components
            print(
                f"{n_rows:>10} {n_fish:>7} {n_fish // 10:>6} {t1 - t0:>12.3f} {t2 - t1:>7.3f} "
                f"{t4 - t3:>10.3f} {c['tank']:>9.4f} {c['fish']:>9.4f} {c['residual']:>9.4f}"
            )


if __name__ == "__main__":
    main()
