"""Advice that names an option, in the syntax of its reader (replicheck.advice).

Logic tests of the rendering, and the two readers end to end on the invented
'cuplids' demo scenario, whose report advises stating a block's role: a Python
caller reads keyword arguments of ``audit``, the command line its own options.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from replicheck import audit
from replicheck.advice import MARKER, option, render, render_all
from replicheck.demo import SCENARIOS
from replicheck.errors import InputError


@pytest.mark.parametrize(
    ("name", "value", "cli", "api"),
    [
        ("unit", "tank", "--unit tank", "unit='tank'"),
        ("unit", "tank id", "--unit 'tank id'", "unit='tank id'"),
        ("unit", "block:variety", "--unit block:variety", "unit='block:variety'"),
        ("unit", "it's", "--unit 'it'\"'\"'s'", 'unit="it\'s"'),
        ("unit-labels", "global", "--unit-labels global", "unit_labels='global'"),
        ("covariate", "shelf", "--covariate shelf", "covariate='shelf'"),
        ("hidden", False, "--no-hidden", "hidden=False"),
        ("fill-down", False, "--no-fill-down", "fill_down=False"),
        ("dayfirst", True, "--dates day-first", "dayfirst=True"),
        ("dayfirst", False, "--dates month-first", "dayfirst=False"),
        ("range", None, "--range", "cell_range=..."),
        ("id", None, "--id", "ids=..."),
        ("limit", "crossed-levels", "--limit crossed-levels=N", "limits={'crossed-levels': N}"),
    ],
)
def test_each_option_in_each_syntax(name: str, value: object, cli: str, api: str) -> None:
    text = f"state it ({option(name, value)})"  # type: ignore[arg-type]
    assert render(text, "cli") == f"state it ({cli})"
    assert render(text, "api") == f"state it ({api})"


def test_markers_survive_any_column_name_and_leave_plain_text_alone() -> None:
    odd = 'a "b" ⟦c⟧ \\ d'
    text = option("unit", odd)
    assert MARKER.fullmatch(text)
    assert render(text, "api") == f"unit={odd!r}"
    assert render("no option here: --unit is plain text", "cli") == (
        "no option here: --unit is plain text"
    )
    assert render_all({"a": [option("na")], "b": 3}, "api") == {"a": ["na=..."], "b": 3}
    with pytest.raises(ValueError, match="unknown option"):
        option("no-such-option")


def test_input_errors_speak_to_their_reader() -> None:
    err = InputError(f"choose one with {option('sheet')}")
    assert str(err) == "choose one with sheet=..."
    assert err.render("cli") == "choose one with --sheet"


def _cuplids() -> tuple[object, dict[str, str]]:
    sc = SCENARIOS["cuplids"]
    return sc.recipe(), {"response": sc.response, "treatment": sc.treatment, "claim": sc.claim}


def test_a_python_caller_reads_keyword_arguments() -> None:
    data, kw = _cuplids()
    report = audit(data, **kw)  # type: ignore[arg-type]
    advice = " ".join(f["advice"] for f in report.to_dict()["findings"])
    assert "covariate='shelf'" in advice and "ignore='shelf'" in advice
    assert "--" not in advice
    for text in (report.to_text(), report.to_markdown(), report.to_html(), report.to_json()):
        assert "⟦" not in text and "--covariate" not in text
        assert "covariate=" in text


def test_the_command_line_reads_its_options(tmp_path: Path) -> None:
    data, kw = _cuplids()
    path = tmp_path / "cuplids.csv"
    data.to_csv(path, index=False)  # type: ignore[attr-defined]
    base = [sys.executable, "-m", "replicheck", "check", str(path), "-r", kw["response"]]
    base += ["-t", kw["treatment"], "--claim", kw["claim"]]
    out = subprocess.run([*base, "-f", "json"], capture_output=True, text=True, check=False)
    assert out.returncode in (0, 1), out.stderr
    advice = " ".join(f["advice"] for f in json.loads(out.stdout)["findings"])
    assert "--covariate shelf" in advice and "--ignore shelf" in advice
    assert "covariate='shelf'" not in advice
    text = subprocess.run(base, capture_output=True, text=True, check=False).stdout
    assert "--covariate shelf" in text and "⟦" not in text
    # an input error names the option as the command line spells it
    bad = subprocess.run(
        [*base, "--unit-labels", "sideways"], capture_output=True, text=True, check=False
    )
    assert bad.returncode == 2
    assert "--unit-labels" in bad.stderr and "unit_labels" not in bad.stderr
