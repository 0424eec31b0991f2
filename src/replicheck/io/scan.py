"""Look at a file without holding it: its first bytes, its hash, its encoding facts.

:func:`probe_file` reads the first and last bytes (enough to tell the format
and to sniff a text file); :func:`scan_file` then reads the whole file once in
fixed-size chunks, feeding each chunk to SHA-256 and, for text, to an
:class:`~replicheck.io.text.EncodingScanner`. Memory stays at one chunk
whatever the file size.
"""

from __future__ import annotations

import hashlib
import stat
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from replicheck.errors import InputError
from replicheck.io.text import EncodingScan, EncodingScanner

#: Bytes read from the start of a file to tell its format and sniff its text.
HEAD_BYTES = 1 << 20
#: Bytes read at a time when hashing or scanning a whole file.
CHUNK_BYTES = 4 << 20

#: ``progress(done, total)``: units of work done so far and in all.
ProgressCallback = Callable[[int, int], None]


@dataclass(frozen=True)
class FileStart:
    """The size of a file, its first :data:`HEAD_BYTES` and its last four bytes."""

    size: int
    head: bytes
    tail: bytes


@dataclass(frozen=True)
class FileScan:
    """One pass over a whole file: its SHA-256 and, for text, its encoding facts."""

    sha256: str
    encodings: EncodingScan | None


class Meter:
    """Forwards progress to an optional callback, at most about 200 calls a read.

    ``done`` never goes backwards: a pass that starts again (a retry) is not
    reported until it overtakes the furthest point reached.
    """

    def __init__(self, callback: ProgressCallback | None, total: int) -> None:
        self._callback = callback
        self.total = max(total, 0)
        self._step = max(self.total // 200, 1)
        self._done = 0
        self._reported = -1

    def to(self, done: int) -> None:
        """Report that ``done`` units are finished (clamped to the total)."""
        done = min(max(done, self._done), self.total)
        self._done = done
        if self._callback is None:
            return
        if done - self._reported >= self._step or (done == self.total and self._reported != done):
            self._reported = done
            self._callback(done, self.total)

    def finish(self) -> None:
        """Report the total as done."""
        self.to(self.total)


def _cannot_read(label: str, exc: OSError) -> InputError:
    return InputError(f"{label}: cannot read the file ({exc.strerror or exc})")


def probe_file(path: Path, label: str) -> FileStart:
    """Size, head and tail of ``path``; :class:`InputError` when it cannot be a data file.

    Only regular files are read (after following symlinks): a device such as
    /dev/zero never ends and a named pipe blocks, so both are refused.
    """
    try:
        mode = path.stat().st_mode
    except FileNotFoundError:
        raise InputError(f"{label}: file not found") from None
    except OSError as exc:  # a name longer than the file system allows, a loop of links
        raise _cannot_read(label, exc) from None
    if stat.S_ISDIR(mode):
        raise InputError(f"{label}: is a directory, not a data file")
    if not stat.S_ISREG(mode):
        raise InputError(
            f"{label}: not a regular file (a device, a named pipe or a socket); "
            "replicheck reads only files"
        )
    try:
        with path.open("rb") as handle:
            size = handle.seek(0, 2)
            handle.seek(0)
            head = handle.read(HEAD_BYTES)
            if size > len(head):
                handle.seek(max(size - 4, 0))
                tail = handle.read(4)
            else:
                tail = head[-4:]
    except OSError as exc:
        raise _cannot_read(label, exc) from exc
    if not head:
        raise InputError(f"{label}: the file is empty (0 bytes)")
    return FileStart(size, head, tail)


def scan_file(path: Path, start: FileStart, label: str, meter: Meter, *, text: bool) -> FileScan:
    """Hash the whole file in chunks; with ``text``, also check its encodings."""
    digest = hashlib.sha256()
    scanner = EncodingScanner(start.head, start.size) if text else None
    done = 0
    try:
        with path.open("rb") as handle:
            while chunk := handle.read(CHUNK_BYTES):
                digest.update(chunk)
                if scanner is not None:
                    scanner.update(chunk)
                done += len(chunk)
                meter.to(done)
    except OSError as exc:
        raise _cannot_read(label, exc) from exc
    return FileScan(digest.hexdigest(), scanner.finish() if scanner is not None else None)


def scan_encodings(path: Path, start: FileStart, label: str) -> EncodingScan:
    """The encoding facts of the whole file, without hashing it."""
    scanner = EncodingScanner(start.head, start.size)
    try:
        with path.open("rb") as handle:
            while chunk := handle.read(CHUNK_BYTES):
                scanner.update(chunk)
    except OSError as exc:
        raise _cannot_read(label, exc) from exc
    return scanner.finish()
