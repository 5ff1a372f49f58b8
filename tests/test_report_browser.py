"""The report as a real browser shows it: headless Chromium, with the network blocked.

Chromium (Debian package ``chromium``) renders the written file twice: once to a PNG
screenshot, once to the DOM after layout (``--dump-dom``). The DOM must hold every section
heading and every plot the report meant to show, which a missing closing tag, a broken
inline SVG or a blocked external resource would spoil. Skipped, with the reason, when
Chromium is not installed.
"""

from __future__ import annotations

import shutil
import struct
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import pytest

from allocator.case import load_case
from allocator.report import write_report

# a real browser start takes seconds: part of the whole suite, not the fast loop
pytestmark = [pytest.mark.browser, pytest.mark.slow]

CASES = Path(__file__).resolve().parent.parent / "cases"
WIDTH, HEIGHT = 1200, 4000


def _chromium() -> str:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    if Path("/usr/bin/chromium").exists():
        return "/usr/bin/chromium"
    pytest.skip("chromium not installed: apt-get install chromium")


def _run(browser: str, profile: Path, *args: str) -> subprocess.CompletedProcess:
    command = [
        browser,
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--disable-extensions",
        "--disable-dev-shm-usage",  # small /dev/shm in containers would crash the renderer
        "--hide-scrollbars",
        f"--user-data-dir={profile}",
        # no name resolves and every request goes to a closed local port: no network at all
        "--host-resolver-rules=MAP * ~NOTFOUND",
        "--proxy-server=127.0.0.1:9",
        *args,
    ]
    return subprocess.run(command, capture_output=True, text=True, timeout=120, check=False)


class _Dom(HTMLParser):
    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.h2: list[str] = []
        self.section_ids: list[str] = []
        self.svg_top = 0
        self._depth = 0
        self._h2: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        if tag == "section":
            self.section_ids.append(dict(attrs).get("id"))
        elif tag == "h2" and dict(attrs).get("class") != "toc":
            self._h2 = []
        elif tag == "svg":
            self.svg_top += self._depth == 0
            self._depth += 1

    def handle_endtag(self, tag):
        if tag == "h2" and self._h2 is not None:
            self.h2.append(" ".join("".join(self._h2).split()))
            self._h2 = None
        elif tag == "svg":
            self._depth -= 1

    def handle_data(self, data):
        if self._h2 is not None:
            self._h2.append(data)


def _png_size(data: bytes) -> tuple[int, int]:
    assert data[:8] == b"\x89PNG\r\n\x1a\n", "not a PNG file"
    return struct.unpack(">II", data[16:24])


@pytest.fixture(scope="module")
def rendered(tmp_path_factory):
    browser = _chromium()
    root = tmp_path_factory.mktemp("browser")
    case = load_case(CASES / "gearbox_end_play.toml")
    page = root / "report.html"
    # one model keeps the solves few; every section and every plot is still there
    report = write_report(case, page, ["rss"], samples=4000, seed=1, frontier_points=3)
    screenshot = root / "screenshot.png"
    shot = _run(browser, root / "profile-shot", f"--screenshot={screenshot}", f"--window-size={WIDTH},{HEIGHT}", page.as_uri())
    dump = _run(browser, root / "profile-dom", "--dump-dom", page.as_uri())
    return report, screenshot, shot, dump


def test_screenshot_is_written_and_not_blank(rendered):
    _, screenshot, shot, _ = rendered
    assert shot.returncode == 0, shot.stderr[-2000:]
    assert screenshot.exists(), shot.stderr[-2000:]
    data = screenshot.read_bytes()
    assert _png_size(data) == (WIDTH, HEIGHT)
    assert len(data) > 50_000  # a blank page of this size compresses to a few kB
    from PIL import Image  # pillow ships with matplotlib

    with Image.open(screenshot) as image:
        grey = image.convert("L")
        low, high = grey.getextrema()
        assert low < 64 and high > 240  # dark text on a light page
        histogram = grey.histogram()
        # ink covers a real part of the page, not a stray line
        assert sum(histogram[:128]) > 0.01 * WIDTH * HEIGHT


def test_dom_holds_every_heading_and_plot(rendered):
    report, _, _, dump = rendered
    assert dump.returncode == 0, dump.stderr[-2000:]
    dom = _Dom()
    dom.feed(dump.stdout)
    assert dom.section_ids == list(report.section_ids)
    assert dom.h2 == list(report.headings)
    assert dom.svg_top == len(report.figures())
