"""The screening summary: one row per file, as CSV and as one self-contained HTML page.

Rows are sorted by :data:`SEVERITY`, worst first, then by file name:

1. the audit's problem verdicts in the audit's own order (``confounded``,
   ``pseudoreplicated``, ``unclear``): the claimed inference is, or may be,
   invalid, which is what an editor acts on first;
2. files that could not be screened (``error``, ``timeout``, ``too-large``,
   ``unreadable``, ``internal-error``): a person has to look at them;
3. ``needs-spec``: the authors have to say which analysis they claim;
4. ``ok``: nothing was found.
"""

from __future__ import annotations

import csv
import html
import os
from collections.abc import Iterable, Sequence
from dataclasses import asdict, dataclass, fields
from pathlib import Path
from typing import Any
from urllib.parse import quote

from replicheck.numbers import format_p
from replicheck.vocab import STATUS_ORDER

# The audit's verdicts, worst first.
VERDICTS: tuple[str, ...] = STATUS_ORDER
NOT_SCREENED = ("error", "timeout", "too-large", "unreadable", "internal-error")
SEVERITY: tuple[str, ...] = (*VERDICTS[:-1], *NOT_SCREENED, "needs-spec", "ok")

STATUS_MEANING: dict[str, str] = {
    "confounded": "each treatment level sits in a single unit: treatment and unit cannot be "
    "told apart",
    "pseudoreplicated": "the claimed analysis counts observations within an experimental unit "
    "as independent replicates",
    "unclear": "the data cannot settle whether the claimed analysis holds; read the report",
    "error": "the file could not be read, or its spec does not fit it",
    "timeout": "the audit took longer than the time limit and was stopped",
    "too-large": "the file is larger than the size limit and was not read",
    "unreadable": "the process screening this file died before finishing (out of memory, or "
    "a crash in a compiled library reading it); the reason is given",
    "internal-error": "replicheck failed on this file (a bug: please report it)",
    "needs-spec": "no claimed analysis is given for this file; candidates are proposed",
    "ok": "no problem was found with the claimed analysis",
}


@dataclass(frozen=True)
class Row:
    """One file's line in the summary (the CSV columns, in order).

    ``report`` and ``report_json`` are relative to the output folder;
    ``seconds`` is the time the work took when it was done (also for a reused row).
    """

    file: str
    status: str
    guessed: bool = False
    spec_source: str = ""
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
    message: str = ""
    candidates: str = ""
    report: str = ""
    report_json: str = ""
    bytes: int | None = None
    sha256: str = ""
    reused: bool = False
    seconds: float | None = None

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Row:
        names = {f.name for f in fields(cls)}
        return cls(**{k: v for k, v in data.items() if k in names})


COLUMNS: tuple[str, ...] = tuple(f.name for f in fields(Row))
#: Columns that depend on the run, not on the file: left out when comparing runs.
TIMING_COLUMNS = ("reused", "seconds")


def severity(status: str) -> int:
    """Position of a status in :data:`SEVERITY` (unknown statuses just before ``ok``)."""
    return SEVERITY.index(status) if status in SEVERITY else len(SEVERITY) - 1


def sort_rows(rows: Iterable[Row]) -> tuple[Row, ...]:
    """Worst first, then by file name."""
    return tuple(sorted(rows, key=lambda r: (severity(r.status), r.file.casefold(), r.file)))


def _cell(value: object) -> str:
    """A CSV cell: yes/no for flags, empty for none, text guarded against spreadsheet formulas.

    Spreadsheets run a cell starting with = + - @ as a formula; a file or column
    name could start so, hence a leading apostrophe (OWASP's advice on CSV injection).
    """
    if value is None:
        return ""
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return f"{value:.6g}"
    text = str(value)
    return "'" + text if text[:1] in ("=", "+", "-", "@", "\t", "\r") else text


def write_csv(rows: Sequence[Row], path: Path, out_dir: Path) -> None:
    """Write the summary CSV; report paths become relative to the CSV's folder."""
    folder = path.parent
    tmp = path.with_name(path.name + ".tmp")
    with open(tmp, "w", encoding="utf-8", newline="") as f:
        w = csv.writer(f)
        w.writerow(COLUMNS)
        for r in rows:
            d = r.to_dict()
            for key in ("report", "report_json"):
                if d[key]:
                    d[key] = Path(os.path.relpath(out_dir / d[key], folder)).as_posix()
            w.writerow([_cell(d[c]) for c in COLUMNS])
    os.replace(tmp, path)


_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:1.5em;color:#1a1a1a;
line-height:1.4}
h1{font-size:1.4em;margin-bottom:.3em}
.caution{border-left:4px solid #8a6d00;background:#fff8e1;padding:.6em .9em;max-width:60em}
table{border-collapse:collapse;margin:1em 0}
th,td{border:1px solid #ccc;padding:.3em .5em;vertical-align:top;text-align:left}
th{background:#f2f2f2}
td.num{text-align:right;white-space:nowrap}
td.msg{min-width:22em;max-width:40em;font-size:.92em}
.status{font-weight:bold;white-space:nowrap;padding:.1em .4em;border-radius:3px}
.s-confounded{background:#f8d0d0}.s-pseudoreplicated{background:#fde0c8}
.s-unclear{background:#fff1b8}.s-error,.s-timeout,.s-too-large,.s-unreadable,.s-internal-error{background:#e4e4e4}
.s-needs-spec{background:#dde8f6}.s-ok{background:#d6f0d6}
.guessed{display:block;font-size:.85em;color:#7a3b00;font-weight:bold}
.small{font-size:.85em;color:#555}
"""


def _e(value: object) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def _num(value: float | int | None, digits: int = 3) -> str:
    if value is None:
        return "-"
    if isinstance(value, int):
        return str(value)
    return f"{value:.{digits}g}"


def _analysis(r: Row) -> str:
    if not r.response:
        return "-"
    return f"{_e(r.response)} ~ {_e(' + '.join(r.treatment.split(';')))}"


def _row_html(i: int, r: Row) -> str:
    status = f'<span class="status s-{_e(r.status)}">{_e(r.status)}</span>'
    if r.guessed:
        status += '<span class="guessed">guessed analysis, not the claimed one</span>'
    if r.report:
        link = f'<a href="{_e(quote(r.report))}">{_e(r.file)}</a>'
        if r.report_json:
            link += f' <a class="small" href="{_e(quote(r.report_json))}">(JSON)</a>'
    else:
        link = _e(r.file)
    changed = {True: "yes", False: "no", None: "-"}[r.conclusion_changed]
    details = _e(r.message)
    if r.candidates:
        details += f'<br><span class="small">candidates: {_e(r.candidates)}</span>'
    cells = [
        f'<td class="num">{i}</td>',
        f"<td>{status}</td>",
        f"<td>{link}</td>",
        f"<td>{_analysis(r)}</td>",
        f"<td>{_e(r.spec_source or '-')}</td>",
        f"<td>{_e(r.unit or '-')}</td>",
        f'<td class="num">{_num(r.n_units)}</td>',
        f'<td class="num">{_e(format_p(r.claimed_p))}</td>',
        f'<td class="num">{_e(format_p(r.corrected_p))}</td>',
        f'<td class="num">{_num(r.icc, 2)}</td>',
        f'<td class="num">{_num(r.design_effect, 3)}</td>',
        f"<td>{changed}</td>",
        f'<td class="msg">{details}</td>',
    ]
    return "<tr>" + "".join(cells) + "</tr>"


def render_index(rows: Sequence[Row], caution: str, options: Sequence[tuple[str, str]]) -> str:
    """The index page: counts per status, the caution, and the table of files (sorted
    as given), each linking its report. Every text from the data is escaped."""
    counts = {s: sum(1 for r in rows if r.status == s) for s in SEVERITY}
    others = sorted({r.status for r in rows} - set(SEVERITY))
    count_rows = "".join(
        f'<tr><td><span class="status s-{_e(s)}">{_e(s)}</span></td>'
        f'<td class="num">{counts.get(s, 0)}</td><td>{_e(STATUS_MEANING.get(s, ""))}</td></tr>'
        for s in (*SEVERITY, *others)
        if counts.get(s, 0) or s in others
    )
    guessed = sum(1 for r in rows if r.guessed)
    reused = sum(1 for r in rows if r.reused)
    notes = []
    if guessed:
        notes.append(
            f"{guessed} file(s) were audited with a guessed response and treatment (--guess): "
            "those verdicts are about the guessed analysis, not necessarily the one the "
            "authors report."
        )
    if reused:
        notes.append(f"{reused} result(s) were reused from the previous run (unchanged files).")
    head = (
        "<tr><th>#</th><th>Status</th><th>File (report)</th><th>Analysis</th><th>Spec</th>"
        "<th>Unit</th><th>Units</th><th>Claimed p</th><th>Corrected p</th><th>ICC</th>"
        "<th>Design effect</th><th>Conclusion changed</th><th>Details</th></tr>"
    )
    body = "\n".join(_row_html(i, r) for i, r in enumerate(rows, start=1))
    opts = ", ".join(f"{_e(k)} {_e(v)}" for k, v in options)
    order = ", ".join(SEVERITY)
    return (
        '<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta http-equiv="Content-Security-Policy" content="default-src \'none\'; '
        "style-src 'unsafe-inline'\">\n"
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>replicheck screening: {len(rows)} files</title>\n<style>{_CSS}</style>\n"
        "</head>\n<body>\n<h1>replicheck screening</h1>\n"
        f'<p class="caution"><strong>Caution.</strong> {_e(caution)}</p>\n'
        f"<p>{len(rows)} file(s) screened. Files are listed worst first ({_e(order)}), then "
        "by name; each file name links its full report.</p>\n"
        + "".join(f"<p>{_e(n)}</p>\n" for n in notes)
        + f"<table>\n<tr><th>Status</th><th>Files</th><th>Meaning</th></tr>\n{count_rows}\n"
        "</table>\n"
        f"<table>\n<thead>{head}</thead>\n<tbody>\n{body}\n</tbody>\n</table>\n"
        f'<p class="small">Options: {opts}.</p>\n</body>\n</html>\n'
    )


def write_index(
    rows: Sequence[Row], path: Path, caution: str, options: Sequence[tuple[str, str]]
) -> None:
    """Write the index page (replacing the file whole)."""
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(render_index(rows, caution, options), encoding="utf-8")
    os.replace(tmp, path)
