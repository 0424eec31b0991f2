"""The one error type for bad input and bad usage.

Every stage raises :class:`InputError` with a single-line message when the
input cannot be used. The command-line layer prints that line and exits with
code 2; nothing else in the package prints or exits.
"""

from __future__ import annotations


class InputError(Exception):
    """Bad input or usage: a one-line message for the user, exit code 2."""

    def __init__(self, message: str) -> None:
        one_line = " ".join(str(message).split())
        super().__init__(one_line)
        self.message = one_line

    def __str__(self) -> str:
        return self.render("api")

    def render(self, syntax: str) -> str:
        """The message with the options it names in ``syntax`` (``api`` or ``cli``;
        :mod:`replicheck.advice`): ``str()`` gives the ``api`` form."""
        from replicheck.advice import render

        return render(self.message, "cli" if syntax == "cli" else "api")


def kind_of(value: object) -> str:
    """What kind of value a user gave, for a message that refuses it ("text", "a list")."""
    for typ, label in (
        (bool, "true/false"),
        (str, "text"),
        (int, "an integer"),
        (float, "a number"),
        (list, "a list"),
        (dict, "a table"),
    ):
        if isinstance(value, typ):
            return label
    return type(value).__name__


def brief(exc: BaseException, limit: int = 160) -> str:
    """A library's exception as one short line, for the reason part of an InputError."""
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= limit else text[: limit - 3] + "..."


class LimitExceeded(InputError):
    """An input past a limit on the work of one audit (see :mod:`replicheck.limits`)."""


class SheetChoice(InputError):
    """A workbook holds tables on several sheets and nothing says which to read.

    ``sheets`` names them; ``screen`` audits each, ``check`` asks for ``--sheet``.
    """

    def __init__(self, message: str, sheets: tuple[str, ...]) -> None:
        super().__init__(message)
        self.sheets = sheets
