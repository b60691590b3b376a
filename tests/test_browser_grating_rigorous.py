"""The gratings tab's rigorous curve and planner ranking in headless Chromium, opened from a link."""

from pathlib import Path

import pytest

from tests.support.server import CHROMIUM

pytestmark = pytest.mark.browser

if not Path(CHROMIUM).exists():  # pragma: no cover - .ci/run installs it
    pytest.skip("Chromium is not installed at /usr/bin/chromium (apt-get install -y chromium)",
                allow_module_level=True)

from tests.test_browser import browser, server  # noqa: E402,F401  (the same served app and Chromium)

#: A worker process starts on the first request (about a second on an idle machine, many on a busy one).
WAIT_MS = 120_000
#: A cheap groove for the curve: a 600 lines/mm lamellar glass grating, 120 nm deep, 500-700 nm.
LINK = "?tab=gratings&g_lpmm=600&g_groove=lamellar&g_from=500&g_to=700&g_rprofile=lamellar&g_rmat=SiO2&g_rdepth=120"


def test_curve_and_ranking_from_a_link(browser, server):
    url, _log = server
    ctx = browser.new_context(viewport={"width": 1366, "height": 900})
    pg = ctx.new_page()
    errors = []
    pg.on("pageerror", lambda e: errors.append(str(e)))
    pg.goto(url + LINK)
    pg.get_by_text("1666.7 nm").first.wait_for(timeout=WAIT_MS)         # groove spacing of 600 lines/mm
    assert pg.locator(".fg-rigorous-compute").count() == 1
    pg.get_by_role("button", name="Compute rigorous efficiency").click()
    pg.get_by_text("Fourier orders for TE").first.wait_for(timeout=WAIT_MS)
    pg.get_by_text("converged to 0.001").first.wait_for(timeout=WAIT_MS)     # the verdict beside the count
    pg.get_by_role("button", name="Rank by rigorous efficiency").click()
    pg.get_by_text("Ranked by rigorous efficiency").first.wait_for(timeout=WAIT_MS)
    search = pg.evaluate("() => window.location.search")
    assert "g_rmat=SiO2" in search and "g_rdepth=120" in search and "g_rprofile=lamellar" in search
    assert not errors
    ctx.close()
