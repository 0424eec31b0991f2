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

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from replicheck.errors import InputError
from replicheck.stats.clustering import anova_components
from replicheck.structure.names import NameHint, name_hint, tokens
from replicheck.structure.relations import Relation, classify, codes_of

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
    choice: UnitChoice
    per_treatment: tuple[UnitChoice, ...]
    skipped: dict[str, str] = field(default_factory=dict)
    # (rule name, text): which reading was taken where the data alone cannot tell
    readings: tuple[tuple[str, str], ...] = ()
    ambiguous: tuple[str, ...] = ()  # groupings that might be units but cannot be told from labels


def _norm(s: str) -> str:
    return "".join(ch for ch in str(s).lower() if ch.isalnum())


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
        present = s.dropna()
        n_present = int(present.size)
        n_unique = int(present.nunique())
        if n_present == 0:
            skipped[col] = "all values missing"
        elif n_unique <= 1:
            skipped[col] = "a single value"
        elif n_unique == n_present:
            skipped[col] = "a row identifier (every value distinct)"
        elif pd.api.types.is_bool_dtype(s) or not pd.api.types.is_numeric_dtype(s):
            keep.append(col)
        else:
            vals = present.to_numpy(dtype=float)
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
    joined = data[list(columns)].astype(str).agg("\x1f".join, axis=1)
    codes, _ = codes_of(joined)
    return codes


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


def _labels_local(column: str, relation: Relation, mode: str, stated: bool) -> bool:
    """Whether labels of a column crossed with treatment restart within each treatment level."""
    if relation.relation != "crossed" or mode == "global":
        return False
    if mode == "local" or stated:
        return True
    return name_hint(column).kind == "container"


def _one_treatment(
    data: pd.DataFrame,
    y: np.ndarray,
    treatment: str,
    cols: list[str],
    stated_unit: str | None,
    unit_labels: str,
) -> tuple[list[Relation], list[Candidate], UnitChoice, list[tuple[str, str]], list[str]]:
    relations: list[Relation] = []
    candidates: list[Candidate] = []
    readings: list[tuple[str, str]] = []
    ambiguous: list[str] = []
    for col in cols:
        rel = classify(col, treatment, data[col], data[treatment])
        relations.append(rel)
        stated = col == stated_unit
        if rel.relation in {"nested", "partial"}:
            candidates.append(_candidate(data, y, treatment, (col,), rel, col, False, stated))
        elif rel.relation == "confounded":
            same = rel.n_levels == len(rel.levels_per_treatment)
            alias = same and not stated and _is_alias(col, treatment, data[col], data[treatment])
            cand = _candidate(data, y, treatment, (col,), rel, col, alias, stated)
            candidates.append(cand)
            if alias:
                readings.append(
                    (
                        "column-reads-as-treatment-label",
                        f"'{col}' has exactly one level per level of '{treatment}' and reads as "
                        f"another label of it, so it was not taken as a unit; if '{col}' names "
                        f"physical units, the design is confounded (state --unit {col})",
                    )
                )
            elif not cand.credible:
                ambiguous.append(col)
        elif _labels_local(col, rel, unit_labels, stated):
            local = classify(
                f"{treatment}:{col}",
                treatment,
                pd.Series(_local_codes(data, (treatment, col)), index=data.index),
                data[treatment],
            )
            candidates.append(
                _candidate(
                    data, y, treatment, (treatment, col), local, f"{treatment}:{col}", False, stated
                )
            )
            example = data[col].dropna().iloc[0]
            readings.append(
                (
                    "labels-local-to-treatment",
                    f"labels of '{col}' repeat under several levels of '{treatment}' "
                    f"('{col}' {example!s} appears under more than one); units that received "
                    f"different treatments must be different units, so replicheck analysed "
                    f"'{treatment}:{col}' (each {col} within its {treatment}) as the unit; if the "
                    f"same physical {col} received every treatment, rerun with "
                    "--unit-labels global",
                )
            )
        elif stated:
            readings.append(
                (
                    "stated-unit-not-supported",
                    f"the stated unit '{col}' is {rel.relation} with '{treatment}': the treatment "
                    f"varies within it, so it cannot be the unit the treatment was applied to",
                )
            )
    candidates.sort(key=lambda c: (not c.credible, c.n_units, -c.score))
    return relations, candidates, _choose(data, treatment, candidates), readings, ambiguous


def combined_treatment(data: pd.DataFrame, treatments: Sequence[str]) -> pd.Series:
    """One factor whose levels are the observed combinations of several treatment columns."""
    if len(treatments) == 1:
        return data[treatments[0]]
    return data[list(treatments)].astype(str).agg(" & ".join, axis=1)


def infer_structure(
    data: pd.DataFrame,
    response: str,
    treatments: Sequence[str],
    *,
    stated_unit: str | None = None,
    unit_labels: str = "auto",
) -> Structure:
    """Relations, ranked candidate units and the chosen unit.

    ``data`` holds only the analysed rows (response and every treatment present).
    With several treatment columns, the unit used for the analysis is the one
    of their combination (column ``combined_name(treatments)``); units are also
    reported per treatment column.
    """
    if unit_labels not in UNIT_LABEL_MODES:
        raise InputError(f"--unit-labels must be one of {', '.join(UNIT_LABEL_MODES)}")
    y = data[response].to_numpy(dtype=float)
    cols, skipped = grouping_columns(data, (response, *treatments))
    if stated_unit is not None and stated_unit not in cols:
        reason = skipped.get(stated_unit, "it is the response or a treatment column")
        if reason.startswith("a row identifier"):
            cols.append(stated_unit)
            skipped.pop(stated_unit)
        else:
            raise InputError(f"the stated unit '{stated_unit}' cannot be a grouping: {reason}")
    relations: list[Relation] = []
    candidates: list[Candidate] = []
    readings: list[tuple[str, str]] = []
    ambiguous: list[str] = []
    per: list[UnitChoice] = []
    for trt in treatments:
        r, c, choice, rd, amb = _one_treatment(data, y, trt, cols, stated_unit, unit_labels)
        relations += r
        candidates += c
        readings += rd
        ambiguous += [a for a in amb if a not in ambiguous]
        per.append(choice)
    if len(treatments) == 1:
        combined = per[0]
    else:
        name = combined_name(treatments)
        frame = data.assign(**{name: combined_treatment(data, treatments)})
        _, c, combined, rd, amb = _one_treatment(frame, y, name, cols, stated_unit, unit_labels)
        candidates += [x for x in c if x.credible]
    return Structure(
        relations=tuple(relations),
        candidates=tuple(candidates),
        choice=combined,
        per_treatment=tuple(per),
        skipped=skipped,
        readings=tuple(dict.fromkeys(readings)),
        ambiguous=tuple(ambiguous),
    )


def combined_name(treatments: Sequence[str]) -> str:
    """Name of the factor formed by several treatment columns."""
    return " x ".join(treatments)


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
        pairs = np.unique(unit * len(trt_labels) + trt_codes)
        unit_per_trt = np.bincount(pairs % len(trt_labels), minlength=len(trt_labels))
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
