"""Calibration study: Type I error of every analysis replicheck runs, by regime.

Run: python benchmarks/calibration.py [--reps 400] [--workers 2] [--quick]
     python benchmarks/calibration.py --tables-only   (rewrite the doc's tables from the JSON)

Simulates two-arm designs with the treatment applied to whole units and NO
treatment effect, over

* ICC (on the response's own scale) in {0, 0.05, 0.2, 0.5},
* units per arm in {2, 3, 5, 10, 30},
* observations per unit in {2, 10, 50},
* balanced (every unit the same size) and unbalanced (unit sizes 0.5 m, m,
  1.5 m in turn, the two arms in different orders),
* normal responses (unit effect + residual, total variance 1) and yes/no
  responses (beta-binomial: the unit's probability drawn from a beta
  distribution with mean 0.3 and intra-unit correlation equal to the ICC;
  Donner & Klar 2000, ch. 2),

and runs the refit stage exactly as an audit does (every analysis, and the
one the corrected verdict rests on) on each generated dataset. The share of
p-values below alpha = 0.05 is the Type I error. Results go to
``docs/calibration.json``; the tables between the markers in
``docs/calibration.md`` are rewritten from it (the prose around them is not).

Only the wild cluster bootstrap is cheapened (999 draws instead of the 9,999
of an audit), which changes the resolution of its p-values, not their
calibration. Each cell has its own seed, so a rerun reproduces the table.
"""

from __future__ import annotations

import argparse
import json
import math
import time
from collections.abc import Iterator
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np

import replicheck.refit as refit_module
from replicheck.refit import TermInput, refit

ALPHA = 0.05
BAND = (0.025, 0.075)
ICCS = (0.0, 0.05, 0.2, 0.5)
UNITS = (2, 3, 5, 10, 30)
SIZES = (2, 10, 50)
BALANCE = ("balanced", "unbalanced")
RESPONSES = ("normal", "binary")
METHODS = (
    "as_claimed",
    "unit_means",
    "mixed_model",
    "strata_anova",
    "randomisation",
    "cluster_robust",
    "wild_bootstrap",
    "gee",
    "corrected",
)
SHOWN = tuple(m for m in METHODS if m != "strata_anova")  # strata ANOVA = unit means here
ROOT = Path(__file__).resolve().parents[1]


@dataclass(frozen=True)
class Cell:
    response: str
    balance: str
    icc: float
    units: int
    size: int

    @property
    def seed(self) -> int:
        key = (
            RESPONSES.index(self.response),
            BALANCE.index(self.balance),
            ICCS.index(self.icc),
            UNITS.index(self.units),
            SIZES.index(self.size),
        )
        return 20261202 + int(np.ravel_multi_index(key, (2, 2, 4, 5, 3)))


def unit_sizes(cell: Cell) -> tuple[np.ndarray, np.ndarray]:
    """Unit sizes in arm A and arm B."""
    if cell.balance == "balanced":
        same = np.full(cell.units, cell.size)
        return same, same
    factors = np.array([0.5, 1.0, 1.5])
    a = np.maximum(1, np.round(cell.size * factors[np.arange(cell.units) % 3])).astype(int)
    b = np.maximum(1, np.round(cell.size * factors[(np.arange(cell.units) + 1) % 3])).astype(int)
    return a, b


def generate(cell: Cell, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One dataset under the null: response, unit codes, arm codes."""
    a, b = unit_sizes(cell)
    sizes = np.concatenate([a, b])
    unit = np.repeat(np.arange(sizes.size), sizes)
    arm = (unit >= cell.units).astype(np.int64)
    if cell.response == "normal":
        u = rng.normal(0.0, math.sqrt(cell.icc), size=sizes.size)
        y = u[unit] + rng.normal(0.0, math.sqrt(1.0 - cell.icc), size=unit.size)
    else:
        mean = 0.3
        if cell.icc == 0.0:
            prob = np.full(sizes.size, mean)
        else:
            scale = (1.0 - cell.icc) / cell.icc
            prob = rng.beta(mean * scale, (1.0 - mean) * scale, size=sizes.size)
        y = (rng.random(unit.size) < prob[unit]).astype(float)
    return y, unit, arm


def run_cell(cell: Cell, reps: int) -> dict[str, object]:
    """Rejection counts of every analysis over ``reps`` null datasets."""
    refit_module.BOOTSTRAP_DRAWS = 999
    rng = np.random.default_rng(cell.seed)
    rejected = dict.fromkeys(METHODS, 0)
    tested = dict.fromkeys(METHODS, 0)
    chosen: dict[str, int] = {}
    kind = "continuous" if cell.response == "normal" else "binary"
    degenerate = 0
    t0 = time.perf_counter()
    for rep in range(reps):
        y, unit, arm = generate(cell, rng)
        if np.unique(y).size < 2:
            degenerate += 1  # a constant yes/no response: no analysis can run
            continue
        term = TermInput("arm", ("arm",), arm, ["A", "B"], unit, "unit", False)
        fit = refit(y, [term], {"unit": unit}, {}, seed=cell.seed + rep, kind=kind)  # type: ignore[arg-type]
        tr = fit.terms[0]
        p_by = {a.name: a.p_value for a in tr.analyses}
        if tr.corrected is not None:
            p_by["corrected"] = p_by.get(tr.corrected)
            chosen[tr.corrected] = chosen.get(tr.corrected, 0) + 1
        for m in METHODS:
            p = p_by.get(m)
            if p is None or not math.isfinite(p):
                continue
            tested[m] += 1
            rejected[m] += int(p < ALPHA)
    return {
        "response": cell.response,
        "balance": cell.balance,
        "icc": cell.icc,
        "units_per_arm": cell.units,
        "obs_per_unit": cell.size,
        "reps": reps,
        "degenerate": degenerate,
        "seed": cell.seed,
        "rejected": rejected,
        "tested": tested,
        "corrected_method": chosen,
        "seconds": round(time.perf_counter() - t0, 1),
    }


def cells(quick: bool) -> Iterator[Cell]:
    for response in RESPONSES:
        for balance in BALANCE:
            for icc in ICCS:
                for units in UNITS:
                    for size in SIZES:
                        if quick and (units == 30 or size == 50):
                            continue
                        yield Cell(response, balance, icc, units, size)


def rate(row: dict[str, object], method: str) -> float | None:
    tested = row["tested"][method]  # type: ignore[index]
    return None if not tested else row["rejected"][method] / tested  # type: ignore[index]


def _fmt(r: float | None) -> str:
    if r is None:
        return "–"
    flag = "" if BAND[0] <= r <= BAND[1] else ("▲" if r > BAND[1] else "▽")
    return f"{r:.3f}{flag}"


def table(rows: list[dict[str, object]], response: str, balance: str) -> str:
    cols = SHOWN
    if response == "normal":
        cols = tuple(c for c in cols if c != "gee")
    head = "| ICC | units/arm | obs/unit | " + " | ".join(cols) + " | verdict rests on |"
    out = [head, "|" + "---|" * (len(cols) + 4)]
    for row in rows:
        if row["response"] != response or row["balance"] != balance:
            continue
        chosen = row["corrected_method"]
        assert isinstance(chosen, dict)
        rests = ", ".join(f"{k} {v}" for k, v in sorted(chosen.items(), key=lambda kv: -kv[1]))
        out.append(
            f"| {row['icc']} | {row['units_per_arm']} | {row['obs_per_unit']} | "
            + " | ".join(_fmt(rate(row, c)) for c in cols)
            + f" | {rests} |"
        )
    return "\n".join(out)


def summary(rows: list[dict[str, object]]) -> str:
    """Per method: regimes outside the band, out of those where it gave a p-value."""
    methods = SHOWN
    out = [
        "| method | response | regimes tested | above 0.075 | below 0.025 | range |",
        "|---|---|---|---|---|---|",
    ]
    for response in RESPONSES:
        for m in methods:
            rates = [
                r for row in rows if row["response"] == response if (r := rate(row, m)) is not None
            ]
            if not rates:
                continue
            hi = sum(r > BAND[1] for r in rates)
            lo = sum(r < BAND[0] for r in rates)
            out.append(
                f"| {m} | {response} | {len(rates)} | {hi} | {lo} | "
                f"{min(rates):.3f} to {max(rates):.3f} |"
            )
    return "\n".join(out)


def write_tables(doc: dict[str, object], path: Path) -> None:
    """Rewrite the generated part of docs/calibration.md between its markers."""
    rows = doc["cells"]
    assert isinstance(rows, list)
    parts = [
        f"Replicates per regime: {doc['reps']}. ▲ above 0.075, ▽ below 0.025.\n",
        "#### Summary\n",
        summary(rows),
        "",
    ]
    for r in RESPONSES:
        for b in BALANCE:
            parts += [f"#### {r} response, {b}\n", table(rows, r, b), ""]
    text = path.read_text() if path.exists() else f"{START}\n{END}\n"
    head, rest = text.split(START, 1)
    _, tail = rest.split(END, 1)
    path.write_text(head + START + "\n" + "\n".join(parts) + "\n" + END + tail)


START = "<!-- calibration tables: generated by benchmarks/calibration.py -->"
END = "<!-- end of generated tables -->"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--reps", type=int, default=400)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--quick", action="store_true", help="skip 30 units and 50 per unit")
    parser.add_argument("--out", type=Path, default=ROOT / "docs" / "calibration.json")
    parser.add_argument("--doc", type=Path, default=ROOT / "docs" / "calibration.md")
    parser.add_argument("--tables-only", action="store_true")
    args = parser.parse_args()
    if args.tables_only:
        write_tables(json.loads(args.out.read_text()), args.doc)
        return
    todo = list(cells(args.quick))
    rows = []
    with ProcessPoolExecutor(args.workers) as pool:
        for row in pool.map(run_cell, todo, [args.reps] * len(todo)):
            rows.append(row)
            print(
                row["response"], row["balance"], row["icc"], row["units_per_arm"],
                row["obs_per_unit"], _fmt(rate(row, "as_claimed")),
                _fmt(rate(row, "corrected")), row["seconds"], flush=True,
            )  # fmt: skip
    doc = {"alpha": ALPHA, "band": list(BAND), "reps": args.reps, "cells": rows}
    args.out.write_text(json.dumps(doc, indent=1))
    print(f"wrote {args.out}")
    write_tables(doc, args.doc)


if __name__ == "__main__":
    main()
