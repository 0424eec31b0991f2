"""The analysis table: the end of the read stage, once the claim is known.

:func:`prepare` takes the table as read and the claim as stated and gives the
rows, columns and model terms every later stage works on:

1. groupings written once per block are filled down and a wide family of
   columns holding the response is turned into long form (``io.filldown``,
   ``io.reshape``); the formula's transformed terms (``log(dose)``) become
   columns;
2. every name of the claim is resolved to the column the data spell it with;
   a ``cbind()`` response is expanded into yes/no trials, and ignored columns
   are dropped;
3. the formula's factors that are blocks of the design leave the treatments
   and become stated blocks; a claimed analysis of covariance without a
   formula adds its covariates as terms;
4. rows without a response or a treatment value leave; a response or numeric
   term of extreme scale is multiplied by an exact power of two;
5. numeric columns are read as one slope or as categories, the model is
   checked against the limits, and interactions without replication leave
   the model (they have no error to be tested against).
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from replicheck.advice import option
from replicheck.claim import Claim, ReportedResult, match_term
from replicheck.codebook import allow_for
from replicheck.errors import InputError
from replicheck.formula import Transform, rename_columns
from replicheck.io import Table, fill_down, numeric_column, resolve_column
from replicheck.io.columns import yes_no_coding
from replicheck.io.reshape import find_families, reshape_long
from replicheck.roles import Roles, Statement
from replicheck.structure.names import name_hint
from replicheck.structure.numbers import NumberReading, read_numbers
from replicheck.structure.terms import Term, drop_unreplicated, model_terms
from replicheck.trials import expand_trials


@dataclass(frozen=True, kw_only=True)
class Prepared:
    """The analysis table and what was decided in making it."""

    claim: Claim  # names as the data spell them; formula blocks stated; covariates added
    source: Table  # the table as read, filled down, reshaped, with transformed columns
    table: Table  # the same with a cbind() response's trials expanded, ignored columns dropped
    frame: pd.DataFrame  # the analysis rows (a response and every treatment value)
    terms: tuple[Term, ...]  # the model's terms (every one replicated)
    dropped: tuple[Term, ...]  # interactions without replication, left out
    reported: Mapping[str, ReportedResult]  # the reported results, by term
    numbers: tuple[NumberReading, ...]  # how each numeric model column was read
    slopes_on: frozenset[str]  # the numeric columns entering with one slope
    formula_blocks: tuple[str, ...]  # the formula's factors read as blocks
    exponent: int  # the response was multiplied by 2**-exponent (extreme scale)
    rescaled_columns: tuple[tuple[str, int], ...]  # numeric model columns likewise
    response_coding: tuple[str, str] | None  # text labels of a yes/no response read as 0 and 1
    trials: int | None  # a cbind() response: the yes/no trials the file rows hold


def prepare(table: Table, claim: Claim) -> Prepared:
    """The analysis table of ``table`` (as read) for ``claim`` (as stated); see the module."""
    table = _long(_filled(table, claim), claim)
    if claim.formula is not None and claim.formula.transforms:
        table = _transformed(table, claim.formula.transforms)
    c = _resolve(table, claim)
    source = table
    if c.formula is not None and c.formula.trials is not None:
        table = expand_trials(table, c.formula.trials)
    ignored = c.roles.columns("ignore")
    if ignored:
        table = replace(table, data=table.data.drop(columns=list(ignored)))
    formula_blocks: list[str] = []
    terms: list[Term] = []
    if c.formula is not None:
        terms, formula_blocks = _formula_terms(c, table.data)
        c = replace(
            c,
            treatments=tuple(f for f in c.treatments if f not in formula_blocks),
            roles=c.roles.added(
                Statement("block", (b,), "in the claimed formula") for b in formula_blocks
            ),
        )
    adjusted_for = _claimed_covariates(c, table.data) if c.formula is None else []
    c = replace(c, treatments=(*c.treatments, *adjusted_for))
    frame = _analysis_frame(table, c)
    frame, exponent = _rescaled(frame, c.response)
    rescaled_columns = []
    for col in dict.fromkeys([*c.treatments, *c.roles.columns("covariate")]):
        if col in frame.columns and pd.api.types.is_numeric_dtype(frame[col]):
            frame, e = _rescaled(frame, col)
            if e:
                rescaled_columns.append((col, e))
    allow_for(frame)
    if c.formula is None:
        plain = [f for f in c.treatments if f not in adjusted_for]
        terms = [*model_terms(frame, plain), *(Term(x, (x,)) for x in adjusted_for)]
        numbers = read_numbers(frame, adjusted_for, (), adjusted_for)
    else:
        numbers = read_numbers(
            frame,
            c.treatments,
            c.formula.categorical,
            c.roles.columns("covariate"),
            {
                k: float(r.df[0])
                for k, r in _reported_by_term(c, terms).items()
                if r.df and (r.test == "F" or r.test is None)
            },
            {col for s in c.formula.slopes for col in s.effects},
            {x for t in c.formula.transforms for x in (t.column, t.name)},
        )
    slopes_on = {r.column for r in numbers if r.slope}
    _check_parameters(frame, c.treatments, slopes_on)
    _check_size(frame, c, terms, slopes_on)
    categorical = [f for f in c.treatments if f not in slopes_on]
    with_numbers = [t for t in terms if any(f in slopes_on for f in t.factors)]
    kept, dropped = drop_unreplicated(
        frame, [t for t in terms if t not in with_numbers], categorical
    )
    terms = [t for t in terms if t in kept or t in with_numbers]
    return Prepared(
        claim=c,
        source=source,
        table=table,
        frame=frame,
        terms=tuple(terms),
        dropped=tuple(dropped),
        reported=_reported_by_term(c, terms),
        numbers=tuple(numbers),
        slopes_on=frozenset(slopes_on),
        formula_blocks=tuple(formula_blocks),
        exponent=exponent,
        rescaled_columns=tuple(rescaled_columns),
        response_coding=yes_no_coding(table.data[c.response]),
        trials=len(table.data) if _has_trials(c) else None,
    )


def _has_trials(claim: Claim) -> bool:
    return claim.formula is not None and claim.formula.trials is not None


def _filled(table: Table, c: Claim) -> Table:
    """The table with groupings written once per block filled down (never the response)."""
    reading = c.reading
    if not reading.fill_down and not reading.find_fill:
        return table  # (merged cells are filled while reading: a sheet shows them so)
    columns = table.columns
    protect = {
        col
        for col in columns
        if col == c.response or re.search(rf"(?<![\w.]){re.escape(col)}(?![\w.])", c.response)
    }
    protect |= {col for f in find_families(table.data) for col in f.columns}
    stated = tuple(resolve_column(columns, name, "fill-down") for name in reading.fill_down)
    data, filled = fill_down(table.data, protect=protect, stated=stated, detect=reading.find_fill)
    if not filled:
        return table
    merged = table.layout.filled  # filled from a sheet's merged cells while reading
    return replace(table, data=data, layout=replace(table.layout, filled=(*merged, *filled)))


def _long(table: Table, c: Claim) -> Table:
    """The table in long form when a wide family of columns holds the response."""
    reading = c.reading
    ids = tuple(resolve_column(table.columns, name, "identifier") for name in reading.ids)
    if ids and not reading.long and c.response in table.columns:
        raise InputError(
            f"an identifier column is given ({option('id')}) but no wide columns to reshape: "
            f"name them with {option('long')}"
        )
    data, done = reshape_long(table.data, response=c.response, patterns=reading.long, ids=ids)
    if not done:
        return table
    return replace(table, data=data, layout=replace(table.layout, reshaped=done))


def _resolve_statement(
    cols: Sequence[str], text: str, parts: tuple[str, ...], role: str
) -> tuple[str, ...]:
    """A stated role's columns as the data spell them: one column, or 'a:b' for several."""
    try:
        return (resolve_column(cols, text, role),)
    except InputError:
        if len(parts) < 2:
            raise
    return tuple(resolve_column(cols, part, role) for part in parts)


def _resolve(table: Table, claim: Claim) -> Claim:
    """Column names as the data spell them, in the response, treatments, formula and roles."""
    cols = table.columns
    response = resolve_column(cols, claim.response, "response")
    treatments = tuple(resolve_column(cols, t, "treatment") for t in claim.treatments)
    if len(set(treatments)) != len(treatments):
        raise InputError(f"the same column is named twice as a treatment: {', '.join(treatments)}")
    if response in treatments:
        raise InputError(f"column '{response}' cannot be both the response and a treatment")
    statements = []
    for st in claim.roles.statements:
        columns = _resolve_statement(cols, st.text, st.columns, st.role)
        in_model = len(columns) == 1 and columns[0] in treatments and st.role != "covariate"
        if response in columns or in_model:
            raise InputError(
                f"'{st.text}' cannot be a {st.role}: it is the response or a treatment column"
            )
        statements.append(replace(st, columns=columns))
    roles = Roles(tuple(statements))
    seen: dict[str, str] = {}
    for st in roles.statements:
        if len(st.columns) == 1:
            col = st.columns[0]
            if seen.get(col, st.role) != st.role:
                raise InputError(
                    f"column '{col}' is stated both as {seen[col]} and as {st.role}: give each "
                    "column one role"
                )
            seen[col] = st.role
    formula = claim.formula
    if formula is not None:
        mapping = {claim.response: response}
        mapping.update(dict(zip(claim.treatments, treatments, strict=True)))
        for g in formula.random:
            for col in g:
                if col not in mapping:
                    mapping[col] = resolve_column(cols, col, "random-effect grouping")
        if formula.trials is not None:
            mapping[formula.trials[1]] = resolve_column(cols, formula.trials[1], "cbind() column")
        for s in formula.slopes:
            for col in (*s.grouping, *s.effects):
                if col not in mapping:
                    mapping[col] = resolve_column(cols, col, "random-effect column")
        formula = rename_columns(formula, mapping)
    return replace(claim, response=response, treatments=treatments, roles=roles, formula=formula)


def _formula_terms(claim: Claim, frame: pd.DataFrame) -> tuple[list[Term], list[str]]:
    """Model terms of a formula, and the factors read as blocks rather than treatments.

    A factor of the formula is a block of the design (replicheck puts it in the
    random structure, and the claimed row-level model keeps it as a fixed
    effect) when it is stated as a block, when it is part of a stated unit
    together with another factor (``B`` in a stated whole plot ``B:V``), or
    when it enters only as a main effect, beside at least one other factor,
    and its name says block, place, unit or subject (not time: periods and
    days are usually fixed effects of a claimed model).
    """
    assert claim.formula is not None
    in_interaction = {f for t in claim.formula.terms if len(t) > 1 for f in t}
    stated_blocks = set(claim.roles.columns("block"))
    unit_parts = {
        f
        for s in claim.roles.units
        if len(s.columns) > 1
        for f in s.columns
        if any(g != f and g in claim.treatments for g in s.columns)
    }
    # a number the formula fits with a slope (a transform of one, or a quantity) is never
    # a block by its name
    quantities = {t.name for t in claim.formula.transforms} | {
        r.column
        for r in read_numbers(frame, [f for f in claim.treatments if f in frame.columns])
        if r.slope
    }
    named = {
        f
        for f in claim.treatments
        if f not in in_interaction
        and f not in quantities
        and name_hint(f).suggests_unit
        and name_hint(f).kind != "time"
        and len(claim.treatments) > 1
    }
    factors = set(claim.treatments)
    blocks = [
        f
        for f in claim.treatments
        if f in stated_blocks or (f in unit_parts and f not in in_interaction) or f in named
    ]
    if len(blocks) == len(factors):
        blocks = []
    terms = [
        Term(":".join(t), tuple(t)) for t in claim.formula.terms if not any(f in blocks for f in t)
    ]
    return terms, blocks


def _transformed(table: Table, transforms: Sequence[Transform]) -> Table:
    """The table with a column for each transformed term of the formula (``log(dose)``).

    The transform must be defined wherever the column has a value (a log of a
    dose of 0 is not): else one line saying where it is not.
    """
    data = table.data.copy()
    for t in transforms:
        if t.name in data.columns:
            continue
        x = numeric_column(table, t.column, "column").to_numpy(dtype=float)
        values = t.apply(x)
        bad = int(np.sum(np.isfinite(x) & ~np.isfinite(values)))
        if bad:
            raise InputError(
                f"{t.name} is undefined for {bad} rows of the data (e.g. a logarithm of 0 or "
                f"of a negative value): transform '{t.column}' in the file, e.g. log(x + 1)"
            )
        data[t.name] = values
    return replace(table, data=data)


def _claimed_covariates(claim: Claim, data: pd.DataFrame) -> list[str]:
    """The covariates of a claimed analysis of covariance given without a formula.

    When a reported result says the analysis was adjusted for covariates
    ("ANCOVA with baseline", "adjusted for body weight"), the stated
    covariates enter the model with one slope each, and so do numeric
    columns named as whole words in that text (not the response, a treatment
    or a stated grouping). Otherwise none: a stated covariate only keeps a
    column from being read as a grouping.
    """
    results = [r for r in (claim.reported, *(r for _, r in claim.reported_terms)) if r]
    adjusted = [r.text for r in results if r.adjusted]
    if not adjusted:
        return []
    taken = {claim.response, *claim.treatments}
    for role in ("unit", "block", "within", "ignore"):
        taken |= set(claim.roles.columns(role))
    out = [c for c in claim.roles.columns("covariate") if c not in taken]
    for col in data.columns:
        if col in taken or col in out or not pd.api.types.is_numeric_dtype(data[col]):
            continue
        word = re.compile(rf"(?<![\w.]){re.escape(str(col))}(?![\w.])", re.I)
        if any(word.search(t) for t in adjusted):
            out.append(col)
    return out


def _analysis_frame(table: Table, claim: Claim) -> pd.DataFrame:
    y = numeric_column(table, claim.response, "response")
    frame = table.data.copy()
    frame[claim.response] = y
    keep = frame[claim.response].notna()
    for t in claim.treatments:
        keep &= frame[t].notna()
    frame = frame[keep]
    if frame.empty:
        raise InputError("no row has both a response value and every treatment value")
    if frame[claim.response].nunique() < 2:
        raise InputError("response has the same value in every row; nothing to test")
    for col in dict.fromkeys([*claim.treatments, *claim.roles.columns("covariate")]):
        if col in frame.columns and pd.api.types.is_numeric_dtype(frame[col]):
            values = frame[col].to_numpy(dtype=float)
            bad = int(np.sum(np.isinf(values)))
            if bad:
                rows = "1 row" if bad == 1 else f"{bad} rows"
                raise InputError(
                    f"column '{col}' of the model has infinite values in {rows}: "
                    f"correct them or mark them missing ({option('na')})"
                )
    for t in claim.treatments:
        if frame[t].nunique() < 2:
            only = frame[t].iloc[0]
            raise InputError(
                f"treatment column '{t}' has a single level ({only!s}) among rows with a "
                f"response: nothing to compare"
            )
    return frame


EXTREME_EXPONENT = 300  # about 1e90 or 1e-90: squares and sums of squares would overflow


def _rescaled(frame: pd.DataFrame, response: str) -> tuple[pd.DataFrame, int]:
    """The frame with the response (or another numeric column) multiplied by an exact
    power of two when its spread is so large or so small that squares would overflow or
    vanish, and the exponent used.

    Tests, p-values and ICCs do not depend on the response's scale; the report says in
    which units its means and variances are then shown.
    """
    y = frame[response].to_numpy(dtype=float)
    present = y[np.isfinite(y)]
    spread = float(np.max(np.abs(present - np.median(present)))) if present.size else 0.0
    if spread == 0.0 or not np.isfinite(spread):
        return frame, 0
    exponent = int(np.floor(np.log2(spread)))
    if abs(exponent) < EXTREME_EXPONENT:
        return frame, 0
    frame = frame.copy()
    frame[response] = np.ldexp(y, -exponent)
    return frame, exponent


def _check_size(frame: pd.DataFrame, claim: Claim, terms: Sequence[Term], slopes: set[str]) -> None:
    """The claimed model within the limits: levels of each factor, fixed-effect parameters."""
    limits = claim.limits
    levels = {t: int(frame[t].nunique()) for t in claim.treatments if t not in slopes}
    for t, k in levels.items():
        if k > limits.levels:
            raise limits.exceeded("levels", f"treatment column '{t}' has {k:,} levels")
    params = 1
    for term in terms:
        size = 1
        for f in term.factors:
            size *= 1 if f in slopes else max(1, levels.get(f, 2) - 1)
        params += size
    if params > limits.parameters:
        raise limits.exceeded(
            "parameters", f"the claimed model has {params:,} fixed-effect parameters"
        )


def _check_parameters(frame: pd.DataFrame, treatments: Sequence[str], slopes: set[str]) -> None:
    """A residual must remain: one parameter per level of a factor, one per number."""
    params = 1 + sum(1 if t in slopes else int(frame[t].nunique()) - 1 for t in treatments)
    if len(frame) - params < 1:
        raise InputError(
            f"too few rows to test the treatments: {len(frame)} rows for {params} parameters"
        )


def _reported_by_term(claim: Claim, terms: Sequence[Term]) -> dict[str, ReportedResult]:
    """Reported results keyed by term name; an unprefixed result is the first term's."""
    out: dict[str, ReportedResult] = {}
    if claim.reported is not None:
        out[terms[0].name] = claim.reported
    for name, result in claim.reported_terms:
        factors = match_term(name, [t.factors for t in terms])
        key = next(t.name for t in terms if t.factors == factors)
        if key in out:
            raise InputError(f"two reported results are given for the term '{key}'")
        out[key] = result
    return out
