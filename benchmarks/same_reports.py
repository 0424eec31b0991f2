"""Do two revisions give the same report documents on every audit of the test suite?

Run: python benchmarks/same_reports.py REV [--tol 1e-9] [-k EXPR]

For refactors, which must leave every report alone. The script checks out
revision ``REV`` in a temporary git worktree and runs the test suite there and on
the working tree (one after the other, so timings do not matter) with the plugin
benchmarks/report_dump.py, which writes the JSON document of every report the
suite produces, one file per test and audit. The two sets
are compared key by key: numbers to a relative tolerance (default 1e-9), texts
and everything else exactly. Temporary paths (``pytest-N``, ``tmp...``) are made
alike first, and input hashes left out (tests write some workbooks anew, with the
time in their bytes). It prints each difference (the file, the key path, both values) and
a count; audits that only one revision produced are listed apart (a test added
or removed).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import re
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
_TMP = re.compile(r"(pytest-)\d+|/tmp/[A-Za-z0-9_]+|test_[A-Za-z0-9_]*?\d+(?=/)")


# keys left out of the comparison: the hash of an input file that a test writes anew on
# each run (a workbook's bytes carry the time it was written)
_IGNORED = {"sha256"}


def _normal(value: Any) -> Any:
    if isinstance(value, str):
        return _TMP.sub(lambda m: (m.group(1) or "") + "N", value)
    if isinstance(value, list):
        return [_normal(v) for v in value]
    if isinstance(value, dict):
        return {k: _normal(v) for k, v in value.items() if k not in _IGNORED}
    return value


def differences(
    a: Any, b: Any, tol: float, path: str = "", added: frozenset[str] = frozenset()
) -> list[tuple[str, Any, Any]]:
    """Key paths at which two documents differ (numbers to a relative tolerance); a key
    path in ``added`` (``.verdict.term``) may be new in the second document."""
    if isinstance(a, dict) and isinstance(b, dict):
        out: list[tuple[str, Any, Any]] = []
        for k in sorted(set(a) | set(b)):
            if k not in a and f"{path}.{k}" in added:
                continue
            if k not in a or k not in b:
                out.append((f"{path}.{k}", a.get(k, "<absent>"), b.get(k, "<absent>")))
            else:
                out += differences(a[k], b[k], tol, f"{path}.{k}", added)
        return out
    if isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            return [(f"{path}[len]", len(a), len(b))]
        return [
            d
            for i, (x, y) in enumerate(zip(a, b, strict=True))
            for d in differences(x, y, tol, f"{path}[{i}]", added)
        ]
    numbers = (int, float)
    if isinstance(a, numbers) and isinstance(b, numbers) and not isinstance(a, bool):
        if isinstance(b, bool):
            return [(path, a, b)]
        if math.isnan(a) and math.isnan(b):
            return []
        if a == b or abs(a - b) <= tol * max(abs(a), abs(b)):
            return []
        return [(path, a, b)]
    return [] if a == b else [(path, a, b)]


def run_suite(tree: Path, out: Path, keyword: str | None) -> None:
    path = os.pathsep.join([str(tree / "src"), str(ROOT / "benchmarks")])
    env = dict(os.environ, REPLICHECK_REPORT_DUMP=str(out), PYTHONPATH=path)
    cmd = [sys.executable, "-m", "pytest", "-p", "no:cacheprovider", "-p", "report_dump"]
    cmd += ["tests"]
    if keyword:
        cmd += ["-k", keyword]
    done = subprocess.run(cmd, cwd=tree, env=env, check=False, capture_output=True, text=True)
    last = done.stdout.strip().splitlines()[-1:] or ["(no output)"]
    print(f"{tree}: {last[0]}", flush=True)


def compare(old: Path, new: Path, tol: float, added: frozenset[str] = frozenset()) -> int:
    a = {p.name for p in old.glob("*.json")}
    b = {p.name for p in new.glob("*.json")}
    count = 0
    for name in sorted(a & b):
        da = _normal(json.loads((old / name).read_text(encoding="utf-8")))
        db = _normal(json.loads((new / name).read_text(encoding="utf-8")))
        for path, x, y in differences(da, db, tol, added=added):
            count += 1
            print(f"{name}{path}: {x!r} -> {y!r}")
    print(f"{len(a & b)} reports compared, {count} differences beyond {tol:g}")
    for label, names in (("only before", a - b), ("only after", b - a)):
        if names:
            print(f"{label}: {len(names)} ({', '.join(sorted(names)[:5])}...)")
    return count


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("rev", help="the revision to compare with the working tree")
    ap.add_argument("--tol", type=float, default=1e-9)
    ap.add_argument("-k", dest="keyword", help="only the tests pytest -k selects")
    ap.add_argument(
        "--added",
        action="append",
        default=[],
        metavar="PATH",
        help="a key new in the working tree's reports, such as .verdict.term (repeatable)",
    )
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        base = Path(tmp)
        tree = base / "tree"
        add = ["git", "worktree", "add", "--detach", str(tree), args.rev]
        subprocess.run(add, cwd=ROOT, check=True, capture_output=True)
        try:
            for sub in ("old", "new"):
                (base / sub).mkdir()
            run_suite(tree, base / "old", args.keyword)
            run_suite(ROOT, base / "new", args.keyword)
            count = compare(base / "old", base / "new", args.tol, frozenset(args.added))
        finally:
            subprocess.run(["git", "worktree", "remove", "--force", str(tree)], cwd=ROOT,
                           check=False)  # fmt: skip
    return 1 if count else 0


if __name__ == "__main__":
    raise SystemExit(main())
