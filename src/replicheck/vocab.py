"""The closed vocabularies of the report: statuses, severities, analysis names, relations.

Each is a ``Literal`` type, so that the type checker refuses a misspelt value
wherever one is written, and a tuple of its values for code and tests that
list them (tests/test_vocab.py checks every report of the suite against them,
through tests/conftest.py). The values are the report's JSON strings
(docs/report-schema.md).
"""

from __future__ import annotations

from typing import Literal, get_args

__all__ = [
    "ANALYSES",
    "FACTOR_RELATIONS",
    "RELATIONS",
    "SEVERITIES",
    "STATUSES",
    "STATUS_ORDER",
    "UNIT_LABEL_MODES",
    "UNIT_RELATIONS",
    "AnalysisName",
    "FactorRelationName",
    "RelationName",
    "Severity",
    "Status",
    "UnitLabels",
    "UnitRelationName",
]

#: A term's or the report's verdict.
Status = Literal["ok", "pseudoreplicated", "confounded", "unclear"]
#: How much a finding matters.
Severity = Literal["error", "warning", "note"]
#: The analyses of a term (``analyses[].name`` in the JSON), and the rank tests that
#: may reproduce a reported result (``reported_check.reproduced_by``).
AnalysisName = Literal[
    "as_claimed",
    "unit_means",
    "mixed_model",
    "no_test",
    "strata_anova",
    "randomisation",
    "cluster_robust",
    "wild_bootstrap",
    "gee",
    "within_blocks",
    "lack_of_fit",
    "likelihood_ratio",
    "signed_rank",
    "rank_sum",
]

#: How unit labels are read: numbered afresh within each treatment level (local),
#: naming the same unit everywhere (global), or as the data show (auto).
UnitLabels = Literal["auto", "local", "global"]

STATUSES: tuple[Status, ...] = get_args(Status)
#: Worst first: the report's status is the worst status of any term.
STATUS_ORDER: tuple[Status, ...] = ("confounded", "pseudoreplicated", "unclear", "ok")
SEVERITIES: tuple[Severity, ...] = get_args(Severity)
ANALYSES: tuple[AnalysisName, ...] = get_args(AnalysisName)
UNIT_LABEL_MODES: tuple[UnitLabels, ...] = get_args(UnitLabels)

#: How a grouping column relates to a treatment (``relations[].relation`` in the JSON).
RelationName = Literal["confounded", "nested", "crossed", "partial", "unrelated"]
RELATIONS: tuple[RelationName, ...] = get_args(RelationName)
#: How a term's experimental unit relates to the term (``experimental_units[].relation``):
#: ``none`` when no grouping holds the term constant and the rows are the replicates.
UnitRelationName = Literal["nested", "confounded", "partial", "none"]
UNIT_RELATIONS: tuple[UnitRelationName, ...] = get_args(UnitRelationName)
#: How two factors of the model relate to each other (``factor_relations`` in the JSON).
FactorRelationName = Literal[
    "aliased", "nested", "contains", "crossed", "partially aliased", "unrelated"
]
FACTOR_RELATIONS: tuple[FactorRelationName, ...] = get_args(FactorRelationName)
