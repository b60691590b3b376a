"""The colour tab in headless Chromium: the headline of a colour several orders share, and the map PNG's
orientation against the map on the page."""

import io
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from tests.support.server import CHROMIUM, CHROMIUM_ARGS, served_app

pytestmark = pytest.mark.browser

if not Path(CHROMIUM).exists():  # pragma: no cover - .ci/run installs it
    pytest.skip("Chromium is not installed at /usr/bin/chromium (apt-get install -y chromium)",
                allow_module_level=True)

from playwright.sync_api import sync_playwright  # noqa: E402

#: Viridis' first and last colours: the thinnest and the thickest of a map's colour range.
VIRIDIS_LOW, VIRIDIS_HIGH = np.array([0x44, 0x01, 0x54]), np.array([0xFD, 0xE7, 0x25])


@pytest.fixture(scope="module")
def page(tmp_path_factory):
    library = tmp_path_factory.mktemp("lab-library")
    with served_app(env={"FRINGEGAUGE_LIBRARY": str(library)}) as (url, log_path):
        with sync_playwright() as p:
            b = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
            ctx = b.new_context(viewport={"width": 1366, "height": 768}, accept_downloads=True)
            pg = ctx.new_page()
            pg.errors = []
            pg.on("pageerror", lambda e: pg.errors.append(str(e)))
            pg.goto(url)
            pg.get_by_text("Colour → thickness").first.click(timeout=60_000)
            pg.locator(".fg-colour-field input").first.wait_for(timeout=60_000)
            yield pg
            b.close()
        assert "Traceback" not in log_path.read_text(), log_path.read_text()


def test_a_colour_several_orders_share_is_said_plainly_and_not_green(page):
    field = page.locator(".fg-colour-field input").first
    field.fill("#937e8d")
    field.press("Enter")
    verdict = page.locator(".fg-verdict").first
    verdict.filter(has_text="colour alone cannot decide").wait_for(timeout=30_000)
    text = verdict.evaluate("e => [...e.shadowRoot.querySelectorAll('b')].map(b => b.textContent).join('|')")
    assert "850 nm, or 666 / 593 nm: colour alone cannot decide" in text, text
    classes = verdict.get_attribute("class") or ""
    assert "alert-warning" in classes and "alert-success" not in classes
    angle = page.locator(".fg-view-angle input").first
    assert angle.is_visible()                          # the angle the answer used, beside it
    angle.fill("41.5")
    angle.press("Enter")                               # answered again once the field rests
    verdict.filter(has_text="at 41.5° from the normal").wait_for(timeout=30_000)
    angle.fill("0")
    angle.press("Enter")
    verdict.filter(has_text="at 0° from the normal").wait_for(timeout=30_000)
    assert page.errors == []


def _rows_of(img: np.ndarray, colour: np.ndarray) -> np.ndarray:
    return np.nonzero(np.abs(img.astype(int) - colour).sum(axis=2) < 40)[0]


def test_the_map_png_has_the_same_orientation_as_the_map_on_the_page(page, tmp_path):
    """An invented monitor wafer photo: a thin oxide band along its top edge, thicker oxide below."""
    from physics.appearance import color_map
    from physics.stackfile import load_preset

    st = load_preset("thermal_oxide_on_silicon").stack
    rgb = color_map(st, 0, [60.0, 140.0], [0.0]).rgb[:, 0, :]
    img = np.empty((120, 160, 3))
    img[:30], img[30:] = rgb[0], rgb[1]
    path = tmp_path / "banded.png"
    Image.fromarray(np.round(img * 255).astype(np.uint8)).save(path)
    page.locator(".fg-photo-drop input[type=file]").first.set_input_files(str(path))
    page.get_by_text("No calibration box").first.wait_for(timeout=30_000)
    win_hi = page.locator(".fg-win-hi input").first
    win_hi.fill("200")                                 # one order only: 60 and 140 nm both in the first
    win_hi.press("Enter")
    page.get_by_text("Make thickness map").first.click()
    page.get_by_text("of the region matched").first.wait_for(timeout=60_000)
    page.wait_for_timeout(1000)
    shot = np.asarray(Image.open(io.BytesIO(page.locator(".fg-tmap").first.screenshot())).convert("RGB"))
    with page.expect_download() as dl:
        page.get_by_text("Thickness map with colour bar (.png)").first.click()
    png = np.asarray(Image.open(dl.value.path()).convert("RGB"))
    for picture in (shot, png):
        low, high = _rows_of(picture, VIRIDIS_LOW), _rows_of(picture, VIRIDIS_HIGH)
        assert low.size and high.size
        assert np.median(low) < np.median(high)        # the thin band is above the rest in both
    assert page.errors == []
