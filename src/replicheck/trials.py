"""Claimed logistic and Poisson regressions: the response's kind, and binomial rows as trials.

A formula response ``cbind(successes, failures)`` (or ``cbind(successes,
total - successes)``) says that each file row holds several yes/no trials: the
animals of one herd in one period, the seeds of one pot. The audit reads such
a row as that many rows with 0 or 1, and keeps the file row as a grouping
(:data:`FILE_ROW`): the trials of one row share whatever was applied to it, so
when a treatment was applied to the pot or the herd-period, the file row (or a
coarser grouping) is its experimental unit, which is the question the audit
asks. The logistic regression of the trials is the binomial regression of the
rows (the same likelihood up to a constant), so the claimed fit is unchanged.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd

from replicheck.errors import InputError
from replicheck.io import Table
from replicheck.stats.discrete import ResponseKind, response_kind

__all__ = ["FILE_ROW", "MAX_TRIALS", "claimed_kind", "expand_trials"]

FILE_ROW = "[file row]"
MAX_TRIALS = 5_000_000  # trials read one by one; beyond, the work would not fit in memory


def _counts(data: pd.DataFrame, col: str, what: str) -> np.ndarray:
    raw = data[col]
    values = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float)
    if bool(np.any(raw.notna().to_numpy() & ~np.isfinite(values))):
        raise InputError(f"the {what} column '{col}' of cbind() must hold whole numbers >= 0")
    known = values[np.isfinite(values)]
    if known.size and (np.any(known < 0) or np.any(known != np.round(known))):
        raise InputError(f"the {what} column '{col}' of cbind() must hold whole numbers >= 0")
    return values


def expand_trials(table: Table, trials: tuple[str, str, str]) -> Table:
    """Each file row as its yes/no trials: the successes column becomes 0/1.

    ``trials`` is (successes, failures or total, ``"failures"`` or ``"total"``).
    The failures (or total) column leaves the table; :data:`FILE_ROW` numbers
    the file rows from 1. Rows with a missing count, or no trials, leave.
    """
    successes, other, kind = trials
    data = table.data
    s = _counts(data, successes, "successes")
    o = _counts(data, other, "failures" if kind == "failures" else "totals")
    f = o - s if kind == "total" else o
    known = np.isfinite(s) & np.isfinite(f)
    if np.any(known & (f < 0)):
        raise InputError(
            f"cbind({successes}, {other} - {successes}): some rows have more successes "
            f"than '{other}'"
        )
    s_int = np.where(known, s, 0).astype(np.int64)
    f_int = np.where(known, f, 0).astype(np.int64)
    n = s_int + f_int
    total = int(n.sum())
    if total == 0:
        raise InputError(f"cbind() gives no trials: '{successes}' and '{other}' are all 0")
    if total > MAX_TRIALS:
        raise InputError(
            f"cbind() gives {total:,} trials, more than {MAX_TRIALS:,} that replicheck reads "
            "one by one"
        )
    name = FILE_ROW
    while name in data.columns:
        name = f"[{name}]"
    rows = np.repeat(np.arange(len(data)), n)
    out = data.drop(columns=[other]).iloc[rows].reset_index(drop=True)
    # within each file row, the first s trials are successes
    start = np.repeat(np.cumsum(n) - n, n)
    position = np.arange(total) - start
    out[successes] = (position < np.repeat(s_int, n)).astype(float)
    out[name] = rows + 1
    return replace(table, data=out)


def claimed_kind(y: np.ndarray, family: str | None, response: str) -> ResponseKind:
    """The response's kind; a claimed family must fit the values (else a one-line error)."""
    kind = response_kind(y)
    if family == "binomial" and kind != "binary":
        raise InputError(
            f"a logistic regression (family binomial) needs a yes/no response, but "
            f"'{response}' holds other values; give cbind(successes, failures) for counts "
            "of trials"
        )
    if family == "poisson":
        if not (np.all(y >= 0) and np.all(y == np.round(y))):
            raise InputError(
                f"a Poisson regression needs counts (whole numbers >= 0), but '{response}' "
                "holds other values"
            )
        return "count"
    return kind
