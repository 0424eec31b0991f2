"""Experimental units hidden in spatial coordinates.

A supplement often records where each plant, pot or cage stood (``x``/``y``,
``bench_row``/``bench_col``, ``lat``/``lon``) but not the unit the treatment
was really applied to: all treated plants at one end of the greenhouse, all
treated cages on one rack. This scan reads every pair of coordinate columns
and asks two questions.

1. **Is the treatment clumped in space?** Rows at the same position are first
   collapsed to one *location*; a location takes a treatment level only when
   all its rows share one. Each labelled location is joined to its ``k = 4``
   nearest labelled neighbours, ties included (every location no further away
   than the k-th nearest, so a grid cell keeps all four of its rook neighbours
   and an edge cell all its equally near ones). The *neighbour agreement* is
   the mean over locations of the share of its neighbours (weights
   ``1/#neighbours``) that carry its own treatment level. Under random
   allocation of the levels to the locations its expectation is exactly
   ``sum_c n_c (n_c - 1) / (n (n - 1))`` (the chance that two distinct
   locations share a level); the p-value is one-sided from a seeded
   permutation test (levels permuted among locations, 999 permutations). The
   statistic is the same-colour join count of Cliff & Ord (1981, ch. 1) on the
   row-standardised neighbour weights, summed over levels and divided by
   ``n / 2`` (``spdep::joincount.test`` reports the per-level counts).
2. **Do the residuals carry spatial autocorrelation?** Moran's I (Moran 1950,
   Biometrika 37:17-23) of the residuals (response minus the mean of its
   treatment cell, averaged per location) on the same weights (row-standardised
   k-nearest neighbours with ties), with its expectation and variance under
   randomisation (Cliff & Ord 1981, eqs. 1.38-1.39 as in ``spdep::moran.test``)
   and a one-sided seeded permutation p-value.

When the treatment is clumped, strictly (permutation p <= 0.001, i.e. the
observed agreement beats all 999 permutations; a strict level is common
practice for screening many columns) and by a margin (chance-corrected
agreement ``(observed - expected) / (1 - expected) >= 0.2``, a chosen floor),
the scan derives *zones*: connected groups of same-level locations, linked
along the neighbour graph where two neighbours are no further apart than three
times the median k-th neighbour distance (a chosen value: it only cuts the
long links of outlying positions, so a zone never jumps a wide aisle; on a
square grid that is three spacings). Because links follow the neighbour graph,
a zone never reaches across a strip of another level: rows AABBAABB give four
zones of two rows each. The zones are found with scikit-learn's
DBSCAN on the precomputed same-level neighbour distances with
``min_samples = 1``, which makes every location a core point and the clusters
exactly the single-linkage groups cut at that distance. Each zone is pure in
treatment and spatially compact, so zones are the treatment's likely units;
adjacent units under the same level merge into one zone (a coarser grouping).

Latitude/longitude pairs are mapped to a local plane before any distance is
taken: the equirectangular approximation ``x = R cos(phi0) (lambda -
lambda0)``, ``y = R (phi - phi0)`` with angles in radians, ``phi0``/``lambda0``
the mean latitude/longitude of the distinct locations and R = 6371.0088 km
(the IUGG mean Earth radius). It is accurate to well under 1 % over the few
kilometres of a field trial. Longitudes that straddle the 180th meridian are
shifted into one continuous range first; values that cannot be degrees
(``|lat| > 90``) are used as plain planar coordinates.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.sparse as sp

from replicheck.codebook import first_seen_codes_of
from replicheck.errors import InputError
from replicheck.numbers import format_number, p_phrase
from replicheck.partitions import dense_codes
from replicheck.structure.hidden.base import DerivedGrouping, HiddenScan, Signal

K_NEIGHBOURS = 4
N_PERMUTATIONS = 999
CLUMP_ALPHA = 0.001  # strict screening level (common practice)
CLUMP_MIN_KAPPA = 0.2  # chance-corrected neighbour agreement floor (a chosen value)
LINK_FACTOR = 3.0  # zone links no longer than this times the median k-th neighbour distance
MIN_LOCATIONS = 8
EARTH_RADIUS_KM = 6371.0088
_TIE_TOL = 1e-9  # relative tolerance for ties in distance
_CHUNK_ELEMENTS = 4_000_000  # permutation work per batch (array elements)

# Axis words of each coordinate family: (x-like words, y-like words).
_FAMILIES: tuple[tuple[str, frozenset[str], frozenset[str]], ...] = (
    (
        "xy",
        frozenset({"x", "xcoord", "xcoordinate", "xpos", "xposition", "xloc", "xlocation"}),
        frozenset({"y", "ycoord", "ycoordinate", "ypos", "yposition", "yloc", "ylocation"}),
    ),
    ("grid", frozenset({"col", "cols", "column", "columns"}), frozenset({"row", "rows"})),
    ("projected", frozenset({"easting", "eastings"}), frozenset({"northing", "northings"})),
    (
        "geographic",
        frozenset({"lon", "long", "lng", "longitude"}),
        frozenset({"lat", "latitude"}),
    ),
)


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class ClumpingTest:
    """Neighbour agreement of treatment levels against random allocation."""

    agreement: float  # mean share of a location's neighbours with its own level
    expected: float  # exact expectation under random allocation
    kappa: float  # (agreement - expected) / (1 - expected)
    p_value: float  # one-sided permutation p-value
    n_locations: int
    n_permutations: int


@dataclass(frozen=True)
class MoranTest:
    """Moran's I with its randomisation moments and a permutation p-value."""

    statistic: float
    expected: float  # -1 / (n - 1)
    variance: float  # under randomisation (Cliff & Ord 1981)
    z: float
    p_value: float  # one-sided (positive autocorrelation), permutation
    n_locations: int
    n_permutations: int


# --------------------------------------------------------------------------- columns


def _parts(name: str) -> list[str]:
    spaced = re.sub(r"([a-z])([A-Z])", r"\1 \2", str(name))
    raw = re.split(r"[^0-9A-Za-z]+|(?<=[A-Za-z])(?=\d)|(?<=\d)(?=[A-Za-z])", spaced)
    return [p.lower() for p in raw if p]


def _axis(name: str) -> tuple[str, int, tuple[str, ...]] | None:
    """(family, 0 for x-like / 1 for y-like, stem) of a coordinate-like name, else None."""
    parts = _parts(name)
    hits = [
        (family, axis, i)
        for i, part in enumerate(parts)
        for family, xs, ys in _FAMILIES
        for axis, words in ((0, xs), (1, ys))
        if part in words
    ]
    if len(hits) != 1:
        return None
    family, axis, i = hits[0]
    stem = tuple("#" if j == i else p for j, p in enumerate(parts))
    return family, axis, stem


def _is_numeric(series: pd.Series) -> bool:
    return bool(
        pd.api.types.is_numeric_dtype(series.dtype) and not pd.api.types.is_bool_dtype(series.dtype)
    )


def coordinate_columns(frame: pd.DataFrame, exclude: Sequence[str] = ()) -> list[tuple[str, str]]:
    """Pairs of numeric coordinate columns, found by name, as ``(x-like, y-like)``.

    Recognised pairs (case-insensitive, any prefix or suffix shared by both
    names, e.g. ``pos_x``/``pos_y``, ``bench_row``/``bench_col``,
    ``plotX``/``plotY``): x/y (also xcoord, xpos, xloc), column/row (col),
    easting/northing, longitude/latitude (lon, long, lng / lat). The x-like
    column comes first: ``(col, row)``, ``(lon, lat)``. When a name occurs
    twice under one stem the first column wins.
    """
    skip = {str(c) for c in exclude}
    skip |= {str(c) for c in frame.columns[frame.columns.duplicated()]}
    found: dict[tuple[str, tuple[str, ...]], list[str | None]] = {}
    for column in frame.columns:
        name = str(column)
        if name in skip or not _is_numeric(frame[column]):
            continue
        hit = _axis(name)
        if hit is None:
            continue
        family, axis, stem = hit
        slot = found.setdefault((family, stem), [None, None])
        if slot[axis] is None:
            slot[axis] = name
    order = [f for f, _, _ in _FAMILIES]
    keys = sorted(
        (k for k, v in found.items() if v[0] is not None and v[1] is not None),
        key=lambda k: order.index(k[0]),
    )
    pairs: list[tuple[str, str]] = []
    for key in keys:
        x, y = found[key]
        assert x is not None and y is not None
        pairs.append((x, y))
    return pairs


def _is_geographic(pair: tuple[str, str]) -> bool:
    hit = _axis(pair[0])
    return hit is not None and hit[0] == "geographic"


def planar_coordinates(frame: pd.DataFrame, pair: tuple[str, str]) -> np.ndarray:
    """Coordinates of every row on a plane, shape (n, 2); NaN where a coordinate is missing.

    Longitude/latitude pairs become kilometres east and north of the mean
    distinct location (equirectangular approximation with ``cos`` of the mean
    latitude, Earth radius 6371.0088 km); other pairs are returned as they are.
    """
    for column in pair:
        if column not in frame.columns:
            raise InputError(f"coordinate column '{column}' is not in the data")
        if not _is_numeric(frame[column]):
            raise InputError(f"coordinate column '{column}' is not numeric")
    x = frame[pair[0]].to_numpy(dtype=float, na_value=np.nan)
    y = frame[pair[1]].to_numpy(dtype=float, na_value=np.nan)
    points = np.column_stack([x, y])
    if not _is_geographic(pair):
        return points
    ok = np.isfinite(x) & np.isfinite(y)
    if not ok.any() or np.abs(y[ok]).max() > 90 or np.abs(x[ok]).max() > 360:
        return points
    lon = x.copy()
    if np.ptp(lon[ok]) > 180:  # straddles the 180th meridian: one continuous range
        lon = np.where(lon < 0, lon + 360.0, lon)
    distinct = np.unique(np.column_stack([lon[ok], y[ok]]), axis=0)
    lon0, lat0 = distinct.mean(axis=0)
    rad = np.pi / 180.0
    east = EARTH_RADIUS_KM * np.cos(lat0 * rad) * (lon - lon0) * rad
    north = EARTH_RADIUS_KM * (y - lat0) * rad
    return np.column_stack([east, north])


# --------------------------------------------------------------------------- weights


def neighbour_weights(points: np.ndarray, k: int = K_NEIGHBOURS) -> sp.csr_matrix:
    """Row-standardised k-nearest-neighbour weights of distinct points, ties included.

    Point i's neighbours are all other points no further away than its k-th
    nearest (relative tolerance 1e-9), each with weight ``1/#neighbours``.
    """
    pts = np.asarray(points, dtype=float)
    n = len(pts)
    if n < 2:
        return sp.csr_matrix((n, n))
    kk = min(k, n - 1)
    from scipy.spatial import cKDTree  # only when a file has coordinates

    tree = cKDTree(pts)
    m = min(n, kk + 1 + 8)
    dist, idx = tree.query(pts, k=m)
    dist = np.asarray(dist).reshape(n, m)
    idx = np.asarray(idx).reshape(n, m)
    self_hit = idx == np.arange(n)[:, None]
    other = np.where(self_hit, np.inf, dist)
    kth = np.sort(other, axis=1)[:, kk - 1]
    limit = kth * (1 + _TIE_TOL) + 1e-300
    keep = (dist <= limit[:, None]) & ~self_hit
    rows = [np.repeat(np.arange(n), keep.sum(axis=1))]
    cols = [idx[keep]]
    full = keep.sum(axis=1) + self_hit.sum(axis=1) >= m
    if m < n and full.any():  # more ties than were fetched: take every point within the limit
        redo = np.flatnonzero(full)
        drop = np.isin(rows[0], redo)
        rows, cols = [rows[0][~drop]], [cols[0][~drop]]
        for i, hits in zip(redo, tree.query_ball_point(pts[redo], limit[redo]), strict=True):
            hit = np.asarray([h for h in hits if h != i], dtype=int)
            rows.append(np.full(len(hit), i))
            cols.append(hit)
    r = np.concatenate(rows)
    c = np.concatenate(cols)
    counts = np.bincount(r, minlength=n)
    w = 1.0 / counts[r]
    return sp.csr_matrix((w, (r, c)), shape=(n, n))


# --------------------------------------------------------------------------- tests


def _chunks(total: int, width: int) -> list[int]:
    size = max(1, min(total, _CHUNK_ELEMENTS // max(width, 1)))
    out = [size] * (total // size)
    if total % size:
        out.append(total % size)
    return out


def chance_agreement(labels: np.ndarray) -> float:
    """Chance that two distinct locations share a level under random allocation."""
    counts = np.bincount(np.asarray(labels, dtype=np.int64)).astype(float)
    n = counts.sum()
    return float((counts * (counts - 1)).sum() / (n * (n - 1)))


def neighbour_agreement(labels: np.ndarray, weights: sp.csr_matrix) -> float:
    """Mean over locations of the weighted share of neighbours with the same level."""
    coo = weights.tocoo()
    lab = np.asarray(labels)
    return float((coo.data * (lab[coo.row] == lab[coo.col])).sum() / weights.shape[0])


def clumping_test(
    labels: np.ndarray,
    weights: sp.csr_matrix,
    rng: np.random.Generator,
    n_permutations: int = N_PERMUTATIONS,
) -> ClumpingTest:
    """Neighbour agreement of ``labels`` (codes 0..g-1, one per location) with a permutation p.

    Permutations shuffle the labels among the locations; every batch is one
    vectorised comparison over all neighbour pairs. Pairs are taken once
    (weight ``w_ij + w_ji``) and grouped by weight, so a batch only counts
    matches per weight group.
    """
    lab = np.asarray(labels).astype(np.min_scalar_type(max(int(np.max(labels)), 1)))
    n = len(lab)
    pairs = sp.triu(weights + weights.T, k=1).tocoo()
    values_w, group = np.unique(pairs.data, return_inverse=True)
    order = np.argsort(group, kind="stable")
    ei, ej, group = pairs.row[order], pairs.col[order], group.ravel()[order]
    starts = np.r_[0, np.flatnonzero(np.diff(group)) + 1]
    group_w = values_w[group[starts]] if len(group) else np.zeros(0)
    observed = neighbour_agreement(lab, weights)
    expected = chance_agreement(lab)
    exceed = 0
    tol = 1e-12 * max(1.0, abs(observed))
    for size in _chunks(n_permutations, max(n, len(ei))):
        perm = np.ascontiguousarray(rng.permuted(np.broadcast_to(lab, (size, n)), axis=1).T)
        if len(ei) == 0:
            break
        same = (perm[ei] == perm[ej]).view(np.uint8)
        counts = np.add.reduceat(same, starts, axis=0, dtype=np.int64)
        values = group_w @ counts / n
        exceed += int((values >= observed - tol).sum())
    kappa = (observed - expected) / (1.0 - expected) if expected < 1 else 0.0
    return ClumpingTest(
        agreement=observed,
        expected=expected,
        kappa=float(kappa),
        p_value=(exceed + 1) / (n_permutations + 1),
        n_locations=n,
        n_permutations=n_permutations,
    )


def moran_test(
    values: np.ndarray,
    weights: sp.csr_matrix,
    rng: np.random.Generator,
    n_permutations: int = N_PERMUTATIONS,
) -> MoranTest:
    """Moran's I with its moments under randomisation and a one-sided permutation p-value.

    Moments follow Cliff & Ord (1981, Spatial Processes, eqs. 1.38-1.39):
    E(I) = -1/(n-1) and, with S1 = sum (w_ij + w_ji)^2 / 2,
    S2 = sum_i (w_i. + w_.i)^2 and the kurtosis b2 = n sum z^4 / (sum z^2)^2,
    Var(I) = [n((n^2-3n+3)S1 - nS2 + 3S0^2) - b2((n^2-n)S1 - 2nS2 + 6S0^2)]
    / ((n-1)(n-2)(n-3)S0^2) - E(I)^2.
    """
    z = np.asarray(values, dtype=float)
    z = z - z.mean()
    n = len(z)
    wm = sp.csr_matrix(weights)
    s0 = float(wm.sum())
    sym = wm + wm.T
    s1 = 0.5 * float(sym.multiply(sym).sum())
    s2 = float(
        ((np.asarray(wm.sum(axis=1)).ravel() + np.asarray(wm.sum(axis=0)).ravel()) ** 2).sum()
    )
    zz = float(z @ z)
    observed = float(n / s0 * (z @ (wm @ z)) / zz)
    expected = -1.0 / (n - 1)
    b2 = n * float((z**4).sum()) / zz**2
    num = n * ((n * n - 3 * n + 3) * s1 - n * s2 + 3 * s0 * s0) - b2 * (
        (n * n - n) * s1 - 2 * n * s2 + 6 * s0 * s0
    )
    variance = num / ((n - 1) * (n - 2) * (n - 3) * s0 * s0) - expected**2
    z_score = (observed - expected) / np.sqrt(variance) if variance > 0 else float("nan")
    exceed = 0
    tol = 1e-12 * max(1.0, abs(observed))
    for size in _chunks(n_permutations, max(n, wm.nnz)):
        perm = np.ascontiguousarray(rng.permuted(np.broadcast_to(z, (size, n)), axis=1).T)
        values_p = n / s0 * (perm * (wm @ perm)).sum(axis=0) / zz
        exceed += int((values_p >= observed - tol).sum())
    return MoranTest(
        statistic=observed,
        expected=expected,
        variance=float(variance),
        z=float(z_score),
        p_value=(exceed + 1) / (n_permutations + 1),
        n_locations=n,
        n_permutations=n_permutations,
    )


# --------------------------------------------------------------------------- zones


def _zones(
    points: np.ndarray, labels: np.ndarray, weights: sp.csr_matrix
) -> tuple[np.ndarray, float]:
    """Zone code per location (connected same-level neighbours) and the link distance used."""
    coo = weights.tocoo()
    d = np.hypot(*(points[coo.row] - points[coo.col]).T)
    kth = np.zeros(len(points))
    np.maximum.at(kth, coo.row, d)
    eps = LINK_FACTOR * float(np.median(kth))
    same = (labels[coo.row] == labels[coo.col]) & (d <= eps * (1 + _TIE_TOL))
    r, c, dd = coo.row[same], coo.col[same], d[same]
    n = len(points)
    one_way = sp.csr_matrix((dd, (r, c)), shape=(n, n))
    graph = one_way.maximum(one_way.T)  # symmetric; a mutual pair keeps its distance
    from sklearn.cluster import DBSCAN  # loaded only when coordinates are scanned

    codes = DBSCAN(eps=eps * (1 + _TIE_TOL), min_samples=1, metric="precomputed").fit_predict(graph)
    return np.asarray(codes, dtype=np.int64), eps


def _sizes_phrase(sizes: list[int]) -> str:
    sizes = sorted(sizes)
    if len(sizes) == 1:
        return f"1 spatial group of {sizes[0]} positions"
    if len(sizes) <= 4:
        listed = ", ".join(str(s) for s in sizes[:-1]) + f" and {sizes[-1]}"
        return f"{len(sizes)} spatial groups of {listed} positions"
    return f"{len(sizes)} spatial groups of {sizes[0]} to {sizes[-1]} positions"


def _how(
    zone_of_loc: np.ndarray,
    labels: np.ndarray,
    level_names: list[str],
    eps: float,
    test: ClumpingTest,
    unit: str,
) -> str:
    per_level: list[str] = []
    for code, level in enumerate(level_names):
        zones = zone_of_loc[labels == code]
        if len(zones) == 0:
            continue
        sizes = np.unique(zones, return_counts=True)[1].tolist()
        per_level.append(f"'{level}' in {_sizes_phrase(sizes)}")
    if len(per_level) > 4:
        n_zones = len(np.unique(zone_of_loc))
        body = f"the {len(per_level)} treatment levels sit in {n_zones} spatial groups"
    else:
        body = "each treatment level sits in its own spatial groups: " + "; ".join(per_level)
    return (
        f"{body[0].upper()}{body[1:]} (neighbour agreement {format_number(test.agreement)} against "
        f"{format_number(test.expected)} by chance, permutation {p_phrase(test.p_value)}); each "
        f"group joins "
        f"same-level positions among the {K_NEIGHBOURS} nearest neighbours no more than "
        f"{format_number(eps)}{unit} apart."
    )


# --------------------------------------------------------------------------- scan


def _treatment_codes(
    frame: pd.DataFrame, treatments: Sequence[str]
) -> tuple[np.ndarray, list[str]]:
    """One code per row for the treatment cell (-1 where a level is missing) and level names."""
    n = len(frame)
    if not treatments:
        return np.zeros(n, dtype=np.int64), ["all"]
    codes = []
    uniques = []
    for column in treatments:
        c, u = first_seen_codes_of(frame[column])
        codes.append(c)
        uniques.append(u)
    stacked = np.column_stack(codes)
    ok = (stacked >= 0).all(axis=1)
    out = np.full(n, -1, dtype=np.int64)
    if not ok.any():
        return out, []
    kept = stacked[ok]
    combined = np.zeros(kept.shape[0], dtype=np.int64)
    for j in range(kept.shape[1]):  # lexicographic: the first treatment most significant
        combined = combined * len(uniques[j]) + kept[:, j]
    inverse = dense_codes(combined)
    out[ok] = inverse
    cells = np.empty((int(inverse.max()) + 1, kept.shape[1]), dtype=np.int64)
    cells[inverse] = kept
    names = ["/".join(str(uniques[j][cell[j]]) for j in range(len(treatments))) for cell in cells]
    return out, names


def _validate(frame: pd.DataFrame, response: str, treatments: Sequence[str]) -> np.ndarray:
    if not isinstance(frame, pd.DataFrame):
        raise InputError("the spatial scan needs a data frame")
    if response not in frame.columns:
        raise InputError(f"response column '{response}' is not in the data")
    for column in treatments:
        if column not in frame.columns:
            raise InputError(f"treatment column '{column}' is not in the data")
    repeated = [str(c) for c in (response, *treatments) if (frame.columns == c).sum() > 1]
    if repeated:
        raise InputError(f"column name '{repeated[0]}' occurs more than once in the data")
    y = frame[response]
    if not _is_numeric(y):
        raise InputError(f"response column '{response}' is not numeric")
    return y.to_numpy(dtype=float, na_value=np.nan)


def scan_space(
    frame: pd.DataFrame,
    response: str,
    treatments: Sequence[str],
    *,
    seed: int = 20261201,
    exclude: Sequence[str] = (),
) -> HiddenScan:
    """Treatment clumping, residual autocorrelation and spatial zones for every coordinate pair.

    Returns a ``treatment-clumped-in-space`` and a ``residual-spatial-autocorrelation``
    signal per pair (when there are at least 8 locations to test), and a derived
    grouping ``zone[x,y]`` (kind ``location``, code -1 for rows without a position
    or without a unique treatment level at their position) when the treatment is
    clumped (permutation p <= 0.001 and chance-corrected agreement >= 0.2).
    The treatment is the cell of all ``treatments`` columns; rows missing a level,
    a coordinate or the response are left out of the tests they cannot enter.
    Coordinate pairs are looked for among the columns other than the response,
    the treatments and ``exclude``.
    """
    y = _validate(frame, response, treatments)
    treatments = list(treatments)
    pairs = coordinate_columns(frame, exclude=(*exclude, response, *treatments))
    rng = np.random.default_rng(seed)
    label, level_names = _treatment_codes(frame, treatments)
    derived: list[DerivedGrouping] = []
    signals: list[Signal] = []
    for pair in pairs:
        d, s = _scan_pair(frame, pair, y, label, level_names, bool(treatments), rng)
        derived.extend(d)
        signals.extend(s)
    return HiddenScan(derived=tuple(derived), signals=tuple(signals))


def _scan_pair(
    frame: pd.DataFrame,
    pair: tuple[str, str],
    y: np.ndarray,
    label: np.ndarray,
    level_names: list[str],
    has_treatment: bool,
    rng: np.random.Generator,
) -> tuple[list[DerivedGrouping], list[Signal]]:
    n_rows = len(frame)
    points = planar_coordinates(frame, pair)
    placed = np.isfinite(points).all(axis=1)
    loc = np.full(n_rows, -1, dtype=np.int64)
    raw = frame[list(pair)].to_numpy(dtype=float, na_value=np.nan)
    if placed.sum() == 0:
        return [], []
    distinct, inverse = np.unique(raw[placed], axis=0, return_inverse=True)
    loc[placed] = inverse.ravel()
    n_loc = len(distinct)
    first = np.zeros(n_loc, dtype=np.int64)
    first[loc[placed][::-1]] = np.flatnonzero(placed)[::-1]
    loc_points = points[first]
    derived: list[DerivedGrouping] = []
    signals: list[Signal] = []
    cols = tuple(pair)
    unit = " km" if _is_geographic(pair) and not np.array_equal(points, raw, equal_nan=True) else ""
    where = f"{pair[0]}/{pair[1]}"

    # 1. treatment clumping among locations with one treatment level
    lab_rows = placed & (label >= 0)
    lo = np.full(n_loc, np.iinfo(np.int64).max)
    hi = np.full(n_loc, -1)
    np.minimum.at(lo, loc[lab_rows], label[lab_rows])
    np.maximum.at(hi, loc[lab_rows], label[lab_rows])
    loc_label = np.where((hi >= 0) & (lo == hi), hi, -1)
    labelled = np.flatnonzero(loc_label >= 0)
    if has_treatment and len(labelled) >= MIN_LOCATIONS:
        present, sub_labels = np.unique(loc_label[labelled], return_inverse=True)
        if len(present) >= 2:
            sub_points = loc_points[labelled]
            weights = neighbour_weights(sub_points)
            test = clumping_test(sub_labels, weights, rng)
            signals.append(
                Signal(
                    check="treatment-clumped-in-space",
                    columns=cols,
                    statistic=test.agreement,
                    p_value=test.p_value,
                    message=(
                        f"Along {where}, neighbouring positions share the treatment level in "
                        f"{100 * test.agreement:.0f}% of cases against {100 * test.expected:.0f}% "
                        f"expected by chance ({test.n_locations} positions, {K_NEIGHBOURS} nearest "
                        f"neighbours, permutation {p_phrase(test.p_value)}, "
                        f"{test.n_permutations} permutations)."
                    ),
                )
            )
            if test.p_value <= CLUMP_ALPHA and test.kappa >= CLUMP_MIN_KAPPA:
                zone_sub, eps = _zones(sub_points, sub_labels, weights)
                n_zones = len(np.unique(zone_sub))
                if 2 <= n_zones <= len(labelled) / 2:
                    zone_loc = np.full(n_loc, -1, dtype=np.int64)
                    zone_loc[labelled] = zone_sub
                    codes = np.where(loc >= 0, zone_loc[np.maximum(loc, 0)], -1)
                    names = [level_names[c] for c in present]
                    derived.append(
                        DerivedGrouping(
                            name=f"zone[{pair[0]},{pair[1]}]",
                            codes=codes,
                            sources=cols,
                            kind="location",
                            how=_how(zone_sub, sub_labels, names, eps, test, unit),
                            strength={
                                "agreement": test.agreement,
                                "expected": test.expected,
                                "kappa": test.kappa,
                                "p_value": test.p_value,
                                "zones": float(n_zones),
                                "link_distance": eps,
                            },
                        )
                    )

    # 2. Moran's I of the residuals, averaged per location
    use = placed & np.isfinite(y) & (label >= 0)
    if use.any():
        cell_sum = np.bincount(label[use], weights=y[use])
        cell_n = np.bincount(label[use])
        resid = y[use] - (cell_sum / np.maximum(cell_n, 1))[label[use]]
        loc_sum = np.bincount(loc[use], weights=resid, minlength=n_loc)
        loc_n = np.bincount(loc[use], minlength=n_loc)
        has = np.flatnonzero(loc_n > 0)
        values = loc_sum[has] / loc_n[has]
        spread = np.ptp(values) if len(values) else 0.0
        if len(has) >= MIN_LOCATIONS and spread > 1e-12 * max(1.0, float(np.abs(values).max())):
            mt = moran_test(values, neighbour_weights(loc_points[has]), rng)
            signals.append(
                Signal(
                    check="residual-spatial-autocorrelation",
                    columns=cols,
                    statistic=mt.statistic,
                    p_value=mt.p_value,
                    message=(
                        f"Along {where}, Moran's I of the residuals is "
                        f"{mt.statistic:.3f} (expected {mt.expected:.3f}, z = "
                        f"{format_number(mt.z)}; "
                        f"{mt.n_locations} positions, {K_NEIGHBOURS} nearest neighbours, "
                        f"permutation {p_phrase(mt.p_value)})."
                    ),
                )
            )
    return derived, signals
