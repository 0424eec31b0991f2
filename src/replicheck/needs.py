"""What a valid design would need: the units per level to detect the effect.

Taken for the term the key figures describe (:func:`replicheck.decisions.key_term`),
from its clustering: the variance components within units and the mean unit
size (see :mod:`replicheck.stats.power` for the method).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from replicheck.clustering import Clustering
from replicheck.partitions import group_means
from replicheck.refit import TermInput
from replicheck.stats.power import DesignNeeds, design_needs, stated_effect_means


def needs_of(
    y: np.ndarray,
    term: TermInput,
    clustering: Clustering | None,
    *,
    alpha: float,
    power: float,
    effect: float | None,
) -> DesignNeeds | None:
    """Units per level a design would need to detect the observed differences between the
    level means of the unit means (or ``effect``, a difference between two level means)
    with ``power`` at ``alpha``; None when the term's unit was not measured."""
    if clustering is None or term.unit is None:
        return None
    means, _ = group_means(term.unit, y)
    level = np.zeros(means.size, dtype=np.int64)
    level[term.unit] = term.codes
    k = len(term.labels)
    if effect is None:
        level_means = [float(means[level == j].mean()) for j in range(k)]
    else:
        level_means = stated_effect_means(effect, k)
    needs = design_needs(
        level_means,
        clustering.var_unit,
        clustering.var_residual,
        clustering.mean_unit_size,
        alpha=alpha,
        power=power,
    )
    return needs if effect is None else replace(needs, effect_kind="stated", difference=effect)
