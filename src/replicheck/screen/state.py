"""Resumption: remember finished files so that a later run need not redo them.

The state lives in ``DIR/.screen-state.json``. Each finished file is stored
under a key that hashes everything the result depends on: the file's
content (SHA-256), its name in the summary, the spec's content (the index
entry, or the bytes of the spec file beside it), ``--guess``, ``--seed``,
``--alpha`` and the replicheck version. A file whose key is in the state, and
whose reports are still in ``DIR/reports``, is not redone.

Only results that the same input always gives are stored: audit verdicts,
``needs-spec`` and ``error``. ``timeout``, ``unreadable`` and ``internal-error``
depend on the machine and are retried; ``too-large`` is decided without reading the file.
Every finished file is appended at once to a journal beside the state
(``.screen-state.journal``, one JSON line per file); the state itself is
rewritten at most once a second and at the end, by replacing the file whole,
after which the journal is emptied. A run killed at any moment (even SIGKILL)
therefore loses no finished file: the next run reads the state, then the
journal (a line cut short by the kill is skipped).
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from replicheck import __version__

STATE_NAME = ".screen-state.json"
JOURNAL_NAME = ".screen-state.journal"
STATE_VERSION = 1
CACHED_STATUSES = frozenset(
    {"ok", "pseudoreplicated", "confounded", "unclear", "needs-spec", "error"}
)


def file_sha256(path: Path, chunk: int = 1 << 20) -> str:
    """SHA-256 of a file's bytes, read in chunks (the file is opened read-only)."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        while block := f.read(chunk):
            h.update(block)
    return h.hexdigest()


def task_key(
    *,
    name: str,
    sha256: str,
    spec_fingerprint: str,
    guess: bool,
    seed: int | None,
    alpha: float | None,
) -> str:
    """The key of one file's result in the state."""
    parts = {
        "state": STATE_VERSION,
        "replicheck": __version__,
        "name": name,
        "sha256": sha256,
        "spec": spec_fingerprint,
        "guess": guess,
        "seed": seed,
        "alpha": alpha,
    }
    text = json.dumps(parts, sort_keys=True)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def load_state(out_dir: Path) -> tuple[dict[str, dict[str, Any]], str | None]:
    """The stored entries (state, then journal), and a warning when a state file exists
    but cannot be used."""
    path = out_dir / STATE_NAME
    entries: dict[str, dict[str, Any]] = {}
    warning = None
    if path.exists():
        try:
            doc = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, json.JSONDecodeError):
            doc = None
            warning = f"ignoring unreadable state file {path}; every file is screened afresh"
        if isinstance(doc, dict) and doc.get("version") == STATE_VERSION:
            stored = doc.get("entries")
            if isinstance(stored, dict):
                entries = {k: v for k, v in stored.items() if isinstance(v, dict)}
    if warning is None:
        entries.update(_journal(out_dir / JOURNAL_NAME))
    return entries, warning


def _journal(path: Path) -> dict[str, dict[str, Any]]:
    """The entries appended to the journal; lines that are not whole entries are skipped."""
    out: dict[str, dict[str, Any]] = {}
    try:
        lines = path.read_bytes().splitlines()
    except OSError:
        return out
    for line in lines:
        try:
            item = json.loads(line.decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError):
            continue
        if (
            isinstance(item, dict)
            and item.get("version") == STATE_VERSION
            and isinstance(item.get("key"), str)
            and isinstance(item.get("entry"), dict)
        ):
            out[item["key"]] = item["entry"]
    return out


class StateWriter:
    """Writes the state file, at most once per ``interval`` seconds until :meth:`flush`."""

    def __init__(self, out_dir: Path, entries: Mapping[str, dict[str, Any]], interval: float = 1.0):
        self.path = out_dir / STATE_NAME
        self.journal = out_dir / JOURNAL_NAME
        self.entries: dict[str, dict[str, Any]] = dict(entries)
        self.interval = interval
        self._last = 0.0

    def add(self, key: str, entry: dict[str, Any]) -> None:
        self.entries[key] = entry
        line = json.dumps({"version": STATE_VERSION, "key": key, "entry": entry}, sort_keys=True)
        with open(self.journal, "a", encoding="utf-8") as f:
            f.write("\n" + line + "\n")  # a line cut short by a kill stays on its own line
        if time.monotonic() - self._last >= self.interval:
            self.flush()

    def flush(self, keep: set[str] | None = None) -> None:
        """Write the state; with ``keep``, only those entries (the end of a run)."""
        if keep is not None:
            self.entries = {k: v for k, v in self.entries.items() if k in keep}
        doc = {"version": STATE_VERSION, "entries": self.entries}
        tmp = self.path.with_name(self.path.name + ".tmp")
        tmp.write_text(json.dumps(doc, indent=1, sort_keys=True), encoding="utf-8")
        os.replace(tmp, self.path)
        with open(self.journal, "w", encoding="utf-8"):
            pass  # everything in it is now in the state
        self._last = time.monotonic()
