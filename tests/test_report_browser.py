"""The report as a browser renders it: headless Chromium loads the page and we read back what it shows.

Chromium's DOM after loading (--dump-dom) must carry the verdict and the table's numbers
as the results document has them, and its screenshot must open with the verdict banner.
Skipped, with the reason, where Chromium is not installed (`make test` installs Debian's
chromium package when apt-get is present and it runs as root).
"""

from __future__ import annotations

import importlib.util
import math
import shutil
import subprocess
import tempfile
from html.parser import HTMLParser
from pathlib import Path

import pytest

from conformance.results import as_float
from conformance.run import RunOptions, run_check

ROOT = Path(__file__).resolve().parents[1]
DRAFTS = ROOT / "examples" / "kestrel_drafts.py"
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync"]


@pytest.fixture(scope="module")
def chromium():
    exe = next((shutil.which(n) for n in ("chromium", "chromium-browser") if shutil.which(n)), None)
    if exe is None:
        pytest.skip("chromium not installed: install Debian's chromium package (`make test` does so when "
                    "apt-get is present and it runs as root) to render the report in a browser")
    return exe


def _browser(exe: str, *args: str, timeout: float = 90) -> subprocess.CompletedProcess:
    with tempfile.TemporaryDirectory() as profile:
        return subprocess.run([exe, *FLAGS, f"--user-data-dir={profile}", *args], capture_output=True,
                              text=True, timeout=timeout)


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    from conformance.report import write_report

    spec = importlib.util.spec_from_file_location("kestrel_drafts_for_browser_test", DRAFTS)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    doc = run_check(mod.layer_norm_draft1, RunOptions(tier="smoke"), quiet=True)
    out = tmp_path_factory.mktemp("browser")
    return doc, write_report(doc, out, peers=None, peers_note="not needed for this check")["html"]


class _Cells(HTMLParser):
    """Text of the verdict banner and of the summary table's numeric cells, from the browser's DOM."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.verdict = ""
        self.cells: dict[tuple[int, str], str] = {}
        self._in_verdict = False
        self._row: int | None = None
        self._key: str | None = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "data-verdict" in a:
            self._in_verdict = True
        if tag == "tr" and "main" in (a.get("class") or "") and "data-row" in a:
            self._row = int(a["data-row"])
        if tag == "td" and self._row is not None and "data-key" in a:
            self._key = a["data-key"]
            self.cells[(self._row, self._key)] = ""

    def handle_endtag(self, tag):
        if tag == "div":
            self._in_verdict = False
        if tag == "td":
            self._key = None
        if tag == "tr":
            self._row = None

    def handle_data(self, data):
        if self._in_verdict:
            self.verdict += data
        if self._key is not None:
            self.cells[(self._row, self._key)] += data


def test_rendered_dom_shows_the_verdict_and_the_documents_numbers(chromium, report):
    doc, html = report
    res = _browser(chromium, "--dump-dom", html.as_uri())
    assert res.returncode == 0, res.stderr[-2000:]
    dom = _Cells()
    dom.feed(res.stdout)
    assert dom.verdict.strip() == doc["verdict"]
    for i, row in enumerate(doc["summary"]):
        assert int(dom.cells[(i, "cases")]) == row["cases"]
        if row["output"] == "*":
            continue
        shown, want = float(dom.cells[(i, "max_abs")]), as_float(row["max_abs"])
        # Three significant digits on screen: within half a unit of the third digit.
        assert want == shown == 0 or abs(shown - want) <= 0.5 * 10 ** (math.floor(math.log10(abs(want))) - 2)


def test_screenshot_opens_with_the_verdict_banner(chromium, report, tmp_path):
    from PIL import Image  # matplotlib depends on Pillow

    doc, html = report
    shot = tmp_path / "page.png"
    res = _browser(chromium, f"--screenshot={shot}", "--window-size=1280,900", html.as_uri())
    assert shot.exists(), res.stderr[-2000:]
    img = Image.open(shot).convert("RGB")
    assert img.size == (1280, 900)
    want = {"not conformant": (0xC0, 0x26, 0x2D), "conformant": (0x1A, 0x7F, 0x37)}[doc["verdict"]]
    # The banner spans the top of the page, at least 120 px tall; below it the page is white.
    for y in (4, 60, 120):
        px = img.getpixel((6, y))
        assert all(abs(a - b) <= 8 for a, b in zip(px, want)), (y, px)
    assert img.getpixel((6, 400)) == (255, 255, 255)
