"""The work on one file: propose or audit, then render the report.

Runs in a worker process (see :mod:`replicheck.screen.runner`); this module
is preloaded there, so it may import the whole statistics stack.
"""

from __future__ import annotations

import time
from dataclasses import replace
from typing import Any

import pandas as pd

from replicheck.api import audit
from replicheck.errors import InputError, SheetChoice
from replicheck.io import Table, fill_down, read_table
from replicheck.io.reshape import find_families, reshape_long
from replicheck.report.model import Report
from replicheck.screen.guess import propose
from replicheck.screen.summary import severity
from replicheck.screen.task import Outcome, Task, one_line


def _primary(doc: dict[str, Any]) -> int:
    """The term the verdict speaks of (decisions.headline_term): the index row gives its
    unit, p-values and clustering beside the verdict's status and summary."""
    return [t["term"] for t in doc["terms"]].index(doc["verdict"]["term"])


def outcome_of(report: Report, spec_source: str) -> Outcome:
    """The summary fields of an audit report, with the rendered report."""
    doc = report.to_dict(syntax="cli")
    i = _primary(doc)
    term = doc["terms"][i]
    unit = doc["experimental_units"][i]
    clustering = term.get("clustering") or {}
    return Outcome(
        status=report.status,
        message=doc["verdict"]["summary"],
        spec_source=spec_source,
        response=doc["claim"]["response"],
        treatment=";".join(doc["claim"]["treatments"]),
        unit=unit["unit"] or ("rows" if unit.get("source") == "rows" else ""),
        n_units=unit.get("n_units"),
        n_rows=doc["input"]["n_rows"],
        conclusion_changed=doc["verdict"]["conclusion_changed"],
        claimed_p=term.get("claimed_p_value"),
        corrected_p=term.get("p_value"),
        icc=clustering.get("icc"),
        design_effect=clustering.get("design_effect"),
        report_html=report.to_html(syntax="cli"),
        report_json=report.to_json(syntax="cli"),
    )


#: The name a guessed response gets when it is held by a family of wide columns.
WIDE_VALUES = "value"


def _as_audited(table: Table) -> pd.DataFrame:
    """The table as an audit would see it before the roles are known: groupings
    written once per block filled down, and a lone family of wide columns in long
    form (its values named :data:`WIDE_VALUES`), so that the guesses name the
    columns the audit will read."""
    families = find_families(table.data)
    wide = {col for f in families for col in f.columns}
    data, _ = fill_down(table.data, protect=wide)
    if len(families) == 1 and WIDE_VALUES not in data.columns:
        data, _ = reshape_long(data, response=WIDE_VALUES)
    return data


def _without_spec(task: Task, sheet: str | None = None) -> Outcome:
    table = read_table(task.path, sheet=sheet)
    proposal = propose(_as_audited(table))
    candidates = proposal.describe()
    best = proposal.best
    if best is None:
        reason = "no numeric response and treatment column could be guessed"
        advice = "write NAME.replicheck.toml beside it or list it in a spec index (--specs)"
        return Outcome(
            "needs-spec",
            f"no spec for this file and {reason}; {advice}",
            spec_source="",
            n_rows=table.n_rows,
            candidates=candidates,
        )
    response, treatment = best
    if not task.guess:
        return Outcome(
            "needs-spec",
            f"no spec for this file (NAME.replicheck.toml beside it or an entry in --specs); "
            f"best guess: response '{response.column}' ({response.confidence:.2f}: "
            f"{response.reason}), treatment '{treatment.column}' ({treatment.confidence:.2f}: "
            f"{treatment.reason}); --guess audits that guess",
            n_rows=table.n_rows,
            candidates=candidates,
        )
    report = audit(
        task.path,
        sheet=sheet,
        spec={"response": response.column, "treatment": [treatment.column]},
        find_spec=False,
        seed=task.seed,
        alpha=task.alpha,
    )
    out = outcome_of(report, "guessed")
    note = (
        f"GUESSED analysis {response.column} ~ {treatment.column} (no spec; confidence "
        f"{response.confidence:.2f} and {treatment.confidence:.2f}), not necessarily the "
        "authors' analysis. "
    )
    return replace(out, guessed=True, message=note + out.message, candidates=candidates)


def _work(task: Task, sheet: str | None = None) -> Outcome:
    try:
        if task.spec_source == "none":
            return _without_spec(task, sheet)
        spec = task.spec_path if task.spec_source == "beside" else task.spec
        report = audit(
            task.path, spec=spec, find_spec=False, seed=task.seed, alpha=task.alpha, sheet=sheet
        )
        return outcome_of(report, task.spec_source)
    except SheetChoice as choice:
        if sheet is not None:
            raise
        return _sheet_by_sheet(task, choice.sheets)


def _sheet_by_sheet(task: Task, sheets: tuple[str, ...]) -> Outcome:
    """Each sheet of a workbook audited on its own, one outcome each."""
    source = "" if task.spec_source == "none" else task.spec_source
    parts = []
    for name in sheets:
        try:
            part = _work(task, name)
        except InputError as err:
            part = Outcome(
                "error", err.render("cli").replace(task.path, task.name), spec_source=source
            )
        parts.append(replace(part, sheet=name))
    worst = min(parts, key=lambda o: severity(o.status))
    return Outcome(
        worst.status,
        f"audited sheet by sheet: {len(parts)} sheets hold tables",
        spec_source=source,
        sheets=tuple(parts),
    )


def run_task(task: Task) -> Outcome:
    """Screen one file; bad input gives ``error``, any other exception ``internal-error``.

    Never raises (except on interruption).
    """
    start = time.perf_counter()
    source = "" if task.spec_source == "none" else task.spec_source
    try:
        out = _work(task)
    except InputError as err:  # the row names the file: no need for its full path
        out = Outcome("error", err.render("cli").replace(task.path, task.name), spec_source=source)
    except Exception as err:  # a bug in replicheck or a library: one line, the batch goes on
        out = Outcome("internal-error", one_line(err), spec_source=source)
    return replace(out, seconds=time.perf_counter() - start)
