"""How numbers are written in findings and reports (one style everywhere).

The rule, in every format (stated in docs/report-schema.md, "How numbers are
written"):

* estimates and statistics (F, t, chi-squared, ICC, variances, design effects,
  effective sample sizes, differences and their interval bounds): three significant
  digits, keeping every digit of the whole-number part (2287, not 2.29e+03); below
  0.0001 in scientific notation (3.41e-06);
* p-values: three decimals from 0.01 up, two significant digits below, and
  "< 0.0001" below that;
* degrees of freedom: whole numbers, or three significant digits when fractional
  (Satterthwaite and similar approximations);
* counts: whole numbers;
* one exception: a figure of the data set beside a reported one to check it
  (the reading of the reported df, the reported-result findings) keeps four
  significant digits for a statistic and three for a p-value, so that it can
  be compared with a value printed to two decimals; the reported value is
  written as it was given (:func:`beside_reported`, :func:`p_beside`,
  :func:`plain`).
"""

from __future__ import annotations

import math


def format_p(p: float | None) -> str:
    """A p-value: '0.118', '0.0031', '<0.0001', or '-' when there is none."""
    if p is None:
        return "-"
    if p < 1e-4:
        return "<0.0001"
    return f"{p:.2g}" if p < 0.01 else f"{p:.3f}"


def format_number(x: float | None, digits: int = 3) -> str:
    """An estimate or statistic to ``digits`` significant digits, keeping the whole part.

    >>> [format_number(v) for v in (2287.4, 15.0, 11.514, 0.03236, 0.4339, 0.0, -1.2345)]
    ['2287', '15.0', '11.5', '0.0324', '0.434', '0', '-1.23']
    >>> format_number(3.4e-06), format_number(9.9996), format_number(None)
    ('3.40e-06', '10.0', '-')
    """
    if x is None or not math.isfinite(x):
        return "-"
    if x == 0:
        return "0"
    a = abs(x)
    if a < 1e-4:
        return f"{x:.{digits - 1}e}"
    if a >= 10 ** (digits - 1):
        return f"{x:.0f}"
    decimals = digits - 1 - math.floor(math.log10(a))
    text = f"{x:.{decimals}f}"
    if len(text.lstrip("-").replace(".", "").lstrip("0")) > digits:  # 9.9996 -> 10.000
        text = f"{x:.{max(decimals - 1, 0)}f}"
    return text


def format_df(df: float) -> str:
    """Degrees of freedom: whole, or three significant digits when fractional."""
    if abs(df - round(df)) < 1e-9:
        return f"{round(df)}"
    return format_number(df)


def p_phrase(p: float | None) -> str:
    """A p-value in a sentence: 'p = 0.118', 'p < 0.0001' or 'p not available'."""
    if p is None:
        return "p not available"
    text = format_p(p)
    return f"p {text[0]} {text[1:]}" if text.startswith("<") else f"p = {text}"


def beside_reported(x: float, digits: int = 4) -> str:
    """A statistic of the data set beside a reported one: four significant digits (three
    where the sentence gives the reported one first).

    >>> beside_reported(17.3512), beside_reported(2.0), beside_reported(17.3512, 3)
    ('17.35', '2', '17.4')
    """
    return f"{x:.{digits}g}"


def p_beside(p: float) -> str:
    """A p-value of the data set beside a reported one: three significant digits.

    >>> p_beside(0.27238), p_beside(3.1e-06)
    ('0.272', '3.1e-06')
    """
    return f"{p:.3g}"


def plain(x: float) -> str:
    """A value written with the digits it has (up to six significant): a reported value
    as it was given, and degrees of freedom compared with reported ones.

    >>> plain(0.001), plain(319.0), plain(21.5)
    ('0.001', '319', '21.5')
    """
    return f"{x:g}"


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
