"""Sentences of the reports: articles, counts, and the design effect of 1.

The expected articles follow English usage (an before a vowel sound), as in any
style guide (common practice); the scenario data are invented.
"""

from __future__ import annotations

import re

import pandas as pd
import pytest

from replicheck.api import audit
from replicheck.words import article, counted, with_article


@pytest.mark.parametrize(
    ("word", "expected"),
    [
        ("individual", "an"),
        ("avg.IQ.ver.cen", "an"),
        ("enclosure", "an"),
        ("unit", "a"),
        ("user", "a"),
        ("one-way", "a"),
        ("hour", "an"),
        ("tank", "a"),
        ("plot", "a"),
        ("'orchard'", "an"),
        ("F", "an"),
        ("t", "a"),
        ("S-shaped", "an"),
    ],
)
def test_article(word: str, expected: str) -> None:
    assert article(word) == expected


def test_counted_and_with_article() -> None:
    assert counted(1, "tank") == "1 tank" and counted(2, "tank") == "2 tanks"
    assert counted(1_200, "row") == "1,200 rows"
    assert with_article("individual") == "an individual"


def test_a_design_effect_of_one_is_said_in_words() -> None:
    """Invented: two diets, three tanks each, fish alike across tanks (no tank effect).
    The summary must not say 'about 18, not 18'."""
    lengths = [51.2, 49.8, 50.1, 50.5, 52.0, 51.0, 49.5, 50.2, 51.9]
    rows = [("control", f"T{1 + i // 3}", v) for i, v in enumerate(lengths)]
    rows += [("enriched", f"T{4 + i // 3}", v + 5) for i, v in enumerate(lengths[::-1])]
    frame = pd.DataFrame(rows, columns=["diet", "tank", "length"])
    summary = audit(frame, response="length", treatment="diet").to_dict()["verdict"]["summary"]
    assert "effectively independent" in summary
    assert not re.search(r"about (\d+), not \1\b", summary)
    assert "within a tank" in summary
