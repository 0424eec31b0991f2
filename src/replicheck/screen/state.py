"""Resumption: remember finished files so that a later run need not redo them.

The state lives in ``DIR/.screen-state.json``. Each finished file is stored
under a key that hashes everything the result depends on: the file's
content (SHA-256), its name in the summary, the spec's content (the index
entry, or the bytes of the spec file beside it), ``--guess``, ``--seed``,
``--alpha`` and the replicheck version. A file whose key is in the state, and
whose reports are still in ``DIR/reports``, is not redone.

Only results that the same input always gives are stored: audit verdicts,
``needs-spec`` and ``error``. ``timeout`` and ``internal-error`` depend on the
machine and are retried; ``too-large`` is decided without reading the file.
The state is written after every finished file (at most once a second) and
at the end, by replacing the file whole, so an interrupted run resumes where
it stopped.
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
    seed: int,
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
    """The stored entries, and a warning when a state file exists but cannot be used."""
    path = out_dir / STATE_NAME
    if not path.exists():
        return {}, None
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError):
        return {}, f"ignoring unreadable state file {path}; every file is screened afresh"
    if not isinstance(doc, dict) or doc.get("version") != STATE_VERSION:
        return {}, None
    entries = doc.get("entries")
    if not isinstance(entries, dict):
        return {}, None
    return {k: v for k, v in entries.items() if isinstance(v, dict)}, None


class StateWriter:
    """Writes the state file, at most once per ``interval`` seconds until :meth:`flush`."""

    def __init__(self, out_dir: Path, entries: Mapping[str, dict[str, Any]], interval: float = 1.0):
        self.path = out_dir / STATE_NAME
        self.entries: dict[str, dict[str, Any]] = dict(entries)
        self.interval = interval
        self._last = 0.0

    def add(self, key: str, entry: dict[str, Any]) -> None:
        self.entries[key] = entry
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
        self._last = time.monotonic()
