"""The rules behind the findings: each name with its one-line description.

One home for the list, read by ``replicheck rules`` without loading the statistics
stack, and by :mod:`replicheck.verdict`, whose registered rules must be exactly these
(tests/test_verdict.py checks it). docs/rules.md explains each rule.
"""

from __future__ import annotations

from typing import Literal

#: The rule behind a finding (``findings[].rule`` in the JSON). Rule names are stable:
#: never rename one. :data:`RULE_DOCS` gives each its description, in this order.
RuleName = Literal[
    "treatment-confounded-with-unit",
    "rows-counted-as-replicates",
    "random-slope-omitted",
    "term-in-block-stratum",
    "reported-df-level",
    "reported-result-not-reproduced",
    "stated-unit-not-supported",
    "stated-role-disputed",
    "unit-reading-open",
    "labels-local-to-treatment",
    "unit-reading-uncertain",
    "column-reads-as-treatment-label",
    "grouping-not-weighed",
    "treatment-coincides-with-column",
    "formula-block-as-stratum",
    "response-rescaled",
    "claimed-grouping-unreplicated",
    "rows-read-as-trials",
    "numbers-in-formula",
    "unreplicated-interaction",
    "partial-alignment",
    "single-unit-levels",
    "few-units",
    "randomisation-floor",
    "cross-checks-disagree",
    "unit-overdispersion",
    "grouping-derived",
    "treatment-by-time",
    "treatment-in-runs",
    "order-autocorrelation",
    "treatment-clumped-in-space",
    "residual-spatial-autocorrelation",
    "code-encodes-treatment",
    "treatment-in-file-runs",
    "day-month-ambiguous",
    "unit-variance-zero",
    "rows-dropped",
    "crossed-grouping",
]

RULE_DOCS: dict[RuleName, str] = {
    "treatment-confounded-with-unit": "each treatment level sits in a single unit",
    "rows-counted-as-replicates": "rows were analysed as replicates of a larger unit",
    "random-slope-omitted": (
        "a claimed mixed model leaves out how its groupings respond to a treatment within them"
    ),
    "term-in-block-stratum": "an interaction is confounded with blocks",
    "reported-df-level": "which level the reported degrees of freedom point to",
    "reported-result-not-reproduced": "the reported numbers differ from the data",
    "stated-unit-not-supported": "the data disagree with a stated unit",
    "stated-role-disputed": "the data disagree with a stated block or within-unit factor",
    "unit-reading-open": (
        "the data and the names support different units, with different conclusions"
    ),
    "labels-local-to-treatment": "unit labels repeat under several treatment levels",
    "unit-reading-uncertain": "the data allow plots (cells) or rows within blocks as units",
    "column-reads-as-treatment-label": "a column is a function of the treatments: a label",
    "grouping-not-weighed": "a grouping could not be weighed as a unit and was left out",
    "treatment-coincides-with-column": "treatment coincides with a column of unknown meaning",
    "formula-block-as-stratum": "a blocking factor of the formula is taken as a stratum",
    "response-rescaled": (
        "a response (or a number in the model) of extreme magnitude was rescaled for the arithmetic"
    ),
    "claimed-grouping-unreplicated": "a claimed random effect has one row per level",
    "rows-read-as-trials": "a cbind() response: each file row read as its yes/no trials",
    "numbers-in-formula": "how each numeric column of a claimed formula was read",
    "unreplicated-interaction": "each treatment combination occurs once",
    "partial-alignment": "a column is aligned with treatment except for a few rows",
    "single-unit-levels": "some treatment levels have a single unit",
    "few-units": "fewer than three units per treatment level",
    "randomisation-floor": "no test on these units can reach alpha",
    "cross-checks-disagree": "a cross-check falls on the other side of alpha from the verdict",
    "unit-overdispersion": "yes/no or count outcomes vary between units more than chance allows",
    "grouping-derived": "a grouping no column names was found and weighed as a unit",
    "treatment-by-time": "treatment levels sit on separate days or sessions",
    "treatment-in-runs": "treatment levels were processed in runs along the order",
    "order-autocorrelation": "residuals are correlated along the processing order",
    "treatment-clumped-in-space": "treatment levels are clumped in space",
    "residual-spatial-autocorrelation": "residuals are correlated in space",
    "code-encodes-treatment": "a sample code carries the treatment",
    "treatment-in-file-runs": "the file lists treatment levels in long stretches",
    "day-month-ambiguous": "dates could be read day first or month first",
    "unit-variance-zero": "the mixed model put the unit variance at zero",
    "rows-dropped": "rows were left out for missing values",
    "crossed-grouping": "a block or a within-unit factor crossed with the treatments",
}
