"""Clustering stage: how alike observations within an experimental unit are.

Gives the residual intraclass correlation within treatment levels (one-way
ANOVA estimator with its F-based interval, and the REML estimate), the
variance components, the design effect and the effective sample size.

References: Searle, Casella & McCulloch (1992) *Variance Components*, ch. 3;
Kish (1965) *Survey Sampling*; Donner & Klar (2000) *Design and Analysis of
Cluster Randomization Trials*; Eldridge, Ashby & Kerry (2006) Int. J.
Epidemiol. 35:1292-1300 (unequal cluster sizes).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from replicheck.partitions import units_in_levels, units_per_level
from replicheck.refit import Refit, TermInput
from replicheck.stats.classic import DesignError
from replicheck.stats.clustering import anova_components, design_effect
from replicheck.stats.discrete import Overdispersion, ResponseKind, unit_overdispersion


@dataclass(frozen=True, kw_only=True)
class Clustering:
    """Clustering of the response within experimental units, within treatment levels."""

    unit: str
    n_units: int
    n_observations: int
    icc: float  # the estimate used for the design effect (REML when available)
    icc_method: str
    icc_anova: float
    icc_anova_raw: float  # before truncation at zero
    icc_ci: tuple[float, float]
    icc_reml: float | None
    var_unit: float
    var_residual: float
    design_effect: float
    design_effect_equal_sizes: float
    mean_unit_size: float
    cv_unit_size: float
    effective_n: float
    effective_n_per_level: dict[str, float]
    overdispersion: Overdispersion | None = None  # yes/no and count responses


@dataclass(frozen=True)
class TermClustering:
    """The clustering stage's result for one term."""

    clustering: Clustering | None  # None when every row is a unit, or when confounded
    units_per_level: dict[str, int]  # units of the term's unit in each of its levels


def cluster_terms(
    y: np.ndarray, inputs: Sequence[TermInput], fits: Refit, kind: ResponseKind
) -> dict[str, TermClustering]:
    """The clustering within the unit of each term that has a replicated unit, with the
    mixed model's REML components when its fit converged (by term)."""
    out: dict[str, TermClustering] = {}
    for ti in inputs:
        if ti.unit is None or ti.unit_name is None:
            out[ti.term] = TermClustering(None, {})
            continue
        v = fits.term(ti.term).unit_variance
        reml = (v.var_unit, v.var_residual) if v is not None and v.converged else None
        clustering = measure_clustering(
            y, ti.unit, ti.codes, ti.labels, ti.unit_name, reml, kind=kind
        )
        counts = units_per_level(ti.unit, ti.codes, len(ti.labels))
        per_level = {label: int(counts[k]) for k, label in enumerate(ti.labels)}
        out[ti.term] = TermClustering(clustering, per_level)
    return out


def measure_clustering(
    y: np.ndarray,
    unit: np.ndarray,
    treatment: np.ndarray,
    treatment_labels: list[str],
    unit_name: str,
    reml_components: tuple[float, float] | None = None,
    confidence: float = 0.95,
    kind: ResponseKind = "continuous",
) -> Clustering | None:
    """Measure clustering of ``y`` in ``unit`` within ``treatment`` levels.

    ``reml_components`` is (unit variance, residual variance) from the mixed
    model when it was fitted. Returns None when the units are not replicated
    within treatment levels (no within-treatment unit variation to measure) or
    no unit holds two observations. For a yes/no or count response (``kind``)
    the spread of the unit proportions or counts is also set against binomial
    or Poisson chance (:func:`replicheck.stats.discrete.unit_overdispersion`).
    """
    n_units = int(unit.max()) + 1
    n_trt = int(treatment.max()) + 1
    if n_units - n_trt < 1 or y.size - n_units < 1:
        return None
    comp = anova_components(y, unit, treatment, conf_level=confidence)
    icc_reml = None
    var_unit, var_resid = comp.s2_unit, comp.s2_within
    method = "one-way ANOVA estimator"
    if reml_components is not None:
        var_unit, var_resid = reml_components
        total = var_unit + var_resid
        icc_reml = var_unit / total if total > 0 else 0.0
        method = "REML"
    icc = icc_reml if icc_reml is not None else comp.icc
    sizes = np.bincount(unit, minlength=n_units)
    deff = design_effect(sizes, icc)
    per_level: dict[str, float] = {}
    members = units_in_levels(unit, treatment, len(treatment_labels))
    for k, label in enumerate(treatment_labels):
        in_level = members[k]
        if in_level.size == 0:
            continue
        d = design_effect(sizes[in_level], icc)
        per_level[label] = float(d.effective_n)
    overdispersion = None
    if kind != "continuous":
        family = "binomial" if kind == "binary" else "poisson"
        try:
            overdispersion = unit_overdispersion(y, unit, treatment, family)
        except DesignError:
            overdispersion = None
    return Clustering(
        unit=unit_name,
        n_units=n_units,
        n_observations=int(y.size),
        icc=float(icc),
        icc_method=method,
        icc_anova=float(comp.icc),
        icc_anova_raw=float(comp.icc_raw),
        icc_ci=(float(comp.ci_low), float(comp.ci_high)),
        icc_reml=icc_reml,
        var_unit=float(var_unit),
        var_residual=float(var_resid),
        design_effect=float(deff.deff),
        design_effect_equal_sizes=float(deff.deff_equal),
        mean_unit_size=float(deff.mean_size),
        cv_unit_size=float(deff.cv_size),
        effective_n=float(deff.effective_n),
        effective_n_per_level=per_level,
        overdispersion=overdispersion,
    )
