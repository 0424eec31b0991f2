"""Seeded generators of simulated designs with a known random structure.

Invented data, on purpose: these are structure-inference checks, and the truth
(which term was applied to which unit, hence its error stratum and its error
degrees of freedom) is known only for data generated from a design. Every
generator draws from ``numpy.random.default_rng(seed)`` and returns a pandas
DataFrame with one row per observation, plain column names (block, plot,
subject, period, run, plate, well, ...) and the response in ``y``.

Variance components are chosen so that the structure is detectable: every
random grouping (block, plot, subject, run, plate) has SD 2 and the residual
SD 1, unless stated otherwise.

Common options:

- ``drop``: the fraction of rows removed at random afterwards (unbalanced);
- ``alias``: add a column that is only a numeric code of the first treatment
  (``<treatment>_code``), which must not be taken for a unit;
- ``labels``: how unit labels are written: ``"global"`` (one label per
  physical unit), ``"within_<grouping>"`` (numbered afresh within each level
  of a grouping, e.g. tank 1..k of every feed), or ``"none"`` (no unit column:
  the unit is implicit in the block x treatment cells).
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd

UNIT_SD = 2.0
RESIDUAL_SD = 1.0


def _finish(
    d: pd.DataFrame, rng: np.random.Generator, drop: float, alias: str | None
) -> pd.DataFrame:
    """Add the alias column and drop a fraction of rows at random."""
    if alias is not None:
        levels = sorted(d[alias].unique())
        d[f"{alias}_code"] = d[alias].map({lv: 101 + i for i, lv in enumerate(levels)})
    if drop > 0:
        gone = rng.choice(len(d), size=round(drop * len(d)), replace=False)
        d = d.drop(index=d.index[gone]).reset_index(drop=True)
    return d


def split_plot(
    seed: int,
    *,
    blocks: int = 4,
    labels: str = "global",
    alias: bool = False,
    drop: float = 0.0,
) -> pd.DataFrame:
    """Split plot: 3 varieties on whole plots within blocks, 4 nitrogen rates on sub-plots.

    Truth: variety's unit is the whole plot (block x variety), error df
    (3 - 1)(blocks - 1); nitro and variety:nitro within whole plots, error df
    3 (blocks - 1)(4 - 1). ``labels``: ``global`` (plot 1..3*blocks),
    ``within_block`` (plot 1..3 in every block), ``within_variety`` (plot
    1..blocks for every variety), ``none`` (no plot column).
    """
    rng = np.random.default_rng(seed)
    n_var, n_nit = 3, 4
    var_eff = np.array([0.0, 1.0, 2.0])
    nit_eff = np.array([0.0, 1.0, 2.0, 3.0])
    block_eff = rng.normal(0, UNIT_SD, blocks)
    plot_eff = rng.normal(0, UNIT_SD, (blocks, n_var))
    rows = []
    for b in range(blocks):
        for pos, v in enumerate(rng.permutation(n_var)):
            plot = {
                "global": b * n_var + pos + 1,
                "within_block": pos + 1,
                "within_variety": b + 1,
                "none": 0,
            }[labels]
            for k in rng.permutation(n_nit):
                mu = 20 + block_eff[b] + var_eff[v] + nit_eff[k] + plot_eff[b, v]
                rows.append(
                    {
                        "block": f"B{b + 1}",
                        "plot": plot,
                        "variety": f"V{v + 1}",
                        "nitro": f"N{k + 1}",
                        "y": mu + rng.normal(0, RESIDUAL_SD),
                    }
                )
    d = pd.DataFrame(rows)
    if labels == "none":
        d = d.drop(columns="plot")
    return _finish(d, rng, drop, "variety" if alias else None)


def split_split_plot(
    seed: int,
    *,
    blocks: int = 4,
    labels: str = "global",
    alias: bool = False,
    drop: float = 0.0,
) -> pd.DataFrame:
    """Split-split plot: irrigation (2) on main plots, variety (3) on sub-plots, nitro (3) on rows.

    Truth: irrigation against main plots, error df (2 - 1)(blocks - 1);
    variety and irrigation:variety against sub-plots, error df
    2 (blocks - 1)(3 - 1); nitro and its interactions against the residual,
    error df 2 * 3 (blocks - 1)(3 - 1). ``labels``: ``global`` (main_plot and
    sub_plot numbered through), ``within_main`` (sub_plot 1..3 in every main
    plot), ``within_irrigation`` (main_plot 1..blocks for each irrigation
    level, sub_plot numbered through), ``none`` (no plot columns).
    """
    rng = np.random.default_rng(seed)
    n_irr, n_var, n_nit = 2, 3, 3
    irr_eff = np.array([0.0, 2.0])
    var_eff = np.array([0.0, 1.0, 2.0])
    nit_eff = np.array([0.0, 1.5, 3.0])
    block_eff = rng.normal(0, UNIT_SD, blocks)
    main_eff = rng.normal(0, UNIT_SD, (blocks, n_irr))
    sub_eff = rng.normal(0, UNIT_SD, (blocks, n_irr, n_var))
    rows = []
    sub_id = 0
    for b in range(blocks):
        for ipos, i in enumerate(rng.permutation(n_irr)):
            main = b * n_irr + ipos + 1 if labels != "within_irrigation" else b + 1
            for vpos, v in enumerate(rng.permutation(n_var)):
                sub_id += 1
                sub = vpos + 1 if labels == "within_main" else sub_id
                for k in rng.permutation(n_nit):
                    mu = (
                        20
                        + block_eff[b]
                        + irr_eff[i]
                        + var_eff[v]
                        + nit_eff[k]
                        + main_eff[b, i]
                        + sub_eff[b, i, v]
                    )
                    rows.append(
                        {
                            "block": f"B{b + 1}",
                            "main_plot": main,
                            "sub_plot": sub,
                            "irrigation": f"I{i + 1}",
                            "variety": f"V{v + 1}",
                            "nitro": f"N{k + 1}",
                            "y": mu + rng.normal(0, RESIDUAL_SD),
                        }
                    )
    d = pd.DataFrame(rows)
    if labels == "none":
        d = d.drop(columns=["main_plot", "sub_plot"])
    return _finish(d, rng, drop, "irrigation" if alias else None)


def rcb_subsampling(
    seed: int,
    *,
    blocks: int = 5,
    samples: int = 3,
    labels: str = "none",
    alias: bool = False,
    drop: float = 0.0,
    unequal: bool = False,
) -> pd.DataFrame:
    """Randomised complete blocks of 3 treatments, one plot per block x treatment, subsampled.

    Truth: the plot (block x treatment cell) is the unit, error df
    (3 - 1)(blocks - 1). ``samples`` measurements per plot (``unequal``: 2 to
    4 at random). ``labels``: ``none`` (no plot column), ``global`` (plot
    numbered through), ``within_treatment`` (plot 1..blocks for every
    treatment). Each row also has a ``sample`` number within its plot.
    """
    rng = np.random.default_rng(seed)
    n_trt = 3
    trt_eff = np.array([0.0, 1.5, 3.0])
    block_eff = rng.normal(0, UNIT_SD, blocks)
    plot_eff = rng.normal(0, UNIT_SD, (blocks, n_trt))
    rows = []
    for b in range(blocks):
        for pos, t in enumerate(rng.permutation(n_trt)):
            plot = b * n_trt + pos + 1 if labels == "global" else b + 1
            m = int(rng.integers(2, 5)) if unequal else samples
            for s in range(m):
                rows.append(
                    {
                        "block": f"B{b + 1}",
                        "plot": plot,
                        "sample": s + 1,
                        "fertiliser": f"F{t + 1}",
                        "y": 10
                        + block_eff[b]
                        + trt_eff[t]
                        + plot_eff[b, t]
                        + rng.normal(0, RESIDUAL_SD),
                    }
                )
    d = pd.DataFrame(rows)
    if labels == "none":
        d = d.drop(columns="plot")
    return _finish(d, rng, drop, "fertiliser" if alias else None)


def repeated_measures(
    seed: int,
    *,
    per_group: tuple[int, int] = (6, 6),
    labels: str = "global",
    alias: bool = False,
    drop: float = 0.0,
) -> pd.DataFrame:
    """Two diets between subjects, each subject measured at weeks 0, 2, 4, 6.

    Truth: diet against subjects, error df (subjects - 2); week and diet:week
    within subjects, error df (subjects - 2)(4 - 1). ``per_group`` gives the
    number of subjects per diet. ``labels``: ``global`` (subject 1..S) or
    ``within_diet`` (mouse 1..k under every diet; the column is then named
    ``mouse``).
    """
    rng = np.random.default_rng(seed)
    weeks = [0, 2, 4, 6]
    week_eff = {0: 0.0, 2: 1.0, 4: 2.0, 6: 2.5}
    diet_eff = [0.0, 1.5]
    rows = []
    sid = 0
    for g, size in enumerate(per_group):
        for j in range(size):
            sid += 1
            s_eff = rng.normal(0, UNIT_SD)
            for w in weeks:
                rows.append(
                    {
                        "subject": sid if labels == "global" else j + 1,
                        "diet": "control" if g == 0 else "high_fat",
                        "week": w,
                        "y": 30 + diet_eff[g] + week_eff[w] + s_eff + rng.normal(0, RESIDUAL_SD),
                    }
                )
    d = pd.DataFrame(rows)
    if labels == "within_diet":
        d = d.rename(columns={"subject": "mouse"})
    return _finish(d, rng, drop, "diet" if alias else None)


# Williams design for three treatments: each treatment once per subject and
# equally often in each period and after each other treatment.
WILLIAMS_3 = ("ABC", "BCA", "CAB", "ACB", "BAC", "CBA")


def crossover(
    seed: int,
    *,
    per_sequence: int = 2,
    labels: str = "global",
    alias: bool = False,
    drop: float = 0.0,
) -> pd.DataFrame:
    """Three-period crossover of blends A, B, C in the six Williams sequences.

    Setting (invented): tasters score three coffee blends, one per session.

    Truth: subjects and periods are blocks crossed with blend; blend (tested
    within subjects) has error df rows - subjects - periods - blends + 2 when
    period is in the model. Subject SD 2, period effects 0, 1, -1.
    ``labels``: ``global`` (subject 1..S) or ``within_sequence`` (subject
    1..per_sequence within each sequence).
    """
    rng = np.random.default_rng(seed)
    blend_eff = {"A": 0.0, "B": 1.0, "C": 2.0}
    period_eff = [0.0, 1.0, -1.0]
    rows = []
    sid = 0
    for seq in WILLIAMS_3:
        for j in range(per_sequence):
            sid += 1
            s_eff = rng.normal(0, UNIT_SD)
            for p, blend in enumerate(seq):
                rows.append(
                    {
                        "subject": sid if labels == "global" else j + 1,
                        "sequence": seq,
                        "period": p + 1,
                        "blend": blend,
                        "y": 50
                        + blend_eff[blend]
                        + period_eff[p]
                        + s_eff
                        + rng.normal(0, RESIDUAL_SD),
                    }
                )
    return _finish(pd.DataFrame(rows), rng, drop, "blend" if alias else None)


def nested_plates(
    seed: int,
    *,
    runs: int = 3,
    plates: int = 2,
    wells: int = 3,
    reads: int = 2,
    labels: str = "global",
    alias: bool = False,
    drop: float = 0.0,
) -> pd.DataFrame:
    """Reads in wells in plates in runs: 3 compounds, each applied to whole plates.

    Every run holds ``plates`` plates of every compound (runs are blocks
    crossed with compound). Truth: compound against plates, error df
    runs * 3 * plates - runs - 3 + 1 (plates within run x compound pooled with
    the run x compound interaction, as in R's ``aov(y ~ compound +
    Error(run/plate))``); wells are sub-units of plates. SDs: run 2, plate 2,
    well 1, read 1. ``labels``: ``global`` (plate numbered through, well 1..3
    within every plate), ``within_compound`` (plate 1..runs*plates for every
    compound, well 1..3 within plate), ``all_global`` (wells numbered through).
    """
    rng = np.random.default_rng(seed)
    n_cmp = 3
    cmp_eff = np.array([0.0, 1.0, 3.0])
    run_eff = rng.normal(0, UNIT_SD, runs)
    rows = []
    plate_id = 0
    well_id = 0
    per_cmp = [0] * n_cmp
    for r in range(runs):
        for c in rng.permutation(np.repeat(np.arange(n_cmp), plates)):
            plate_id += 1
            per_cmp[c] += 1
            p_eff = rng.normal(0, UNIT_SD)
            for w in range(wells):
                well_id += 1
                w_eff = rng.normal(0, 1.0)
                for _ in range(reads):
                    rows.append(
                        {
                            "run": f"R{r + 1}",
                            "plate": per_cmp[c] if labels == "within_compound" else plate_id,
                            "well": well_id if labels == "all_global" else w + 1,
                            "compound": f"C{c + 1}",
                            "y": 5
                            + run_eff[r]
                            + cmp_eff[c]
                            + p_eff
                            + w_eff
                            + rng.normal(0, RESIDUAL_SD),
                        }
                    )
    return _finish(pd.DataFrame(rows), rng, drop, "compound" if alias else None)


def confounded_factorial(
    seed: int,
    *,
    replicates: int = 4,
    labels: str = "global",
    alias: bool = False,
    drop: float = 0.0,
) -> pd.DataFrame:
    """2^3 factorial (N, P, K) in blocks of 4 with N:P:K confounded with blocks.

    Each replicate has two blocks: the four runs with N*P*K = +1 (in -1/+1
    coding) and the four with -1. Truth: N:P:K is tested between blocks,
    error df blocks - 2; the other six terms within blocks, error df
    4 * blocks - blocks - 6. ``labels``: ``global`` (block 1..2*replicates) or
    ``within_field`` (block 1..2 in every field).
    """
    rng = np.random.default_rng(seed)
    effects = {"N": 2.0, "P": 0.5, "K": 1.0}
    rows = []
    for rep in range(replicates):
        halves = rng.permutation(2)
        for h, sign in zip(halves, (1, -1), strict=True):
            b_eff = rng.normal(0, UNIT_SD)
            cell = [
                x
                for x in itertools.product((0, 1), repeat=3)
                if np.prod([2 * v - 1 for v in x]) == sign
            ]
            for n, p, k in (cell[i] for i in rng.permutation(4)):
                row = {
                    "field": f"F{rep + 1}",
                    "block": 2 * rep + h + 1 if labels == "global" else h + 1,
                    "N": n,
                    "P": p,
                    "K": k,
                    "y": 50
                    + effects["N"] * n
                    + effects["P"] * p
                    + effects["K"] * k
                    + b_eff
                    + rng.normal(0, RESIDUAL_SD),
                }
                rows.append(row)
    d = pd.DataFrame(rows)
    if labels == "global":
        d = d.drop(columns="field")
    return _finish(d, rng, drop, "N" if alias else None)


def individually_randomised(
    seed: int,
    *,
    days: int = 4,
    per_cell: int = 4,
    alias: bool = False,
    drop: float = 0.0,
) -> pd.DataFrame:
    """Three diets allocated to individual animals; decoy columns with no effect.

    Every animal is one row (``animal_id`` 1..n, a row identifier). The
    animals were measured on ``days`` days, ``per_cell`` of every diet on
    every day (day crossed with diet, no day effect), by one of three
    observers chosen at random (no observer effect). Truth: the row is the
    unit; diet against the residual, status ok.
    """
    rng = np.random.default_rng(seed)
    diet_eff = {"D1": 0.0, "D2": 0.8, "D3": 1.6}
    rows = []
    for day in range(days):
        diets = rng.permutation(np.repeat(list(diet_eff), per_cell))
        for diet in diets:
            rows.append(
                {
                    "day": f"2024-03-{day + 11:02d}",
                    "observer": str(rng.choice(["AK", "BM", "CS"])),
                    "diet": str(diet),
                    "y": 12 + diet_eff[str(diet)] + rng.normal(0, RESIDUAL_SD),
                }
            )
    d = pd.DataFrame(rows)
    d.insert(0, "animal_id", np.arange(1, len(d) + 1))
    return _finish(d, rng, drop, "diet" if alias else None)
