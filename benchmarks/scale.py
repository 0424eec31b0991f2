"""How replicheck's audit time grows with rows, units and nesting levels.

Run: python benchmarks/scale.py [--max-rows 10000000] [--write docs/scale.md]

Generated data (one process, the same data for every timing): a treatment
given to whole outer units, with one to three nested grouping levels below
it (for three levels: site > cage > animal), unit effects at every level and
a residual. For each configuration it prints

* replicheck's time for each stage of the audit (the data are already in
  memory as a DataFrame, so file parsing is excluded; see read_time.py),
* the time of one pandas groupby aggregation (count and sum of the
  response) over the treatment and grouping columns: the practical floor of
  any analysis that has to look at every row,
* statsmodels MixedLM on the same random-intercept model (REML), where it
  finishes within the time limit, and the relative difference between its
  treatment estimate and replicheck's mixed model,
* the time of replicheck's mixed-model fit alone (one pass over the rows for
  the per-unit sums, then REML on the units), and the ratios audit / floor
  and MixedLM / mixed fit. Both fits are timed the same way: the shortest
  of three runs, or of fewer when the runs have taken more than 20 s (the
  floor is the shortest of three groupbys; the audit runs once).

Timings live here, never in tests.
"""

from __future__ import annotations

import argparse
import math
import signal
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from types import FrameType
from typing import TypeVar

import numpy as np
import pandas as pd

from replicheck import audit

LEVEL_NAMES = ("site", "cage", "animal")
REPEAT_BUDGET = 20.0  # seconds of repeats allowed per fit timing (shortest of up to 3)
T = TypeVar("T")


@dataclass(frozen=True)
class Config:
    rows: int
    units: int  # innermost units
    levels: int
    extra: int = 0  # further recorded columns (integer codes, numbers, text codes)


def make(cfg: Config, seed: int = 1) -> pd.DataFrame:
    """Generated clustered data: units nested ``levels`` deep, treatment on the outer units."""
    rng = np.random.default_rng(seed)
    inner = rng.integers(0, cfg.units, size=cfg.rows)
    cols: dict[str, np.ndarray] = {}
    # each level groups ten units of the level below (at least two groups at the top)
    sizes = [max(2, cfg.units // 10 ** (cfg.levels - 1 - k)) for k in range(cfg.levels)]
    effect = np.zeros(cfg.rows)
    codes = inner
    for k in reversed(range(cfg.levels)):
        codes = inner * sizes[k] // cfg.units
        cols[LEVEL_NAMES[3 - cfg.levels + k]] = codes
        effect += rng.normal(0.0, 1.0, size=sizes[k])[codes]
    top = cols[LEVEL_NAMES[3 - cfg.levels]]
    arm = top % 2
    y = 10.0 + 0.3 * arm + effect + rng.normal(0.0, 2.0, size=cfg.rows)
    frame = {"y": y, "arm": np.where(arm == 1, "B", "A")}
    frame.update({k: cols[k] for k in LEVEL_NAMES if k in cols})
    out = pd.DataFrame(frame)
    # further recorded columns unrelated to the design: small integer codes,
    # measurements, and text codes (a third each)
    words = np.array([f"lot-{i:02d}" for i in range(30)])
    extra: dict[str, object] = {}
    for j in range(cfg.extra):
        if j % 3 == 0:
            extra[f"code{j}"] = rng.integers(0, 50, size=cfg.rows)
        elif j % 3 == 1:
            extra[f"reading{j}"] = rng.normal(size=cfg.rows)
        else:
            extra[f"label{j}"] = pd.array(words[rng.integers(0, 30, size=cfg.rows)], dtype="str")
    return pd.concat([out, pd.DataFrame(extra)], axis=1) if extra else out


class _Timeout(Exception):
    pass


def _alarm(signum: int, frame: FrameType | None) -> None:
    raise _Timeout


def statsmodels_fit(df: pd.DataFrame, names: list[str], limit: float) -> tuple[float, float]:
    """Seconds of statsmodels MixedLM (REML) on the same model and its arm estimate."""
    import statsmodels.api as sm

    x = sm.add_constant((df["arm"] == "B").astype(float).to_numpy())
    groups = df[names[0]].to_numpy()
    vc = None
    if len(names) > 1:
        vc = {n: f"0 + C({n})" for n in names[1:]}

    def once() -> float:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if vc is None:
                model = sm.MixedLM(df["y"].to_numpy(), x, groups=groups)
            else:
                model = sm.MixedLM.from_formula(
                    "y ~ arm", data=df, groups=names[0], vc_formula=vc, re_formula="1"
                )
            result = model.fit(reml=True)
        return float(np.asarray(result.fe_params)[1])

    signal.signal(signal.SIGALRM, _alarm)
    signal.alarm(int(limit))
    try:
        seconds, estimate = best_of(once)
    except _Timeout:
        return math.inf, math.nan
    finally:
        signal.alarm(0)
    return seconds, estimate


def best_of(run: Callable[[], T], budget: float = REPEAT_BUDGET) -> tuple[float, T]:
    """The shortest of up to three runs (fewer once ``budget`` seconds are spent)
    and the last run's result; both fits are timed this way."""
    best = math.inf
    spent = 0.0
    for _ in range(3):
        t0 = time.perf_counter()
        out = run()
        took = time.perf_counter() - t0
        best = min(best, took)
        spent += took
        if spent > budget:
            break
    return best, out


def mixed_fit_seconds(df: pd.DataFrame, names: list[str]) -> float:
    """Seconds of replicheck's mixed-model fit alone (the engine the audit picks)."""
    from replicheck.refit import fit_mixed

    # the same inputs as statsmodels_fit gets (response, design matrix, the raw
    # grouping columns), prepared outside the timing as there
    y = df["y"].to_numpy()
    x = np.column_stack([np.ones(len(df)), (df["arm"] == "B").to_numpy(dtype=float)])
    random = {n: df[n].to_numpy() for n in names}
    return best_of(lambda: fit_mixed(y, x, random, ["(Intercept)", "armB"]))[0]


def floor_seconds(df: pd.DataFrame, names: list[str]) -> float:
    """One groupby over the claimed analysis's columns: treatment and grouping columns."""
    t0 = time.perf_counter()
    df.groupby(["arm", *names], sort=False)["y"].agg(["count", "sum"])
    return time.perf_counter() - t0


def configs(max_rows: int) -> list[Config]:
    out = []
    for rows in (10_000, 100_000, 1_000_000, 10_000_000):
        if rows > max_rows:
            continue
        for units in (10, 1_000, 100_000):
            if units * 5 > rows:
                continue
            levels_list = (1, 2, 3) if rows == 1_000_000 and units == 1_000 else (1,)
            for levels in levels_list:
                out.append(Config(rows, units, levels))
    # wide tables: 120 further columns (structure and hidden scans look at every column)
    out += [Config(rows, 1_000, 1, 120) for rows in (100_000, 1_000_000) if rows <= max_rows]
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--max-rows", type=int, default=10_000_000)
    parser.add_argument("--mixedlm-limit", type=float, default=300.0)
    parser.add_argument("--write", metavar="PATH", help="also write the table as Markdown")
    args = parser.parse_args()
    header = (
        "| rows | units | levels | columns | audit s | stages (s) | groupby floor s "
        "| audit / floor | mixed fit s | MixedLM s | MixedLM / mixed fit | estimate rel. diff |"
    )
    lines = [header, "|" + "---|" * 12]
    print(header)
    for cfg in configs(args.max_rows):
        df = make(cfg)
        names = [n for n in LEVEL_NAMES if n in df.columns]
        floor = min(floor_seconds(df, names) for _ in range(3))
        t0 = time.perf_counter()
        report = audit(df, response="y", treatment="arm", seed=1)
        total = time.perf_counter() - t0
        stages = ", ".join(f"{k} {v:.2f}" for k, v in report.seconds.items())
        fit_s = mixed_fit_seconds(df, names)
        mixed = next((a for a in report.to_dict()["analyses"] if a["name"] == "mixed_model"), None)
        sm_s, sm_est = (
            statsmodels_fit(df, names, args.mixedlm_limit)
            if cfg.rows <= 1_000_000 and cfg.units <= 10_000 and cfg.extra == 0
            else (math.nan, math.nan)
        )
        ours = None if mixed is None else mixed["estimate"]
        diff = (
            "-"
            if ours is None or not math.isfinite(sm_est)
            else f"{abs(ours - sm_est) / max(abs(sm_est), 1e-300):.1e}"
        )
        sm_text = (
            "not run"
            if math.isnan(sm_s)
            else (f"> {args.mixedlm_limit:.0f}" if math.isinf(sm_s) else f"{sm_s:.2f}")
        )
        ratio = "-" if not math.isfinite(sm_s) else f"{sm_s / fit_s:.0f}"
        line = (
            f"| {cfg.rows:,} | {cfg.units:,} | {cfg.levels} | {len(df.columns)} | "
            f"{total:.2f} | {stages} | "
            f"{floor:.3f} | {total / floor:.0f} | {fit_s:.3f} | {sm_text} | {ratio} | {diff} |"
        )
        lines.append(line)
        print(line, flush=True)
    if args.write:
        with open(args.write, "w", encoding="utf-8") as fh:
            fh.write("\n".join(lines) + "\n")


if __name__ == "__main__":
    main()
