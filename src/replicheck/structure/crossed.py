"""Groupings crossed with the treatments: blocks and within-unit factors.

A grouping crossed with the treatments is not their unit, but it is part of
the design's random structure in one of two ways:

* **within-unit factor**: it varies within the units of a treatment from one
  measurement to the next (the weeks a pig is weighed, the visits of a
  patient, the periods of a run). W is one when some unit S of a treatment is
  crossed with W (each unit holds 1.5 levels of W or more on average), the
  units share W's levels (each unit holds at least half of the levels its
  treatment level shows, on average) and each S x W cell
  holds few rows (at most 3 on average: every pig weighed once a week; a time
  named as such needs only to vary within the units: several animals caught
  on one plot in one year, sampling days that differ from year to year); so
  are factors that index the repeated measurements jointly with another
  (phase and hour: every unit holds every level, with numbers of rows within a
  factor 2 of each other),
  and groupings made of a within-unit factor's levels (the study period of a
  week). Unless named as a time, occasions are shared (each level of W is held
  by 1.5 units or more on average: values that differ from row to row are no
  occasions) and a yes/no state is no occasion. A characteristic that merely varies
  between the rows of a unit (a pupil's sex within a school, a score) puts
  many rows in each cell or few of its levels in each unit. A grouping whose
  name says container, subject, place or source (plot 1 to 3 of every main
  plot, wafer 1 to 3 of every lot) numbers sub-units, not measurement
  occasions; so does one named as a number or sample (sample 1 to 3 of every
  plot) unless its levels carry one effect across the units (index 1 the
  lowest pressure on every dialyser), and so does a grouping within whose
  unit x level cells a treatment is constant while it varies within the units
  (the variety of each sub-plot); those are read as labels (see
  :mod:`replicheck.structure.labels`). A within-unit factor is never a block
  of implicit plots, never a unit, and never the parent of restarting labels.
* **block**: it holds the treatments side by side. In each of its levels every
  treatment shows two or more levels (complete or incomplete blocks); with
  about one unit of each treatment level in each block level (at most 2.5 on
  average and at most 3 in any cell: a subject under each condition, a plate
  with each sample, a litter with one treated and two control rats) and levels
  of even size (coefficient
  of variation of their sizes at most 0.5: blocks are formed by the
  experimenter), it is a block whatever its name. A grouping that puts many
  units of each level in each of its levels (a pupil's sex, a patient's
  baseline status, a centre of a multi-site trial) is a block only when its
  name says block, place, source, time or subject, at least 80% of its levels
  hold two or more levels of every treatment, its levels are not very uneven
  (coefficient of variation at most 1), and it is not a measurement (numbers
  with fractions) nor a yes/no column whose name merely contains such a word
  (a site coded 0/1 is a block, a nerve_block_censor flag is not); otherwise
  it is a
  characteristic of the rows. Coordinates of positions (x/y, row/column,
  latitude/longitude) are blocks only when every level holds every treatment
  level (the rows and columns of a Latin square); otherwise their spatial
  structure is weighed by the space scan.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from functools import partial

import numpy as np
import pandas as pd

from replicheck.numbers import p_phrase
from replicheck.partitions import dense_codes, is_nested
from replicheck.structure import evidence as ev
from replicheck.structure.columns import yes_no_column
from replicheck.structure.names import name_hint, tokens
from replicheck.structure.relations import classify, group_codes

WITHIN_MAX_CELL = 3.0  # rows per unit x level of a within-unit factor (a chosen value)
WITHIN_COVERAGE = 0.5  # share of a treatment level's levels each unit holds (a chosen value)
WITHIN_DISPERSION = 0.5  # variance / mean of the unit x level counts (a chosen value)
WITHIN_SAME_COUNT = 0.8  # share of unit x level cells holding the commonest count (chosen)
BLOCK_MAX_CELL = 2.5  # units per block x treatment cell (two controls per treated unit)
BLOCK_MOST_CELL = 3  # and at most this many in any one cell (a chosen value)
BLOCK_MAX_CV = 0.5  # spread of block sizes for an unnamed block (a chosen value)
NAMED_BLOCK_MAX_CV = 1.0  # spread of block sizes for a named block (a chosen value)
NAMED_BLOCK_SHARE = 0.8  # share of a named block's levels holding two treatment levels


@dataclass(frozen=True)
class Block:
    """A grouping crossed with the treatments, a random stratum of the design."""

    name: str
    columns: tuple[str, ...]
    n_levels: int
    p_value: float | None
    reason: str
    kind: str = "block"  # block | within


def _cells_and_coverage(
    s: np.ndarray, w: np.ndarray, trt: np.ndarray
) -> tuple[float, float, float]:
    """Mean rows per S x W cell, mean W levels per S level, and the mean share of the W
    levels of its treatment level that each S level holds."""
    s_d, w_d, t_d = dense_codes(s), dense_codes(w), dense_codes(trt)
    k_s, k_w, k_t = int(s_d.max()) + 1, int(w_d.max()) + 1, int(t_d.max()) + 1
    cells = pd.unique(s_d * k_w + w_d)  # the distinct S x W cells, by hashing
    n_cells = int(cells.size)
    per_unit = np.bincount(cells // k_w, minlength=k_s)
    levels_in_trt = np.bincount(pd.unique(t_d * k_w + w_d) // k_w, minlength=k_t)
    unit_trt = np.zeros(k_s, dtype=np.int64)
    unit_trt[s_d] = t_d
    coverage = float(np.mean(per_unit / np.maximum(levels_in_trt[unit_trt], 1)))
    return s.size / n_cells, float(per_unit.mean()), coverage


def within_factors(
    data: pd.DataFrame,
    cols: Sequence[str],
    stated: Sequence[str],
    units: Mapping[str, np.ndarray],
    trt_cells: np.ndarray,
    y: np.ndarray | None = None,
) -> dict[str, str]:
    """Within-unit factors among ``cols`` and the unit each varies within.

    ``units`` are the codings of unit groupings (recorded units nested in a
    treatment, or the chosen units of the terms); ``trt_cells`` codes the
    treatment combinations.
    """
    out = {c: "stated" for c in stated}
    codes = {c: group_codes(data, (c,)) for c in cols}
    unit_names = set(units)

    def varies_within(w: str, extra: np.ndarray | None) -> str | None:
        wc = codes[w]
        kind = name_hint(w).kind
        if kind in {"container", "individual", "location", "process", "block"}:
            return None  # a named container, subject, place or source: labels of sub-units
        if kind != "time" and indicator(data, w):
            return None  # a yes/no state of a row, not an occasion
        for name, s in units.items():
            if name == w:
                continue
            ok = ev.present(wc, s, trt_cells, *(() if extra is None else (extra,)))
            if ok.sum() < 4:
                continue
            a, b = s[ok], wc[ok]
            if is_nested(a, b) or is_nested(b, a):
                continue
            if kind != "time" and _labels_sub_units(a, b, trt_cells[ok]):
                continue
            if kind == "identifier" and not _shared(y, a, b, trt_cells, ok):
                continue  # numbers of sub-samples (sample 1 to 3 of every plot), not occasions
            cell_w = b if extra is None else ev.combined([b, extra[ok]])
            size, _, _ = _cells_and_coverage(a, cell_w, trt_cells[ok])
            _, per_unit, coverage = _cells_and_coverage(a, b, trt_cells[ok])
            if extra is not None and not _balanced_in_units(a, b):
                continue  # jointly, only factors laid out evenly in every unit
            timed = name_hint(w).kind == "time"
            regular = coverage >= WITHIN_COVERAGE and size <= WITHIN_MAX_CELL
            regular = regular and _units_per_level(a, b) >= 1.5  # occasions shared by units
            regular = regular and _scheduled(a, cell_w, partial(_shared, y, a, b, trt_cells, ok))
            if per_unit >= 1.5 and (timed or regular):
                return name
        return None

    candidates = [c for c in cols if c not in out and c not in unit_names]
    for w in candidates:
        found = varies_within(w, None)
        if found is not None:
            out[w] = found
    changed = True
    while changed:  # factors that index the measurements jointly with those found
        changed = False
        found_codes = [codes[c] for c in out if c in codes]
        if not found_codes:
            break
        joint = ev.combined([np.maximum(c, 0) for c in found_codes])
        for w in candidates:
            if w in out:
                continue
            unit = varies_within(w, joint)
            if unit is not None:
                out[w] = unit
                changed = True
    for g in candidates:  # groupings made of a within-unit factor's levels
        if g in out:
            continue
        gc = codes[g]
        for w in list(out):
            s = units.get(out[w])
            if w not in codes or s is None:
                continue
            ok = ev.present(gc, codes[w], s)
            if not ok.any() or not is_nested(codes[w][ok], gc[ok]):
                continue
            if is_nested(s[ok], gc[ok]) or is_nested(gc[ok], s[ok]):
                continue  # constant within the unit, or holding it whole: not a time
            out[g] = out[w]
            break
    return out


def _scheduled(unit: np.ndarray, w: np.ndarray, shared: Callable[[], bool]) -> bool:
    """Whether the rows of the units follow a schedule of W's levels, not chance.

    Occasions follow a schedule: each unit is measured once (or a fixed number of
    times) at each occasion it attends, so the counts of its non-empty unit x
    level cells hardly vary. A code unrelated to the design spreads each unit's
    rows over its levels at random: the counts scatter as Poisson counts do
    (with two rows per cell on average, the variance of the non-empty counts is
    about 0.7 of their mean). W is scheduled when that variance is at most half
    the mean (the index of dispersion, Fisher 1950; the bound is a chosen
    value) and either most cells (80%) hold the same count, as a schedule does
    and sparse random codes (one row per cell on average: 58% single rows) do
    not, or W's levels carry one effect across the units, as conditions and
    occasions do and random codes do not (``shared``, evaluated only then).
    """
    sizes = np.bincount(ev.combined([unit, w]))
    sizes = sizes[sizes > 0]
    if float(sizes.var()) > WITHIN_DISPERSION * float(sizes.mean()):
        return False
    return bool(np.bincount(sizes).max() >= WITHIN_SAME_COUNT * sizes.size) or shared()


def _units_per_level(unit: np.ndarray, w: np.ndarray) -> float:
    """Mean number of units holding each level of W."""
    w_d, u_d = dense_codes(w), dense_codes(unit)
    k_w = int(w_d.max()) + 1
    pairs = pd.unique(u_d * k_w + w_d)  # distinct unit x level pairs
    return float(np.bincount(pairs % k_w, minlength=k_w).mean())


def _shared(
    y: np.ndarray | None, unit: np.ndarray, w: np.ndarray, trt: np.ndarray, ok: np.ndarray
) -> bool:
    """Whether the levels of W carry one effect across the units (occasion 1 is alike in
    every unit), as occasions do and numbers of sub-samples do not."""
    if y is None:
        return False
    p = ev.shared_label_effect(y[ok], w, unit, trt[ok])
    return p is not None and p < 0.05


def _labels_sub_units(unit: np.ndarray, w: np.ndarray, trt: np.ndarray) -> bool:
    """Whether a treatment varies within the units but is constant within unit x W cells:
    W then numbers the sub-units that received it (sub-plot 1 to 3 of every main plot)."""
    if is_nested(unit, trt):
        return False
    return is_nested(ev.combined([unit, w]), trt)


def _balanced_in_units(unit: np.ndarray, w: np.ndarray) -> bool:
    """Whether every unit holds every level of W, with rows per level within a factor 2."""
    cells = ev.combined([unit, w])
    sizes = np.bincount(cells)
    k_u = int(np.unique(unit).size)
    k_w = int(np.unique(w).size)
    return sizes.size == k_u * k_w and int(sizes.max()) <= 2 * int(sizes.min())


def indicator(data: pd.DataFrame, col: str) -> bool:
    """A yes/no column (0/1, true/false, yes/no, ...): a characteristic of the rows."""
    return yes_no_column(data[col])


def crossed_with_all(
    data: pd.DataFrame, col: str, treatments: Sequence[str], share: float = 1.0
) -> bool:
    """Whether every level (or ``share`` of the levels) of a grouping holds at least two
    levels of every treatment."""
    codes = group_codes(data, (col,))
    for t in treatments:
        tc = group_codes(data, (t,))
        ok = ev.present(codes, tc)
        if not ok.any():
            return False
        c = dense_codes(codes[ok])
        pairs = pd.unique(c.astype(np.int64) * (int(tc.max()) + 2) + tc[ok])
        held = np.bincount(pairs // (int(tc.max()) + 2), minlength=int(c.max()) + 1)
        if float(np.mean(held >= 2)) < share:
            return False
    return True


def _units_per_cell(
    codes: np.ndarray,
    all_trt: np.ndarray,
    unit: np.ndarray | None,
    series: Sequence[np.ndarray] = (),
) -> tuple[float, int]:
    """Mean and largest number of units in a block x treatment cell: recorded units, or
    rows; a cell whose rows are one series over a time (one row per time point) is one."""
    ok = ev.present(codes, all_trt, *(() if unit is None else (unit,)))
    cells = ev.combined([codes[ok], all_trt[ok]])
    if unit is None:
        for t in series:
            tt = t[ok]
            if ev.present(tt).all() and int(ev.combined([cells, tt]).max()) + 1 == cells.size:
                return 1.0, 1  # each row of a cell at its own time point: one series
    if unit is not None:
        k = int(cells.max()) + 1
        pairs = pd.unique(dense_codes(unit[ok]) * k + cells)  # distinct cell x unit pairs
        cells = pairs % k
    counts = np.bincount(cells)
    return float(counts.mean()), int(counts.max())


def _size_cv(codes: np.ndarray) -> float:
    sizes = np.bincount(dense_codes(codes[codes >= 0]))
    return float(sizes.std() / sizes.mean()) if sizes.size else 0.0


def structural_block(
    data: pd.DataFrame,
    col: str,
    treatments: Sequence[str],
    all_trt: np.ndarray,
    unit: np.ndarray | None,
    others: Sequence[str] = (),
    series: Sequence[np.ndarray] = (),
) -> bool:
    """A block by structure alone: the treatments side by side, about one unit each (a
    series over time counting as one), and no other block held whole inside it (a
    sequence that holds whole subjects, each of them a block, is a characteristic of
    the subjects)."""
    if not crossed_with_all(data, col, treatments):
        return False
    codes = group_codes(data, (col,))
    mean, most = _units_per_cell(codes, all_trt, unit, series)
    if not (mean <= BLOCK_MAX_CELL and most <= BLOCK_MOST_CELL and _size_cv(codes) <= BLOCK_MAX_CV):
        return False
    k = int(codes.max()) + 1
    for g in others:
        if g == col:
            continue
        gc = group_codes(data, (g,))
        ok = ev.present(gc, codes)
        kg = int(np.unique(gc[ok]).size)
        if not (k < kg < int(ok.sum()) and ev.replicated_share(gc[ok]) >= 0.5):
            continue
        if is_nested(gc[ok], codes[ok]) and crossed_with_all(data, g, treatments):
            return False  # a block inside it: it groups blocks (a sequence of subjects)
    return True


def named_block(data: pd.DataFrame, col: str, source: str, treatments: Sequence[str]) -> bool:
    """A block by structure and name: crossed with every treatment, named as a block,
    place, source, time or subject, and levels not very uneven; never a yes/no
    indicator or a measurement (numbers with fractions)."""
    from replicheck.structure.columns import numeric_kind

    hint = name_hint(source)
    if not hint.suggests_unit:
        return False
    words = tokens(source)
    if hint.word not in (words[0], words[-1]) and f"{hint.word}s" not in (words[0], words[-1]):
        return False  # the word inside a longer name (postOp4hour_cough): no block
    if indicator(data, col) and (
        len(words) > 1 or hint.kind not in {"block", "location", "process"}
    ):
        return False  # a yes/no column: a block only when it names places (site 0/1)
    if numeric_kind(data[col]) == "measurement":
        return False
    if not crossed_with_all(data, col, treatments, share=NAMED_BLOCK_SHARE):
        return False
    return _size_cv(group_codes(data, (col,))) <= NAMED_BLOCK_MAX_CV


def _holds_whole(codes: np.ndarray, unit_codes: Sequence[np.ndarray]) -> bool:
    """Whether every experimental unit lies inside one level of the grouping.

    The units are laid out in blocks (a bench holds whole pots, a tray whole
    litters); a grouping that splits the units is a characteristic of their rows
    or a time within them, not a block of the design.
    """
    for u in unit_codes:
        ok = ev.present(u, codes)
        if ok.any() and not is_nested(u[ok], codes[ok]):
            return False
    return True


def _outer_codes(
    data: pd.DataFrame, codes: np.ndarray, col: str, cols: Sequence[str], all_trt: np.ndarray
) -> np.ndarray:
    """The treatment cells crossed with every coarser grouping that holds the column.

    A grouping in which the column is nested and which holds several treatment
    levels (a run holding plates 1 and 2 of every compound) explains any effect
    the column's labels share across the treatment; the labels' own effect is
    weighed within it.
    """
    parts = [all_trt]
    for other in cols:
        if other == col:
            continue
        oc = group_codes(data, (other,))
        ok = ev.present(codes, oc)
        n_other = int(np.unique(oc[ok]).size)
        if not ok.any() or n_other < 2 or n_other >= int(np.unique(codes[ok]).size):
            continue
        if is_nested(codes[ok], oc[ok]) and not is_nested(oc[ok], all_trt[ok]):
            parts.append(oc)
    return ev.combined(parts) if len(parts) > 1 else all_trt


def complete(data: pd.DataFrame, col: str, treatments: Sequence[str]) -> bool:
    """Whether every level of a grouping holds every level of every treatment."""
    return all(
        "every level sees every treatment" in classify(col, t, data[col], data[t]).detail
        for t in treatments
    )


def blocks(
    data: pd.DataFrame,
    y: np.ndarray,
    cols: Sequence[str],
    treatments: Sequence[str],
    derived: Mapping[str, tuple[str, ...]],
    within: Mapping[str, str],
    stated: set[str],
    stated_combos: Sequence[tuple[str, ...]],
    local_cells: set[str],
    all_trt: np.ndarray,
    unit: np.ndarray | None,
    coordinates: set[str],
    units_taken: set[str],
    unit_codes: Sequence[np.ndarray] = (),
) -> list[Block]:
    """Blocks and within-unit factors, the crossed strata (rules in the module docstring).

    A container whose cells with a treatment are that treatment's units, and
    whose labels carry no effect of their own beyond any coarser grouping that
    holds them, is a local label (tank 1 of every feed), not a block; a place is
    a block of its cells (a glasshouse that held each CO2 level for a period)
    unless it lies inside a coarser grouping that holds several treatments and
    its labels carry no effect beyond it (plates 1 and 2 of every compound in
    run 1).
    """
    from replicheck.structure.strata import block_evidence

    out: list[Block] = []
    for col in cols:
        if col in units_taken:
            continue
        source = tuple(derived.get(col, (col,)))
        codes = group_codes(data, (col,))
        n_levels = int(codes.max()) + 1
        if col in within:
            unit_name = within[col]
            reason = (
                "stated as a within-unit factor"
                if unit_name == "stated"
                else f"varies within each '{unit_name}' from one measurement to the next"
            )
            out.append(Block(col, source, n_levels, None, reason, "within"))
            continue
        if col in stated:
            out.append(Block(col, source, n_levels, None, "stated as a block"))
            continue
        hint = name_hint(source[-1])
        full = complete(data, col, treatments)
        if col in coordinates:
            take = full
            reason = "a coordinate whose every level holds every treatment level"
        elif structural_block(data, col, treatments, all_trt, unit, cols):
            take = True
            reason = (
                "every level holds "
                + ("every treatment level" if full else "several treatment levels")
                + ", about one unit of each, in levels of even size"
            )
        elif named_block(data, col, source[-1], treatments) and (
            hint.kind == "time" or _holds_whole(codes, unit_codes)
        ):
            take = True
            reason = (
                f"crossed with the treatments and the name suggests "
                f"{'an' if hint.kind[:1] in 'aeiou' else 'a'} {hint.kind} ('{hint.word}')"
            )
        else:
            take = False
            reason = ""
        if not take:
            continue
        outer = (
            _outer_codes(data, codes, col, cols, all_trt)
            if col in local_cells and hint.kind in {"location", "container"}
            else None
        )
        # a place holds several treatments by nature: a block whose cells are the plots
        # (a glasshouse that held each CO2 level for a period), unless it lies inside a
        # coarser grouping that holds them (plates 1 and 2 of every compound in run 1)
        if outer is not None and (hint.kind == "container" or outer is not all_trt):
            # the labels' own effect, beyond any coarser grouping that holds them
            ok = ev.present(codes, outer)
            shared = ev.shared_label_effect(y[ok], codes[ok], all_trt[ok], outer[ok])
            if shared is None or shared >= 0.05:
                continue  # its cells are the units and its labels carry no effect of their
                # own: they restart within the treatment (tank 1 of every feed)
            # a shared effect: one container or place under every treatment, a block
        p = block_evidence(y, codes, all_trt)
        if p is not None:
            reason += (
                f"; rows differ between its levels beyond the treatment effects: {p_phrase(p)}"
            )
        out.append(Block(col, source, n_levels, p, reason))
    for combo in stated_combos:
        if len(combo) > 1:
            codes = group_codes(data, combo)
            out.append(
                Block(":".join(combo), combo, int(codes.max()) + 1, None, "stated as a block")
            )
    return out
