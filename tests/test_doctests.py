"""The examples in the docstrings run and print what they say.

Every module of the package whose docstrings hold an example (a ``>>>`` line not
marked ``+SKIP``) is found by reading the source, so a new example is run without
being listed here.
"""

from __future__ import annotations

import doctest
import importlib
from pathlib import Path

import pytest

SRC = Path(__file__).resolve().parents[1] / "src"


def _modules_with_examples() -> list[str]:
    names = []
    for path in sorted((SRC / "replicheck").rglob("*.py")):
        lines = path.read_text(encoding="utf-8").splitlines()
        # examples marked +SKIP (they need files or a network) are not run
        if not any(">>>" in line and "+SKIP" not in line for line in lines):
            continue
        parts = path.relative_to(SRC).with_suffix("").parts
        if parts[-1] == "__init__":
            parts = parts[:-1]
        names.append(".".join(parts))
    return names


MODULES = _modules_with_examples()


def test_examples_are_found() -> None:
    # the search itself: api.audit's example, numbers and the glossary hold some
    assert {"replicheck.api", "replicheck.numbers", "replicheck.glossary"} <= set(MODULES)


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name: str) -> None:
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0, f"{name} has '>>>' but no example doctest could find"
    assert result.failed == 0, f"{name}: {result.failed} of {result.attempted} examples failed"
