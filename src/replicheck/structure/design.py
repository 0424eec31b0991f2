"""The role of every column, and the statements the data contradict.

Every column of the audited table gets one role (:data:`replicheck.roles.COLUMN_ROLES`)
with where it came from (stated, or inferred) and the evidence: the response,
the treatments, the experimental unit of each term, sub-units, blocks,
within-unit factors, covariates, labels of the treatments, row identifiers,
ignored columns, and other groupings that play no part in the design.
Statements the data contradict (a stated block within which a treatment never
varies, a stated within-unit factor constant within every unit) are listed as
disputes for the verdict to report; they are still used.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING

import pandas as pd

from replicheck.partitions import is_nested
from replicheck.roles import ColumnRole, Roles
from replicheck.structure import evidence as ev
from replicheck.structure.relations import group_codes

if TYPE_CHECKING:
    from replicheck.structure.crossed import Block
    from replicheck.structure.strata import Stratum
    from replicheck.structure.units import UnitChoice


def block_disputes(
    data: pd.DataFrame,
    treatments: Sequence[str],
    stated: Sequence[tuple[str, ...]],
    roles: Roles,
) -> list[tuple[str, str, tuple[str, ...]]]:
    """Stated blocks that the data contradict: a treatment constant within them."""
    out: list[tuple[str, str, tuple[str, ...]]] = []
    for s in stated:
        codes = group_codes(data, s)
        for t in treatments:
            tc = group_codes(data, (t,))
            ok = ev.present(codes, tc)
            if ok.any() and is_nested(codes[ok], tc[ok]):
                out.append(
                    (
                        "stated-role-disputed",
                        f"'{':'.join(s)}' is stated as a block, but '{t}' never varies within "
                        f"it: each {':'.join(s)} received a single level of '{t}', so "
                        f"'{t}' is tested between {':'.join(s)} levels, as the unit it received",
                        (*s, t),
                    )
                )
    return out


def within_disputes(
    data: pd.DataFrame,
    treatments: Sequence[str],
    roles: Roles,
    within: Mapping[str, str],
    units: Sequence[UnitChoice],
) -> list[tuple[str, str, tuple[str, ...]]]:
    """Stated within-unit factors that never vary within a unit."""
    out: list[tuple[str, str, tuple[str, ...]]] = []
    for col in roles.columns("within"):
        if col not in data.columns:
            continue
        w = group_codes(data, (col,))
        varies = False
        for u in units:
            if not u.columns:
                continue
            cols = u.columns if u.treatment in u.columns else (u.treatment, *u.columns)
            codes = group_codes(data, cols)
            ok = ev.present(codes, w)
            if ok.any() and not is_nested(codes[ok], w[ok]):
                varies = True
        if not varies and any(u.columns for u in units):
            out.append(
                (
                    "stated-role-disputed",
                    f"'{col}' is stated as a within-unit factor, but it is constant within "
                    f"every experimental unit found",
                    (col,),
                )
            )
    return out


def column_roles(
    data: pd.DataFrame,
    response: str,
    treatments: Sequence[str],
    roles: Roles,
    skipped: Mapping[str, str],
    labels: Mapping[str, str],
    units: Sequence[UnitChoice],
    blocks: Sequence[Block],
    strata: Sequence[Stratum],
    within: Mapping[str, str],
    derived: Mapping[str, tuple[str, ...]],
    derived_columns: Sequence[str],
    cols: Sequence[str],
    interactions: Sequence[str] = (),
    other_units: Mapping[str, str] = {},
) -> tuple[ColumnRole, ...]:
    """One role for every column of the data (and each derived grouping used), and why."""
    out: list[ColumnRole] = []

    def source(col: str) -> str:
        s = roles.role_of(col)
        return f"stated {s.source}" if s is not None else "inferred"

    out.append(ColumnRole(response, "response", "stated", "the response of the claimed analysis"))
    for t in treatments:
        out.append(ColumnRole(t, "treatment", "stated", "a treatment of the claimed analysis"))
    unit_terms: dict[str, list[str]] = {}
    unit_columns: dict[str, tuple[str, ...]] = {}
    for u in units:
        if u.unit is not None and u.columns:
            unit_terms.setdefault(u.unit, []).append(u.treatment)
            unit_columns[u.unit] = u.columns
    done = {response, *treatments, *interactions}
    for name, terms_ in unit_terms.items():
        columns = unit_columns[name]
        key = tuple(c for c in columns if c not in treatments) or columns
        stated = [s for s in roles.units if set(s.columns) in (set(key), set(columns))]
        out.append(
            ColumnRole(
                name,
                "unit",
                f"stated {stated[0].source}" if stated else "inferred",
                f"the experimental unit of {', '.join(repr(t) for t in terms_)}",
                columns,
                tuple(terms_),
            )
        )
        if len(key) == 1:
            done.add(key[0])
    for st in strata:
        if st.kind == "subunit":
            key = tuple(c for c in st.columns if c not in treatments)
            out.append(ColumnRole(st.name, "subunit", "inferred", "nested within a unit", key))
            if len(key) == 1:
                done.add(key[0])
    for b in blocks:
        out.append(
            ColumnRole(
                b.name,
                b.kind,
                source(b.name) if len(b.columns) == 1 else "stated",
                b.reason,
                b.columns,
            )
        )
        if len(b.columns) == 1:
            done.add(b.columns[0])
        done.add(b.name)
    for col in data.columns:
        if col in done or col in derived:
            continue
        if col in derived_columns and col not in cols:
            continue
        s = roles.role_of(col)
        if s is not None and s.role in ("covariate", "ignore"):
            role = "covariate" if s.role == "covariate" else "ignored"
            out.append(ColumnRole(col, role, f"stated {s.source}", f"stated as {s.role}"))
            continue
        if col in labels:
            out.append(ColumnRole(col, "label", "inferred", f"a label of {labels[col]}"))
            continue
        reason = skipped.get(col)
        if reason is not None:
            if reason.startswith("a covariate") or reason == "a continuous measurement":
                out.append(ColumnRole(col, "covariate", "inferred", reason))
            elif reason.startswith("a row identifier") or reason.startswith("nearly every"):
                out.append(ColumnRole(col, "identifier", "inferred", reason))
            else:
                out.append(ColumnRole(col, "other", "inferred", reason))
            continue
        if col in other_units:
            out.append(ColumnRole(col, "other", "inferred", other_units[col]))
            continue
        out.append(ColumnRole(col, "other", "inferred", "a grouping with no role in the design"))
    return tuple(out)
