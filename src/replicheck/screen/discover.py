"""Find the data files to screen.

Folders are searched recursively for files with an extension the reader
supports (:data:`DATA_EXTENSIONS`; legacy ``.xls`` is listed too, so that the
summary says why it cannot be read). Hidden files and folders (name starting
with ``.``), ``__MACOSX`` folders left by unzipping, Office lock files
(``~$book.xlsx``), spec files (``NAME.replicheck.toml``), output folders of
earlier screenings (they hold ``.screen-state.json``) and the paths given in
``skip`` (the output folder, the summary file) are left out. Symbolic links to
folders are not followed (no loops); a symbolic link to a file outside the
screened folder is left out with a warning unless ``follow_links`` is given
(a supplement must not make the screener read other files of the machine); a
file reached twice is listed once.
"""

from __future__ import annotations

import os
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path, PurePosixPath

from replicheck.errors import InputError
from replicheck.screen.state import STATE_NAME

DATA_EXTENSIONS: frozenset[str] = frozenset(
    {".csv", ".tsv", ".tab", ".txt", ".xlsx", ".xlsm", ".xls", ".ods", ".parquet", ".pq"}
)
_SKIP_FOLDERS = frozenset({"__MACOSX", "__pycache__"})


@dataclass(frozen=True)
class DataFile:
    """A file found for screening.

    ``path`` is where to read it; ``relative`` its path relative to the
    screened folder it was found in (its name when given directly); ``name``
    the name shown in the summary (relative to the folder common to all
    screened paths), both with ``/`` as separator.
    """

    path: Path
    relative: str
    name: str


@dataclass(frozen=True)
class Discovery:
    """The files found, in name order, and warnings about folders that could not be read."""

    files: tuple[DataFile, ...]
    warnings: tuple[str, ...] = ()


def is_data_file(path: Path) -> bool:
    """Whether a file name looks like a data file replicheck reads."""
    if path.name.startswith((".", "~$")):
        return False
    return path.suffix.lower() in DATA_EXTENSIONS  # spec files (.toml) are not data


def _posix(path: Path) -> str:
    return PurePosixPath(*path.parts).as_posix() if path.parts else path.name


def _same(a: Path, b: Path) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return os.path.realpath(a) == os.path.realpath(b)


def display_base(roots: Sequence[Path]) -> Path:
    """The folder names in the summary are relative to: the screened folder when
    there is one, else the deepest folder holding every screened path."""
    folders = [r if r.is_dir() else r.parent for r in roots]
    try:
        return Path(os.path.commonpath([str(f) for f in folders]))
    except ValueError:  # different drives
        return Path(folders[0].anchor)


def _walk(root: Path, skip: Sequence[Path], warnings: list[str]) -> Iterable[Path]:
    def onerror(err: OSError) -> None:
        warnings.append(f"cannot read folder {err.filename}: {err.strerror or err}")

    for folder, dirs, files in os.walk(root, onerror=onerror, followlinks=False):
        here = Path(folder)
        dirs[:] = sorted(
            d
            for d in dirs
            if not d.startswith(".")
            and d not in _SKIP_FOLDERS
            and not (here / d / STATE_NAME).exists()
            and not any(_same(here / d, s) for s in skip if s.is_dir())
        )
        for f in sorted(files):
            p = here / f
            if is_data_file(p) and not any(_same(p, s) for s in skip if s.is_file()):
                yield p


def _outside(path: Path, root: Path) -> bool:
    """Whether a symbolic link under ``root`` leads outside it."""
    real, real_root = os.path.realpath(path), os.path.realpath(root)
    return os.path.commonpath([real, real_root]) != real_root


def find_data_files(
    paths: Sequence[str | os.PathLike[str]],
    skip: Sequence[Path] = (),
    follow_links: bool = False,
) -> Discovery:
    """The data files in ``paths`` (files or folders), each once, ordered by name.

    A path given directly is screened whatever its extension. Raises
    :class:`InputError` when a path does not exist.
    """
    roots: list[Path] = []
    for raw in paths:
        p = Path(os.path.abspath(os.fspath(raw)))
        if not p.exists():
            raise InputError(f"path not found: {os.fspath(raw)}")
        roots.append(p)
    if not roots:
        raise InputError("no path to screen given")
    base = display_base(roots)
    warnings: list[str] = []
    seen: set[str] = set()
    found: list[DataFile] = []
    for root in roots:
        if root.is_dir():
            candidates = []
            for p in _walk(root, skip, warnings):
                if not follow_links and p.is_symlink() and _outside(p, root):
                    warnings.append(
                        f"skipped {p}: a symbolic link to a file outside the screened folder "
                        "(--follow-links reads it)"
                    )
                    continue
                candidates.append((p, p.relative_to(root)))
        else:
            candidates = [(root, Path(root.name))]
        for p, rel in candidates:
            real = os.path.realpath(p)
            if real in seen:
                continue
            seen.add(real)
            try:
                name = _posix(p.relative_to(base))
            except ValueError:
                name = p.as_posix()
            found.append(DataFile(p, _posix(rel), name))
    found.sort(key=lambda f: (f.name.casefold(), f.name))
    return Discovery(tuple(found), tuple(warnings))
