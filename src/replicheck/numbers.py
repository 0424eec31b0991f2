"""How numbers are written in findings and reports (one style everywhere)."""

from __future__ import annotations

import math


def format_p(p: float | None) -> str:
    """A p-value: '0.118', '0.0031', '<0.0001', or '-' when there is none."""
    if p is None:
        return "-"
    if p < 1e-4:
        return "<0.0001"
    return f"{p:.2g}" if p < 0.01 else f"{p:.3f}"


def p_phrase(p: float | None) -> str:
    """A p-value in a sentence: 'p = 0.118', 'p < 0.0001' or 'p not available'."""
    if p is None:
        return "p not available"
    text = format_p(p)
    return f"p {text[0]} {text[1:]}" if text.startswith("<") else f"p = {text}"


def count_text(n: int) -> str:
    """A count: exact up to 15 digits, else like '1.2e+4301' (the number of
    assignments of thousands of units has thousands of digits)."""
    if n < 10**15:
        return str(n)
    log = log10_count(n)
    return f"{10 ** (log - math.floor(log)):.1f}e+{math.floor(log)}"


def log10_count(n: int) -> float:
    """log10 of a positive integer of any size."""
    bits = n.bit_length()
    if bits <= 1000:
        return math.log10(n)
    shift = bits - 64
    return math.log10(n >> shift) + shift * math.log10(2)
