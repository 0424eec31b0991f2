"""Tail areas and quantiles of the F, t, chi-squared and normal distributions.

The same special functions that ``scipy.stats`` calls for these distributions
(``fdtrc``, ``stdtr``, ``chdtrc``, ``ndtri``, ``fdtri``, ``stdtrit``), without
importing ``scipy.stats`` (about half a second of start-up; a short audit would
spend most of its time loading it). Values outside a distribution's support are
those ``scipy.stats`` gives: a survival function of 1 below the support, and NaN
for degrees of freedom that are not positive. Checked against ``scipy.stats`` in
tests/test_stats_dist.py.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import special


def _nan_unless(ok: Any, value: Any) -> Any:
    out = np.where(ok, value, np.nan)
    return float(out) if np.ndim(out) == 0 else out


def f_sf(x: Any, dfn: Any, dfd: Any) -> Any:
    """P(F > x) for F on (dfn, dfd) degrees of freedom."""
    x, dfn, dfd = np.asarray(x, float), np.asarray(dfn, float), np.asarray(dfd, float)
    ok = (dfn > 0) & (dfd > 0) & ~np.isnan(x)
    with np.errstate(invalid="ignore"):
        value = np.where(x <= 0, 1.0, special.fdtrc(dfn, dfd, np.maximum(x, 0.0)))
    return _nan_unless(ok, value)


def f_ppf(q: Any, dfn: Any, dfd: Any) -> Any:
    """The ``q`` quantile of F on (dfn, dfd) degrees of freedom."""
    q, dfn, dfd = np.asarray(q, float), np.asarray(dfn, float), np.asarray(dfd, float)
    ok = (dfn > 0) & (dfd > 0) & (q >= 0) & (q <= 1)
    with np.errstate(invalid="ignore"):
        value = special.fdtri(dfn, dfd, np.clip(q, 0.0, 1.0))
    return _nan_unless(ok, value)


def t_sf(x: Any, df: Any) -> Any:
    """P(T > x) for Student's t on ``df`` degrees of freedom."""
    x, df = np.asarray(x, float), np.asarray(df, float)
    with np.errstate(invalid="ignore"):
        value = special.stdtr(df, -x)
    return _nan_unless((df > 0) & ~np.isnan(x), value)


def t_ppf(q: Any, df: Any) -> Any:
    """The ``q`` quantile of Student's t on ``df`` degrees of freedom."""
    q, df = np.asarray(q, float), np.asarray(df, float)
    with np.errstate(invalid="ignore"):
        value = np.where(q == 0, -np.inf, special.stdtrit(df, np.clip(q, 0.0, 1.0)))
    return _nan_unless((df > 0) & (q >= 0) & (q <= 1), value)


def chi2_sf(x: Any, df: Any) -> Any:
    """P(X > x) for chi-squared on ``df`` degrees of freedom."""
    x, df = np.asarray(x, float), np.asarray(df, float)
    with np.errstate(invalid="ignore"):
        value = np.where(x <= 0, 1.0, special.chdtrc(df, np.maximum(x, 0.0)))
    return _nan_unless((df > 0) & ~np.isnan(x), value)


def norm_ppf(q: Any) -> Any:
    """The ``q`` quantile of the standard normal distribution."""
    q = np.asarray(q, float)
    value = special.ndtri(q)
    return float(value) if np.ndim(value) == 0 else value


def norm_sf(x: Any) -> Any:
    """P(Z > x) for the standard normal distribution."""
    x = np.asarray(x, float)
    value = special.ndtr(-x)
    return float(value) if np.ndim(value) == 0 else value


def f_isf(q: float, dfn: float, dfd: float) -> float:
    """The F value exceeded with probability ``q`` (``scipy.stats.f.isf``: the
    ``1 - q`` quantile)."""
    return float(f_ppf(1.0 - q, dfn, dfd))


def ncf_sf(x: float, dfn: float, dfd: float, nc: float) -> float:
    """P(F' > x) for the noncentral F on (dfn, dfd) df with noncentrality ``nc``
    (the Boost function ``scipy.stats.ncf.sf`` calls, else one minus the CDF)."""
    from scipy.special import _ufuncs

    tail = getattr(_ufuncs, "_ncf_sf", None)
    if tail is not None:
        return float(tail(x, dfn, dfd, nc))
    return float(1.0 - special.ncfdtr(dfn, dfd, nc, x))
