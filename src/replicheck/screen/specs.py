"""Which claimed analysis goes with each screened file.

A file's spec comes from, in this order:

1. the spec index given with ``--specs INDEX`` (a CSV or TOML file listing
   many data files), when an entry matches the file;
2. ``NAME.replicheck.toml`` beside ``NAME.csv``, as for ``replicheck check``;
3. nothing: the file needs a spec (or, with ``--guess``, gets a guessed one).

Index entries name files by their path relative to the screened folder
(``sub/trial.csv``; a file given directly is named by its file name), with
``/`` as the separator. Glob patterns are allowed (``*`` and ``?`` also match
``/``, so ``*.csv`` matches every CSV file in every subfolder; ``[abc]``
matches one of the characters). An entry naming the file exactly wins over
patterns; among patterns the first in the index wins.

CSV index: a header row with ``file`` and any of ``response, treatment, unit,
claim, formula, alpha, sheet, na``; empty cells are not given; several
treatments, claims or missing-value codes are separated by ``;``.

TOML index: one table per file, keyed by the file name or pattern::

    ["ratpup.csv"]
    response = "weight"
    treatment = "Treatment"
    claim = "F(2, 319) = 17.35, p < .001"

Every entry is checked when the index is read, as a spec would be; a bad
entry is a usage error naming the index line or table.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import os
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from fnmatch import fnmatchcase
from pathlib import Path

from replicheck.claim import LIST_KEYS, SPEC_KEYS, spec_beside
from replicheck.errors import InputError
from replicheck.options import OPTION_FIELDS, option_field

INDEX_COLUMNS = ("file", *SPEC_KEYS)
SETTING_KEYS = frozenset(f.key for f in OPTION_FIELDS)

_GLOB_CHARS = frozenset("*?[")


@dataclass(frozen=True)
class IndexEntry:
    """One entry of a spec index: a file name or pattern and its spec."""

    pattern: str
    spec: Mapping[str, object]
    where: str  # "line 3" or "table 'x.csv'"

    @property
    def is_glob(self) -> bool:
        return any(ch in _GLOB_CHARS for ch in self.pattern)


@dataclass(frozen=True)
class SpecIndex:
    """A spec index file, read and checked."""

    path: str
    entries: tuple[IndexEntry, ...]

    def lookup(self, names: Sequence[str]) -> IndexEntry | None:
        """The entry for a file known by any of ``names``: exact names first, then
        patterns in index order."""
        for e in self.entries:
            if not e.is_glob and e.pattern in names:
                return e
        for e in self.entries:
            if e.is_glob and any(fnmatchcase(n, e.pattern) for n in names):
                return e
        return None


@dataclass(frozen=True)
class SpecChoice:
    """The spec chosen for one file.

    ``fingerprint`` changes whenever the spec's content does (it keys the
    resumption state); it is None when a spec file beside the data could not be read.
    """

    source: str  # "index" | "beside" | "none"
    path: str | None = None
    spec: Mapping[str, object] | None = None
    fingerprint: str | None = "none"


def _split(value: str) -> tuple[str, ...]:
    return tuple(v.strip() for v in value.split(";") if v.strip())


def _normalise_pattern(pattern: str) -> str:
    p = pattern.strip().replace("\\", "/")
    while p.startswith("./"):
        p = p[2:]
    return p


def _check_entry(pattern: str, spec: dict[str, object], index: str, where: str) -> IndexEntry:
    """Check an entry as the audit would check a spec (columns are checked per file)."""
    from replicheck.claim import build_claim

    if not pattern:
        raise InputError(f"spec index {index}, {where}: the file name is empty")
    try:
        build_claim(
            response=None,
            treatments=(),
            unit=None,
            claim_text=None,
            alpha=None,
            na_values=(),
            sheet=None,
            spec=spec,
            spec_path=f"spec index {index}, {where}",
        )
    except InputError as err:
        msg = err.message  # options still neutral: the reader's syntax is chosen later
        prefix = f"spec index {index}, {where}"
        raise InputError(msg if prefix in msg else f"{prefix}: {msg}") from None
    return IndexEntry(_normalise_pattern(pattern), spec, where)


def _read_csv_index(text: str, label: str, delimiter: str) -> list[IndexEntry]:
    lines = text.splitlines()
    if lines and delimiter == "," and "," not in lines[0] and ";" in lines[0]:
        raise InputError(
            f"spec index {label} looks semicolon-separated: write it comma-separated "
            "(';' separates several treatments or claims within a cell)"
        )
    reader = csv.reader(io.StringIO(text), delimiter=delimiter)
    try:
        rows = list(reader)
    except csv.Error as err:
        raise InputError(f"spec index {label} is not readable CSV: {err}") from None
    if not rows:
        raise InputError(f"spec index {label} is empty")
    header = [h.strip().lower() for h in rows[0]]
    unknown = [h for h in header if h not in INDEX_COLUMNS]
    if unknown:
        raise InputError(
            f"spec index {label}: unknown column {', '.join(repr(u) for u in unknown)}; "
            f"allowed columns: {', '.join(INDEX_COLUMNS)}"
        )
    if "file" not in header:
        raise InputError(f"spec index {label} has no 'file' column")
    if len(set(header)) != len(header):
        raise InputError(f"spec index {label}: a column name appears twice in the header")
    entries: list[IndexEntry] = []
    for number, row in enumerate(rows[1:], start=2):
        if not any(cell.strip() for cell in row):
            continue
        where = f"line {number}"
        if len(row) > len(header):
            raise InputError(f"spec index {label}, {where}: more cells than header columns")
        cells = dict(zip(header, (c.strip() for c in row), strict=False))
        spec: dict[str, object] = {}
        for key, value in cells.items():
            if key == "file" or not value:
                continue
            if key in LIST_KEYS:
                spec[key] = list(_split(value))
            elif key in SETTING_KEYS:
                setting = option_field(key)
                spec[key] = setting.from_text(value)
                if setting.kind in ("number", "whole") and isinstance(spec[key], str):
                    raise InputError(
                        f"spec index {label}, {where}: {key} must be a number, got {value!r}"
                    )
            else:
                spec[key] = value
        entries.append(_check_entry(cells.get("file", ""), spec, label, where))
    return entries


def _read_toml_index(text: str, label: str) -> list[IndexEntry]:
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise InputError(f"spec index {label} is not valid TOML: {err}") from None
    entries: list[IndexEntry] = []
    for pattern, spec in data.items():
        where = f"table {pattern!r}"
        if not isinstance(spec, dict):
            raise InputError(
                f"spec index {label}: {pattern!r} must be a table of spec keys, e.g. "
                f'["{pattern}"] followed by response = ... lines'
            )
        entries.append(_check_entry(pattern, dict(spec), label, where))
    return entries


def load_index(path: str | os.PathLike[str]) -> SpecIndex:
    """Read and check a spec index (``.csv``, ``.tsv`` or ``.toml``).

    Raises :class:`InputError` for a missing or unreadable index, an unknown
    column or key, a bad entry, or two entries naming the same file.
    """
    p = Path(path)
    label = str(path)
    suffix = p.suffix.lower()
    if suffix not in (".csv", ".tsv", ".toml"):
        raise InputError(f"spec index {label}: expected a .csv, .tsv or .toml file")
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        raise InputError(f"spec index not found: {label}") from None
    except OSError as err:
        raise InputError(f"cannot read spec index {label}: {err.strerror or err}") from None
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise InputError(f"spec index {label} is not UTF-8 text") from None
    if suffix == ".toml":
        entries = _read_toml_index(text, label)
    else:
        entries = _read_csv_index(text, label, "\t" if suffix == ".tsv" else ",")
    seen: dict[str, str] = {}
    for e in entries:
        if e.pattern in seen:
            raise InputError(
                f"spec index {label}: {e.pattern!r} is given twice "
                f"({seen[e.pattern]} and {e.where})"
            )
        seen[e.pattern] = e.where
    return SpecIndex(label, tuple(entries))


def _fingerprint(data: object) -> str:
    text = json.dumps(data, sort_keys=True, ensure_ascii=True, default=list)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def choose_spec(
    data_path: str | os.PathLike[str], names: Sequence[str], index: SpecIndex | None
) -> SpecChoice:
    """The spec for one file: an index entry, else the spec file beside it, else none."""
    entry = index.lookup(names) if index is not None else None
    if entry is not None:
        spec = {k: list(v) if isinstance(v, tuple | list) else v for k, v in entry.spec.items()}
        return SpecChoice("index", index.path if index else None, spec, _fingerprint(spec))
    beside = spec_beside(data_path)
    if beside is not None:
        try:
            digest: str | None = hashlib.sha256(beside.read_bytes()).hexdigest()
        except OSError:
            digest = None
        fingerprint = None if digest is None else _fingerprint(["beside", beside.name, digest])
        return SpecChoice("beside", str(beside), None, fingerprint)
    return SpecChoice("none")
