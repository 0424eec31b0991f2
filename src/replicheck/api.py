"""The audit: read -> claim -> structure -> clustering -> refit -> verdict -> report.

:func:`audit` is the one entry point used by the command line and by Python
callers. Each stage is a pure function of the previous stages' results.
"""

from __future__ import annotations

import os
import re
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd

from replicheck.advice import option
from replicheck.claim import (
    Claim,
    ReportedResult,
    build_claim,
    load_spec,
    match_term,
    spec_beside,
)
from replicheck.clustering import measure_clustering
from replicheck.codebook import allow_for, shared_codes
from replicheck.decisions import measured_term, shown_term
from replicheck.defaults import DEFAULT_SEED
from replicheck.display import display_data
from replicheck.errors import InputError
from replicheck.formula import Transform, rename_columns
from replicheck.io import (
    ReadOptions,
    Table,
    fill_down,
    numeric_column,
    read_table,
    resolve_column,
)
from replicheck.io.columns import yes_no_coding
from replicheck.io.reshape import find_families, reshape_long
from replicheck.numbers import format_number
from replicheck.partitions import group_means, same_partition, units_per_level
from replicheck.random_terms import judged_groupings, slope_terms
from replicheck.ranks import rank_tests
from replicheck.reconcile import Level, claimed_model_level, reconcile
from replicheck.refit import Analysis, TermInput, design_matrix, refit, within_block_tests
from replicheck.report.model import Report
from replicheck.roles import Roles, Statement
from replicheck.slopes import omitted_slopes
from replicheck.stats.discrete import ResponseKind
from replicheck.stats.power import DesignNeeds, design_needs, stated_effect_means
from replicheck.structure.hidden import HiddenScan, derived_column, scan_hidden
from replicheck.structure.names import name_hint
from replicheck.structure.numbers import NumberReading, read_numbers, slope_units
from replicheck.structure.relations import codes_of, group_codes
from replicheck.structure.terms import Term, drop_unreplicated, interaction_levels, model_terms
from replicheck.structure.units import (
    Structure,
    UnitChoice,
    complete_codes,
    infer_structure,
    unit_codes,
)
from replicheck.trials import claimed_kind, expand_trials
from replicheck.verdict import AlternativeEvidence, Evidence, TermEvidence, decide


def make_claim(
    source: str | os.PathLike[str] | pd.DataFrame,
    *,
    response: str | None = None,
    treatment: str | Sequence[str] = (),
    unit: str | Sequence[str] | None = None,
    claim: str | Sequence[str] | None = None,
    alpha: float | None = None,
    na: Sequence[str] = (),
    sheet: str | Sequence[str] | None = None,
    spec: str | os.PathLike[str] | Mapping[str, object] | None = None,
    find_spec: bool = True,
    formula: str | None = None,
    roles: Mapping[str, object] | None = None,
    unit_labels: str | None = None,
    family: str | None = None,
    limits: Sequence[str] | Mapping[str, object] | None = None,
    reading: ReadOptions | None = None,
) -> Claim:
    """Build the claim from options, an explicit spec, or the spec found beside the data file."""
    spec_data: Mapping[str, object] | None = None
    spec_path: str | None = None
    if isinstance(spec, Mapping):
        spec_data = spec
    elif spec is not None:
        spec_path = os.fspath(spec)
        spec_data = load_spec(spec_path)
    elif find_spec and not isinstance(source, pd.DataFrame):
        found = spec_beside(source)
        if found is not None:
            spec_path = str(found)
            spec_data = load_spec(found)
    treatments = (treatment,) if isinstance(treatment, str) else tuple(treatment)
    return build_claim(
        response=response,
        treatments=treatments,
        unit=unit,
        claim_text=claim if isinstance(claim, str) else None,
        claim_texts=() if claim is None or isinstance(claim, str) else tuple(claim),
        formula=formula,
        alpha=alpha,
        na_values=tuple(str(v) for v in na),
        sheet=sheet,
        spec=spec_data,
        spec_path=spec_path,
        roles=roles,
        unit_labels=unit_labels,
        family=family,
        limits=limits,
        reading=reading,
    )


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


def _unit_columns(structure: Structure, terms: Sequence[Term], frame: pd.DataFrame) -> list[str]:
    """The recorded columns that identify the experimental units of the terms."""
    out: list[str] = []
    for t in terms:
        choice = structure.unit_of(t.name)
        if choice.unit is None or choice.relation == "confounded":
            continue
        out += [col for col in choice.columns if col in frame.columns and col not in out]
    return [col for col in out if col not in {t.name for t in terms}]


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


def _levels(
    n: int,
    term: TermInput,
    n_params: int,
    choice: UnitChoice,
    structure: Structure,
    single: bool,
    unit_analyses: Sequence[Analysis],
) -> list[Level]:
    """Levels at which a term could have been analysed, rows first.

    A number entering with one slope removes two parameters at a level (the
    intercept and the slope); a factor removes one per group.
    """
    k = len(term.labels)
    used = term.degree + 1 if term.numeric else k
    groups = (
        "an intercept and a slope"
        if term.numeric and term.degree == 1
        else f"an intercept and {term.degree} polynomial coefficients"
        if term.numeric
        else f"{k} groups"
    )
    rows_removed = groups if single else f"{n_params} model parameters"
    levels = [Level("rows", "rows", n, n - n_params, rows_removed, tuple(np.bincount(term.codes)))]
    if term.unit is not None and choice.unit is not None:
        per = tuple(int(c) for c in units_per_level(term.unit, term.codes, k))
        levels.append(
            Level(choice.unit, "units", choice.n_units, choice.n_units - used, groups, per)
        )
        for a in unit_analyses:
            if a.df is not None and abs(a.df[1] - (choice.n_units - k)) > 0.5:
                removed = (
                    f"{format_number(choice.n_units - a.df[1])} parameters of the "
                    f"{choice.unit} level"
                )
                levels.append(Level(choice.unit, "units", choice.n_units, a.df[1], removed, per))
    seen = {lv.name for lv in levels}
    for cand in structure.candidates:
        if cand.treatment == term.term and cand.name not in seen:
            seen.add(cand.name)
            levels.append(Level(cand.name, "other", cand.n_units, cand.n_units - used, groups))
    return levels


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


def audit(
    data: str | os.PathLike[str] | pd.DataFrame,
    *,
    response: str | None = None,
    treatment: str | Sequence[str] = (),
    unit: str | Sequence[str] | None = None,
    claim: str | Sequence[str] | None = None,
    alpha: float | None = None,
    na: Sequence[str] = (),
    sheet: str | Sequence[str] | None = None,
    spec: str | os.PathLike[str] | Mapping[str, object] | None = None,
    find_spec: bool = True,
    unit_labels: str | None = None,
    formula: str | None = None,
    block: str | Sequence[str] | None = None,
    within: str | Sequence[str] | None = None,
    covariate: str | Sequence[str] | None = None,
    ignore: str | Sequence[str] | None = None,
    roles: Mapping[str, object] | None = None,
    seed: int = DEFAULT_SEED,
    power: float = 0.8,
    effect: float | None = None,
    hidden: bool = True,
    dayfirst: bool | None = None,
    order: str | None = None,
    progress: Callable[[int, int], None] | None = None,
    stage: Callable[[str], None] | None = None,
    name: str | None = None,
    family: str | None = None,
    limits: Sequence[str] | Mapping[str, object] | None = None,
    header_row: int | None = None,
    cell_range: str | None = None,
    fill_down: str | Sequence[str] | bool | None = None,
    find_fill: bool = True,
    long: str | Sequence[str] = (),
    ids: str | Sequence[str] = (),
) -> Report:
    """Audit one dataset against its claimed analysis.

    Parameters
    ----------
    data:
        A path (CSV/TSV/text, .xlsx, Parquet) or a DataFrame. Never written to.
    response, treatment:
        Column names (matched exactly, else case- and space-insensitively when
        that is unambiguous). ``treatment`` may be a list.
    unit, block, within, covariate, ignore:
        Stated roles of columns (one name or a list; see
        :data:`replicheck.roles.ROLE_FIELDS`): the experimental unit (several for
        several levels; ``"a:b"`` for an implicit grouping such as block x
        variety), blocks, within-unit factors (times, periods), covariates, and
        columns to leave out. A stated role is always used; where the data
        disagree the report says so with the evidence and shows the analysis
        replicheck would choose beside it.
    roles:
        The same statements as a mapping of role to names (as the command line
        passes them); keyword arguments above win for their role.
    claim:
        The reported result, e.g. ``"F(2, 57) = 8.31, p = .001"``, or several,
        each prefixed with its term: ``["variety: F(2, 10) = 1.49, p = .27"]``.
    alpha:
        Significance level (default 0.05).
    na:
        Extra missing-value codes, e.g. ``["-99"]``.
    spec:
        A TOML spec file or a mapping with the same keys; by default a spec
        named ``NAME.replicheck.toml`` beside the data file is used.
    formula:
        A model formula such as ``"yield ~ variety * nitro + block"``, instead of
        ``response`` and ``treatment``; main-effect factors named like blocks,
        places or subjects (block, bench, plate, subject, ...) are taken as
        blocks of the design; times (day, period) stay terms.
    seed:
        Seed of the Monte Carlo randomisation test (used only when the design
        allows more than 100,000 assignments); the same seed gives the same report.
    power, effect:
        Target power of the "what a valid design would need" figures, and the
        difference between two level means (in the response's units) to detect;
        by default the observed differences between the level means.
    hidden, dayfirst, order:
        Whether to look for groupings that no column names (sessions in time
        stamps, zones in coordinates, runs in the row order, tokens of sample
        codes, covariates constant within unrecorded units); how to read
        ambiguous dates (day first or month first; by default the reading that
        fits every value, month first when both do); a column giving the order
        in which samples were processed (default: detected, else file order).
    name:
        How the report names a DataFrame's source (default ``<dataframe>``);
        a file is always named by its path.
    progress:
        Called as ``progress(done, total)`` while a file is read (bytes hashed
        and parsed; ``total`` is twice the file size), e.g. to drive a progress bar.
    stage:
        Called with the name of each stage as it starts (``claim``, ``read``,
        ``hidden``, ``structure``, ``refit``, ``clustering``, ``report data``),
        e.g. to say what a long audit is doing.
    unit_labels:
        ``auto``, ``local`` (labels such as "tank 1" are numbered afresh within
        each treatment level) or ``global`` (labels name the same unit
        everywhere); by default the spec's ``unit_labels``, else ``auto``.
    sheet, find_spec:
        The sheet of a workbook (.xlsx, .xls, .ods) by name or number; ``"all"``
        or a list of names to stack the sheets with the same columns, each
        row's sheet in a new column ``sheet`` (by default the one sheet that
        holds a table, or the one with the treatment columns); whether to use a
        spec file found
        beside the data file.
    family:
        ``binomial`` or ``poisson`` when the claimed analysis is a logistic or
        Poisson regression (by default the spec's; a formula response
        ``cbind(successes, failures)`` implies binomial, and its rows are read
        as that many yes/no trials, the file row becoming a grouping).
    limits:
        Limits on the work of the audit, as ``KEY=N`` texts or a mapping
        (``{"columns": 20000}``): see :class:`replicheck.limits.Limits`. They
        replace the spec's limits of the same keys.
    header_row, cell_range:
        Where the table is in a text file or sheet: the row of its column names
        (counting from 1) or its cells (``"A3:F130"``). By default the reader
        finds it, skipping titles and notes above the header, a units row under
        it and footnotes below the data; the report's "what was read" section
        says what it did.
    fill_down:
        Columns to fill down (each empty cell takes the value above it), as a
        name or a list; ``False`` turns off the search for grouping columns
        written once per block, ``None`` (default) leaves it on. The response
        is never filled.
    find_fill:
        ``False`` turns off the search while filling the columns ``fill_down`` names.
    long, ids:
        Patterns (``"day*"``) of wide columns holding one measurement repeated
        over replicates, times or units, to turn into long form, and the
        columns that identify a wide row. By default a wide family is reshaped
        when the response is not a column of the table (see
        :mod:`replicheck.io.reshape`).

    Returns
    -------
    Report
        With ``status``, ``to_dict()``, ``to_json()``, ``to_text()``,
        ``to_markdown()`` and ``to_html()``. Advice in them names options as
        keyword arguments of this function (``unit='tank'``); each takes
        ``syntax="cli"`` to name them as the command line does (``--unit tank``).

    Raises
    ------
    InputError
        Bad input, with a one-line message (``str(err)``; ``err.render("cli")``
        for the command line's spelling of the options it names).

    Examples
    --------
    >>> import pandas as pd
    >>> df = pd.DataFrame({"y": [1.0, 1.2, 2.1, 2.3, 3.0, 3.1, 4.2, 4.0],
    ...                    "feed": list("AAAABBBB"), "tank": [1, 1, 2, 2, 3, 3, 4, 4]})
    >>> audit(df, response="y", treatment="feed").status
    'pseudoreplicated'
    """
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        raise InputError(f"the seed must be a whole number of 0 or more, got {seed!r}")
    if isinstance(power, bool) or not 0 < power < 1:
        raise InputError(f"power must be a number between 0 and 1 (exclusive), got {power!r}")
    if effect is not None and not (np.isfinite(effect) and effect > 0):
        raise InputError(f"the effect to detect must be a positive number, got {effect!r}")
    with shared_codes():  # each column coded once for every stage
        clock = _Stopwatch(stage)
        given = dict(roles or {})
        for key, value in (
            ("unit", unit),
            ("block", block),
            ("within", within),
            ("covariate", covariate),
            ("ignore", ignore),
        ):
            if value is not None:
                given[key] = value
        fill_names: tuple[str, ...] = ()
        if isinstance(fill_down, str):
            fill_names = (fill_down,)
        elif fill_down is not None and not isinstance(fill_down, bool):
            fill_names = tuple(str(v) for v in fill_down)
        c = make_claim(
            data,
            reading=ReadOptions(
                header_row,
                cell_range,
                fill_names,
                find_fill and fill_down is not False,
                (long,) if isinstance(long, str) else tuple(long),
                (ids,) if isinstance(ids, str) else tuple(ids),
            ),
            response=response,
            treatment=treatment,
            claim=claim,
            alpha=alpha,
            na=na,
            sheet=sheet,
            spec=spec,
            find_spec=find_spec,
            formula=formula,
            roles=given,
            unit_labels=unit_labels,
            family=family,
            limits=limits,
        )
        clock.lap("claim")
        table = read_table(
            data if isinstance(data, pd.DataFrame) else Path(data),
            sheet=c.sheet,
            na_values=c.na_values,
            progress=progress,
            limits=c.limits,
            header_row=c.reading.header_row,
            cell_range=c.reading.cell_range,
            needed=c.treatments,
        )
        if name is not None and isinstance(data, pd.DataFrame):
            table = replace(table, source=str(name))
        table = _long(_filled(table, c), c)
        if c.formula is not None and c.formula.transforms:
            table = _transformed(table, c.formula.transforms)
        c = _resolve(table, c)
        source_table = table
        if c.formula is not None and c.formula.trials is not None:
            table = expand_trials(table, c.formula.trials)
        ignored = c.roles.columns("ignore")
        if ignored:
            table = replace(table, data=table.data.drop(columns=list(ignored)))
        formula_blocks: list[str] = []
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
        numbers: tuple[NumberReading, ...] = ()
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
        reported = _reported_by_term(c, terms)
        interactions = [t.name for t in terms if t.is_interaction]
        clock.lap("read")
        hidden_scan = HiddenScan()
        if hidden:
            order_col = None if order is None else resolve_column(table.columns, order, "order")
            hidden_scan = scan_hidden(
                frame,
                c.response,
                c.treatments,
                seed=seed,
                dayfirst=dayfirst,
                order=order_col,
            )
            for g in hidden_scan.derived:
                frame[g.name] = derived_column(g, frame.index)
        for t in terms:
            if t.is_interaction:
                frame[t.name] = interaction_levels(frame, t.factors)
        clock.lap("hidden")

        def read_structure(frame: pd.DataFrame) -> Structure:
            return infer_structure(
                frame,
                c.response,
                [t.name for t in terms],
                exclude=c.treatments,
                interactions=interactions,
                roles=c.roles,
                unit_labels=c.unit_labels or "auto",
                derived_columns=[g.name for g in hidden_scan.derived],
                file_order=[g.name for g in hidden_scan.derived if g.name.endswith("[file order]")],
            )

        structure = slope_units(read_structure(frame), frame, slopes_on)
        # rows whose experimental unit is not recorded cannot be placed among the
        # replicates: they leave the audit, and the design is read again without them
        unit_columns = _unit_columns(structure, terms, frame)
        no_unit = frame[unit_columns].isna().any(axis=1) if unit_columns else None
        rows_without_unit = 0
        if no_unit is not None and no_unit.any() and not no_unit.all():
            rows_without_unit = int(no_unit.sum())
            frame = frame[~no_unit.to_numpy()]
            structure = slope_units(read_structure(frame), frame, slopes_on)
        y = frame[c.response].to_numpy(dtype=float)
        inputs: list[TermInput] = []
        for t in terms:
            choice = structure.unit_of(t.name)
            codes, labels = codes_of(frame[t.name])
            confounded = choice.relation == "confounded"
            units = (
                unit_codes(frame, choice) if choice.unit is not None and not confounded else None
            )
            values = frame[t.name].to_numpy(dtype=float) if t.name in slopes_on else None
            degree = next(
                (
                    int(tr.power)
                    for tr in (c.formula.transforms if c.formula is not None else ())
                    if tr.name == t.name and tr.function == "poly"
                ),
                1,
            )
            inputs.append(
                TermInput(
                    term=t.name,
                    factors=t.factors,
                    codes=codes,
                    labels=labels,
                    unit=units,
                    unit_name=choice.unit,
                    confounded=confounded,
                    values=values,
                    degree=degree,
                )
            )
        strata = {
            s.name: complete_codes(group_codes(frame, s.columns))
            for s in structure.strata
            if s.kind != "rows"
        }
        blocks = {
            s.name: strata[s.name]
            for s in structure.strata
            if s.kind == "block" and s.name in strata
        }
        fixed_blocks = [complete_codes(group_codes(frame, (b,))) for b in formula_blocks]
        kind = claimed_kind(y, c.family, c.response)
        coding = yes_no_coding(table.data[c.response])
        first_claim = reported.get(terms[0].name)
        row_chi2 = None if first_claim is None else first_claim.test in (None, "chi2", "z")
        clock.lap("structure")
        claimed_random = {  # -1 marks a missing value: those rows leave the claimed model
            ":".join(g): group_codes(frame, g)
            for g in (c.formula.random if c.formula is not None else ())
        }
        claimed_slopes = (
            slope_terms(frame, c.formula, slopes_on, c.treatments) if c.formula is not None else []
        )
        judged = (
            judged_groupings(frame, c.formula.slopes, claimed_random)
            if c.formula is not None
            else claimed_random
        )
        fits = refit(
            y,
            inputs,
            strata,
            blocks,
            fixed_blocks,
            seed,
            kind,
            row_chi2,
            claimed_random,
            c.family,
            claimed_slopes,
            c.limits.crossed_levels,
        )
        alternatives = _refit_alternatives(
            frame, y, structure, inputs, strata, blocks, fixed_blocks, seed, kind, row_chi2
        )
        clock.lap("refit")
        single = len(terms) == 1 and not fixed_blocks
        X, index, _ = design_matrix(inputs, "treatment" if single else "sum")
        for b in fixed_blocks:
            X = np.hstack([X, np.eye(int(b.max()) + 1)[b]])
        n_params = int(np.linalg.matrix_rank(X))
        evidence_terms: list[TermEvidence] = []
        in_blocks = within_block_tests(y, inputs, blocks) if reported else {}
        slopes = omitted_slopes(y, inputs, judged, fixed_blocks) if judged else {}
        for i, ti in enumerate(inputs):
            tr = fits.term(ti.term)
            clustering = None
            per_level: dict[str, int] = {}
            if ti.unit is not None and ti.unit_name is not None:
                v = tr.unit_variance
                reml = (v.var_unit, v.var_residual) if v is not None and v.converged else None
                clustering = measure_clustering(
                    y, ti.unit, ti.codes, ti.labels, ti.unit_name, reml, kind=kind
                )
                counts = units_per_level(ti.unit, ti.codes, len(ti.labels))
                for k, label in enumerate(ti.labels):
                    per_level[label] = int(counts[k])
            rec = None
            if ti.term in reported:
                as_claimed = tr.get("as_claimed")
                assert as_claimed is not None
                unit_level = [
                    a for a in tr.analyses if a.level == "units" and a.p_value is not None
                ]
                levels = _levels(
                    len(frame),
                    ti,
                    n_params,
                    structure.unit_of(ti.term),
                    structure,
                    single,
                    unit_level,
                )
                rec = reconcile(
                    reported[ti.term],
                    c.alpha,
                    levels,
                    as_claimed,
                    len(index[ti.term]),
                    unit_level,
                    [
                        *tr.analyses,
                        *([in_blocks[ti.term]] if ti.term in in_blocks else []),
                        *(rank_tests(y, ti, blocks) if reported[ti.term].method else []),
                    ],
                )
            if judged:
                completed = {k: complete_codes(v) for k, v in judged.items()}
                rec = claimed_model_level(ti, completed, rec, tr.get("as_claimed"), c.alpha)
            evidence_terms.append(
                TermEvidence(
                    term=ti.term,
                    factors=ti.factors,
                    unit=structure.unit_of(ti.term),
                    clustering=clustering,
                    refit=tr,
                    units_per_level=per_level,
                    claimed=i == 0,
                    reconciliation=rec,
                    alternatives=tuple(alternatives.get(ti.term, ())),
                    slope=slopes.get(ti.term),
                    numeric=ti.numeric,
                )
            )
        primary = evidence_terms[shown_term([t.reconciliation is not None for t in evidence_terms])]
        first_claimed = primary.analysis("as_claimed")
        assert first_claimed is not None
        overall = primary.reconciliation or reconcile(
            None, c.alpha, [], first_claimed, len(index[primary.term])
        )
        evidence = Evidence(
            claim=c,
            n_rows_read=source_table.n_rows,
            trials=len(table.data) if table is not source_table else None,
            n_rows_used=len(frame),
            rows_without_unit=rows_without_unit,
            unit_columns=tuple(unit_columns) if rows_without_unit else (),
            structure=structure,
            terms=tuple(evidence_terms),
            reconciliation=overall,
            formula_blocks=tuple(formula_blocks),
            unreplicated=tuple(t.name for t in dropped),
            response_kind=kind,
            response_coding=coding,
            hidden=hidden_scan,
            numbers=numbers,
            response_exponent=exponent,
            rescaled_columns=tuple(rescaled_columns),
            claimed_groupings=tuple(
                (name, int(np.unique(codes[codes >= 0]).size), int((codes >= 0).sum()))
                for name, codes in claimed_random.items()
            ),
        )
        clock.lap("clustering")
        verdict = decide(evidence)
        needs = _needs(inputs, evidence, y, c, power, effect)
        shown = inputs[evidence_terms.index(primary)]
        display = display_data(
            frame,
            shown.term,
            y,
            shown.codes,
            shown.labels,
            primary.unit.columns,
            shown.unit,
            shown.unit_name or primary.unit.unit,
            shown.confounded,
        )
        clock.lap("report data")
        return Report(
            source_table, len(frame), c, evidence, fits, verdict, needs, display, clock.seconds()
        )


def _refit_alternatives(
    frame: pd.DataFrame,
    y: np.ndarray,
    structure: Structure,
    inputs: Sequence[TermInput],
    strata: Mapping[str, np.ndarray],
    blocks: Mapping[str, np.ndarray],
    fixed_blocks: Sequence[np.ndarray],
    seed: int,
    kind: ResponseKind,
    row_chi2: bool | None,
) -> dict[str, list[AlternativeEvidence]]:
    """Each alternative reading of a term's unit, refitted with that unit in its place."""
    out: dict[str, list[AlternativeEvidence]] = {}
    for alt in structure.alternatives:
        at = next((i for i, t in enumerate(inputs) if t.term == alt.term), None)
        if at is None:
            continue
        ti = inputs[at]
        choice = alt.choice
        confounded = choice.relation == "confounded"
        codes = unit_codes(frame, choice) if choice.unit is not None and not confounded else None
        new = replace(ti, unit=codes, unit_name=choice.unit, confounded=confounded)
        others = [t for t in inputs if t.term != ti.term and t.unit is not None]
        kept = {
            name: c
            for name, c in strata.items()
            if ti.unit is None
            or not same_partition(c, ti.unit)
            or any(same_partition(c, o.unit) for o in others if o.unit is not None)
        }
        if codes is not None and int(codes.max()) + 1 < len(frame) and choice.unit is not None:
            kept[choice.unit] = codes
        term_inputs = [new if i == at else t for i, t in enumerate(inputs)]
        fit = refit(y, term_inputs, kept, blocks, fixed_blocks, seed, kind, row_chi2)
        out.setdefault(ti.term, []).append(AlternativeEvidence(alt, fit.term(ti.term)))
    return out


STAGES = ("claim", "read", "hidden", "structure", "refit", "clustering", "report data")


class _Stopwatch:
    """Seconds spent in each stage of one audit (for benchmarks; not in the report).

    ``begin`` (if given) is called with the name of each stage of :data:`STAGES`
    as it starts.
    """

    def __init__(self, begin: Callable[[str], None] | None = None) -> None:
        self._begin = begin
        self._last = time.perf_counter()
        self._laps: dict[str, float] = {}
        if begin is not None:
            begin(STAGES[0])

    def lap(self, stage: str) -> None:
        now = time.perf_counter()
        self._laps[stage] = self._laps.get(stage, 0.0) + now - self._last
        self._last = now
        following = STAGES.index(stage) + 1
        if self._begin is not None and following < len(STAGES):
            self._begin(STAGES[following])

    def seconds(self) -> dict[str, float]:
        return dict(self._laps)


def _needs(
    inputs: Sequence[TermInput],
    evidence: Evidence,
    y: np.ndarray,
    claim: Claim,
    power: float,
    effect: float | None,
) -> DesignNeeds | None:
    """Units per level a design would need to detect the observed effect (or ``effect``,
    a difference between two level means) of the first term with a replicated unit."""
    at = measured_term([te.clustering is not None for te in evidence.terms])
    for ti, te in list(zip(inputs, evidence.terms, strict=True))[at:]:
        cl = te.clustering
        if cl is None or ti.unit is None:
            continue
        means, _ = group_means(ti.unit, y)
        level = np.zeros(means.size, dtype=np.int64)
        level[ti.unit] = ti.codes
        k = len(ti.labels)
        if effect is None:
            level_means = [float(means[level == j].mean()) for j in range(k)]
        else:
            level_means = stated_effect_means(effect, k)
        needs = design_needs(
            level_means,
            cl.var_unit,
            cl.var_residual,
            cl.mean_unit_size,
            alpha=claim.alpha,
            power=power,
        )
        return needs if effect is None else replace(needs, effect_kind="stated", difference=effect)
    return None
