"""The ``replicheck screen`` command: a thin layer over :func:`replicheck.screen.screen`."""

from __future__ import annotations

import sys
from collections.abc import Sequence
from typing import Any

import click

from replicheck.defaults import DEFAULT_SEED
from replicheck.screen.batch import DEFAULT_OUT, DEFAULT_TIME_LIMIT
from replicheck.screen.summary import SEVERITY, Row


@click.command("screen")
@click.argument("paths", nargs=-1, required=True, metavar="PATH...")
@click.option(
    "--out",
    "out_dir",
    metavar="DIR",
    default=DEFAULT_OUT,
    show_default=True,
    help="Output folder: reports/, summary.csv, index.html and the resumption state.",
)
@click.option("--summary", metavar="FILE.csv", help="Summary CSV (default DIR/summary.csv).")
@click.option(
    "--specs",
    metavar="INDEX",
    help="Spec index (.csv or .toml) naming the claimed analysis of many files; "
    "file names relative to the screened folder, globs allowed.",
)
@click.option(
    "--guess",
    is_flag=True,
    help="Audit files without a spec with the best guessed response and treatment "
    "(labelled 'guessed'); default: mark them needs-spec.",
)
@click.option(
    "--jobs",
    type=click.IntRange(min=1),
    metavar="N",
    help="Worker processes (default: number of CPUs, at most the number of files).",
)
@click.option(
    "--time-limit",
    type=click.FloatRange(min=0),
    default=DEFAULT_TIME_LIMIT,
    show_default=True,
    metavar="SECONDS",
    help="Stop a file after this long and mark it timeout (0: no limit).",
)
@click.option(
    "--max-size",
    default="1G",
    show_default=True,
    metavar="SIZE",
    help="Mark larger files too-large without reading them (e.g. 500M, 2GiB).",
)
@click.option(
    "--cluster",
    metavar="ADDRESS",
    help="Run the per-file work on a Dask scheduler, e.g. tcp://127.0.0.1:8786; the "
    "files must be visible to the workers under the same paths.",
)
@click.option(
    "--seed",
    type=int,
    default=None,
    metavar="N",
    help=f"Seed of the random steps for every file (default: each spec's, else {DEFAULT_SEED}).",
)
@click.option(
    "--alpha",
    type=float,
    default=None,
    metavar="A",
    help="Significance level for every file (default: each spec's, else 0.05).",
)
@click.option("--fresh", is_flag=True, help="Redo every file, ignoring results of earlier runs.")
@click.option(
    "--follow-links",
    is_flag=True,
    help="Also screen files that symbolic links in a screened folder lead to outside it "
    "(left out by default).",
)
def screen_command(
    paths: Sequence[str],
    out_dir: str,
    summary: str | None,
    specs: str | None,
    guess: bool,
    jobs: int | None,
    time_limit: float,
    max_size: str,
    cluster: str | None,
    seed: int | None,
    alpha: float | None,
    fresh: bool,
    follow_links: bool,
) -> None:
    """Screen every data file in PATH... (folders searched recursively).

    Each file is audited against NAME.replicheck.toml beside it or its entry in
    --specs; files without a spec are marked needs-spec with proposed columns
    (or, with --guess, audited with the guess). Writes DIR/reports/,
    DIR/summary.csv (worst first) and DIR/index.html. Unchanged files are not
    redone on a later run.

    Exit code: 0 when every file is ok; 1 when any file has a problem or could
    not be screened; 2 for usage errors.

    \b
    Example:
      replicheck screen supplements/ --out screening --jobs 4
    """
    from replicheck.screen.batch import screen

    bars: list[Any] = []

    def progress(row: Row, total: int) -> None:
        if not bars:  # the number of files is known once they are found
            bar = click.progressbar(length=total, label="screening", file=sys.stderr, show_pos=True)
            bars.append(bar.__enter__())
        bars[0].update(1)

    try:
        result = screen(
            paths,
            out=out_dir,
            summary=summary,
            specs=specs,
            guess=guess,
            jobs=jobs,
            time_limit=time_limit,
            max_size=max_size,
            cluster=cluster,
            seed=seed,
            alpha=alpha,
            fresh=fresh,
            follow_links=follow_links,
            progress=progress,
        )
    finally:
        if bars:
            bars[0].__exit__(None, None, None)
    for warning in result.warnings:
        click.echo(f"replicheck: warning: {warning}", err=True)
    counts = result.counts()
    tally = ", ".join(f"{counts[s]} {s}" for s in SEVERITY if s in counts)
    reused = sum(1 for r in result.rows if r.reused)
    note = f" ({reused} unchanged, reused)" if reused else ""
    click.echo(f"{len(result.rows)} files screened{note}: {tally}")
    click.echo(f"summary: {result.summary}")
    click.echo(f"index:   {result.index}")
    sys.exit(result.exit_code)
