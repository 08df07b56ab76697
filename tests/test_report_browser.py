"""The demo's report.html in a real browser (headless Chromium): the page loads, every figure loads, the
screenshot is not blank, and the tables a reader sees hold no Python words and no negative zero.

Chromium comes from the system packages (Debian ``chromium``; ``make sysdeps`` and ``.ci/run`` install
it). Without it these tests fail, they are never skipped: a report nobody has opened is not tested.
"""

from __future__ import annotations

import html
import json
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

#: Where the system package puts the browser; the first one found is used.
BROWSERS = ("chromium", "chromium-browser")

#: Appended to a copy of the page: once everything has loaded, what each <img> got is written into the DOM.
PROBE = """<pre id='probe'></pre><script>
window.addEventListener('load', function () {
  var found = Array.prototype.map.call(document.images, function (im) {
    return {src: im.getAttribute('src'), complete: im.complete, width: im.naturalWidth, height: im.naturalHeight};
  });
  document.getElementById('probe').textContent = JSON.stringify(found);
});
</script>"""


def _browser() -> str:
    for name in BROWSERS:
        found = shutil.which(name)
        if found:
            return found
    pytest.fail("chromium is not installed: `apt-get install chromium` as root (make sysdeps does it; CI does it "
                "in .ci/run). The report must be checked in a real browser.")


def _run(browser: str, profile: Path, *args: str) -> str:
    # --no-sandbox: CI runs as root, where Chromium's sandbox refuses to start.
    command = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
               f"--user-data-dir={profile}", "--virtual-time-budget=5000", *args]
    done = subprocess.run(command, capture_output=True, text=True, timeout=180)
    assert done.returncode == 0, f"{' '.join(command)} failed: {done.stderr[-2000:]}"
    return done.stdout


def _images_in_browser(browser: str, page: Path, profile: Path) -> list[dict]:
    """What the browser loaded for each <img> of ``page`` (a probing copy is written next to it)."""
    probe = page.with_name("_probe_" + page.name)
    probe.write_text(page.read_text(encoding="utf-8").replace("</body>", PROBE + "</body>"), encoding="utf-8")
    try:
        dom = _run(browser, profile, "--dump-dom", probe.as_uri())
    finally:
        probe.unlink()
    found = re.search(r"<pre id=\"probe\">(.*?)</pre>", dom, re.S)
    assert found, "the probe script did not run: the page did not finish loading"
    return json.loads(html.unescape(found.group(1)))


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory):
    """The bundle of ``domains demo`` (the CDW scene with two bias maps), as a user gets it."""
    from domains import pipeline

    return pipeline.run_demo(tmp_path_factory.mktemp("browser") / "demo", progress=False)


@pytest.fixture(scope="module")
def browser():
    return _browser()


def test_every_figure_of_the_demo_report_loads_in_chromium(demo_report, browser, tmp_path):
    images = _images_in_browser(browser, demo_report, tmp_path / "profile")
    figures = sorted(p.name for p in (demo_report.parent / "figures").glob("*.png"))
    # derived: the page shows every figure the bundle holds, each once
    assert sorted(Path(i["src"]).name for i in images) == figures
    assert len(figures) >= 10  # derived: overview, order, domains, bias comparison and types figures of the demo
    for image in images:
        # common practice, no source: an image that failed to load has naturalWidth 0
        assert image["complete"] and image["width"] > 100 and image["height"] > 100, image


def test_the_image_check_sees_a_missing_figure(demo_report, browser, tmp_path):
    # The check above must be able to fail: a copy of the page naming a figure that is not there.
    page = demo_report.parent / "_broken.html"
    text = demo_report.read_text(encoding="utf-8")
    page.write_text(text.replace("figures/domains.png", "figures/no-such-figure.png"), encoding="utf-8")
    try:
        images = _images_in_browser(browser, page, tmp_path / "profile")
    finally:
        page.unlink()
    widths = {Path(i["src"]).name: i["width"] for i in images}
    assert widths["no-such-figure.png"] == 0  # derived: the file does not exist
    assert all(w > 0 for name, w in widths.items() if name != "no-such-figure.png")  # derived: the others do


def test_screenshot_of_the_report_is_not_blank(demo_report, browser, tmp_path):
    from PIL import Image

    shot = tmp_path / "report.png"
    _run(browser, tmp_path / "profile", "--window-size=1200,2400", f"--screenshot={shot}", demo_report.as_uri())
    pixels = np.asarray(Image.open(shot).convert("L"), float)
    assert pixels.shape == (2400, 1200)  # derived: the window size asked for
    # common practice, no source: a page that rendered text and figures is far from uniform; a blank or
    # failed page is one grey level. More than 5 % of the pixels are darker than the white background.
    assert pixels.std() > 20
    assert np.mean(pixels < 200) > 0.05


def test_tables_in_the_rendered_page_hold_no_python_words_or_negative_zero(demo_report, browser, tmp_path):
    dom = _run(browser, tmp_path / "profile", "--dump-dom", demo_report.as_uri())
    cells = [html.unescape(re.sub(r"<[^>]+>", "", c)).strip() for c in re.findall(r"<t[dh][^>]*>(.*?)</t[dh]>", dom, re.S)]
    # derived: the demo has a headline, domain, wall, contrast, summary and parameter tables
    assert len(cells) > 200
    for cell in cells:
        for word in (r"\bNone\b", r"\bTrue\b", r"\bFalse\b", r"\bnan\b", r"\bNaN\b", r"-0\.0+\b", r"^-0$"):
            assert not re.search(word, cell), (word, cell)  # issue 14: human words, no negative zero
        assert ";" not in cell or not re.search(r"\d;-?\d", cell), cell  # issue 14: no packed numbers
    text = html.unescape(re.sub(r"<[^>]+>", " ", dom))
    caption = re.search(r"Conductance contrast of each domain to the frame at each bias \(([^)]*)\)", text)
    assert caption and caption.group(1) == "nS"  # derived: the demo's maps are in nS (their sidecar units)
