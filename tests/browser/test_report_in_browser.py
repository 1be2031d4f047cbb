"""The HTML report opened in a real headless browser: Debian's chromium driven by Playwright.

No browser is downloaded: Playwright drives the system chromium (``/usr/bin/chromium``, which
.ci/run installs when missing). Checks: the page loads with no console message of type error and
no page error; no request leaves the file; every image decodes; the screenshot is not blank.
"""

import io
import os
from pathlib import Path

import pytest

CHROMIUM = "/usr/bin/chromium"
FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def browser():
    sync_api = pytest.importorskip("playwright.sync_api", reason="playwright is not installed")
    if not Path(CHROMIUM).exists():
        if os.environ.get("CI"):  # .ci/run installs it: a missing browser there is a failure
            pytest.fail(f"CI: no chromium at {CHROMIUM}; .ci/run should have installed it")
        pytest.skip(f"no chromium at {CHROMIUM} (apt-get install -y chromium; .ci/run does)")
    with sync_api.sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, headless=True, args=FLAGS)
        yield b
        b.close()


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    pytest.importorskip("matplotlib")
    import sys

    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "experiments"))
    from _report_helpers import tiny_store

    from propensim.experiments.report import write_report

    folder = tiny_store(tmp_path_factory.mktemp("browser") / "tiny")
    return write_report(folder).path


def test_report_loads_offline_with_every_image_decoded(browser, report):
    page = browser.new_page(viewport={"width": 1200, "height": 900})
    problems, requests = [], []
    page.on("console", lambda m: problems.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: problems.append(str(e)))
    page.on("request", lambda r: requests.append(r.url))
    page.goto(report.as_uri(), wait_until="load")
    sizes = page.evaluate(
        """Promise.all([...document.images].map(img => img.decode().then(
               () => [img.naturalWidth, img.naturalHeight], () => [0, 0])))"""
    )
    assert len(sizes) >= 5
    assert all(w > 100 and h > 100 for w, h in sizes), sizes
    outside = [u for u in requests if not u.startswith(("file://", "data:"))]
    assert outside == [], outside
    assert [u for u in requests if u.startswith("file://")] == [report.as_uri()]
    assert problems == [], problems
    assert page.title().startswith("tiny-report")
    png = page.screenshot(full_page=True)
    page.close()
    import numpy as np
    from PIL import Image  # installed with matplotlib

    pixels = np.asarray(Image.open(io.BytesIO(png)).convert("L"), dtype=float)
    assert pixels.shape[0] > 2000  # a long page: tables and figures
    inked = np.mean(pixels < 200)  # share of non-white pixels
    assert 0.01 < inked < 0.9 and pixels.std() > 10
