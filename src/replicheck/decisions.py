"""Decisions that more than one stage needs, each taken here and only here.

Stages and renderers read these decisions; none takes them again. Each is a
pure function of plain values with its own tests (tests/test_decisions.py).

* :func:`verdict_method`: the analysis a term's corrected verdict rests on;
* :func:`shown_term`, :func:`headline_term`, :func:`key_term`: which term each
  part of a report with several terms speaks of (below).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from replicheck.vocab import AnalysisName

__all__ = ["MethodRegime", "headline_term", "key_term", "shown_term", "verdict_method"]


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


def verdict_method(r: MethodRegime) -> AnalysisName | None:
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
    method: AnalysisName | None = "unit_means" if r.has_unit else "as_claimed"
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


# ---------------------------------------------------------------------------
# which term each part of the report speaks of
#
# A report with several terms (a factorial, a split plot) speaks of one term in
# several places, and the places have different needs, so there are three
# selections, each made here only:
#
# * the reported term: the term a reported result is read for (the first term,
#   the first treatment, unless the claim names its terms): the claim section and
#   the picture of the data;
# * the headline term: the first term with the report's (worst) status: the verdict
#   (its summary, its analysis), the suggested wording and the row of a screening index;
# * the key term: the term whose unit the key figures describe (the top-level
#   clustering, randomisation test and design needs, which need a measured unit): the
#   headline term when its unit was measured, so that the figures under a verdict
#   quantify the problem the verdict names; else the first term with a measured unit.
#
# The picture follows the reported term because it draws the claimed result beside
# the corrected one; the key figures follow the verdict because they say how large
# the verdict's problem is and what a design without it would need.


def shown_term(has_claim: Sequence[bool]) -> int:
    """Index of the term the picture and the overall check of the claim speak of:
    the first with a reported result, else the first.

    >>> shown_term([False, True, True])
    1
    """
    return next((i for i, c in enumerate(has_claim) if c), 0)


def headline_term(statuses: Sequence[str], status: str) -> int:
    """Index of the term the verdict speaks of: the first with the report's status
    (the worst over the terms), else the first.

    >>> headline_term(["ok", "pseudoreplicated", "pseudoreplicated"], "pseudoreplicated")
    1
    """
    return next((i for i, s in enumerate(statuses) if s == status), 0)


def key_term(statuses: Sequence[str], status: str, has_unit: Sequence[bool]) -> int:
    """Index of the term whose unit the key figures describe (the top-level clustering,
    randomisation test and design needs): the headline term when its replicated unit
    was measured, else the first term whose unit was, else the first.

    >>> key_term(["ok", "pseudoreplicated"], "pseudoreplicated", [True, True])
    1
    >>> key_term(["confounded", "pseudoreplicated"], "confounded", [False, True])
    1
    """
    at = headline_term(statuses, status)
    if has_unit[at]:
        return at
    return next((i for i, u in enumerate(has_unit) if u), 0)
