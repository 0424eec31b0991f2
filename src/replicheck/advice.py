"""Advice that names an option, in the syntax of whoever reads it.

The stages advise ("state the unit", "turn the search off") without knowing
whether the audit came from the command line or from Python. They write each
mention of an option with :func:`option`, a neutral marker in the text, and the
report and error messages render the markers when they are read:

* ``cli``: ``--unit tank``, ``--no-hidden``, ``--dates day-first``;
* ``api``: ``unit='tank'``, ``hidden=False``, ``dayfirst=True``, the keyword
  arguments of :func:`replicheck.api.audit`.

A Python caller gets the ``api`` form (``Report.to_dict()``, ``str(InputError)``);
the command line renders ``cli`` (its JSON output included). A marker is
``⟦name⟧`` or ``⟦name=value⟧`` with the value as a JSON string, so any column
name survives; the proofreader treats a marker left in a rendered text as a
fault. Standard library only.

>>> text = "state the unit (" + option("unit", "tank id") + ")"
>>> render(text, "cli")
"state the unit (--unit 'tank id')"
>>> render(text, "api")
"state the unit (unit='tank id')"
>>> render(option("hidden", False), "cli"), render(option("hidden", False), "api")
('--no-hidden', 'hidden=False')
"""

from __future__ import annotations

import json
import re
import shlex
from collections.abc import Mapping
from typing import Any, Literal

__all__ = ["MARKER", "Syntax", "option", "render", "render_all"]

Syntax = Literal["cli", "api"]

#: Matches one marker; group 1 is the option's name, group 2 its JSON value (or None).
MARKER = re.compile(r"⟦([a-z_-]+)(?:=((?:\"(?:[^\"\\]|\\.)*\")|true|false|-?\d+))?⟧")

# option name -> (command-line flag, API keyword); a boolean option's command-line
# form is its own flag when true and its "no-" flag when false
_OPTIONS: dict[str, tuple[str, str]] = {
    "unit": ("--unit", "unit"),
    "unit-labels": ("--unit-labels", "unit_labels"),
    "block": ("--block", "block"),
    "within": ("--within", "within"),
    "covariate": ("--covariate", "covariate"),
    "ignore": ("--ignore", "ignore"),
    "treatment": ("--treatment", "treatment"),
    "response": ("--response", "response"),
    "formula": ("--formula", "formula"),
    "order": ("--order", "order"),
    "sheet": ("--sheet", "sheet"),
    "range": ("--range", "cell_range"),
    "long": ("--long", "long"),
    "id": ("--id", "ids"),
    "fill-down": ("--fill-down", "fill_down"),
    "na": ("--na", "na"),
    "family": ("--family", "family"),
    "hidden": ("--hidden", "hidden"),
    "dayfirst": ("--dates", "dayfirst"),
}
# command-line forms of boolean options that are not "--X" / "--no-X"
_BOOLEAN_FLAGS = {
    ("hidden", False): "--no-hidden",
    ("fill-down", False): "--no-fill-down",
    ("dayfirst", True): "--dates day-first",
    ("dayfirst", False): "--dates month-first",
}


def option(name: str, value: str | bool | int | None = None) -> str:
    """A neutral mention of an option (and the value to give it) for a message."""
    if name not in _OPTIONS and name != "limit":
        raise ValueError(f"unknown option {name!r}")
    if value is None:
        return f"⟦{name}⟧"
    return f"⟦{name}={json.dumps(value)}⟧"


def _cli(name: str, value: Any) -> str:
    if isinstance(value, bool):
        return _BOOLEAN_FLAGS.get((name, value), f"--{name}" if value else f"--no-{name}")
    if name == "limit":
        return "--limit KEY=N" if value is None else f"--limit {value}=N"
    flag = _OPTIONS[name][0]
    return flag if value is None else f"{flag} {shlex.quote(str(value))}"


def _api(name: str, value: Any) -> str:
    if name == "limit":
        return "limits={KEY: N}" if value is None else f"limits={{{str(value)!r}: N}}"
    keyword = _OPTIONS[name][1]
    return f"{keyword}=..." if value is None else f"{keyword}={value!r}"


def render(text: str, syntax: Syntax) -> str:
    """The text with every marker written in ``syntax``."""
    if "⟦" not in text:
        return text
    form = _cli if syntax == "cli" else _api

    def one(m: re.Match[str]) -> str:
        value = None if m.group(2) is None else json.loads(m.group(2))
        return form(m.group(1), value)

    return MARKER.sub(one, text)


def render_all(doc: Any, syntax: Syntax) -> Any:
    """A plain document (dicts, lists, texts) with every text rendered."""
    if isinstance(doc, str):
        return render(doc, syntax)
    if isinstance(doc, list):
        return [render_all(v, syntax) for v in doc]
    if isinstance(doc, tuple):
        return tuple(render_all(v, syntax) for v in doc)
    if isinstance(doc, Mapping):
        return {k: render_all(v, syntax) for k, v in doc.items()}
    return doc
