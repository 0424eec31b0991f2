"""Roles of columns: what the user states, in one value read by every entry point.

A reviewer who knows the design can state the role of any column: the
experimental unit (at one or several levels, or an implicit grouping such as
``block:variety``), a block, a within-unit factor (a time, period, occasion or
position that varies within units), a covariate, or a column to ignore.

:data:`ROLE_FIELDS` is the one table of these statements. The command line
builds its options from it (``--unit``, ``--block``, ...), the spec file and
the screening index take its keys, and :func:`replicheck.api.audit` its
keywords; adding a role means adding a row here. :class:`Roles` holds the
statements with where each came from, checked for form before any data are
read (:func:`stated_roles`); the structure stage resolves their columns and
uses every statement, reporting evidence against one as a finding, never
replacing it in silence.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

from replicheck.errors import InputError

__all__ = [
    "COLUMN_ROLES",
    "ROLE_FIELDS",
    "ColumnRole",
    "RoleField",
    "Roles",
    "Statement",
    "role_field",
    "stated_roles",
]


@dataclass(frozen=True)
class RoleField:
    """One statable role: its key (spec, index, API), option and help text."""

    key: str  # spec and index key, audit() keyword, and the role's name
    option: str  # command-line option
    short: str | None
    combine: bool  # whether a value may name several columns as 'a:b'
    help: str
    doc: str  # what stating it means, for the docs and the API


ROLE_FIELDS: tuple[RoleField, ...] = (
    RoleField(
        "unit",
        "--unit",
        "-u",
        True,
        "The experimental unit (repeat for several levels, e.g. --unit tank --unit fish); an "
        "implicit grouping as 'block:variety'. Always used; evidence against it is reported.",
        "the experimental unit of the treatments constant within it (several for several "
        "levels; 'a:b' for the combination of two columns)",
    ),
    RoleField(
        "block",
        "--block",
        None,
        True,
        "A block of the design (a grouping that holds several treatment levels), whatever "
        "its name; repeatable.",
        "a block: a grouping crossed with the treatments, a random stratum of the design",
    ),
    RoleField(
        "within",
        "--within",
        None,
        False,
        "A within-unit factor (a time, period, occasion or position measured within units); "
        "never taken as a unit or a block of plots; repeatable.",
        "a within-unit factor: varies within units (times, periods, positions)",
    ),
    RoleField(
        "covariate",
        "--covariate",
        None,
        False,
        "A measured covariate, never a grouping or unit; repeatable.",
        "a covariate: never a grouping, a unit or a block",
    ),
    RoleField(
        "ignore",
        "--ignore",
        None,
        False,
        "A column to leave out of the audit entirely (including the hidden-grouping scans); "
        "repeatable.",
        "left out of the audit",
    ),
)

# Every role a column can have in a report; the stated ones come from ROLE_FIELDS.
COLUMN_ROLES = (
    "response",
    "treatment",
    "unit",
    "subunit",
    "block",
    "within",
    "covariate",
    "label",
    "identifier",
    "ignored",
    "other",
)


def role_field(key: str) -> RoleField:
    """The field of a statable role."""
    for f in ROLE_FIELDS:
        if f.key == key:
            return f
    raise KeyError(key)


@dataclass(frozen=True)
class Statement:
    """One stated role: the columns (several for a combination) and where it was stated."""

    role: str
    columns: tuple[str, ...]
    source: str  # "command line", "spec FILE", "formula", "spec index ..."

    @property
    def text(self) -> str:
        return ":".join(self.columns)


@dataclass(frozen=True)
class Roles:
    """Every stated role, in the order stated."""

    statements: tuple[Statement, ...] = ()

    def of(self, role: str) -> tuple[Statement, ...]:
        """The statements of one role."""
        return tuple(s for s in self.statements if s.role == role)

    @property
    def units(self) -> tuple[Statement, ...]:
        return self.of("unit")

    @property
    def blocks(self) -> tuple[Statement, ...]:
        return self.of("block")

    @property
    def within(self) -> tuple[Statement, ...]:
        return self.of("within")

    @property
    def covariates(self) -> tuple[Statement, ...]:
        return self.of("covariate")

    @property
    def ignored(self) -> tuple[Statement, ...]:
        return self.of("ignore")

    def columns(self, role: str) -> tuple[str, ...]:
        """Every column named by statements of one role."""
        return tuple(dict.fromkeys(c for s in self.of(role) for c in s.columns))

    def role_of(self, column: str) -> Statement | None:
        """The statement naming a column on its own (not inside a combination)."""
        for s in self.statements:
            if s.columns == (column,):
                return s
        return None

    def __bool__(self) -> bool:
        return bool(self.statements)

    def renamed(self, mapping: Mapping[str, str]) -> Roles:
        """The same statements with columns renamed (names as the data spell them)."""
        return Roles(
            tuple(
                Statement(s.role, tuple(mapping.get(c, c) for c in s.columns), s.source)
                for s in self.statements
            )
        )

    def added(self, more: Iterable[Statement]) -> Roles:
        """These statements followed by more (a statement repeated is kept once)."""
        out = list(self.statements)
        for s in more:
            if not any(o.role == s.role and o.columns == s.columns for o in out):
                out.append(s)
        return Roles(tuple(out))

    def to_list(self) -> list[dict[str, object]]:
        return [
            {"role": s.role, "columns": list(s.columns), "source": s.source}
            for s in self.statements
        ]


def _values(value: object, key: str, source: str) -> list[str]:
    """A role's value from the command line, a spec or an index: a string or a list of them."""
    items = list(value) if isinstance(value, list | tuple) else [value]
    out = []
    for v in items:
        if not isinstance(v, str) or not v.strip():
            raise InputError(
                f"'{key}' {source} must be a column name or a list of column names, not {v!r}"
            )
        out.append(v.strip())
    return out


def _split(text: str, field: RoleField, source: str) -> tuple[str, ...]:
    if not field.combine:
        return (text,)
    parts = tuple(p.strip() for p in text.split(":"))
    if len(parts) > 1 and not all(parts):
        raise InputError(f"'{field.key}' {source}: {text!r} has an empty part around ':'")
    return parts


def stated_roles(
    given: Mapping[str, object],
    source: str,
    *,
    spec: Mapping[str, object] | None = None,
    spec_source: str = "in the spec",
    response: str | None = None,
    treatments: Sequence[str] = (),
) -> Roles:
    """Statements from the command line (``given``) and a checked spec, checked for form.

    For each role, the command line's values replace the spec's. A column may
    hold one role only (on its own; a column inside a combination such as
    ``block:variety`` may also be a block), and never the response or a
    treatment's role. Column names are checked against the data later, when
    the table has been read.
    """
    statements: list[Statement] = []
    for field in ROLE_FIELDS:
        value = given.get(field.key)
        where = source
        if value in (None, (), []):
            value = None if spec is None else spec.get(field.key)
            where = spec_source
        if value in (None, (), []):
            continue
        for text in _values(value, field.key, where):
            statements.append(Statement(field.key, _split(text, field, where), where))
    seen: dict[str, Statement] = {}
    for s in statements:
        if len(s.columns) != 1:
            continue
        col = s.columns[0]
        if col in seen and seen[col].role != s.role:
            raise InputError(
                f"column {col!r} is stated both as {seen[col].role} ({seen[col].source}) and as "
                f"{s.role} ({s.source}): give each column one role"
            )
        seen[col] = s
    for s in statements:
        for col in s.columns:
            if response is not None and col == response:
                raise InputError(f"column {col!r} cannot be both the response and a {s.role}")
            # a term of the model stated as a covariate: a number with one slope
            if col in treatments and len(s.columns) == 1 and s.role != "covariate":
                raise InputError(
                    f"column {col!r} cannot be both a treatment and a {s.role}"
                    + (
                        " (an implicit unit names it with another column, as 'block:variety')"
                        if s.role == "unit"
                        else ""
                    )
                )
    return Roles(tuple(dict.fromkeys(statements)))


@dataclass(frozen=True)
class ColumnRole:
    """The role a column plays in the audited design, and why."""

    column: str
    role: str  # one of COLUMN_ROLES
    source: str  # "stated on the command line" / "stated in the spec ..." / "inferred"
    evidence: str
    columns: tuple[str, ...] = ()  # the columns of a combination (an implicit plot)
    terms: tuple[str, ...] = ()  # the terms whose unit it is
