"""How numbers are written in findings and reports (one style everywhere)."""

from __future__ import annotations


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
