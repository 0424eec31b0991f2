"""Verdict stage: rules turn the evidence into findings, and findings into a status.

Each rule is a small function registered with :func:`rule`; it reads the
:class:`Evidence` and yields :class:`Finding` objects. Rule names are stable
and documented in ``docs/rules.md``. To add a rule, write a function here (or
in a module imported here), decorate it, and document it.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field

from replicheck.advice import option
from replicheck.claim import Claim
from replicheck.clustering import Clustering
from replicheck.decisions import headline_term
from replicheck.glossary import short_title, unit_noun
from replicheck.numbers import count_text, format_df, format_number, p_phrase
from replicheck.reconcile import Reconciliation
from replicheck.refit import Analysis, TermRefit
from replicheck.rulebook import RULE_DOCS, RuleName
from replicheck.slopes import SlopeCheck
from replicheck.structure.hidden.base import HiddenScan
from replicheck.structure.numbers import NumberReading
from replicheck.structure.units import Alternative, Structure, UnitChoice
from replicheck.trials import FILE_ROW
from replicheck.vocab import SEVERITIES, STATUS_ORDER, AnalysisName, Severity, Status
from replicheck.words import with_article

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

    rule: RuleName
    severity: Severity
    message: str
    advice: str
    columns: tuple[str, ...] = ()


@dataclass(frozen=True)
class AlternativeEvidence:
    """Another reading of a term's unit, refitted: what the verdict would rest on then."""

    reading: Alternative
    refit: TermRefit

    @property
    def corrected(self) -> Analysis | None:
        return self.refit.get(self.refit.corrected or "")


@dataclass(frozen=True, kw_only=True)
class TermEvidence:
    """What the audit found for one term."""

    term: str
    factors: tuple[str, ...]
    unit: UnitChoice
    clustering: Clustering | None
    refit: TermRefit
    units_per_level: dict[str, int]
    claimed: bool  # the primary term: the first treatment
    reconciliation: Reconciliation | None = None  # when a result was reported for this term
    alternatives: tuple[AlternativeEvidence, ...] = ()
    slope: SlopeCheck | None = None  # a claimed mixed model's omitted grouping x term variation
    numeric: bool = False  # a number entering with one slope (its levels are not comparisons)

    def analysis(self, name: str) -> Analysis | None:
        return self.refit.get(name)

    @property
    def corrected(self) -> Analysis | None:
        return self.refit.get(self.refit.corrected or "")


@dataclass(frozen=True, kw_only=True)
class Evidence:
    """Everything the rules may look at."""

    claim: Claim
    n_rows_read: int
    n_rows_used: int
    structure: Structure
    terms: tuple[TermEvidence, ...]
    reconciliation: Reconciliation
    formula_blocks: tuple[str, ...] = ()
    unreplicated: tuple[str, ...] = ()  # interactions left without error: not testable
    response_kind: str = "continuous"  # continuous | binary | count
    response_coding: tuple[str, str] | None = None  # text labels read as 0 and 1
    hidden: HiddenScan = field(default_factory=HiddenScan)  # groupings no column names
    rows_without_unit: int = 0  # rows left out because their experimental unit is not recorded
    unit_columns: tuple[str, ...] = ()  # the unit columns with those missing values
    numbers: tuple[NumberReading, ...] = ()  # how each numeric column of a formula was read
    trials: int | None = None  # a cbind() response: the yes/no trials the file rows hold
    response_exponent: int = 0  # the response was multiplied by 2**-exponent (extreme scale)
    # numeric model columns multiplied by 2**-exponent for the same reason
    rescaled_columns: tuple[tuple[str, int], ...] = ()
    # the claimed formula's random-intercept groupings: (name, levels, rows with a value)
    claimed_groupings: tuple[tuple[str, int, int], ...] = ()


@dataclass(frozen=True, kw_only=True)
class TermVerdict:
    """The corrected verdict for one term."""

    term: str
    status: Status
    conclusion_changed: bool | None
    claimed_significant: bool | None
    method: AnalysisName | None
    claimed_p_value: float | None = None  # the reported p, else the row-level test's
    error_term: str | None = None  # the stratum it is tested in (None: untestable)


@dataclass(frozen=True, kw_only=True)
class Verdict:
    """The corrected verdict."""

    status: Status
    conclusion_changed: bool | None
    method: AnalysisName | None
    summary: str
    findings: tuple[Finding, ...]
    terms: tuple[TermVerdict, ...]
    caution: str = CAUTION
    term: str = ""  # the headline term: the first with the report's status

    @property
    def headline(self) -> TermVerdict:
        """The verdict of the headline term (decisions.headline_term)."""
        return next(tv for tv in self.terms if tv.term == self.term)


Rule = Callable[[Evidence], Iterable[Finding]]
RULES: dict[RuleName, tuple[Rule, str]] = {}


def rule(name: RuleName) -> Callable[[Rule], Rule]:
    """Register a rule under a stable kebab-case name listed in :mod:`replicheck.rulebook`
    (its one-line description comes from there)."""

    def register(fn: Rule) -> Rule:
        if name in RULES:
            raise ValueError(f"rule {name} registered twice")
        if name not in RULE_DOCS:
            raise ValueError(f"rule {name} is not in replicheck.rulebook")
        RULES[name] = (fn, RULE_DOCS[name])
        return fn

    return register


_p = p_phrase
_u = unit_noun  # a unit's name in a sentence: tank, 'Block:Contour'


def _f(a: Analysis) -> str:
    """The analysis's statistic as printed in a paper: F(a, b) = x or chi-squared(a) = x."""
    assert a.df is not None and a.statistic is not None
    df = ", ".join(format_df(d) for d in a.df)
    name = "chi-squared" if a.test == "chi2" else "F"
    return f"{name}({df}) = {format_number(a.statistic)}, {_p(a.p_value)}"


def _cap(text: str) -> str:
    return text[0].upper() + text[1:] if text else text


def claimed_significance(t: TermEvidence, ev: Evidence) -> bool | None:
    """What the claim says about the term: the reported result, else the row-level test."""
    if t.reconciliation is not None and t.reconciliation.claimed_significant is not None:
        return t.reconciliation.claimed_significant
    row = t.analysis("as_claimed")
    return None if row is None else row.significant(ev.claim.alpha)


def claimed_p(t: TermEvidence) -> float | None:
    """The p-value the claim gives a term: the reported one, else the row-level test's."""
    rec = t.reconciliation
    if rec is not None and rec.reported_p is not None:
        return rec.reported_p
    row = t.analysis("as_claimed")
    return None if row is None else row.p_value


def error_term(t: TermEvidence, ev: Evidence) -> str | None:
    """The stratum a term is tested in: the exact multi-stratum ANOVA's, else the design's
    stratum holding the term, else its unit or the residual; None when confounded."""
    if t.unit.relation == "confounded":
        return None
    exact = stratum_of(t)
    if exact is not None:
        return exact
    for st in ev.structure.strata:
        if t.term in st.terms:
            return "residual" if st.kind == "rows" else st.name
    return t.unit.unit or "residual"


def stratum_of(t: TermEvidence) -> str | None:
    """The error stratum of the exact multi-stratum ANOVA, when it was computed."""
    exact = t.analysis("strata_anova")
    return None if exact is None else exact.stratum


def block_of(t: TermEvidence, ev: Evidence) -> str | None:
    """The block a term is confounded with (its stratum is a block), if any."""
    for st in ev.structure.strata:
        if st.kind == "block" and t.term in st.terms:
            return st.name
    stratum = stratum_of(t)
    if t.unit.unit is None and stratum not in (None, "residual"):
        return stratum
    return None


def _conclusion(a: Analysis | None, alpha: float) -> str:
    """What a corrected analysis concludes: significant, not significant, or no test."""
    if a is None or a.p_value is None:
        return "untestable"
    return "significant" if a.p_value < alpha else "not significant"


def disputed_readings(t: TermEvidence, ev: Evidence) -> tuple[AlternativeEvidence, ...]:
    """Readings supported by the data alone or the names alone whose conclusion differs."""
    alpha = ev.claim.alpha
    mine = "untestable" if t.unit.relation == "confounded" else _conclusion(t.corrected, alpha)
    out = []
    for alt in t.alternatives:
        if alt.reading.kind != "reading":
            continue
        theirs = (
            "untestable"
            if alt.reading.choice.relation == "confounded"
            else _conclusion(alt.corrected, alpha)
        )
        if theirs != mine:
            out.append(alt)
    return tuple(out)


def term_status(t: TermEvidence, ev: Evidence) -> Status:
    """The status of one term from its unit and, for the claimed term, the reported df."""
    if disputed_readings(t, ev):
        return "unclear"
    u = t.unit
    if u.relation == "confounded":
        return "confounded"
    stratum = stratum_of(t)
    if u.unit is None and stratum not in (None, "residual"):
        # aliased with a block (an interaction confounded with blocks): its error is the
        # block stratum, not the rows
        if t.reconciliation is not None and t.reconciliation.level == "units":
            return "ok"
        return "pseudoreplicated"
    if u.unit is None or u.n_units >= u.n_observations:
        return "unclear" if (t.claimed and ev.structure.ambiguous) else "ok"
    if t.reconciliation is not None and t.reconciliation.level == "units":
        return "ok"
    return "pseudoreplicated"


def _changed(t: TermEvidence, ev: Evidence) -> bool | None:
    corrected = t.corrected
    claimed = claimed_significance(t, ev)
    if corrected is None or claimed is None or corrected.p_value is None:
        return None
    return corrected.significant(ev.claim.alpha) != claimed


def _pseudo_terms(ev: Evidence) -> Iterator[TermEvidence]:
    for t in ev.terms:
        if term_status(t, ev) == "pseudoreplicated":
            yield t


@rule("treatment-confounded-with-unit")
def _confounded(ev: Evidence) -> Iterator[Finding]:
    for t in ev.terms:
        u = t.unit
        if u.relation != "confounded" or u.unit is None:
            continue
        yield Finding(
            "treatment-confounded-with-unit",
            "error",
            f"Every level of '{t.term}' sits in a single level of '{u.unit}', so differences "
            f"between the levels of '{t.term}' cannot be told apart from differences between "
            f"{_u(u.unit)} levels; no valid test of '{t.term}' exists in these data.",
            f"Ask the authors whether each level of '{t.term}' really was applied to one "
            f"{_u(u.unit)}. If so, the comparison needs independent replicate units per level; "
            f"the observations within one {_u(u.unit)} cannot replace them.",
            (*t.factors, *u.columns),
        )


@rule("rows-counted-as-replicates")
def _pseudo(ev: Evidence) -> Iterator[Finding]:
    for t in _pseudo_terms(ev):
        u = t.unit
        if u.unit is None or block_of(t, ev) is not None:
            continue  # reported by term-in-block-stratum
        claimed = t.analysis("as_claimed")
        assert claimed is not None
        rec = t.reconciliation
        how = (
            f" ({rec.explanation})"
            if rec is not None and rec.explanation and rec.level == "rows"
            else ""
        )
        msg = (
            f"'{t.term}' varies only between levels of '{u.unit}' ({u.n_units} units), but the "
            f"row-level analysis counts all {u.n_observations} rows as replicates{how}."
        )
        if ev.claim.formula is not None and ev.claim.formula.random and rec is not None:
            msg = (
                f"'{t.term}' varies only between levels of '{u.unit}' ({u.n_units} units), but "
                f"{rec.explanation}."
            )
        corrected = t.corrected
        noun = unit_noun(u.unit)
        if corrected is not None and corrected.p_value is not None:
            where = (
                "as claimed"
                if ev.claim.formula is not None and ev.claim.formula.random
                else ("row level")
            )
            test = _f(corrected) if corrected.df else _p(corrected.p_value)
            msg += f" With {noun} as the replicate: {test} ({where}: {_p(claimed.p_value)})."
        yield Finding(
            "rows-counted-as-replicates",
            "error" if _changed(t, ev) else "warning",
            msg,
            f"Analyse '{t.term}' with {noun} as the experimental unit (unit means, or a mixed "
            f"model with a random effect for {noun}) and report n as the number of {noun} "
            f"units per level.",
            (*t.factors, *u.columns),
        )


def _reconciled(ev: Evidence) -> Iterator[tuple[str, Reconciliation]]:
    several = len(ev.terms) > 1
    for t in ev.terms:
        if t.reconciliation is not None:
            yield (f"'{t.term}': " if several else ""), t.reconciliation


@rule("random-slope-omitted")
def _slope(ev: Evidence) -> Iterator[Finding]:
    for t in ev.terms:
        sc = t.slope
        if sc is None or not sc.material:
            continue
        claimed = t.analysis("as_claimed")
        alpha = ev.claim.alpha
        changed = (
            claimed is not None
            and claimed.p_value is not None
            and (claimed.p_value < alpha) != (sc.term_p < alpha)
        )
        added = f"(0 + {t.term}|{sc.grouping})" if t.numeric else f"(1|{sc.grouping}:{t.term})"
        slope_kind = "slope variance" if t.numeric else "variance"
        yield Finding(
            "random-slope-omitted",
            "error" if changed else "warning",
            f"'{t.term}' varies within '{sc.grouping}', and the claimed model gives "
            f"'{sc.grouping}' a random intercept only, so '{t.term}' is tested against the "
            f"residual. The {sc.grouping} levels respond differently to '{t.term}' "
            f"({sc.grouping}:{t.term} {slope_kind} {format_number(sc.var_slope)} against residual "
            f"{format_number(sc.var_residual)}; REML likelihood ratio {format_number(sc.lr)}, "
            f"{_p(sc.p_value)}). "
            f"With that variation as a random effect, {added}: "
            f"F({sc.df[0]:g}, {format_df(sc.df[1])}) = {format_number(sc.statistic)}, "
            f"{_p(sc.term_p)}"
            + (f" (as claimed: {_p(claimed.p_value)})." if claimed is not None else "."),
            f"Ask the authors to fit the {sc.grouping}-by-{t.term} variation (a random slope, "
            f"or (1|{sc.grouping}:{t.term}) for a categorical {t.term}) and report that test.",
            (t.term, sc.grouping),
        )


@rule("term-in-block-stratum")
def _block_stratum(ev: Evidence) -> Iterator[Finding]:
    for t in ev.terms:
        block = block_of(t, ev)
        if block is None:
            continue
        corrected = t.corrected
        if corrected is not None and corrected.p_value is not None:
            test = f"tested between {block} levels: {_f(corrected)}"
        else:
            test = f"the {block} stratum has no residual degrees of freedom, so it is untestable"
        yield Finding(
            "term-in-block-stratum",
            "error" if _changed(t, ev) else "warning",
            f"'{t.term}' is constant within each level of '{block}' (the design confounds it "
            f"with the blocks), so it is estimated between blocks, not between rows; {test}.",
            f"Test '{t.term}' against the variation between {block} levels, or report it as "
            f"confounded with blocks.",
            (*t.factors, block),
        )


@rule("reported-df-level")
def _df_level(ev: Evidence) -> Iterator[Finding]:
    for prefix, r in _reconciled(ev):
        if r.explanation is None:
            continue
        mixed = ev.claim.formula is not None and bool(ev.claim.formula.random)
        yield Finding(
            "reported-df-level",
            "note",
            prefix + _cap(r.explanation) + ".",
            "Check that the claimed model's random effects match how the treatments were "
            "applied, as the methods describe it."
            if mixed
            else "Check the stated n and degrees of freedom against the design in the methods.",
            (),
        )


@rule("reported-result-not-reproduced")
def _mismatch(ev: Evidence) -> Iterator[Finding]:
    for prefix, r in _reconciled(ev):
        for m in r.mismatches:
            yield Finding(
                "reported-result-not-reproduced",
                "warning",
                prefix + _cap(m) + ".",
                "Ask which rows, model and test produced the reported result; data exclusions, "
                "covariates or a different test may explain the gap.",
                (ev.claim.response,),
            )


def _analysis_text(a: Analysis | None) -> str:
    if a is None or a.p_value is None or a.df is None or a.statistic is None:
        return "no valid test"
    return _f(a)


@rule("stated-unit-not-supported")
def _stated(ev: Evidence) -> Iterator[Finding]:
    advice = (
        "Check how the treatment was applied: the unit is the smallest thing that received a "
        "treatment level independently. The stated unit was used; the analysis replicheck "
        "would choose is shown beside it."
    )
    for kind, text, columns in ev.structure.disputes:
        if kind != "stated-unit-not-supported":
            continue
        yield Finding("stated-unit-not-supported", "warning", _cap(text) + ".", advice, columns)
    for t in ev.terms:
        for alt in t.alternatives:
            if alt.reading.kind != "stated":
                continue
            other = alt.reading.choice
            theirs = other.unit or "the rows"
            yield Finding(
                "stated-unit-not-supported",
                "warning",
                f"For '{t.term}' the stated unit '{t.unit.unit}' was used: "
                f"{_analysis_text(t.corrected)}. {_cap(alt.reading.why)}; with '{theirs}' as "
                f"the unit, as replicheck would read the data: "
                f"{_analysis_text(alt.corrected)}.",
                f"What settles it: {alt.reading.settle}.",
                (*t.factors, *t.unit.columns, *other.columns),
            )


@rule("stated-role-disputed")
def _role_disputed(ev: Evidence) -> Iterator[Finding]:
    for kind, text, columns in ev.structure.disputes:
        if kind == "stated-role-disputed":
            yield Finding(
                "stated-role-disputed",
                "warning",
                _cap(text) + ".",
                "The statement was used as given; check it against the methods.",
                columns,
            )


@rule("unit-reading-open")
def _reading_open(ev: Evidence) -> Iterator[Finding]:
    for t in ev.terms:
        disputed = set(map(id, disputed_readings(t, ev)))
        for alt in t.alternatives:
            if alt.reading.kind != "reading":
                continue
            other = alt.reading.choice
            differs = id(alt) in disputed
            taken = t.unit.unit or "the rows"
            yield Finding(
                "unit-reading-open",
                "warning" if differs else "note",
                f"Two readings of the unit of '{t.term}' remain: with '{taken}' as the unit "
                f"(as taken), {_analysis_text(t.corrected)}; with '{other.unit or 'the rows'}' "
                f"({other.n_units} units), {_analysis_text(alt.corrected)}. Why the second is "
                f"plausible: {alt.reading.why}. "
                + (
                    "The two lead to different conclusions, so the status is 'unclear'."
                    if differs
                    else "Both lead to the same conclusion."
                ),
                f"What settles it: {alt.reading.settle}.",
                (*t.factors, *other.columns),
            )


def _reading_rule(name: RuleName) -> Rule:
    def emit(ev: Evidence) -> Iterator[Finding]:
        for kind, text in ev.structure.readings:
            if kind == name:
                yield Finding(
                    name,
                    "note",
                    _cap(text) + ".",
                    f"Say otherwise with {option('unit')} or {option('unit-labels')} if this "
                    "reading is wrong.",
                    (),
                )

    return emit


rule("labels-local-to-treatment")(_reading_rule("labels-local-to-treatment"))
rule("unit-reading-uncertain")(_reading_rule("unit-reading-uncertain"))
rule("column-reads-as-treatment-label")(_reading_rule("column-reads-as-treatment-label"))
rule("grouping-not-weighed")(_reading_rule("grouping-not-weighed"))


@rule("treatment-coincides-with-column")
def _ambiguous(ev: Evidence) -> Iterator[Finding]:
    term = ev.terms[0].term if ev.terms else ""
    for col in ev.structure.ambiguous:
        yield Finding(
            "treatment-coincides-with-column",
            "warning",
            f"Every level of '{term}' lies in a single level of '{col}'. If '{col}' marks a "
            f"physical unit or a time of processing, the treatment is confounded with it; if "
            f"it is another label of the treatment, this is harmless. The data cannot tell which.",
            f"Find out what '{col}' records. If it is a unit, rerun with {option('unit', col)}.",
            (term, col),
        )


@rule("formula-block-as-stratum")
def _formula_blocks(ev: Evidence) -> Iterator[Finding]:
    for b in ev.formula_blocks:
        yield Finding(
            "formula-block-as-stratum",
            "note",
            f"'{b}' enters the formula as a main effect and its name says block, place, time or "
            f"subject, so replicheck took it as a block of the design (a random stratum), not "
            f"as a treatment to test.",
            f"If '{b}' is a treatment of interest, give it with {option('treatment', b)} instead.",
            (b,),
        )


@rule("response-rescaled")
def _rescaled(ev: Evidence) -> Iterator[Finding]:
    for col, e in ev.rescaled_columns:
        yield Finding(
            "response-rescaled",
            "note",
            f"The column '{col}' of the model spreads over about 2^{e} (10^{e * 0.30103:.0f}): "
            f"its squares would overflow or vanish, so it was multiplied by 2^{-e}, an exact "
            "power of two. Tests and p-values do not depend on its scale; a slope on it in "
            f"this report is per 2^{e} of its units.",
            "Check the column's units: values this large or small are usually an error of "
            "units or of export.",
            (col,),
        )
    e = ev.response_exponent
    if e == 0:
        return
    yield Finding(
        "response-rescaled",
        "note",
        f"The response '{ev.claim.response}' spreads over about 2^{e} (10^{e * 0.30103:.0f}): "
        f"its squares would overflow or vanish, so it was multiplied by 2^{-e}, an exact power "
        "of two. Tests, p-values, ICCs and the verdict do not depend on the scale; means, "
        f"differences and variances in this report are in those rescaled units (multiply "
        f"means and differences by 2^{e}, variances by 2^{2 * e}).",
        "Check the response's units: values this large or small are usually an error of "
        "units or of export.",
        (ev.claim.response,),
    )


@rule("claimed-grouping-unreplicated")
def _claimed_singletons(ev: Evidence) -> Iterator[Finding]:
    for name, levels, rows in ev.claimed_groupings:
        if rows == 0 or levels < rows:
            continue
        yield Finding(
            "claimed-grouping-unreplicated",
            "warning",
            f"The claimed model's random effect '{name}' has a level for every one of its "
            f"{rows} rows: its variance cannot be told apart from the residual, so the data "
            "cannot be the ones the model was fitted to as stated, or the grouping is "
            "recorded under another name.",
            f"Check what '{name}' records; the claimed model's fit here leaves it out.",
            tuple(name.split(":")),
        )


@rule("rows-read-as-trials")
def _trials(ev: Evidence) -> Iterator[Finding]:
    f = ev.claim.formula
    if ev.trials is None or f is None or f.trials is None:
        return
    successes, other, kind = f.trials
    failures = f"'{other}' - '{successes}'" if kind == "total" else f"'{other}'"
    yield Finding(
        "rows-read-as-trials",
        "note",
        f"The response cbind() gives each file row's successes ('{successes}') and failures "
        f"({failures}): the {ev.n_rows_read} rows were read as {ev.trials} yes/no trials, and "
        f"the column '{FILE_ROW}' groups the trials of each row, so that a row can be the "
        "experimental unit of what was applied to it.",
        "Nothing to do if each row is one herd, pot or plate observed once; the row-level "
        "(as claimed) fit is the binomial regression of the rows.",
        (successes, other),
    )


@rule("numbers-in-formula")
def _numbers(ev: Evidence) -> Iterator[Finding]:
    slopes = [r for r in ev.numbers if r.slope]
    levels = [r for r in ev.numbers if not r.slope and r.n_values > 2]
    if not slopes and not levels:
        return
    parts = [f"'{r.column}' ({r.reason}) enters with one slope" for r in slopes]
    parts += [f"'{r.column}' ({r.reason}) as categories" for r in levels]
    advice = []
    if slopes:
        advice.append(
            "If the authors analysed " + " or ".join(f"'{r.column}'" for r in slopes) + " as "
            "categories, write it C(" + slopes[0].column + ") in the formula."
        )
    if levels:
        advice.append(
            "If " + " or ".join(f"'{r.column}'" for r in levels) + " is a quantity fitted "
            "with one slope, state it with " + option("covariate", levels[0].column) + "."
        )
    yield Finding(
        "numbers-in-formula",
        "note",
        "In the claimed model, " + "; ".join(parts) + ".",
        " ".join(advice),
        tuple(r.column for r in (*slopes, *levels)),
    )


@rule("unreplicated-interaction")
def _unreplicated(ev: Evidence) -> Iterator[Finding]:
    for term in ev.unreplicated:
        yield Finding(
            "unreplicated-interaction",
            "warning",
            f"Each combination of {', '.join(repr(f) for f in term.split(':'))} occurs only "
            f"once, so the interaction '{term}' cannot be tested: its variation is the only "
            f"error left and serves as the residual for the main effects.",
            "A claimed test of this interaction cannot come from these data; main effects are "
            "tested assuming no interaction.",
            tuple(term.split(":")),
        )


@rule("partial-alignment")
def _partial(ev: Evidence) -> Iterator[Finding]:
    for r in ev.structure.relations:
        if r.relation == "partial":
            yield Finding(
                "partial-alignment",
                "warning",
                _cap(r.detail) + ".",
                "Check these rows for entry errors; if they are real, the design mixes levels "
                "and the unit needs to be confirmed with the authors.",
                (r.column, r.treatment),
            )


@rule("single-unit-levels")
def _single(ev: Evidence) -> Iterator[Finding]:
    for t in ev.terms:
        u = t.unit
        if u.relation == "confounded" or not u.single_unit_levels or t.numeric:
            continue
        levels = ", ".join(f"'{s}'" for s in u.single_unit_levels)
        yield Finding(
            "single-unit-levels",
            "warning",
            f"The level(s) {levels} of '{t.term}' sit in a single {_u(u.unit)}: their effect "
            f"cannot "
            f"be separated from that {u.unit}'s own effect.",
            "Treat comparisons involving these levels as unreplicated.",
            (*t.factors, *u.columns),
        )


@rule("few-units")
def _few(ev: Evidence) -> Iterator[Finding]:
    for t in ev.terms:
        u = t.unit
        if u.unit is None or u.relation == "confounded" or not t.units_per_level:
            continue
        if t.numeric:
            n_units = sum(t.units_per_level.values())
            if n_units < 2 * FEW_UNITS:
                yield Finding(
                    "few-units",
                    "warning",
                    f"The slope of '{t.term}' rests on only {n_units} {_u(u.unit)} units "
                    f"({n_units - 2} degrees of freedom after the intercept and the slope): the "
                    "corrected test has little power.",
                    "Read a non-significant corrected result as 'not shown', not as 'no effect'.",
                    tuple(u.columns),
                )
            continue
        least = min(t.units_per_level.values())
        if 1 < least < FEW_UNITS:
            yield Finding(
                "few-units",
                "warning",
                f"Some levels of '{t.term}' have only {least} {_u(u.unit)} units: the corrected "
                f"test "
                f"rests on very few error degrees of freedom and has little power.",
                "Read a non-significant corrected result as 'not shown', not as 'no effect'.",
                tuple(u.columns),
            )


@rule("randomisation-floor")
def _floor(ev: Evidence) -> Iterator[Finding]:
    for t in ev.terms:
        r = t.refit.randomisation
        if r is None or r.min_attainable_p <= ev.claim.alpha:
            continue
        n_units = t.unit.n_units
        yield Finding(
            "randomisation-floor",
            "warning",
            f"With {n_units} {_u(t.unit.unit)} units the design allows only "
            f"{count_text(r.n_assignments)} "
            f"assignments of '{t.term}', so the smallest p-value any test on these units can "
            f"reach is {format_number(r.min_attainable_p)}, above alpha = {ev.claim.alpha:g}: no "
            f"randomisation test can find '{t.term}' significant with these data, and a smaller "
            f"p-value (from an F or t test) rests wholly on the normal model.",
            "A convincing result would need more independent units per level; the "
            "observations within units cannot add them.",
            (*t.factors, *t.unit.columns),
        )


CROSS_CHECKS = ("cluster_robust", "wild_bootstrap", "gee", "randomisation")
# Fewest units per level at which each cross-check held its Type I error in the
# calibration study (docs/calibration.md): (continuous response, yes/no or count).
CROSS_CHECK_MIN_UNITS = {
    "cluster_robust": (2, 5),
    "wild_bootstrap": (10, 10),
    "gee": (10, 10),
    "randomisation": (2, 2),
}


def _calibrated(name: str, t: TermEvidence, kind: str) -> bool:
    """Whether a cross-check is calibrated with this term's units (per the study)."""
    fewest = min(t.units_per_level.values()) if t.units_per_level else 0
    if t.numeric:  # a slope: about half the units on either side of the mean value
        fewest = sum(t.units_per_level.values()) // 2
    need = CROSS_CHECK_MIN_UNITS[name][0 if kind == "continuous" else 1]
    return fewest >= need


@rule("cross-checks-disagree")
def _disagree(ev: Evidence) -> Iterator[Finding]:
    alpha = ev.claim.alpha
    for t in ev.terms:
        corrected = t.corrected
        if corrected is None or corrected.p_value is None:
            continue
        verdict = corrected.p_value < alpha
        floor = t.refit.randomisation
        others = [
            a
            for a in t.refit.analyses
            if a.name in CROSS_CHECKS
            and _calibrated(a.name, t, ev.response_kind)
            and a.p_value is not None
            and (a.p_value < alpha) != verdict
            and not (a.name == "randomisation" and floor and floor.min_attainable_p > alpha)
        ]
        if not others:
            continue
        listed = "; ".join(f"{a.name.replace('_', ' ')} {p_phrase(a.p_value)}" for a in others)
        side = "below" if verdict else "above"
        yield Finding(
            "cross-checks-disagree",
            "warning",
            f"The corrected test of '{t.term}' ({corrected.name.replace('_', ' ')}, "
            f"{_p(corrected.p_value)}) is {side} alpha = {alpha:g}, but {listed}: the "
            f"conclusion depends on the method, so the data do not settle it.",
            "Read the result as borderline. docs/calibration.md shows which method holds its "
            "error rate with this many units; the verdict uses that one.",
            (*t.factors, *t.unit.columns),
        )


@rule("unit-overdispersion")
def _overdispersion(ev: Evidence) -> Iterator[Finding]:
    for t in ev.terms:
        od = None if t.clustering is None or t.numeric else t.clustering.overdispersion
        if od is None or od.p_value >= ev.claim.alpha:
            continue
        what = "proportions" if od.family == "binomial" else "counts"
        yield Finding(
            "unit-overdispersion",
            "warning",
            f"The {what} differ between {_u(t.unit.unit)} units of the same level far more than "
            f"{od.family} chance allows (dispersion {format_number(od.dispersion)}, "
            f"chi2({od.df}) = "
            f"{format_number(od.chi2)}, {_p(od.p_value)}): the {_u(t.unit.unit)} units are "
            f"clustered, so "
            f"rows are not independent trials.",
            "Analyse one value per unit, or a model that allows for the clustering.",
            (*t.factors, *t.unit.columns),
        )


@rule("grouping-derived")
def _derived(ev: Evidence) -> Iterator[Finding]:
    for g in ev.hidden.derived:
        used = [t.term for t in ev.terms if g.name in (t.unit.columns or ())]
        credible = any(k.name == g.name and k.credible for k in ev.structure.candidates)
        if not used and not credible:
            continue
        role = (
            f"replicheck took it as the experimental unit of {', '.join(repr(u) for u in used)}"
            if used
            else "it is a credible candidate unit, not taken"
        )
        yield Finding(
            "grouping-derived",
            "warning" if used else "note",
            f"{g.how} The grouping '{g.name}' (from {', '.join(g.sources)}) is named in no "
            f"column; {role}.",
            "Check it against the methods. If it is not a unit of the design, state the unit "
            f"with {option('unit')}, or turn the search off with {option('hidden', False)}.",
            g.sources,
        )


SIGNAL_P = 0.001  # p-value below which a hidden-structure signal is reported (common practice)
SIGNAL_RULES: dict[RuleName, Severity] = {  # rule name -> severity
    "treatment-by-time": "warning",
    "treatment-in-runs": "warning",
    "order-autocorrelation": "note",
    "treatment-clumped-in-space": "warning",
    "residual-spatial-autocorrelation": "note",
    "code-encodes-treatment": "note",
    "treatment-in-file-runs": "note",
    "day-month-ambiguous": "note",
}
SIGNAL_ALWAYS = frozenset({"treatment-by-time"})  # a fact of the data, whatever its p-value
SIGNAL_ADVICE = {
    "treatment-by-time": "Ask whether each day or session was a unit of the treatment; if so, "
    "the days, not the rows, are the replicates.",
    "treatment-in-runs": "Ask whether samples were processed in batches by treatment; a batch "
    "effect would then be confounded with the treatment.",
    "order-autocorrelation": "Neighbouring samples in processing order are alike: look for "
    "drift or batches in the processing.",
    "treatment-clumped-in-space": "Ask how positions were allocated; a treatment kept in one "
    "area is confounded with that area.",
    "residual-spatial-autocorrelation": "Nearby positions are alike: blocks or a spatial model "
    "would account for it.",
    "code-encodes-treatment": "Harmless when the code merely names the treatment; rows that "
    "break the pattern may be mislabelled.",
    "treatment-in-file-runs": "Usually just how the file was sorted; if the rows are in "
    f"processing order, state it with {option('order')} so runs can be weighed as units.",
    "day-month-ambiguous": f"Say how the dates are written with {option('dayfirst', True)} or "
    f"{option('dayfirst', False)}.",
}


def _signal_rule(check: RuleName, severity: Severity) -> Rule:
    def fn(ev: Evidence) -> Iterator[Finding]:
        for sig in ev.hidden.signals:
            if sig.check != check:
                continue
            if sig.p_value is not None and sig.p_value > SIGNAL_P and check not in SIGNAL_ALWAYS:
                continue
            yield Finding(check, severity, sig.message, SIGNAL_ADVICE[check], sig.columns)

    return fn


for _check, _severity in SIGNAL_RULES.items():
    rule(_check)(_signal_rule(_check, _severity))


@rule("unit-variance-zero")
def _boundary(ev: Evidence) -> Iterator[Finding]:
    for t in ev.terms:
        v = t.refit.unit_variance
        if v is None or not v.at_boundary:
            continue
        yield Finding(
            "unit-variance-zero",
            "note",
            f"The REML estimate of the variance between {_u(v.unit)} units is zero, so the mixed "
            f"model treats their rows as independent; the verdict on '{t.term}' rests on the "
            f"unit-means test, which stays valid.",
            "A zero estimate does not prove units are alike; with few units it is often chance.",
            (),
        )


@rule("rows-dropped")
def _dropped(ev: Evidence) -> Iterator[Finding]:
    lost = ev.n_rows_read - ev.n_rows_used - ev.rows_without_unit
    if lost > 0:
        yield Finding(
            "rows-dropped",
            "note",
            f"{lost} of {ev.n_rows_read} rows were left out because the response or a treatment "
            f"value is missing.",
            "Check that the missing values match the paper's stated exclusions.",
            (ev.claim.response, *ev.claim.treatments),
        )
    if ev.rows_without_unit > 0:
        cols = ", ".join(f"'{c}'" for c in ev.unit_columns)
        yield Finding(
            "rows-dropped",
            "warning",
            f"{ev.rows_without_unit} of {ev.n_rows_read} rows were left out because their "
            f"experimental unit is not recorded (missing {cols}): a row whose unit is unknown "
            f"cannot be placed among the replicates, and counting it as a unit of its own "
            f"would assume it independent of every other row.",
            "Ask the authors which unit these rows belong to; the audit of the other rows stands.",
            ev.unit_columns,
        )


@rule("crossed-grouping")
def _crossed(ev: Evidence) -> Iterator[Finding]:
    used = {c for t in ev.terms for c in t.unit.columns}
    for b in ev.structure.blocks:
        if b.name in used:
            continue
        stated = b.reason.startswith("stated")
        if b.kind == "within":
            text = (
                f"'{b.name}' is a within-unit factor ({b.reason}): it is not a unit of the "
                f"treatments, and the corrected model holds it as a random effect crossed with "
                f"the units."
            )
            advice = f"Check that '{b.name}' indexes repeated measurements (times, periods)."
        else:
            text = (
                f"'{b.name}' is a block of the design ({b.reason}): it is not a unit of the "
                f"treatments, and the corrected model holds it as a random effect."
            )
            advice = (
                f"Check that '{b.name}' was a blocking or subject factor; if not, state its "
                f"role ({option('covariate', b.name)} or {option('ignore', b.name)})."
            )
        if stated:
            advice = "As stated."
        yield Finding("crossed-grouping", "note", text, advice, tuple(b.columns))


def decide(ev: Evidence) -> Verdict:
    """Run every rule and derive the status, the change of conclusion and the summary."""
    findings = [f for fn, _ in RULES.values() for f in fn(ev)]
    order = {s: i for i, s in enumerate(SEVERITIES)}
    findings.sort(key=lambda f: order[f.severity])
    terms = tuple(
        TermVerdict(
            term=t.term,
            status=term_status(t, ev),
            conclusion_changed=None if term_status(t, ev) == "confounded" else _changed(t, ev),
            claimed_significant=claimed_significance(t, ev),
            method=t.refit.corrected,
            claimed_p_value=claimed_p(t),
            error_term=error_term(t, ev),
        )
        for t in ev.terms
    )
    status = min((tv.status for tv in terms), key=STATUS_ORDER.index)
    changes = [tv.conclusion_changed for tv in terms if tv.conclusion_changed is not None]
    changed = None if status == "confounded" or not changes else any(changes)
    worst = terms[headline_term([tv.status for tv in terms], status)]
    return Verdict(
        status=status,
        conclusion_changed=changed,
        method=worst.method,
        summary=summarise(ev, terms),
        findings=tuple(findings),
        terms=terms,
        term=worst.term,
    )


def _within(unit: str) -> str:
    """``within a tank``; ``within one level of 'Block:Contour'`` for a name that is not a word."""
    noun = unit_noun(unit)
    return f"within {with_article(noun)}" if noun == unit else f"within one level of {noun}"


def _clustering_sentence(cl: Clustering, unit: str, n_units: int) -> str:
    """How alike observations within a unit are, with the ICC the verdict uses."""
    figures = (
        f"ICC {format_number(cl.icc)} by {cl.icc_method}; design effect "
        f"{format_number(cl.design_effect)}"
    )
    if round(cl.effective_n) >= cl.n_observations:
        return (
            f"Here observations {_within(unit)} are hardly more alike than observations in "
            f"different ones ({figures}): the rows are effectively independent, but the "
            f"treatment was applied to whole units, so only {n_units} of them replicate it."
        )
    return (
        f"Observations {_within(unit)} are alike ({figures}), so the {cl.n_observations} rows "
        f"carry the information of about {format_number(cl.effective_n)} independent ones."
    )


def _term_parts(t: TermEvidence, tv: TermVerdict, ev: Evidence) -> tuple[str, str, str]:
    """The summary of one term in three parts: what the claim did, how alike observations
    within the unit are (empty when not measured), and what the corrected analysis says."""
    u = t.unit
    alpha = ev.claim.alpha
    claimed = t.analysis("as_claimed")
    assert claimed is not None
    unit = u.unit or block_of(t, ev)
    if tv.status == "confounded":
        where = f"a single {_u(unit)}" if unit else "a single unit"
        between = f"differences between {_u(unit)} units" if unit else "the units"
        return (
            f"Each level of '{t.term}' was applied to {where}, so the effect of '{t.term}' "
            f"cannot be separated from {between}. The {u.n_observations} observations are "
            f"repeated measurements of {u.n_units} units, not independent replicates, and no "
            f"valid test of '{t.term}' is possible with these data (the row-level "
            f"{_p(claimed.p_value)} does not support the claim).",
            "",
            "",
        )
    corrected = t.corrected
    if tv.status in {"ok", "unclear"} and (unit is None or u.n_units >= u.n_observations):
        text = (
            f"No grouping was found within which '{t.term}' is constant, so its "
            f"{u.n_observations} rows are its replicates"
        )
        if corrected is not None and corrected.name != "as_claimed" and corrected.df:
            text += f"; tested in the {short_title(corrected.name)}: {_f(corrected)}."
        else:
            text += f"; the row-level test gives {_p(claimed.p_value)}."
        if tv.status == "unclear":
            cols = ", ".join(f"'{a}'" for a in ev.structure.ambiguous)
            text += (
                f" However, '{t.term}' coincides with {cols}; if that marks a unit, the design "
                f"is confounded. The data alone cannot tell."
            )
        return text, "", ""
    mixed_claim = ev.claim.formula is not None and bool(ev.claim.formula.random)
    noun = unit_noun(unit)
    if tv.status == "ok":
        source = "claimed model" if mixed_claim else "reported result"
        return (
            f"'{t.term}' was applied to {noun} units ({u.n_units} in all) and the {source} "
            f"shows the analysis used them as replicates."
            + (f" Reanalysed that way: {_p(corrected.p_value)}." if corrected is not None else ""),
            "",
            "",
        )
    rec = t.reconciliation
    if unit is None:  # no named unit: the term is tested in a coarser stratum of the design
        first = (
            f"'{t.term}' is tested against a coarser stratum of the design than the rows, but "
            f"the row-level analysis treats all {u.n_observations} rows as independent "
            f"replicates ({_p(claimed.p_value)})."
        )
    elif mixed_claim and rec is not None and rec.explanation:
        first = (
            f"'{t.term}' varies only between levels of '{unit}' ({u.n_units} units), but "
            f"{rec.explanation.split('; ')[0]} ({_p(claimed.p_value)})."
        )
    else:
        first = (
            f"'{t.term}' varies only between levels of '{unit}' ({u.n_units} units), but the "
            f"row-level analysis treats all {u.n_observations} rows as independent replicates "
            f"({_p(claimed.p_value)})."
        )
    cl = t.clustering
    middle = "" if cl is None or unit is None else _clustering_sentence(cl, unit, u.n_units)
    last = ""
    if corrected is not None and corrected.p_value is not None:
        sig = "significant" if corrected.p_value < alpha else "not significant"
        ending = (
            ": the conclusion changes."
            if tv.conclusion_changed
            else ": the conclusion stands, but the reported n and p-value overstate the evidence."
            if tv.conclusion_changed is False
            else "."
        )
        test = f"{_f(corrected)}" if corrected.df else _p(corrected.p_value)
        replicate = f"{noun} as the replicate" if unit else "the units of its stratum"
        last = (
            f"With {replicate} ({short_title(corrected.name)}, {test}), "
            f"the effect of '{t.term}' is {sig} at alpha = {alpha:g}{ending}"
        )
    return first, middle, last


def summarise(ev: Evidence, terms: tuple[TermVerdict, ...]) -> str:
    """A plain-language paragraph a reviewer can paste into a report (worst terms first).

    With several terms, only the terms whose status is not ``ok`` are described, and how
    alike observations within a unit are is said once per unit.
    """
    pairs = sorted(zip(ev.terms, terms, strict=True), key=lambda p: STATUS_ORDER.index(p[1].status))
    if len(pairs) > 1:
        pairs = [p for p in pairs if p[1].status != "ok"] or pairs[:1]
    said: set[str] = set()
    out = []
    for t, tv in pairs:
        first, middle, last = _term_parts(t, tv, ev)
        out.append(first)
        if middle and middle not in said:
            said.add(middle)
            out.append(middle)
        if last:
            out.append(last)
    return " ".join(out)
