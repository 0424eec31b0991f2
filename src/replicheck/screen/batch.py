"""Screen many data files: the Python entry point behind ``replicheck screen``.

See ``docs/screening.md`` for the behaviour an editor sees.
"""

from __future__ import annotations

import hashlib
import os
import re
import stat
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, fields, replace
from pathlib import Path
from typing import TYPE_CHECKING

from replicheck.defaults import DEFAULT_SEED
from replicheck.errors import InputError
from replicheck.screen.discover import DataFile, Discovery, find_data_files
from replicheck.screen.state import (
    CACHED_STATUSES,
    StateWriter,
    file_sha256,
    load_state,
    task_key,
)
from replicheck.screen.summary import Row, sort_rows, write_csv, write_index
from replicheck.screen.task import Failure, Outcome, Task

if TYPE_CHECKING:
    from replicheck.screen.specs import SpecIndex

DEFAULT_OUT = "replicheck-screen"
DEFAULT_TIME_LIMIT = 300.0
DEFAULT_MAX_SIZE = 1_000_000_000
REPORTS = "reports"
_SIZE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([kmgt]?)(i?)(b?)\s*$", re.IGNORECASE)


@dataclass(frozen=True)
class ScreenResult:
    """The rows of a screening (sorted worst first) and where its files were written."""

    rows: tuple[Row, ...]
    out_dir: Path
    summary: Path
    index: Path
    warnings: tuple[str, ...] = ()

    @property
    def exit_code(self) -> int:
        """0 when every file is ``ok``; 1 when any file has a problem or was not screened."""
        return 0 if all(r.status == "ok" for r in self.rows) else 1

    def counts(self) -> dict[str, int]:
        """Files per status, in the order of the rows."""
        out: dict[str, int] = {}
        for r in self.rows:
            out[r.status] = out.get(r.status, 0) + 1
        return out


def parse_size(text: str | int) -> int:
    """A size in bytes from ``"500000"``, ``"20kB"``, ``"1.5M"``, ``"2GiB"``...

    k, M, G, T (with or without B) are powers of 1000; KiB, MiB, GiB, TiB powers of 1024.

    >>> parse_size("1.5M"), parse_size("2KiB"), parse_size(10)
    (1500000, 2048, 10)
    """
    if isinstance(text, int) and not isinstance(text, bool):
        value, prefix, binary = float(text), "", False
    else:
        m = _SIZE.match(str(text))
        if m is None or (m[3] and not m[2]):
            raise InputError(
                f"cannot read the size {text!r}: write bytes or a number with k, M, G "
                "(powers of 1000) or KiB, MiB, GiB (powers of 1024), e.g. 500M"
            )
        value, prefix, binary = float(m[1]), m[2].lower(), bool(m[3])
    power = " kmgt".index(prefix) if prefix else 0
    size = int(value * (1024 if binary else 1000) ** power)
    if size < 1:
        raise InputError(f"the size limit must be at least 1 byte, got {text!r}")
    return size


def report_stem(name: str) -> str:
    """A file name for a file's reports: readable, safe anywhere, and unique per name."""
    safe = re.sub(r"[^A-Za-z0-9._-]+", "_", name).strip("._")[:80] or "file"
    digest = hashlib.sha256(name.encode("utf-8")).hexdigest()[:10]
    return f"{safe}-{digest}"


def _inside(path: Path, folder: Path) -> bool:
    try:
        path.relative_to(folder)
    except ValueError:
        return False
    return True


def _real(path: Path) -> Path:
    return Path(os.path.realpath(path))


def _check_outputs(roots: Sequence[Path], out_dir: Path, summary: Path) -> None:
    """Refuse outputs that would mix with or overwrite the data being screened."""
    if out_dir.exists() and not out_dir.is_dir():
        raise InputError(f"--out {out_dir} exists and is not a folder")
    real_out, real_summary = _real(out_dir), _real(summary)
    for root in roots:
        real_root = _real(root)
        if real_root == real_out:
            raise InputError(
                f"--out {out_dir} is the screened folder itself: choose another output folder"
            )
        if _inside(real_root, real_out / REPORTS):
            raise InputError(f"the screened path {root} lies inside the output's reports folder")
        if real_summary == real_root:
            raise InputError(f"--summary {summary} would overwrite the screened file {root}")
        if (
            root.is_dir()
            and _inside(real_summary, real_root)
            and not _inside(real_summary, real_out)
        ):
            raise InputError(
                f"--summary {summary} lies inside the screened folder {root}: write it elsewhere "
                "(nothing is written into screened folders except the output folder)"
            )
    if summary.exists() and summary.is_dir():
        raise InputError(f"--summary {summary} is a folder")


def _row_from(file: DataFile, result: Outcome | Failure, digest: str, size: int) -> Row:
    if isinstance(result, Failure):
        return Row(
            file=file.name,
            status=result.status,
            message=result.message,
            bytes=size,
            sha256=digest,
            seconds=round(result.seconds, 3),
        )
    # every summary field the work reported, under the same name (Outcome mirrors Row)
    shared = {
        f.name: getattr(result, f.name)
        for f in fields(Outcome)
        if f.name in _ROW_FIELDS and f.name not in ("file", "seconds", "report_json")
    }
    return Row(
        file=file.name, bytes=size, sha256=digest, seconds=round(result.seconds, 3), **shared
    )


_ROW_FIELDS = frozenset(f.name for f in fields(Row))


def _write_reports(out_dir: Path, file: DataFile, result: Outcome) -> tuple[str, str]:
    if result.report_html is None or result.report_json is None:
        return "", ""
    stem = report_stem(file.name)
    html_rel, json_rel = f"{REPORTS}/{stem}.html", f"{REPORTS}/{stem}.json"
    for rel, text in ((html_rel, result.report_html), (json_rel, result.report_json)):
        _write_text(out_dir / rel, text if text.endswith("\n") else text + "\n")
    return html_rel, json_rel


def _write_text(target: Path, text: str) -> None:
    """Write a file whole (through a temporary file); a failure is one line."""
    tmp = target.with_name(target.name + ".tmp")
    try:
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, target)
    except OSError as err:
        raise InputError(f"cannot write {target}: {err.strerror or err}") from None


def _reports_exist(out_dir: Path, row: Row) -> bool:
    return all((out_dir / rel).is_file() for rel in (row.report, row.report_json) if rel)


def _sheet_keys(key: str, stored: Mapping[str, object]) -> list[str]:
    """The state keys of one file: its own, then one per further sheet of a
    workbook audited sheet by sheet (``KEY/sheet1``, ``KEY/sheet2``, ...)."""
    keys = [key]
    while f"{key}/sheet{len(keys)}" in stored:
        keys.append(f"{key}/sheet{len(keys)}")
    return keys


def _default_jobs(n_tasks: int) -> int:
    try:
        cpus = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        cpus = os.cpu_count() or 1
    return max(1, min(cpus, n_tasks))


@dataclass(frozen=True)
class _Planned:
    index: int
    file: DataFile
    task: Task
    digest: str
    size: int
    key: str | None


def screen(
    paths: Sequence[str | os.PathLike[str]],
    *,
    out: str | os.PathLike[str] = DEFAULT_OUT,
    summary: str | os.PathLike[str] | None = None,
    specs: str | os.PathLike[str] | None = None,
    guess: bool = False,
    jobs: int | None = None,
    time_limit: float | None = DEFAULT_TIME_LIMIT,
    max_size: int | str = DEFAULT_MAX_SIZE,
    cluster: str | None = None,
    seed: int | None = None,
    alpha: float | None = None,
    fresh: bool = False,
    progress: Callable[[Row, int], None] | None = None,
    follow_links: bool = False,
) -> ScreenResult:
    """Screen every data file in ``paths`` (files or folders, searched recursively).

    Each file is audited with :func:`replicheck.api.audit` against the spec
    found for it (``specs`` index entry, else ``NAME.replicheck.toml`` beside
    it); without a spec it is ``needs-spec`` with proposed columns, or, with
    ``guess``, audited with the best guess and labelled so. Writes
    ``out/reports/*.html|json``, the summary CSV (``summary``, default
    ``out/summary.csv``), ``out/index.html`` and the resumption state; never
    writes into the screened folders (except ``out`` when it lies there).

    Parameters
    ----------
    jobs:
        Worker processes (default: the number of CPUs, at most the number of files).
    time_limit:
        Seconds per file before it is stopped and marked ``timeout`` (None or 0: no limit).
    max_size:
        Files larger than this (bytes, or text such as ``"500M"``) are marked
        ``too-large`` without being read.
    cluster:
        Address of a Dask scheduler (``tcp://host:8786``): run the per-file
        work there instead of in local processes.
    seed, alpha:
        Passed to every audit alike.
    fresh:
        Ignore the results stored by an earlier run in ``out``.
    follow_links:
        Screen files that symbolic links in a screened folder lead to outside it
        (by default they are left out with a warning).
    progress:
        Called with each file's row as soon as it is known, and the number of files.

    Raises
    ------
    InputError
        A path is missing, an option is out of range, the outputs would land
        among the data, the spec index is bad, or there is no data file.
    """
    if jobs is not None and (isinstance(jobs, bool) or jobs < 1):
        raise InputError(f"--jobs must be at least 1, got {jobs!r}")
    if time_limit is not None and not time_limit >= 0:
        raise InputError(f"--time-limit must be 0 (no limit) or more seconds, got {time_limit!r}")
    if alpha is not None and not 0 < alpha < 1:
        raise InputError(f"--alpha must be a number between 0 and 1 (exclusive), got {alpha!r}")
    limit_bytes = parse_size(max_size)
    if seed is not None and (isinstance(seed, bool) or seed < 0):
        raise InputError(f"--seed must be a whole number of 0 or more, got {seed!r}")
    out_dir = Path(os.path.abspath(os.fspath(out)))
    summary_path = (
        out_dir / "summary.csv" if summary is None else Path(os.path.abspath(os.fspath(summary)))
    )
    roots = [Path(os.path.abspath(os.fspath(p))) for p in paths]
    for raw, root in zip(paths, roots, strict=True):
        if not root.exists():
            raise InputError(f"path not found: {os.fspath(raw)}")
    if not roots:
        raise InputError("no path to screen given")
    _check_outputs(roots, out_dir, summary_path)
    from replicheck.screen.specs import load_index

    index = load_index(specs) if specs is not None else None
    found = find_data_files(roots, skip=[out_dir, summary_path], follow_links=follow_links)
    if not found.files:
        raise InputError(
            "no data file found in "
            + ", ".join(str(r) for r in roots)
            + " (looked for .csv, .tsv, .txt, .xlsx, .xls, .ods, .parquet and similar)"
        )

    client = None
    if cluster is not None:
        from replicheck.screen.cluster import connect

        client = connect(cluster)
    try:
        return _screen(
            found,
            out_dir=out_dir,
            summary_path=summary_path,
            index=index,
            guess=guess,
            jobs=jobs,
            time_limit=time_limit or None,
            limit_bytes=limit_bytes,
            client=client,
            seed=seed,
            alpha=alpha,
            fresh=fresh,
            progress=progress,
        )
    finally:
        if client is not None:
            client.close()


def _screen(
    found: Discovery,
    *,
    out_dir: Path,
    summary_path: Path,
    index: SpecIndex | None,
    guess: bool,
    jobs: int | None,
    time_limit: float | None,
    limit_bytes: int,
    client: object,
    seed: int | None,
    alpha: float | None,
    fresh: bool,
    progress: Callable[[Row, int], None] | None,
) -> ScreenResult:
    from replicheck.screen.specs import choose_spec

    if client is None:  # the worker processes' imports overlap the work below
        from replicheck.screen.runner import warm_up

        warm_up()
    from replicheck.verdict import CAUTION

    warnings = list(found.warnings)
    if index is not None:
        for entry in index.entries:
            if not any(index.lookup([f.relative, f.name]) is entry for f in found.files):
                warnings.append(
                    f"spec index entry {entry.pattern!r} ({entry.where}) matches no file"
                )

    try:
        (out_dir / REPORTS).mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise InputError(
            f"cannot create the output folder {out_dir}: {err.strerror or err}"
        ) from None
    stored, warning = load_state(out_dir)
    if warning and not fresh:
        warnings.append(warning)
    old = {} if fresh else stored
    state = StateWriter(out_dir, old)
    keep: set[str] = set()  # the state entries of this run's files
    rows: dict[int, Row] = {}
    extra: list[Row] = []  # the further sheets of workbooks audited sheet by sheet

    def done(i: int, row: Row) -> None:
        rows[i] = row
        if progress is not None:
            progress(row, len(found.files))

    planned: list[_Planned] = []
    for i, f in enumerate(found.files):
        try:
            info = f.path.stat()
        except OSError as err:
            done(i, Row(f.name, "error", message=f"cannot read the file: {err.strerror or err}"))
            continue
        size = info.st_size
        if not stat.S_ISREG(info.st_mode):  # a pipe or device would block the reading
            done(i, Row(f.name, "error", message="not a regular file; not read"))
            continue
        if size > limit_bytes:
            done(
                i,
                Row(
                    f.name,
                    "too-large",
                    message=f"{size:,} bytes, over the size limit of {limit_bytes:,} bytes "
                    "(--max-size); not read",
                    bytes=size,
                ),
            )
            continue
        try:
            digest = file_sha256(f.path)
        except OSError as err:
            msg = f"cannot read the file: {err.strerror or err}"
            done(i, Row(f.name, "error", message=msg, bytes=size))
            continue
        choice = choose_spec(f.path, [f.relative, f.name], index)
        key = None
        if choice.fingerprint is not None:
            key = task_key(
                name=f.name,
                sha256=digest,
                spec_fingerprint=choice.fingerprint,
                guess=guess,
                seed=seed,
                alpha=alpha,
            )
        if key is not None and key in old:
            stored_rows = [Row.from_dict(dict(old[k])) for k in _sheet_keys(key, old)]
            if all(_reports_exist(out_dir, r) for r in stored_rows):
                keep.update(_sheet_keys(key, old))
                first, *more = stored_rows
                name = first.file if first.file.startswith(f"{f.name} [") else f.name
                done(i, replace(first, file=name, reused=True))
                extra.extend(replace(r, reused=True) for r in more)
                continue
        task = Task(
            path=str(f.path),
            name=f.name,
            spec_source=choice.source,
            spec_path=choice.path if choice.source == "beside" else None,
            spec=choice.spec,
            guess=guess,
            seed=seed,
            alpha=alpha,
        )
        planned.append(_Planned(i, f, task, digest, size, key))

    results: Iterator[tuple[int, object]]
    if client is not None:
        from replicheck.screen.cluster import run_cluster

        results = run_cluster(client, [p.task for p in planned], time_limit=time_limit)
    else:
        from replicheck.screen.runner import run_local

        n_jobs = jobs if jobs is not None else _default_jobs(len(planned))
        results = run_local([p.task for p in planned], jobs=n_jobs, time_limit=time_limit)
    try:
        for k, result in results:
            p = planned[k]
            if not isinstance(result, Outcome | Failure):
                result = Failure("internal-error", f"unexpected result {type(result).__name__}")
            if isinstance(result, Outcome) and result.sheets:
                # a workbook audited sheet by sheet: a row per sheet
                sheet_rows = []
                for part in result.sheets:
                    named = replace(p.file, name=f"{p.file.name} [{part.sheet}]")
                    row = _row_from(named, part, p.digest, p.size)
                    html_rel, json_rel = _write_reports(out_dir, named, part)
                    sheet_rows.append(replace(row, report=html_rel, report_json=json_rel))
                if p.key is not None and all(r.status in CACHED_STATUSES for r in sheet_rows):
                    for n, row in enumerate(sheet_rows):
                        sheet_key = p.key if n == 0 else f"{p.key}/sheet{n}"
                        keep.add(sheet_key)
                        state.add(sheet_key, row.to_dict())
                done(p.index, sheet_rows[0])
                extra.extend(sheet_rows[1:])
                continue
            row = _row_from(p.file, result, p.digest, p.size)
            if isinstance(result, Outcome):
                html_rel, json_rel = _write_reports(out_dir, p.file, result)
                row = replace(row, report=html_rel, report_json=json_rel)
            if p.key is not None and row.status in CACHED_STATUSES:
                keep.add(p.key)
                state.add(p.key, row.to_dict())
            done(p.index, row)
    finally:
        state.flush()  # an interrupted run resumes from here

    for i, f in enumerate(found.files):
        if i not in rows:  # cannot happen unless a runner loses a task
            rows[i] = Row(f.name, "internal-error", message="no result came back for this file")
    final = sort_rows([*(rows[i] for i in range(len(found.files))), *extra])
    _prune_reports(out_dir, stored, final)
    index_path = out_dir / "index.html"
    options = [
        ("--seed", f"from each spec (default {DEFAULT_SEED})" if seed is None else str(seed)),
        ("--alpha", "from each spec (default 0.05)" if alpha is None else f"{alpha:g}"),
        ("--time-limit", "none" if not time_limit else f"{time_limit:g} s"),
        ("--max-size", f"{limit_bytes:,} bytes"),
        ("--guess", "on" if guess else "off"),
    ]
    try:
        state.flush(keep=keep)
        summary_path.parent.mkdir(parents=True, exist_ok=True)
        write_csv(final, summary_path, out_dir)
        write_index(final, index_path, CAUTION, options)
    except OSError as err:
        raise InputError(
            f"cannot write the summary: {err.filename}: {err.strerror or err}"
        ) from None
    return ScreenResult(final, out_dir, summary_path, index_path, tuple(warnings))


def _prune_reports(out_dir: Path, old: dict[str, dict[str, object]], rows: Sequence[Row]) -> None:
    """Delete reports an earlier run wrote for files that no longer have them."""
    wanted = {rel for r in rows for rel in (r.report, r.report_json) if rel}
    for entry in old.values():
        for col in ("report", "report_json"):
            rel = entry.get(col)
            if isinstance(rel, str) and rel and rel not in wanted:
                target = out_dir / rel
                if _inside(target, out_dir / REPORTS) and target.is_file():
                    target.unlink()
