"""Rank tests a paper may report, computed as R's ``wilcox.test`` computes them.

Used only to recognise a reported rank test (which analysis gives the
reported p-value), never for the verdict. The signed-rank test (Wilcoxon
1945) is run on the differences within pairs when a block pairs the two
levels of the term (one row of each level per block); the rank-sum test
(Wilcoxon 1945; Mann & Whitney 1947) on the rows of the two levels. As in R,
the p-value is exact for fewer than 50 observations without ties (or zero
differences), otherwise from the normal approximation with continuity
correction and the tie correction (scipy.stats).
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from replicheck.refit import Analysis, TermInput
from replicheck.vocab import AnalysisName

EXACT_BELOW = 50  # R's wilcox.test: exact p-values below 50 observations, without ties

LABELS = {
    "signed_rank": "Wilcoxon signed-rank test on the pairs",
    "rank_sum": "Wilcoxon rank-sum (Mann-Whitney) test",
}


def _pairs(t: TermInput, blocks: Mapping[str, np.ndarray]) -> np.ndarray | None:
    """The block codes of a blocking that pairs the two levels (one row of each), or None."""
    for codes in blocks.values():
        k = int(codes.max()) + 1
        count = np.bincount(codes, minlength=k)
        level_sum = np.bincount(codes, weights=t.codes, minlength=k)
        if np.all(count == 2) and np.all(level_sum == 1):
            return codes
    return None


def rank_tests(y: np.ndarray, t: TermInput, blocks: Mapping[str, np.ndarray]) -> list[Analysis]:
    """The signed-rank test on the pairs (when a block pairs the levels) and the rank-sum test."""
    if len(t.labels) != 2:
        return []
    from scipy import stats as sps  # only when a rank test was claimed

    out: list[Analysis] = []
    pairs = _pairs(t, blocks)
    if pairs is not None:
        k = int(pairs.max()) + 1
        first = np.zeros(k)
        second = np.zeros(k)
        first[pairs[t.codes == 0]] = y[t.codes == 0]
        second[pairs[t.codes == 1]] = y[t.codes == 1]
        d = first - second  # as R's wilcox.test(x, y, paired = TRUE): x the first level
        ties = bool(np.unique(np.abs(d[d != 0])).size < np.count_nonzero(d))
        exact = bool(d.size < EXACT_BELOW and not ties and np.all(d != 0))
        r = sps.wilcoxon(d, correction=True, method="exact" if exact else "approx")
        nz = d[d != 0]
        ranks = sps.rankdata(np.abs(nz))
        v = float(ranks[nz > 0].sum())  # R's V: the sum of the ranks of positive differences
        name: AnalysisName = "signed_rank"
        out.append(
            Analysis(
                name=name,
                label=LABELS[name],
                term=t.term,
                level="rows",
                n_replicates=k,
                statistic=v,
                df=None,
                p_value=float(r.pvalue),
                test="rank",
            )
        )
    a, b = y[t.codes == 0], y[t.codes == 1]
    tied = bool(np.unique(y).size < y.size)
    exact_sum = bool(a.size < EXACT_BELOW and b.size < EXACT_BELOW and not tied)
    r2 = sps.mannwhitneyu(
        a,
        b,
        alternative="two-sided",
        use_continuity=True,
        method="exact" if exact_sum else "asymptotic",
    )
    name = "rank_sum"
    out.append(
        Analysis(
            name=name,
            label=LABELS[name],
            term=t.term,
            level="rows",
            n_replicates=int(y.size),
            statistic=float(r2.statistic),
            df=None,
            p_value=float(r2.pvalue),
            test="rank",
        )
    )
    return out
