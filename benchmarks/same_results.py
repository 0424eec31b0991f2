"""Do two versions of replicheck give the same numbers on the documented real designs?

Run: python benchmarks/same_results.py REV [--tol 1e-9]

For speed work: every optimisation must leave the results alone. The script
checks out revision ``REV`` in a temporary git worktree, audits every case of
``benchmarks/real_designs.toml`` with that version and with the working tree (each
in its own process, the two at once), and compares, for every case, every
analysis's statistic, degrees of freedom and p-value, every term's status,
method, corrected test and ICC, and the design needs, to a relative tolerance
(default 1e-9). It prints each difference and a count; a wild cluster bootstrap
that one version runs and the other leaves out is counted apart (the bootstrap is
sized by the number of units since it was made so; docs/calibration.md).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]

DUMP = """
import json, sys
sys.path.insert(0, {bench!r})
import real_designs as rd
from replicheck import audit
out = {{}}
for c in rd.load_cases():
    data = rd.case_data(c)
    kw = dict(c.stated)
    if c.formula:
        kw["formula"] = c.formula
    else:
        kw.update(response=c.response, treatment=list(c.treatments))
    try:
        d = audit(data, find_spec=False, **kw).to_dict()
    except Exception as e:
        out[c.id] = "error: " + str(e)
        continue
    out[c.id] = {{
        "analyses": [[a["term"], a["name"], a["statistic"], a["df"], a["p_value"]]
                     for a in d["analyses"]],
        "terms": [[t["term"], t["status"], t["method"], t["statistic"], t["df"], t["p_value"],
                   t["clustering"].get("icc")] for t in d["terms"]],
        "needs": d["design_needs"],
    }}
json.dump(out, open(sys.argv[1], "w"))
"""


def close(x: Any, y: Any, tol: float) -> bool:
    """Equal, numbers to a relative tolerance, recursively."""
    if isinstance(x, list) and isinstance(y, list):
        return len(x) == len(y) and all(close(a, b, tol) for a, b in zip(x, y, strict=True))
    if isinstance(x, dict) and isinstance(y, dict):
        return x.keys() == y.keys() and all(close(x[k], y[k], tol) for k in x)
    if isinstance(x, int | float) and isinstance(y, int | float) and not isinstance(x, bool):
        return x == y or abs(x - y) <= tol * max(1.0, abs(x), abs(y))
    return bool(x == y)


def compare(old: dict[str, Any], new: dict[str, Any], tol: float) -> tuple[list[str], int]:
    """Differences between two dumps, and the number of bootstraps run by one only."""
    out: list[str] = []
    boot = 0
    for case in sorted(set(old) | set(new)):
        a, b = old.get(case), new.get(case)
        if isinstance(a, str) or isinstance(b, str) or a is None or b is None:
            if a != b:
                out.append(f"{case}: {a!r} -> {b!r}")
            continue
        rows_a = {(r[0], r[1]): r[2:] for r in a["analyses"]}
        rows_b = {(r[0], r[1]): r[2:] for r in b["analyses"]}
        for key in sorted(set(rows_a) | set(rows_b)):
            ra, rb = rows_a.get(key), rows_b.get(key)
            if ra is not None and rb is not None and close(ra, rb, tol):
                continue
            if key[1] == "wild_bootstrap" and (ra is None or rb is None or None in (ra[2], rb[2])):
                boot += 1
                continue
            out.append(f"{case} {key}: {ra} -> {rb}")
        if not close(a["terms"], b["terms"], tol):
            out.append(f"{case} terms: {a['terms']} -> {b['terms']}")
        if not close(a["needs"], b["needs"], tol):
            out.append(f"{case} design needs differ")
    return out, boot


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("rev", help="the git revision to compare with (e.g. HEAD~3)")
    ap.add_argument("--tol", type=float, default=1e-9, help="relative tolerance")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        tree = Path(tmp) / "ref"
        subprocess.run(["git", "-C", str(ROOT), "worktree", "add", "-q", str(tree), args.rev],
                       check=True)  # fmt: skip
        try:
            code = DUMP.format(bench=str(ROOT / "benchmarks"))
            runs = []
            for src, out in (
                (tree / "src", Path(tmp) / "old.json"),
                (ROOT / "src", Path(tmp) / "new.json"),
            ):
                env = {**os.environ, "PYTHONPATH": str(src)}
                runs.append(
                    (subprocess.Popen([sys.executable, "-c", code, str(out)], env=env), out)
                )
            for proc, _ in runs:
                proc.wait()
            old, new = (json.loads(out.read_text()) for _, out in runs)
        finally:
            subprocess.run(["git", "-C", str(ROOT), "worktree", "remove", "--force", str(tree)],
                           check=False)  # fmt: skip
    diffs, boot = compare(old, new, args.tol)
    for d in diffs:
        print(d)
    print(
        f"{len(old)} cases; {len(diffs)} differences beyond {args.tol:g}; "
        f"{boot} wild bootstrap rows run by one version only"
    )
    return 1 if diffs else 0


if __name__ == "__main__":
    raise SystemExit(main())
