"""Imported once by the forkserver before it forks the per-file children.

Importing this module loads the per-file work and warms it up: it audits a
small invented table once and renders its reports, so that modules loaded
lazily on first use (plotting for the HTML report, parts of scipy and
statsmodels) are loaded once in the forkserver instead of in every child.
"""

from __future__ import annotations

import contextlib

import pandas as pd

from replicheck.api import audit
from replicheck.screen import work

__all__ = ["work"]


def _prime() -> None:
    # invented data: two feeds, each given to two tanks of two fish
    frame = pd.DataFrame(
        {
            "length": [10.1, 10.4, 11.0, 11.3, 12.2, 12.0, 12.9, 13.1],
            "feed": ["a", "a", "a", "a", "b", "b", "b", "b"],
            "tank": [1, 1, 2, 2, 3, 3, 4, 4],
        }
    )
    report = audit(frame, response="length", treatment="feed", find_spec=False)
    report.to_html()
    report.to_json()


with contextlib.suppress(Exception):  # warming up only saves time; the work reports errors
    _prime()
