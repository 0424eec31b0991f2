"""The closed vocabularies (replicheck.vocab) and the check every suite report passes.

Logic tests on plain values; every report the suite produces is checked against
the vocabularies in tests/conftest.py (tests/vocab_check.py).
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import get_args

from vocab_check import vocabulary_faults

from replicheck import audit
from replicheck.demo import SCENARIOS
from replicheck.refit import LABELS
from replicheck.rulebook import RULE_DOCS, RuleName
from replicheck.verdict import RULES
from replicheck.vocab import (
    ANALYSES,
    FACTOR_RELATIONS,
    RELATIONS,
    SEVERITIES,
    STATUS_ORDER,
    STATUSES,
    UNIT_RELATIONS,
)

SCHEMA = (Path(__file__).resolve().parents[1] / "docs" / "report-schema.md").read_text()


def test_status_order_ranks_every_status_once() -> None:
    assert sorted(STATUS_ORDER) == sorted(STATUSES)
    assert STATUS_ORDER[0] == "confounded" and STATUS_ORDER[-1] == "ok"


def test_vocabularies_match_the_schema_and_the_labels() -> None:
    # every status, severity and relation is documented; every analysis with a label
    # is named
    for word in (*STATUSES, *SEVERITIES, *RELATIONS, *FACTOR_RELATIONS, *UNIT_RELATIONS):
        assert re.search(rf"\b{word}\b", SCHEMA), word
    assert set(LABELS) <= set(ANALYSES)
    assert set(ANALYSES) - set(LABELS) == {"signed_rank", "rank_sum"}


def test_every_rule_is_registered_once() -> None:
    assert set(RULES) == set(RULE_DOCS)
    # the type the checker holds every finding to names the same rules, in the same order
    assert get_args(RuleName) == tuple(RULE_DOCS)


def test_the_check_finds_a_value_outside_its_vocabulary() -> None:
    sc = SCENARIOS["fishfeed"]
    doc = audit(sc.recipe(), response=sc.response, treatment=sc.treatment, claim=sc.claim).to_dict()
    assert vocabulary_faults(doc) == []
    doc["verdict"]["status"] = "pseudo-replicated"
    doc["findings"][0]["rule"] = "no-such-rule"
    doc["analyses"][0]["name"] = "t_test"
    doc["relations"][0]["relation"] = "nests"
    doc["experimental_units"][0]["relation"] = "crossed"  # a unit is never crossed
    faults = vocabulary_faults(doc)
    assert "status 'pseudo-replicated'" in faults
    assert "finding of an unregistered rule 'no-such-rule'" in faults
    assert "analysis 't_test'" in faults
    assert "relation 'nests'" in faults and "relation 'crossed'" in faults
