"""False alarms and detection of hidden groupings, by simulation.

Run: python benchmarks/hidden_alarms.py [--seeds 20] [--out docs/hidden-alarms.json]

Seeded scenarios of our own (invented settings), each audited end to end with
``replicheck.audit``:

* clean designs with decoys, where the status must stay ``ok`` and no warning
  may come from the hidden-grouping scans: subjects randomised individually
  with an observer crossed with treatment; a randomised measurement order with
  a sequence column; time stamps over days that hold both treatments; a grid of
  positions with treatments randomised to them; unique sample codes;
* hidden structures, where the audit must take the hidden grouping as the unit
  (or call the design confounded with it): treatment applied per day (days in a
  time stamp), treatment kept in one half of a bench grid (zones), processing
  runs along an injection order, tanks inside composite sample codes, and a
  covariate recorded once per tank, each at several strengths of the unit
  effect (ICC 0.1, 0.3, 0.5).

Prints and writes the false-alarm and detection rates per scenario; the table
in ``docs/hidden-alarms.md`` is rewritten between its markers.
"""

from __future__ import annotations

import argparse
import json
import math
import time
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd

from replicheck import audit

ROOT = Path(__file__).resolve().parents[1]
HIDDEN_RULES = {
    "grouping-derived",
    "treatment-by-time",
    "treatment-in-runs",
    "treatment-clumped-in-space",
}

Scenario = Callable[[int, float], tuple[pd.DataFrame, str, str, str]]
# returns (data, response, treatment, expected unit prefix or "" for a clean design)


def _unit_effect(rng: np.random.Generator, n_units: int, icc: float) -> np.ndarray:
    return rng.normal(0.0, math.sqrt(icc), n_units)


def clean_observer(seed: int, icc: float) -> tuple[pd.DataFrame, str, str, str]:
    rng = np.random.default_rng(seed)
    n = 40
    return (
        pd.DataFrame(
            {
                "subject": [f"S{i:03d}" for i in range(n)],
                "observer": rng.choice(["ana", "ben", "cai"], n),
                "arm": rng.permutation(np.repeat(["placebo", "active"], n // 2)),
                "score": rng.normal(0, 1, n),
            }
        ),
        "score",
        "arm",
        "",
    )


def clean_order(seed: int, icc: float) -> tuple[pd.DataFrame, str, str, str]:
    rng = np.random.default_rng(seed)
    n = 36
    order = rng.permutation(n) + 1
    return (
        pd.DataFrame(
            {
                "run_order": order,
                "diet": rng.permutation(np.repeat(["low", "high"], n // 2)),
                "area": 10 + 0.05 * order + rng.normal(0, 1, n),
            }
        ),
        "area",
        "diet",
        "",
    )


def clean_days(seed: int, icc: float) -> tuple[pd.DataFrame, str, str, str]:
    rng = np.random.default_rng(seed)
    day = np.repeat(np.arange(6), 8)
    trt = np.concatenate([rng.permutation(np.repeat(["a", "b"], 4)) for _ in range(6)])
    stamp = pd.Timestamp("2026-04-06 08:30") + pd.to_timedelta(day, "D")
    stamp += pd.to_timedelta(np.sort(rng.integers(0, 300, 48)), "min")
    y = _unit_effect(rng, 6, 0.3)[day] + rng.normal(0, math.sqrt(0.7), 48)
    frame = pd.DataFrame(
        {"measured_at": stamp.strftime("%Y-%m-%d %H:%M"), "treatment": trt, "y": y}
    )
    return frame, "y", "treatment", ""


def clean_grid(seed: int, icc: float) -> tuple[pd.DataFrame, str, str, str]:
    rng = np.random.default_rng(seed)
    x, yy = np.meshgrid(np.arange(8), np.arange(6))
    trt = rng.permutation(np.repeat(["control", "warmed"], 24))
    growth = 0.3 * x.ravel() + rng.normal(0, 1, 48)
    frame = pd.DataFrame({"x": x.ravel(), "y": yy.ravel(), "warming": trt, "growth": growth})
    return frame, "growth", "warming", ""


def clean_codes(seed: int, icc: float) -> tuple[pd.DataFrame, str, str, str]:
    rng = np.random.default_rng(seed)
    n = 40
    return (
        pd.DataFrame(
            {
                "sample": [f"LAB-{i:04d}" for i in rng.permutation(n) + 100],
                "coating": rng.permutation(np.repeat(["none", "silane"], n // 2)),
                "strength": rng.normal(50, 4, n),
            }
        ),
        "strength",
        "coating",
        "",
    )


def clean_covariates(seed: int, icc: float) -> tuple[pd.DataFrame, str, str, str]:
    rng = np.random.default_rng(seed)
    n = 48
    mass = np.round(rng.normal(250, 20, n) / 5) * 5  # weighed to the nearest 5 g
    return (
        pd.DataFrame(
            {
                "mass_g": mass,
                "age_weeks": rng.integers(8, 13, n),
                "diet": rng.permutation(np.repeat(["chow", "fat"], n // 2)),
                "glucose": 5 + 0.01 * (mass - 250) + rng.normal(0, 1, n),
            }
        ),
        "glucose",
        "diet",
        "",
    )


def hidden_days(seed: int, icc: float) -> tuple[pd.DataFrame, str, str, str]:
    rng = np.random.default_rng(seed)
    day = np.repeat(np.arange(8), 6)
    lot = np.where(np.isin(day, rng.permutation(8)[:4]), "old", "new")
    stamp = pd.Timestamp("2026-03-02 09:00") + pd.to_timedelta(day, "D")
    stamp += pd.to_timedelta(np.tile(np.arange(6) * 25, 8), "min")
    y = _unit_effect(rng, 8, icc)[day] + rng.normal(0, math.sqrt(1 - icc), 48)
    frame = pd.DataFrame({"measured_at": stamp.strftime("%d/%m/%Y %H:%M"), "lot": lot, "y": y})
    return frame, "y", "lot", "day["


def hidden_zones(seed: int, icc: float) -> tuple[pd.DataFrame, str, str, str]:
    rng = np.random.default_rng(seed)
    x, yy = np.meshgrid(np.arange(8), np.arange(6))
    x, yy = x.ravel(), yy.ravel()
    left = x < 4 if rng.random() < 0.5 else yy < 3
    heated = np.where(left, "yes", "no")
    growth = 0.3 * x + rng.normal(0, 1, 48)
    frame = pd.DataFrame({"pos_x": x, "pos_y": yy, "heated": heated, "growth": growth})
    return frame, "growth", "heated", "zone["


def hidden_runs(seed: int, icc: float) -> tuple[pd.DataFrame, str, str, str]:
    rng = np.random.default_rng(seed)
    order = np.arange(1, 37)
    run = (order - 1) // 6
    diet = np.where(run % 2 == 0, "control", "enriched")
    y = _unit_effect(rng, 6, icc)[run] + rng.normal(0, math.sqrt(1 - icc), 36)
    shuffle = rng.permutation(36)
    frame = pd.DataFrame(
        {"injection_order": order[shuffle], "diet": diet[shuffle], "y": y[shuffle]}
    )
    return frame, "y", "diet", "run["


def hidden_codes(seed: int, icc: float) -> tuple[pd.DataFrame, str, str, str]:
    rng = np.random.default_rng(seed)
    feed = np.repeat([1, 2, 3], 20)
    tank = np.tile(np.repeat([1, 2, 3, 4], 5), 3)
    fish = np.tile(np.arange(1, 6), 12)
    true_tank = (feed - 1) * 4 + tank - 1
    y = _unit_effect(rng, 12, icc)[true_tank] + rng.normal(0, math.sqrt(1 - icc), 60)
    code = [f"F{f}-TANK{t}-{i:02d}" for f, t, i in zip(feed, tank, fish, strict=True)]
    order = rng.permutation(60)
    frame = pd.DataFrame(
        {"sample": np.array(code)[order], "feed": [f"diet{f}" for f in feed[order]], "y": y[order]}
    )
    return frame, "y", "feed", "tank["


def hidden_covariate(seed: int, icc: float) -> tuple[pd.DataFrame, str, str, str]:
    rng = np.random.default_rng(seed)
    tank = np.repeat(np.arange(12), 6)
    feed = np.where(tank < 6, "A", "B")
    values = np.round(rng.uniform(14.0, 18.0, 12), 1)
    while any(len(set(values[s])) < 6 for s in (slice(0, 6), slice(6, 12))):
        values = np.round(rng.uniform(14.0, 18.0, 12), 1)
    y = _unit_effect(rng, 12, icc)[tank] + rng.normal(0, math.sqrt(1 - icc), tank.size)
    order = rng.permutation(tank.size)
    frame = pd.DataFrame({"feed": feed[order], "water_temp": values[tank][order], "y": y[order]})
    return frame, "y", "feed", "water_temp"


SCENARIOS: dict[str, tuple[Scenario, tuple[float, ...]]] = {
    "clean: observer crossed with treatment": (clean_observer, (0.0,)),
    "clean: randomised order, sequence column": (clean_order, (0.0,)),
    "clean: days holding both treatments": (clean_days, (0.0,)),
    "clean: grid, treatments randomised": (clean_grid, (0.0,)),
    "clean: unique sample codes": (clean_codes, (0.0,)),
    "clean: per-row covariates with ties": (clean_covariates, (0.0,)),
    "hidden: treatment per day": (hidden_days, (0.1, 0.3, 0.5)),
    "hidden: treatment in one half of a grid": (hidden_zones, (0.0,)),
    "hidden: processing runs": (hidden_runs, (0.1, 0.3, 0.5)),
    "hidden: tanks in sample codes": (hidden_codes, (0.1, 0.3, 0.5)),
    "hidden: covariate once per tank": (hidden_covariate, (0.1, 0.3, 0.5)),
}


def judge(name: str, icc: float, seed: int) -> dict[str, object]:
    make, _ = SCENARIOS[name]
    frame, response, treatment, expected = make(seed, icc)
    doc = audit(frame, response=response, treatment=treatment, seed=seed).to_dict()
    unit = doc["experimental_units"][0]["unit"] or ""
    warned = {
        f["rule"]
        for f in doc["findings"]
        if f["rule"] in HIDDEN_RULES and f["severity"] in ("warning", "error")
    }
    if expected:
        hit = expected in unit and doc["verdict"]["status"] != "ok"
        return {"ok": bool(hit), "unit": unit, "status": doc["verdict"]["status"]}
    alarm = doc["verdict"]["status"] != "ok" or bool(warned)
    return {"ok": not alarm, "unit": unit, "status": doc["verdict"]["status"]}


def run(job: tuple[str, float, int]) -> tuple[str, float, int, dict[str, object]]:
    name, icc, seed = job
    return name, icc, seed, judge(name, icc, seed)


START = "<!-- hidden-alarm table: generated by benchmarks/hidden_alarms.py -->"
END = "<!-- end of generated table -->"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--seeds", type=int, default=20)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--out", type=Path, default=ROOT / "docs" / "hidden-alarms.json")
    parser.add_argument("--doc", type=Path, default=ROOT / "docs" / "hidden-alarms.md")
    args = parser.parse_args()
    jobs = [
        (name, icc, 1000 * i + seed)
        for i, (name, (_, iccs)) in enumerate(SCENARIOS.items())
        for icc in iccs
        for seed in range(args.seeds)
    ]
    t0 = time.perf_counter()
    with ProcessPoolExecutor(args.workers) as pool:
        results = list(pool.map(run, jobs))
    rows = []
    for name, (_, iccs) in SCENARIOS.items():
        for icc in iccs:
            mine = [r for n, i, _, r in results if n == name and i == icc]
            good = sum(bool(r["ok"]) for r in mine)
            clean = name.startswith("clean")
            rate = 1 - good / len(mine) if clean else good / len(mine)
            misses = sorted({f"{r['status']} / {r['unit']}" for r in mine if not r["ok"]})
            rows.append(
                {
                    "scenario": name,
                    "icc": icc,
                    "datasets": len(mine),
                    "measure": "false alarms" if clean else "detected",
                    "rate": rate,
                    "misses": misses,
                }
            )
            print(f"{name:45s} icc {icc:.1f}: {rows[-1]['measure']} {rate:.1%}", flush=True)
    print(f"{len(jobs)} audits in {time.perf_counter() - t0:.0f} s")
    args.out.write_text(json.dumps({"seeds": args.seeds, "rows": rows}, indent=1))
    table = [
        "| scenario | unit ICC | datasets | measure | rate | how it failed |",
        "|---|---|---|---|---|---|",
    ]
    for r in rows:
        how = "; ".join(r["misses"][:3]) or "-"  # type: ignore[index]
        table.append(
            f"| {r['scenario']} | {r['icc']} | {r['datasets']} | {r['measure']} | "
            f"{r['rate']:.0%} | {how} |"
        )
    text = args.doc.read_text() if args.doc.exists() else f"{START}\n{END}\n"
    head, rest = text.split(START, 1)
    _, tail = rest.split(END, 1)
    args.doc.write_text(head + START + "\n" + "\n".join(table) + "\n" + END + tail)


if __name__ == "__main__":
    main()
