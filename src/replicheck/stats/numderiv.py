"""Numerical helpers for the fits with no closed form here: a bounded search and a Hessian."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np


def _minimize(*args: Any, **kwargs: Any) -> Any:
    """scipy.optimize.minimize, imported when first needed (it loads scipy.spatial)."""
    from scipy import optimize

    return optimize.minimize(*args, **kwargs)


__all__ = ["hessian", "minimise"]


def minimise(
    f: Callable[[np.ndarray], float],
    x0: np.ndarray,
    bounds: Sequence[tuple[float | None, float | None]],
    xtol: float,
    ftol: float,
    maxfev: int,
) -> Any:
    """L-BFGS-B from ``x0``, polished by Powell's method; the better of the two results
    (a scipy ``OptimizeResult``)."""
    first = _minimize(f, x0, method="L-BFGS-B", bounds=bounds)
    polish = _minimize(
        f,
        first.x,
        method="Powell",
        bounds=bounds,
        options={"xtol": xtol, "ftol": ftol, "maxfev": maxfev},
    )
    best = polish if polish.fun <= first.fun else first
    best.success = bool(first.success or polish.success)
    return best


def hessian(f: Callable[[np.ndarray], float], x: np.ndarray, relative: float) -> np.ndarray:
    """Second derivatives of ``f`` at ``x``.

    Four-point central differences, ``(f(x+hi+hj) - f(x+hi-hj) - f(x-hi+hj) +
    f(x-hi-hj)) / (4 hi hj)``, with steps ``relative * max(|x_i|, 0.1)``,
    Richardson-extrapolated over three halvings of the steps (the error of each
    difference is of order h^2, so the extrapolation removes it to order h^6).
    """
    k = x.size
    base = relative * np.maximum(np.abs(x), 0.1)
    table: list[np.ndarray] = []
    for level in range(3):
        h = base / 2**level
        out = np.zeros((k, k))
        for i in range(k):
            for j in range(i, k):
                ei = np.zeros(k)
                ej = np.zeros(k)
                ei[i], ej[j] = h[i], h[j]
                num = f(x + ei + ej) - f(x + ei - ej) - f(x - ei + ej) + f(x - ei - ej)
                out[i, j] = out[j, i] = num / (4 * h[i] * h[j])
        table.append(out)
    for step in range(1, len(table)):
        factor = 4.0**step
        table = [(factor * table[j + 1] - table[j]) / (factor - 1) for j in range(len(table) - 1)]
    return table[0]
