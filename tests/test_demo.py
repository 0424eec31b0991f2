"""The invented demo scenarios behave as documented in docs/demo.md.

These are demonstrations, not statistical checks: the reference checks live in
the other test files. Here the point is that the demo shows what it says.
"""

from __future__ import annotations

import pytest

from replicheck import audit
from replicheck.demo import SCENARIOS


@pytest.mark.parametrize("name", list(SCENARIOS))
def test_scenario_gives_its_documented_status_and_its_claim_reproduces(name: str) -> None:
    s = SCENARIOS[name]
    doc = audit(s.frame(), spec=s.spec(), find_spec=False).to_dict()
    assert doc["verdict"]["status"] == s.expected
    rules = {f["rule"] for f in doc["findings"]}
    assert "reported-result-not-reproduced" not in rules
    assert doc["reported_check"]["level"] == s.claimed_level


def test_fishfeed_conclusion_changes_once_tanks_are_the_replicates() -> None:
    s = SCENARIOS["fishfeed"]
    doc = audit(s.frame(), spec=s.spec(), find_spec=False).to_dict()
    assert doc["verdict"]["conclusion_changed"] is True
    assert doc["experimental_units"][0]["unit"] == "tank"
    corrected = next(a for a in doc["analyses"] if a["corrected"])
    assert corrected["df"] == pytest.approx([2, 6], rel=1e-9)


def test_recipes_are_deterministic() -> None:
    for s in SCENARIOS.values():
        assert s.frame().equals(s.frame())


def test_chambers_the_claimed_trays_are_not_the_chambers() -> None:
    s = SCENARIOS["chambers"]
    doc = audit(s.frame(), spec=s.spec(), find_spec=False).to_dict()
    assert doc["experimental_units"][0]["unit"] == "chamber"
    assert doc["claim"]["random_effects"] == ["tray"]
    assert doc["verdict"]["conclusion_changed"] is True
    corrected = next(a for a in doc["analyses"] if a["corrected"])
    assert corrected["df"] == pytest.approx([1, 4], rel=1e-6)
