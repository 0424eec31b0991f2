"""Test settings shared by the whole suite.

Property tests run with a fixed derandomised profile so that every run (and
CI) explores the same examples; no deadlines, since timing is not tested.
"""

from __future__ import annotations

from hypothesis import settings

settings.register_profile("replicheck", derandomize=True, deadline=None)
settings.load_profile("replicheck")


# Every report the suite produces is proofread in every format (issue: reports a
# reviewer can paste without editing). ``audit`` is wrapped once here, so a test whose
# audit renders a faulty sentence fails with the faults listed; see
# replicheck.report.proofread for what counts as a fault.
import functools  # noqa: E402
import json  # noqa: E402
import os  # noqa: E402
import re  # noqa: E402
from pathlib import Path  # noqa: E402

import replicheck.api  # noqa: E402
from replicheck.report.proofread import proofread  # noqa: E402

_audit = replicheck.api.audit


# REPLICHECK_REPORT_DUMP=DIR writes the JSON document of every report the suite
# produces to DIR (one file per test and audit), so that two revisions can be
# compared with benchmarks/same_reports.py (refactors must leave reports alone).
_DUMP = os.environ.get("REPLICHECK_REPORT_DUMP")
_DUMPED: dict[str, int] = {}


def _dump(document: dict) -> None:  # type: ignore[type-arg]
    test = os.environ.get("PYTEST_CURRENT_TEST", "unknown").rsplit(" (", 1)[0]
    key = re.sub(r"[^A-Za-z0-9_.-]+", "_", test)[-180:]
    _DUMPED[key] = _DUMPED.get(key, 0) + 1
    path = Path(str(_DUMP)) / f"{key}__{_DUMPED[key]}.json"
    path.write_text(json.dumps(document, sort_keys=True, default=str), encoding="utf-8")


@functools.wraps(_audit)
def _proofread_audit(*args, **kwargs):  # type: ignore[no-untyped-def]
    report = _audit(*args, **kwargs)
    if _DUMP:
        _dump(report.to_dict())
    problems = proofread(report.to_dict())
    if problems:
        shown = "\n  ".join(str(p) for p in problems[:8])
        raise AssertionError(f"the report's prose has {len(problems)} fault(s):\n  {shown}")
    return report


replicheck.api.audit = _proofread_audit
