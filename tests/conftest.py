"""Test settings shared by the whole suite.

Property tests run with a fixed derandomised profile so that every run (and
CI) explores the same examples; no deadlines, since timing is not tested.
"""

from __future__ import annotations

from hypothesis import settings

settings.register_profile("replicheck", derandomize=True, deadline=None)
settings.load_profile("replicheck")


# Every report the suite produces is proofread in every format (issue: reports a
# reviewer can paste without editing) and checked against the closed vocabularies
# (statuses, analyses, severities, registered rules). ``audit`` is wrapped once here,
# so a test whose audit renders a faulty sentence or leaves a vocabulary fails with
# the faults listed; see replicheck.report.proofread and tests/vocab_check.py.
import functools  # noqa: E402

from vocab_check import vocabulary_faults  # noqa: E402

import replicheck.api  # noqa: E402
from replicheck.report.proofread import proofread  # noqa: E402

_audit = replicheck.api.audit


@functools.wraps(_audit)
def _proofread_audit(*args, **kwargs):  # type: ignore[no-untyped-def]
    report = _audit(*args, **kwargs)
    faults = vocabulary_faults(report.to_dict())
    if faults:
        raise AssertionError(f"the report leaves its vocabularies: {faults}")
    problems = proofread(report.to_dict())
    if problems:
        shown = "\n  ".join(str(p) for p in problems[:8])
        raise AssertionError(f"the report's prose has {len(problems)} fault(s):\n  {shown}")
    return report


replicheck.api.audit = _proofread_audit
