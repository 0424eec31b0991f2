"""Checks that a report document speaks only the closed vocabularies.

Used by tests/conftest.py on every report the suite produces, and tested in
tests/test_vocab.py.
"""

from __future__ import annotations

from typing import Any

from replicheck.rulebook import RULE_DOCS
from replicheck.vocab import (
    ANALYSES,
    FACTOR_RELATIONS,
    RELATIONS,
    SEVERITIES,
    STATUSES,
    UNIT_RELATIONS,
)


def vocabulary_faults(doc: dict[str, Any]) -> list[str]:
    """Values of the document outside their vocabulary (an empty list when none)."""
    faults = []
    statuses = [doc["verdict"]["status"], *(t["status"] for t in doc["terms"])]
    faults += [f"status {s!r}" for s in statuses if s not in STATUSES]
    methods = [doc["verdict"]["method"], *(t["method"] for t in doc["terms"])]
    methods += [a["name"] for a in doc["analyses"]]
    faults += [f"analysis {m!r}" for m in methods if m is not None and m not in ANALYSES]
    for f in doc["findings"]:
        if f["rule"] not in RULE_DOCS:
            faults.append(f"finding of an unregistered rule {f['rule']!r}")
        if f["severity"] not in SEVERITIES:
            faults.append(f"severity {f['severity']!r}")
    for vocabulary, values in (
        (RELATIONS, [r["relation"] for r in doc["relations"]]),
        (UNIT_RELATIONS, [u["relation"] for u in doc["experimental_units"]]),
        (FACTOR_RELATIONS, [r["relation"] for r in doc["design"]["factor_relations"]]),
    ):
        faults += [f"relation {v!r}" for v in values if v not in vocabulary]
    return faults
