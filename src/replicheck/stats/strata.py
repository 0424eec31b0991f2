"""Multi-stratum ANOVA of designs with an orthogonal block structure.

This is the analysis R computes with ``aov(y ~ treatments + Error(strata))``:
the data space is split into *error strata*, one per random grouping factor,
and every treatment term is tested inside the stratum that holds it against
that stratum's residual mean square.

Block structure (Nelder 1965, Proc. Roy. Soc. A 283:147-162; Tjur 1984,
Int. Stat. Rev. 52:33-81; Bailey 2008, *Design of Comparative Experiments*,
ch. 6 and 10). The random factors given by the caller are partitions of the
rows. They are completed with the *universe* (one class, "mean") and the
*rows* (one class per row, the bottom stratum, "residual"), and closed under

* infimum ``F ^ G`` (classes are the non-empty intersections, e.g. the whole
  plots ``Block:Variety`` when blocks are crossed with varieties) -- named by
  joining the factor names with ``:`` as R does;
* supremum ``F v G`` (the finest partition that both refine; classes are the
  connected components of the bipartite graph of co-occurring levels) --
  named ``sup(F,G)``, because the strata are only orthogonal when it is
  present.

Two factors are *orthogonal* when, inside every class ``h`` of ``F v G``, the
count of rows in level ``f`` of ``F`` and ``g`` of ``G`` is
``n_fg = n_f n_g / n_h`` (Tjur 1984); then the averaging operators ``P_F``
(replace each value by its group mean) commute and ``P_F P_G = P_{F v G}``.
For a closed set of pairwise orthogonal factors the stratum projectors follow
by Moebius inversion down the poset (coarser factors first)::

    S_F = P_F - sum_{G strictly coarser than F} S_G,

they are mutually orthogonal and sum to the identity; stratum ``F`` has
dimension ``levels(F) - sum_G dim(S_G)``. ``P_F`` is applied with group sums
(``bincount``-style sparse products); no n x n matrix is formed. A structure
whose factors are not pairwise orthogonal (e.g. crossed factors with unequal
cell counts) has no well-defined strata and is refused.

Treatment terms. The intercept lives in the mean stratum, which is not
reported. In every other stratum ``F`` the response and each term's columns
are projected by ``S_F`` and the terms are fitted sequentially in model order
(type I sums of squares, as ``aov`` fits each stratum); a term whose projected
columns add no rank after the earlier terms does not appear in that stratum.
The stratum's residual SS and df are what the terms leave. A term is tested by
``F = MS_term / MS_residual(stratum)`` on ``(df_term, df_residual)``; when the
stratum has no residual df the F statistic and p-value are ``None``.

Efficiency. Let ``Q_t`` be an orthonormal basis (``d_t`` columns) of term
``t``'s space adjusted, in the ordinary unstratified model, for the intercept
and the earlier terms. Its efficiency in stratum ``F`` is
``||(I - Pi_F) S_F Q_t||^2 / d_t`` where ``Pi_F`` projects on the stratum-``F``
projections of the earlier terms: the mean, over the term's directions, of the
share of its information still available in that stratum. It does not depend
on how the term is coded, equals 1 in the stratum holding the term in an
orthogonal design, equals the canonical efficiency factor when all directions
of the term share one (e.g. treatments in a balanced incomplete block design;
James & Wilkinson 1971, Biometrika 58:279-294; Houtman & Speed 1983, Ann.
Statist. 11:1069-1085), and sums over strata to at most 1 (less when a term's
information in some stratum is aliased with earlier terms there).

Exactness. When every factor of the closed structure has equal replication
(all its classes the same size) the covariance matrix of any random-intercept
model on these factors is ``sum_F xi_F S_F``: each stratum is spherical and the
stratum F tests are exact. When moreover each treatment term lies wholly in one
stratum (``orthogonal``), these are the F tests and degrees of freedom that
REML with Satterthwaite's approximation gives whenever the REML variance
estimates are interior (Bailey 2008, ch. 10). With unequal class sizes
(e.g. subjects with missing visits) the decomposition is still the one ``aov``
reports, but its F tests are approximate; ``balanced`` is then False.

Differences from ``aov``: the strata do not depend on the order the factors
are given in (``aov`` orthogonalises its ``Error()`` terms in formula order);
``Error(A + B)`` for crossed ``A``, ``B`` is analysed as ``Error(A * B)``
(the infimum is always a stratum); ``aov`` drops a projected column whose sum
of squares is below an absolute 1e-5, this module drops projected directions
whose singular value is below 1e-6 times the largest centred column norm of
the term (a relative tolerance, so the result does not depend on units).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.sparse.csgraph import connected_components

from replicheck.errors import InputError
from replicheck.partitions import dense_codes, first_seen_codes
from replicheck.stats import dist
from replicheck.stats.classic import DesignError

__all__ = [
    "MultiStratumAnova",
    "StratumResidual",
    "StratumTerm",
    "is_balanced_orthogonal",
    "multistratum_anova",
]

RESIDUAL = "residual"
MEAN = "mean"
_MAX_STRATA = 64  # closure larger than this is refused (not a designed experiment)
_RANK_TOL = 1e-6  # singular values below this share of the term's scale count as zero
_EFF_TOL = 1e-8  # efficiency within this of 1 counts as "wholly in one stratum"


@dataclass(frozen=True)
class StratumTerm:
    """One treatment term as estimated in one error stratum.

    ``f_statistic`` and ``p_value`` are ``None`` when the stratum has no
    residual degrees of freedom (the term cannot be tested there); then
    ``error_ss`` and ``error_df`` are ``None`` too. ``efficiency`` is the
    share of the term's information in this stratum (module docstring).
    """

    term: str
    stratum: str
    ss: float
    df: int
    ms: float
    f_statistic: float | None
    p_value: float | None
    error_ss: float | None
    error_df: int | None
    efficiency: float


@dataclass(frozen=True)
class StratumResidual:
    """Residual sum of squares and degrees of freedom of one stratum."""

    stratum: str
    ss: float
    df: int


@dataclass(frozen=True)
class MultiStratumAnova:
    """A multi-stratum ANOVA table.

    ``terms`` lists the terms stratum by stratum (coarse to fine) and in
    model order within a stratum; a term split over several strata (a
    non-orthogonal design) appears once per stratum. ``residuals`` has one
    entry per stratum in ``strata`` (df may be 0). ``strata`` runs coarse to
    fine and ends with ``"residual"`` (the rows); the mean stratum, which only
    holds the intercept, is left out. ``orthogonal``: every term lies wholly
    in one stratum. ``balanced``: every factor of the closed block structure
    has equal replication, so the stratum F tests are exact.
    """

    terms: tuple[StratumTerm, ...]
    residuals: tuple[StratumResidual, ...]
    orthogonal: bool
    strata: tuple[str, ...]
    balanced: bool


# ---------------------------------------------------------------------------
# partitions of the rows


@dataclass(frozen=True, eq=False)
class _Factor:
    """A partition of the rows: codes ``0..levels-1`` in order of first appearance."""

    name: str
    codes: np.ndarray
    counts: np.ndarray

    @property
    def levels(self) -> int:
        return int(self.counts.size)

    def key(self) -> bytes:
        return self.codes.tobytes()

    def indicator_t(self) -> sparse.csr_matrix:
        """The transposed indicator matrix (levels x rows), sparse."""
        n = self.codes.size
        return sparse.csr_matrix((np.ones(n), (self.codes, np.arange(n))), shape=(self.levels, n))


def _equally_replicated(codes: np.ndarray) -> bool:
    """Whether every class of a factor has the same number of rows (one hashing pass)."""
    counts = np.bincount(dense_codes(codes))
    return bool(np.all(counts == counts[0]))


def _canonical(codes: np.ndarray) -> np.ndarray:
    """Relabel any codes to ``0..L-1`` in order of first appearance."""
    return first_seen_codes(codes)


def _factor(name: str, codes: np.ndarray) -> _Factor:
    canon = _canonical(codes)
    return _Factor(name, canon, np.bincount(canon))


def _infimum(a: _Factor, b: _Factor, name: str) -> _Factor:
    return _factor(name, a.codes * np.int64(b.levels) + b.codes)


def _supremum(a: _Factor, b: _Factor, name: str) -> _Factor:
    n = a.codes.size
    graph = sparse.coo_matrix(
        (np.ones(n), (a.codes, b.codes + a.levels)),
        shape=(a.levels + b.levels, a.levels + b.levels),
    )
    _, labels = connected_components(graph, directed=False)
    return _factor(name, labels[a.codes])


def _coarser_or_equal(coarse: _Factor, fine: _Factor) -> bool:
    """True when every class of ``fine`` lies inside one class of ``coarse``."""
    image = np.full(fine.levels, -1, dtype=np.int64)
    image[fine.codes] = coarse.codes
    return bool(np.all(image[fine.codes] == coarse.codes))


def _orthogonal_pair(a: _Factor, b: _Factor) -> bool:
    """Tjur's condition: ``n_ab n_h == n_a n_b`` for all level pairs in each class h of a v b."""
    if _coarser_or_equal(a, b) or _coarser_or_equal(b, a):
        return True
    sup = _supremum(a, b, "")
    pair = a.codes * np.int64(b.levels) + b.codes
    cells, cell_counts = np.unique(pair, return_counts=True)
    # every level pair inside a class of the supremum must occur
    a_per_h = np.bincount(sup.codes[np.unique(a.codes, return_index=True)[1]])
    b_per_h = np.bincount(sup.codes[np.unique(b.codes, return_index=True)[1]])
    if cells.size != int(np.sum(a_per_h * b_per_h)):
        return False
    ca, cb = cells // b.levels, cells % b.levels
    h_of_a = np.empty(a.levels, dtype=np.int64)
    h_of_a[a.codes] = sup.codes
    n_h = sup.counts[h_of_a[ca]]
    return bool(np.all(cell_counts * n_h == a.counts[ca] * b.counts[cb]))


@dataclass(frozen=True, eq=False)
class _Structure:
    """A closed block structure, coarse to fine: ``factors[0]`` is the mean, the last the rows.

    ``coarser[i]`` lists the indices of the factors strictly coarser than
    ``factors[i]``; ``dims[i]`` is the dimension of stratum ``i``.
    """

    n: int
    factors: tuple[_Factor, ...]
    coarser: tuple[tuple[int, ...], ...]
    dims: tuple[int, ...]
    orthogonal: bool
    balanced: bool

    def project(self, mat: np.ndarray) -> list[np.ndarray]:
        """``S_F mat`` for every stratum, by Moebius inversion of the group means."""
        out: list[np.ndarray] = []
        for i, f in enumerate(self.factors):
            if i == len(self.factors) - 1:
                p = mat.copy()  # the rows: P = I
            else:
                sums = f.indicator_t() @ mat
                p = (sums / f.counts[:, None])[f.codes]
            for j in self.coarser[i]:
                p -= out[j]
            out.append(p)
        return out


def _join_names(a: str, b: str) -> str:
    """R-style name of an infimum: ``Block`` and ``Variety`` give ``Block:Variety``."""
    if "(" in a or "(" in b:
        return f"{a}:{b}"
    parts: list[str] = []
    for part in a.split(":") + b.split(":"):
        if part not in parts:
            parts.append(part)
    return ":".join(parts)


def _build_structure(n: int, given: Sequence[_Factor]) -> _Structure:
    universe = _Factor(MEAN, np.zeros(n, dtype=np.int64), np.array([n]))
    rows = _Factor(RESIDUAL, np.arange(n, dtype=np.int64), np.ones(n, dtype=np.int64))
    found: dict[bytes, _Factor] = {universe.key(): universe, rows.key(): rows}
    names = {MEAN, RESIDUAL}
    for f in given:  # the caller's name wins over later duplicates of the same partition
        if f.key() not in found:
            found[f.key()] = f
            names.add(f.name)

    def fresh(preferred: str, fallback: str) -> str:
        if preferred not in names:
            return preferred
        if fallback not in names:
            return fallback
        k = 2
        while f"{fallback}#{k}" in names:
            k += 1
        return f"{fallback}#{k}"

    changed = True
    while changed:
        changed = False
        current = list(found.values())
        for i, a in enumerate(current):
            for b in current[i + 1 :]:
                inf = _infimum(a, b, "")
                if inf.key() not in found:
                    name = fresh(_join_names(a.name, b.name), f"inf({a.name},{b.name})")
                    found[inf.key()] = _Factor(name, inf.codes, inf.counts)
                    names.add(name)
                    changed = True
                sup = _supremum(a, b, "")
                if sup.key() not in found:
                    name = fresh(f"sup({a.name},{b.name})", f"sup({a.name},{b.name})")
                    found[sup.key()] = _Factor(name, sup.codes, sup.counts)
                    names.add(name)
                    changed = True
                if len(found) > _MAX_STRATA:
                    raise DesignError(
                        f"the random factors generate more than {_MAX_STRATA} strata; "
                        "this is not a designed block structure"
                    )
    # coarse to fine: fewer levels first (a strictly coarser factor has fewer levels);
    # ties keep the order of discovery (the caller's order first)
    order = sorted(found.values(), key=lambda f: f.levels)
    factors = tuple(order)
    orthogonal = all(
        _orthogonal_pair(factors[i], factors[j])
        for i in range(len(factors))
        for j in range(i + 1, len(factors))
    )
    coarser = tuple(
        tuple(j for j in range(i) if _coarser_or_equal(factors[j], factors[i]))
        for i in range(len(factors))
    )
    dims: list[int] = []
    for i, f in enumerate(factors):
        dims.append(f.levels - sum(dims[j] for j in coarser[i]))
    balanced = all(int(f.counts.min()) == int(f.counts.max()) for f in factors)
    return _Structure(n, factors, coarser, tuple(dims), orthogonal, balanced)


# ---------------------------------------------------------------------------
# input checking


def _as_codes(name: str, values: object, n: int | None) -> np.ndarray:
    arr = np.asarray(values)
    if arr.ndim != 1:
        raise InputError(f"random factor '{name}' must be one code per row (a 1-d array)")
    if n is not None and arr.shape[0] != n:
        raise InputError(f"random factor '{name}' has {arr.shape[0]} codes for {n} rows")
    if arr.dtype.kind == "f" and not np.all(np.isfinite(arr)):
        raise InputError(f"random factor '{name}' has missing codes")
    if arr.dtype.kind == "O":
        if any(_missing(v) for v in arr.tolist()):
            raise InputError(f"random factor '{name}' has missing codes")
        arr = arr.astype(str)
    return arr


def _missing(value: object) -> bool:
    """None, NaN or a missing-value marker such as pandas' NA."""
    if value is None:
        return True
    try:
        return bool(value != value)
    except TypeError:  # pandas.NA refuses to be a bool
        return True


def _check_strata(
    strata: Mapping[str, object], n: int | None
) -> tuple[int | None, list[tuple[str, np.ndarray]]]:
    given: list[tuple[str, np.ndarray]] = []
    for name, values in strata.items():
        if not isinstance(name, str) or not name.strip():
            raise InputError("every random factor needs a non-empty name")
        if name in (MEAN, RESIDUAL):
            raise InputError(f"'{name}' is reserved for a stratum; rename that random factor")
        codes = _as_codes(name, values, n)
        n = codes.shape[0] if n is None else n
        given.append((name, codes))
    return n, given


def _check_terms(terms: Sequence[tuple[str, np.ndarray]], n: int) -> list[tuple[str, np.ndarray]]:
    out: list[tuple[str, np.ndarray]] = []
    seen: set[str] = set()
    for item in terms:
        if not isinstance(item, tuple | list) or len(item) != 2:
            raise InputError("each term must be a (name, design columns) pair")
        name, cols = item
        if not isinstance(name, str) or not name.strip():
            raise InputError("every term needs a non-empty name")
        if name in seen:
            raise InputError(f"term '{name}' is given twice")
        seen.add(name)
        try:
            mat = np.asarray(cols, dtype=float)
        except (TypeError, ValueError):
            raise InputError(f"term '{name}' has non-numeric design columns") from None
        if mat.ndim == 1:
            mat = mat[:, None]
        if mat.ndim != 2 or mat.shape[0] != n or mat.shape[1] == 0:
            raise InputError(f"term '{name}' must have {n} rows and at least one column")
        if not np.all(np.isfinite(mat)):
            raise InputError(f"term '{name}' has missing or infinite values")
        out.append((name, mat))
    return out


# ---------------------------------------------------------------------------
# sequential fitting


def _orthonormal_increment(basis: np.ndarray, cols: np.ndarray, scale: float) -> np.ndarray:
    """Orthonormal basis of the directions that ``cols`` add to ``span(basis)``.

    ``basis`` has orthonormal columns. The columns are made orthogonal to it
    (twice, for stability); the remainder ``R`` is orthonormalised through the
    eigen-decomposition of ``R'R`` followed by one symmetric re-orthogonalisation
    (Cholesky-QR-2 style: only small k x k factorisations). Directions with
    singular value at most ``_RANK_TOL * scale`` count as zero.
    """
    n = cols.shape[0]
    if scale <= 0.0 or cols.shape[1] == 0:
        return np.zeros((n, 0))
    resid = cols.copy()
    for _ in range(2):
        if basis.shape[1]:
            resid -= basis @ (basis.T @ resid)
    lam, vec = np.linalg.eigh(resid.T @ resid)
    keep = lam > (_RANK_TOL * scale) ** 2
    if not np.any(keep):
        return np.zeros((n, 0))
    u = resid @ (vec[:, keep] / np.sqrt(lam[keep]))
    if basis.shape[1]:
        u -= basis @ (basis.T @ u)
    lam2, vec2 = np.linalg.eigh(u.T @ u)
    return np.asarray(u @ ((vec2 / np.sqrt(lam2)) @ vec2.T))


@dataclass(frozen=True, eq=False)
class _StratumFit:
    """Sequential fit in one stratum: ``rows`` holds (term index, SS, df, efficiency)."""

    index: int
    rows: tuple[tuple[int, float, int, float], ...]
    residual_ss: float
    residual_df: int


@dataclass(frozen=True, eq=False)
class _Fit:
    strata: tuple[_StratumFit, ...]
    term_df: tuple[int, ...]  # df of each term adjusted for the intercept and earlier terms
    wholly_in_one: bool  # every term with df lies in one stratum (efficiency 1)


def _fit(structure: _Structure, y: np.ndarray, terms: Sequence[tuple[str, np.ndarray]]) -> _Fit:
    """Project, then fit the terms sequentially within every stratum (module docstring)."""
    n = structure.n
    centred = [mat - mat.mean(axis=0) for _, mat in terms]
    scales = [float(np.max(np.linalg.norm(c, axis=0))) for c in centred]
    # term spaces adjusted for the intercept and earlier terms, in the unstratified model
    bases: list[np.ndarray] = []
    full = np.zeros((n, 0))
    for c, scale in zip(centred, scales, strict=True):
        new = _orthonormal_increment(full, c, scale)
        bases.append(new)
        full = np.hstack([full, new])
    widths = [c.shape[1] for c in centred]
    term_df = [b.shape[1] for b in bases]
    projected = structure.project(np.hstack([y[:, None], *centred, *bases]))

    offsets = np.cumsum([1, *widths]).tolist()
    b_offsets = np.cumsum([offsets[-1], *term_df]).tolist()
    last = len(structure.factors) - 1
    fits: list[_StratumFit] = []
    best = np.zeros(len(terms))
    for s, proj in enumerate(projected):
        if s == 0 or (structure.dims[s] == 0 and s != last):
            continue  # the mean stratum (intercept only) and empty strata
        ys = proj[:, 0]
        basis = np.zeros((n, 0))
        rows: list[tuple[int, float, int, float]] = []
        for t in range(len(terms)):
            new = _orthonormal_increment(basis, proj[:, offsets[t] : offsets[t + 1]], scales[t])
            if new.shape[1] == 0:
                continue
            q_t = proj[:, b_offsets[t] : b_offsets[t + 1]]
            for _ in range(2):
                if basis.shape[1]:
                    q_t = q_t - basis @ (basis.T @ q_t)
            eff = float(np.sum(q_t**2)) / term_df[t] if term_df[t] else 0.0
            best[t] = max(best[t], eff)
            rows.append((t, float(np.sum((new.T @ ys) ** 2)), new.shape[1], _snap(eff)))
            basis = np.hstack([basis, new])
        resid_df = structure.dims[s] - basis.shape[1]
        if resid_df < 0:  # cannot happen in exact arithmetic
            raise DesignError(
                f"numerical rank problem in stratum '{structure.factors[s].name}'; "
                "rescale the design columns"
            )
        fitted = basis @ (basis.T @ ys)
        resid_ss = float(np.sum((ys - fitted) ** 2)) if resid_df else 0.0
        fits.append(_StratumFit(s, tuple(rows), resid_ss, int(resid_df)))
    wholly = all(d == 0 or best[t] >= 1.0 - _EFF_TOL for t, d in enumerate(term_df))
    return _Fit(tuple(fits), tuple(term_df), wholly)


def _snap(value: float) -> float:
    """Round efficiencies that are 1 or 0 up to rounding error."""
    if abs(value - 1.0) < 1e-10:
        return 1.0
    if abs(value) < 1e-12:
        return 0.0
    return value


# ---------------------------------------------------------------------------
# balanced designs: the analysis of the cells


@dataclass(frozen=True, eq=False)
class _Cells:
    """Rows grouped into cells that no factor or term tells apart, all of one size ``m``.

    ``rows`` picks two rows of every cell (the reduced data); ``scale`` is ``m / 2``.
    """

    codes: np.ndarray
    rows: np.ndarray
    m: int

    @property
    def scale(self) -> float:
        return self.m / 2.0


def _equal_cells(
    given: Sequence[tuple[str, np.ndarray]], terms: Sequence[tuple[str, np.ndarray]], n: int
) -> _Cells | None:
    """The cells of a design whose rows repeat in cells of equal size (at least 3 rows).

    A cell is a set of rows that agree on every random factor and every term column.
    Every stratum projector and every term column is constant within cells, so the data
    space splits into the cell-constant vectors and the within-cell contrasts, which lie
    wholly in the rows stratum and hold no term. With ``m`` rows in every cell, two rows
    per cell carrying the cell mean reproduce the cell-constant part with every inner
    product multiplied by ``2 / m`` (same strata, same dimensions, same efficiencies);
    the within-cell sum of squares and its ``n - cells`` df are added back to the rows
    stratum. Two rows (not one) keep every given factor distinct from the rows.
    """
    key = np.zeros(n, dtype=np.int64)
    columns = [codes for _, codes in given]
    for _, mat in terms:
        columns += [mat[:, j] for j in range(mat.shape[1])]
    for col in columns:
        part = first_seen_codes(col)
        key = first_seen_codes(key * (int(part.max()) + 1) + part)
    counts = np.bincount(key)
    m = int(counts[0])
    if m < 3 or not np.all(counts == m):
        return None
    order = np.argsort(key, kind="stable")
    starts = np.arange(counts.size) * m
    rows = np.sort(np.concatenate([order[starts], order[starts + 1]]))
    return _Cells(key, rows, m)


def _cell_fit(
    cells: _Cells,
    given: Sequence[tuple[str, np.ndarray]],
    terms: Sequence[tuple[str, np.ndarray]],
    y: np.ndarray,
) -> tuple[_Structure, _Fit]:
    """The structure and stratum fits of the full data, computed on two rows per cell."""
    k = int(cells.codes.max()) + 1
    means = np.bincount(cells.codes, weights=y, minlength=k) / cells.m
    within = float(np.sum((y - means[cells.codes]) ** 2))
    pick = cells.rows
    structure = _build_structure(pick.size, [_factor(name, codes[pick]) for name, codes in given])
    fit = _fit(structure, means[cells.codes[pick]], [(t, mat[pick]) for t, mat in terms])
    c = cells.scale
    last = len(structure.factors) - 1
    strata = []
    for sf in fit.strata:
        rows = tuple((t, ss * c, df, eff) for t, ss, df, eff in sf.rows)
        ss, df = sf.residual_ss * c, sf.residual_df
        if sf.index == last:
            ss, df = ss + within, df + (y.size - 2 * k)
        strata.append(_StratumFit(sf.index, rows, ss, df))
    return structure, _Fit(tuple(strata), fit.term_df, fit.wholly_in_one)


# ---------------------------------------------------------------------------
# public functions


def is_balanced_orthogonal(
    strata: Mapping[str, np.ndarray],
    terms: Sequence[tuple[str, np.ndarray]] = (),
) -> bool:
    """True when the design supports the exact multi-stratum ANOVA.

    The random factors in ``strata`` (integer codes per row), closed under
    infimum and supremum together with the mean and the rows, must

    1. be pairwise orthogonal (Tjur's proportional-count condition), so the
       strata are well defined (an orthogonal block structure, Bailey 2008,
       ch. 6), and
    2. each have equal replication (every class of every factor, including the
       added infima and suprema, has the same number of rows), so every
       stratum has a spherical covariance and its F tests are exact;

    and, when ``terms`` (fixed terms in model order, as for
    :func:`multistratum_anova`) are given,

    3. every term with any degree of freedom must lie wholly in one stratum
       (efficiency 1 there, to within 1e-8).

    Under these conditions the stratum F tests equal the REML/Satterthwaite
    tests whenever the REML variance estimates are interior. Malformed input
    raises :class:`replicheck.errors.InputError`.
    """
    n, given = _check_strata(strata, None)
    if n is None:
        if not terms:
            raise InputError("no random factors and no terms: nothing to check")
        first = np.asarray(terms[0][1])
        n = int(first.shape[0]) if first.ndim >= 1 else 0
    if n < 2:
        raise InputError("at least two rows are needed")
    if not all(_equally_replicated(codes) for _, codes in given):
        return False  # condition 2 fails already for a given factor
    checked = _check_terms(terms, n)
    cells = _equal_cells(given, checked, n)
    if cells is not None:  # the same answer from two rows per cell
        pick = cells.rows
        given = [(name, codes[pick]) for name, codes in given]
        checked = [(t, mat[pick]) for t, mat in checked]
        n = pick.size
    structure = _build_structure(n, [_factor(name, codes) for name, codes in given])
    if not (structure.orthogonal and structure.balanced):
        return False
    return _fit(structure, np.zeros(n), checked).wholly_in_one


def multistratum_anova(
    y: np.ndarray,
    strata: Mapping[str, np.ndarray],
    terms: Sequence[tuple[str, np.ndarray]],
    by_cells: bool = True,
) -> MultiStratumAnova:
    """Multi-stratum ANOVA, as R's ``aov(y ~ terms + Error(strata))``.

    ``strata`` maps each random factor's name to its codes per row (blocks,
    whole plots, subjects, plates...; nested or crossed, any order; a nested
    factor must be coded so that its levels are unique overall, e.g.
    ``Block:Variety``). ``terms`` lists the fixed terms in model order, each
    as ``(name, design columns without intercept)``; any coding (treatment,
    sum-to-zero, polynomial; interactions as products) gives the same table.
    An intercept is always fitted (in the mean stratum, not reported).

    See the module docstring for the method (Nelder 1965; Tjur 1984; Bailey
    2008, ch. 10). Raises :class:`DesignError` (an ``InputError``) when the
    random factors are not pairwise orthogonal, and ``InputError`` for
    malformed input. A term with no degree of freedom left after the earlier
    terms (constant, or aliased) appears in no stratum. When the rows fall into
    cells of one size (rows alike in every factor and term: a balanced design
    with repeated measurements per unit), the strata are computed from the cells
    and the within-cell sum of squares (``by_cells``; the same table up to
    rounding, in time that does not grow with the rows per cell). When a stratum's
    residual SS is zero (an exact fit) a term there gets ``F = inf`` and
    ``p = 0``.
    """
    arr = np.asarray(y)
    if arr.ndim != 1 or arr.dtype.kind not in "biuf":
        raise InputError("the response must be a 1-d numeric array")
    resp = arr.astype(float)
    n = resp.shape[0]
    if n < 2:
        raise InputError("at least two rows are needed")
    if not np.all(np.isfinite(resp)):
        raise InputError("the response has missing or infinite values")
    _, given = _check_strata(strata, n)
    checked = _check_terms(terms, n)
    cells = _equal_cells(given, checked, n) if by_cells else None
    if cells is not None:
        structure, fit = _cell_fit(cells, given, checked, resp)
    else:
        structure = _build_structure(n, [_factor(name, codes) for name, codes in given])
    if not structure.orthogonal:
        raise DesignError(
            "the random factors are not orthogonal (crossed with unequal cell counts), "
            "so no multi-stratum ANOVA exists; use the REML mixed model"
        )
    if cells is None:
        fit = _fit(structure, resp, checked)
    total = float(np.sum((resp - resp.mean()) ** 2))
    out_terms: list[StratumTerm] = []
    residuals: list[StratumResidual] = []
    for sf in fit.strata:
        name = structure.factors[sf.index].name
        residuals.append(StratumResidual(name, sf.residual_ss, sf.residual_df))
        for t, ss, df, eff in sf.rows:
            out_terms.append(_term_row(checked[t][0], name, ss, df, eff, sf, total))
    return MultiStratumAnova(
        terms=tuple(out_terms),
        residuals=tuple(residuals),
        orthogonal=fit.wholly_in_one,
        strata=tuple(structure.factors[sf.index].name for sf in fit.strata),
        balanced=structure.balanced,
    )


def _term_row(
    term: str, stratum: str, ss: float, df: int, eff: float, sf: _StratumFit, total: float
) -> StratumTerm:
    ms = ss / df
    if sf.residual_df == 0:
        return StratumTerm(term, stratum, ss, df, ms, None, None, None, None, eff)
    f_stat: float | None
    p_val: float | None
    if sf.residual_ss <= 1e-24 * total:  # exact fit: no residual variation left
        f_stat, p_val = (math.inf, 0.0) if ss > 1e-24 * total else (None, None)
    else:
        f_stat = ms / (sf.residual_ss / sf.residual_df)
        p_val = float(dist.f_sf(f_stat, df, sf.residual_df))
    return StratumTerm(
        term, stratum, ss, df, ms, f_stat, p_val, sf.residual_ss, sf.residual_df, eff
    )
