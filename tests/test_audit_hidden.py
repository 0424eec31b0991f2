"""Whole audits where no column names the experimental unit.

Every dataset here is a hand-built example (seeded numpy draws, invented
settings) whose true unit is known by construction: the point is whether the
audit finds that unit from a time stamp, coordinates, a processing order, a
sample code or a covariate, and stays quiet on a clean design. The corrected
tests on the units found are checked against scipy on the true units' means.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from replicheck import audit


def _rules(doc: dict[str, Any]) -> set[str]:
    return {f["rule"] for f in doc["findings"]}


def _unit_means_p(y: np.ndarray, unit: np.ndarray, level: np.ndarray) -> float:
    """Student t on the true units' means (scipy)."""
    frame = (
        pd.DataFrame({"y": y, "u": unit, "g": level})
        .groupby("u")
        .agg(y=("y", "mean"), g=("g", "first"))
    )
    a, b = (frame.loc[frame.g == k, "y"] for k in sorted(frame.g.unique()))
    return float(stats.ttest_ind(a, b).pvalue)


def _days(seed: int = 4) -> tuple[pd.DataFrame, np.ndarray]:
    # hand-built example: an assay run on 8 days, 4 days per reagent lot, 6 samples a
    # day measured between 9:00 and 11:30; each day has its own calibration offset.
    rng = np.random.default_rng(seed)
    day = np.repeat(np.arange(8), 6)
    lot = np.where(np.isin(day, [0, 2, 5, 7]), "old", "new")
    stamp = pd.Timestamp("2026-03-02 09:00") + pd.to_timedelta(day, "D")
    stamp += pd.to_timedelta(np.tile(np.arange(6) * 30, 8), "min")
    y = 20 + rng.normal(0, 2.0, 8)[day] + rng.normal(0, 0.5, 48)
    frame = pd.DataFrame({"measured_at": stamp.strftime("%Y-%m-%d %H:%M"), "lot": lot, "signal": y})
    return frame, day


def test_days_hidden_in_a_time_stamp_are_the_units() -> None:
    frame, day = _days()
    doc = audit(frame, response="signal", treatment="lot").to_dict()
    unit = doc["experimental_units"][0]
    assert unit["unit"] == "day[measured_at]" and unit["n_units"] == 8
    assert doc["verdict"]["status"] == "pseudoreplicated"
    assert "grouping-derived" in _rules(doc)
    corrected = doc["terms"][0]
    expected = _unit_means_p(frame["signal"].to_numpy(), day, frame["lot"].to_numpy())
    assert corrected["p_value"] == pytest.approx(expected, rel=1e-9)


def test_a_treatment_measured_on_its_own_days_is_reported() -> None:
    frame, _ = _days()
    frame["lot"] = np.where(frame["measured_at"] < "2026-03-06", "old", "new")
    doc = audit(frame, response="signal", treatment="lot").to_dict()
    assert "treatment-by-time" in _rules(doc)


def test_zones_in_a_greenhouse_half_split_confound_the_treatment() -> None:
    # hand-built example: a 6 x 8 bench grid, the left half heated, a gradient along x.
    rng = np.random.default_rng(11)
    x, y_pos = np.meshgrid(np.arange(8), np.arange(6))
    x, y_pos = x.ravel(), y_pos.ravel()
    heated = np.where(x < 4, "yes", "no")
    growth = 5 + 0.6 * x + rng.normal(0, 0.5, x.size)
    frame = pd.DataFrame({"pos_x": x, "pos_y": y_pos, "heated": heated, "growth": growth})
    doc = audit(frame, response="growth", treatment="heated").to_dict()
    assert doc["experimental_units"][0]["unit"] == "zone[pos_x,pos_y]"
    assert doc["verdict"]["status"] == "confounded"
    assert "treatment-clumped-in-space" in _rules(doc)


def test_processing_runs_along_an_injection_order() -> None:
    # hand-built example: 36 extracts injected in 6 runs of 6, diets alternating by run,
    # the instrument drifting and re-tuned between runs; the file is in another order.
    rng = np.random.default_rng(5)
    order = np.arange(1, 37)
    run = (order - 1) // 6
    diet = np.where(run % 2 == 0, "control", "enriched")
    y = 10 + rng.normal(0, 1.5, 6)[run] + rng.normal(0, 0.3, 36)
    shuffle = rng.permutation(36)
    frame = pd.DataFrame(
        {"injection_order": order[shuffle], "diet": diet[shuffle], "area": y[shuffle]}
    )
    doc = audit(frame, response="area", treatment="diet").to_dict()
    assert doc["experimental_units"][0]["unit"] == "run[injection_order]"
    assert doc["experimental_units"][0]["n_units"] == 6
    assert "treatment-in-runs" in _rules(doc)
    expected = _unit_means_p(y[shuffle], run[shuffle], diet[shuffle])
    assert doc["terms"][0]["p_value"] == pytest.approx(expected, rel=1e-9)


def test_a_measurement_with_a_tied_reading_does_not_hide_file_order_runs() -> None:
    # hand-built example: 36 extracts listed in processing order, 6 runs of 6 with
    # the diets alternating by run and a drift between runs; a body-mass column with
    # one tied reading (two control rows) is nested in the diet by chance. It is a
    # measurement, not a record of units, so the runs are still the units; a
    # subject number repeated twice in the same way is a record of units.
    rng = np.random.default_rng(5)
    run = np.arange(36) // 6
    diet = np.where(run % 2 == 0, "control", "enriched")
    y = 10 + rng.normal(0, 1.5, 6)[run] + rng.normal(0, 0.3, 36)
    mass = np.round(rng.normal(30, 3, 36), 3)
    mass[1] = mass[0]
    frame = pd.DataFrame({"diet": diet, "area": y, "body_mass_g": mass})
    doc = audit(frame, response="area", treatment="diet").to_dict()
    assert doc["experimental_units"][0]["unit"] == "run[file order]"
    assert doc["experimental_units"][0]["n_units"] == 6
    assert doc["terms"][0]["p_value"] == pytest.approx(_unit_means_p(y, run, diet), rel=1e-9)
    # a subject number shared by two rows only twice: nearly every value distinct, no
    # record of units (the same rule as the structure stage), so the runs stay
    subject = np.arange(36)
    subject[1] = subject[0]
    subject[20] = subject[19]
    ids = pd.DataFrame({"diet": diet, "area": y, "subject": subject})
    unit = audit(ids, response="area", treatment="diet").to_dict()["experimental_units"][0]
    assert unit["unit"] == "run[file order]"
    # every subject measured twice: a record of units, which stops the runs
    twice = pd.DataFrame({"diet": diet, "area": y, "subject": np.arange(36) // 2})
    unit = audit(twice, response="area", treatment="diet").to_dict()["experimental_units"][0]
    assert unit["unit"] == "subject"


def test_tanks_inside_composite_sample_codes() -> None:
    # hand-built example: 3 feeds x 4 tanks x 5 fish; the tank shows only in codes
    # such as "F2-TANK3-07" (tank numbers restart within each feed).
    rng = np.random.default_rng(8)
    feed = np.repeat([1, 2, 3], 20)
    tank = np.tile(np.repeat([1, 2, 3, 4], 5), 3)
    fish = np.tile(np.arange(1, 6), 12)
    true_tank = (feed - 1) * 4 + tank - 1
    y = 50 + rng.normal(0, 3, 12)[true_tank] + rng.normal(0, 1, 60)
    code = [f"F{f}-TANK{t}-{i:02d}" for f, t, i in zip(feed, tank, fish, strict=True)]
    frame = pd.DataFrame({"sample": code, "feed": [f"diet{f}" for f in feed], "mass": y})
    doc = audit(frame, response="mass", treatment="feed").to_dict()
    unit = doc["experimental_units"][0]
    assert unit["n_units"] == 12
    assert unit["unit"].startswith("tank[sample:")
    assert doc["verdict"]["status"] == "pseudoreplicated"


def test_a_covariate_recorded_once_per_unrecorded_tank() -> None:
    # hand-built example: water temperature read once per tank (12 tanks, 2 feeds); two
    # readings occur in both feeds, so the column alone is not nested in feed and only
    # feed x reading marks a tank (tanks of one feed at one reading would merge: the
    # scan sees classes of equal values).
    rng = np.random.default_rng(21)
    tank = np.repeat(np.arange(12), 6)
    feed = np.where(tank < 6, "A", "B")
    readings = [14.2, 14.8, 15.1, 15.9, 16.4, 17.0, 14.5, 15.1, 15.6, 16.2, 16.4, 17.3]
    temp = np.array(readings)[tank]
    y = 30 + rng.normal(0, 2.5, 12)[tank] + rng.normal(0, 0.8, tank.size)
    frame = pd.DataFrame({"feed": feed, "water_temp": temp, "length": y})
    doc = audit(frame, response="length", treatment="feed").to_dict()
    unit = doc["experimental_units"][0]
    assert unit["unit"] == "container[water_temp]" and unit["n_units"] == 12
    expected = _unit_means_p(y, tank, feed)
    assert doc["terms"][0]["p_value"] == pytest.approx(expected, rel=1e-9)


def _clean(seed: int) -> pd.DataFrame:
    # hand-built example: 48 plants on a 6 x 8 grid, treatment randomised to positions,
    # measured over 4 days with both treatments every day, in random order, unique IDs.
    rng = np.random.default_rng(seed)
    x, y_pos = np.meshgrid(np.arange(8), np.arange(6))
    trt = rng.permutation(np.repeat(["control", "treated"], 24))
    day = rng.permutation(np.repeat(np.arange(4), 12))
    stamp = pd.Timestamp("2026-05-04 08:00") + pd.to_timedelta(day, "D")
    stamp += pd.to_timedelta(rng.integers(0, 240, 48), "min")
    return pd.DataFrame(
        {
            "plant_id": [f"P{i:03d}" for i in rng.permutation(48)],
            "x": x.ravel(),
            "y": y_pos.ravel(),
            "measured": stamp.strftime("%Y-%m-%d %H:%M"),
            "seq": rng.permutation(48) + 1,
            "treatment": trt,
            "height": rng.normal(30, 3, 48),
        }
    )


@pytest.mark.parametrize("seed", range(6))
def test_clean_randomised_design_stays_ok(seed: int) -> None:
    doc = audit(_clean(seed), response="height", treatment="treatment").to_dict()
    assert doc["verdict"]["status"] == "ok"
    assert not any(g["unit_of"] for g in doc["hidden"]["derived"])
    warnings = [f for f in doc["findings"] if f["severity"] in ("warning", "error")]
    assert warnings == []


def test_no_hidden_turns_the_search_off(tmp_path: Path) -> None:
    # End to end in a subprocess: the covariate case with --no-hidden has no unit.
    rng = np.random.default_rng(21)
    tank = np.repeat(np.arange(12), 6)
    frame = pd.DataFrame(
        {
            "feed": np.where(tank < 6, "A", "B"),
            "water_temp": np.array(
                [14.2, 14.8, 15.1, 15.9, 16.4, 17.0, 14.5, 15.1, 15.6, 16.2, 16.4, 17.3]
            )[tank],
            "length": rng.normal(0, 2.5, 12)[tank] + rng.normal(0, 0.8, tank.size),
        }
    )
    path = tmp_path / "tanks.csv"
    frame.to_csv(path, index=False)
    env = {**os.environ, "PYTHONIOENCODING": "utf-8"}
    base = [sys.executable, "-m", "replicheck", "check", str(path), "-r", "length", "-t", "feed"]
    on = subprocess.run([*base, "-f", "json"], capture_output=True, text=True, env=env)
    off = subprocess.run(
        [*base, "-f", "json", "--no-hidden"], capture_output=True, text=True, env=env
    )
    assert json.loads(on.stdout)["experimental_units"][0]["unit"] == "container[water_temp]"
    doc = json.loads(off.stdout)
    assert doc["hidden"]["derived"] == []
    assert doc["experimental_units"][0]["unit"] != "container[water_temp]"
