"""Random slopes a claimed mixed model leaves out.

A treatment that varies within a grouping the claimed model gives a random
intercept (every subject saw every condition) is tested against the residual
when the model has no random slope; if the groupings respond differently to
the treatment, that test is too liberal, because the replicates of a
within-grouping treatment are the groupings, not the rows (Barr, Levy,
Scheepers & Tily 2013, J. Mem. Lang. 68:255-278; Schielzeth & Forstmeier
2009, Behav. Ecol. 20:416-420). For a categorical treatment the
grouping-by-treatment variation is the random intercept of the grouping x
treatment cells, ``(1|g) + (1|g:x)`` (the compound-symmetric form of the
random slope, as in the classical mixed ANOVA of a within-subject factor).
For a number (a time, a dose varied within subjects) it is the random slope
itself, uncorrelated with the intercept, ``(1|g) + (0 + x|g)``
(:mod:`replicheck.stats.random_slopes`).

This module refits the claimed model with that random effect added, when the
cells hold replicate rows (otherwise the variation cannot be told from the
residual), and tests its variance by the REML likelihood ratio, referred to
an equal mixture of chi-squared with 0 and 1 df because the variance lies on
the boundary under the null hypothesis (Self & Liang 1987, JASA 82:605-610;
Stram & Lee 1994, Biometrics 50:1171-1177).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np

from replicheck.partitions import dense_codes, is_nested, pair_codes, same_partition
from replicheck.refit import (
    TermInput,
    fit_mixed,
    known_groupings,
    model_design,
    whitened,
    with_blocks,
)
from replicheck.stats import DesignError, dist, satterthwaite_test
from replicheck.stats.random_slopes import RandomTerm, fit_random_slopes

SLOPE_ALPHA = 0.05  # the likelihood-ratio test of the omitted variance (common practice)
MIN_CELL_ROWS = 1.5  # mean rows per grouping x treatment cell needed to see the variation


@dataclass(frozen=True)
class SlopeCheck:
    """The claimed model beside the same model with a grouping x term random effect."""

    term: str
    grouping: str
    lr: float  # REML likelihood-ratio statistic of the added variance
    p_value: float  # against the 50:50 mixture of chi-squared(0) and chi-squared(1)
    var_slope: float
    var_residual: float
    statistic: float  # the term's Satterthwaite F with the random effect added
    df: tuple[float, float]
    term_p: float

    @property
    def material(self) -> bool:
        return self.p_value < SLOPE_ALPHA


def omitted_slopes(
    y: np.ndarray,
    terms: Sequence[TermInput],
    random: Mapping[str, np.ndarray],
    fixed_blocks: Sequence[np.ndarray] = (),
) -> dict[str, SlopeCheck]:
    """For each main-effect term varying within a claimed random grouping, the check.

    Main effects are checked (categorical ones and numbers), against the first claimed
    grouping they vary within whose cells with the term hold replicate rows
    and which the claimed model does not already cross with the term.
    """
    if not random:
        return {}
    known, random = known_groupings(random)
    if not known.all():
        y = y[known]
        terms = [
            replace(t, codes=t.codes[known], values=None if t.values is None else t.values[known])
            for t in terms
        ]
        fixed_blocks = [b[known] for b in fixed_blocks]
    if y.size < 3:  # no row (or almost none) has a value of every claimed grouping
        return {}
    X, index, _ = model_design(terms)
    X = with_blocks(X, fixed_blocks)
    names = [f"x{j}" for j in range(X.shape[1])]
    try:
        base, _ = fit_mixed(y, X, random, names)
    except DesignError:
        return {}
    out: dict[str, SlopeCheck] = {}
    for t in terms:
        if len(t.factors) != 1 or t.degree > 1:
            continue
        for gname, g in random.items():
            if is_nested(g, t.codes):
                continue  # the term is constant within g: no slope to vary
            cells = dense_codes(pair_codes(dense_codes(g), t.codes))
            k = int(cells.max()) + 1
            if t.values is None and (
                y.size / k < MIN_CELL_ROWS or any(same_partition(cells, r) for r in random.values())
            ):
                continue  # a number's slope is seen with one row per cell
            name = f"{gname}:{t.term}"
            if name in random:
                continue
            try:
                if t.values is not None:
                    ones = np.ones((y.size, 1))
                    slope = RandomTerm(name, dense_codes(g), t.values.reshape(-1, 1))
                    fit = fit_random_slopes(
                        y,
                        X,
                        [*(RandomTerm(k, v, ones) for k, v in random.items()), slope],
                        names,
                    )
                    variance = float(fit.components[f"{name}[0]"])
                else:
                    fit, _ = fit_mixed(y, X, {**random, name: cells}, names)
                    variance = float(fit.components[name])
                L = np.zeros((len(index[t.term]), X.shape[1]))
                L[np.arange(len(index[t.term])), index[t.term]] = 1.0
                test = satterthwaite_test(fit, whitened(L, X))
            except DesignError:
                continue
            lr = max(float(base.reml_deviance - fit.reml_deviance), 0.0)
            out[t.term] = SlopeCheck(
                t.term,
                gname,
                lr,
                float(0.5 * dist.chi2_sf(lr, 1)) if lr > 0 else 1.0,
                variance,
                float(fit.components["residual"]),
                float(test.statistic),
                (float(test.df_num), float(test.df_den)),
                float(test.p_value),
            )
            break
    return out
