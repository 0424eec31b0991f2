"""Coverage-guided fuzzing of the claim parser, the formula parser, the spec reader and
the table reader, with atheris (libFuzzer for Python).

Why atheris: it is a maintained coverage-guided fuzzer on PyPI with wheels for
this platform; it instruments replicheck's own modules and mutates its inputs
towards new branches, which finds the odd corner of a parser that seeded
random damage (benchmarks/fuzz.py) reaches only by luck. Hypothesis was the
alternative: its strategies generate structured values well, but its search is
not guided by coverage without a further package.

Each target accepts any bytes. An :class:`~replicheck.errors.InputError` (one
line, exit 2 in the CLI) is a correct answer to bad input; any other exception
is a finding, and libFuzzer stops with the input that raised it (written as
``crash-*`` in the working folder).

Install and run from the repository root, one target at a time::

    pip install -e '.[fuzz]'
    python benchmarks/fuzz_coverage.py claim -runs=200000
    python benchmarks/fuzz_coverage.py formula -runs=200000
    python benchmarks/fuzz_coverage.py spec -runs=50000
    python benchmarks/fuzz_coverage.py table -runs=20000 -max_len=4096

Options after the target go to libFuzzer (``-runs``, ``-max_total_time``,
``-max_len``, a corpus folder). docs/reliability.md records the runs.
"""

from __future__ import annotations

import contextlib
import io
import os
import sys
import tempfile
import warnings
from collections.abc import Callable
from pathlib import Path

import atheris

with atheris.instrument_imports(include=["replicheck"]):
    from replicheck.claim import load_spec, parse_term_claim
    from replicheck.errors import InputError
    from replicheck.formula import parse_formula
    from replicheck.io.reader import read_table

_TMP = Path(tempfile.mkdtemp(prefix="replicheck-fuzz-"))


def _text(data: bytes) -> str:
    return atheris.FuzzedDataProvider(data).ConsumeUnicodeNoSurrogates(len(data))


def claim(data: bytes) -> None:
    with contextlib.suppress(InputError):
        parse_term_claim(_text(data))


def formula(data: bytes) -> None:
    with contextlib.suppress(InputError):
        parse_formula(_text(data))


def spec(data: bytes) -> None:
    path = _TMP / "spec.toml"
    path.write_bytes(data)
    with contextlib.suppress(InputError):
        load_spec(path)


def table(data: bytes) -> None:
    # the first byte picks the file type, the rest is the file
    suffix = (".csv", ".tsv", ".txt", ".xlsx", ".parquet")[data[0] % 5] if data else ".csv"
    path = _TMP / f"data{suffix}"
    path.write_bytes(data[1:])
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")  # a warning is a finding too
            read_table(path, na_values=["-99"])
    except InputError:
        pass


TARGETS: dict[str, Callable[[bytes], None]] = {
    "claim": claim,
    "formula": formula,
    "spec": spec,
    "table": table,
}

SEEDS: dict[str, list[bytes]] = {
    "claim": [
        b"F(2, 57) = 8.31, p = .001",
        b"variety: F(2, 10) = 1.49, p = .27",
        b"t(22) = -2.1, p = 0.047",
        b"chi2(3) = 7.9, p < .05; OR = 2.1, 95% CI 1.2 to 3.4",
    ],
    "formula": [
        b"yield ~ variety * nitro + (1|block/plot)",
        b"y ~ x + Error(block/plot)",
        b"cbind(s, n - s) ~ dose + (dose||herd)",
        b"y ~ poly(x, 2) + log(d) + C(k) + I(x^2)",
    ],
    "spec": [
        b'response = "y"\ntreatment = ["a", "b"]\nclaim = "F(1, 4) = 2"\n[limits]\ncolumns = 9\n',
        b'formula = "y ~ a + (1|g)"\nna = ["-99", "."]\nunit = "g"\n',
    ],
    "table": [
        b"\x00y,feed,tank\n1.5,A,1\n2,B,2\n-99,A,3\n.,B,4\n",
        b"\x01y\tfeed\n1,a\n2,b\n",
        b"\x00\xef\xbb\xbfy;feed\n1,5;a\n2,5;b\n",
    ],
}


def main() -> None:
    if len(sys.argv) < 2 or sys.argv[1] not in TARGETS:
        sys.exit(f"usage: {sys.argv[0]} {{{','.join(TARGETS)}}} [libFuzzer options]")
    name = sys.argv[1]
    corpus = _TMP / f"corpus-{name}"
    corpus.mkdir(exist_ok=True)
    for i, seed in enumerate(SEEDS[name]):
        (corpus / f"seed{i}").write_bytes(seed)
    args = [sys.argv[0], *sys.argv[2:], str(corpus)]
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    atheris.Setup(args, TARGETS[name])
    atheris.Fuzz()


if __name__ == "__main__":
    sys.stdout = io.TextIOWrapper(sys.stdout.buffer, line_buffering=True)
    main()
