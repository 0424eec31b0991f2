"""Settings of one audit besides the columns: one table read by every entry point.

:data:`OPTION_FIELDS` is the one table of the settings: the significance
level, the seed of the random steps, the power and effect of the "what a valid
design would need" figures, the hidden-grouping scans, the reading of
ambiguous dates and the processing order. The command line builds its options
from it (``--alpha``, ``--seed``, ...), the spec file and the screening index
take its keys, and :func:`replicheck.api.audit` its keywords; adding a setting
means adding a row here and reading it where it acts.

:func:`stated_options` checks every value before any data are read and
remembers where each came from: the options (the command line, or the keyword
arguments of :func:`replicheck.api.audit`), a spec file or a screening index
entry, or the default. A value given as an option replaces the spec's, as a
stated role does (:mod:`replicheck.roles`).
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Callable, Mapping
from dataclasses import dataclass

from replicheck.defaults import DEFAULT_SEED
from replicheck.errors import InputError, kind_of

__all__ = [
    "DATES",
    "DEFAULT_SOURCE",
    "OPTIONS_SOURCE",
    "OPTION_FIELDS",
    "OptionField",
    "Options",
    "option_field",
    "stated_options",
]

#: How ambiguous dates (04/03/2026) are read: decided from the data, day first or month first.
DATES = ("auto", "day-first", "month-first")
#: Where a value came from when nobody stated it.
DEFAULT_SOURCE = "default"
#: Where a value came from when the command line or a keyword argument gave it.
OPTIONS_SOURCE = "in the options"

_TRUE = ("true", "yes", "on", "1")
_FALSE = ("false", "no", "off", "0")


def _at(where: str) -> str:
    """`` (in spec.toml)`` after a message about a value a spec gave; nothing for an option."""
    return f" ({where.strip()})" if where else ""


def _real(value: object) -> bool:
    return isinstance(value, numbers.Real) and not isinstance(value, bool)


def _alpha(value: object, where: str) -> float:
    if not _real(value):
        raise InputError(f"'alpha'{where} must be a number, not {kind_of(value)}")
    a = float(value)  # type: ignore[arg-type]
    if not 0 < a < 1:
        raise InputError(
            f"alpha must be a number between 0 and 1 (exclusive), got {value!r}{_at(where)}"
        )
    return a


def _seed(value: object, where: str) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or int(value) < 0:
        raise InputError(f"the seed must be a whole number of 0 or more, got {value!r}{_at(where)}")
    return int(value)


def _power(value: object, where: str) -> float:
    if not _real(value) or not 0 < float(value) < 1:  # type: ignore[arg-type]
        raise InputError(
            f"power must be a number between 0 and 1 (exclusive), got {value!r}{_at(where)}"
        )
    return float(value)  # type: ignore[arg-type]


def _effect(value: object, where: str) -> float:
    x = float(value) if _real(value) else math.nan  # type: ignore[arg-type]
    if not (math.isfinite(x) and x > 0):
        raise InputError(
            f"the effect to detect must be a positive number, got {value!r}{_at(where)}"
        )
    return x


def _hidden(value: object, where: str) -> bool:
    if isinstance(value, str) and value.strip().casefold() in (*_TRUE, *_FALSE):
        return value.strip().casefold() in _TRUE  # as written in a cell of a screening index
    if not isinstance(value, bool):
        raise InputError(f"'hidden'{where} must be true or false, not {kind_of(value)}")
    return value


def _dates(value: object, where: str) -> str:
    if value not in DATES:
        raise InputError(f"'dates'{where} must be one of {', '.join(DATES)}, not {value!r}")
    return str(value)


def _order(value: object, where: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise InputError(f"'order'{where} must be a column name, not {kind_of(value)}")
    return value.strip()


def _number_text(text: str) -> object:
    """A number as written in a cell of a screening index (else the text, refused later)."""
    try:
        return int(text)
    except ValueError:
        pass
    try:
        return float(text)
    except ValueError:
        return text


@dataclass(frozen=True)
class OptionField:
    """One setting: its key (spec, index, audit() keyword), option, check and help."""

    key: str  # spec and index key, audit() keyword (``dates`` is ``dayfirst`` there)
    option: str  # command-line option (``--hidden/--no-hidden`` for a yes/no setting)
    metavar: str | None
    kind: str  # number | whole | flag | choice | column: how the command line reads it
    default: object
    check: Callable[[object, str], object]  # a checked value, or InputError naming where
    help: str  # for the command line and the docs

    def from_text(self, text: str) -> object:
        """The value written in a cell of a screening index, before it is checked."""
        return _number_text(text) if self.kind in ("number", "whole") else text


OPTION_FIELDS: tuple[OptionField, ...] = (
    OptionField(
        "alpha", "--alpha", "A", "number", 0.05, _alpha, "Significance level (default 0.05)."
    ),
    OptionField(
        "seed",
        "--seed",
        "N",
        "whole",
        DEFAULT_SEED,
        _seed,
        "Seed of the random steps (Monte Carlo randomisation test, wild cluster bootstrap); "
        f"default {DEFAULT_SEED}.",
    ),
    OptionField(
        "power",
        "--power",
        "P",
        "number",
        0.8,
        _power,
        "Power the 'what a valid design would need' figures aim for (default 0.8).",
    ),
    OptionField(
        "effect",
        "--effect",
        "D",
        "number",
        None,
        _effect,
        "Difference between two level means (in the response's units) the design should "
        "detect; default: the observed differences.",
    ),
    OptionField(
        "hidden",
        "--hidden/--no-hidden",
        None,
        "flag",
        True,
        _hidden,
        "Look for groupings no column names: sessions in time stamps, zones in coordinates, "
        "runs in the processing order, tokens of sample codes, covariates constant within "
        "unrecorded units (default: look).",
    ),
    OptionField(
        "dates",
        "--dates",
        None,
        "choice",
        "auto",
        _dates,
        "How to read dates such as 04/03/2026 when both readings fit (default auto: the "
        "reading that fits every value, month first when both do).",
    ),
    OptionField(
        "order",
        "--order",
        "COL",
        "column",
        None,
        _order,
        "Column giving the order in which samples were processed (default: a sequence "
        "column if one is found, else the file order).",
    ),
)


def option_field(key: str) -> OptionField:
    """The field of a setting."""
    for f in OPTION_FIELDS:
        if f.key == key:
            return f
    raise KeyError(key)


@dataclass(frozen=True)
class Options:
    """Every setting of one audit, checked, with where each value came from."""

    alpha: float = 0.05
    seed: int = DEFAULT_SEED
    power: float = 0.8
    effect: float | None = None
    hidden: bool = True
    dates: str = "auto"
    order: str | None = None
    sources: tuple[tuple[str, str], ...] = ()  # (key, source) for every field

    def source(self, key: str) -> str:
        """Where the setting's value came from: the options, a spec, or the default."""
        return dict(self.sources).get(key, DEFAULT_SOURCE)

    @property
    def dayfirst(self) -> bool | None:
        """Dates read day first (True), month first (False) or as the data allow (None)."""
        return None if self.dates == "auto" else self.dates == "day-first"

    def to_list(self) -> list[dict[str, object]]:
        """Each setting's value and source, in the table's order (the report's JSON)."""
        return [
            {"name": f.key, "value": getattr(self, f.key), "source": self.source(f.key)}
            for f in OPTION_FIELDS
        ]


def stated_options(
    given: Mapping[str, object],
    *,
    spec: Mapping[str, object] | None = None,
    spec_source: str = "in the spec",
) -> Options:
    """The settings from the options (``given``: None means not given) and a spec, checked.

    A value given as an option replaces the spec's; a setting given by neither
    takes the default of :data:`OPTION_FIELDS`.
    """
    unknown = sorted(set(given) - {f.key for f in OPTION_FIELDS})
    if unknown:
        raise KeyError(", ".join(unknown))  # a caller's bug, not the user's
    values: dict[str, object] = {}
    sources: list[tuple[str, str]] = []
    for f in OPTION_FIELDS:
        value, source = given.get(f.key), OPTIONS_SOURCE
        if value is None and spec is not None:
            value, source = spec.get(f.key), spec_source
        if value is None:
            values[f.key], source = f.default, DEFAULT_SOURCE
        else:
            where = "" if source == OPTIONS_SOURCE else f" {source}"
            values[f.key] = f.check(value, where)
        sources.append((f.key, source))
    return Options(**values, sources=tuple(sources))  # type: ignore[arg-type]
