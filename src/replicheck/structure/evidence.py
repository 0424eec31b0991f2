"""The statistical evidence the structure stage weighs, each test written out once.

* :func:`scales`: the response on the scales an interaction is judged on. An
  interaction between a grouping and a treatment that disappears on the log
  scale is what multiplicative effects produce (a rack that doubles fruit set
  does so under both nutrient levels, so the cells of rack x nutrient differ
  on the raw scale beyond the two main effects); such an interaction is not
  evidence that the cells are separate units. Evidence from cells therefore has
  to hold on the raw scale and, for a positive response, on the log scale
  (log(y + c) with c half the smallest positive value when there are zeros,
  as for counts). This is the classical distinction between removable and
  non-removable interactions (Tukey 1949, Biometrics 5:232-242, the one degree
  of freedom for non-additivity; Box & Cox 1964, JRSS B 26:211-252).
* :func:`units_beyond_model`: the F test that rows within a candidate unit are
  more alike than rows of different units given every treatment term, i.e.
  the candidate's F test after the other treatments and their interactions
  (a second treatment that varies within the units would otherwise sit in the
  within-unit error and hide the clustering).
* :func:`shared_label_effect`: whether the labels of a grouping carry one
  effect across the levels of the grouping they are crossed with (the label
  main effect against the label x parent interaction, on cell means). Labels
  that name the same physical thing everywhere (a block, a subject in a
  crossover) share an effect; labels numbered afresh within each parent level
  (tank 1 of every feed) do not, so their main effect is no larger than the
  variation between cells.
* :func:`relabelled_cells`: the same question as :func:`cells_beyond`
  answered without the F distribution: the labels are re-assigned at random
  within each parent level, as they would be if they named nothing, and the
  cell test is recomputed. The F test assumes equal variances; when a few
  parent levels hold outliers (a litter with a runt) random cells inside them
  differ more than F allows, and on nlme's RatPupWeight a column of random
  codes reached p < 0.01 in about a quarter of the draws. The relabelling test
  is exact under the null whatever the distribution (Fisher 1935; Good 2005,
  Permutation, Parametric and Bootstrap Tests of Hypotheses, ch. 3); draws stop
  early once ten of them reach the observed value (Besag & Clifford 1991,
  Biometrika 78:301-304).
* :func:`chance_nesting`: how likely a column with these level sizes would lie
  wholly inside the treatment levels by chance; nesting is structure only when
  it is unlikely by chance (a column of mostly distinct values is trivially
  nested).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence

import numpy as np

from replicheck.partitions import dense_codes, group_means, is_nested, pair_codes
from replicheck.stats import dist
from replicheck.stats.classic import DesignError, cell_term_f

# Dense least squares on more cells than this is too slow for a screen.
MAX_CELLS = 2000


def scales(y: np.ndarray) -> list[tuple[str, np.ndarray]]:
    """The raw response and, for a non-negative response that is not 0/1, its log."""
    out = [("raw", y)]
    finite = y[np.isfinite(y)]
    if finite.size == 0 or float(finite.min()) < 0:
        return out
    distinct = np.unique(finite[: min(finite.size, 10_000)])
    if distinct.size <= 2:
        return out  # yes/no: no log scale
    positive = finite[finite > 0]
    if positive.size == 0:
        return out
    shift = 0.0 if float(finite.min()) > 0 else float(positive.min()) / 2
    out.append(("log", np.log(y + shift)))
    return out


def on_every_scale(test: Callable[[np.ndarray], float | None], y: np.ndarray) -> float | None:
    """The largest p-value of ``test`` over :func:`scales` (None when any is not computed)."""
    worst: float | None = None
    for _, values in scales(y):
        p = test(values)
        if p is None:
            return None
        worst = p if worst is None else max(worst, p)
    return worst


def _cells_f(
    y: np.ndarray, both: np.ndarray, reduced: Sequence[np.ndarray], added: np.ndarray
) -> float | None:
    """p of the groupings ``added`` beyond the additive ``reduced`` ones, fitted on the
    cells ``both`` within which every grouping is constant (:func:`cell_term_f`)."""
    one = np.empty(int(both.max()) + 1, dtype=np.int64)
    one[both] = np.arange(both.size)
    x_reduced = np.hstack([_dummies(c[one]) for c in reduced])
    x_full = np.hstack([x_reduced, _dummies(added[one])])
    try:
        return float(cell_term_f(y, both, x_full, x_reduced).p_value)
    except DesignError:
        return None


def _dummies(codes: np.ndarray) -> np.ndarray:
    k = int(codes.max()) + 1
    out = np.zeros((codes.size, k))
    out[np.arange(codes.size), codes] = 1.0
    return out


def units_beyond_model(
    y: np.ndarray, unit: np.ndarray, treatment_cells: np.ndarray
) -> float | None:
    """p-value of the units beyond every treatment term (F test of the unit effect).

    ``treatment_cells`` codes the combinations of all treatment levels (the
    saturated treatment model, so every claimed term and interaction is
    adjusted for). When each unit lies inside one combination this is the
    one-way ANOVA of units within combinations; otherwise an extra-sum-of-squares
    F test on the unit x combination cells.
    """
    unit = dense_codes(unit)
    cells = dense_codes(treatment_cells)
    n_units = int(unit.max()) + 1
    n_cells = int(cells.max()) + 1
    if is_nested(unit, cells):
        df1 = n_units - n_cells
        df2 = y.size - n_units
        if df1 < 1 or df2 < 1:
            return None
        means, sizes = group_means(unit, y)
        cmean, _ = group_means(cells, y)
        first = np.zeros(n_units, dtype=np.int64)
        first[unit] = cells
        ss_between = float(np.sum(sizes * (means - cmean[first]) ** 2))
        ss_within = float(np.sum((y - means[unit]) ** 2))
        if ss_within <= 0:
            return 0.0 if ss_between > 0 else None
        f = (ss_between / df1) / (ss_within / df2)
        return float(dist.f_sf(f, df1, df2))
    if n_units + n_cells > MAX_CELLS:
        return None
    return _cells_f(y, dense_codes(pair_codes(unit, cells)), [cells], unit)


def shared_label_effect(
    y: np.ndarray, label: np.ndarray, parent: np.ndarray, treatment_cells: np.ndarray
) -> float | None:
    """p-value of a label's main effect across parent levels, against label x parent.

    The response is first taken as deviations from its treatment-combination
    means; the cell means of label x parent are then fitted additively
    (unweighted, one value per cell), and the label's mean square is tested
    against the residual (interaction) mean square. None when the cells do
    not allow the test (fewer than two labels sharing two parents).
    """
    cells_t = dense_codes(treatment_cells)
    tmean, _ = group_means(cells_t, y)
    r = y - tmean[cells_t]
    lab = dense_codes(label)
    par = dense_codes(parent)
    cell = dense_codes(pair_codes(lab, par))
    k = int(cell.max()) + 1
    if k > MAX_CELLS:
        return None
    means, _ = group_means(cell, r)
    one = np.empty(k, dtype=np.int64)
    one[cell] = np.arange(cell.size)
    lab_c = dense_codes(lab[one])
    par_c = dense_codes(par[one])
    x_par = _dummies(par_c)
    x_full = np.hstack([x_par, _dummies(lab_c)[:, 1:]])
    rank_f = int(np.linalg.matrix_rank(x_full))
    rank_r = int(np.linalg.matrix_rank(x_par))
    df1 = rank_f - rank_r
    df2 = k - rank_f
    if df1 < 1 or df2 < 1:
        return None
    rss_f = float(np.sum((means - x_full @ np.linalg.lstsq(x_full, means, rcond=None)[0]) ** 2))
    rss_r = float(np.sum((means - x_par @ np.linalg.lstsq(x_par, means, rcond=None)[0]) ** 2))
    if rss_f <= 1e-12 * max(rss_r, 1e-300):
        return 0.0 if rss_r > 0 else None
    f = ((rss_r - rss_f) / df1) / (rss_f / df2)
    return float(dist.f_sf(f, df1, df2))


def chance_nesting(column: np.ndarray, treatment: np.ndarray) -> float:
    """log10 of the chance that a column with these level sizes lies inside the treatment.

    Each level of ``m`` rows lies inside one treatment level by chance with
    probability ``sum_t p_t^m`` when rows are assigned to treatment levels
    independently with the observed shares ``p_t`` (a with-replacement
    approximation of random assignment); levels are independent, so the log
    chance is the sum over levels. Single-row levels contribute nothing.
    """
    col = dense_codes(column)
    trt = dense_codes(treatment)
    shares = np.bincount(trt) / trt.size
    sizes = np.bincount(col)
    total = 0.0
    top = float(shares.max())
    rel = shares / top
    for m, count in zip(*np.unique(sizes[sizes > 1], return_counts=True), strict=True):
        # log10(sum_t p_t^m) = m log10(max p) + log10(sum_t (p_t / max p)^m), no underflow
        total += float(count) * (
            float(m) * math.log10(top) + math.log10(float(np.sum(rel ** float(m))))
        )
    return total


def replicated_share(column: np.ndarray) -> float:
    """Share of the rows that lie in levels holding at least two rows."""
    sizes = np.bincount(dense_codes(column))
    return float(sizes[sizes > 1].sum()) / max(int(sizes.sum()), 1)


def combined(codes: Sequence[np.ndarray]) -> np.ndarray:
    """Codes of the combinations of several codings of the same rows."""
    out = np.zeros(codes[0].size, dtype=np.int64)
    for c in codes:
        out = dense_codes(pair_codes(out, dense_codes(c)))
    return out


def present(*codes: np.ndarray) -> np.ndarray:
    """Rows where every coding is known (no -1)."""
    ok = np.ones(codes[0].size, dtype=bool)
    for c in codes:
        ok &= c >= 0
    return ok


def _known_rows(
    y: np.ndarray,
    a: np.ndarray,
    b: np.ndarray,
    treatments: Sequence[np.ndarray],
    inner: np.ndarray | None,
    additive: Sequence[np.ndarray],
) -> tuple[
    np.ndarray,
    np.ndarray,
    np.ndarray,
    Sequence[np.ndarray],
    np.ndarray | None,
    Sequence[np.ndarray],
]:
    """The rows where every coding of a cell test is known (no -1)."""
    ok = present(a, b, *treatments, *additive, *(() if inner is None else (inner,)))
    if ok.all():
        return y, a, b, treatments, inner, additive
    return (
        y[ok],
        a[ok],
        b[ok],
        [t[ok] for t in treatments],
        None if inner is None else inner[ok],
        [t[ok] for t in additive],
    )


def cells_beyond(
    y: np.ndarray,
    a: np.ndarray,
    b: np.ndarray,
    treatments: Sequence[np.ndarray],
    inner: np.ndarray | None = None,
    additive: Sequence[np.ndarray] = (),
) -> float | None:
    """p of the a x b cells beyond additive a, b and the treatment combinations, every scale.

    ``treatments`` are the codes of every treatment whose combinations enter
    both models; ``additive`` factors (occasions, times) enter both models
    additively. With ``inner`` (a grouping nested in the cells), the test is
    made on its means, with the factors constant within it, so that clustering
    inside the cells is not taken for differences between them. The largest
    p-value over :func:`scales` is returned.
    """
    y, a, b, treatments, inner, additive = _known_rows(y, a, b, treatments, inner, additive)
    if y.size == 0:
        return None
    cells = combined([a, b])
    if inner is None and len(y) / (int(cells.max()) + 1) < 1.5:
        return None

    def test(values: np.ndarray) -> float | None:
        return _cell_p(values, a, b, cells, treatments, inner, additive)

    return on_every_scale(test, y)


RELABEL_DRAWS = 999  # random relabellings (p can reach 0.001)
RELABEL_STOP = 10  # stop once this many draws reach the observed value (Besag & Clifford)
RELABEL_MAX_ATOMS = 20_000  # beyond this many rows (or inner groups) the F test alone
RELABEL_SEED = 20261204  # the structure stage's random steps are fixed: reruns agree


def relabelled_cells(
    y: np.ndarray,
    a: np.ndarray,
    b: np.ndarray,
    treatments: Sequence[np.ndarray],
    inner: np.ndarray | None = None,
    additive: Sequence[np.ndarray] = (),
) -> float | None:
    """p of the a x b cells beyond additive a, b and the treatments, by relabelling.

    The labels ``a`` are re-assigned at random among the rows (or the ``inner``
    groups, which they hold whole) of each level of ``b``; the statistic is the
    F test's p-value of :func:`cells_beyond` on each scale, and the larger
    relabelling p over the scales is returned. Atoms are put in a canonical
    order (parent, then mean response, then label) before drawing, so that the
    order of the rows does not change the draws. None when the F test cannot be
    computed or there are too many atoms to relabel.
    """
    y, a, b, treatments, inner, additive = _known_rows(y, a, b, treatments, inner, additive)
    if y.size == 0:
        return None
    atom = dense_codes(inner) if inner is not None else np.arange(y.size, dtype=np.int64)
    k = int(atom.max()) + 1
    if k > RELABEL_MAX_ATOMS:
        return None
    first = np.zeros(k, dtype=np.int64)
    first[atom[::-1]] = np.arange(atom.size)[::-1]
    label, parent = dense_codes(a)[first], dense_codes(b)[first]
    level_mean = np.bincount(atom, weights=y, minlength=k) / np.bincount(atom, minlength=k)
    canon = np.lexsort((label, level_mean, parent))  # atoms grouped by parent
    rng = np.random.default_rng(RELABEL_SEED)
    worst: float | None = None
    for _, values in scales(y):
        observed = _cell_p(values, a, b, combined([a, b]), treatments, inner, additive)
        if observed is None:
            return None
        hits = draws = 0
        while draws < RELABEL_DRAWS and hits < RELABEL_STOP:
            order = canon[np.lexsort((rng.random(k), parent[canon]))]
            new = np.empty(k, dtype=np.int64)
            new[canon] = label[order]  # a permutation of the labels within each parent
            a_new = new[atom]
            p = _cell_p(values, a_new, b, combined([a_new, b]), treatments, inner, additive)
            draws += 1
            hits += p is not None and p <= observed * (1 + 1e-9)
        p_value = hits / draws if hits >= RELABEL_STOP else (1 + hits) / (1 + draws)
        worst = p_value if worst is None else max(worst, p_value)
    return worst


def _cell_p(
    y: np.ndarray,
    a: np.ndarray,
    b: np.ndarray,
    cells: np.ndarray,
    treatments: Sequence[np.ndarray],
    inner: np.ndarray | None,
    additive: Sequence[np.ndarray] = (),
) -> float | None:
    kept = list(treatments)
    extra = list(additive)
    if inner is not None:
        inner = dense_codes(inner)
        k = int(inner.max()) + 1
        sizes = np.bincount(inner, minlength=k)
        y = np.bincount(inner, weights=y, minlength=k) / sizes
        first = np.zeros(k, dtype=np.int64)
        first[inner[::-1]] = np.arange(inner.size)[::-1]
        kept = [t[first] for t in treatments if is_nested(inner, t)]
        extra = [t[first] for t in additive if is_nested(inner, t)]
        a, b, cells = a[first], b[first], cells[first]
    trt = combined(kept) if kept else np.zeros(y.size, dtype=np.int64)
    a, b, cells, trt = (dense_codes(x) for x in (a, b, cells, trt))
    extra = [dense_codes(x) for x in extra]
    if int(cells.max()) + 1 > MAX_CELLS or int(trt.max()) + 1 > MAX_CELLS:
        return None
    both = combined([cells, trt, *extra])
    return _cells_f(y, both, [a, b, trt, *extra], cells)


def unit_evidence(
    y: np.ndarray, unit: np.ndarray, trt: np.ndarray, model_cells: np.ndarray
) -> tuple[float | None, float | None]:
    """ANOVA ICC of units within the term's levels, and the p-value of the units'
    F test beyond the model (every treatment term and the within-unit factors)."""
    from replicheck.stats.clustering import anova_components

    ok = present(unit, trt, model_cells)
    u, t, a, yy = unit[ok], trt[ok], model_cells[ok], y[ok]
    if yy.size == 0:
        return None, None
    u, t = dense_codes(u), dense_codes(t)
    n_units = int(u.max()) + 1
    n_trt = int(t.max()) + 1
    if n_units - n_trt < 1 or yy.size - n_units < 1:
        return None, None
    comp = anova_components(yy, u, t)
    p = units_beyond_model(yy, u, a)
    return float(comp.icc), (float(comp.p_value) if p is None else p)
