"""Experimental units hidden in date and time columns.

Supplements often record *when* each sample was measured but not that the
day or the session was the unit the treatment was applied to: every control
measured on Monday, every treated sample on Tuesday. This scan reads every
column that holds dates, times of day or both and

1. **derives the time groupings** the stamps imply:

   * ``day[col]``: the calendar date, when the column carries dates spanning
     at least two days;
   * ``session[col]``: runs of measurements close together in time, when the
     column has time-of-day resolution. The distinct time stamps are sorted
     and a new session starts wherever the gap to the previous stamp exceeds
     ``max(5 x median gap, 30 min)``. The relative part scales with the
     sampling rhythm (readings every 15 min split at a lunch break of more
     than 75 min; hourly readings only overnight); the absolute floor keeps a
     short pause in rapid readings inside one session. The 30-minute
     inactivity timeout is common practice for sessions of event logs (the
     default of web-analytics sessions); the factor 5 is a chosen value.
     A date-only column paired with a time-only column (``date`` and
     ``time``) is read as one time stamp for sessions.

   A grouping is returned only when it has at least two levels, fewer levels
   than half the rows with a stamp (it groups rows), and a partition of the
   rows that no existing column (other than the response and the treatments)
   already gives; a session partition equal to the day partition is left to
   the day. A derived grouping identical to a treatment is kept: that is the
   temporal confounding this scan is for.

2. **reports treatment-by-time separation** (Signal ``treatment-by-time``):
   the days (or, when the days do not separate them, the sessions) split the
   levels of a treatment into groups that never share a day. In the language
   of block designs the design is *disconnected* with time as the blocks:
   contrasts between the groups cannot be estimated within a day and are
   confounded with day (Bose 1947, Sankhya 8:107-166; Dey 1986, *Theory of
   Block Designs*, ch. 1). The extreme case is "each level measured on days
   of its own". The statistic is the number of separated groups; the p-value
   is the chance that a random arrangement of the treatment labels over the
   same rows would separate the levels at least as much (seeded Monte Carlo,
   2000 draws, fewer in files over 10,000 rows, p = (1 + hits) / (1 + draws),
   Phipson & Smyth 2010). The separation is reported whatever its p-value:
   confounding is a fact of the data, the p-value only says whether it could
   have arisen by chance. It is reported even when the time column is plainly
   a date column.

Text is parsed with explicit candidate formats (``pandas.to_datetime`` with
``format=``, never per-cell guessing); see :func:`parse_times`. A column whose
day/month order had to be assumed is reported as Signal
``day-month-ambiguous`` (statistic: the distinct dates the other order would
read as other dates), so that the caller can surface the choice.

References are cited from memory (volume and page numbers unchecked).
"""

from __future__ import annotations

import datetime as _dt
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import connected_components

from replicheck.advice import option
from replicheck.codebook import column_codes, first_seen_codes_of, remembered
from replicheck.defaults import DEFAULT_SEED
from replicheck.errors import InputError
from replicheck.numbers import p_phrase
from replicheck.partitions import same_partition
from replicheck.structure.hidden.base import DerivedGrouping, HiddenScan, Signal
from replicheck.structure.names import name_hint

_SAMPLE = 1000  # distinct values read first to pick the formats
PARSE_SHARE = 0.90  # share of non-missing cells that must read as times (a chosen value)
SESSION_GAP_FACTOR = 5.0  # a session ends at a gap of more than 5 x the median gap (chosen)
SESSION_GAP_FLOOR_S = 30 * 60.0  # ... and of more than 30 min (common practice, see above)
N_DRAWS = 2000
_CHUNK_ELEMENTS = 4_000_000
_WORK = 20_000_000  # Monte Carlo work (rows x draws) beyond which fewer draws are made

# --------------------------------------------------------------------------- formats

_CLOCKS = ("%H:%M", "%H:%M:%S", "%H:%M:%S.%f")


def _with_clocks(dates: Sequence[str], seps: Sequence[str] = (" ",)) -> tuple[str, ...]:
    out = list(dates)
    for d in dates:
        for sep in seps:
            out.extend(f"{d}{sep}{c}" for c in _CLOCKS)
    return tuple(out)


# Each reading is one convention of writing dates; its formats are tried in
# turn on the cells the earlier ones left unread, so a column may mix
# "2026-03-04" and "2026-03-04 14:05".
_READINGS: dict[str, tuple[str, ...]] = {
    "year-first": _with_clocks(("%Y-%m-%d",), (" ", "T")) + _with_clocks(("%Y/%m/%d", "%Y.%m.%d")),
    "day-first": _with_clocks(
        ("%d/%m/%Y", "%d.%m.%Y", "%d-%m-%Y", "%d/%m/%y", "%d.%m.%y", "%d-%m-%y")
    ),
    "month-first": _with_clocks(("%m/%d/%Y", "%m-%d-%Y", "%m/%d/%y", "%m-%d-%y")),
    "month-name": _with_clocks(
        (
            "%d %b %Y",
            "%d-%b-%Y",
            "%d %B %Y",
            "%d-%b-%y",
            "%b %d %Y",
            "%b %d, %Y",
            "%B %d %Y",
            "%B %d, %Y",
        )
    ),
    "time of day": (*_CLOCKS, "%I:%M %p", "%I:%M:%S %p", "%I:%M%p"),
}
_AMBIGUOUS = ("day-first", "month-first")
# A cheap first look: digits joined by a date or time separator, or a month name.
_LOOKS_LIKE_TIME = re.compile(r"\d\s*[-/.:]\s*\d|\d\s+[A-Za-z]{3}|[A-Za-z]{3}\.?\s+\d")
_TIME_ONLY_DATE = pd.Timestamp("1900-01-01")  # the date pandas gives a bare time of day


# --------------------------------------------------------------------------- parsing


@dataclass(frozen=True)
class TimeReading:
    """How a column reads as time stamps."""

    values: pd.Series  # datetime64, same index as the column, NaT where missing or unread
    reading: str  # datetime dtype | year-first | day-first | month-first | month-name | time of day
    note: str  # one plain sentence: what was read, and any ambiguity
    has_date: bool  # False for bare times of day
    has_clock: bool  # some stamp has a time of day other than midnight
    ambiguous: bool  # every value reads both day-first and month-first
    n_ambiguous: int  # distinct values that the other order would read as another date


def _parse_with(values: np.ndarray, formats: Sequence[str]) -> tuple[pd.Series, list[str]]:
    """Parse unique text values with each format in turn; NaT where none fits.

    Also returns the formats that read at least one value, in the order tried.
    """
    out = pd.Series(pd.NaT, index=range(len(values)), dtype="datetime64[ns]")
    todo = np.ones(len(values), dtype=bool)
    used: list[str] = []
    for fmt in formats:
        if not todo.any():
            break
        idx = np.flatnonzero(todo)
        got = pd.to_datetime(pd.Series(values[idx]), format=fmt, errors="coerce")
        # dates beyond what a nanosecond clock holds (a year 6026 from a damaged cell)
        # are not read as dates
        ok = (got.notna() & got.between(pd.Timestamp.min, pd.Timestamp.max)).to_numpy()
        if ok.any():
            out.iloc[idx[ok]] = got[ok].astype("datetime64[ns]").to_numpy()
            todo[idx[ok]] = False
            used.append(fmt)
    return out, used


def _as_text(value: object) -> str:
    if isinstance(value, _dt.time):
        return value.isoformat()
    return str(value).strip()


def _span_days(values: pd.Series) -> int:
    ok = values.dropna()
    return 0 if ok.empty else int((ok.max().normalize() - ok.min().normalize()).days) + 1


def _reading(series: pd.Series, dayfirst: bool | None) -> tuple[TimeReading | None, str]:
    """Read a column as time stamps, or say why not (once per column within an audit)."""
    return remembered("time-reading", series, dayfirst, lambda: _read_times(series, dayfirst))


def _read_times(series: pd.Series, dayfirst: bool | None) -> tuple[TimeReading | None, str]:
    if pd.api.types.is_datetime64_any_dtype(series.dtype):
        values = pd.to_datetime(series)
        if getattr(values.dt, "tz", None) is not None:
            values = values.dt.tz_localize(None)  # keep the local wall-clock time
        values = values.astype("datetime64[ns]")
        ok = values.dropna()
        if ok.empty:
            return None, "the column holds no dates"
        clock = bool((ok != ok.dt.normalize()).any())
        note = "a date-time column" if clock else "a date column"
        return TimeReading(values, "datetime dtype", note, True, clock, False, 0), note
    if pd.api.types.is_bool_dtype(series.dtype) or pd.api.types.is_numeric_dtype(series.dtype):
        return None, "numbers are not read as times"
    if not (
        pd.api.types.is_object_dtype(series.dtype)
        or pd.api.types.is_string_dtype(series.dtype)
        or isinstance(series.dtype, pd.CategoricalDtype)
    ):
        return None, f"a column of type {series.dtype} is not read as times"
    # the distinct values in order of first appearance, from the column's codes
    all_keys, key_values = first_seen_codes_of(series)
    mask = all_keys >= 0
    keys = all_keys[mask]
    key_text = np.array([_as_text(v) for v in key_values], dtype=object)
    blank = np.array([not t for t in key_text], dtype=bool)
    if blank.any():  # blank text counts as missing
        raw = series.astype("object")
        mask = mask.copy()
        mask[np.flatnonzero(mask)[blank[keys]]] = False
        keys, distinct = pd.factorize(raw[mask])
        key_text = np.array([_as_text(v) for v in distinct], dtype=object)
    if not mask.any():
        return None, "the column holds no values"
    uniq = key_text
    inverse = keys
    counts = np.bincount(inverse, minlength=len(uniq)).astype(float)
    total = float(mask.sum())
    # First look at up to 1000 distinct values spread over the column: which
    # readings and formats fit at all. Only those are run over every value.
    idx = np.unique(np.linspace(0, len(uniq) - 1, min(len(uniq), _SAMPLE)).round().astype(int))
    weight = counts[idx]
    looks = np.array([bool(_LOOKS_LIKE_TIME.search(str(u))) for u in uniq[idx]], dtype=bool)
    looking = float(weight[looks].sum() / weight.sum())
    if looking < PARSE_SHARE:
        return None, f"only {looking:.0%} of the values look like dates or times"
    parsed: dict[str, pd.Series] = {}
    share: dict[str, float] = {}
    for name, formats in _READINGS.items():
        got, used = _parse_with(uniq[idx], formats)
        if float(weight[got.notna().to_numpy()].sum() / weight.sum()) < 0.5:
            parsed[name] = pd.Series(pd.NaT, index=range(len(uniq)), dtype="datetime64[ns]")
            share[name] = 0.0
            continue
        if len(idx) < len(uniq):
            got, _ = _parse_with(uniq, [*used, *(f for f in formats if f not in used)])
        parsed[name] = got
        share[name] = float(counts[got.notna().to_numpy()].sum() / total)
    best = max(share.values())
    if best < PARSE_SHARE:
        return None, f"only {best:.0%} of the values read as dates or times"

    ambiguous = False
    n_ambiguous = 0
    note_extra = ""
    chosen = max(share, key=lambda k: share[k])
    if chosen in _AMBIGUOUS:
        d_share, m_share = share["day-first"], share["month-first"]
        day_read, month_read = parsed["day-first"], parsed["month-first"]
        both = (day_read.notna() & month_read.notna()).to_numpy()
        differ = both & (day_read != month_read).to_numpy()
        n_ambiguous = int(np.unique(day_read[differ].dt.normalize()).size)
        if d_share == m_share and n_ambiguous > 0:
            ambiguous = True
            chosen = "day-first" if dayfirst else "month-first"
            why = (
                "as asked"
                if dayfirst is not None
                else f"by default ({option('dayfirst', True)} reads them day-first)"
            )
            dates = "date reads" if n_ambiguous == 1 else "dates read"
            note_extra = (
                f"; day and month are ambiguous ({n_ambiguous} distinct {dates} differently "
                f"either way; the dates span {_span_days(day_read)} days read day-first, "
                f"{_span_days(month_read)} days read month-first): read {chosen} {why}"
            )
        elif d_share == m_share:  # every date has day == month: both readings agree
            chosen = "day-first" if dayfirst else "month-first"
        else:
            chosen = "day-first" if d_share > m_share else "month-first"
            if dayfirst is not None and (chosen == "day-first") != dayfirst:
                asked = "day-first" if dayfirst else "month-first"
                note_extra = (
                    f"; read {chosen} although {asked} was asked: only "
                    f"{share[asked]:.0%} of the values are valid {asked}"
                )
    got = parsed[chosen]
    stamps = np.full(len(series), np.datetime64("NaT"), dtype="datetime64[ns]")
    stamps[mask] = got.to_numpy(dtype="datetime64[ns]")[inverse]
    values = pd.Series(stamps, index=series.index)
    ok = values.dropna()
    has_date = chosen != "time of day"
    clock = bool((ok != ok.dt.normalize()).any())
    what = {
        "year-first": "year-month-day dates",
        "day-first": "day-month-year dates",
        "month-first": "month-day-year dates",
        "month-name": "dates with month names",
        "time of day": "times of day",
    }[chosen]
    if has_date and clock:
        what += " with times of day"
    unread = total - float(counts[got.notna().to_numpy()].sum())
    if unread > 0:
        what += f" ({int(unread)} unreadable {'value' if unread == 1 else 'values'} left out)"
    note = f"read as {what}{note_extra}"
    return TimeReading(values, chosen, note, has_date, clock, ambiguous, n_ambiguous), note


def parse_times(series: pd.Series, dayfirst: bool | None = None) -> tuple[pd.Series | None, str]:
    """Read a column as dates, times of day or date-times.

    Returns ``(values, note)``: ``values`` is a datetime64 series on the
    column's index (NaT where the cell is missing or unreadable; bare times of
    day carry the date 1900-01-01) and ``note`` one sentence saying what was
    read, or ``(None, reason)`` when the column is not a time column.

    * A pandas datetime column is taken as it is (time-zone aware stamps keep
      their local wall-clock time).
    * Numeric and boolean columns are never times (a day number or an Excel
      serial is not guessed).
    * Text is tried against explicit families of formats with
      ``pandas.to_datetime(format=...)``: year-first (``2026-03-04``,
      ``2026/03/04``, ``2026-03-04 14:05``, ``2026-03-04T14:05:00``),
      day-first (``04/03/2026``, ``04.03.2026``, ``04-03-26``), month-first
      (``3/4/2026``), month names (``4 Mar 2026``, ``Mar 4, 2026``) and bare
      times (``14:05``, ``14:05:30``, ``2:05 PM``). The family that reads the
      most cells wins; at least 90% of the non-missing cells must read
      (a chosen value), otherwise the column is not a time column.
    * Day and month: when only one order reads every value (``13/03/2026``
      cannot be month-first) that order is taken. When both read every value
      the order is ambiguous: ``dayfirst`` decides if given, otherwise
      month-first (the pandas default), and the note says so.
    """
    reading, note = _reading(series, dayfirst)
    return (None, note) if reading is None else (reading.values, note)


# --------------------------------------------------------------------------- groupings


@dataclass(frozen=True)
class SessionSplit:
    """Sessions cut at long gaps between sorted time stamps."""

    codes: np.ndarray  # session per row, 0.. in time order, -1 where the stamp is missing
    n_sessions: int
    threshold_s: float  # a gap longer than this starts a new session
    median_gap_s: float  # median gap between distinct stamps
    within_gap_s: float  # median gap inside sessions (nan if none)


def sessions_from_gaps(values: pd.Series) -> SessionSplit:
    """Sessions of a series of time stamps (see the module docstring for the rule)."""
    stamps = pd.to_datetime(values)
    ok = stamps.notna().to_numpy()
    codes = np.full(len(stamps), -1, dtype=np.int64)
    if ok.sum() == 0:
        return SessionSplit(codes, 0, math.nan, math.nan, math.nan)
    secs = (stamps[ok] - stamps[ok].min()).dt.total_seconds().to_numpy()
    uniq, inverse = np.unique(secs, return_inverse=True)
    if uniq.size < 3:
        codes[ok] = 0
        return SessionSplit(codes, 1, math.nan, math.nan, math.nan)
    gaps = np.diff(uniq)
    median_gap = float(np.median(gaps))
    threshold = max(SESSION_GAP_FACTOR * median_gap, SESSION_GAP_FLOOR_S)
    starts = np.concatenate([[0], np.cumsum(gaps > threshold)])
    codes[ok] = starts[inverse]
    inside = gaps[gaps <= threshold]
    within = float(np.median(inside)) if inside.size else math.nan
    return SessionSplit(codes, int(starts[-1]) + 1, threshold, median_gap, within)


def day_codes(values: pd.Series) -> np.ndarray:
    """Calendar day per row, 0.. in date order, -1 where the stamp is missing."""
    codes, _ = pd.factorize(pd.to_datetime(values).dt.normalize(), sort=True)
    return codes.astype(np.int64)


def _duration(seconds: float) -> str:
    if not math.isfinite(seconds):
        return "-"
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 90 * 60:
        return f"{seconds / 60:.0f} min"
    if seconds < 48 * 3600:
        hours = seconds / 3600
        return f"{hours:.1f} h" if hours < 10 else f"{hours:.0f} h"
    return f"{seconds / 86400:.1f} days"


def _groups_rows(codes: np.ndarray) -> bool:
    ok = codes >= 0
    k = int(codes[ok].max()) + 1 if ok.any() else 0
    return k >= 2 and k < ok.sum() / 2


def _recode(codes: np.ndarray) -> np.ndarray:
    return pd.factorize(codes, sort=True)[0].astype(np.int64)


def _same_as_any(codes: np.ndarray, others: Sequence[np.ndarray], dense: bool = False) -> bool:
    """Whether another coding groups the rows with a known ``codes`` value identically.

    ``dense``: the others are complete codings ``0..k-1`` (as from
    :func:`_column_partitions`), compared as they are when ``codes`` is complete.
    """
    ok = codes >= 0
    if not ok.any():
        return False
    if dense and ok.all():
        mine = _recode(codes)
        top = int(mine.max())
        return any(int(o.max()) == top and same_partition(mine, o) for o in others)
    mine = _recode(codes[ok])
    return any(same_partition(mine, _recode(o[ok])) for o in others)


def _column_partitions(frame: pd.DataFrame, skip: set[str]) -> list[np.ndarray]:
    """Partitions of the rows given by existing columns (missing values as one level)."""
    out = []
    for column in frame.columns:
        if str(column) in skip:
            continue
        cc = column_codes(frame[column])
        out.append(np.where(cc.codes < 0, cc.n_levels, cc.codes))
    return out


def _named(kind_word: str, source: str, index: int, kind: str) -> str:
    """``day[source]`` unless the source's own words would make the name read as another kind."""
    name = f"{kind_word}[{source}]"
    if name_hint(name).kind != kind:
        name = f"{kind_word}[column {index + 1}]"
    return name


# --------------------------------------------------------------------------- separation


def _components(adj: np.ndarray) -> np.ndarray:
    """Number of connected components of a batch of symmetric boolean graphs (b, k, k)."""
    k = adj.shape[-1]
    reach = adj | np.eye(k, dtype=bool)[None]
    for _ in range(max(1, math.ceil(math.log2(max(k, 2)))) + 1):
        f = reach.astype(np.float32)
        reach = np.matmul(f, f) > 0
    first = reach.argmax(axis=2)
    return (first == np.arange(k)[None, :]).sum(axis=1)


def _level_graph(time: np.ndarray, trt: np.ndarray, n_time: int, k: int) -> np.ndarray:
    """Levels of the treatment linked when they share a time level (k, k)."""
    present = np.zeros((n_time, k), dtype=bool)
    present[time, trt] = True
    f = present.astype(np.float32)
    return (f.T @ f) > 0


@dataclass(frozen=True)
class Separation:
    """How a time grouping splits the levels of a treatment."""

    n_groups: int  # groups of treatment levels that never share a time level
    groups: tuple[tuple[str, ...], ...]
    per_level: dict[str, int]  # time levels each treatment level was measured in
    n_time: int
    p_value: float | None  # chance of at least this separation under random labels


def separation(
    time: np.ndarray, treatment: pd.Series, *, seed: int = DEFAULT_SEED, draws: int = N_DRAWS
) -> Separation | None:
    """Groups of treatment levels that never share a time level, with a Monte Carlo p-value.

    ``time``: integer codes per row (-1 missing). Returns None when fewer than
    two treatment levels or time levels are present.
    """
    ok = (time >= 0) & treatment.notna().to_numpy()
    trt_codes, uniques = pd.factorize(treatment[ok], sort=True)
    labels = [str(u) for u in uniques]
    t_codes, _ = pd.factorize(time[ok], sort=True)
    k, n_time = len(labels), int(t_codes.max()) + 1 if t_codes.size else 0
    if k < 2 or n_time < 2:
        return None
    adj = _level_graph(t_codes, trt_codes, n_time, k)
    _, roots = connected_components(csr_matrix(adj), directed=False)
    groups = tuple(
        tuple(labels[int(j)] for j in np.flatnonzero(roots == r)) for r in np.unique(roots)
    )
    per_level = {labels[j]: int(np.unique(t_codes[trt_codes == j]).size) for j in range(k)}
    if len(groups) < 2:
        return Separation(1, groups, per_level, n_time, None)
    rng = np.random.default_rng([seed, 1])
    m = t_codes.size
    if m * draws > _WORK:  # a large file: fewer draws (the smallest p rises to 1/201)
        draws = max(200, _WORK // m)
    hits = 0
    chunk = max(1, min(draws, _CHUNK_ELEMENTS // max(m, n_time * k)))
    done = 0
    while done < draws:
        b = min(chunk, draws - done)
        perm = rng.permuted(np.broadcast_to(trt_codes, (b, m)), axis=1)
        flat = (np.arange(b)[:, None] * n_time + t_codes[None, :]) * k + perm
        present = np.zeros(b * n_time * k, dtype=bool)
        present[flat.ravel()] = True
        f = present.reshape(b, n_time, k).astype(np.float32)
        adj_b = np.matmul(f.transpose(0, 2, 1), f) > 0
        hits += int((_components(adj_b) >= len(groups)).sum())
        done += b
    return Separation(len(groups), groups, per_level, n_time, (1 + hits) / (1 + draws))


def _separation_message(source: str, treatment: str, sep: Separation, unit: str, units: str) -> str:
    def count(n: int) -> str:
        return f"{n} {unit if n == 1 else units}"

    levels = ", ".join(f"{lv} {count(n)}" for lv, n in sep.per_level.items())
    chance = (
        f"; a random arrangement of the labels would separate them so with {p_phrase(sep.p_value)}"
    )
    if all(len(g) == 1 for g in sep.groups):
        return (
            f"Going by '{source}', each level of '{treatment}' was measured on {units} of its "
            f"own ({levels}; no {unit} holds two levels), so the treatment comparison is "
            f"confounded with {unit}{chance}."
        )
    split = " | ".join(", ".join(g) for g in sep.groups)
    return (
        f"The {units} of '{source}' split the levels of '{treatment}' into {sep.n_groups} "
        f"groups that never share a {unit} ({split}; {levels}), so comparisons between the "
        f"groups are confounded with {unit}{chance}."
    )


# --------------------------------------------------------------------------- scan


@dataclass(frozen=True)
class _Source:
    name: str  # the text used in derived names and messages
    columns: tuple[str, ...]
    reading: TimeReading


def _sources(
    frame: pd.DataFrame, skip: set[str], dayfirst: bool | None
) -> tuple[list[_Source], list[Signal]]:
    readings: list[_Source] = []
    notes: list[Signal] = []
    for column in frame.columns:
        name = str(column)
        if name in skip:
            continue
        reading, _ = _reading(frame[column], dayfirst)
        if reading is None:
            continue
        readings.append(_Source(name, (name,), reading))
        if reading.ambiguous:
            notes.append(
                Signal(
                    "day-month-ambiguous",
                    (name,),
                    float(reading.n_ambiguous),
                    None,
                    f"'{name}' is {reading.note}.",
                )
            )
    dates = [s for s in readings if s.reading.has_date and not s.reading.has_clock]
    clocks = [s for s in readings if not s.reading.has_date]
    if len(dates) == 1 and clocks:
        # one date column and bare times of day: read each time with that date
        d = dates[0]
        for c in clocks:
            both = d.reading.values.dt.normalize() + (c.reading.values - _TIME_ONLY_DATE)
            combined = TimeReading(
                both, "date + time", f"{d.reading.note}; {c.reading.note}", True, True, False, 0
            )
            readings.append(_Source(f"{d.name}+{c.name}", (d.name, c.name), combined))
        readings = [s for s in readings if all(s is not c for c in clocks)]
    return readings, notes


def scan_time(
    frame: pd.DataFrame,
    response: str,
    treatments: Sequence[str],
    *,
    dayfirst: bool | None = None,
    exclude: Sequence[str] = (),
    seed: int = DEFAULT_SEED,
) -> HiddenScan:
    """Find days and sessions hidden in the time columns of ``frame``.

    See the module docstring for the rules. Every column other than the
    response, the treatments and ``exclude`` is tried with
    :func:`parse_times`; ``dayfirst`` settles an ambiguous day/month order.
    Returns the derived ``day[...]`` and ``session[...]`` groupings and the
    ``treatment-by-time`` signals (and a ``day-month-ambiguous`` signal, with
    the number of distinct dates the other order would read differently as
    statistic, for every column whose day/month order had to be assumed).
    """
    missing = [c for c in [response, *treatments] if c not in frame.columns]
    if missing:
        raise InputError(f"column '{missing[0]}' is not in the data")
    skip = {str(response), *map(str, treatments), *map(str, exclude)}
    sources, signals = _sources(frame, skip, dayfirst)
    # the partitions of the other columns, coded only when a time column is found
    existing = _column_partitions(frame, {str(response), *map(str, treatments)}) if sources else []
    position = {str(c): i for i, c in enumerate(frame.columns)}
    derived: list[DerivedGrouping] = []
    reported: list[tuple[str, np.ndarray]] = []
    for source in sources:
        values = source.reading.values
        n_stamped = int(values.notna().sum())
        index = position[source.columns[-1]]
        day = day_codes(values) if source.reading.has_date else None
        if day is not None and _groups_rows(day) and not _same_as_any(day, existing, dense=True):
            n_days = int(day.max()) + 1
            span = (values.max().normalize() - values.min().normalize()).days + 1
            derived.append(
                DerivedGrouping(
                    _named("day", source.name, index, "time"),
                    day,
                    source.columns,
                    "time",
                    f"The {n_stamped} time stamps of '{source.name}' fall on {n_days} calendar "
                    f"days over a span of {span} days; each day is a group.",
                    {"days": float(n_days), "span_days": float(span)},
                )
            )
        split = sessions_from_gaps(values) if source.reading.has_clock else None
        session = split.codes if split is not None else None
        if (
            split is not None
            and session is not None
            and _groups_rows(session)
            and not _same_as_any(session, existing, dense=True)
            and not (day is not None and _same_as_any(session, [day]))
        ):
            derived.append(
                DerivedGrouping(
                    _named("session", source.name, index, "time"),
                    session,
                    source.columns,
                    "time",
                    f"Rows fall into {split.n_sessions} sessions separated by gaps of more than "
                    f"{_duration(split.threshold_s)} in '{source.name}' (median gap within "
                    f"sessions {_duration(split.within_gap_s)}).",
                    {
                        "sessions": float(split.n_sessions),
                        "gap_hours": split.threshold_s / 3600,
                        "median_gap_minutes": split.within_gap_s / 60,
                    },
                )
            )
        for treatment in treatments:
            trt = frame[treatment]
            for codes, unit, units in (
                (day, "day", "days"),
                (session, "session", "sessions"),
            ):
                if codes is None or not _groups_rows(codes):
                    continue
                sep = separation(codes, trt, seed=seed)
                if sep is None or sep.n_groups < 2:
                    continue
                if any(t == treatment and _same_as_any(codes, [c]) for t, c in reported):
                    break
                reported.append((str(treatment), codes))
                signals.append(
                    Signal(
                        "treatment-by-time",
                        (*source.columns, str(treatment)),
                        float(sep.n_groups),
                        sep.p_value,
                        _separation_message(source.name, str(treatment), sep, unit, units),
                    )
                )
                break  # the sessions of separated days are separated too
    return HiddenScan(tuple(derived), tuple(signals))
