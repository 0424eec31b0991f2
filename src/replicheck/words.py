"""Small helpers for the sentences of the reports: articles and plurals.

>>> article("individual"), article("unit"), article("hour"), article("tank")
('an', 'a', 'an', 'a')
>>> counted(1, "unit"), counted(12, "unit")
('1 unit', '12 units')
"""

from __future__ import annotations

import re

# words spelled with a vowel but said with a consonant, and the reverse
_CONSONANT_SOUND = re.compile(r"^(uni|use|usu|ura|ure|uro|eu|ewe|one|once|ubi)", re.IGNORECASE)
_VOWEL_SOUND = re.compile(r"^(hour|honest|honou?r|heir)", re.IGNORECASE)


def article(word: str) -> str:
    """``"an"`` before a vowel sound, else ``"a"`` (by spelling, with the common
    exceptions: a unit, a user, a one-way; an hour, an honest; a letter by the
    sound of its name: an F test, a t test)."""
    text = word.strip().lstrip("'\"(")
    if not text:
        return "a"
    if len(text) == 1 or (len(text) > 1 and not text[1].isalpha()):  # a letter said by name
        return "an" if text[0].upper() in "AEFHILMNORSX" else "a"
    if _VOWEL_SOUND.match(text):
        return "an"
    if _CONSONANT_SOUND.match(text):
        return "a"
    return "an" if text[0].lower() in "aeiou" else "a"


def with_article(word: str) -> str:
    """``"an individual"``, ``"a tank"``."""
    return f"{article(word)} {word}"


def counted(n: int, word: str, plural: str | None = None) -> str:
    """``"1 unit"``, ``"3 units"`` (``plural`` for irregular words)."""
    return f"{n:,} {word if n == 1 else (plural or word + 's')}"


def joined(items: list[str], last: str = "and") -> str:
    """``"a"``, ``"a and b"``, ``"a, b and c"``."""
    if len(items) <= 1:
        return "".join(items)
    return f"{', '.join(items[:-1])} {last} {items[-1]}"
