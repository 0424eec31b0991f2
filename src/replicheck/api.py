"""The audit: the stages of :func:`audit`, in the order they run.

Each stage is a pure function of earlier stages' results (the input is never
changed); each gives a frozen result object:

1. **claim** (:func:`make_claim`): the options, a spec (given, or found beside
   the data file) and the reported results -> :class:`replicheck.claim.Claim`.
2. **read** (:func:`replicheck.io.read_table`, then
   :func:`replicheck.prepare.prepare`): the file or DataFrame -> a ``Table`` as
   read -> :class:`replicheck.prepare.Prepared`: the analysis rows, the model's
   terms, the claim with its names as the data spell them.
3. **hidden** (:func:`replicheck.structure.hidden.scan_hidden`): the analysis
   rows -> ``HiddenScan``, the groupings no column names.
4. **structure** (:func:`replicheck.structure.stage.read_design`): rows, terms,
   stated roles and hidden groupings -> ``DesignReading``: the unit of every
   term, alternative readings, strata, the rows with a recorded unit.
5. **refit** (:func:`replicheck.refit_stage.refit_design`): rows, terms and
   units -> ``RefitStage``: every analysis of every term, also with each
   alternative unit, and a claimed mixed model's omitted random slopes.
6. **clustering** (:func:`replicheck.clustering.cluster_terms`): the units and
   the refit's REML components -> ``TermClustering`` per term (ICC, design
   effect, effective n).
7. **reconcile** (:func:`replicheck.reconcile.reconcile_terms`): the reported
   results and the refit's analyses -> ``Reconciled``: the analysis and level
   each reported result reproduces.
8. **verdict** (:func:`replicheck.verdict.decide`): all of the above as
   ``Evidence`` -> ``Verdict``: the findings of the registered rules, status.
9. **report data** (:func:`replicheck.decisions.key_term`,
   :func:`replicheck.needs.needs_of`, :func:`replicheck.display.display_data`):
   the design needs of the key term and the picture's data, then the
   :class:`replicheck.report.model.Report`.

Where new work goes: a column role is stated in :mod:`replicheck.roles` and
read by the structure stage; a claim syntax is parsed in :mod:`replicheck.claim`;
a rule is registered in :mod:`replicheck.verdict` (and documented in
docs/rules.md); a decision several stages need goes in :mod:`replicheck.decisions`.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import replace
from pathlib import Path

import pandas as pd

from replicheck.claim import Claim, build_claim, load_spec, spec_beside
from replicheck.clustering import TermClustering, cluster_terms
from replicheck.codebook import shared_codes
from replicheck.decisions import key_term, shown_term
from replicheck.display import Display, display_data
from replicheck.errors import InputError
from replicheck.io import ReadOptions, read_table, resolve_column
from replicheck.needs import needs_of
from replicheck.prepare import Prepared, prepare
from replicheck.reconcile import Reconciled, reconcile_terms
from replicheck.refit_stage import RefitStage, refit_design
from replicheck.report.model import Report
from replicheck.structure.hidden import HiddenScan, scan_hidden
from replicheck.structure.stage import DesignReading, read_design
from replicheck.verdict import Evidence, TermEvidence, decide


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
    options: Mapping[str, object] | None = None,
) -> Claim:
    """Build the claim from options, an explicit spec, or the spec found beside the data
    file; every stated role and setting is checked here, before any data are read."""
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
        options=options,
    )


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
    seed: int | None = None,
    power: float | None = None,
    effect: float | None = None,
    hidden: bool | None = None,
    dayfirst: bool | None = None,
    order: str | None = None,
    options: Mapping[str, object] | None = None,
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
        Seed of the random steps (the Monte Carlo randomisation test, used only
        when the design allows more than 100,000 assignments, and the wild
        cluster bootstrap); the same seed gives the same report (default
        :data:`replicheck.defaults.DEFAULT_SEED`).
    power, effect:
        Target power of the "what a valid design would need" figures (default
        0.8), and the difference between two level means (in the response's
        units) to detect; by default the observed differences between the level
        means.
    hidden, dayfirst, order:
        Whether to look for groupings that no column names (sessions in time
        stamps, zones in coordinates, runs in the row order, tokens of sample
        codes, covariates constant within unrecorded units; default True); how
        to read ambiguous dates (``True`` day first, ``False`` month first; by
        default the reading that fits every value, month first when both do);
        a column giving the order in which samples were processed (default:
        detected, else file order).
    options:
        The settings above as a mapping of the keys of
        :data:`replicheck.options.OPTION_FIELDS` (``alpha``, ``seed``, ``power``,
        ``effect``, ``hidden``, ``dates``, ``order``; as the command line passes
        them); keyword arguments above win for their setting. A spec's values
        fill the settings given by neither, and the report records where each
        value came from (``claim.settings`` in the JSON). Every setting is
        checked before any data are read.
    name:
        How the report names a DataFrame's source (default ``<dataframe>``);
        a file is always named by its path.
    progress:
        Called as ``progress(done, total)`` while a file is read (bytes hashed
        and parsed; ``total`` is twice the file size), e.g. to drive a progress bar.
    stage:
        Called with the name of each stage as it starts (``claim``, ``read``,
        ``hidden``, ``structure``, ``refit``, ``clustering``, ``reconcile``,
        ``verdict``, ``report data``: :data:`STAGES`, in the order they run),
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
    with shared_codes():  # each column coded once for every stage
        clock = _Stopwatch(stage)
        stated = make_claim(
            data,
            reading=_reading(header_row, cell_range, fill_down, find_fill, long, ids),
            response=response,
            treatment=treatment,
            claim=claim,
            na=na,
            sheet=sheet,
            spec=spec,
            find_spec=find_spec,
            formula=formula,
            roles=_given(
                roles, unit=unit, block=block, within=within, covariate=covariate, ignore=ignore
            ),
            unit_labels=unit_labels,
            family=family,
            limits=limits,
            options=_given(
                options,
                alpha=alpha,
                seed=seed,
                power=power,
                effect=effect,
                hidden=hidden,
                dates=_dates(dayfirst),
                order=order,
            ),
        )
        settings = stated.options
        clock.lap("claim")
        table = read_table(
            data if isinstance(data, pd.DataFrame) else Path(data),
            sheet=stated.sheet,
            na_values=stated.na_values,
            progress=progress,
            limits=stated.limits,
            header_row=stated.reading.header_row,
            cell_range=stated.reading.cell_range,
            needed=stated.treatments,
        )
        if name is not None and isinstance(data, pd.DataFrame):
            table = replace(table, source=str(name))
        prepared = prepare(table, stated)
        c = prepared.claim
        clock.lap("read")
        scan = HiddenScan()
        if settings.hidden:
            order_of = settings.order
            at = (
                None
                if order_of is None
                else resolve_column(prepared.table.columns, order_of, "order")
            )
            scan = scan_hidden(
                prepared.frame,
                c.response,
                c.treatments,
                seed=settings.seed,
                dayfirst=settings.dayfirst,
                order=at,
            )
        clock.lap("hidden")
        design = read_design(prepared.frame, c, prepared.terms, prepared.slopes_on, scan)
        clock.lap("structure")
        fitted = refit_design(prepared, design, settings.seed)
        clock.lap("refit")
        clusters = cluster_terms(fitted.y, fitted.inputs, fitted.fits, fitted.kind)
        clock.lap("clustering")
        reconciled = reconcile_terms(
            fitted.y,
            fitted.inputs,
            fitted.fits,
            design.structure,
            prepared.reported,
            c.alpha,
            fitted.blocks,
            fitted.fixed_blocks,
            fitted.judged,
        )
        clock.lap("reconcile")
        evidence = _evidence(prepared, scan, design, fitted, clusters, reconciled)
        verdict = decide(evidence)
        clock.lap("verdict")
        key = key_term(
            [tv.status for tv in verdict.terms],
            verdict.status,
            [te.clustering is not None for te in evidence.terms],
        )
        needs = needs_of(
            fitted.y,
            fitted.inputs[key],
            evidence.terms[key].clustering,
            alpha=c.alpha,
            power=settings.power,
            effect=settings.effect,
        )
        display = _display(design, fitted, evidence)
        clock.lap("report data")
        return Report(
            table=prepared.source,
            n_rows_used=len(design.frame),
            claim=c,
            evidence=evidence,
            refit=fitted.fits,
            verdict=verdict,
            design_needs=needs,
            display=display,
            key_term=key,
            seconds=clock.seconds(),
        )


def _given(mapping: Mapping[str, object] | None, **named: object) -> dict[str, object]:
    """Stated values: the mapping, with each value given as a keyword in its place."""
    out = dict(mapping or {})
    out.update({key: value for key, value in named.items() if value is not None})
    return out


def _dates(dayfirst: object) -> str | None:
    """``dayfirst`` as the ``dates`` setting (None: not given)."""
    if dayfirst is None:
        return None
    if not isinstance(dayfirst, bool):
        raise InputError(f"dayfirst must be True, False or None, got {dayfirst!r}")
    return "day-first" if dayfirst else "month-first"


def _reading(
    header_row: int | None,
    cell_range: str | None,
    fill_down: str | Sequence[str] | bool | None,
    find_fill: bool,
    long: str | Sequence[str],
    ids: str | Sequence[str],
) -> ReadOptions:
    """Where the table is and how to read it, from audit()'s arguments."""
    fill_names: tuple[str, ...] = ()
    if isinstance(fill_down, str):
        fill_names = (fill_down,)
    elif fill_down is not None and not isinstance(fill_down, bool):
        fill_names = tuple(str(v) for v in fill_down)
    return ReadOptions(
        header_row,
        cell_range,
        fill_names,
        find_fill and fill_down is not False,
        (long,) if isinstance(long, str) else tuple(long),
        (ids,) if isinstance(ids, str) else tuple(ids),
    )


def _evidence(
    prepared: Prepared,
    scan: HiddenScan,
    design: DesignReading,
    fitted: RefitStage,
    clusters: Mapping[str, TermClustering],
    reconciled: Reconciled,
) -> Evidence:
    """Everything the rules may look at, from the stages' results."""
    structure = design.structure
    terms = tuple(
        TermEvidence(
            term=ti.term,
            factors=ti.factors,
            unit=structure.unit_of(ti.term),
            clustering=clusters[ti.term].clustering,
            refit=fitted.fits.term(ti.term),
            units_per_level=clusters[ti.term].units_per_level,
            claimed=i == 0,
            reconciliation=reconciled.terms[ti.term],
            alternatives=fitted.alternatives.get(ti.term, ()),
            slope=fitted.slopes.get(ti.term),
            numeric=ti.numeric,
        )
        for i, ti in enumerate(fitted.inputs)
    )
    return Evidence(
        claim=prepared.claim,
        n_rows_read=prepared.source.n_rows,
        trials=prepared.trials,
        n_rows_used=len(design.frame),
        rows_without_unit=design.rows_without_unit,
        unit_columns=design.unit_columns,
        structure=structure,
        terms=terms,
        reconciliation=reconciled.overall,
        formula_blocks=prepared.formula_blocks,
        unreplicated=tuple(t.name for t in prepared.dropped),
        response_kind=fitted.kind,
        response_coding=prepared.response_coding,
        hidden=scan,
        numbers=prepared.numbers,
        response_exponent=prepared.exponent,
        rescaled_columns=prepared.rescaled_columns,
        claimed_groupings=tuple(
            (name, int(codes.max()) + 1, int((codes >= 0).sum()))  # codes 0..k-1, -1 missing
            for name, codes in fitted.claimed_random.items()
        ),
    )


def _display(design: DesignReading, fitted: RefitStage, evidence: Evidence) -> Display:
    """The picture and intervals of the term the claim section speaks of."""
    at = shown_term([t.reconciliation is not None for t in evidence.terms])
    shown, unit = fitted.inputs[at], evidence.terms[at].unit
    return display_data(
        design.frame,
        shown.term,
        fitted.y,
        shown.codes,
        shown.labels,
        unit.columns,
        shown.unit,
        shown.unit_name or unit.unit,
        shown.confounded,
    )


STAGES = (
    "claim",
    "read",
    "hidden",
    "structure",
    "refit",
    "clustering",
    "reconcile",
    "verdict",
    "report data",
)


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
