"""The report page in a real browser: headless Chromium, at a laptop and a phone width.

Outside references: the W3C WebDriver standard (driven through the ``selenium`` bindings, Debian's
``chromium`` and ``chromium-driver``); the HTML Living Standard's ``HTMLImageElement.complete`` /
``naturalWidth`` (an image that failed to decode has ``naturalWidth`` 0) and
``HTMLMediaElement.readyState`` (``HAVE_METADATA`` = 1: the clip's header decoded) / ``videoWidth``;
CSSOM View's ``scrollWidth`` / ``clientWidth`` (content wider than the window overflows sideways).
Laptop 1366 × 768 and phone 390 × 844 CSS pixels are common screen sizes (common practice; from
memory).

Chromium is not a Python package: `.ci/run` installs it (Debian packages ``chromium`` and
``chromium-driver``) and sets ``KINECAST_REQUIRE_BROWSER=1``, under which a missing browser fails
these tests; on a machine without it they are skipped with that reason.
"""

import os
import shutil
import tempfile

import imageio.v3 as iio
import numpy as np
import pytest

from kinecast.cli import main

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
DRIVER = shutil.which("chromedriver") or "/usr/bin/chromedriver"
SIZES = {"laptop": (1366, 768), "phone": (390, 844)}
# every <img> decoded, every <video> past HAVE_METADATA with a picture size, or the first failure
MEDIA_STATE = """
const done = arguments[arguments.length - 1];
const images = [...document.images].map(i => ({kind: 'img', ok: i.complete && i.naturalWidth > 0}));
const clips = [...document.querySelectorAll('video')].map(v => new Promise(resolve => {
  const state = () => resolve({kind: 'video', ok: v.readyState >= 1 && v.videoWidth > 0,
                               error: v.error ? v.error.code : null});
  if (v.readyState >= 1 || v.error) { state(); return; }
  v.addEventListener('loadedmetadata', state); v.addEventListener('error', state);
  setTimeout(state, 15000);
}));
Promise.all(clips).then(v => done(images.concat(v)));
"""


def _browser():
    present = os.path.exists(CHROMIUM) and os.path.exists(DRIVER)
    if not present:
        why = f"headless Chromium not installed ({CHROMIUM}, {DRIVER}: Debian chromium chromium-driver)"
        if os.environ.get("KINECAST_REQUIRE_BROWSER") == "1":
            pytest.fail(why)
        pytest.skip(why)
    webdriver = pytest.importorskip("selenium.webdriver")
    opts = webdriver.ChromeOptions()
    opts.binary_location = CHROMIUM
    # flags for a closed network and a root user (the CI machine): no sandbox, no background traffic
    for flag in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                 "--no-first-run", "--disable-background-networking", "--disable-component-update",
                 "--disable-sync", "--hide-scrollbars", "--autoplay-policy=no-user-gesture-required",
                 f"--user-data-dir={tempfile.mkdtemp(prefix='kc-chromium-')}"):
        opts.add_argument(flag)
    return webdriver.Chrome(options=opts, service=webdriver.ChromeService(executable_path=DRIVER))


@pytest.fixture(scope="module")
def page(small_pendulum_run, tmp_path_factory):
    root, out = small_pendulum_run, tmp_path_factory.mktemp("rb")  # conftest.py: a rig and a 6-step fit
    scores = out / "scores"
    assert main(["score", str(root / "run"), str(root / "rig" / "trial_001"), "--holdout", "last:20",
                 "--samples", "4", "--out", str(scores)]) == 0
    assert main(["report", str(root / "run"), "--scores", str(scores), "--out", str(out / "report.html")]) == 0
    return out / "report.html"


@pytest.mark.slow
@pytest.mark.parametrize("size", SIZES)
def test_report_renders_in_chromium(page, size, tmp_path):
    driver = _browser()
    try:
        driver.set_window_size(*SIZES[size])
        driver.get(page.as_uri())
        driver.set_script_timeout(30)
        media = driver.execute_async_script(MEDIA_STATE)
        kinds = [m["kind"] for m in media]
        assert kinds.count("img") >= 3 and kinds.count("video") >= 1, kinds  # plots and a clip
        broken = [m for m in media if not m["ok"]]
        assert not broken, broken
        # nothing wider than the window: the reader scrolls down, not sideways (wide tables scroll
        # inside their own box)
        width, client = driver.execute_script(
            "const e = document.documentElement; return [e.scrollWidth, e.clientWidth];")
        assert width <= client, (size, width, client)
        shot = tmp_path / f"{size}.png"
        assert driver.save_screenshot(str(shot))
    finally:
        driver.quit()
    pixels = iio.imread(shot)[..., :3].astype(float)
    # not blank: a page of text and plots has dark text on a light ground, so many pixels differ
    # strongly from the page colour (a blank or failed page is one colour)
    ground = np.median(pixels.reshape(-1, 3), axis=0)
    inked = (np.abs(pixels - ground).max(axis=-1) > 64).mean()
    assert inked > 0.01, inked
