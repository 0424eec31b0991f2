"""Reader's names for the analyses, and the glossary of the terms the reports use.

Loads nothing but the standard library, so ``replicheck explain`` and ``replicheck
rules --terms`` start at once.

Each glossary entry defines one term in one or two sentences and names its source:
a published paper or book, or "common practice" where the term is the trade's
shared usage with no single origin.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

# ---------------------------------------------------------------------------
# analyses: the identifier stays in the JSON, every format shows the reader's name


def unit_noun(name: str | None) -> str:
    """A unit's name as a noun in a sentence: a plain word bare (``tank``), any other
    name quoted (``'Block:Contour'``), ``row`` when each row is its own unit."""
    if not name:
        return "row"
    return name if re.fullmatch(r"[A-Za-z][A-Za-z ]*", name) else f"'{name}'"


def analysis_title(name: str, unit: str | None = None, stratum: str | None = None) -> str:
    """The reader's name of an analysis, e.g. ``"unit means: one value per tank"``.

    >>> analysis_title("unit_means", "tank")
    'unit means: one value per tank'
    >>> analysis_title("mixed_model", "Block:Contour")
    "mixed model with 'Block:Contour' as a random effect"
    """
    u = unit_noun(unit)
    units = (f"{u}s" if u.lower().endswith("unit") else f"{u} units") if unit else "rows"
    titles = {
        "as_claimed": "as claimed: each row a replicate",
        "likelihood_ratio": "as claimed (likelihood-ratio test): each row a replicate",
        "signed_rank": "as claimed (Wilcoxon signed-rank test on the pairs)",
        "rank_sum": "as claimed (Wilcoxon rank-sum test): each row a replicate",
        "within_blocks": "within blocks: each row a replicate, blocks as fixed effects",
        "unit_means": f"unit means: one value per {u}",
        "mixed_model": f"mixed model with {u} as a random effect" if unit else "mixed model",
        "strata_anova": "multi-stratum ANOVA"
        + (
            f", tested between {units}"
            if stratum not in (None, "residual") and stratum == unit
            else f", tested in the '{stratum}' stratum"
            if stratum not in (None, "residual")
            else ", tested against the residual"
        ),
        "randomisation": f"randomisation test over {units}",
        "cluster_robust": f"cluster-robust test (CR2), {units} as clusters",
        "wild_bootstrap": f"wild cluster bootstrap over {units}",
        "gee": f"GEE with {units} as clusters",
        "lack_of_fit": f"lack-of-fit test on the means of {units}",
        "no_test": "no valid test: each level sits in a single unit",
    }
    return titles.get(name, name.replace("_", " "))


SHORT_TITLES = {
    "as_claimed": "row-level analysis",
    "likelihood_ratio": "likelihood-ratio test",
    "signed_rank": "signed-rank test",
    "rank_sum": "rank-sum test",
    "within_blocks": "analysis within blocks",
    "unit_means": "unit-means analysis",
    "mixed_model": "mixed model",
    "strata_anova": "multi-stratum ANOVA",
    "randomisation": "randomisation test",
    "cluster_robust": "cluster-robust test (CR2)",
    "wild_bootstrap": "wild cluster bootstrap",
    "gee": "GEE",
    "lack_of_fit": "lack-of-fit test",
    "no_test": "no valid test",
}


def short_title(name: str) -> str:
    """The analysis's name in a sentence: ``"the mixed model"`` reads ``mixed model``."""
    return SHORT_TITLES.get(name, name.replace("_", " "))


# ---------------------------------------------------------------------------
# glossary


@dataclass(frozen=True)
class Entry:
    """One glossary entry."""

    term: str
    definition: str
    source: str
    pattern: str  # a regular expression that finds the term in a report's prose

    def matches(self, text: str) -> bool:
        """Whether the term appears in ``text``."""
        return re.search(self.pattern, text) is not None


GLOSSARY: tuple[Entry, ...] = (
    Entry(
        "experimental unit",
        "The smallest thing to which a treatment level was applied independently of the "
        "others (a tank, a plot, a day); the replicates of a treatment are its units, not "
        "the measurements taken on them.",
        "Hurlbert (1984), Ecological Monographs 54:187-211; Bailey (2008), Design of "
        "Comparative Experiments",
        r"\b[Ee]xperimental unit",
    ),
    Entry(
        "pseudo-replication",
        "Testing a treatment as if the observations were independent replicates when the "
        "treatment was applied to larger units, so the test counts too many replicates and "
        "its p-value is too small.",
        "Hurlbert (1984), Ecological Monographs 54:187-211",
        r"(?i)pseudo-?replicat",
    ),
    Entry(
        "confounded",
        "Each treatment level sits in a single unit (one kiln per glaze), so a difference "
        "between levels cannot be told apart from a difference between the units.",
        "Hurlbert (1984), Ecological Monographs 54:187-211; Bailey (2008), Design of "
        "Comparative Experiments",
        r"(?i)\bconfound",
    ),
    Entry(
        "ICC",
        "Intraclass correlation: the share of the variance that lies between units, so the "
        "correlation of two observations in the same unit (0: no more alike than any two; "
        "1: identical within a unit).",
        "Shrout & Fleiss (1979), Psychological Bulletin 86:420-428; Searle, Casella & "
        "McCulloch (1992), Variance Components",
        r"\bICC\b",
    ),
    Entry(
        "REML",
        "Restricted maximum likelihood: the usual way of estimating the variances of a "
        "mixed model; unlike plain maximum likelihood it allows for the fixed effects "
        "estimated from the same data.",
        "Patterson & Thompson (1971), Biometrika 58:545-554",
        r"\bREML\b",
    ),
    Entry(
        "one-way ANOVA estimate",
        "The ICC from the mean squares between and within units of a one-way analysis of "
        "variance, truncated at zero; its 95% interval is the exact F-based one.",
        "Searle, Casella & McCulloch (1992), Variance Components",
        r"one-way ANOVA estimate",
    ),
    Entry(
        "design effect",
        "How much the clustering inflates the variance of a mean over that of the same "
        "number of independent observations: 1 + (m - 1) x ICC for units of m observations.",
        "Kish (1965), Survey Sampling",
        r"(?i)design effect",
    ),
    Entry(
        "effective sample size",
        "The number of independent observations that would carry the same information: the "
        "number of observations divided by the design effect.",
        "Kish (1965), Survey Sampling",
        r"(?i)effective (n|sample size)\b",
    ),
    Entry(
        "unit means",
        "The analysis of one value per experimental unit (the mean of its observations): a "
        "valid test of a treatment applied to whole units.",
        "Hurlbert (1984), Ecological Monographs 54:187-211; Murray (1998), Design and "
        "Analysis of Group-Randomized Trials",
        r"(?i)\bunit means\b",
    ),
    Entry(
        "mixed model",
        "A regression with fixed effects for the treatments and random effects for the "
        "groupings (units, blocks), whose variances are estimated; observations in the same "
        "unit are correlated through the unit's random effect.",
        "Pinheiro & Bates (2000), Mixed-Effects Models in S and S-PLUS",
        r"(?i)\bmixed model|random effect",
    ),
    Entry(
        "Satterthwaite df",
        "Approximate denominator degrees of freedom for a test in a mixed model, matched to "
        "the variance of the estimate; they fall towards the number of units when units "
        "carry the information.",
        "Satterthwaite (1946), Biometrics Bulletin 2:110-114",
        r"Satterthwaite",
    ),
    Entry(
        "multi-stratum ANOVA",
        "An analysis of variance with one error stratum per level of the design (blocks, "
        "whole plots, sub-plots, rows); each treatment is tested against the residual of "
        "the stratum it was applied in.",
        "Nelder (1965), Proceedings of the Royal Society A 283:147-162; Bailey (2008), "
        "Design of Comparative Experiments",
        r"(?i)multi-stratum|\bstrat(um|a)\b",
    ),
    Entry(
        "split plot",
        "A design with treatments applied at two levels: whole plots receive one factor, "
        "and sub-plots within them another; each factor has its own experimental unit.",
        "Cochran & Cox (1957), Experimental Designs, 2nd ed.",
        r"(?i)split[- ]plot|sub-?plot|whole plot",
    ),
    Entry(
        "block",
        "A grouping that holds every treatment level (a field strip, a day, a batch), used "
        "to remove its differences from the comparison of treatments.",
        "Fisher (1935), The Design of Experiments",
        r"\bblocks?\b",
    ),
    Entry(
        "within-unit factor",
        "A factor whose levels vary inside each unit (time, period, position), so it is "
        "compared within units and is not itself a unit of the treatments.",
        "common practice (repeated-measures designs); Bailey (2008), Design of "
        "Comparative Experiments",
        r"(?i)within-unit factor",
    ),
    Entry(
        "randomisation test",
        "A test that compares the observed statistic with its values under every (or many "
        "random) re-assignment of the treatment labels among the units, as the "
        "randomisation itself could have assigned them; it assumes no model for the data.",
        "Fisher (1935), The Design of Experiments; Edgington & Onghena (2007), "
        "Randomization Tests, 4th ed.",
        r"(?i)randomi[sz]ation test",
    ),
    Entry(
        "cluster-robust test (CR2)",
        "A test whose standard errors allow any correlation within a unit (cluster); CR2 is "
        "the bias-reduced version, with small-sample degrees of freedom, suited to few "
        "clusters.",
        "Bell & McCaffrey (2002), Survey Methodology 28:169-181; Pustejovsky & Tipton "
        "(2018), J. Business & Economic Statistics 36:672-683",
        r"(?i)cluster-robust|\bCR2\b",
    ),
    Entry(
        "wild cluster bootstrap",
        "A bootstrap that flips the signs of whole units' residuals under the null "
        "hypothesis; with few units it uses Webb's six-point weights, since two-point "
        "weights then allow too few distinct draws.",
        "Cameron, Gelbach & Miller (2008), Review of Economics and Statistics 90:414-427; "
        "Webb (2013), Queen's Economics Department Working Paper 1315",
        r"(?i)wild cluster bootstrap|wild bootstrap|Webb",
    ),
    Entry(
        "GEE",
        "Generalized estimating equations: a regression for counts or proportions with "
        "working correlation within units and a sandwich covariance (here with the "
        "small-sample bias correction).",
        "Liang & Zeger (1986), Biometrika 73:13-22; Mancl & DeRouen (2001), Biometrics 57:126-134",
        r"\bGEE\b",
    ),
    Entry(
        "degrees of freedom (error df)",
        "The number of independent pieces of information a test's error term rests on; "
        "with units as replicates, about the number of units minus the number of "
        "treatment levels.",
        "common practice; Bailey (2008), Design of Comparative Experiments",
        r"(?i)\berror df\b|degrees of freedom",
    ),
    Entry(
        "power",
        "The chance that a design detects an effect of a given size at the chosen alpha; "
        "for a treatment applied to units it rests mainly on the number of units.",
        "Cohen (1988), Statistical Power Analysis for the Behavioral Sciences; "
        "Donner & Klar (2000), Design and Analysis of Cluster Randomization Trials",
        r"(?i)\bpower\b",
    ),
    Entry(
        "random slope",
        "A random effect that lets a within-unit treatment's effect differ from unit to "
        "unit; leaving it out when it is needed makes the test of that treatment too "
        "liberal.",
        "Barr, Levy, Scheepers & Tily (2013), J. Memory and Language 68:255-278; "
        "Schielzeth & Forstmeier (2009), Behavioral Ecology 20:416-420",
        r"(?i)random slope",
    ),
    Entry(
        "overdispersion",
        "More spread between units than a count or proportion model expects by chance "
        "alone, a sign that units differ beyond the treatment.",
        "McCullagh & Nelder (1989), Generalized Linear Models, 2nd ed.",
        r"(?i)overdispers|dispersion",
    ),
    Entry(
        "Moran's I",
        "A measure of spatial autocorrelation: whether neighbouring observations are more "
        "alike than distant ones.",
        "Moran (1950), Biometrika 37:17-23",
        r"Moran",
    ),
    Entry(
        "likelihood-ratio test",
        "A test comparing the fitted likelihoods of the models with and without a term.",
        "Wilks (1938), Annals of Mathematical Statistics 9:60-62",
        r"(?i)likelihood-ratio",
    ),
    Entry(
        "lack of fit",
        "A test of whether the unit means depart from a straight line in a numeric "
        "treatment, with the units as replicates of each value.",
        "Draper & Smith (1998), Applied Regression Analysis, 3rd ed.",
        r"(?i)lack[- ]of[- ]fit",
    ),
)

_INDEX = {re.sub(r"[^a-z0-9]", "", e.term.lower()): e for e in GLOSSARY}


def lookup(term: str) -> Entry | None:
    """The entry for a term, matched without case, spaces or punctuation (``"cr2"`` finds
    the cluster-robust test; a term's own pattern also counts)."""
    key = re.sub(r"[^a-z0-9]", "", term.lower())
    if key in _INDEX:
        return _INDEX[key]
    hits = [e for e in GLOSSARY if key and key in re.sub(r"[^a-z0-9]", "", e.term.lower())]
    if len(hits) == 1:
        return hits[0]
    hits = [e for e in GLOSSARY if e.matches(term)]
    return hits[0] if len(hits) == 1 else None


def used_in(text: str) -> list[Entry]:
    """The entries whose term appears in a report's text, in glossary order."""
    return [e for e in GLOSSARY if e.matches(text)]
