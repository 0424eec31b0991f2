"""Which columns can be groupings, and which are labels of the treatments.

The first step of the structure stage: every column other than the response
and the treatments is either a grouping (a candidate unit, block or
within-unit factor) or something else, with the reason:

* a row identifier (every value distinct);
* a continuous measurement (fractional values, more distinct values than half
  the rows), or a time stamp (its days and sessions are weighed by the hidden
  scans instead);
* a covariate recorded once per level of another grouping: a number constant
  within each level of a recorded grouping that merges some of its levels (a
  follow-up time or an age per patient, a litter size per litter, a mean
  score per school; numbers with fractions even when they do not merge any),
  unless its name says unit (a litter number merges the pigs of a litter);
* a label of the treatments: a column that is a function of the treatments
  alone. One with a treatment's own partition that reads as another label of
  it (a label word, the treatment's name, values containing its levels) is an
  alias (so is one whose values name treatment arms: control, placebo,
  treated), and so is a yes/no indicator (0/1) with its partition; one that is a
  function of several treatments together (a group code
  for each combination of contour and depth), or that groups a treatment's
  levels (the type of partner behind each of five treatments), is a label
  unless its name says unit (one chamber per combination, one room for two
  feeds: a unit confounded with them); a numeric attribute of a treatment (a
  duration with fractions that each level fixes) is a label whatever its name,
  and so is a measurement that a treatment cuts into ranges (a score cut into
  low, medium and high), unless its levels look like units measured repeatedly;
  a number that is zero exactly in some treatment levels (a dose, an incentive
  amount, zero for the control) is the amount of the treatment given.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from replicheck.advice import option
from replicheck.codebook import column_codes
from replicheck.partitions import is_nested
from replicheck.structure import evidence as ev
from replicheck.structure.hidden.time import parse_times
from replicheck.structure.names import name_hint, tokens
from replicheck.structure.relations import classify, group_codes

# A grouping whose levels hold mostly single rows is not a grouping.
MIN_REPLICATED_SHARE = 0.5
# Values that name the arms of a trial: a column holding them labels the treatment.
ARM_WORDS = frozenset(
    {
        "control",
        "placebo",
        "sham",
        "vehicle",
        "treated",
        "treat",
        "treatment",
        "intervention",
        "active",
        "untreated",
        "usual",
        "standard",
    }
)


def _norm(s: str) -> str:
    return "".join(ch for ch in str(s).lower() if ch.isalnum())


def is_time_stamp(s: pd.Series) -> bool:
    """Whether a column holds times of day (with or without dates), not bare dates."""
    if pd.api.types.is_numeric_dtype(s) or pd.api.types.is_bool_dtype(s):
        return False
    if isinstance(s.dtype, pd.CategoricalDtype):
        return False  # groupings derived from the data ("day 3", "zone 2") and coded factors
    values, _ = parse_times(s)
    if values is None:
        return False
    stamps = pd.to_datetime(values.dropna())
    return bool((stamps != stamps.dt.normalize()).any())


def numeric_kind(s: pd.Series) -> str | None:
    """``measurement`` (numbers with fractions), ``code`` (integers), or None for a column
    that is not numeric.

    Integers cannot be told apart from their values alone: litter 1 to 24 with
    gaps is a code, an age in years or a litter size a measurement, and both
    repeat across rows. They are read as codes (groupings), and the structure
    decides what they are; numbers with fractions are measurements.
    """
    if pd.api.types.is_bool_dtype(s) or not pd.api.types.is_numeric_dtype(s):
        return None
    vals = s.dropna().to_numpy(dtype=float)
    vals = vals[np.isfinite(vals)]
    if vals.size == 0:
        return None
    return "code" if bool(np.all(vals == np.round(vals))) else "measurement"


def grouping_columns(
    data: pd.DataFrame,
    exclude: Sequence[str],
    derived: Sequence[str] = (),
    forced: Sequence[str] = (),
    treatments: Sequence[str] = (),
) -> tuple[list[str], dict[str, str]]:
    """Columns that can act as groupings, and the reason each other column was skipped.

    ``forced`` columns (stated roles) are kept whatever they hold; ``derived``
    are groupings added by the hidden scans (never covariates of a recorded one).
    With ``treatments``, integers that hold the treatments side by side as a
    block does (rabbit 1 to 5, each with one run of each treatment) stay
    groupings although they merge the runs.
    """
    keep: list[str] = []
    skipped: dict[str, str] = {}
    for col in data.columns:
        if col in exclude:
            continue
        s = data[col]
        coded = column_codes(s)
        present = coded.codes[coded.codes >= 0]
        n_present = int(present.size)
        n_unique = coded.n_levels
        if col in forced:
            if n_present > 0:
                keep.append(col)
            else:
                skipped[col] = "all values missing"
            continue
        if n_present == 0:
            skipped[col] = "all values missing"
        elif n_unique <= 1:
            skipped[col] = "a single value"
        elif n_unique == n_present and numeric_kind(s) == "measurement":
            skipped[col] = "a continuous measurement"
        elif n_unique == n_present:
            skipped[col] = "a row identifier (every value distinct)"
        elif is_time_stamp(s):
            skipped[col] = "a time stamp (its days and sessions are weighed instead)"
        elif pd.api.types.is_bool_dtype(s) or not pd.api.types.is_numeric_dtype(s):
            keep.append(col)
        else:
            vals = s.dropna().to_numpy(dtype=float)
            integer = bool(np.all(np.isfinite(vals)) and np.all(vals == np.round(vals)))
            if not integer and n_unique > n_present / 2:
                skipped[col] = "a continuous measurement"
            else:
                keep.append(col)
    holders = [
        c
        for c in keep
        if c not in derived
        and (numeric_kind(data[c]) in (None, "code") or name_hint(c).suggests_unit)
    ]
    trt_codes = [column_codes(data[t]).codes for t in treatments]
    for col in list(keep):
        if col in forced or col in derived or name_hint(col).suggests_unit:
            continue
        kind = numeric_kind(data[col])
        if kind is None:
            continue
        codes = column_codes(data[col]).codes
        if any(
            is_nested(tc[(tc >= 0) & (codes >= 0)], codes[(tc >= 0) & (codes >= 0)])
            for tc in trt_codes
        ):
            continue  # fixed by a treatment: weighed as a label of it, not as a covariate
        for g in holders:
            if g == col:
                continue
            g_codes = column_codes(data[g]).codes
            ok = (codes >= 0) & (g_codes >= 0)
            if not ok.any() or not is_nested(g_codes[ok], codes[ok]):
                continue
            merges = int(np.unique(codes[ok]).size) < int(np.unique(g_codes[ok]).size)
            if kind == "code" and not merges:
                continue  # integers with the grouping's own partition: another code of it
            if kind == "code" and treatments and _block_of(data, col, g, treatments):
                continue  # a block of the treatments, holding whole units
            keep.remove(col)
            skipped[col] = f"a covariate recorded once per '{g}' (constant within each {g}" + (
                ", the same value shared by several)" if merges else ")"
            )
            break
    return keep, skipped


def _block_of(data: pd.DataFrame, col: str, unit: str, treatments: Sequence[str]) -> bool:
    from replicheck.structure.crossed import structural_block

    trt = ev.combined([np.maximum(group_codes(data, (t,)), 0) for t in treatments])
    return structural_block(data, col, treatments, trt, group_codes(data, (unit,)))


def is_alias(column: str, treatment: str, col_values: pd.Series, trt_values: pd.Series) -> bool:
    """Whether a column with the treatment's partition reads as another label of it."""
    hint = name_hint(column)
    if hint.suggests_unit:
        return False
    if hint.kind == "label" or set(tokens(treatment)) & set(tokens(column)):
        return True
    ok = col_values.notna() & trt_values.notna()
    pairs = pd.DataFrame({"c": col_values[ok].astype(str), "t": trt_values[ok].astype(str)})
    pairs = pairs.drop_duplicates()
    if any(set(tokens(v)) & ARM_WORDS for v in pairs["c"]):
        return True  # values that name treatment arms (control, placebo, treated)
    contained = [
        len(_norm(t)) >= 2 and (_norm(t) in _norm(c) or _norm(c) in _norm(t))
        for c, t in zip(pairs["c"], pairs["t"], strict=True)
    ]
    return bool(contained) and all(contained)


def _binned_by(data: pd.DataFrame, col: str, treatments: Sequence[str]) -> str | None:
    """The treatment whose levels are ranges of a numeric column nested in it, if any.

    A treatment made by cutting a measurement into ranges (an authoritarianism
    score cut into low, medium and high) has the measurement nested in it, as
    units are; but the measurement's values fall into disjoint ranges, one per
    level, and most of its levels are single rows. Unit numbers handed out group
    by group also fall into ranges, but most units hold several rows (repeated
    measurements), so they stay units.
    """
    if numeric_kind(data[col]) is None:
        return None
    values = data[col].to_numpy(dtype=float)
    sizes = np.bincount(column_codes(data[col]).codes[np.isfinite(values)])
    sizes = sizes[sizes > 0]
    if sizes.size == 0 or np.median(sizes) >= 2:
        return None  # units measured repeatedly (or an empty column)
    for t in treatments:
        frame = pd.DataFrame({"x": values, "t": column_codes(data[t]).codes})
        frame = frame[np.isfinite(frame["x"]) & (frame["t"] >= 0)]
        ranges = frame.groupby("t")["x"].agg(["min", "max"]).sort_values("min")
        if len(ranges) < 2:
            continue
        if bool(np.all(ranges["min"].to_numpy()[1:] > ranges["max"].to_numpy()[:-1])):
            return t
    return None


def _amount_of(data: pd.DataFrame, col: str, treatments: Sequence[str]) -> tuple[str, str] | None:
    """The treatment whose control a numeric column marks with zero, if any.

    A column holding the amount of a treatment given (a dose, an incentive in
    dollars) is zero exactly for the untreated and takes other values for the
    treated: its zeros fill whole levels of the treatment and nothing else.
    Unit labels are not coded that way (a control arm is not one unit numbered
    zero beside treated units numbered through). Returns the treatment and a
    description of its zero levels.
    """
    if not pd.api.types.is_numeric_dtype(data[col]) or pd.api.types.is_bool_dtype(data[col]):
        return None
    values = data[col].to_numpy(dtype=float)
    known = np.isfinite(values)
    zero = known & (values == 0)
    if not zero.any() or zero.all() or np.unique(values[known & ~zero]).size < 2:
        return None
    col_codes = column_codes(data[col]).codes

    def fixed_by(t: str) -> bool:  # one value per level of t: name t first (a dose's 1/dose)
        c = column_codes(data[t]).codes
        ok = (c >= 0) & (col_codes >= 0)
        return is_nested(c[ok], col_codes[ok])

    for t in sorted(treatments, key=lambda t: not fixed_by(t)):
        codes = column_codes(data[t]).codes
        ok = known & (codes >= 0)
        zero_levels = np.unique(codes[ok & zero])
        in_zero = np.isin(codes, zero_levels) & ok
        if bool(np.all(zero[in_zero])) and not bool(np.any(zero[ok & ~in_zero])):
            if not (ok & ~in_zero).any():
                continue
            names = pd.unique(data[t][in_zero].astype(str))
            return t, " and ".join(f"'{t}' = '{n}'" for n in names[:3])
    return None


def yes_no_column(s: pd.Series) -> bool:
    """A yes/no column (0/1, true/false, yes/no): it marks membership or a state, never a
    unit or a block."""
    from replicheck.io.columns import yes_no_coding

    v = s.dropna()
    if v.nunique() != 2:
        return False
    if pd.api.types.is_bool_dtype(v):
        return True
    if pd.api.types.is_numeric_dtype(v):
        return set(np.unique(v.to_numpy(dtype=float))) == {0.0, 1.0}
    return yes_no_coding(v) is not None


def treatment_labels(
    data: pd.DataFrame, cols: list[str], treatments: Sequence[str], stated: set[str]
) -> tuple[list[str], list[tuple[str, str]], dict[str, str]]:
    """Remove columns that are labels of the treatments (see the module docstring).

    Returns the remaining columns, the readings to report, and each label with
    the treatment (or combination) it labels.
    """
    keep: list[str] = []
    readings: list[tuple[str, str]] = []
    labels: dict[str, str] = {}
    trt_codes = {t: group_codes(data, (t,)) for t in treatments}
    combo = ev.combined(list(trt_codes.values())) if len(treatments) > 1 else None
    for col in cols:
        if col in stated:
            keep.append(col)
            continue
        codes = group_codes(data, (col,))
        ok = codes >= 0
        alias_of = None
        for trt in treatments:
            rel = classify(col, trt, data[col], data[trt])
            same = rel.relation == "confounded" and rel.n_levels == len(rel.levels_per_treatment)
            if same and (is_alias(col, trt, data[col], data[trt]) or yes_no_column(data[col])):
                alias_of = trt
                break
        if alias_of is not None:
            labels[col] = alias_of
            readings.append(
                (
                    "column-reads-as-treatment-label",
                    f"'{col}' has exactly one level per level of '{alias_of}' and reads as "
                    f"another label of it, so it was not taken as a unit; if '{col}' names "
                    f"physical units, the design is confounded (state {option('unit', col)})",
                )
            )
            continue
        unit_name = name_hint(col).suggests_unit
        function_of = [t for t in treatments if is_nested(trt_codes[t][ok], codes[ok])]
        if (
            combo is not None
            and not unit_name
            and is_nested(combo[ok], codes[ok])
            and not function_of
        ):
            labels[col] = " x ".join(treatments)
            readings.append(
                (
                    "column-reads-as-treatment-label",
                    f"'{col}' takes one value for each combination of "
                    f"{', '.join(repr(t) for t in treatments)} (a function of the treatments "
                    f"alone), so it was read as a label of the treatment combinations, not a "
                    f"unit; if each value marks one physical unit, state {option('unit', col)}",
                )
            )
            continue
        amount = None if unit_name else _amount_of(data, col, treatments)
        if amount is not None:
            labels[col] = amount[0]
            readings.append(
                (
                    "column-reads-as-treatment-label",
                    f"'{col}' is 0 in every row of {amount[1]} and only there: a quantity of "
                    f"the treatment '{amount[0]}' (an amount or dose, zero for the control), "
                    f"read as part of it, not a unit; if each value marks one physical unit, "
                    f"state {option('unit', col)}",
                )
            )
            continue
        binned = _binned_by(
            data,
            col,
            [
                t
                for t in treatments
                if is_nested(
                    codes[ok & (trt_codes[t] >= 0)], trt_codes[t][ok & (trt_codes[t] >= 0)]
                )
            ],
        )
        if binned is not None and not unit_name:
            labels[col] = binned
            readings.append(
                (
                    "column-reads-as-treatment-label",
                    f"the levels of '{binned}' are ranges of the numbers in '{col}' (the "
                    f"treatment groups a measurement), so '{col}' was read as the measurement "
                    f"behind the treatment, not a unit",
                )
            )
            continue
        coarser = [
            t
            for t in function_of
            if int(np.unique(codes[ok]).size)
            < int(np.unique(trt_codes[t][ok & (trt_codes[t] >= 0)]).size)
        ]
        fraction = numeric_kind(data[col]) == "measurement"
        if function_of and (fraction or (coarser and not unit_name)):
            of = (coarser or function_of)[0]
            labels[col] = of
            readings.append(
                (
                    "column-reads-as-treatment-label",
                    f"'{col}' takes one value for each level of '{of}' (an attribute of the "
                    f"treatment, such as a dose, a duration or a grouping of its levels), so "
                    f"it was read as part of the treatment, not a unit; if each value marks "
                    f"one physical unit, state {option('unit', col)}",
                )
            )
            continue
        keep.append(col)
    return keep, readings, labels
