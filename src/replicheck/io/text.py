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

from replicheck.errors import InputError

DELIMITERS: tuple[str, ...] = (",", ";", "\t", "|")
COMMA_DECIMAL = re.compile(r"^[+-]?\d+,\d+$")
DOT_DECIMAL = re.compile(r"^[+-]?\d*\.\d+$")

_SAMPLE_CHARS = 65536
_SAMPLE_ROWS = 100
_ALLOWED_CONTROLS = frozenset("\t\n\r\x0b\x0c")


def decode_text(raw: bytes, label: str) -> tuple[str, str]:
    """Decode file bytes; return ``(text, encoding)`` or raise :class:`InputError`."""
    if raw.startswith(codecs.BOM_UTF8):
        candidates: tuple[str, ...] = ("utf-8-sig",)
    elif raw.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        candidates = ("utf-16",)
    elif b"\x00" in raw:
        bomless = _bomless_utf16(raw)
        if bomless is None:
            raise InputError(f"{label}: looks like a binary file, not text (it contains NUL bytes)")
        candidates = (bomless,)
    else:
        candidates = ("utf-8", "cp1252", "latin-1")
    for encoding in candidates:
        try:
            text = raw.decode(encoding)
        except UnicodeDecodeError:
            continue
        if _mostly_text(text):
            return text, encoding
        break
    raise InputError(f"{label}: looks like a binary file, not text (it cannot be decoded as text)")


def _bomless_utf16(raw: bytes) -> str | None:
    """``"utf-16-le"``/``"utf-16-be"`` when NULs fill every other byte, else ``None``."""
    head = raw[:4096]
    half = len(head) // 2
    if half == 0 or len(raw) % 2:
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
    file extension (``hint``), then by the number of fields. A file with a
    single column gets ``hint`` or ``","``.
    """
    best: tuple[float, bool, int, int] | None = None
    chosen = hint or ","
    for rank, delimiter in enumerate(DELIMITERS):
        counts = [len(row) for row in _sample_rows(text, delimiter)]
        if not counts or counts[0] < 2:
            continue
        consistency = sum(c == counts[0] for c in counts) / len(counts)
        score = (consistency, delimiter == hint, counts[0], -rank)
        if best is None or score > best:
            best, chosen = score, delimiter
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
    try:
        for row in csv.reader(io.StringIO(text[:_SAMPLE_CHARS]), delimiter=delimiter):
            if len(row) > 1 or (row and row[0].strip()):
                return row
    except csv.Error:
        pass
    return []
