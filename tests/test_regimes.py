"""Work that the number of units settles is sized by it (issue: fast in every regime).

Equality and behaviour only, no timings (those are in benchmarks/regimes.py).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from replicheck import audit
from replicheck.refit import BOOTSTRAP_SETTLED_UNITS


def _units_design(per_arm: int, rows: int = 4, seed: int = 5) -> pd.DataFrame:
    # invented: two arms given to whole units, `rows` observations per unit
    rng = np.random.default_rng(seed)
    units = 2 * per_arm
    unit = np.repeat(np.arange(units), rows)
    y = rng.normal(size=unit.size) + 0.7 * rng.normal(size=units)[unit]
    return pd.DataFrame({"pen": unit, "arm": np.where(unit % 2 == 0, "a", "b"), "y": y})


def _bootstrap(doc: dict) -> dict:
    return next(a for a in doc["analyses"] if a["name"] == "wild_bootstrap")


def test_the_bootstrap_is_left_out_when_cr2_settles_it_and_the_report_says_so() -> None:
    doc = audit(_units_design(BOOTSTRAP_SETTLED_UNITS), response="y", treatment="arm").to_dict()
    boot = _bootstrap(doc)
    assert boot["p_value"] is None
    assert "not run" in boot["notes"][0] and "docs/calibration.md" in boot["notes"][0]
    cr2 = next(a for a in doc["analyses"] if a["name"] == "cluster_robust")
    assert cr2["p_value"] is not None
    assert "wild cluster bootstrap over pen units: not run" in doc_text(doc)


def test_the_bootstrap_runs_below_the_settled_number_of_units() -> None:
    doc = audit(_units_design(BOOTSTRAP_SETTLED_UNITS - 1), response="y", treatment="arm").to_dict()
    assert _bootstrap(doc)["p_value"] is not None


def doc_text(doc: dict) -> str:
    from replicheck.report.text import render_text

    return " ".join(render_text(doc).split())
