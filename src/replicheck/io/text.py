"""Decoding and sniffing of delimited text files.

Encoding is decided by an ordered, deterministic try rather than by statistical
guessing:

1. a byte-order mark decides: ``EF BB BF`` gives ``"utf-8-sig"``; ``FF FE`` or
   ``FE FF`` gives ``"utf-16"`` (what spreadsheet programs write when saving
   "Unicode text");
2. NUL bytes without a byte-order mark mean UTF-16 without a mark when the NULs
   sit on every other byte (ASCII-heavy text), and a binary file otherwise;
3. strict UTF-8;
4. cp1252 (the usual non-UTF-8 export of Western spreadsheet programs), then
   latin-1, which accepts any byte.

Statistical detectors (e.g. charset-normalizer) can pick an exotic code page for
the handful of accented letters typical of a short data file; the ordered try is
reproducible and never does worse than cp1252 on Western text. Text in other
legacy code pages (e.g. Mac Roman, Shift-JIS) is decoded as cp1252 and should be
re-saved as UTF-8.
"""

from __future__ import annotations

import codecs
import csv
import io
import re
from dataclasses import dataclass

from replicheck.errors import InputError

DELIMITERS: tuple[str, ...] = (",", ";", "\t", "|")
COMMA_DECIMAL = re.compile(r"^[+-]?\d+,\d+$")
DOT_DECIMAL = re.compile(r"^[+-]?\d*\.\d+$")

_SAMPLE_CHARS = 65536
_SAMPLE_ROWS = 100
_ALLOWED_CONTROLS = frozenset("\t\n\r\x0b\x0c")
_UTF16_PROBE = 4096
# bytes Python's cp1252 codec cannot decode (unassigned in the code page)
_CP1252_UNDEFINED = (b"\x81", b"\x8d", b"\x8f", b"\x90", b"\x9d")


def encoding_candidates(head: bytes, size: int, has_nul: bool, label: str) -> tuple[str, ...]:
    """The encodings to try, in order, for a file of ``size`` bytes starting with ``head``.

    ``has_nul`` tells whether the file holds a NUL byte anywhere. Raises
    :class:`InputError` for a binary file (NUL bytes that are not UTF-16).
    """
    if head.startswith(codecs.BOM_UTF8):
        return ("utf-8-sig",)
    if head.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        return ("utf-16",)
    if has_nul:
        bomless = _bomless_utf16(head, size)
        if bomless is None:
            raise InputError(f"{label}: looks like a binary file, not text (it contains NUL bytes)")
        return (bomless,)
    return ("utf-8", "cp1252", "latin-1")


def _not_text(label: str) -> InputError:
    return InputError(f"{label}: looks like a binary file, not text (it cannot be decoded as text)")


def decode_text(raw: bytes, label: str) -> tuple[str, str]:
    """Decode file bytes; return ``(text, encoding)`` or raise :class:`InputError`."""
    for encoding in encoding_candidates(raw[:_UTF16_PROBE], len(raw), b"\x00" in raw, label):
        try:
            text = raw.decode(encoding)
        except UnicodeDecodeError:
            continue
        if _mostly_text(text):
            return text, encoding
        break
    raise _not_text(label)


@dataclass(frozen=True)
class EncodingScan:
    """What a pass over a whole file found: NUL bytes, and the encodings that decode it."""

    has_nul: bool
    decodes: frozenset[str]


class EncodingScanner:
    """Checks, chunk by chunk, which candidate encodings decode a whole file.

    Feed every chunk of the file, in order, to :meth:`update`; :meth:`finish`
    then gives the same facts :func:`decode_text` learns from the whole bytes,
    without holding them. UTF-8 is checked only on chunks that are not pure
    ASCII; cp1252 fails exactly on its five undefined bytes.
    """

    def __init__(self, head: bytes, size: int) -> None:
        if head.startswith(codecs.BOM_UTF8):
            candidates: tuple[str, ...] = ("utf-8-sig",)
        elif head.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
            candidates = ("utf-16",)
        else:
            bomless = _bomless_utf16(head, size)
            candidates = ("utf-8", "cp1252", "latin-1") + ((bomless,) if bomless else ())
        self._alive = set(candidates)
        self._decoders = {
            name: codecs.getincrementaldecoder(name)()
            for name in candidates
            if name not in ("cp1252", "latin-1")
        }
        self._has_nul = False

    def update(self, chunk: bytes) -> None:
        """Take the next chunk of the file."""
        if not self._has_nul and chunk.find(b"\x00") >= 0:
            self._has_nul = True
        ascii_only = chunk.isascii()
        for name in list(self._alive):
            if name == "latin-1":
                continue
            if name == "cp1252":
                if not ascii_only and any(chunk.find(b) >= 0 for b in _CP1252_UNDEFINED):
                    self._fail(name)
                continue
            decoder = self._decoders[name]
            if ascii_only and name.startswith("utf-8") and not decoder.getstate()[0]:
                continue
            try:
                decoder.decode(chunk)
            except UnicodeDecodeError:
                self._fail(name)

    def _fail(self, name: str) -> None:
        self._alive.discard(name)

    def finish(self, final: bool = True) -> EncodingScan:
        """The findings; call after the last chunk (``final=False``: more may follow,
        so a character cut at the end is not an error)."""
        for name in list(self._alive):
            if final and name in self._decoders:
                try:
                    self._decoders[name].decode(b"", final=True)
                except UnicodeDecodeError:
                    self._fail(name)
        return EncodingScan(self._has_nul, frozenset(self._alive))


def decode_head(head: bytes, encoding: str, final: bool) -> str:
    """Decode the first bytes of a file; a character cut at the end is left out
    unless ``final`` (the head is the whole file)."""
    return codecs.getincrementaldecoder(encoding)().decode(head, final=final)


def choose_encoding(head: bytes, size: int, scan: EncodingScan, label: str) -> tuple[str, str]:
    """``(head_text, encoding)`` as :func:`decode_text` would decide for the whole file.

    ``head`` is the start of the file (whole when ``size <= len(head)``) and
    ``scan`` what :class:`EncodingScanner` found over all of it. Only the first
    characters are checked for control characters, as in :func:`decode_text`.
    """
    for encoding in encoding_candidates(head[:_UTF16_PROBE], size, scan.has_nul, label):
        if encoding not in scan.decodes:
            continue
        text = decode_head(head, encoding, final=size <= len(head))
        if _mostly_text(text):
            return text, encoding
        break
    raise _not_text(label)


def _bomless_utf16(head: bytes, size: int) -> str | None:
    """``"utf-16-le"``/``"utf-16-be"`` when NULs fill every other byte, else ``None``."""
    head = head[:_UTF16_PROBE]
    half = len(head) // 2
    if half == 0 or size % 2:
        return None
    even_nuls = head[0::2].count(0)
    odd_nuls = head[1::2].count(0)
    if odd_nuls >= 0.7 * half and even_nuls <= 0.05 * half:
        return "utf-16-le"
    if even_nuls >= 0.7 * half and odd_nuls <= 0.05 * half:
        return "utf-16-be"
    return None


def _mostly_text(text: str) -> bool:
    """False when more than 1% of the first characters are control characters."""
    head = text[:_SAMPLE_CHARS]
    controls = sum(1 for ch in head if (ch < " " or ch == "\x7f") and ch not in _ALLOWED_CONTROLS)
    return controls <= 0.01 * max(len(head), 1)


def _sample_rows(text: str, delimiter: str) -> list[list[str]]:
    """The first non-empty records of ``text`` split with ``delimiter``."""
    sample = text[:_SAMPLE_CHARS]
    if len(text) > _SAMPLE_CHARS and "\n" in sample:
        sample = sample[: sample.rindex("\n")]
    rows: list[list[str]] = []
    try:
        for row in csv.reader(io.StringIO(sample), delimiter=delimiter):
            if any(field.strip() for field in row):
                rows.append(row)
            if len(rows) >= _SAMPLE_ROWS:
                break
    except csv.Error:
        pass  # a quoted field cut by the sample end; the rows so far suffice
    return rows


def sniff_delimiter(text: str, hint: str | None = None) -> str:
    """Pick the delimiter among ``, ; TAB |``.

    Each candidate splits the first records; a candidate counts only when the
    header splits into at least two fields. Candidates are ranked by the share
    of records with as many fields as the header, then by agreement with the
    file extension (``hint``), then by the number of fields. When no candidate
    splits half the records like the first (a title line above the header),
    the candidate that splits the most records into the same number (two or
    more) of fields is taken. A file with a single column gets ``hint`` or
    ``","``.
    """
    best: tuple[float, bool, int, int] | None = None
    chosen = hint or ","
    modal: tuple[float, bool, int, int] | None = None
    modal_choice = chosen
    for rank, delimiter in enumerate(DELIMITERS):
        counts = [len(row) for row in _sample_rows(text, delimiter)]
        if not counts:
            continue
        common = max(set(counts), key=lambda c: (counts.count(c), c))
        if common >= 2:
            share = counts.count(common) / len(counts)
            score = (share, delimiter == hint, common, -rank)
            if modal is None or score > modal:
                modal, modal_choice = score, delimiter
        if counts[0] < 2:
            continue
        consistency = sum(c == counts[0] for c in counts) / len(counts)
        score = (consistency, delimiter == hint, counts[0], -rank)
        if best is None or score > best:
            best, chosen = score, delimiter
    if (best is None or best[0] < 0.5) and modal is not None and modal[0] >= 0.5:
        # the first record is not the header (a title line above it): the
        # delimiter that splits most records alike decides
        return modal_choice
    return chosen


def sniff_decimal(text: str, delimiter: str) -> str:
    """``","`` when a non-comma-delimited file writes numbers like ``3,14``.

    Counts data fields of the form ``-12,5`` against fields of the form
    ``-12.5``; a comma never counts when it is the delimiter.
    """
    if delimiter == ",":
        return "."
    comma = dot = 0
    for row in _sample_rows(text, delimiter)[1:]:
        for field in row:
            value = field.strip()
            comma += bool(COMMA_DECIMAL.match(value))
            dot += bool(DOT_DECIMAL.match(value))
    return "," if comma > dot else "."


def first_record(text: str, delimiter: str) -> list[str]:
    """The header: the first non-empty record, split as the parser will split it."""
    # the sample reaches at least to the end of the first line with content, however wide
    start = len(text) - len(text.lstrip())
    newline = re.search(r"[\r\n]", text[start:])
    limit = max(_SAMPLE_CHARS, start + (newline.end() if newline else len(text)) + 1)
    try:
        for row in csv.reader(io.StringIO(text[:limit]), delimiter=delimiter):
            if len(row) > 1 or (row and row[0].strip()):
                return row
    except csv.Error:
        pass
    return []
