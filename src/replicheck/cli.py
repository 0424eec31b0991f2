"""Command line: parse options, call the audit, render, set the exit code.

Exit codes: 0 no problem found, 1 problem found, 2 usage or input error,
3 internal error (a bug: please report it).
"""

from __future__ import annotations

import os
import shlex
import sys
import textwrap
import traceback
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import click

from replicheck import __version__
from replicheck.errors import InputError
from replicheck.options import OPTION_FIELDS
from replicheck.screen.command import screen_command

FORMATS = ("text", "json", "markdown", "html")


def _render(report: object, fmt: str) -> str:
    from replicheck.report.model import Report

    assert isinstance(report, Report)
    if fmt == "json":
        return report.to_json(syntax="cli") + "\n"
    if fmt == "markdown":
        return report.to_markdown(syntax="cli")
    if fmt == "html":
        return report.to_html(syntax="cli")
    return report.to_text(syntax="cli")


def _emit(text: str, output: str | None) -> None:
    if output is None:
        click.echo(text, nl=False)
        return
    try:
        Path(output).write_text(text, encoding="utf-8")
    except OSError as err:
        raise InputError(f"cannot write report to {output}: {err.strerror or err}") from None
    click.echo(f"report written to {output}", err=True)


def _check_output(output: str | None, *inputs: str) -> None:
    if output is None:
        return
    out = os.path.realpath(output)
    for path in inputs:
        if path and os.path.realpath(path) == out:
            raise InputError(f"--output {output} would overwrite the input file")


class _ReadBar:
    """A progress bar on standard error while a large file is read (terminals only)."""

    MIN_BYTES = 50_000_000  # smaller files read in about a second: no bar

    def __init__(self) -> None:
        self._bar: Any = None
        self._done = 0

    def update(self, done: int, total: int) -> None:
        if self._bar is None:
            if total < 2 * self.MIN_BYTES or not sys.stderr.isatty():
                return
            self._bar = click.progressbar(length=total, label="reading", file=sys.stderr)
            self._bar.__enter__()
        self._bar.update(done - self._done)
        self._done = done

    def close(self) -> None:
        if self._bar is not None:
            self._bar.__exit__(None, None, None)
            self._bar = None


_STAGE_WORDS = {
    "claim": "reading the claim",
    "read": "reading the data",
    "hidden": "looking for groupings that no column names",
    "structure": "finding the experimental units",
    "refit": "refitting with the unit as the replicate",
    "clustering": "measuring clustering",
    "reconcile": "comparing with the reported result",
    "verdict": "weighing the evidence",
    "report data": "preparing the report",
}


#: The stage of the audit running now, named in an internal error's line.
_CURRENT_STAGE: list[str | None] = [None]


class _StageLine:
    """One line on standard error saying which stage of the audit is running (terminals
    only); the line is cleared when the audit ends, so nothing is left in the output."""

    def __init__(self, read_bar: _ReadBar) -> None:
        self._shown = False
        self._read_bar = read_bar
        self._on = sys.stderr.isatty()

    def begin(self, stage: str) -> None:
        _CURRENT_STAGE[0] = stage
        if not self._on:
            return
        if stage != "read":
            self._read_bar.close()  # the reading bar, if any, ends where reading ends
        sys.stderr.write("\r\033[K" + f"replicheck: {_STAGE_WORDS.get(stage, stage)} ...")
        sys.stderr.flush()
        self._shown = True

    def close(self) -> None:
        if self._shown:
            sys.stderr.write("\r\033[K")
            sys.stderr.flush()
            self._shown = False


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(__version__, prog_name="replicheck")
def cli() -> None:
    """Screen a finished experimental dataset for pseudo-replication and confounding.

    Give it a data file and the claimed analysis; it finds the experimental
    unit, measures how alike observations within a unit are, refits the
    analysis with the unit as the replicate and gives a corrected verdict.
    It is a screening aid: how the experiment was run decides the unit.
    """


_SETTING_TYPES: dict[str, Any] = {"number": float, "whole": int, "column": str}


def _setting_options(command: Any) -> Any:
    """One option per setting, from the one table of settings (replicheck.options); none
    has a default here, so that a spec's value fills a setting the command line omits."""
    from replicheck.options import DATES

    for field in reversed(OPTION_FIELDS):
        kind: dict[str, Any] = {}
        if field.kind == "flag":
            kind = {"default": None}
        elif field.kind == "choice":
            kind = {"type": click.Choice(DATES), "default": None}
        else:
            kind = {"type": _SETTING_TYPES[field.kind], "metavar": field.metavar, "default": None}
        command = click.option(field.option, f"setting_{field.key}", help=field.help, **kind)(
            command
        )
    return command


def _role_options(command: Any) -> Any:
    """One repeatable option per statable role, from the one table of roles."""
    from replicheck.roles import ROLE_FIELDS

    for field in reversed(ROLE_FIELDS):
        names = [field.option] + ([field.short] if field.short else [])
        command = click.option(
            *names,
            f"role_{field.key}",
            metavar="COL",
            multiple=True,
            help=field.help,
        )(command)
    return command


#: ``check --help`` ends with the statuses and exit codes a script needs
#: (the statuses are those of replicheck.verdict; tests/test_cli.py checks them).
CHECK_EPILOG = """\b
Statuses (the verdict, in every report format):
  ok                no pseudo-replication found
  pseudoreplicated  rows were counted as replicates of a larger unit
  confounded        treatment cannot be separated from the unit
  unclear           the data alone cannot settle the unit

\b
Exit codes:
  0  the status is ok
  1  the status is pseudoreplicated, confounded or unclear
  2  bad usage or input: one line on standard error, no report
  3  internal error (a bug): one line on standard error
"""


@cli.command(epilog=CHECK_EPILOG)
@click.argument("data", type=click.Path(dir_okay=True, path_type=str))
@click.option("-r", "--response", metavar="COL", help="Column holding the measured response.")
@click.option(
    "-t",
    "--treatment",
    "treatments",
    metavar="COL",
    multiple=True,
    help="Treatment column (repeat for several).",
)
@click.option(
    "--formula",
    metavar="FORMULA",
    help="The claimed model instead of -r/-t, e.g. 'yield ~ variety * nitrogen + block'; "
    "main-effect factors named like blocks, places or subjects are blocks of the design. "
    "A claimed mixed model gives its random intercepts, '(1|tank)', '(1|site/plot)', or "
    "'Error(block/plot)': it is fitted as claimed and judged at the experimental units.",
)
@_role_options
@_setting_options
@click.option(
    "-c",
    "--claim",
    "claim_texts",
    metavar="TEXT",
    multiple=True,
    help="The reported result, e.g. 'F(2, 57) = 8.31, p = .001'; repeat with the term "
    "first for several: 'variety: F(2, 10) = 1.49, p = .27'.",
)
@click.option(
    "--spec",
    metavar="FILE",
    type=click.Path(dir_okay=False, path_type=str),
    help="TOML file with response, treatment (or formula), claim (one or a list), the "
    "stated roles unit, block, within, covariate, ignore (one or a list each), the settings "
    f"{', '.join(f.key for f in OPTION_FIELDS)} (the options of the same names win), "
    "unit_labels, family, na, sheet, header_row, range, fill_down, long, id. Default: "
    "NAME.replicheck.toml beside the data file, if present.",
)
@click.option("--no-spec", is_flag=True, help="Ignore a spec file found beside the data.")
@click.option(
    "--na",
    "na_codes",
    metavar="CODE",
    multiple=True,
    help="Extra missing-value code (repeatable); empty, NA, N/A and '.' always count.",
)
@click.option(
    "--sheet",
    "sheets",
    metavar="NAME",
    multiple=True,
    help="Sheet of a workbook (.xlsx, .xls, .ods), by name or 0-based index; 'all', or "
    "the option repeated, stacks the sheets with the same columns, each row's sheet in a "
    "column 'sheet' (default: the one sheet holding a table, or the one with the "
    "treatment columns).",
)
@click.option(
    "--header-row",
    type=click.IntRange(min=1),
    metavar="N",
    help="Row (line) of the column names, counting from 1; default: found, skipping "
    "titles and notes above it.",
)
@click.option(
    "--range",
    "cell_range",
    metavar="CELLS",
    help="Cells holding the table, such as A3:F130 (its first row is the header); default: found.",
)
@click.option(
    "--fill-down",
    "fill_columns",
    metavar="COL",
    multiple=True,
    help="Fill down this column: each empty cell takes the value above it (repeatable). "
    "By default a grouping written once per block of rows is found and filled.",
)
@click.option(
    "--long",
    "long_patterns",
    metavar="PATTERN",
    multiple=True,
    help="Wide columns holding one measurement over replicates, times or units, such as "
    "'day*' or 'rep?' (repeatable): turned into long form. By default a wide family is "
    "reshaped when the response is not a column.",
)
@click.option(
    "--id",
    "id_columns",
    metavar="COL",
    multiple=True,
    help="Column identifying a wide row (a subject measured at each time), with --long.",
)
@click.option(
    "--no-fill-down",
    is_flag=True,
    help="Do not look for grouping columns written once per block (see --fill-down).",
)
@click.option(
    "--family",
    type=click.Choice(["binomial", "poisson"]),
    default=None,
    help="The claimed analysis is a logistic (binomial: a yes/no response) or Poisson "
    "(counts) regression; a formula response cbind(successes, failures) implies binomial.",
)
@click.option(
    "--unit-labels",
    type=click.Choice(["auto", "local", "global"]),
    default=None,
    help="local: unit labels restart within each treatment level ('tank 1' of each "
    "feed is a different tank); global: a label names one unit everywhere; auto (the "
    "default, or the spec's unit_labels): decided from the data.",
)
@click.option(
    "-f",
    "--format",
    "fmt",
    type=click.Choice(FORMATS),
    default="text",
    show_default=True,
    help="Report format.",
)
@click.option("-o", "--output", metavar="PATH", help="Write the report here instead of stdout.")
@click.option(
    "--limit",
    "limits",
    metavar="KEY=N",
    multiple=True,
    help="Raise (or lower) a limit on the work of one audit (repeatable): file-mb "
    "(default 4000), columns (20000), cell-chars (10000), workbook-mb (1000), sheet-cells "
    "(50000000), levels of a treatment (1000), parameters of the claimed model (2000), "
    "crossed-levels: levels of crossed groupings, outside the largest one, a mixed model is "
    "fitted with (2000; past it the report rests on the unit means).",
)
def check(
    data: str,
    response: str | None,
    treatments: Sequence[str],
    formula: str | None,
    claim_texts: Sequence[str],
    spec: str | None,
    no_spec: bool,
    na_codes: Sequence[str],
    sheets: Sequence[str],
    header_row: int | None,
    cell_range: str | None,
    fill_columns: Sequence[str],
    long_patterns: Sequence[str],
    id_columns: Sequence[str],
    no_fill_down: bool,
    family: str | None,
    unit_labels: str | None,
    fmt: str,
    output: str | None,
    limits: Sequence[str],
    **stated: Any,
) -> None:
    """Audit DATA against its claimed analysis.

    \b
    Example:
      replicheck check fish.csv -r length -t feed -c "F(2, 105) = 9.8, p < .001"
    """
    from replicheck.api import audit

    _check_output(output, data, spec or "")
    bar = _ReadBar()
    line = _StageLine(bar)
    report = audit(
        data,
        response=response,
        treatment=treatments,
        claim=tuple(claim_texts) or None,
        roles={
            k.removeprefix("role_"): tuple(v)
            for k, v in stated.items()
            if k.startswith("role_") and v
        },
        options={
            k.removeprefix("setting_"): v
            for k, v in stated.items()
            if k.startswith("setting_") and v is not None
        },
        formula=formula,
        na=na_codes,
        sheet=None if not sheets else sheets[0] if len(sheets) == 1 else tuple(sheets),
        header_row=header_row,
        cell_range=cell_range,
        fill_down=tuple(fill_columns) or None,
        find_fill=not no_fill_down,
        long=tuple(long_patterns),
        ids=tuple(id_columns),
        spec=spec,
        find_spec=not no_spec,
        unit_labels=unit_labels,
        family=family,
        progress=bar.update,
        stage=line.begin,
        limits=limits or None,
    )
    bar.close()
    line.close()
    if report.claim.spec_path and spec is None:
        click.echo(f"using spec {report.claim.spec_path}", err=True)
    _emit(_render(report, fmt), output)
    sys.exit(report.exit_code)


@cli.command()
@click.argument("name", required=False)
@click.option("--list", "list_", is_flag=True, help="List the demo scenarios.")
@click.option(
    "--write",
    "write_dir",
    metavar="DIR",
    help="Write the scenario's data and spec files into DIR instead of auditing.",
)
@click.option(
    "-f",
    "--format",
    "fmt",
    type=click.Choice(FORMATS),
    default="text",
    show_default=True,
    help="Report format.",
)
def demo(name: str | None, list_: bool, write_dir: str | None, fmt: str) -> None:
    """Audit an invented demo dataset (default: the fish-feed scenario).

    The demo exits 0 when it ran, whatever its verdict.
    """
    from replicheck.demo import SCENARIOS, get_scenario

    if list_:
        for s in SCENARIOS.values():
            click.echo(f"{s.name:10} {s.expected:17} {s.title}")
        return
    scenario = get_scenario(name)
    if write_dir is not None:
        written = scenario.write(Path(write_dir))
        for path in written:
            click.echo(str(path))
        data = shlex.quote(str(written[0]))
        click.echo(
            f"next: replicheck check {data}  (the spec beside it gives the claimed analysis)",
            err=True,
        )
        return
    from replicheck.api import audit

    click.echo(f"demo scenario '{scenario.name}' (INVENTED DATA): {scenario.title}", err=True)
    click.echo(scenario.story, err=True)
    click.echo(f"command: {scenario.command()}\n", err=True)
    report = audit(
        scenario.frame(),
        spec=scenario.spec(),
        find_spec=False,
        name=f"{scenario.name}.csv (invented demo data)",
    )
    click.echo(_render(report, fmt), nl=False)


@cli.command()
@click.option("--terms", is_flag=True, help="List the glossary of technical terms instead.")
def rules(terms: bool) -> None:
    """List the rules behind the findings (or, with --terms, the glossary)."""
    if terms:
        from replicheck.glossary import GLOSSARY

        for e in GLOSSARY:
            click.echo(f"{e.term:34} {e.source}")
        click.echo("\n'replicheck explain TERM' defines a term.")
        return
    from replicheck.rulebook import RULE_DOCS

    for name, doc in RULE_DOCS.items():
        click.echo(f"{name:34} {doc}")


@cli.command()
@click.argument("term", nargs=-1, required=True)
def explain(term: tuple[str, ...]) -> None:
    """Define a technical term the reports use (e.g. ICC, REML, 'design effect', CR2).

    Each definition names its published source, or says "common practice".
    """
    from replicheck.glossary import GLOSSARY, lookup

    wanted = " ".join(term)
    entry = lookup(wanted)
    if entry is None:
        known = ", ".join(e.term for e in GLOSSARY)
        raise InputError(f"no glossary entry for {wanted!r}; terms: {known}")
    body = textwrap.fill(entry.definition, 80)
    click.echo(f"{entry.term}\n{body}\nsource: {entry.source}")


cli.add_command(screen_command)


def main(argv: Sequence[str] | None = None) -> None:
    """Entry point: one line on stderr and exit 2 for bad input; never a traceback for it."""
    try:
        cli.main(
            args=list(argv) if argv is not None else None,
            prog_name="replicheck",
            standalone_mode=False,
        )
    except InputError as err:
        click.echo(f"replicheck: error: {err.render('cli')}", err=True)
        sys.exit(2)
    except click.exceptions.Abort:
        click.echo("replicheck: aborted", err=True)
        sys.exit(2)
    except click.ClickException as err:
        msg = " ".join(err.format_message().split())
        click.echo(f"replicheck: error: {msg} (see 'replicheck --help')", err=True)
        sys.exit(2)
    except SystemExit:
        raise
    except Exception as err:  # a bug: one line, and the traceback only on request
        if os.environ.get("REPLICHECK_DEBUG"):
            traceback.print_exc()
        stage = _CURRENT_STAGE[0]
        where = f" while {_STAGE_WORDS.get(stage, stage)}" if stage else ""
        text = " ".join(str(err).split())
        click.echo(
            f"replicheck: internal error{where}: {type(err).__name__}: {text} "
            f"(set REPLICHECK_DEBUG=1 for details; please report it)",
            err=True,
        )
        sys.exit(3)
    sys.exit(0)


if __name__ == "__main__":
    main()
