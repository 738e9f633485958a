"""End to end in a real browser: the page served by `streamlit run`, driven by headless Chromium.

Debian's Chromium at /usr/bin/chromium is driven through Playwright; no browser
is ever downloaded. The test is skipped only when that browser is missing and
the CI variable is unset: in CI it must run.
"""

import os
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import numpy as np
import pytest
import astropy.units as u
from astropy.coordinates import SkyCoord

ROOT = Path(__file__).resolve().parents[1]
APP = ROOT / "app.py"
CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run"]
COMPONENT_FRAME = "iframe[title='streamlit_image_coordinates.streamlit_image_coordinates']"
START_TIMEOUT_S = 120

pytestmark = pytest.mark.skipif(
    not os.path.exists(CHROMIUM) and not os.environ.get("CI"),
    reason="Debian's chromium is not installed at /usr/bin/chromium (apt-get install chromium)")


def free_port():
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    port = free_port()
    log = tmp_path_factory.mktemp("server") / "streamlit.log"
    env = dict(os.environ, STREAMLIT_BROWSER_GATHER_USAGE_STATS="false")
    with open(log, "w") as out:
        process = subprocess.Popen(
            [sys.executable, "-m", "streamlit", "run", str(APP), "--server.headless", "true",
             "--server.port", str(port), "--server.address", "127.0.0.1",
             "--server.fileWatcherType", "none"],
            cwd=ROOT, env=env, stdout=out, stderr=subprocess.STDOUT)
    url = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + START_TIMEOUT_S
        while True:
            try:
                with urllib.request.urlopen(url + "/_stcore/health", timeout=2) as reply:
                    if reply.read().strip() == b"ok":
                        break
            except OSError:
                pass
            if process.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError("streamlit did not start:\n" + log.read_text()[-3000:])
            time.sleep(0.5)
        yield url, log
    finally:
        process.terminate()
        try:
            process.wait(timeout=20)
        except subprocess.TimeoutExpired:
            process.kill()


@pytest.fixture(scope="module")
def browser():
    from playwright.sync_api import sync_playwright

    with sync_playwright() as playwright:
        chromium = playwright.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        yield chromium
        chromium.close()


def read_table(locator):
    """Header and rows of an HTML table shown by st.table."""
    header = [cell.inner_text().strip() for cell in locator.locator("thead th").all()]
    rows = []
    for row in locator.locator("tbody tr").all():
        rows.append([cell.inner_text().strip() for cell in row.locator("th, td").all()])
    return header, rows


def test_click_on_a_demo_knot_measures_it_and_downloads_regions(server, browser, tmp_path):
    import lensview as lv
    from lensview.demo import Z_SOURCE, load_demo
    from lensview.page.viewport import Viewport
    from regions import PointPixelRegion, Regions

    from playwright.sync_api import TimeoutError as PlaywrightTimeout

    url, log = server
    cutout, fields, knots = load_demo()
    page = browser.new_page(viewport={"width": 1500, "height": 1250}, accept_downloads=True)
    page.goto(url)
    try:
        frame = page.wait_for_selector(COMPONENT_FRAME,
                                       timeout=START_TIMEOUT_S * 1000).content_frame()
        frame.wait_for_function("() => { const i = document.getElementById('image');"
                                " return i && i.complete && i.naturalWidth > 0 && i.width > 0; }",
                                timeout=START_TIMEOUT_S * 1000)
    except PlaywrightTimeout:
        page.screenshot(path=str(tmp_path / "no_picture.png"))
        pytest.fail("The picture never appeared; page text:\n" + page.inner_text("body")[:2000]
                    + "\nserver log:\n" + log.read_text()[-3000:])
    image = frame.locator("#image")
    natural_w, natural_h, shown_w, shown_h = image.evaluate(
        "i => [i.naturalWidth, i.naturalHeight, i.width, i.height]")
    ny, nx = cutout.data.shape
    # The page opens on the whole cutout; its picture follows the page's one mapping.
    viewport = Viewport(x0=0, y0=0, nx=nx, ny=ny, width=natural_w, height=natural_h)

    knot = SkyCoord(knots["ra"][0], knots["dec"][0], unit=u.deg)
    x, y = cutout.wcs.world_to_pixel(knot)
    u_display, v_display = viewport.cutout_to_display(float(x), float(y))
    # Click on the whole CSS pixel nearest the knot; browsers report whole pixels.
    css_x = round(u_display * shown_w / natural_w)
    css_y = round(v_display * shown_h / natural_h)
    box = image.bounding_box()
    page.mouse.click(box["x"] + css_x, box["y"] + css_y)

    clicked = cutout.wcs.pixel_to_world(*viewport.display_to_cutout(
        css_x * natural_w / shown_w, css_y * natural_h / shown_h))
    expected = lv.measure_candidates(clicked, fields, Z_SOURCE)

    table = page.locator("[data-testid='stTable'] table").first
    table.locator("tbody tr", has_text="K1").nth(len(fields) - 1).wait_for(timeout=60_000)
    header, rows = read_table(table)
    models = [row[header.index("model")] for row in rows]
    assert models == list(expected["model"])
    shown = np.array([float(row[header.index("offset (arcsec)")]) for row in rows])
    # The library's own measurement at the clicked position is the reference.
    np.testing.assert_allclose(shown, np.asarray(expected["offset_arcsec"]), atol=0.01)

    page.get_by_role("tab", name="Download and restore").click()
    with page.expect_download(timeout=60_000) as download_info:
        page.get_by_role("button", name="Download regions").click()
    region_path = tmp_path / "regions.fits"
    download_info.value.save_as(region_path)
    regions = Regions.read(region_path, format="fits")
    points = [r for r in regions if isinstance(r, PointPixelRegion)]
    assert len(points) == 1
    clicked_x, clicked_y = cutout.wcs.world_to_pixel(clicked)
    # Reference: the regions library's FITS region-table reader, in the cutout's pixels.
    assert points[0].center.x == pytest.approx(float(clicked_x), abs=1e-3)
    assert points[0].center.y == pytest.approx(float(clicked_y), abs=1e-3)
    assert len(regions) > len(points)      # the critical curves came along

    page.get_by_role("tab", name="Measurements").click()
    screenshot = tmp_path / "lensview_page.png"
    page.screenshot(path=str(screenshot), full_page=True)
    assert screenshot.stat().st_size > 50_000
    print(f"screenshot: {screenshot}")
