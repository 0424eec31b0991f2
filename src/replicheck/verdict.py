"""Verdict stage: rules turn the evidence into findings, and findings into a status.

Each rule is a small function registered with :func:`rule`; it reads the
:class:`Evidence` and yields :class:`Finding` objects. Rule names are stable
and documented in ``docs/rules.md``. To add a rule, write a function here (or
in a module imported here), decorate it, and document it.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field

from replicheck.claim import Claim
from replicheck.clustering import Clustering
from replicheck.reconcile import Reconciliation
from replicheck.refit import Refit
from replicheck.structure.units import Structure

SEVERITIES = ("error", "warning", "note")
STATUSES = ("ok", "pseudoreplicated", "confounded", "unclear")

CAUTION = (
    "replicheck is a screening aid, not a judgement. How the experiment was actually run "
    "decides what the experimental unit is, and a data file cannot show that fully. Confirm "
    "with the authors or a statistician before acting on this report, and follow your "
    "journal's or institution's procedures."
)

# Common practice: fewer than three units per treatment level leaves the
# corrected test with very few error degrees of freedom and little power.
FEW_UNITS = 3


@dataclass(frozen=True)
class Finding:
    """One thing the audit noticed."""

    rule: str
    severity: str
    message: str
    advice: str
    columns: tuple[str, ...] = ()


@dataclass(frozen=True)
class Evidence:
    """Everything the rules may look at."""

    claim: Claim
    term: str
    n_rows_read: int
    n_rows_used: int
    structure: Structure
    clustering: Clustering | None
    refit: Refit
    reconciliation: Reconciliation
    units_per_level: dict[str, int] = field(default_factory=dict)


@dataclass(frozen=True)
class Verdict:
    """The corrected verdict."""

    status: str
    conclusion_changed: bool | None
    method: str | None
    summary: str
    findings: tuple[Finding, ...]
    caution: str = CAUTION


Rule = Callable[[Evidence], Iterable[Finding]]
RULES: dict[str, tuple[Rule, str]] = {}


def rule(name: str, doc: str) -> Callable[[Rule], Rule]:
    """Register a rule under a stable kebab-case name with a one-line description."""

    def register(fn: Rule) -> Rule:
        if name in RULES:
            raise ValueError(f"rule {name} registered twice")
        RULES[name] = (fn, doc)
        return fn

    return register


def _unit_label(ev: Evidence) -> str:
    return ev.structure.choice.unit or "row"


@rule("treatment-confounded-with-unit", "each treatment level sits in a single unit")
def _confounded(ev: Evidence) -> Iterator[Finding]:
    c = ev.structure.choice
    if c.relation != "confounded" or c.unit is None:
        return
    yield Finding(
        "treatment-confounded-with-unit",
        "error",
        f"every level of '{ev.term}' sits in a single level of '{c.unit}', so differences "
        f"between treatment levels cannot be told apart from differences between "
        f"{c.unit} levels; no valid test of '{ev.term}' exists in these data.",
        f"Ask the authors whether each '{ev.term}' level really was applied to one "
        f"{c.unit}. If so, the comparison needs independent replicate units per level; "
        f"the observations within one {c.unit} cannot replace them.",
        (ev.term, *c.columns),
    )


@rule("rows-counted-as-replicates", "rows were analysed as replicates of a larger unit")
def _pseudo(ev: Evidence) -> Iterator[Finding]:
    c = ev.structure.choice
    if c.unit is None or c.relation == "confounded" or ev.reconciliation.level == "units":
        return
    if c.n_units >= c.n_observations:
        return
    changed = _changed(ev)
    corrected = ev.refit.get(ev.refit.corrected or "")
    claimed = ev.refit.get("as_claimed")
    assert claimed is not None
    how = (
        f" ({ev.reconciliation.explanation})"
        if ev.reconciliation.explanation and ev.reconciliation.level == "rows"
        else ""
    )
    msg = (
        f"'{ev.term}' varies only between levels of '{c.unit}' ({c.n_units} units), "
        f"but the row-level analysis counts all {c.n_observations} rows as "
        f"replicates{how}."
    )
    if corrected is not None and corrected.p_value is not None and corrected.df is not None:
        msg += (
            f" With {c.unit} as the replicate: F({corrected.df[0]:.3g}, {corrected.df[1]:.3g})"
            f" = {corrected.statistic:.3g}, {_p(corrected.p_value)}"
            f" (row level: {_p(claimed.p_value)})."
        )
    yield Finding(
        "rows-counted-as-replicates",
        "error" if changed else "warning",
        msg,
        f"Analyse '{ev.term}' with {c.unit} as the experimental unit (unit means, or a "
        f"mixed model with a random effect for {c.unit}) and report n as the number of "
        f"{c.unit} levels per treatment level.",
        (ev.term, *c.columns),
    )


@rule("reported-df-level", "which level the reported degrees of freedom point to")
def _df_level(ev: Evidence) -> Iterator[Finding]:
    r = ev.reconciliation
    if r.explanation is None:
        return
    yield Finding(
        "reported-df-level",
        "note",
        r.explanation[0].upper() + r.explanation[1:] + ".",
        "Check the stated n and degrees of freedom against the design in the methods.",
        (),
    )


@rule("reported-result-not-reproduced", "the reported numbers differ from the data")
def _mismatch(ev: Evidence) -> Iterator[Finding]:
    for m in ev.reconciliation.mismatches:
        yield Finding(
            "reported-result-not-reproduced",
            "warning",
            m[0].upper() + m[1:] + ".",
            "Ask which rows, model and test produced the reported result; data exclusions, "
            "covariates or a different test may explain the gap.",
            (ev.claim.response,),
        )


@rule("stated-unit-not-supported", "the user's stated unit disagrees with the data")
def _stated(ev: Evidence) -> Iterator[Finding]:
    stated = ev.claim.unit
    c = ev.structure.choice
    if stated is None:
        return
    for kind, text in ev.structure.readings:
        if kind == "stated-unit-not-supported":
            yield Finding(
                kind,
                "warning",
                text[0].upper() + text[1:] + ".",
                "Check how the treatment was applied; the unit is the smallest "
                "thing that received a treatment level independently.",
                (stated,),
            )
            return
    if c.unit is None or stated not in c.columns:
        where = f"; replicheck used '{c.unit}'" if c.unit else ""
        yield Finding(
            "stated-unit-not-supported",
            "warning",
            f"The stated unit '{stated}' is not a grouping within which '{ev.term}' is "
            f"constant{where}.",
            "Check how the treatment was applied; the unit is the smallest thing that "
            "received a treatment level independently.",
            (stated,),
        )


def _reading_rule(name: str) -> Rule:
    def emit(ev: Evidence) -> Iterator[Finding]:
        for kind, text in ev.structure.readings:
            if kind == name:
                yield Finding(
                    name,
                    "warning" if name == "stated-unit-not-supported" else "note",
                    text[0].upper() + text[1:] + ".",
                    "Say otherwise with --unit or --unit-labels if this reading is wrong.",
                    (),
                )

    return emit


rule("labels-local-to-treatment", "unit labels repeat under several treatment levels")(
    _reading_rule("labels-local-to-treatment")
)
rule(
    "column-reads-as-treatment-label",
    "a column has the treatment's partition and reads as its label",
)(_reading_rule("column-reads-as-treatment-label"))


@rule("treatment-coincides-with-column", "treatment coincides with a column of unknown meaning")
def _ambiguous(ev: Evidence) -> Iterator[Finding]:
    for col in ev.structure.ambiguous:
        yield Finding(
            "treatment-coincides-with-column",
            "warning",
            f"Every level of '{ev.term}' lies in a single level of '{col}'. If '{col}' marks "
            f"a physical unit or a time of processing, treatment is confounded with it; if it "
            f"is another label of the treatment, this is harmless. The data cannot tell which.",
            f"Find out what '{col}' records. If it is a unit, rerun with --unit {col}.",
            (ev.term, col),
        )


@rule("partial-alignment", "a column is aligned with treatment except for a few rows")
def _partial(ev: Evidence) -> Iterator[Finding]:
    for r in ev.structure.relations:
        if r.relation == "partial":
            yield Finding(
                "partial-alignment",
                "warning",
                r.detail[0].upper() + r.detail[1:] + ".",
                "Check these rows for entry errors; if they are real, the design mixes "
                "levels and the unit needs to be confirmed with the authors.",
                (r.column, r.treatment),
            )


@rule("single-unit-levels", "some treatment levels have a single unit")
def _single(ev: Evidence) -> Iterator[Finding]:
    c = ev.structure.choice
    if c.relation == "confounded" or not c.single_unit_levels:
        return
    levels = ", ".join(f"'{s}'" for s in c.single_unit_levels)
    yield Finding(
        "single-unit-levels",
        "warning",
        f"The level(s) {levels} of '{ev.term}' sit in a single {c.unit}: their effect cannot "
        f"be separated from that {c.unit}'s own effect.",
        "Treat comparisons involving these levels as unreplicated.",
        (ev.term, *c.columns),
    )


@rule("few-units", "fewer than three units per treatment level")
def _few(ev: Evidence) -> Iterator[Finding]:
    c = ev.structure.choice
    if c.unit is None or c.relation == "confounded" or not ev.units_per_level:
        return
    least = min(ev.units_per_level.values())
    if 1 < least < FEW_UNITS:
        yield Finding(
            "few-units",
            "warning",
            f"Some levels of '{ev.term}' have only {least} {c.unit} units: the corrected "
            f"test rests on very few error degrees of freedom and has little power.",
            "Read a non-significant corrected result as 'not shown', not as 'no effect'.",
            tuple(c.columns),
        )


@rule("unit-variance-zero", "the mixed model put the unit variance at zero")
def _boundary(ev: Evidence) -> Iterator[Finding]:
    m = ev.refit.mixed
    if m is None or not m.at_boundary:
        return
    yield Finding(
        "unit-variance-zero",
        "note",
        "The REML estimate of the between-unit variance is zero, so the mixed model equals "
        "the row-level analysis; the verdict rests on the unit-means test, which stays valid.",
        "A zero estimate does not prove units are alike; with few units it is often chance.",
        (),
    )


@rule("rows-dropped", "rows were left out for missing values")
def _dropped(ev: Evidence) -> Iterator[Finding]:
    lost = ev.n_rows_read - ev.n_rows_used
    if lost > 0:
        yield Finding(
            "rows-dropped",
            "note",
            f"{lost} of {ev.n_rows_read} rows were left out because the response or a "
            f"treatment value is missing.",
            "Check that the missing values match the paper's stated exclusions.",
            (ev.claim.response, *ev.claim.treatments),
        )


@rule("crossed-grouping", "a grouping crossed with treatment shows clustering")
def _crossed(ev: Evidence) -> Iterator[Finding]:
    crossed = [r for r in ev.structure.relations if r.relation == "crossed"]
    local = {c for ch in ev.structure.per_treatment for c in ch.columns}
    for r in crossed:
        if r.column in local:
            continue
        yield Finding(
            "crossed-grouping",
            "note",
            f"'{r.column}' is crossed with '{r.treatment}': {r.detail}. It is not a unit of "
            f"the treatment, but it may be a block whose effect belongs in the model.",
            f"If '{r.column}' is a block or a repeatedly measured subject, say so in the "
            f"analysis; it does not inflate n the way a unit does.",
            (r.column, r.treatment),
        )


def _p(p: float | None) -> str:
    """'p = 0.118', 'p = 0.0031' or 'p < 0.0001'."""
    if p is None:
        return "p not available"
    if p < 1e-4:
        return "p < 0.0001"
    return f"p = {p:.2g}" if p < 0.01 else f"p = {p:.3f}"


def _corrected_sig(ev: Evidence) -> bool | None:
    a = ev.refit.get(ev.refit.corrected or "")
    return None if a is None else a.significant(ev.claim.alpha)


def _changed(ev: Evidence) -> bool | None:
    corrected = _corrected_sig(ev)
    claimed = ev.reconciliation.claimed_significant
    if corrected is None or claimed is None:
        return None
    return corrected != claimed


def status_of(ev: Evidence) -> str:
    """The status from the structure and the claim."""
    c = ev.structure.choice
    if c.relation == "confounded":
        return "confounded"
    if c.unit is None or c.n_units >= c.n_observations:
        return "unclear" if ev.structure.ambiguous else "ok"
    if ev.reconciliation.level == "units":
        return "ok"
    return "pseudoreplicated"


def decide(ev: Evidence) -> Verdict:
    """Run every rule and derive the status, the change of conclusion and the summary."""
    findings = [f for fn, _ in RULES.values() for f in fn(ev)]
    order = {s: i for i, s in enumerate(SEVERITIES)}
    findings.sort(key=lambda f: order[f.severity])
    status = status_of(ev)
    changed = None if status == "confounded" else _changed(ev)
    method = ev.refit.corrected
    return Verdict(status, changed, method, summarise(ev, status, changed), tuple(findings))


def summarise(ev: Evidence, status: str, changed: bool | None) -> str:
    """A plain-language paragraph a reviewer can paste into a report."""
    c = ev.structure.choice
    alpha = ev.claim.alpha
    claimed = ev.refit.get("as_claimed")
    assert claimed is not None
    if status == "confounded":
        return (
            f"Each level of '{ev.term}' was applied to a single {c.unit}, so the effect of "
            f"'{ev.term}' cannot be separated from differences between {c.unit} levels. The "
            f"{c.n_observations} observations are repeated measurements of "
            f"{c.n_units} units, not independent replicates, and no valid test of "
            f"'{ev.term}' is possible with these data (the row-level {_p(claimed.p_value)} "
            f"does not support the claim)."
        )
    corrected = ev.refit.get(ev.refit.corrected or "")
    if status in {"ok", "unclear"} and (c.unit is None or c.n_units >= c.n_observations):
        text = (
            f"No grouping was found within which '{ev.term}' is constant, so the "
            f"{c.n_observations} rows are taken as independent replicates; the row-level "
            f"test gives {_p(claimed.p_value)}."
        )
        if status == "unclear":
            cols = ", ".join(f"'{a}'" for a in ev.structure.ambiguous)
            text += (
                f" However, '{ev.term}' coincides with {cols}; if that marks a unit, the "
                f"design is confounded. The data alone cannot tell."
            )
        return text
    if status == "ok":
        return (
            f"'{ev.term}' was applied to {c.unit} units ({c.n_units} in all) and the reported "
            f"degrees of freedom show the analysis used them as replicates. "
            + (f"Reanalysed that way: {_p(corrected.p_value)}." if corrected is not None else "")
        )
    cl = ev.clustering
    parts = [
        f"'{ev.term}' varies only between levels of '{c.unit}' ({c.n_units} units), but "
        f"the row-level analysis treats all {c.n_observations} rows as independent "
        f"replicates ({_p(claimed.p_value)})."
    ]
    if cl is not None:
        parts.append(
            f"Observations within a {c.unit} are alike (ICC {cl.icc:.2f}, 95% CI "
            f"{cl.icc_ci[0]:.2f} to {cl.icc_ci[1]:.2f}; design effect {cl.design_effect:.1f}), "
            f"so the effective sample size is about {cl.effective_n:.0f}, not "
            f"{cl.n_observations}."
        )
    if corrected is not None and corrected.p_value is not None and corrected.df is not None:
        sig = "significant" if corrected.p_value < alpha else "not significant"
        parts.append(
            f"With {c.unit} as the replicate ({corrected.label.split(':')[0]}, "
            f"F({corrected.df[0]:.3g}, {corrected.df[1]:.3g}) = {corrected.statistic:.3g}, "
            f"{_p(corrected.p_value)}), the effect of '{ev.term}' is {sig} at "
            f"alpha = {alpha:g}"
            + (
                ": the conclusion changes."
                if changed
                else ": the conclusion stands, but the reported n and p-value overstate "
                "the evidence."
                if changed is False
                else "."
            )
        )
    return " ".join(parts)
