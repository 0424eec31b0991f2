"""What travels between the screening process and the processes that do the work.

Kept free of heavy imports: the screening process unpickles these objects
without loading the statistics stack.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass


@dataclass(frozen=True)
class Task:
    """The work on one data file.

    Attributes
    ----------
    path:
        Where to read the file (it must be visible to whatever process runs the task).
    name:
        The file's name in the summary.
    spec_source:
        ``"beside"`` (``spec_path`` names ``NAME.replicheck.toml``), ``"index"``
        (``spec`` holds the spec index entry) or ``"none"``.
    guess:
        Without a spec: audit the best guessed response and treatment instead of
        stopping at ``needs-spec``.
    seed, alpha:
        Passed to :func:`replicheck.api.audit` for every file alike (None: each
        spec's, else the default).
    """

    path: str
    name: str
    spec_source: str
    spec_path: str | None = None
    spec: Mapping[str, object] | None = None
    guess: bool = False
    seed: int | None = None
    alpha: float | None = None


@dataclass(frozen=True)
class Outcome:
    """What the work on one file gave: a status, the summary fields and the rendered report.

    A workbook whose sheets hold several tables, with nothing to choose between
    them, is audited sheet by sheet: ``sheets`` then holds one outcome per sheet
    (each with its ``sheet``), and each becomes a row of the summary.
    """

    status: str
    message: str
    spec_source: str = ""
    guessed: bool = False
    response: str = ""
    treatment: str = ""
    unit: str = ""
    n_units: int | None = None
    n_rows: int | None = None
    conclusion_changed: bool | None = None
    claimed_p: float | None = None
    corrected_p: float | None = None
    icc: float | None = None
    design_effect: float | None = None
    candidates: str = ""
    seconds: float = 0.0
    report_html: str | None = None
    report_json: str | None = None
    sheet: str = ""
    sheets: tuple[Outcome, ...] = ()


@dataclass(frozen=True)
class Failure:
    """The work on one file did not finish: ``timeout``, ``unreadable`` (the process died)
    or ``internal-error``."""

    status: str
    message: str
    seconds: float = 0.0


def one_line(err: BaseException) -> str:
    """An exception as one line: its type and message."""
    text = " ".join(str(err).split())
    name = type(err).__name__
    line = f"{name}: {text}" if text else name
    return line if len(line) <= 300 else line[:297] + "..."
