"""Decisions that more than one stage needs, each taken here and only here.

Stages and renderers read these decisions; none takes them again. Each is a
pure function of plain values with its own tests (tests/test_decisions.py).

* :func:`verdict_method`: the analysis a term's corrected verdict rests on.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["MethodRegime", "verdict_method"]


@dataclass(frozen=True, kw_only=True)
class MethodRegime:
    """What the choice of a term's corrected analysis depends on.

    ``kind`` is the response's kind (continuous, binary, count). ``has_unit``: the
    term has a replicated experimental unit among the random groupings;
    ``confounded``: each of its levels sits in a single unit. ``mixed_fitted`` and
    ``mixed_converged`` describe the REML fit of the design's random groupings, and
    ``unit_variance_at_zero`` whether the term's unit variance was estimated at 0.
    ``strata_row``: the exact multi-stratum ANOVA holds the term wholly in one
    stratum (a balanced, orthogonal design). ``too_few_discrete``: a yes/no or
    count response with fewer units than any test holds its error rate with
    (the calibration study's bound).
    """

    kind: str
    has_unit: bool
    confounded: bool = False
    mixed_fitted: bool = False
    mixed_converged: bool = False
    unit_variance_at_zero: bool = False
    strata_row: bool = False
    too_few_discrete: bool = False


def verdict_method(r: MethodRegime) -> str | None:
    """The analysis a term's corrected verdict rests on, or None when none is valid.

    By regime, as the calibration study (docs/calibration.md) supports:

    * a confounded term has no test (None);
    * a balanced, orthogonal design: the exact multi-stratum ANOVA (``strata_anova``);
    * otherwise, for a term with a unit: the mixed model when the response is
      continuous, REML converged and the unit variance is not at 0
      (``mixed_model``), else the unit means (``unit_means``; for a yes/no or
      count response the unit proportions or mean counts);
    * a term without a replicated unit (it varies within units, or each row is
      its own unit): the mixed model when one was fitted and converged (the
      design's groupings as random effects), else the analysis as claimed;
    * a yes/no or count response with too few units for any calibrated test: None,
      whatever the design.

    >>> verdict_method(MethodRegime(kind="continuous", has_unit=True, mixed_fitted=True,
    ...                             mixed_converged=True))
    'mixed_model'
    >>> verdict_method(MethodRegime(kind="binary", has_unit=True, mixed_fitted=True,
    ...                             mixed_converged=True))
    'unit_means'
    """
    if r.confounded:
        return None
    method: str | None = "unit_means" if r.has_unit else "as_claimed"
    if r.mixed_fitted:
        if r.has_unit:
            if not r.unit_variance_at_zero and r.mixed_converged and r.kind == "continuous":
                method = "mixed_model"
        elif r.mixed_converged:
            method = "mixed_model"
    if r.strata_row:
        method = "strata_anova"
    if r.has_unit and r.kind != "continuous" and r.too_few_discrete:
        method = None
    return method
