"""Screen folders of data files: ``replicheck screen PATH...``.

>>> from replicheck.screen import screen  # doctest: +SKIP
>>> result = screen(["supplement/"], out="screening")  # doctest: +SKIP
>>> result.exit_code, result.rows[0].status  # doctest: +SKIP

See ``docs/screening.md``. This package imports nothing heavy at import
time; the statistics stack loads in the worker processes.
"""

from replicheck.screen.batch import ScreenResult, parse_size, screen
from replicheck.screen.summary import COLUMNS, SEVERITY, Row

__all__ = ["COLUMNS", "SEVERITY", "Row", "ScreenResult", "parse_size", "screen"]
