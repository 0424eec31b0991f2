"""A pytest plugin that writes the JSON document of every report a test run produces.

Loaded by benchmarks/same_reports.py as ``-p report_dump`` (with this folder on the
path) and set by ``REPLICHECK_REPORT_DUMP=DIR``: each report goes to one file in DIR
named after the test and the audit's number within it. It wraps
``replicheck.api.audit`` when pytest starts, before the test modules import it, and
works with any revision's suite (it needs nothing of the revision but that function).
"""

from __future__ import annotations

import functools
import json
import os
import re
from pathlib import Path
from typing import Any

_COUNTS: dict[str, int] = {}


def _dump(folder: Path, document: dict[str, Any]) -> None:
    test = os.environ.get("PYTEST_CURRENT_TEST", "unknown").rsplit(" (", 1)[0]
    key = re.sub(r"[^A-Za-z0-9_.-]+", "_", test)[-180:]
    _COUNTS[key] = _COUNTS.get(key, 0) + 1
    path = folder / f"{key}__{_COUNTS[key]}.json"
    path.write_text(json.dumps(document, sort_keys=True, default=str), encoding="utf-8")


def pytest_configure(config: Any) -> None:
    target = os.environ.get("REPLICHECK_REPORT_DUMP")
    if not target:
        return
    import replicheck.api

    original = replicheck.api.audit

    @functools.wraps(original)
    def dumping_audit(*args: Any, **kwargs: Any) -> Any:
        report = original(*args, **kwargs)
        _dump(Path(target), report.to_dict())
        return report

    replicheck.api.audit = dumping_audit  # type: ignore[assignment]
