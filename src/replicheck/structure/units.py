"""Candidate experimental units and the choice of the unit for a treatment.

The experimental unit for a treatment is the coarsest grouping of the rows
within which the treatment never varies (Hurlbert 1984, Ecological Monographs
54:187-211; Lazic, Clarke-Williams & Munafo 2018, PLoS Biology 16:e2005282).
When that grouping has one level per treatment level the design is
confounded: no test of the treatment is possible.

Candidates are ranked with an explained score from three inputs: the name of
the column, its structure relative to the treatment, and how strongly the
observations cluster within it.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from replicheck.codebook import column_codes
from replicheck.errors import InputError
from replicheck.partitions import is_nested, same_partition, units_per_level
from replicheck.stats.clustering import anova_components
from replicheck.structure.hidden.time import parse_times
from replicheck.structure.names import NameHint, name_hint, tokens
from replicheck.structure.relations import (
    PairRelation,
    Relation,
    classify,
    codes_of,
    group_codes,
    pair_relation,
)
from replicheck.structure.strata import (
    EVIDENCE_P,
    CellGrouping,
    Stratum,
    block_evidence,
    build_strata,
    cell_evidence,
    coarsest_inside,
    crossed_cells,
)

# Common practice (no published threshold): clustering counts as evidence for
# an unnamed grouping when the one-way F test of units within treatment has
# p < 0.01.
CLUSTER_EVIDENCE_P = 0.01

UNIT_LABEL_MODES = ("auto", "local", "global")


@dataclass(frozen=True)
class Candidate:
    """A grouping within which the treatment never (or almost never) varies."""

    treatment: str
    name: str  # column name, or "treatment:column" for labels local to each treatment level
    columns: tuple[str, ...]
    relation: str  # nested | confounded | partial
    n_units: int
    mean_size: float
    hint: NameHint
    icc: float | None
    icc_p: float | None
    alias: bool
    credible: bool
    score: float
    reasons: tuple[str, ...]


@dataclass(frozen=True)
class UnitChoice:
    """The experimental unit taken for one treatment factor."""

    treatment: str
    unit: str | None
    columns: tuple[str, ...]
    relation: str  # nested | confounded | partial | none
    n_units: int
    n_observations: int
    source: str  # stated | inferred | rows
    reading: str
    single_unit_levels: tuple[str, ...] = ()


@dataclass(frozen=True)
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

    def unit_of(self, term: str) -> UnitChoice:
        """The unit chosen for a term."""
        for u in self.units:
            if u.treatment == term:
                return u
        raise KeyError(term)


def _norm(s: str) -> str:
    return "".join(ch for ch in str(s).lower() if ch.isalnum())


def _is_time_stamp(s: pd.Series) -> bool:
    """Whether a column holds times of day (with or without dates), not bare dates."""
    if pd.api.types.is_numeric_dtype(s) or pd.api.types.is_bool_dtype(s):
        return False
    if isinstance(s.dtype, pd.CategoricalDtype):
        return False  # groupings derived from the data ("day 3", "zone 2") and coded factors
    values, _ = parse_times(s)
    if values is None:
        return False
    stamps = pd.to_datetime(values.dropna())
    return bool((stamps != stamps.dt.normalize()).any())


def grouping_columns(
    data: pd.DataFrame, exclude: Sequence[str]
) -> tuple[list[str], dict[str, str]]:
    """Columns that can act as groupings, and the reason each other column was skipped."""
    keep: list[str] = []
    skipped: dict[str, str] = {}
    for col in data.columns:
        if col in exclude:
            continue
        s = data[col]
        coded = column_codes(s)
        n_present = int(np.count_nonzero(coded.codes >= 0))
        n_unique = coded.n_levels
        if n_present == 0:
            skipped[col] = "all values missing"
        elif n_unique <= 1:
            skipped[col] = "a single value"
        elif n_unique == n_present:
            skipped[col] = "a row identifier (every value distinct)"
        elif _is_time_stamp(s):
            skipped[col] = "a time stamp (its days and sessions are weighed instead)"
        elif pd.api.types.is_bool_dtype(s) or not pd.api.types.is_numeric_dtype(s):
            keep.append(col)
        else:
            vals = s.dropna().to_numpy(dtype=float)
            integer = bool(np.all(np.isfinite(vals)) and np.all(vals == np.round(vals)))
            if not integer and n_unique > n_present / 2:
                skipped[col] = "a continuous measurement"
            else:
                keep.append(col)
    return keep, skipped


def _is_alias(column: str, treatment: str, col_values: pd.Series, trt_values: pd.Series) -> bool:
    """Whether a column with the treatment's partition reads as another label of it."""
    hint = name_hint(column)
    if hint.suggests_unit:
        return False
    if hint.kind == "label" or set(tokens(treatment)) & set(tokens(column)):
        return True
    ok = col_values.notna() & trt_values.notna()
    pairs = pd.DataFrame({"c": col_values[ok].astype(str), "t": trt_values[ok].astype(str)})
    pairs = pairs.drop_duplicates()
    contained = [
        len(_norm(t)) >= 2 and (_norm(t) in _norm(c) or _norm(c) in _norm(t))
        for c, t in zip(pairs["c"], pairs["t"], strict=True)
    ]
    return bool(contained) and all(contained)


def _icc(y: np.ndarray, unit: np.ndarray, trt: np.ndarray) -> tuple[float | None, float | None]:
    """ANOVA ICC of units within treatment and the p-value of its F test."""
    n_units = int(unit.max()) + 1
    n_trt = int(trt.max()) + 1
    if n_units - n_trt < 1 or y.size - n_units < 1:
        return None, None
    comp = anova_components(y, unit, trt)
    return float(comp.icc), float(comp.p_value)


def _local_codes(data: pd.DataFrame, columns: Sequence[str]) -> np.ndarray:
    return group_codes(data, columns)


def unit_codes(data: pd.DataFrame, choice: UnitChoice) -> np.ndarray:
    """Integer unit codes of the rows for a chosen unit (each row its own unit when none)."""
    if not choice.columns:
        return np.arange(len(data), dtype=np.int64)
    return _local_codes(data, choice.columns)


def _candidate(
    data: pd.DataFrame,
    y: np.ndarray,
    treatment: str,
    columns: tuple[str, ...],
    relation: Relation,
    name: str,
    alias: bool,
    stated: bool,
) -> Candidate:
    trt, _ = codes_of(data[treatment])
    unit = _local_codes(data, (treatment, *columns)) if relation.relation != "confounded" else None
    hint = name_hint(columns[-1])
    reasons: list[str] = []
    score = 0.0
    if stated:
        score += 3
        reasons.append("stated by the user as the unit")
    if hint.suggests_unit:
        score += 2
        reasons.append(f"the name suggests a {hint.kind} ('{hint.word}')")
    elif hint.kind == "label":
        reasons.append(f"the name suggests a label ('{hint.word}')")
    n_units = relation.n_levels
    icc = icc_p = None
    if unit is not None:
        n_units = int(unit.max()) + 1
        icc, icc_p = _icc(y, unit, trt)
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
        reasons.append(f"residual ICC {icc:.2f} within '{treatment}' (F test p = {icc_p:.2g})")
    if alias:
        reasons.append("read as another label of the treatment, not a unit")
    evidence = icc_p is not None and icc_p < CLUSTER_EVIDENCE_P
    credible = not alias and (stated or hint.suggests_unit or evidence)
    return Candidate(
        treatment=treatment,
        name=name,
        columns=columns,
        relation=relation.relation,
        n_units=n_units,
        mean_size=mean_size,
        hint=hint,
        icc=icc,
        icc_p=icc_p,
        alias=alias,
        credible=credible,
        score=round(score, 2),
        reasons=tuple(reasons),
    )


def _drop_aliases(
    data: pd.DataFrame, cols: list[str], treatments: Sequence[str], stated_unit: str | None
) -> tuple[list[str], list[tuple[str, str]]]:
    """Remove columns that are other labels of a treatment (same partition, label-like)."""
    keep: list[str] = []
    readings: list[tuple[str, str]] = []
    for col in cols:
        alias_of = None
        if col != stated_unit:
            for trt in treatments:
                rel = classify(col, trt, data[col], data[trt])
                same = rel.relation == "confounded" and rel.n_levels == len(
                    rel.levels_per_treatment
                )
                if same and _is_alias(col, trt, data[col], data[trt]):
                    alias_of = trt
                    break
        if alias_of is None:
            keep.append(col)
            continue
        readings.append(
            (
                "column-reads-as-treatment-label",
                f"'{col}' has exactly one level per level of '{alias_of}' and reads as another "
                f"label of it, so it was not taken as a unit; if '{col}' names physical units, "
                f"the design is confounded (state --unit {col})",
            )
        )
    return keep, readings


def _localise(
    data: pd.DataFrame,
    cols: list[str],
    treatments: Sequence[str],
    stated_unit: str | None,
    unit_labels: str,
    y: np.ndarray | None = None,
) -> tuple[pd.DataFrame, list[str], dict[str, tuple[str, ...]], list[tuple[str, str]]]:
    """Replace unit labels that restart within a parent by parent:label groupings.

    Labels often restart: tank 1 of every feed, plot 1 of every block, wafer 1
    of every lot, well 1 of every plate, subject 1 of every sequence. A column
    is read that way when it is crossed with a possible parent and its name
    says container (tank, cage, pot, plot, wafer, a replicate number), or,
    for a parent that is itself a grouping, container, location or individual
    (plot, well, subject); under ``--unit-labels local`` any column qualifies.
    Possible parents: treatments (for containers: a container receives a
    treatment; for places such as plates only when their cells with the
    treatment cluster, as plates that each received one compound do), and
    groupings whose names say unit, block, place or subject,
    or that are nested in a treatment; for subjects any grouping (subject 1
    of every sequence or cohort), and a treatment when one subject label
    carries two of its levels at the same time point. Times never are:
    subjects are measured again in every period.

    Of the possible parents, one with a finer possible parent nested in it is
    dropped (labels restart within the finest of a chain: lot, not source).
    Of the rest, the parent within whose cells the most other treatments are
    constant is taken (plots within blocks keep their whole-plot treatment),
    then the one with the fewest cells (the coarsest: in a split plot the
    whole plots belong to the whole-plot treatment).
    """
    if unit_labels == "global":
        return data, cols, {}, []
    local_mode = unit_labels == "local"
    current: dict[str, tuple[tuple[str, ...], np.ndarray]] = {
        c: ((c,), group_codes(data, (c,))) for c in [*cols, *treatments]
    }
    trt_codes = {t: current[t][1] for t in treatments}

    def parent_ok(g: str) -> bool:
        kind = name_hint(g).kind
        if kind == "time":
            return False  # subjects are measured again in every period: no restart
        if name_hint(g).suggests_unit:
            return True
        return any(is_nested(current[g][1], trt_codes[t]) for t in treatments)

    derived: dict[str, tuple[str, ...]] = {}
    readings: list[tuple[str, str]] = []
    renamed: dict[str, str] = {}
    extra: dict[str, pd.Series] = {}
    parent_of: dict[str, str] = {}
    order = sorted(cols, key=lambda c: int(current[c][1].max()))
    for col in order:
        kind = name_hint(col).kind
        child_of_trt = local_mode or kind == "container"
        child_of_group = local_mode or kind in {"container", "block", "location", "individual"}
        options = [t for t in treatments if child_of_trt]
        if kind == "individual" and not child_of_trt:
            options += [
                t for t in treatments if _two_places_at_once(data, col, t, [*cols, *treatments])
            ]
        if kind == "location" and y is not None and not child_of_trt:
            options += [t for t in treatments if _cells_cluster(data, y, col, t, cols, treatments)]
        options += [
            g
            for g in cols
            if g != col
            and child_of_group
            and name_hint(g).kind != "time"
            and (parent_ok(g) or kind == "individual")
        ]
        codes = current[col][1]
        if any(is_nested(codes, trt_codes[t]) for t in treatments):
            continue  # already a unit of a treatment: its labels are its own
        crossing: list[str] = []
        for parent in options:
            rel = classify(col, parent, pd.Series(codes), pd.Series(current[parent][1]))
            if rel.relation == "crossed":
                crossing.append(parent)
        crossing = [
            p
            for p in crossing
            if not any(q != p and is_nested(current[q][1], current[p][1]) for q in crossing)
        ]
        if kind == "individual" and any(p not in treatments for p in crossing):
            # subject 1 of every sequence: a grouping explains the restart before a treatment
            crossing = [p for p in crossing if p not in treatments]
        if not crossing:
            continue

        def rank(parent: str, codes: np.ndarray = codes) -> tuple[int, int]:
            cells = group_codes(pd.DataFrame({"p": current[parent][1], "c": codes}), ("p", "c"))
            constant = sum(1 for t in treatments if t != parent and is_nested(cells, trt_codes[t]))
            return (-constant, int(cells.max()) + 1)

        parent = min(crossing, key=rank)
        parent_of[col] = parent
        current[col] = ((*current[parent][0], col), group_codes(data, (*current[parent][0], col)))
    # A parent localised after its child (wells before the plates that restart
    # within compounds): rebuild every chain from the top, parents first.
    final: dict[str, tuple[str, ...]] = {}

    def chain(col: str) -> tuple[str, ...]:
        if col not in parent_of:
            return (col,)
        if col not in final:
            final[col] = (*chain(parent_of[col]), col)
        return final[col]

    for col in parent_of:
        source = chain(col)
        name = ":".join(source)
        renamed[col] = name
        derived[name] = source
        extra[name] = pd.Series(group_codes(data, source), index=data.index)
        parent = ":".join(chain(parent_of[col]))
        example = data[col].dropna().iloc[0]
        readings.append(
            (
                "labels-local-to-treatment",
                f"labels of '{col}' repeat under several levels of '{parent}' ('{col}' "
                f"{example!s} appears under more than one), so replicheck read each {col} "
                f"within its {parent} ('{name}') as a distinct unit; if one physical {col} "
                f"carries the same label everywhere, rerun with --unit-labels global",
            )
        )
    if extra:
        data = data.assign(**extra)
    return data, [renamed.get(c, c) for c in cols], derived, readings


def _two_places_at_once(data: pd.DataFrame, col: str, treatment: str, cols: Sequence[str]) -> bool:
    """Whether one subject label has two treatment levels at the same time point.

    A subject cannot receive two treatments at once: when a label carries
    different levels of a treatment in the same period, week or session, the
    labels must restart within the treatment (mouse 1 of every diet).
    """
    times = [c for c in cols if c not in (col, treatment) and name_hint(c).kind == "time"]
    for t in times:
        per_cell = data.groupby([col, t], observed=True)[treatment].nunique()
        if bool((per_cell > 1).any()):
            return True
    return False


def _cells_cluster(
    data: pd.DataFrame,
    y: np.ndarray,
    col: str,
    treatment: str,
    cols: Sequence[str],
    treatments: Sequence[str],
) -> bool:
    """Whether the cells of a place and a treatment differ beyond their main effects."""
    rel = classify(col, treatment, data[col], data[treatment])
    if rel.relation != "crossed":
        return False
    cells = group_codes(data, (col, treatment))
    if len(data) / (int(cells.max()) + 1) < 1.5:
        return False
    inner = coarsest_inside(data, cells, [c for c in cols if c != col])
    trts = [group_codes(data, (t,)) for t in treatments]
    p = cell_evidence(y, group_codes(data, (col,)), cells, trts, inner)
    return p is not None and p < EVIDENCE_P


def _one_treatment(
    data: pd.DataFrame,
    y: np.ndarray,
    treatment: str,
    cols: list[str],
    stated: tuple[str, ...],
    derived: dict[str, tuple[str, ...]],
    cells: Mapping[str, CellGrouping],
) -> tuple[list[Relation], list[Candidate], UnitChoice, list[tuple[str, str]], list[str]]:
    relations: list[Relation] = []
    candidates: list[Candidate] = []
    readings: list[tuple[str, str]] = []
    ambiguous: list[str] = []
    for col in cols:
        rel = classify(col, treatment, data[col], data[treatment])
        relations.append(rel)
        source = derived.get(col, (col,))
        is_stated = bool(stated) and (
            set(source) == set(stated) if len(stated) > 1 else source[-1] == stated[0]
        )
        if col in cells and rel.relation != "nested":
            continue
        if rel.relation == "nested":
            cand = _candidate(data, y, treatment, source, rel, col, False, is_stated)
            if col in cells:
                cell = cells[col]
                p = "not computed" if cell.p_value is None else f"p = {cell.p_value:.2g}"
                cand = replace(
                    cand,
                    credible=cell.credible,
                    reasons=(
                        *cand.reasons[:-1],
                        f"cells of '{cell.block}' x '{cell.treatment}' "
                        + ("differ" if cell.credible else "do not differ")
                        + f" beyond the block and treatment effects ({p})",
                    ),
                )
            candidates.append(cand)
        elif rel.relation == "partial":
            # the exceptions make the column cross the treatment; within each treatment
            # level its labels still name units, so the unit is treatment x column
            candidates.append(
                _candidate(data, y, treatment, (treatment, col), rel, col, False, is_stated)
            )
        elif rel.relation == "confounded":
            same = rel.n_levels == len(rel.levels_per_treatment)
            alias = same and not is_stated and _is_alias(col, treatment, data[col], data[treatment])
            cand = _candidate(data, y, treatment, source, rel, col, alias, is_stated)
            candidates.append(cand)
            if alias:
                pass  # aliases of main treatments were removed before; this is a coarser one
            elif not cand.credible:
                ambiguous.append(col)
        elif is_stated:
            readings.append(
                (
                    "stated-unit-not-supported",
                    f"the stated unit '{col}' is {rel.relation} with '{treatment}': the treatment "
                    f"varies within it, so it cannot be the unit the treatment was applied to",
                )
            )
    candidates.sort(key=lambda c: (not c.credible, c.n_units, -c.score))
    return relations, candidates, _choose(data, treatment, candidates), readings, ambiguous


def infer_structure(
    data: pd.DataFrame,
    response: str,
    terms: Sequence[str],
    *,
    exclude: Sequence[str] = (),
    interactions: Sequence[str] = (),
    stated_unit: str | Sequence[str] | None = None,
    unit_labels: str = "auto",
) -> Structure:
    """Relations, ranked candidate units, the chosen unit of every term, and the strata.

    ``data`` holds only the analysed rows. ``terms`` are factor columns of
    ``data`` (treatment columns, and columns holding the combinations of
    several treatments for interaction terms); ``exclude`` lists further
    columns that are not groupings (the treatment columns themselves). Terms
    named in ``interactions`` get a unit but add no relations or readings of
    their own, and the stated unit is checked against main terms only. A
    stated unit may be one column or several (an implicit plot such as
    block x variety).
    """
    if unit_labels not in UNIT_LABEL_MODES:
        raise InputError(f"--unit-labels must be one of {', '.join(UNIT_LABEL_MODES)}")
    stated: tuple[str, ...] = (
        ()
        if stated_unit is None
        else (stated_unit,)
        if isinstance(stated_unit, str)
        else tuple(stated_unit)
    )
    single = stated[0] if len(stated) == 1 else None
    y = data[response].to_numpy(dtype=float)
    cols, skipped = grouping_columns(data, (response, *terms, *exclude))
    for col in stated:
        if col in cols or (len(stated) > 1 and col in terms):
            continue
        reason = skipped.get(col, "it is the response or a treatment column")
        if reason.startswith("a row identifier"):
            cols.append(col)
            skipped.pop(col)
        else:
            raise InputError(f"the stated unit '{col}' cannot be a grouping: {reason}")
    relations: list[Relation] = []
    candidates: list[Candidate] = []
    ambiguous: list[str] = []
    units: list[UnitChoice] = []
    main_terms = [t for t in terms if t not in interactions]
    cols, readings = _drop_aliases(data, cols, main_terms, single)
    data, cols, derived, local = _localise(data, cols, main_terms, single, unit_labels, y)
    readings += local
    originals = [
        c for c in cols if c not in derived and (name_hint(c).suggests_unit or c in stated)
    ]
    data, cell_cols, cell_parts, cells = crossed_cells(
        data, y, originals, main_terms, stated, groupings=cols
    )
    derived.update(cell_parts)
    evidence = {c.name: c for c in cells}
    for term in terms:
        main = term not in interactions
        r, c, choice, rd, amb = _one_treatment(
            data, y, term, cols + cell_cols, stated if main else (), derived, evidence
        )
        if main:
            relations += [x for x in r if x.column not in evidence]
            readings += rd
            ambiguous += [a for a in amb if a not in ambiguous]
        candidates += c
        units.append(choice)
    readings += _cell_readings(cells, units)
    chosen = {u.unit for u in units}
    local_cells = {c.block for c in cells if c.name in chosen}
    blocks = _blocks(data, y, cols, main_terms, relations, derived, local_cells)
    strata = _strata(data, terms, units, candidates, blocks)
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
    return Structure(
        relations=tuple(relations),
        candidates=tuple(candidates),
        units=tuple(units),
        skipped=skipped,
        readings=tuple(dict.fromkeys(readings)),
        ambiguous=tuple(ambiguous),
        strata=strata,
        blocks=tuple(blocks),
        factor_relations=pairs,
    )


@dataclass(frozen=True)
class Block:
    """A grouping crossed with the treatments that carries an effect of its own."""

    name: str
    columns: tuple[str, ...]
    n_levels: int
    p_value: float | None
    reason: str


def _blocks(
    data: pd.DataFrame,
    y: np.ndarray,
    cols: Sequence[str],
    treatments: Sequence[str],
    relations: Sequence[Relation],
    derived: Mapping[str, tuple[str, ...]],
    local_cells: set[str] = frozenset(),  # type: ignore[assignment]
) -> list[Block]:
    """Groupings crossed with every treatment whose names say block, place, time or subject.

    A crossed column with an effect but no such name (sex, genotype) is more
    likely a covariate than a block and is left out of the random structure.
    A place or container whose cells with a treatment are that treatment's
    units (plates numbered 1..6 within every compound) is a local label, not a
    block; a column named as a block, time or subject stays a block.
    """
    crossed: dict[str, int] = {}
    for r in relations:
        if r.relation == "crossed":
            crossed[r.column] = crossed.get(r.column, 0) + 1
    all_trt = group_codes(data, treatments)
    out: list[Block] = []
    for col in cols:
        if crossed.get(col, 0) != len(treatments):
            continue
        source = tuple(derived.get(col, (col,)))
        codes = group_codes(data, (col,))
        hint = name_hint(source[-1])
        if not hint.suggests_unit:
            continue  # an unnamed crossed column with an effect is more likely a covariate
        if col in local_cells and hint.kind in {"location", "container"}:
            continue  # its cells are the units: the labels restart within the treatment
        p = block_evidence(y, codes, all_trt)
        reason = f"the name suggests a {hint.kind} ('{hint.word}')"
        if p is not None:
            reason += f"; rows differ between its levels beyond the treatment effects: p = {p:.2g}"
        out.append(Block(col, source, int(codes.max()) + 1, p, reason))
    return out


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
        for other, (_, oc, _) in groupings.items():
            if same_partition(codes, oc):
                return other
        groupings[name] = (columns, codes, kind)
        return name

    for b in blocks:
        add(b.name, b.columns, "block")
    for u in units:
        if u.unit is None or u.relation == "confounded" or u.n_units >= n:
            term_strata[u.treatment] = None
            continue
        term_strata[u.treatment] = add(u.unit, u.columns, "unit")
    for u in units:
        if u.unit is None or u.relation == "confounded" or u.n_units >= n:
            continue
        unit_codes_ = group_codes(data, u.columns)
        for c in candidates:
            if c.treatment != u.treatment or not c.credible or c.relation != "nested":
                continue
            if c.n_units <= u.n_units or c.n_units >= n:
                continue
            codes = group_codes(data, c.columns)
            if is_nested(codes, unit_codes_):
                add(c.name, c.columns, "subunit")
    return build_strata(groupings, term_strata, n)


def _cell_readings(
    cells: Sequence[CellGrouping], units: Sequence[UnitChoice]
) -> list[tuple[str, str]]:
    chosen = {u.unit for u in units}
    out: list[tuple[str, str]] = []
    for c in cells:
        p = "not computed" if c.p_value is None else f"p = {c.p_value:.2g}"
        if c.name in chosen:
            out.append(
                (
                    "unit-reading-uncertain",
                    f"each '{c.block}' x '{c.treatment}' cell holds {c.mean_size:.3g} rows on "
                    f"average and the cells differ beyond the {c.block} and treatment effects "
                    f"({p}), so replicheck took each cell as the unit that received "
                    f"'{c.treatment}' (a plot in a split-plot or randomised-block design); if the "
                    f"rows were instead allocated to '{c.treatment}' one by one within each "
                    f"{c.block}, the rows are the units and '{c.block}' is a block",
                )
            )
        elif not c.credible and not c.other_treatments_inside and ":" not in c.treatment:
            out.append(
                (
                    "unit-reading-uncertain",
                    f"each '{c.block}' x '{c.treatment}' cell holds {c.mean_size:.3g} rows on "
                    f"average; the cells do not differ beyond the {c.block} and treatment "
                    f"effects ({p}), so replicheck took the rows within each {c.block} as the "
                    f"units of '{c.treatment}' and '{c.block}' as a block; if each cell was one "
                    f"plot that received its '{c.treatment}', state --unit "
                    f'"{c.block}:{c.treatment}"',
                )
            )
    return out


def _choose(data: pd.DataFrame, treatment: str, candidates: list[Candidate]) -> UnitChoice:
    n = len(data)
    credible = [c for c in candidates if c.credible]
    if not credible:
        return UnitChoice(
            treatment,
            None,
            (),
            "none",
            n,
            n,
            "rows",
            "no grouping was found within which the treatment is constant; "
            "each row is taken as its own replicate",
        )
    best = credible[0]
    stated = "stated by the user as the unit" in best.reasons
    trt_codes, trt_labels = codes_of(data[treatment])
    if best.relation == "confounded":
        unit_per_trt = np.ones(len(trt_labels), dtype=int)
    else:
        unit = _local_codes(data, (treatment, *best.columns))
        unit_per_trt = units_per_level(unit, trt_codes, len(trt_labels))
    single = tuple(trt_labels[i] for i in np.flatnonzero(unit_per_trt == 1))
    relation = best.relation
    if relation != "partial" and len(single) == len(trt_labels):
        relation = "confounded"
    reading = f"'{best.name}' is the coarsest grouping within which '{treatment}' never varies" + (
        " (stated by the user and confirmed by the data)" if stated else ""
    )
    n_units = best.n_units if relation != "confounded" else max(best.n_units, len(trt_labels))
    return UnitChoice(
        treatment=treatment,
        unit=best.name,
        columns=best.columns,
        relation=relation,
        n_units=n_units,
        n_observations=n,
        source="stated" if stated else "inferred",
        reading=reading,
        single_unit_levels=single,
    )
