"""What a valid design would need: the units per level to detect the effect.

Taken for the first term with a replicated experimental unit
(:func:`replicheck.decisions.measured_term`), from its clustering: the
variance components within units and the mean unit size (see
:mod:`replicheck.stats.power` for the method).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import replace

import numpy as np

from replicheck.clustering import Clustering
from replicheck.decisions import measured_term
from replicheck.partitions import group_means
from replicheck.refit import TermInput
from replicheck.stats.power import DesignNeeds, design_needs, stated_effect_means


def needs_of(
    y: np.ndarray,
    inputs: Sequence[TermInput],
    clusterings: Sequence[Clustering | None],
    *,
    alpha: float,
    power: float,
    effect: float | None,
) -> DesignNeeds | None:
    """Units per level a design would need to detect the observed differences between the
    level means of the unit means (or ``effect``, a difference between two level means)
    with ``power`` at ``alpha``; None when no term has a replicated unit."""
    at = measured_term([cl is not None for cl in clusterings])
    for ti, cl in list(zip(inputs, clusterings, strict=True))[at:]:
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
            alpha=alpha,
            power=power,
        )
        return needs if effect is None else replace(needs, effect_kind="stated", difference=effect)
    return None
