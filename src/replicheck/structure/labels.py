"""Labels that restart within another grouping: tank 1 of every feed.

Unit labels often restart: tank 1 of every feed, plot 1 of every block, wafer
1 of every lot, patient 1 of every clinic, class 1 of every school. Read
globally, such a label is crossed with the grouping it restarts in and looks
like a block; read locally, each label within each parent level is a distinct
unit. The data must show the local reading; a name alone never does:

* ``--unit-labels local`` says so for every crossed label (``global`` for none);
* otherwise the label x parent cells must differ beyond the label's and the
  parent's own effects and every treatment's, on every scale the response
  allows (p < 0.01, common practice; the test runs on the means of any
  grouping nested in the cells, so that clustering inside them is not taken
  for differences between them), and the labels must carry no shared effect
  across the parent's levels (their main effect is not significant against
  the cells at 0.05): labels that share an effect name the same thing
  everywhere (a block, a subject in a crossover).

Which parents are possible (names break these ties):

* a treatment, only for labels whose name says container or identifier
  (tank, pot, cage, id, number): a block, a place, a source or a time holds
  several treatments by nature (its cells with a treatment may still be plots,
  see :func:`replicheck.structure.strata.crossed_cells`), a subject crossed
  with a treatment saw every level (a within-subject design), and any other
  column crossed with a treatment is far more often a characteristic of the
  rows (a baseline category, a score) whose interaction with the treatment
  is no sign of units; ``--unit-labels local`` says otherwise;
* a grouping that holds units, for labels other than times: one nested in a
  treatment, or one whose name says block, place,
  source or subject, and for subjects any grouping (subject 1 of every
  sequence); the local groupings must then lie inside one level of a treatment
  (they are units), unless the label names subjects or blocks (block 1 of
  every field);
* never a time or a within-unit factor (subjects are measured again in every
  period).

A label that is already a unit of a treatment (inside one of its levels) restarts
within a grouping it crosses only when one label is at two levels of the
grouping on one occasion (patient 1 seen at visit 1 in three clinics): one unit
is measured once per occasion.

Local units must keep recorded groupings whole: a unit of a treatment holds
whole units of every recorded grouping nested in the treatment, and cannot
split a recorded grouping its label is constant within (a music background
recorded per subject, crossed with the music conditions, is a characteristic
of the subjects, not the label of units). Measurements (fractional values,
sparse integers) are never unit labels. A label whose name says container and
whose cells the data do not show to differ is returned apart, as a reading
supported by the name alone.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence, Set
from dataclasses import dataclass

import numpy as np
import pandas as pd

from replicheck.advice import option
from replicheck.numbers import p_phrase
from replicheck.partitions import dense_codes, is_nested, same_partition
from replicheck.structure import evidence as ev
from replicheck.structure.columns import numeric_kind
from replicheck.structure.crossed import indicator
from replicheck.structure.names import name_hint
from replicheck.structure.relations import classify, group_codes
from replicheck.structure.strata import EVIDENCE_P, MAX_OCCASIONS

# Labels share an effect across the levels of the grouping they cross when the
# label main effect is significant against the label x parent cells at 0.05
# (the conventional level: a shared effect is the default reading of a label).
SHARED_LABEL_P = 0.05


@dataclass(frozen=True)
class LabelReading:
    """One label read as restarting within a parent, and the evidence."""

    column: str
    parent: str
    cells_p: float | None
    shared_p: float | None
    why: str  # "stated" | "evidence" | "name" (a reading supported by the name alone)


@dataclass(frozen=True)
class Localised:
    """What the reading of labels changed."""

    data: pd.DataFrame  # with one column per local grouping ("feed:tank")
    columns: list[str]  # the groupings, local ones renamed
    derived: dict[str, tuple[str, ...]]  # local grouping -> the columns it is made of
    readings: list[tuple[str, str]]
    taken: list[LabelReading]
    name_only: list[LabelReading]


def _keeps_whole(
    cells: np.ndarray,
    col: str,
    parent: str,
    current: Mapping[str, tuple[tuple[str, ...], np.ndarray]],
    recorded_units: Mapping[str, Sequence[np.ndarray]],
    times: Sequence[str],
) -> bool:
    """Whether local units (label x parent cells) keep recorded groupings whole."""
    for r in recorded_units.get(parent, ()):
        ok = ev.present(cells, r)
        if not (is_nested(r[ok], cells[ok]) or is_nested(cells[ok], r[ok])):
            return False
    codes = current[col][1]
    for g, (_, gc) in current.items():
        if g in (col, parent) or g in times:
            continue
        ok = ev.present(gc, codes, cells)
        if not ok.any():
            continue
        g_ok, c_ok, cells_ok = (gc, codes, cells) if ok.all() else (gc[ok], codes[ok], cells[ok])
        if not is_nested(g_ok, c_ok):
            continue  # the label is not constant within this grouping
        if int(np.unique(g_ok).size) <= int(np.unique(c_ok).size):
            continue  # the label's own partition
        if not (is_nested(g_ok, cells_ok) or is_nested(cells_ok, g_ok)):
            return False
    return True


def _at_two_places(label: np.ndarray, parent: np.ndarray, occasions: Sequence[np.ndarray]) -> bool:
    """Whether one label is at two levels of the parent on one occasion (patient 1 seen at
    visit 1 in three clinics): one unit is measured once per occasion, so the label names
    several units, one within each parent level."""
    for occ in occasions:
        ok = ev.present(label, parent, occ)
        if not ok.any():
            continue
        key = ev.combined([label[ok], occ[ok]])
        per = np.bincount(
            dense_codes(key)[np.unique(ev.combined([key, parent[ok]]), return_index=True)[1]]
        )
        if int(per.max()) > 1:
            return True
    return False


def localise(
    data: pd.DataFrame,
    y: np.ndarray,
    cols: list[str],
    treatments: Sequence[str],
    no_parent: set[str],
    times: Sequence[str],
    unit_labels: str,
    all_trt: np.ndarray,
    recorded_units: Mapping[str, Sequence[np.ndarray]],
    blocks: Set[str] = frozenset(),
    hidden: Set[str] = frozenset(),
) -> Localised:
    """Replace labels that restart within a parent by parent:label groupings.

    ``no_parent`` columns (times, within-unit factors, stated roles) are never
    read as restarting and never parents, and groupings the hidden scans
    ``hidden`` are never parents (a recorded label cannot restart within a
    grouping its recorder did not know); ``blocks`` (stated blocks) may restart
    within another grouping (subject 1 of every sequence) but never within a
    treatment, which would make them units; ``recorded_units`` maps each
    treatment to the codes of its recorded units. Of several possible parents
    the finest of a chain is taken (lot, not source), then the one within
    whose cells the most other treatments stay constant (plots within blocks
    keep their whole-plot treatment), then the coarsest.
    """
    if unit_labels == "global":
        return Localised(data, cols, {}, [], [], [])
    local_mode = unit_labels == "local"
    current: dict[str, tuple[tuple[str, ...], np.ndarray]] = {
        c: ((c,), group_codes(data, (c,))) for c in [*cols, *treatments]
    }
    trt_codes = {t: current[t][1] for t in treatments}
    # times and within-unit factors enter both models of the cell test, when they are
    # occasions (a few levels) rather than a fine time scale (days since enrolment)
    adjust_codes = [
        c
        for c in (group_codes(data, (t,)) for t in times if t in data.columns)
        if int(c.max()) + 1 <= MAX_OCCASIONS
    ]
    occasion_codes = [group_codes(data, (t,)) for t in times if t in data.columns]
    taken: list[LabelReading] = []
    name_only: list[LabelReading] = []
    parent_of: dict[str, str] = {}

    held: dict[str, bool] = {}

    def holds_units(g: str) -> bool:
        if g not in held:
            gc = current[g][1]
            ok = gc >= 0
            held[g] = name_hint(g).suggests_unit or any(
                is_nested(gc[ok & (tc >= 0)], tc[ok & (tc >= 0)]) for tc in trt_codes.values()
            )
        return held[g]

    sizes: dict[str, int | None] = {}  # levels of a grouping known on every row, else None

    def complete_levels(g: str) -> int | None:
        if g not in sizes:
            gc = current[g][1]
            sizes[g] = int(gc.max()) + 1 if ev.present(gc).all() else None
        return sizes[g]

    def varying_in(cells: np.ndarray, skip: tuple[str, ...]) -> list[np.ndarray]:
        """Recorded factors that vary within the cells (a pup's sex within litter x tray):
        they enter both models of the cell test, so that cells differing only in their
        make-up (more males in one) are not taken for units."""
        out = []
        for g, (_, gc) in current.items():
            if g in skip or g in treatments or g in times:
                continue
            k_g = complete_levels(g)
            if k_g is None or k_g > MAX_OCCASIONS:
                continue
            if is_nested(cells, gc) or is_nested(gc, cells):
                continue  # constant within the cells, or inside them
            out.append(gc)
        return out

    def inner_of(cells: np.ndarray, skip: tuple[str, ...]) -> np.ndarray | None:
        n_cells = int(cells.max()) + 1
        best: np.ndarray | None = None
        for g, (_, gc) in current.items():
            if g in skip or g in treatments or g in times:
                continue
            k_g = complete_levels(g)
            if k_g is None:
                continue
            k = k_g
            if k <= n_cells or k >= gc.size or not is_nested(gc, cells):
                continue
            if best is None or k < int(best.max()) + 1:
                best = gc
        return best

    # finest first, so that the units inside a coarser label's cells are known when
    # its cells are weighed (patients, numbered within centres, inside centre x arm)
    for col in sorted(cols, key=lambda c: -int(current[c][1].max())):
        if col in no_parent:
            continue
        stated_block = col in blocks
        if numeric_kind(data[col]) == "measurement" and not local_mode:
            continue  # a measurement (numbers with fractions) is not a unit label
        if indicator(data, col) and not local_mode:
            continue  # a yes/no column marks a state, not a unit
        codes = current[col][1]
        # a label already inside one level of a treatment may still restart within a
        # grouping it crosses (patient 1 of every clinic, all of them on arm A), never
        # within a treatment
        unit_of_treatment = any(
            is_nested(codes[codes >= 0], trt_codes[t][codes >= 0]) for t in treatments
        )
        kind = name_hint(col).kind
        individual = kind == "individual"
        label_of_units = kind in {"container", "identifier"}
        treatment_parents = (label_of_units or local_mode) and not (
            stated_block or unit_of_treatment
        )
        options = [
            *(treatments if treatment_parents else []),
            *[
                g
                for g in cols
                if g != col
                and g not in no_parent
                and g not in hidden
                and kind != "time"
                and (local_mode or individual or holds_units(g))
            ],
        ]
        n_levels = int(np.unique(codes[codes >= 0]).size)
        crossing = []
        for parent in options:
            pc = current[parent][1]
            most = int(np.bincount(pc[pc >= 0]).max()) if (pc >= 0).any() else 0
            if n_levels > most:
                continue  # numbers restarting within a parent cannot outnumber its rows
            rel = classify(col, parent, pd.Series(codes), pd.Series(pc))
            if rel.relation == "crossed":
                crossing.append(parent)
        crossing = [
            p
            for p in crossing
            if not any(q != p and is_nested(current[q][1], current[p][1]) for q in crossing)
        ]
        supported: list[LabelReading] = []
        for parent in crossing:
            pc = current[parent][1]
            if unit_of_treatment and not _at_two_places(codes, pc, occasion_codes):
                continue  # a unit's labels are its own unless one label is two places at once
            as_treatment = parent in treatments or any(
                same_partition(np.maximum(pc, 0), np.maximum(tc, 0)) for tc in trt_codes.values()
            )
            if as_treatment and parent not in treatments and not (label_of_units or local_mode):
                continue  # a copy of a treatment is a treatment as a parent
            cells = ev.combined([np.maximum(codes, 0), np.maximum(pc, 0)])
            if local_mode:
                supported.append(LabelReading(col, parent, None, None, "stated"))
                continue
            if (
                parent not in treatments
                and kind not in {"individual", "block"}
                and not any(is_nested(cells, np.maximum(tc, 0)) for tc in trt_codes.values())
            ):
                continue  # local groupings are units (inside one treatment level), or blocks
            if not _keeps_whole(cells, col, parent, current, recorded_units, times):
                continue
            inner = inner_of(cells, (col, parent))
            test = (
                y,
                codes,
                pc,
                list(trt_codes.values()),
                inner,
                [*adjust_codes, *varying_in(cells, (col, parent))],
            )
            cells_p = ev.cells_beyond(*test)
            if cells_p is not None and cells_p < EVIDENCE_P:
                ok = ev.present(codes, pc, all_trt)
                shared = ev.shared_label_effect(y[ok], codes[ok], pc[ok], all_trt[ok])
                if shared is not None and shared < SHARED_LABEL_P:
                    continue  # the labels share an effect: one thing everywhere (a block)
                # the F test screens; random relabelling within the parent decides
                relabelled = ev.relabelled_cells(*test)
                cells_p = cells_p if relabelled is None else max(cells_p, relabelled)
            if cells_p is None or cells_p >= EVIDENCE_P:
                if kind == "container" and parent in treatments:
                    name_only.append(LabelReading(col, parent, cells_p, None, "name"))
                continue
            supported.append(LabelReading(col, parent, cells_p, shared, "evidence"))
        if not supported:
            continue

        def rank(r: LabelReading, codes: np.ndarray = codes) -> tuple[int, int]:
            cells = ev.combined([np.maximum(current[r.parent][1], 0), np.maximum(codes, 0)])
            constant = sum(
                1
                for t in treatments
                if t != r.parent and is_nested(cells, np.maximum(trt_codes[t], 0))
            )
            return (-constant, int(cells.max()) + 1)

        best = min(supported, key=rank)
        taken.append(best)
        parent_of[col] = best.parent
        held.pop(col, None)
        sizes.pop(col, None)
        current[col] = (
            (*current[best.parent][0], col),
            group_codes(data, (*current[best.parent][0], col)),
        )
    final: dict[str, tuple[str, ...]] = {}

    def chain(col: str) -> tuple[str, ...]:
        if col not in parent_of:
            return (col,)
        if col not in final:
            final[col] = (*chain(parent_of[col]), col)
        return final[col]

    renamed: dict[str, str] = {}
    extra: dict[str, pd.Series] = {}
    derived: dict[str, tuple[str, ...]] = {}
    readings: list[tuple[str, str]] = []
    for r in taken:
        col = r.column
        source = chain(col)
        name = ":".join(source)
        renamed[col] = name
        derived[name] = source
        extra[name] = pd.Series(group_codes(data, source), index=data.index)
        parent = ":".join(chain(parent_of[col]))
        example = data[col].dropna().iloc[0]
        if r.why == "stated":
            because = f"as {option('unit-labels', 'local')} says"
        else:
            because = (
                f"the {col} x {r.parent} cells differ beyond both main effects"
                + (
                    ""
                    if r.cells_p is None
                    else f" ({p_phrase(r.cells_p)}, the F test and random relabelling of the "
                    f"{col} labels within each {r.parent} both)"
                )
                + f" while the labels carry no shared effect across {r.parent} levels"
                + ("" if r.shared_p is None else f" ({p_phrase(r.shared_p)})")
            )
        readings.append(
            (
                "labels-local-to-treatment",
                f"labels of '{col}' repeat under several levels of '{parent}' (label "
                f"'{example!s}' of '{col}' appears under more than one) and {because}, so "
                f"replicheck read each {col} within its {parent} ('{name}') as a distinct "
                f"unit; if one physical {col} carries the same label everywhere, rerun with "
                f"{option('unit-labels', 'global')}",
            )
        )
    if extra:
        data = data.assign(**extra)
    taken_cols = {r.column for r in taken}
    name_only = [r for r in name_only if r.column not in taken_cols]
    return Localised(data, [renamed.get(c, c) for c in cols], derived, readings, taken, name_only)
