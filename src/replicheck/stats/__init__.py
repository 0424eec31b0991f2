"""Statistics core: REML variance components, Satterthwaite tests, clustering, classic tests.

All functions take plain numpy arrays (float response, integer codes for factors)
and return frozen dataclasses.
"""

from replicheck.stats.classic import (
    DesignError,
    TestResult,
    cell_term_f,
    ols_term_f,
    oneway_anova,
    two_sample_t,
)
from replicheck.stats.clustering import (
    AnovaComponents,
    DesignEffect,
    anova_components,
    design_effect,
    icc_from_components,
    icc_oneway,
)
from replicheck.stats.mixed import (
    FTest,
    MixedFit,
    TTest,
    fit_reml,
    satterthwaite_t,
    satterthwaite_test,
)

__all__ = [
    "AnovaComponents",
    "DesignEffect",
    "DesignError",
    "FTest",
    "MixedFit",
    "TTest",
    "TestResult",
    "anova_components",
    "cell_term_f",
    "design_effect",
    "fit_reml",
    "icc_from_components",
    "icc_oneway",
    "ols_term_f",
    "oneway_anova",
    "satterthwaite_t",
    "satterthwaite_test",
    "two_sample_t",
]
