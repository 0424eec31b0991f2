"""Experimental units hidden in the order of the rows.

Samples are often processed in runs: all controls, then all treated, then
the controls of the second batch. When the file (or a sequence column) keeps
that order, the runs show as long stretches of one treatment level. This scan
asks two questions along the order.

**The order.** An ``order`` column when one is given (numbers or time
stamps; rows without a value are left out). Otherwise a sequence column is
looked for: an integer column, without missing values, whose name carries a
word of sequence (seq, sequence, order, injection, inj, position, pos,
acquisition, lfd; or sample/run/measurement with no, nr, num or number, as in
``sample_no``) and whose values are a permutation of 1..n (or 0..n-1) that is
not already increasing. A column that only increases down the file (row
numbers) says no more than the file order and is read as the file order. The
first such column wins; without one, the file order is used.

**How the rows are listed.** Rows are seldom listed one by one: a file sorted
by block, then plot, lists the rows of a plot together, and such rows are not
independent positions. The scan first reads the nested stretches in which the
rows are listed (:func:`listing`: recorded columns, alone or in pairs, that
cut the ordered rows into contiguous stretches, coarse to fine, e.g.
``block``, ``block x plot``). The *items* of the order are the coarsest of
these stretches that lie inside one treatment level (the plots, when each
plot has one variety), or the rows when there is none; each stretch counts
once. A file sorted by block, then tank, is therefore read tank by tank, and
runs made of recorded stretches are not taken for hidden runs. Columns in
``exclude`` are neither read as a sequence column nor as listing structure.

1. **Treatment in runs** (Signal ``treatment-in-runs``): the number of runs
   of the treatment levels along the items. For two levels, the exact
   one-sided p-value of the Wald-Wolfowitz runs test (few runs; Wald &
   Wolfowitz 1940, Ann. Math. Stat. 11:147-162; exact distribution of Swed &
   Eisenhart 1943, Ann. Math. Stat. 14:66-87). For more levels, the
   generalised number-of-runs test (expected runs ``1 + (n^2 - sum n_i^2)/n``)
   with a seeded Monte Carlo p-value over 4000 random arrangements,
   ``p = (1 + hits) / (1 + draws)`` (Phipson & Smyth 2010, Stat. Appl.
   Genet. Mol. Biol. 9:39).
2. **Residual autocorrelation** (Signal ``order-autocorrelation``): the
   response averaged per item (items inside one cell of all treatments),
   minus the means of the treatment cells and of the finest listed stretch
   that holds several items (a block listed block by block), and the
   lag-1 autocorrelation of these residuals along the order (the
   ``statsmodels.tsa.stattools.acf`` definition). The one-sided permutation
   p-value (4000 draws) permutes the residuals within treatment cells, or
   within those stretches when there are any (Manly 2007, *Randomization,
   Bootstrap and Monte Carlo Methods in Biology*, ch. 8 and 11). Removing
   means makes neighbours in a set negatively correlated (about -1/(m-1) in
   sets of m), so the permutation mean, not zero, is the reference; the
   signal also needs the observed value to exceed it by 0.1 (a chosen floor,
   so that a trivial correlation in a large file is not reported).

Signals are reported at ``p < 0.005`` (the stricter level proposed by
Benjamin et al. 2018, Nature Human Behaviour 2:6-10, used here as common
practice for a screen of many columns).

**Derived runs.** When the treatment comes in runs at ``p < 0.001`` (a strict
screening level, common practice) along a sequence column or time stamps, the
maximal contiguous runs of one treatment level are returned as
``run[<order>]`` (``run[file order]`` for the file order, see below),
provided every run holds at least two rows, the runs group the rows (at
least two runs, fewer than half as many runs as rows) and no recorded
column, listed stretch or column crossed with the treatment already gives that
partition.
The runs are not split further: a break of the response inside a run would
be a guess.

**The file order** yields runs only when no recorded column is already a
replicated grouping nested in the treatment (half the rows or more in levels
of two rows or more; a measurement, numbers with fractional values and more
distinct values than half the rows, does not count: a few tied readings would
make it look nested): files are often listed by
treatment in several stretches (sheets pasted one after another), which says
nothing about processing when the units are recorded. Runs in the file order
are reported as the Signal ``treatment-in-file-runs`` (a note), runs along a
sequence column as ``treatment-in-runs``.

**A file sorted by treatment** (each level in one stretch of the file order,
counted in items) is extremely common and says nothing about processing: it is
reported as Signal ``file-sorted-by-treatment`` (no p-value) and nothing is
derived. One run per level along an explicit or detected sequence column, in
contrast, is evidence that processing order and treatment coincide and is
treated like any other runs.

References are cited from memory (volume and page numbers unchecked).
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.special import gammaln, logsumexp

from replicheck.codebook import column_codes
from replicheck.defaults import DEFAULT_SEED
from replicheck.errors import InputError
from replicheck.numbers import format_number, p_phrase
from replicheck.partitions import dense_codes, is_nested, same_partition
from replicheck.stats import dist
from replicheck.structure.evidence import replicated_share
from replicheck.structure.hidden.base import DerivedGrouping, HiddenScan, Signal
from replicheck.structure.hidden.time import parse_times
from replicheck.structure.names import name_hint, tokens

SIGNAL_ALPHA = 0.005  # report a signal (Benjamin et al. 2018; common practice)
DERIVE_ALPHA = 0.001  # derive runs (strict screening level, common practice)
N_DRAWS = 4000
MIN_EXCESS_R1 = 0.1  # autocorrelation above its permutation mean worth reporting (chosen)
MIN_ITEMS = 6  # fewer positions along the order say nothing (a chosen value)
_CHUNK_ELEMENTS = 4_000_000
_WORK = 20_000_000  # permutation work (positions x draws) beyond which moments are used

ORDER_WORDS = frozenset(
    {"seq", "sequence", "order", "injection", "inj", "position", "pos", "acquisition", "lfd"}
)
_COUNTED_WORDS = frozenset({"sample", "run", "measurement", "injection"})
_NUMBER_WORDS = frozenset({"no", "nr", "num", "number"})


# --------------------------------------------------------------------------- tests


@dataclass(frozen=True)
class RunsTest:
    """Number of runs of labels along a sequence against random arrangement."""

    n_runs: int
    expected: float  # 1 + (n^2 - sum n_i^2) / n
    sd: float  # exact standard deviation under random arrangement (see runs_moments)
    z: float | None  # (runs - expected) / sd
    p_value: float  # one-sided: as few runs or fewer
    method: str  # exact | monte carlo | normal
    n_items: int
    n_levels: int

    @property
    def exact(self) -> bool:
        return self.method == "exact"


def _log_comb(n: int | np.ndarray, k: int | np.ndarray) -> np.ndarray:
    """log C(n, k), -inf outside 0 <= k <= n (vectorised)."""
    n_a, k_a = np.asarray(n, dtype=float), np.asarray(k, dtype=float)
    valid = (k_a >= 0) & (k_a <= n_a) & (n_a >= 0)
    n_s, k_s = np.where(valid, n_a, 0.0), np.where(valid, k_a, 0.0)
    out = gammaln(n_s + 1) - gammaln(k_s + 1) - gammaln(n_s - k_s + 1)
    return np.where(valid, out, -np.inf)


_RUNS_WINDOW = 40.0  # standard deviations of the runs distribution summed on each side


def runs_cdf_two(n1: int, n2: int, runs: int) -> float:
    """P(R <= runs) for two labels with counts n1, n2 in random order (Swed & Eisenhart 1943).

    P(R = 2s) = 2 C(n1-1, s-1) C(n2-1, s-1) / C(n, n1);
    P(R = 2s+1) = [C(n1-1, s) C(n2-1, s-1) + C(n1-1, s-1) C(n2-1, s)] / C(n, n1).
    """
    if n1 == 0 or n2 == 0:
        return 1.0
    if runs < 2:
        return 0.0
    total = float(_log_comb(n1 + n2, n1))
    # The distribution is unimodal about its mean with standard deviation sd; terms
    # more than _RUNS_WINDOW sd away are below exp(-_RUNS_WINDOW^2 / 2) of the mode
    # and do not change a double-precision sum, so only the window is summed (the
    # exact sum over a million positions would take a second).
    mean, var = runs_moments([n1, n2])
    reach = _RUNS_WINDOW * math.sqrt(var) + 50
    if runs > mean + reach:
        return 1.0
    r = np.arange(max(2, math.floor(mean - reach)), runs + 1)
    if r.size == 0:
        return 0.0
    s = r // 2
    even = np.log(2.0) + _log_comb(n1 - 1, s - 1) + _log_comb(n2 - 1, s - 1)
    odd = np.logaddexp(
        _log_comb(n1 - 1, s) + _log_comb(n2 - 1, s - 1),
        _log_comb(n1 - 1, s - 1) + _log_comb(n2 - 1, s),
    )
    terms = np.where(r % 2 == 0, even, odd)
    return float(min(1.0, math.exp(float(logsumexp(terms)) - total)))


def count_runs(labels: np.ndarray) -> int:
    """Number of maximal stretches of equal labels."""
    labels = np.asarray(labels)
    return 0 if labels.size == 0 else 1 + int(np.count_nonzero(labels[1:] != labels[:-1]))


def runs_moments(counts: Sequence[int] | np.ndarray) -> tuple[float, float]:
    """Exact mean and variance of the number of runs of labels with these counts.

    R = 1 + sum of the n - 1 indicators that neighbours differ. With
    q2 = P(two given positions agree), q3 = P(three agree) and q22 = P(two
    disjoint pairs each agree) under random arrangement, neighbouring
    indicators have P(both differ) = 1 - 2 q2 + q3 and disjoint ones
    1 - 2 q2 + q22; for two labels this is the Wald & Wolfowitz (1940) variance.
    """
    c = np.asarray(counts, dtype=float)
    n = float(c.sum())
    if n < 2:
        return float(n > 0), 0.0
    q2 = float((c * (c - 1)).sum()) / (n * (n - 1))
    p = 1.0 - q2
    mean = 1.0 + (n - 1) * p
    var = (n - 1) * p * (1 - p)
    if n >= 3:
        q3 = float((c * (c - 1) * (c - 2)).sum()) / (n * (n - 1) * (n - 2))
        var += 2 * (n - 2) * ((1 - 2 * q2 + q3) - p * p)
    if n >= 4:
        pair = c * (c - 1)
        same = float((pair * (c - 2) * (c - 3)).sum()) + float(pair.sum() ** 2 - (pair**2).sum())
        q22 = same / (n * (n - 1) * (n - 2) * (n - 3))
        var += (n - 2) * (n - 3) * ((1 - 2 * q2 + q22) - p * p)
    return mean, max(var, 0.0)


def runs_test(labels: np.ndarray, *, seed: int = DEFAULT_SEED, draws: int = N_DRAWS) -> RunsTest:
    """One-sided runs test (few runs) of a sequence of labels; see the module docstring.

    Two labels: exact. More: seeded Monte Carlo, or, when ``n x draws``
    exceeds 2e7 (a large file), the normal approximation with the exact
    moments of :func:`runs_moments` and a continuity correction of 1/2.
    """
    codes, uniques = pd.factorize(np.asarray(labels), sort=True)
    n, k = codes.size, len(uniques)
    counts = np.bincount(codes, minlength=k)
    runs = count_runs(codes)
    expected, var = runs_moments(counts)
    sd = math.sqrt(var)
    z = (runs - expected) / sd if sd > 0 else None
    if k < 2:
        return RunsTest(runs, expected, sd, z, 1.0, "exact", n, k)
    if k == 2:
        p = runs_cdf_two(int(counts[0]), int(counts[1]), runs)
        return RunsTest(runs, expected, sd, z, p, "exact", n, k)
    if n * draws > _WORK:
        p = float(dist.norm_sf(-(runs + 0.5 - expected) / sd)) if sd > 0 else 1.0
        return RunsTest(runs, expected, sd, z, p, "normal", n, k)
    rng = np.random.default_rng([seed, 2])
    hits, done = 0, 0
    chunk = max(1, min(draws, _CHUNK_ELEMENTS // max(n, 1)))
    small = codes.astype(np.int16 if k < 30000 else np.int64)
    while done < draws:
        b = min(chunk, draws - done)
        perm = rng.permuted(np.broadcast_to(small, (b, n)), axis=1)
        r = 1 + np.count_nonzero(perm[:, 1:] != perm[:, :-1], axis=1)
        hits += int(np.count_nonzero(r <= runs))
        done += b
    return RunsTest(runs, expected, sd, z, (1 + hits) / (1 + draws), "monte carlo", n, k)


@dataclass(frozen=True)
class Autocorrelation:
    """Lag-1 autocorrelation of residuals along an order, with a permutation p-value."""

    r1: float
    expected: float  # mean of the permuted r1 (about -1/(m-1) within sets of m)
    p_value: float  # one-sided (positive autocorrelation)
    method: str  # permutation | normal (normal approximation to the permutation distribution)
    n_items: int
    n_permutations: int


def lag1(values: np.ndarray) -> np.ndarray:
    """Lag-1 autocorrelation along the last axis (the definition of statsmodels' ``acf``)."""
    x = np.asarray(values, dtype=float)
    x = x - x.mean(axis=-1, keepdims=True)
    den = (x * x).sum(axis=-1)
    num = (x[..., 1:] * x[..., :-1]).sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)


def permutation_mean_lag1(values: np.ndarray, groups: np.ndarray | None = None) -> float:
    """Exact mean of :func:`lag1` over all permutations of ``values`` within ``groups``.

    The denominator of the lag-1 autocorrelation is the same for every
    permutation, so the mean is ``E[sum_t x_t x_(t+1)] / sum_t x_t^2`` with ``x``
    centred on its mean. Two adjacent positions in one set ``j`` of ``m_j``
    values with sum ``S_j`` and sum of squares ``Q_j`` hold a random ordered pair
    of distinct values: ``E[x_t x_(t+1)] = (S_j^2 - Q_j) / (m_j (m_j - 1))``;
    positions in two different sets are independent: ``(S_j / m_j) (S_k / m_k)``.
    One pass over the positions; no permutation is drawn.
    """
    x = np.asarray(values, dtype=float)
    x = x - x.mean()
    den = float(x @ x)
    if x.size < 2 or den <= 0:
        return 0.0
    g = np.zeros(x.size, dtype=np.int64) if groups is None else dense_codes(groups)
    m = np.bincount(g).astype(float)
    s = np.bincount(g, weights=x)
    q = np.bincount(g, weights=x * x)
    mean = s / m
    with np.errstate(invalid="ignore", divide="ignore"):
        same_pair = np.where(m > 1, (s * s - q) / (m * (m - 1)), 0.0)
    a, b = g[:-1], g[1:]
    pair = np.where(a == b, same_pair[a], mean[a] * mean[b])
    return float(pair.sum()) / den


def _shuffle_within(e: np.ndarray, g: np.ndarray, b: int, rng: np.random.Generator) -> np.ndarray:
    """``b`` copies of ``e``, each permuted within the sets coded by ``g``."""
    n = e.size
    levels = np.unique(g)
    out = np.empty((b, n))
    if levels.size <= 50:
        for j in levels:  # Fisher-Yates within each exchangeable set
            idx = np.flatnonzero(g == j)
            out[:, idx] = rng.permuted(np.broadcast_to(e[idx], (b, idx.size)), axis=1)
        return out
    slots = np.argsort(g, kind="stable")
    keys = rng.random((b, n)) + 2.0 * g[None, :]  # sorts by set, at random within a set
    out[:, slots] = e[np.argsort(keys, axis=1)]
    return out


def autocorrelation_test(
    residuals: np.ndarray,
    groups: np.ndarray | None = None,
    *,
    seed: int = DEFAULT_SEED,
    draws: int = N_DRAWS,
) -> Autocorrelation:
    """Lag-1 autocorrelation of ``residuals`` (in order), permuted within ``groups``.

    ``groups``: integer codes of the exchangeable sets (None: all together).
    p = (1 + #{permuted r1 >= observed}) / (1 + draws). When ``n x draws``
    exceeds 2e7 (a large file) a smaller number of permutations (at least
    200) gives the mean and SD of the permutation distribution and p is read
    from the normal approximation to it (Manly 2007, ch. 3).
    """
    e = np.asarray(residuals, dtype=float)
    n = e.size
    observed = float(lag1(e))
    g = np.zeros(n, dtype=np.int64) if groups is None else np.asarray(groups, dtype=np.int64)
    normal = n * draws > _WORK
    if normal:
        draws = max(200, _WORK // max(n, 1))
    rng = np.random.default_rng([seed, 3])
    hits, done = 0, 0
    sums = np.zeros(2)
    chunk = max(1, min(draws, _CHUNK_ELEMENTS // max(n, 1)))
    while done < draws:
        b = min(chunk, draws - done)
        r = lag1(_shuffle_within(e, g, b, rng))
        hits += int(np.count_nonzero(r >= observed - 1e-12))
        sums += (float(r.sum()), float((r * r).sum()))
        done += b
    mean = float(sums[0]) / draws
    if not normal:
        return Autocorrelation(observed, mean, (1 + hits) / (1 + draws), "permutation", n, draws)
    sd = math.sqrt(max(float(sums[1]) / draws - mean * mean, 0.0))
    p = float(dist.norm_sf((observed - mean) / sd)) if sd > 0 else float(observed < mean)
    return Autocorrelation(observed, mean, p, "normal", n, draws)


# --------------------------------------------------------------------------- the order


def _integer_values(series: pd.Series) -> np.ndarray | None:
    if not pd.api.types.is_numeric_dtype(series.dtype) or pd.api.types.is_bool_dtype(series.dtype):
        return None
    if series.isna().any():
        return None
    v = series.to_numpy(dtype=float)
    if not np.all(np.isfinite(v)) or not np.all(v == np.round(v)):
        return None
    return v.astype(np.int64)


def _sequence_name(name: str) -> bool:
    toks = tokens(name)
    if any(t in ORDER_WORDS for t in toks):
        return True
    return any(t in _COUNTED_WORDS for t in toks) and any(t in _NUMBER_WORDS for t in toks)


def find_sequence_column(frame: pd.DataFrame, skip: Sequence[str] = ()) -> str | None:
    """The first sequence column of ``frame`` (rule in the module docstring), or None."""
    skipped = {str(s) for s in skip}
    n = len(frame)
    for column in frame.columns:
        name = str(column)
        if name in skipped or not _sequence_name(name):
            continue
        v = _integer_values(frame[column])
        if v is None or n < 2:
            continue
        increasing = bool(np.all(np.diff(v) > 0))
        s = np.sort(v)
        permutation = bool(np.array_equal(s, np.arange(1, n + 1))) or bool(
            np.array_equal(s, np.arange(n))
        )
        if permutation and not increasing:
            return name
    return None


@dataclass(frozen=True)
class _Order:
    positions: np.ndarray  # row indices in order (rows without a position left out)
    label: str  # "file order" or the column name
    column: str | None
    from_file: bool  # the order carries no more than the file order


def _resolve_order(frame: pd.DataFrame, order: str | None, skip: Sequence[str]) -> _Order:
    n = len(frame)
    if order is not None:
        if order not in frame.columns:
            raise InputError(f"order column '{order}' is not in the data")
        series = frame[order]
        if pd.api.types.is_numeric_dtype(series.dtype) and not pd.api.types.is_bool_dtype(
            series.dtype
        ):
            key = pd.to_numeric(series, errors="coerce").to_numpy(dtype=float)
        else:
            times, reason = parse_times(series)
            if times is None:
                raise InputError(
                    f"order column '{order}' holds neither numbers nor times: {reason}"
                )
            key = (times - times.min()).dt.total_seconds().to_numpy(dtype=float)
        ok = np.flatnonzero(np.isfinite(key))
        if ok.size < 2:
            raise InputError(f"order column '{order}' has fewer than two values")
        positions = ok[np.argsort(key[ok], kind="stable")]
        return _Order(positions, str(order), str(order), False)
    found = find_sequence_column(frame, skip)
    if found is not None:
        key = frame[found].to_numpy(dtype=float)
        return _Order(np.argsort(key, kind="stable"), found, found, False)
    return _Order(np.arange(n), "file order", None, True)


# --------------------------------------------------------------------------- items


def _codes(values: pd.Series | np.ndarray) -> np.ndarray:
    return dense_codes(np.asarray(values))


def _combine(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return _codes(a * (int(b.max()) + 1) + b)


def _measurement(series: pd.Series, n_levels: int, n_rows: int) -> bool:
    """Whether a column reads as a measurement rather than a record of units: numbers
    with fractional values and more distinct values than half the rows (a few tied
    readings make such a column look nested in the treatment by chance)."""
    numeric = pd.api.types.is_numeric_dtype(series.dtype)
    if n_levels <= n_rows / 2 or not numeric or pd.api.types.is_bool_dtype(series.dtype):
        return False
    values = series.to_numpy(dtype=float, na_value=np.nan)
    finite = values[np.isfinite(values)]
    return bool(np.any(finite != np.round(finite)))


def _recorded(
    frame: pd.DataFrame,
    rows: np.ndarray,
    skip: set[str],
    cache: dict[str, np.ndarray] | None = None,
) -> list[tuple[str, np.ndarray]]:
    """Codes along ``rows`` of every column without missing values there (not in ``skip``).

    ``cache`` keeps each column's codes over all rows (-1 where missing), so that
    a column is factorised once per scan; codes along ``rows`` are renumbered
    from those (the same codes as factorising the values at ``rows``).
    """
    cache = {} if cache is None else cache
    out = []
    for column in frame.columns:
        name = str(column)
        if name in skip:
            continue
        if name not in cache:
            cache[name] = column_codes(frame[column]).codes
        along = cache[name][rows]
        if (along < 0).any():
            continue
        out.append((name, _codes(along)))
    return out


@dataclass(frozen=True)
class Stretch:
    """A partition of the ordered rows into contiguous stretches named by recorded columns."""

    name: str  # e.g. "block x variety"
    codes: np.ndarray  # stretch per position along the order, 0.. in order
    n: int


def listing(recorded: Sequence[tuple[str, np.ndarray]]) -> list[Stretch]:
    """The nested stretches in which the rows are listed along the order, coarse to fine.

    Greedy: start from one stretch; repeatedly cross the current partition with
    the recorded column that refines it least while every level stays one
    contiguous stretch and the stretches hold two rows or more on average; when
    no single column does, a pair of columns is tried (plates numbered afresh within
    each compound are stretches of compound x plate). A file sorted by block,
    then variety, then nitrogen (one row each) gives ``block``,
    ``block x variety``.
    """
    if not recorded:
        return []
    m = recorded[0][1].size
    current = np.zeros(m, dtype=np.int64)
    k_now = 1
    names: list[str] = []
    chain: list[Stretch] = []
    # a column with more levels than half the rows cannot be part of a stretch
    left = [(name, codes) for name, codes in recorded if int(codes.max()) + 1 <= m / 2]
    # Where each column changes between neighbouring rows. Crossing the current
    # partition with columns changes wherever any of them does, so its number of
    # runs costs no coding; a crossing is contiguous exactly when its number of
    # levels equals its number of runs, and never has more levels than runs.
    # Candidates are therefore coded in increasing order of runs (in column order
    # among equals) and the first contiguous one is the one that refines least.
    changes = [codes[1:] != codes[:-1] for _, codes in left]
    moved = np.zeros(max(m - 1, 0), dtype=bool)
    while left:
        best: tuple[int, tuple[int, ...], np.ndarray] | None = None
        single_runs: dict[int, int] = {}
        for width in (1, 2):
            candidates: list[tuple[int, tuple[int, ...]]] = []
            for combo in itertools.combinations(range(len(left)), width):
                if width == 2 and any(single_runs[i] > m / 2 for i in combo):
                    continue  # crossing more columns never lowers the runs
                step = moved.copy()
                for i in combo:
                    step |= changes[i]
                runs = 1 + int(np.count_nonzero(step))
                if width == 1:
                    single_runs[combo[0]] = runs
                if runs <= k_now or runs > m / 2:
                    continue
                candidates.append((runs, combo))
            for runs, combo in sorted(candidates, key=lambda c: c[0]):
                crossed = current
                for i in combo:
                    crossed = _combine(crossed, left[i][1])
                if int(crossed.max()) + 1 == runs:
                    best = (runs, combo, crossed)
                    break
            if best is not None:
                break
        if best is None:
            break
        k_now, combo, current = best
        for i in combo:
            moved |= changes[i]
        names.extend(left[i][0] for i in combo)
        chain.append(Stretch(" x ".join(names), current, k_now))
        left = [c for i, c in enumerate(left) if i not in combo]
        changes = [c for i, c in enumerate(changes) if i not in combo]
    return chain


def _items(target: np.ndarray, chain: Sequence[Stretch]) -> Stretch | None:
    """The coarsest listed stretch inside one level of ``target`` (None: the rows).

    A stretch that is a whole level of ``target`` (a file sorted by treatment)
    is the thing under test, not an item.
    """
    k = int(target.max()) + 1
    for stretch in chain:
        if stretch.n > k and is_nested(stretch.codes, target):
            return stretch
    return None


def _strata(items: Stretch | None, chain: Sequence[Stretch], n_items: int) -> Stretch | None:
    """The finest listed stretch holding two items or more on average (None: none)."""
    coarser = [s for s in chain if s.n <= n_items / 2 and (items is None or s.n < items.n)]
    return coarser[-1] if coarser else None


def residuals(values: np.ndarray, factors: Sequence[np.ndarray], tol: float = 1e-10) -> np.ndarray:
    """Residuals of ``values`` from the additive model of the factors (integer codes).

    Alternating projections: subtract the group means of each factor in turn
    until nothing changes (the least-squares residual of the additive
    dummy-variable model; Guimaraes & Portugal 2010, Stata Journal 10:628-649).
    """
    r = np.asarray(values, dtype=float) - float(np.mean(values))
    scale = max(1.0, float(np.abs(r).max()))
    for _ in range(1000):
        before = r.copy()
        for codes in factors:
            sums = np.bincount(codes, weights=r)
            r = r - (sums / np.bincount(codes))[codes]
        if float(np.abs(r - before).max()) <= tol * scale:
            break
    return r


def _item_words(items: Stretch | None, n: int) -> str:
    return f"{n} rows" if items is None else f"{n} stretches of '{items.name}'"


# --------------------------------------------------------------------------- scan


def _named(source: str, treatment: str | None, t_index: int) -> str:
    """``run[source]`` (``run[source, treatment]`` for several), unless other words would win."""
    name = f"run[{source}]" if treatment is None else f"run[{source}, {treatment}]"
    if name_hint(name).kind != "process":
        name = "run[order]" if treatment is None else f"run[order, treatment {t_index + 1}]"
    return name


def _same_rows(a: np.ndarray, b: np.ndarray) -> bool:
    """Whether two codings (-1 unknown) know the same rows and group them identically."""
    ok = a >= 0
    return bool(np.array_equal(ok, b >= 0)) and same_partition(_codes(a[ok]), _codes(b[ok]))


def _skip(response: str, ordering: _Order, exclude: Sequence[str]) -> set[str]:
    skip = {str(response), *map(str, exclude)}
    if ordering.column is not None:
        skip.add(ordering.column)
    return skip


def _runs_of(
    frame: pd.DataFrame,
    ordering: _Order,
    treatment: str,
    response: str,
    exclude: Sequence[str],
    seed: int,
    cache: dict[str, np.ndarray] | None = None,
) -> tuple[list[Signal], np.ndarray | None, str, dict[str, float]]:
    """Signals of one treatment along the order, and its runs per row when they are derived."""
    pos = ordering.positions
    rows = pos[column_codes(frame[treatment]).codes[pos] >= 0]
    if rows.size < MIN_ITEMS:
        return [], None, "", {}
    target = _codes(column_codes(frame[treatment]).codes[rows])
    k = int(target.max()) + 1
    if k < 2:
        return [], None, "", {}
    recorded = _recorded(frame, rows, _skip(response, ordering, exclude), cache)
    chain = listing(recorded)
    items = _items(target, chain)
    item_codes = np.arange(rows.size) if items is None else items.codes
    n_items = int(item_codes.max()) + 1
    first = np.flatnonzero(np.concatenate([[True], item_codes[1:] != item_codes[:-1]]))
    item_labels = target[first]
    where = "the file" if ordering.from_file else f"the order of '{ordering.label}'"
    if ordering.from_file and count_runs(item_labels) == k:
        msg = (
            f"The file is sorted by treatment: each level of '{treatment}' fills one stretch "
            "of the file, so the file order carries no information on processing."
        )
        sorted_signal = Signal("file-sorted-by-treatment", (treatment,), float(k), None, msg)
        return [sorted_signal], None, "", {}
    if n_items < MIN_ITEMS:
        return [], None, "", {}
    test = runs_test(item_labels, seed=seed)
    signals: list[Signal] = []
    if test.p_value < SIGNAL_ALPHA:
        kind = {
            "exact": "exact runs test",
            "monte carlo": "runs test, Monte Carlo",
            "normal": "runs test, normal approximation",
        }[test.method]
        cols = (treatment,) if ordering.column is None else (ordering.column, treatment)
        signals.append(
            Signal(
                "treatment-in-file-runs" if ordering.from_file else "treatment-in-runs",
                cols,
                float(test.n_runs),
                test.p_value,
                f"Along {where}, the {k} levels of '{treatment}' come in {test.n_runs} runs "
                f"over {_item_words(items, n_items)} where {test.expected:.1f} are expected "
                f"in a random order ({kind}, {p_phrase(test.p_value)}).",
            )
        )
    if test.p_value >= DERIVE_ALPHA:
        return signals, None, "", {}
    if ordering.from_file and any(
        k < int(c.max()) + 1 < rows.size
        and is_nested(c, target)
        and replicated_share(c) >= 0.5
        and not _measurement(frame[name], int(c.max()) + 1, rows.size)
        for name, c in recorded
    ):
        # The file order makes a unit only when no recorded column does: a file
        # listed by treatment in several stretches (sheets pasted together) says
        # nothing about processing when the units are recorded.
        return signals, None, "", {}
    run_items = np.concatenate([[0], np.cumsum(item_labels[1:] != item_labels[:-1])])
    run_rows = run_items[item_codes]
    sizes = np.bincount(run_rows)
    n_runs = sizes.size
    if sizes.min() < 2 or n_runs < 2 or n_runs >= rows.size / 2:
        return signals, None, "", {}
    others = [c for _, c in recorded] + [s.codes for s in chain]
    others += [_combine(c, target) for _, c in recorded]
    # runs that are the treatment itself (processing confounded with it) are kept
    if not same_partition(run_rows, target) and any(same_partition(run_rows, o) for o in others):
        return signals, None, "", {}
    codes = np.full(len(frame), -1, dtype=np.int64)
    codes[rows] = run_rows
    span = f"{sizes.min()}" if sizes.min() == sizes.max() else f"{sizes.min()} to {sizes.max()}"
    how = (
        f"Along {where}, '{treatment}' comes in {n_runs} runs of {span} "
        f"rows ({test.n_runs} runs where {test.expected:.1f} are expected, "
        f"{p_phrase(test.p_value)}); each run is a group."
    )
    strength = {
        "runs": float(n_runs),
        "runs_of_items": float(test.n_runs),
        "expected_runs": test.expected,
        "p_value": test.p_value,
    }
    return signals, codes, how, strength


def _cell_codes(frame: pd.DataFrame, rows: np.ndarray, treatments: Sequence[str]) -> np.ndarray:
    """Codes of the treatment cells along ``rows`` (where every treatment is recorded)."""
    out = np.zeros(rows.size, dtype=np.int64)
    for t in treatments:
        out = _combine(out, _codes(column_codes(frame[t]).codes[rows]))
    return out


def _autocorrelation(
    frame: pd.DataFrame,
    ordering: _Order,
    response: str,
    treatments: Sequence[str],
    exclude: Sequence[str],
    seed: int,
    cache: dict[str, np.ndarray] | None = None,
) -> Signal | None:
    pos = ordering.positions
    y = pd.to_numeric(frame[response].iloc[pos], errors="coerce")
    keep = y.notna().to_numpy().copy()
    for t in treatments:
        keep &= column_codes(frame[t]).codes[pos] >= 0
    rows = pos[keep]
    if rows.size < MIN_ITEMS:
        return None
    cells = _cell_codes(frame, rows, treatments)
    chain = listing(_recorded(frame, rows, _skip(response, ordering, exclude), cache))
    items = _items(cells, chain)
    item_codes = np.arange(rows.size) if items is None else items.codes
    n_items = int(item_codes.max()) + 1
    if n_items < MIN_ITEMS:
        return None
    values = np.bincount(item_codes, weights=y.to_numpy(dtype=float)[keep]) / np.bincount(
        item_codes
    )
    first = np.flatnonzero(np.concatenate([[True], item_codes[1:] != item_codes[:-1]]))
    item_cells = _codes(cells[first])
    stretch = _strata(items, chain, n_items)
    strata = None if stretch is None else _codes(stretch.codes[first])
    resid = residuals(values, [item_cells] + ([] if strata is None else [strata]))
    if float(np.sum(resid**2)) <= 1e-12 * max(1.0, float(np.sum((values - values.mean()) ** 2))):
        return None
    groups = strata if strata is not None else item_cells
    if float(lag1(resid)) - permutation_mean_lag1(resid, groups) < MIN_EXCESS_R1:
        return None  # too small to report whatever its p-value: no permutations needed
    test = autocorrelation_test(resid, groups, seed=seed)
    if test.p_value >= SIGNAL_ALPHA or test.r1 - test.expected < MIN_EXCESS_R1:
        return None
    where = "the file order" if ordering.from_file else f"the order of '{ordering.label}'"
    if stretch is None:
        removed, within = "treatment means", "within treatment cells"
    else:
        removed = f"treatment means and means of '{stretch.name}'"
        within = f"within '{stretch.name}'"
    cols = (response,) if ordering.column is None else (ordering.column, response)
    return Signal(
        "order-autocorrelation",
        cols,
        test.r1,
        test.p_value,
        f"Residuals of '{response}' (minus {removed}) are correlated along {where}: lag-1 "
        f"autocorrelation {format_number(test.r1)} over {_item_words(items, n_items)}, where "
        f"{format_number(test.expected)} is expected without an order effect (permutation "
        f"{within}, "
        f"{p_phrase(test.p_value)}).",
    )


def scan_order(
    frame: pd.DataFrame,
    response: str,
    treatments: Sequence[str],
    *,
    order: str | None = None,
    seed: int = DEFAULT_SEED,
    exclude: Sequence[str] = (),
) -> HiddenScan:
    """Find processing runs and drift hidden in the order of the rows (module docstring)."""
    missing = [c for c in [response, *treatments] if c not in frame.columns]
    if missing:
        raise InputError(f"column '{missing[0]}' is not in the data")
    ordering = _resolve_order(frame, order, [str(response), *map(str, treatments), *exclude])
    derived: list[DerivedGrouping] = []
    signals: list[Signal] = []
    found: list[tuple[int, str, np.ndarray, str, dict[str, float]]] = []
    cache: dict[str, np.ndarray] = {}  # each column factorised once for the whole scan
    for j, treatment in enumerate(treatments):
        sig, codes, how, strength = _runs_of(
            frame, ordering, treatment, response, exclude, seed, cache
        )
        signals.extend(sig)
        if codes is not None and not any(_same_rows(codes, f[2]) for f in found):
            found.append((j, str(treatment), codes, how, strength))
    for j, treatment, codes, how, strength in found:
        sources = (treatment,) if ordering.column is None else (ordering.column, treatment)
        name = _named(ordering.label, treatment if len(found) > 1 else None, j)
        derived.append(DerivedGrouping(name, codes, sources, "process", how, strength))
    auto = _autocorrelation(frame, ordering, response, treatments, exclude, seed, cache)
    if auto is not None:
        signals.append(auto)
    return HiddenScan(tuple(derived), tuple(signals))
