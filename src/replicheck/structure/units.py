"""Candidate experimental units and the unit of every term: the structure stage.

The experimental unit of a treatment is the coarsest grouping of the rows
within which the treatment never varies (Hurlbert 1984, Ecological Monographs
54:187-211; Lazic, Clarke-Williams & Munafo 2018, PLoS Biology 16:e2005282).
When that grouping has one level per treatment level the design is
confounded: no test of the treatment is possible.

The structure of the data decides; a column's name is a tie-breaker only.
The stage runs in this order, each step in its own module:

1. which columns can be groupings, and which are labels of the treatments or
   covariates (:mod:`replicheck.structure.columns`);
2. which groupings are within-unit factors (:mod:`replicheck.structure.crossed`);
3. which labels restart within another grouping (:mod:`replicheck.structure.labels`);
4. which block x treatment cells are implicit plots
   (:func:`replicheck.structure.strata.crossed_cells`);
5. the candidate units of every term and the choice (here), then the blocks
   and the strata; the role of every column (:mod:`replicheck.structure.design`).

The rules for candidates, each with its reason in docs/method.md:

* what the user states is used; evidence against a statement is reported,
  never used to replace it (a stated unit the treatment varies within is
  used as stated x treatment cells);
* a recorded grouping nested in a treatment, replicated, and nested by
  design rather than by chance, is a unit candidate whatever its name; other
  groupings need a name that says unit or clustering evidence (the F test of
  the units beyond every treatment term and the within-unit factors, p < 0.01);
* a derived grouping (a reading of labels, implicit plots, a grouping found by
  the hidden scans) must hold whole recorded units of the treatment (cells of
  week x diet that split the pigs never are the unit of the diet), and runs
  along the file order (how the file was sorted as often as how samples were
  processed) give way to any other credible unit;
* a partial alignment needs real association; a nearly constant column is
  never a unit (:func:`replicheck.structure.relations.classify`);
* when two readings remain plausible (one supported by the data alone, the
  other by the names alone) both are kept: the refit tests both and the
  verdict is ``unclear`` when they lead to different conclusions.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from replicheck.advice import option
from replicheck.numbers import format_number, p_phrase
from replicheck.partitions import dense_codes, is_nested, same_partition, units_per_level
from replicheck.roles import ColumnRole, Roles, Statement
from replicheck.structure import evidence as ev
from replicheck.structure.columns import (
    MIN_REPLICATED_SHARE,
    grouping_columns,
    is_alias,
    numeric_kind,
    treatment_labels,
)
from replicheck.structure.crossed import (
    Block,
    named_block,
    structural_block,
    within_factors,
)
from replicheck.structure.crossed import (
    blocks as find_blocks,
)
from replicheck.structure.design import block_disputes, column_roles, within_disputes
from replicheck.structure.labels import LabelReading, localise
from replicheck.structure.names import NameHint, name_hint
from replicheck.structure.relations import (
    PairRelation,
    Relation,
    classify,
    codes_of,
    group_codes,
    pair_relation,
)
from replicheck.structure.strata import (
    MAX_OCCASIONS,
    CellGrouping,
    Stratum,
    build_strata,
    crossed_cells,
)
from replicheck.vocab import UNIT_LABEL_MODES, RelationName, UnitRelationName

__all__ = [
    "Alternative",
    "Block",
    "Candidate",
    "Structure",
    "UnitChoice",
    "grouping_columns",
    "infer_structure",
    "unit_codes",
]

# Common practice (no published threshold): clustering counts as evidence for
# an unnamed grouping when its F test against the rows within it has p < 0.01.
CLUSTER_EVIDENCE_P = 0.01
# A nesting is structure, not chance, when a column of these level sizes would
# lie inside the treatment levels by chance with probability below 1 in 1000.
CHANCE_NESTING_LOG10 = -3.0


@dataclass(frozen=True, kw_only=True)
class Candidate:
    """A grouping within which the treatment never (or almost never) varies."""

    treatment: str
    name: str  # column name, or "treatment:column" for labels local to each treatment level
    columns: tuple[str, ...]
    relation: UnitRelationName  # nested | confounded | partial
    n_units: int
    mean_size: float
    hint: NameHint
    icc: float | None
    icc_p: float | None
    alias: bool
    credible: bool
    score: float
    reasons: tuple[str, ...]
    stated: bool = False
    recorded: bool = True  # a column of the file (not a derived grouping or reading)
    support: str = "none"  # stated | structure | name | evidence | none


@dataclass(frozen=True, kw_only=True)
class UnitChoice:
    """The experimental unit taken for one treatment factor."""

    treatment: str
    unit: str | None
    columns: tuple[str, ...]
    relation: UnitRelationName
    n_units: int
    n_observations: int
    source: str  # stated | inferred | rows
    reading: str
    single_unit_levels: tuple[str, ...] = ()


@dataclass(frozen=True, kw_only=True)
class Alternative:
    """Another reading of a term's unit that stays plausible, and what would settle it.

    ``kind`` is ``stated`` when the taken unit was stated and this is the one
    replicheck would take, ``reading`` when the data and the names support
    different readings.
    """

    term: str
    choice: UnitChoice
    kind: str
    why: str
    settle: str


@dataclass(frozen=True, kw_only=True)
class Structure:
    """Everything the structure stage found."""

    relations: tuple[Relation, ...]
    candidates: tuple[Candidate, ...]
    units: tuple[UnitChoice, ...]  # one per term, in the order of the terms
    skipped: dict[str, str] = field(default_factory=dict)
    # (rule name, text): which reading was taken where the data alone cannot tell
    readings: tuple[tuple[str, str], ...] = ()
    ambiguous: tuple[str, ...] = ()  # groupings that might be units but cannot be told from labels
    strata: tuple[Stratum, ...] = ()  # coarse to fine, ending with the rows
    factor_relations: tuple[PairRelation, ...] = ()  # every pair of treatments and strata
    blocks: tuple[Block, ...] = ()
    roles: tuple[ColumnRole, ...] = ()
    alternatives: tuple[Alternative, ...] = ()
    disputes: tuple[tuple[str, str, tuple[str, ...]], ...] = ()  # (rule, text, columns)

    def unit_of(self, term: str) -> UnitChoice:
        """The unit chosen for a term."""
        for u in self.units:
            if u.treatment == term:
                return u
        raise KeyError(term)


# ------------------------------------------------------------------ candidates


# what a name hint's kind means, in a reader's words
HINT_WORDS = {
    "container": "a container or enclosure",
    "block": "a block",
    "location": "a place",
    "time": "a time",
    "process": "a shared origin or setting (a batch, site, family or class)",
    "individual": "an individual",
}


def _unit_relation(relation: RelationName) -> UnitRelationName:
    """A candidate's relation to its treatment: only nested, confounded and partially
    aligned columns become candidates (crossed and unrelated ones never do)."""
    if relation == "nested" or relation == "confounded" or relation == "partial":
        return relation
    raise ValueError(f"a {relation} column is no candidate unit")


def _candidate(
    data: pd.DataFrame,
    y: np.ndarray,
    treatment: str,
    columns: tuple[str, ...],
    relation: Relation,
    name: str,
    alias: bool,
    stated: bool,
    recorded: bool,
    all_trt: np.ndarray,
) -> Candidate:
    trt, _ = codes_of(data[treatment])
    unit = group_codes(data, (treatment, *columns)) if relation.relation != "confounded" else None
    hint = name_hint(columns[-1])
    if columns[-1] in data.columns and numeric_kind(data[columns[-1]]) == "measurement":
        hint = NameHint("none", None)  # a name cannot make a measurement a grouping
    reasons: list[str] = []
    score = 0.0
    support = "none"
    if stated:
        score += 3
        reasons.append("stated as the unit")
        support = "stated"
    if hint.suggests_unit:
        score += 2
        reasons.append(f"the name suggests {HINT_WORDS.get(hint.kind, hint.kind)} ('{hint.word}')")
    elif hint.kind == "label":
        reasons.append(f"the name suggests a label of the treatment ('{hint.word}')")
    n_units = relation.n_levels
    icc = icc_p = None
    structural = False
    if unit is not None:
        n_units = int(unit[unit >= 0].max()) + 1 if (unit >= 0).any() else 0
        icc, icc_p = ev.unit_evidence(y, unit, trt, all_trt)
        ok = ev.present(unit, trt)
        structural = recorded and relation.relation == "nested" and _by_design(unit[ok], trt[ok])
    mean_size = len(data) / max(n_units, 1)
    if relation.relation == "nested":
        score += 2
        reasons.append(f"nested in '{treatment}': {relation.detail}")
    elif relation.relation == "confounded":
        score += 1
        reasons.append(f"confounded with '{treatment}': {relation.detail}")
    else:
        score += 1
        reasons.append(relation.detail)
    if icc is not None and icc_p is not None:
        score += min(2.0, 4.0 * max(icc, 0.0))
        reasons.append(
            f"residual ICC {format_number(icc)} within '{treatment}' (F test beyond every "
            f"treatment term: "
            f"{p_phrase(icc_p)})"
        )
    if alias:
        reasons.append("read as another label of the treatment, not a unit")
    evidence = icc_p is not None and icc_p < CLUSTER_EVIDENCE_P
    replicated = unit is None or ev.replicated_share(unit[unit >= 0]) >= MIN_REPLICATED_SHARE
    if support == "none":
        if structural:
            support = "structure"
            reasons.append("a recorded grouping nested in the treatment, replicated by design")
        elif hint.suggests_unit and replicated:
            support = "name"  # a name cannot make units of rows that are nearly all alone
        elif evidence and replicated:
            support = "evidence"
    credible = not alias and support != "none"
    return Candidate(
        treatment=treatment,
        name=name,
        columns=columns,
        relation=_unit_relation(relation.relation),
        n_units=n_units,
        mean_size=mean_size,
        hint=hint,
        icc=icc,
        icc_p=icc_p,
        alias=alias,
        credible=credible,
        score=round(score, 2),
        reasons=tuple(reasons),
        stated=stated,
        recorded=recorded,
        support=support,
    )


def _covers_levels(codes: np.ndarray, trt: np.ndarray) -> bool:
    """Whether a column holds values on at least half the rows of every treatment level."""
    ok = trt >= 0
    k = int(trt[ok].max()) + 1
    present = np.bincount(trt[ok], weights=(codes[ok] >= 0).astype(float), minlength=k)
    return bool(np.all(present >= 0.5 * np.bincount(trt[ok], minlength=k)))


def _whole_units(cand_codes: np.ndarray, recorded_units: Sequence[np.ndarray]) -> bool:
    """Whether a grouping holds whole units of every recorded unit grouping (or sits inside one)."""
    for r in recorded_units:
        ok = ev.present(cand_codes, r)
        if not (is_nested(r[ok], cand_codes[ok]) or is_nested(cand_codes[ok], r[ok])):
            return False
    return True


def _one_treatment(
    data: pd.DataFrame,
    y: np.ndarray,
    treatment: str,
    cols: list[str],
    stated: Sequence[tuple[str, ...]],
    derived: Mapping[str, tuple[str, ...]],
    cells: Mapping[str, CellGrouping],
    recorded: set[str],
    all_trt: np.ndarray,
    main: bool,
) -> tuple[list[Relation], list[Candidate], list[tuple[str, str]], list[str]]:
    relations: list[Relation] = []
    candidates: list[Candidate] = []
    readings: list[tuple[str, str]] = []
    ambiguous: list[str] = []
    trt_codes = group_codes(data, (treatment,))
    for col in cols:
        try:
            found = _weigh(
                data,
                y,
                treatment,
                col,
                trt_codes,
                stated,
                derived,
                cells,
                recorded,
                all_trt,
                main,
            )
        except (ArithmeticError, ValueError, np.linalg.LinAlgError) as err:
            # a well-formed file never stops the audit: the grouping is left out, said why
            readings.append(
                (
                    "grouping-not-weighed",
                    f"'{col}' could not be weighed as a unit of '{treatment}' "
                    f"({type(err).__name__}: {err}), so it was left out of the candidates",
                )
            )
            continue
        if found is None:
            continue
        rel, cand, is_ambiguous = found
        relations.append(rel)
        if cand is not None:
            candidates.append(cand)
        if is_ambiguous:
            ambiguous.append(col)
    candidates.sort(key=lambda c: (not c.credible, c.n_units, -c.score))
    return relations, candidates, readings, ambiguous


def _weigh(
    data: pd.DataFrame,
    y: np.ndarray,
    treatment: str,
    col: str,
    trt_codes: np.ndarray,
    stated: Sequence[tuple[str, ...]],
    derived: Mapping[str, tuple[str, ...]],
    cells: Mapping[str, CellGrouping],
    recorded: set[str],
    all_trt: np.ndarray,
    main: bool,
) -> tuple[Relation, Candidate | None, bool] | None:
    """The relation of one grouping to one term, and the candidate unit it makes, if any."""
    rel = classify(col, treatment, data[col], data[treatment])
    if not _covers_levels(group_codes(data, (col,)), trt_codes):
        return rel, None, False  # missing for most of a treatment level: no unit of it
    source = derived.get(col, (col,))
    is_stated = any(set(source) == set(s) or (len(s) == 1 and source == (s[0],)) for s in stated)
    is_recorded = col in recorded
    if col in cells and rel.relation != "nested":
        return rel, None, False
    if rel.relation == "nested":
        cand = _candidate(
            data, y, treatment, source, rel, col, False, is_stated, is_recorded, all_trt
        )
        if col in cells:
            cell = cells[col]
            p = "not computed" if cell.p_value is None else f"{p_phrase(cell.p_value)}"
            cand = replace(
                cand,
                credible=cell.credible or is_stated,
                support="stated" if is_stated else ("evidence" if cell.credible else "none"),
                reasons=(
                    *cand.reasons[:-1],
                    f"cells of '{cell.block}' x '{cell.treatment}' "
                    + ("differ" if cell.credible else "do not differ")
                    + f" beyond the block and treatment effects on every scale ({p})",
                ),
            )
        return rel, cand, False
    if rel.relation == "partial":
        # the exceptions make the column cross the treatment; within each treatment
        # level its labels still name units, so the unit is treatment x column
        cand = _candidate(
            data, y, treatment, (treatment, col), rel, col, False, is_stated, is_recorded, all_trt
        )
        return rel, cand, False
    if rel.relation == "confounded":
        same = rel.n_levels == len(rel.levels_per_treatment)
        alias = same and not is_stated and is_alias(col, treatment, data[col], data[treatment])
        cand = _candidate(
            data, y, treatment, source, rel, col, alias, is_stated, is_recorded, all_trt
        )
        return rel, cand, not alias and not cand.credible and main
    return rel, None, False


def rows_choice(treatment: str, n: int, why: str) -> UnitChoice:
    """The rows as the replicates of a term (no grouping is its unit), with the reason."""
    return UnitChoice(
        treatment=treatment,
        unit=None,
        columns=(),
        relation="none",
        n_units=n,
        n_observations=n,
        source="rows",
        reading=f"{why}; each row is taken as its own replicate",
    )


def _choice(data: pd.DataFrame, treatment: str, best: Candidate | None) -> UnitChoice:
    n = len(data)
    if best is None:
        return rows_choice(
            treatment, n, "no grouping was found within which the treatment is constant"
        )
    trt_codes, trt_labels = codes_of(data[treatment])
    if best.relation == "confounded":
        unit_per_trt = np.ones(len(trt_labels), dtype=int)
    else:
        unit = group_codes(data, (treatment, *best.columns))
        ok = ev.present(unit, trt_codes)
        unit_per_trt = units_per_level(dense_codes(unit[ok]), trt_codes[ok], len(trt_labels))
    single = tuple(trt_labels[i] for i in np.flatnonzero(unit_per_trt == 1))
    relation = best.relation
    if relation != "partial" and len(single) == len(trt_labels):
        relation = "confounded"
    reading = (
        f"'{best.name}' is the grouping stated as the unit; '{treatment}' never varies within it"
        if best.stated
        else f"'{best.name}' is the coarsest grouping within which '{treatment}' never varies"
    )
    n_units = best.n_units if relation != "confounded" else max(best.n_units, len(trt_labels))
    return UnitChoice(
        treatment=treatment,
        unit=best.name,
        columns=best.columns,
        relation=relation,
        n_units=n_units,
        n_observations=n,
        source="stated" if best.stated else "inferred",
        reading=reading,
        single_unit_levels=single,
    )


def _stated_cells(data: pd.DataFrame, treatment: str, stated: tuple[str, ...]) -> Candidate:
    """A stated unit that the treatment varies within, used as stated x treatment cells."""
    columns = (*stated, treatment)
    codes = group_codes(data, columns)
    n_units = int(codes.max()) + 1
    return Candidate(
        treatment=treatment,
        name=":".join(columns),
        columns=columns,
        relation="nested",
        n_units=n_units,
        mean_size=len(data) / max(n_units, 1),
        hint=name_hint(stated[-1]),
        icc=None,
        icc_p=None,
        alias=False,
        credible=True,
        score=3.0,
        reasons=(
            f"stated as the unit; '{treatment}' varies within it, so each "
            f"{':'.join(stated)} x {treatment} cell is taken as a unit",
        ),
        stated=True,
        recorded=False,
        support="stated",
    )


# ------------------------------------------------------------------ the stage


def _statement_columns(roles: Roles, role: str) -> list[tuple[str, ...]]:
    return [s.columns for s in roles.of(role)]


def infer_structure(
    data: pd.DataFrame,
    response: str,
    terms: Sequence[str],
    *,
    exclude: Sequence[str] = (),
    interactions: Sequence[str] = (),
    stated_unit: str | Sequence[str] | None = None,
    unit_labels: str = "auto",
    roles: Roles | None = None,
    derived_columns: Sequence[str] = (),
    file_order: Sequence[str] = (),
) -> Structure:
    """Roles of the columns, ranked candidate units, the unit of every term, and the strata.

    ``data`` holds only the analysed rows. ``terms`` are factor columns of
    ``data`` (treatment columns, and columns holding the combinations of
    several treatments for interaction terms); ``exclude`` lists further
    columns that are not groupings (the treatment columns themselves). Terms
    named in ``interactions`` get a unit but add no relations or readings of
    their own. ``roles`` are the stated roles (column names as the data spell
    them); ``stated_unit`` is a shorthand for one stated unit (one column, or
    several for an implicit grouping such as block x variety).
    ``derived_columns`` are groupings added by the hidden-grouping scans (not
    columns of the file), ``file_order`` those of them read off the file order.
    """
    from replicheck.errors import InputError
    from replicheck.structure.hidden.space import coordinate_columns

    if unit_labels not in UNIT_LABEL_MODES:
        raise InputError(f"{option('unit-labels')} must be one of {', '.join(UNIT_LABEL_MODES)}")
    roles = roles or Roles()
    if stated_unit is not None:
        cols_ = (stated_unit,) if isinstance(stated_unit, str) else tuple(stated_unit)
        roles = roles.added([Statement("unit", cols_, "in the options")])
    st_units = _statement_columns(roles, "unit")
    st_blocks = _statement_columns(roles, "block")
    st_within = list(roles.columns("within"))
    st_cov = roles.columns("covariate")
    main_terms = [t for t in terms if t not in interactions]
    y = data[response].to_numpy(dtype=float)
    forced = {c for cols_ in (*st_units, *st_blocks) for c in cols_ if c not in terms}
    forced |= set(st_within)
    cols, skipped = grouping_columns(
        data,
        (response, *terms, *exclude, *st_cov),
        derived=derived_columns,
        forced=sorted(forced),
        treatments=main_terms,
    )
    recorded = {c for c in data.columns if c not in derived_columns}
    all_trt = ev.combined([group_codes(data, (t,)) for t in main_terms])
    stated_cols = {c for s in roles.statements for c in s.columns}
    blocks_stated = {c for s in st_blocks if len(s) == 1 for c in s}
    cols, readings, labels = treatment_labels(data, cols, main_terms, stated_cols)
    coordinates = {c for pair in coordinate_columns(data[cols]) for c in pair} if cols else set()
    # recorded units of each treatment: recorded groupings nested in it, by design
    recorded_units = {
        t: [
            group_codes(data, (c,))
            for c in cols
            if c in recorded
            and c not in st_within
            and c not in blocks_stated
            and _is_recorded_unit(data, c, t)
        ]
        for t in main_terms
    }
    unit_codings = {
        c: group_codes(data, (c,))
        for c in cols
        if c in recorded and any(_is_recorded_unit(data, c, t) for t in main_terms)
    }
    within = within_factors(
        data,
        [c for c in cols if c not in stated_cols and c in recorded and c not in coordinates],
        st_within,
        unit_codings,
        all_trt,
        y,
    )
    time_named = [c for c in cols if name_hint(c).kind == "time"]
    loc = localise(
        data,
        y,
        cols,
        main_terms,
        set(within) | set(time_named) | (stated_cols - blocks_stated),
        [*time_named, *[w for w in within if w not in time_named]],
        unit_labels,
        all_trt,
        recorded_units,
        blocks_stated,
        set(derived_columns),
    )
    data, cols, derived = loc.data, loc.columns, dict(loc.derived)
    readings += loc.readings
    local_units = {
        c: group_codes(data, (c,))
        for c in loc.derived
        if any(is_nested(group_codes(data, (c,)), group_codes(data, (t,))) for t in main_terms)
    }
    within.update(
        within_factors(
            data,
            [
                c
                for c in cols
                if c not in within
                and c not in stated_cols
                and c not in local_units
                and c in recorded
                and c not in coordinates
            ],
            (),
            local_units,
            all_trt,
            y,
        )
    )
    # a grouping the hidden scans derived from a within-unit factor is that factor again
    cols = [c for c in cols if not (c in derived_columns and _source_of(c) in within)]
    # (only groupings derived from one column, such as a covariate's value classes)
    # groupings that may carry implicit plots: blocks named or stated (decisive), and
    # blocks by structure alone (a reading kept apart, for the verdict to weigh)
    first_unit = next((u[0] for u in recorded_units.values() if u), None)
    adjust = [c for c in cols if c in within or name_hint(c).kind == "time"]
    trt_frame = {t: group_codes(data, (t,)) for t in main_terms}

    def guard(cells: np.ndarray, term: str) -> bool:
        return _plots_hold_sub_units(cells, recorded_units.get(term, []), trt_frame)

    stated_plot_parts = {c for s in st_units if len(s) > 1 for c in s if c not in terms}
    eligible: list[str] = []
    unnamed: list[str] = []
    series = [group_codes(data, (t,)) for t in time_named if t in data.columns]
    for c in cols:
        if c in within or (c in coordinates and not _complete(data, c, main_terms)):
            continue
        if name_hint(derived.get(c, (c,))[-1]).kind == "time":
            continue  # a time holds measurement occasions, never plots
        source = derived.get(c, (c,))[-1]
        if c in blocks_stated or c in stated_plot_parts or named_block(data, c, source, main_terms):
            eligible.append(c)
        elif structural_block(data, c, main_terms, all_trt, first_unit, cols, series):
            # cells that hold series over time are occasions (units) by structure
            if first_unit is None and _series_cells(data, c, main_terms, series):
                eligible.append(c)
            else:
                unnamed.append(c)
    data, cell_cols, cell_parts, cells = crossed_cells(
        data,
        y,
        eligible,
        main_terms,
        st_units,
        groupings=cols,
        guard=guard,
        adjust=adjust,
        times=time_named,
    )
    data, _, alt_parts, alt_cells = crossed_cells(
        data,
        y,
        unnamed,
        main_terms,
        (),
        groupings=cols,
        guard=guard,
        adjust=adjust,
    )
    derived.update(cell_parts)
    derived.update(alt_parts)
    evidence = {c.name: c for c in cells}
    model_cells = ev.combined(
        [
            np.maximum(all_trt, 0),
            *(np.maximum(group_codes(data, (w,)), 0) for w in within if w in data.columns),
        ]
    )
    relations: list[Relation] = []
    candidates: list[Candidate] = []
    ambiguous: list[str] = []
    units: list[UnitChoice] = []
    alternatives: list[Alternative] = []
    disputes: list[tuple[str, str, tuple[str, ...]]] = []
    unit_pool = [c for c in cols if c not in within and c not in blocks_stated] + cell_cols
    # a stated unit made of several columns that are not a block and treatments (pups of
    # one sex in one litter) is a grouping of its own
    made = {tuple(derived[c]) for c in cell_cols if c in derived}
    combos: dict[str, pd.Series] = {}
    for combo in st_units:
        if len(combo) < 2 or any(c in terms for c in combo) or tuple(combo) in made:
            continue
        name = ":".join(combo)
        if name in data.columns:
            continue
        combos[name] = pd.Series(group_codes(data, combo), index=data.index)
        derived[name] = tuple(combo)
        unit_pool.append(name)
    if combos:
        data = data.assign(**combos)
    for term in terms:
        main = term not in interactions
        r, cands, rd, amb = _one_treatment(
            data,
            y,
            term,
            unit_pool,
            st_units if main else [],
            derived,
            evidence,
            recorded,
            model_cells,
            main,
        )
        cands = _screen(data, term, cands, recorded_units.get(term, []), set(file_order))
        if main:
            relations += [x for x in r if x.column not in evidence]
            readings += rd
            ambiguous += [a for a in amb if a not in ambiguous]
        candidates += cands
        credible = [c for c in cands if c.credible]
        stated_c = [c for c in credible if c.stated]
        inferred = [c for c in credible if not c.stated]
        best: Candidate | None = None
        if stated_c:
            best = stated_c[0]
            if inferred and inferred[0].n_units < best.n_units and main:
                alternatives.append(
                    Alternative(
                        term=term,
                        choice=_choice(data, term, inferred[0]),
                        kind="stated",
                        why=f"'{inferred[0].name}' is a coarser grouping within which '{term}' is "
                        f"also constant ({inferred[0].n_units} units against {best.n_units})",
                        settle=f"how '{term}' was applied: to each {best.name} on its own, or to "
                        f"whole {inferred[0].name} units",
                    )
                )
        elif main and st_units and not any(_constant_in_any(data, t, st_units) for t in main_terms):
            # a stated unit the treatment varies within: honoured as stated x treatment cells
            s = st_units[0]
            best = _stated_cells(data, term, s)
            candidates.append(best)
            rel = classify(
                ":".join(s), term, pd.Series(group_codes(data, s), index=data.index), data[term]
            )
            disputes.append(
                (
                    "stated-unit-not-supported",
                    f"the stated unit '{':'.join(s)}' is {rel.relation} with '{term}' "
                    f"({rel.detail}): '{term}' varies within it, so it cannot be what each "
                    f"level was applied to; as stated, each {':'.join(s)} x {term} cell was "
                    f"taken as a unit",
                    (*s, term),
                )
            )
            alternatives.append(
                Alternative(
                    term=term,
                    choice=_choice(data, term, inferred[0] if inferred else None),
                    kind="stated",
                    why="the unit replicheck finds in the data",
                    settle=f"how '{term}' was applied, and to what",
                )
            )
        elif inferred:
            best = inferred[0]
        choice = _choice(data, term, best)
        units.append(choice)
        if main and not stated_c and choice.source != "stated":
            taken_labels = {c for u in units for c in u.columns}
            alternatives += _reading_alternatives(
                data,
                term,
                choice,
                alt_cells,
                [r for r in loc.name_only if r.column not in taken_labels],
            )
    readings += _cell_readings(cells, units)
    chosen = {u.unit for u in units}
    # within-unit factors of the chosen units (times within the cells of subject x date)
    chosen_units = {
        u.unit: group_codes(data, (u.treatment, *u.columns))
        for u in units
        if u.unit is not None and u.columns and u.relation != "confounded" and u.n_units < len(data)
    }
    used = {c for u in units for c in u.columns} | {u.unit for u in units if u.unit}
    within.update(
        within_factors(
            data,
            [
                c
                for c in cols
                if c not in within
                and c not in stated_cols
                and c not in used
                and c not in coordinates
            ],
            (),
            chosen_units,
            all_trt,
            y,
        )
    )
    term_unit = next(iter(chosen_units.values()), first_unit)
    found_blocks = find_blocks(
        data,
        y,
        cols,
        main_terms,
        derived,
        within,
        blocks_stated,
        st_blocks,
        {c.block for c in cells if c.name in chosen},
        all_trt,
        term_unit,
        coordinates,
        {c for c in used if c not in main_terms and c not in blocks_stated}
        - {c.block for c in cells},
        list(chosen_units.values()),
    )
    strata = _strata(data, terms, units, candidates, found_blocks)
    factors = {t: data[t] for t in main_terms}
    for st in strata:
        if st.kind != "rows" and st.name not in factors:
            factors[st.name] = pd.Series(group_codes(data, st.columns), index=data.index)
    names = list(factors)
    pairs = tuple(
        pair_relation(a, b, factors[a], factors[b])
        for i, a in enumerate(names)
        for b in names[i + 1 :]
    )
    disputes += block_disputes(data, main_terms, st_blocks, roles)
    disputes += within_disputes(data, main_terms, roles, within, units)
    return Structure(
        relations=tuple(relations),
        candidates=tuple(candidates),
        units=tuple(units),
        skipped=skipped,
        readings=tuple(dict.fromkeys(readings)),
        ambiguous=tuple(ambiguous),
        strata=strata,
        blocks=tuple(found_blocks),
        factor_relations=pairs,
        roles=column_roles(
            data,
            response,
            main_terms,
            roles,
            skipped,
            labels,
            units,
            found_blocks,
            strata,
            within,
            derived,
            derived_columns,
            cols,
            [t for t in terms if t not in main_terms],
            {
                a.choice.columns[-1]: f"the unit of '{a.term}' in another reading, refitted "
                "beside the one taken"
                for a in alternatives
                if a.choice.unit is not None and len(a.choice.columns) == 1
            },
        ),
        alternatives=tuple(alternatives),
        disputes=tuple(disputes),
    )


def _plots_hold_sub_units(
    cells: np.ndarray, rec_units: Sequence[np.ndarray], treatments: Mapping[str, np.ndarray]
) -> bool:
    """Whether block x treatment cells can be plots around the recorded units of the term.

    A plot holds whole recorded units (R1), and the recorded units inside one
    plot differ in the treatments applied to them (the sub-plots of a split
    plot, each with its own variety); several recorded units with the same
    treatments inside one cell are replicates of it (eight plots of one
    variety in one year), so they, not the cell, are the units.
    """
    for r in rec_units:
        ok = ev.present(cells, r)
        if not is_nested(r[ok], cells[ok]):
            return False
        constant = [t[ok] for t in treatments.values() if is_nested(r[ok], t[ok])]
        key = ev.combined([cells[ok], *constant])
        per = np.bincount(
            dense_codes(key)[np.unique(ev.combined([key, r[ok]]), return_index=True)[1]]
        )
        if int(per.max()) > 1:
            return False
    return True


def _series_cells(
    data: pd.DataFrame, col: str, treatments: Sequence[str], series: Sequence[np.ndarray]
) -> bool:
    from replicheck.structure.strata import _time_series

    return _time_series(group_codes(data, (col, *treatments)), series)


def _source_of(derived_name: str) -> str:
    """The column a hidden grouping was derived from ('container[DOSE]' -> 'DOSE')."""
    inside = derived_name.partition("[")[2].rstrip("]")
    return "" if "," in inside else inside.strip()


def _complete(data: pd.DataFrame, col: str, treatments: Sequence[str]) -> bool:
    from replicheck.structure.crossed import complete

    return complete(data, col, treatments)


def _screen(
    data: pd.DataFrame,
    term: str,
    cands: list[Candidate],
    rec_units: Sequence[np.ndarray],
    file_order: set[str],
) -> list[Candidate]:
    """Derived candidates that split a recorded unit of the term are not its units; runs
    along the file order give way to any other credible unit."""
    kept: list[Candidate] = []
    for c in cands:
        if not (c.recorded or c.stated or c.relation == "confounded") and rec_units:
            codes = group_codes(data, (term, *c.columns))
            if not _whole_units(codes, rec_units):
                c = replace(
                    c,
                    credible=False,
                    reasons=(
                        *c.reasons,
                        "splits a recorded unit of the treatment, so it cannot be its unit",
                    ),
                )
        kept.append(c)
    others = [c for c in kept if c.credible and not set(c.columns) & file_order]
    if others:
        kept = [
            replace(
                c,
                credible=False,
                reasons=(
                    *c.reasons,
                    "runs along the file order give way to the recorded or derived units",
                ),
            )
            if c.credible and set(c.columns) & file_order
            else c
            for c in kept
        ]
    return sorted(kept, key=lambda c: (not c.credible, c.n_units, -c.score))


def _is_recorded_unit(data: pd.DataFrame, col: str, term: str) -> bool:
    """A recorded grouping nested in the term, replicated, nested by design."""
    codes = group_codes(data, (col,))
    t = group_codes(data, (term,))
    ok = ev.present(codes, t)
    if not ok.any():
        return False
    c, tt = codes[ok], t[ok]
    return is_nested(c, tt) and _by_design(c, tt)


def _by_design(unit: np.ndarray, trt: np.ndarray) -> bool:
    """Whether a grouping nested in a treatment is nested by design: replicated (half the
    rows in levels of two rows or more), two or more units in every treatment level (a
    column constant over a whole level, as a duration that is zero for every untreated
    fly, is no record of units), and unlikely to be nested by chance."""
    units = dense_codes(unit)
    levels = dense_codes(trt)
    per = units_per_level(units, levels, int(levels.max()) + 1)
    return (
        int(per.min()) >= 2
        and ev.replicated_share(units) >= MIN_REPLICATED_SHARE
        and ev.chance_nesting(units, levels) < CHANCE_NESTING_LOG10
    )


def _constant_in_any(data: pd.DataFrame, term: str, stated: Sequence[tuple[str, ...]]) -> bool:
    t = group_codes(data, (term,))
    for s in stated:
        codes = group_codes(data, s)
        ok = ev.present(codes, t)
        if is_nested(codes[ok], t[ok]):
            return True
    return False


def _reading_alternatives(
    data: pd.DataFrame,
    term: str,
    choice: UnitChoice,
    alt_cells: Sequence[CellGrouping],
    name_only: Sequence[LabelReading],
) -> list[Alternative]:
    """Readings supported by the data alone or the names alone that give another unit."""
    out: list[Alternative] = []
    for c in alt_cells:
        if c.treatment != term or not c.credible:
            continue
        cols = (c.block, term)
        cand = _plain_candidate(data, term, cols, f"{c.block}:{term}")
        alt = _choice(data, term, cand)
        if choice.unit is not None and alt.n_units >= choice.n_units:
            continue
        out.append(
            Alternative(
                term=term,
                choice=alt,
                kind="reading",
                why=f"the {c.block} x {term} cells differ beyond the {c.block} and treatment "
                f"effects on every scale ({p_phrase(c.p_value)}), as the plots of a "
                f"randomised-block or split-plot design would; but nothing names '{c.block}' "
                "as a block of plots",
                settle=f"whether each {c.block} x {term} cell was one plot that received its "
                f"{term} (state {option('unit', f'{c.block}:{term}')}) or the rows were "
                f"allocated one by one (state {option('block', c.block)})",
            )
        )
    for r in name_only:
        if r.parent != term:
            continue
        cols = (term, r.column)
        cand = _plain_candidate(data, term, cols, f"{term}:{r.column}")
        alt = _choice(data, term, cand)
        if choice.unit is not None and alt.n_units >= choice.n_units:
            continue
        p = "not computed" if r.cells_p is None else f"{p_phrase(r.cells_p)}"
        out.append(
            Alternative(
                term=term,
                choice=alt,
                kind="reading",
                why=f"labels of '{r.column}' repeat under every level of '{term}' and the name "
                f"says container, as if numbered afresh within each level ('{r.column}' 1 of "
                f"every {term}); the data do not show it (cells {p})",
                settle=f"whether one physical {r.column} carries the same label under every {term} "
                f"({option('unit-labels', 'global')}) or each {term} had its own "
                f"({option('unit-labels', 'local')})",
            )
        )
    return out


def _plain_candidate(
    data: pd.DataFrame, term: str, columns: tuple[str, ...], name: str
) -> Candidate:
    codes = group_codes(data, (term, *columns))
    n_units = int(codes.max()) + 1
    return Candidate(
        treatment=term,
        name=name,
        columns=columns,
        relation="nested",
        n_units=n_units,
        mean_size=len(data) / max(n_units, 1),
        hint=name_hint(columns[-1]),
        icc=None,
        icc_p=None,
        alias=False,
        credible=True,
        score=0.0,
        reasons=(),
        recorded=False,
    )


def _strata(
    data: pd.DataFrame,
    terms: Sequence[str],
    units: Sequence[UnitChoice],
    candidates: Sequence[Candidate],
    blocks: Sequence[Block],
) -> tuple[Stratum, ...]:
    n = len(data)
    groupings: dict[str, tuple[tuple[str, ...], np.ndarray, str]] = {}
    term_strata: dict[str, str | None] = {}

    def add(name: str, columns: tuple[str, ...], kind: str) -> str:
        codes = group_codes(data, columns)
        if int(codes.max()) + 1 >= n or int(codes.max()) < 1:
            return name
        for other, (_, oc, _) in groupings.items():
            if same_partition(codes, oc):
                return other
        groupings[name] = (columns, codes, kind)
        return name

    for b in blocks:
        if b.kind == "within" and b.n_levels > MAX_OCCASIONS:
            continue  # a fine time scale, not occasions: no random stratum of its own
        add(b.name, b.columns, b.kind)
    for u in units:
        if u.unit is None or u.relation == "confounded" or u.n_units >= n:
            term_strata[u.treatment] = None
            continue
        term_strata[u.treatment] = add(u.unit, (u.treatment, *u.columns), "unit")
    for u in units:
        if u.unit is None or u.relation == "confounded" or u.n_units >= n:
            continue
        unit_codes_ = group_codes(data, (u.treatment, *u.columns))
        for c in candidates:
            if c.treatment != u.treatment or not c.credible or c.relation != "nested":
                continue
            if c.n_units <= u.n_units or c.n_units >= n:
                continue
            codes = group_codes(data, (u.treatment, *c.columns))
            if is_nested(codes, unit_codes_):
                add(c.name, c.columns, "subunit")
    return build_strata(groupings, term_strata, n)


def unit_codes(data: pd.DataFrame, choice: UnitChoice) -> np.ndarray:
    """Integer unit codes of the rows for a chosen unit (each row its own unit when none).

    Units are numbered within the levels of the term, so a label that restarts
    within a treatment level never joins two units; a row with no value in a
    unit column is a unit of its own.
    """
    if not choice.columns:
        return np.arange(len(data), dtype=np.int64)
    cols = (
        choice.columns
        if choice.treatment in choice.columns or choice.treatment not in data
        else (choice.treatment, *choice.columns)
    )
    return complete_codes(group_codes(data, cols))


def complete_codes(codes: np.ndarray) -> np.ndarray:
    """Codes with every missing (-1) row given a level of its own, numbered after the others."""
    missing = codes < 0
    if not missing.any():
        return codes
    out = np.array(codes, dtype=np.int64)
    top = int(out.max()) + 1 if (~missing).any() else 0
    out[missing] = top + np.arange(int(missing.sum()))
    return out


def _cell_readings(
    cells: Sequence[CellGrouping], units: Sequence[UnitChoice]
) -> list[tuple[str, str]]:
    chosen = {u.unit for u in units}
    out: list[tuple[str, str]] = []
    for c in cells:
        p = "not computed" if c.p_value is None else f"{p_phrase(c.p_value)}"
        if c.name in chosen:
            out.append(
                (
                    "unit-reading-uncertain",
                    f"each '{c.block}' x '{c.treatment}' cell holds {format_number(c.mean_size)} "
                    f"rows on "
                    f"average and the cells differ beyond the {c.block} and treatment effects "
                    f"on every scale ({p}), so replicheck took each cell as the unit that "
                    f"received '{c.treatment}' (a plot in a split-plot or randomised-block "
                    f"design); if the rows were instead allocated to '{c.treatment}' one by one "
                    f"within each {c.block}, the rows are the units and '{c.block}' is a block",
                )
            )
        elif (
            not c.credible
            and c.other_treatments_inside
            and ":" not in c.treatment
            and any(
                u.treatment == c.treatment
                and u.unit is not None
                and u.unit.startswith(f"{c.block}:")
                and u.unit != c.name
                for u in units
            )
        ):
            unit = next(u.unit for u in units if u.treatment == c.treatment)
            out.append(
                (
                    "unit-reading-uncertain",
                    f"each '{c.block}' x '{c.treatment}' cell holds whole '{unit}' units that "
                    f"differ in their other treatments, as the main plots of a split plot "
                    f"would; the cells do not differ beyond the {c.block} and treatment "
                    f"effects ({p}), so replicheck took '{unit}' as the unit of "
                    f"'{c.treatment}'; if '{c.treatment}' was applied to whole main plots, "
                    f"state {option('unit', f'{c.block}:{c.treatment}')}",
                )
            )
        elif (
            not c.credible
            and not c.other_treatments_inside
            and ":" not in c.treatment
            and any(u.treatment == c.treatment and u.unit is None for u in units)
        ):
            out.append(
                (
                    "unit-reading-uncertain",
                    f"each '{c.block}' x '{c.treatment}' cell holds {format_number(c.mean_size)} "
                    f"rows on "
                    f"average; the cells do not differ beyond the {c.block} and treatment "
                    f"effects ({p}), so replicheck took the rows within each {c.block} as the "
                    f"units of '{c.treatment}' and '{c.block}' as a block; if each cell was one "
                    f"plot that received its '{c.treatment}', state "
                    f"{option('unit', f'{c.block}:{c.treatment}')}",
                )
            )
    return out
