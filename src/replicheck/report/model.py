"""The report object: every stage's result in one place, and its plain-data form.

Renderers (text, JSON, Markdown) read the dictionary from :meth:`Report.to_dict`
and never compute statistics. The JSON schema is documented in
``docs/report-schema.md``; additions keep old fields working.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field
from typing import Any, cast

from replicheck import __version__
from replicheck.advice import Syntax, render, render_all
from replicheck.claim import Claim
from replicheck.clustering import Clustering
from replicheck.display import Display, Interval
from replicheck.glossary import analysis_title
from replicheck.io import Layout, Table
from replicheck.numbers import log10_count
from replicheck.reconcile import Reconciliation
from replicheck.refit import Refit, TermRefit
from replicheck.stats.power import DesignNeeds
from replicheck.verdict import AlternativeEvidence, Evidence, TermEvidence, Verdict

SCHEMA = "replicheck/report-v1"


def _clean(x: Any) -> Any:
    """Make a value JSON-safe: NaN and infinities become None, tuples lists."""
    if isinstance(x, float):
        return x if math.isfinite(x) else None
    if isinstance(x, dict):
        return {str(k): _clean(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [_clean(v) for v in x]
    if hasattr(x, "item") and callable(x.item):  # numpy scalars
        return _clean(x.item())
    return x


def _layout(lay: Layout) -> dict[str, Any]:
    return {
        "header_row": lay.header_row,
        "header_rows": lay.header_rows,
        "units_row": lay.units_row,
        "first_row": lay.first_row,
        "last_row": lay.last_row,
        "range": lay.cell_range,
        "skipped_above": list(lay.skipped_above),
        "skipped_below": list(lay.skipped_below),
        "units": {column: unit for column, unit in lay.units},
        "stated": list(lay.stated),
        "empty_rows": lay.empty_rows,
        "filled_down": [
            {
                "column": f.column,
                "cells": f.cells,
                "blocks": f.blocks,
                "stated": f.stated,
                "merged": f.merged,
            }
            for f in lay.filled
        ],
        "reshaped": [
            {
                "columns": list(r.columns),
                "key": r.key,
                "values": list(r.values),
                "levels": r.levels,
                "rows_before": r.rows_before,
                "rows_after": r.rows_after,
                "row_column": r.row_column,
                "stated": r.stated,
                "group": r.group,
            }
            for r in lay.reshaped
        ],
        "sheets": list(lay.sheets),
        "sheet_column": lay.sheet_column,
        "skipped_sheets": list(lay.skipped_sheets),
        "tables": list(lay.tables),
        "table_column": lay.table_column,
        "skipped_tables": list(lay.skipped_tables),
    }


def _clustering(cl: Clustering | None) -> dict[str, Any]:
    if cl is None:
        return {"icc": None, "icc_ci": None, "design_effect": None, "effective_n": None}
    return {
        "icc": cl.icc,
        "icc_ci": list(cl.icc_ci),
        "design_effect": cl.design_effect,
        "effective_n": cl.effective_n,
        "unit": cl.unit,
        "icc_method": cl.icc_method,
        "icc_anova": cl.icc_anova,
        "icc_reml": cl.icc_reml,
        "variance_components": {"unit": cl.var_unit, "residual": cl.var_residual},
        "design_effect_equal_sizes": cl.design_effect_equal_sizes,
        "mean_unit_size": cl.mean_unit_size,
        "cv_unit_size": cl.cv_unit_size,
        "n_units": cl.n_units,
        "n_observations": cl.n_observations,
        "effective_n_per_level": cl.effective_n_per_level,
        "overdispersion": None
        if cl.overdispersion is None
        else {
            "family": cl.overdispersion.family,
            "dispersion": cl.overdispersion.dispersion,
            "chi2": cl.overdispersion.chi2,
            "df": cl.overdispersion.df,
            "p_value": cl.overdispersion.p_value,
            "n_units": cl.overdispersion.n_units,
        },
    }


def _reported_check(rec: Reconciliation | None) -> dict[str, Any] | None:
    if rec is None:
        return None
    return {
        "level": rec.level,
        "grouping": rec.level_grouping,
        "explanation": rec.explanation,
        "mismatches": list(rec.mismatches),
        "reproduced_by": rec.reproduced_by,
        "claimed_significant": rec.claimed_significant,
    }


def _randomization(tr: TermRefit | None) -> dict[str, Any] | None:
    r = None if tr is None else tr.randomisation
    if r is None:
        return None
    return {
        "p_value": r.p_value,
        "min_attainable_p": r.min_attainable_p,
        "n_assignments": r.n_assignments if r.n_assignments < 2**53 else None,
        "log10_n_assignments": log10_count(r.n_assignments),
        "exact": r.exact,
        "draws": r.draws,
        "seed": r.seed,
    }


def _alternative(a: AlternativeEvidence) -> dict[str, Any]:
    corrected = a.corrected
    choice = a.reading.choice
    return {
        "kind": a.reading.kind,
        "unit": choice.unit,
        "columns": list(choice.columns),
        "relation": choice.relation,
        "n_units": choice.n_units,
        "why": a.reading.why,
        "settle": a.reading.settle,
        "method": a.refit.corrected,
        "method_title": None
        if a.refit.corrected is None
        else analysis_title(
            a.refit.corrected, choice.unit, corrected.stratum if corrected else None
        ),
        "test": corrected.test if corrected else None,
        "statistic": corrected.statistic if corrected else None,
        "df": list(corrected.df) if corrected and corrected.df else None,
        "p_value": corrected.p_value if corrected else None,
    }


def _needs(n: DesignNeeds | None, te: TermEvidence) -> dict[str, Any] | None:
    if n is None:
        return None
    return {
        "term": te.term,
        "unit": te.unit.unit,
        "units_per_level": n.units_per_level,
        "units_now": min(te.units_per_level.values()) if te.units_per_level else None,
        "power": n.power,
        "alpha": n.alpha,
        "effect": {
            "cohen_f_unit_means": n.effect_f,
            "kind": n.effect_kind,
            "difference": n.difference,
        },
        "observations_per_unit": n.observations_per_unit,
        "icc": n.icc,
        "by_unit_size": [
            {"observations_per_unit": m, "units_per_level": k} for m, k in n.by_unit_size
        ],
    }


def _method_title(method: str | None, corrected: Any, unit: str | None) -> str | None:
    """The reader's name of the analysis a term's verdict rests on."""
    if method is None:
        return None
    return analysis_title(method, unit, corrected.stratum if corrected is not None else None)


def _interval(iv: Interval | None) -> dict[str, Any] | None:
    if iv is None:
        return None
    return {
        "estimate": iv.estimate,
        "low": iv.low,
        "high": iv.high,
        "df": iv.df,
        "replicates": iv.replicates,
    }


def _display(d: Display | None) -> dict[str, Any] | None:
    """The picture's data and the effect intervals of the reported term."""
    if d is None:
        return None
    u, e = d.units, d.effects
    return {
        "term": u.term,
        "unit": u.unit,
        "n_observations": u.n_observations,
        "n_units": u.n_units,
        "thinned": u.thinned,
        "levels": [
            {
                "label": lv.label,
                "n_observations": lv.n_observations,
                "n_units": lv.n_units,
                "mean_of_unit_means": lv.mean_of_unit_means,
                "units": [
                    {"label": x.label, "n": x.n, "mean": x.mean, "values": list(x.values)}
                    for x in lv.units
                ],
            }
            for lv in u.levels
        ],
        "effects": {
            "confidence": e.confidence,
            "claimed_method": e.claimed_method,
            "corrected_method": e.corrected_method,
            "rows": [
                {
                    "level": r.level,
                    "reference": r.reference,
                    "claimed": _interval(r.claimed),
                    "corrected": _interval(r.corrected),
                }
                for r in e.rows
            ],
        },
    }


@dataclass(frozen=True)
class Report:
    """The result of one audit."""

    table: Table
    n_rows_used: int
    claim: Claim
    evidence: Evidence
    refit: Refit
    verdict: Verdict
    design_needs: DesignNeeds | None = None
    display: Display | None = None
    key_term: int = 0
    """Index of the term whose unit the key figures (the top-level clustering,
    randomisation test and design needs) describe: :func:`replicheck.decisions.key_term`."""
    seconds: Mapping[str, float] = field(default_factory=dict, compare=False)
    """Seconds spent in each stage (:data:`replicheck.api.STAGES`); for benchmarks, not
    part of the report document."""

    @property
    def status(self) -> str:
        return self.verdict.status

    @property
    def exit_code(self) -> int:
        """0 when no problem was found, 1 otherwise."""
        return 0 if self.verdict.status == "ok" else 1

    def to_dict(self, syntax: Syntax = "api") -> dict[str, Any]:
        """The report as plain data (the JSON document).

        Advice that names an option is written in ``syntax``: ``api`` (keyword
        arguments of :func:`replicheck.api.audit`, for Python callers) or ``cli``
        (command-line options, as the command line writes its reports); see
        :mod:`replicheck.advice`.
        """
        t, c, ev = self.table, self.claim, self.evidence
        s = ev.structure
        alpha = c.alpha
        rep = None
        if c.reported is not None:
            r = c.reported
            rep = {
                "text": r.text,
                "test": r.test,
                "statistic": r.statistic,
                "df": list(r.df) if r.df is not None else None,
                "p_value": r.p_value,
                "p_relation": r.p_relation,
                "n_per_group": r.n_per_group,
                "n_total": r.n_total,
                "ratio": r.ratio,
                "ratio_ci": list(r.ratio_ci) if r.ratio_ci is not None else None,
            }
        units = [
            {
                "treatment": te.term,
                "unit": te.unit.unit,
                "relation": te.unit.relation,
                "n_units": te.unit.n_units,
                "n_observations": te.unit.n_observations,
                "columns": list(te.unit.columns),
                "source": te.unit.source,
                "reading": te.unit.reading,
                "single_unit_levels": list(te.unit.single_unit_levels),
            }
            for te in ev.terms
        ]
        main = ev.terms[self.key_term]
        unit_of = {te.term: te.unit.unit for te in ev.terms}
        analyses = []
        for tr in self.refit.terms:
            for a in tr.analyses:
                analyses.append(
                    {
                        "name": a.name,
                        "title": analysis_title(a.name, unit_of.get(a.term), a.stratum),
                        "label": a.label,
                        "term": a.term,
                        "level": a.level,
                        "n_replicates": a.n_replicates,
                        "statistic": a.statistic,
                        "df": list(a.df) if a.df is not None else None,
                        "p_value": a.p_value,
                        "significant": a.significant(alpha),
                        "t_statistic": a.t_statistic,
                        "estimate": a.estimate,
                        "notes": list(a.notes),
                        "corrected": a.name == tr.corrected,
                        "stratum": a.stratum,
                        "test": a.test,
                    }
                )
        terms = []
        for te, tv in zip(ev.terms, self.verdict.terms, strict=True):
            corrected = te.corrected
            rec = te.reconciliation
            terms.append(
                {
                    "term": te.term,
                    "factors": list(te.factors),
                    "unit": te.unit.unit,
                    "error_term": tv.error_term,
                    "status": tv.status,
                    "method": tv.method,
                    "method_title": _method_title(tv.method, corrected, te.unit.unit),
                    "test": corrected.test if corrected else None,
                    "statistic": corrected.statistic if corrected else None,
                    "df": list(corrected.df) if corrected and corrected.df else None,
                    "p_value": corrected.p_value if corrected else None,
                    "claimed_p_value": tv.claimed_p_value,
                    "claimed_significant": tv.claimed_significant,
                    "testable": corrected is not None,
                    "conclusion_changed": tv.conclusion_changed,
                    "clustering": _clustering(te.clustering),
                    "reported_check": _reported_check(rec),
                    "randomization": _randomization(te.refit),
                    "alternatives": [_alternative(a) for a in te.alternatives],
                    "omitted_slope": None
                    if te.slope is None
                    else {
                        "grouping": te.slope.grouping,
                        "likelihood_ratio": te.slope.lr,
                        "p_value": te.slope.p_value,
                        "variance": te.slope.var_slope,
                        "residual_variance": te.slope.var_residual,
                        "statistic": te.slope.statistic,
                        "df": list(te.slope.df),
                        "term_p_value": te.slope.term_p,
                    },
                }
            )
        doc = {
            "schema": SCHEMA,
            "tool": {"name": "replicheck", "version": __version__},
            "input": {
                "source": t.source,
                "sha256": t.sha256,
                "format": t.format,
                "encoding": t.encoding,
                "delimiter": t.delimiter,
                "decimal": t.decimal,
                "sheet": t.sheet,
                "n_rows": t.n_rows,
                "n_rows_used": self.n_rows_used,
                "layout": _layout(t.layout),
            },
            "claim": {
                "response": c.response,
                "response_kind": ev.response_kind,
                "response_coding": None
                if ev.response_coding is None
                else {"0": ev.response_coding[0], "1": ev.response_coding[1]},
                "treatments": list(c.treatments),
                "unit": c.unit,
                "alpha": alpha,
                "reported": rep,
                "reported_term": ev.terms[0].term,
                "spec": c.spec_path,
                "random_effects": [":".join(g) for g in c.formula.random]
                if c.formula is not None
                else [],
                "family": c.family,
                "settings": c.options.to_list(),
                "numbers": [
                    {
                        "column": r.column,
                        "slope": r.slope,
                        "reason": r.reason,
                        "n_values": r.n_values,
                        "min": r.low,
                        "max": r.high,
                    }
                    for r in ev.numbers
                ],
            },
            "verdict": {
                "status": self.verdict.status,
                "conclusion_changed": self.verdict.conclusion_changed,
                "method": self.verdict.method,
                "method_title": next(
                    t["method_title"] for t in terms if t["term"] == self.verdict.term
                ),
                "term": self.verdict.term,
                "summary": self.verdict.summary,
            },
            "experimental_units": units,
            "roles": [
                {
                    "column": r.column,
                    "role": r.role,
                    "source": r.source,
                    "evidence": r.evidence,
                    "columns": list(r.columns) or [r.column],
                    "terms": list(r.terms),
                }
                for r in s.roles
            ],
            "stated_roles": c.roles.to_list(),
            "design": {
                "strata": [
                    {
                        "name": st.name,
                        "kind": st.kind,
                        "n_levels": st.n_levels,
                        "parent": st.parent,
                        "columns": list(st.columns),
                        "terms": list(st.terms),
                    }
                    for st in s.strata
                ],
                "blocks": [
                    {"name": b.name, "n_levels": b.n_levels, "reason": b.reason} for b in s.blocks
                ],
                "factor_relations": [
                    {"first": r.first, "second": r.second, "relation": r.relation}
                    for r in s.factor_relations
                ],
            },
            "terms": terms,
            "candidates": [
                {
                    "treatment": k.treatment,
                    "grouping": k.name,
                    "relation": k.relation,
                    "n_units": k.n_units,
                    "mean_size": k.mean_size,
                    "icc": k.icc,
                    "icc_p_value": k.icc_p,
                    "name_hint": k.hint.kind,
                    "alias": k.alias,
                    "credible": k.credible,
                    "score": k.score,
                    "reasons": list(k.reasons),
                }
                for k in s.candidates
            ],
            "relations": [
                {
                    "column": r.column,
                    "treatment": r.treatment,
                    "relation": r.relation,
                    "n_levels": r.n_levels,
                    "detail": r.detail,
                    "exception_rows": list(r.exceptions),
                    "strength": r.strength,
                }
                for r in s.relations
            ],
            "skipped_columns": dict(s.skipped),
            "hidden": {
                "derived": [
                    {
                        "name": g.name,
                        "sources": list(g.sources),
                        "kind": g.kind,
                        "n_groups": int(g.codes.max()) + 1 if g.codes.size else 0,
                        "how": g.how,
                        "strength": dict(g.strength),
                        "unit_of": [t.term for t in ev.terms if g.name in t.unit.columns],
                    }
                    for g in ev.hidden.derived
                ],
                "signals": [
                    {
                        "check": sig.check,
                        "columns": list(sig.columns),
                        "statistic": sig.statistic,
                        "p_value": sig.p_value,
                        "message": sig.message,
                    }
                    for sig in ev.hidden.signals
                ],
            },
            "clustering": _clustering(main.clustering),
            "randomization": _randomization(main.refit),
            "design_needs": _needs(self.design_needs, main),
            "analyses": analyses,
            "reported_check": _reported_check(ev.reconciliation),
            "findings": [asdict(f) for f in self.verdict.findings],
            "display": _display(self.display),
            "caution": self.verdict.caution,
        }
        return cast("dict[str, Any]", render_all(_clean(doc), syntax))

    def to_json(self, indent: int | None = 2, syntax: Syntax = "api") -> str:
        """The JSON document."""
        return json.dumps(self.to_dict(syntax), indent=indent, ensure_ascii=False)

    def to_text(self, syntax: Syntax = "api") -> str:
        from replicheck.report.text import render_text

        return render(render_text(self.to_dict(syntax)), syntax)

    def to_markdown(self, syntax: Syntax = "api") -> str:
        from replicheck.report.markdown import render_markdown

        return render(render_markdown(self.to_dict(syntax)), syntax)

    def to_html(self, syntax: Syntax = "api") -> str:
        """The self-contained HTML report (one file: no network, scripts or external fonts)."""
        from replicheck.report.html import render_html

        return render(render_html(self.to_dict(syntax)), syntax)

    def _repr_html_(self) -> str:  # Jupyter shows the HTML report
        return self.to_html()
