"""The HTML report in a real browser: headless Chromium loads it, decodes its images and draws it.

Chromium (Debian's `chromium` package; .ci/run installs it) is asked for the DOM after the page has
loaded (`--dump-dom`) and for a screenshot (`--screenshot`). A copy of the report gets a small
script that, on the load event, writes into a data attribute how many <img> the browser decoded
(`complete` and `naturalWidth > 0`, HTML Living Standard, the img element); a copy with one image's
bytes spoiled must show one fewer, so the check can fail. The screenshot must be a PNG of the
window size that is not blank. Skips, saying why, where no browser is installed. common practice.
"""

import base64
import io
import re
import shutil
import subprocess
from importlib import resources

import numpy as np
import pytest

from qhl.cli import main

BROWSERS = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")
BROWSER = next((b for b in BROWSERS if shutil.which(b)), None)
HEADINGS = ("Command line", "Versions", "Summary", "Plots", "Assumptions", "JSON data")
COUNTER = ('<script>window.addEventListener("load", function () { var imgs = Array.from(document.images); '
           'var ok = imgs.filter(function (i) { return i.complete && i.naturalWidth > 0; }).length; '
           'document.body.setAttribute("data-images-decoded", ok + "/" + imgs.length); });</script></body>')

pytestmark = [pytest.mark.slow,
              pytest.mark.skipif(BROWSER is None, reason="no headless browser installed (apt-get install chromium; "
                                                        ".ci/run does this where it can)")]


def _browser(tmp_path, *args):
    cmd = [BROWSER, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
           f"--user-data-dir={tmp_path / 'profile'}", *args]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=180)
    assert done.returncode == 0, done.stderr[-2000:]
    return done.stdout


def _report(tmp_path, argv, name):
    path = tmp_path / name
    assert main([*argv, "--report", str(path)]) == 0
    return path


@pytest.fixture(scope="module")
def reports(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("browser")
    with resources.as_file(resources.files("qhl") / "data" / "demo_cluster.toml") as demo:
        scan = _report(tmp, ["scan", str(demo), "--dipolar-scale", "0.5:1:2", "--workers", "0",
                             "--out", str(tmp / "scan.csv")], "scan.html")
    learn = _report(tmp, ["learn"], "learn.html")
    return {"learn": (learn, 1), "scan": (scan, 3)}


def _decoded(tmp_path, html, name):
    page = tmp_path / name
    page.write_text(html.replace("</body>", COUNTER), encoding="utf-8")
    dom = _browser(tmp_path, "--virtual-time-budget=10000", "--dump-dom", page.as_uri())
    found = re.search(r'<body[^>]*data-images-decoded="(\d+)/(\d+)"', dom)
    assert found, dom[:500]
    return dom, int(found.group(1)), int(found.group(2))


@pytest.mark.parametrize("command", ["learn", "scan"])
def test_browser_shows_headings_and_decodes_every_image(tmp_path, reports, command):
    path, n_images = reports[command]
    html = path.read_text(encoding="utf-8")
    dom, ok, total = _decoded(tmp_path, html, "counted.html")
    assert (ok, total) == (n_images, n_images)
    headings = [re.sub(r"<[^>]+>", "", h).strip() for h in re.findall(r"<h[12][^>]*>(.*?)</h[12]>", dom, re.S)]
    assert headings[0].startswith(f"qhl {command} report")
    for heading in HEADINGS:
        assert heading in headings, heading
    # the negative control: one image's PNG bytes spoiled (base64 of garbage) -> one image fewer decoded
    first = re.search(r'src="data:image/png;base64,([^"]+)"', html)
    spoiled = html.replace(first.group(1), base64.b64encode(b"not a png" * 50).decode(), 1)
    _, ok_spoiled, total_spoiled = _decoded(tmp_path, spoiled, "spoiled.html")
    assert (ok_spoiled, total_spoiled) == (n_images - 1, n_images)


def test_browser_screenshot_is_drawn(tmp_path, reports):
    import matplotlib.image as mpimg

    path, _ = reports["learn"]
    shot = tmp_path / "learn.png"
    _browser(tmp_path, f"--screenshot={shot}", "--window-size=1200,5000", path.as_uri())
    raw = shot.read_bytes()
    assert raw[:8] == b"\x89PNG\r\n\x1a\n"                     # RFC 2083, section 3.1
    pixels = mpimg.imread(io.BytesIO(raw), format="png")[..., :3]
    assert pixels.shape[:2] == (5000, 1200)
    ink = np.mean(np.any(pixels < 0.9, axis=-1))                 # share of pixels that are not near white
    assert 0.02 < ink < 0.9
    # colour: the embedded plots (matplotlib's default blue and orange) are drawn, not only text
    coloured = np.mean(np.ptp(pixels, axis=-1) > 0.3)
    assert coloured > 1e-3
