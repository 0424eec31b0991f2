"""The audit: read -> claim -> structure -> clustering -> refit -> verdict -> report.

:func:`audit` is the one entry point used by the command line and by Python
callers. Each stage is a pure function of the previous stages' results.
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from replicheck.claim import Claim, build_claim, load_spec, spec_beside
from replicheck.clustering import measure_clustering
from replicheck.errors import InputError
from replicheck.io import Table, numeric_column, read_table, resolve_column
from replicheck.reconcile import Level, reconcile
from replicheck.refit import TermInput, design_matrix, refit
from replicheck.report.model import Report
from replicheck.structure.relations import codes_of, group_codes
from replicheck.structure.terms import model_terms, term_values
from replicheck.structure.units import Structure, UnitChoice, infer_structure, unit_codes
from replicheck.verdict import Evidence, TermEvidence, decide


def make_claim(
    source: str | os.PathLike[str] | pd.DataFrame,
    *,
    response: str | None = None,
    treatment: str | Sequence[str] = (),
    unit: str | None = None,
    claim: str | None = None,
    alpha: float | None = None,
    na: Sequence[str] = (),
    sheet: str | None = None,
    spec: str | os.PathLike[str] | Mapping[str, object] | None = None,
    find_spec: bool = True,
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
        claim_text=claim,
        alpha=alpha,
        na_values=tuple(str(v) for v in na),
        sheet=sheet,
        spec=spec_data,
        spec_path=spec_path,
    )


def _resolve(table: Table, claim: Claim) -> Claim:
    cols = table.columns
    response = resolve_column(cols, claim.response, "response")
    treatments = tuple(resolve_column(cols, t, "treatment") for t in claim.treatments)
    if len(set(treatments)) != len(treatments):
        raise InputError(f"the same column is named twice as a treatment: {', '.join(treatments)}")
    if response in treatments:
        raise InputError(f"column '{response}' cannot be both the response and a treatment")
    unit = None if claim.unit is None else resolve_column(cols, claim.unit, "unit")
    if unit is not None and (unit == response or unit in treatments):
        raise InputError(f"column '{unit}' cannot be the unit: it is the response or a treatment")
    return Claim(
        response,
        treatments,
        unit,
        claim.reported,
        claim.alpha,
        claim.na_values,
        claim.sheet,
        claim.spec_path,
    )


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
    for t in claim.treatments:
        if frame[t].nunique() < 2:
            only = frame[t].iloc[0]
            raise InputError(
                f"treatment column '{t}' has a single level ({only!s}) among rows with a "
                f"response: nothing to compare"
            )
    cells = frame[list(claim.treatments)].drop_duplicates().shape[0]
    if len(frame) - cells < 1:
        raise InputError(f"too few rows to test the treatment: {len(frame)} rows in {cells} groups")
    return frame


def _levels(
    n: int,
    first: TermInput,
    n_params: int,
    choice: UnitChoice,
    structure: Structure,
    single: bool,
) -> list[Level]:
    """Levels at which the claimed term could have been analysed, rows first."""
    k = len(first.labels)
    rows_removed = f"{k} groups" if single else f"{n_params} model parameters"
    levels = [Level("rows", "rows", n, n - n_params, rows_removed, tuple(np.bincount(first.codes)))]
    if first.unit is not None and choice.unit is not None:
        per = []
        for j in range(k):
            per.append(int(np.unique(first.unit[first.codes == j]).size))
        levels.append(
            Level(
                choice.unit, "units", choice.n_units, choice.n_units - k, f"{k} groups", tuple(per)
            )
        )
    seen = {lv.name for lv in levels}
    for cand in structure.candidates:
        if cand.treatment == first.term and cand.name not in seen:
            seen.add(cand.name)
            levels.append(Level(cand.name, "other", cand.n_units, cand.n_units - k, f"{k} groups"))
    return levels


def audit(
    data: str | os.PathLike[str] | pd.DataFrame,
    *,
    response: str | None = None,
    treatment: str | Sequence[str] = (),
    unit: str | None = None,
    claim: str | None = None,
    alpha: float | None = None,
    na: Sequence[str] = (),
    sheet: str | None = None,
    spec: str | os.PathLike[str] | Mapping[str, object] | None = None,
    find_spec: bool = True,
    unit_labels: str = "auto",
) -> Report:
    """Audit one dataset against its claimed analysis.

    Parameters
    ----------
    data:
        A path (CSV/TSV/text, .xlsx, Parquet) or a DataFrame. Never written to.
    response, treatment, unit:
        Column names (matched case- and space-insensitively). ``treatment``
        may be a list. ``unit`` is the user's belief about the experimental
        unit: it is checked against the data, not trusted.
    claim:
        The reported result, e.g. ``"F(2, 57) = 8.31, p = .001"``.
    alpha:
        Significance level (default 0.05).
    na:
        Extra missing-value codes, e.g. ``["-99"]``.
    spec:
        A TOML spec file or a mapping with the same keys; by default a spec
        named ``NAME.replicheck.toml`` beside the data file is used.
    unit_labels:
        ``auto``, ``local`` (labels such as "tank 1" are numbered afresh within
        each treatment level) or ``global`` (labels name the same unit everywhere).

    Returns
    -------
    Report
        With ``status``, ``to_dict()``, ``to_json()``, ``to_text()`` and
        ``to_markdown()``.

    Raises
    ------
    InputError
        Bad input, with a one-line message.

    Examples
    --------
    >>> import pandas as pd
    >>> df = pd.DataFrame({"y": [1.0, 1.2, 2.1, 2.3, 3.0, 3.1, 4.2, 4.0],
    ...                    "feed": list("AAAABBBB"), "tank": [1, 1, 2, 2, 3, 3, 4, 4]})
    >>> audit(df, response="y", treatment="feed").status
    'pseudoreplicated'
    """
    c = make_claim(
        data,
        response=response,
        treatment=treatment,
        unit=unit,
        claim=claim,
        alpha=alpha,
        na=na,
        sheet=sheet,
        spec=spec,
        find_spec=find_spec,
    )
    table = read_table(
        data if isinstance(data, pd.DataFrame) else Path(data), sheet=c.sheet, na_values=c.na_values
    )
    c = _resolve(table, c)
    frame = _analysis_frame(table, c)
    terms = model_terms(frame, c.treatments)
    interactions = [t.name for t in terms if t.is_interaction]
    for t in terms:
        if t.is_interaction:
            frame[t.name] = term_values(frame, t.factors)
    structure = infer_structure(
        frame,
        c.response,
        [t.name for t in terms],
        exclude=c.treatments,
        interactions=interactions,
        stated_unit=c.unit,
        unit_labels=unit_labels,
    )
    y = frame[c.response].to_numpy(dtype=float)
    inputs: list[TermInput] = []
    for t in terms:
        choice = structure.unit_of(t.name)
        codes, labels = codes_of(frame[t.name])
        confounded = choice.relation == "confounded"
        units = unit_codes(frame, choice) if choice.unit is not None and not confounded else None
        inputs.append(TermInput(t.name, t.factors, codes, labels, units, choice.unit, confounded))
    strata = {s.name: group_codes(frame, s.columns) for s in structure.strata if s.kind != "rows"}
    blocks = {
        s.name: strata[s.name] for s in structure.strata if s.kind == "block" and s.name in strata
    }
    fits = refit(y, inputs, strata, blocks)
    evidence_terms: list[TermEvidence] = []
    for i, ti in enumerate(inputs):
        tr = fits.term(ti.term)
        clustering = None
        per_level: dict[str, int] = {}
        if ti.unit is not None and ti.unit_name is not None:
            v = tr.unit_variance
            reml = (v.var_unit, v.var_residual) if v is not None and v.converged else None
            clustering = measure_clustering(y, ti.unit, ti.codes, ti.labels, ti.unit_name, reml)
            for k, label in enumerate(ti.labels):
                per_level[label] = int(np.unique(ti.unit[ti.codes == k]).size)
        evidence_terms.append(
            TermEvidence(
                ti.term, ti.factors, structure.unit_of(ti.term), clustering, tr, per_level, i == 0
            )
        )
    first = inputs[0]
    first_fit = fits.term(first.term)
    as_claimed = first_fit.get("as_claimed")
    assert as_claimed is not None
    n_params = (
        len(first.labels)
        if len(terms) == 1
        else int(np.linalg.matrix_rank(design_matrix(inputs, "sum")[0]))
    )
    levels = _levels(
        len(frame), first, n_params, structure.unit_of(first.term), structure, len(terms) == 1
    )
    unit_level = [a for a in first_fit.analyses if a.level == "units" and a.p_value is not None]
    rec = reconcile(c.reported, c.alpha, levels, as_claimed, len(first.labels) - 1, unit_level)
    evidence = Evidence(
        claim=c,
        n_rows_read=table.n_rows,
        n_rows_used=len(frame),
        structure=structure,
        terms=tuple(evidence_terms),
        reconciliation=rec,
    )
    verdict = decide(evidence)
    return Report(table, len(frame), c, evidence, fits, verdict)
