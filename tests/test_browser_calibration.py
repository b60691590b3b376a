"""The camera calibration in headless Chromium: open a photo of an invented step sample, enter its boxes and
known thicknesses (from a CSV, one corrected in the table after a refusal), fit in a worker, and read the
residual per box."""

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

#: Known thicknesses of the invented reference sample's steps (nm) and the width of a step (px).
STEPS_NM = (40.0, 90.0, 140.0, 190.0, 240.0, 300.0, 360.0, 420.0)
STEP_PX = 24


def _sample(tmp_path):
    """An invented 8-step oxide-on-silicon sample seen by a camera with mixed channels; (photo, box CSV)."""
    from physics.appearance import color_map
    from physics.stackfile import load_preset

    st = load_preset("thermal_oxide_on_silicon").stack
    srgb = color_map(st, 0, list(STEPS_NM), [0.0]).rgb[:, 0, :]
    mixing = np.array([[0.85, 0.12, 0.03], [0.08, 0.84, 0.08], [0.02, 0.15, 0.83]])
    img = np.clip(srgb @ mixing.T * 0.95 + 0.02, 0, 1)
    img = np.repeat(img[None], 40, axis=0).repeat(STEP_PX, axis=1)
    photo = tmp_path / "steps.png"
    buf = io.BytesIO()
    Image.fromarray(np.round(img * 255).astype(np.uint8)).save(buf, format="PNG")
    photo.write_bytes(buf.getvalue())
    rows = ["x0,y0,x1,y1,thickness_nm"] + [f"{i * STEP_PX + 4},8,{(i + 1) * STEP_PX - 4},32,{t:g}"
                                           for i, t in enumerate(STEPS_NM)]
    boxes = tmp_path / "steps.csv"
    boxes.write_text("\n".join(rows) + "\n")
    return photo, boxes


def _text(locator) -> str:
    """Text of a Panel pane (its content lives in a shadow root)."""
    return locator.evaluate("e => (e.shadowRoot || e).textContent")


def test_enter_boxes_fit_and_read_the_residuals(tmp_path):
    photo, boxes = _sample(tmp_path)
    with served_app(env={"FRINGEGAUGE_LIBRARY": str(tmp_path / "lab")}) as (url, log_path):
        with sync_playwright() as p:
            b = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
            pg = b.new_context(viewport={"width": 1366, "height": 900}).new_page()
            errors = []
            pg.on("pageerror", lambda e: errors.append(str(e)))
            pg.goto(url)
            pg.get_by_text("Colour → thickness").first.click(timeout=60_000)
            pg.locator(".fg-photo-drop input[type=file]").first.set_input_files(str(photo), timeout=60_000)
            pg.get_by_text("This photo: 8-bit PNG").first.wait_for(timeout=30_000)
            pg.locator(".fg-cal-method button", has_text="Calibrated camera").first.click()
            pg.locator(".fg-cal-box-csv input[type=file]").first.set_input_files(str(boxes))
            pg.get_by_text("steps.csv: 8 box(es) read").first.wait_for(timeout=30_000)
            assert pg.locator(".fg-cal-t8 input").first.input_value() == "420"
            win = pg.locator(".fg-win-hi input").first
            win.fill("500")
            win.press("Enter")
            box4 = pg.locator(".fg-cal-t4 input").first
            box4.fill("800")                                   # typed in the table: outside the window
            box4.press("Enter")
            pg.locator(".fg-cal-fit button").first.click()
            pg.locator(".fg-cal-fit-msg").filter(has_text="Box 4: its known thickness 800 nm is outside").first \
                .wait_for(timeout=30_000)
            box4.fill("190")
            box4.press("Enter")
            pg.locator(".fg-cal-fit button").first.click()
            table = pg.locator(".fg-cal-residuals").first
            table.get_by_text("map − known (nm)").wait_for(timeout=60_000)
            text = _text(table)
            assert "ΔE00" in text and "420" in text
            assert table.locator("tr").count() == len(STEPS_NM) + 1          # a heading and one row per box
            assert "In use" in _text(pg.locator(".fg-cal-active").first)
            assert pg.locator(".fg-reading select").first.input_value() == "calibrated camera"
            b.close()
        assert errors == []
        assert "Traceback" not in log_path.read_text(), log_path.read_text()
