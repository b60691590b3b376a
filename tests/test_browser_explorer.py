"""The film explorer in a real browser: its figures' ranges, the coating read-outs and the brightness line."""

import time

import pytest
from playwright.sync_api import sync_playwright

from tests.support.server import CHROMIUM, CHROMIUM_ARGS, DEEP_TEXT_JS, served_app

pytestmark = pytest.mark.browser

#: Bokeh's console warning when a figure's range has no start or end (a DataRange1d with no data).
RANGE_WARNING = "could not set initial ranges"
#: The explorer's figures, by the start of their titles.
EXPLORER_TITLES = ("Spectrum", "Reflectance, log scale", "Colour vs thickness", "Reference strip")
#: Seconds the page gets to settle after it has drawn its swatch (its figures arrive in turns).
SETTLE_S = 4

FIGURE_RANGES_JS = """() => { const out = [];
  for (const doc of Bokeh.documents) for (const m of doc._all_models.values())
    if (m.x_range !== undefined && m.renderers !== undefined && m.title)
      out.push([m.title.text || '', m.x_range.start, m.x_range.end, m.y_range.start, m.y_range.end]);
  return out; }"""


@pytest.fixture(scope="module")
def page(tmp_path_factory):
    library = tmp_path_factory.mktemp("lab-library")
    with served_app(env={"FRINGEGAUGE_LIBRARY": str(library)}) as (url, _log):
        with sync_playwright() as p:
            b = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
            pg = b.new_page(viewport={"width": 1366, "height": 768})
            pg.messages = []
            pg.on("console", lambda m: pg.messages.append(m.text))
            pg.goto(url)
            pg.wait_for_selector(".fg-swatch [data-hex]", timeout=90_000)
            time.sleep(SETTLE_S)
            yield pg
            b.close()


def test_the_explorer_figures_have_ranges_from_the_start(page):
    assert not [m for m in page.messages if RANGE_WARNING in m]
    figures = [f for f in page.evaluate(FIGURE_RANGES_JS) if f[0].startswith(EXPLORER_TITLES)]
    assert len(figures) == len(EXPLORER_TITLES)
    for title, *ends in figures:
        assert all(isinstance(v, (int, float)) and v == v for v in ends), (title, ends)


def test_coating_read_outs_and_the_brightness_line_are_on_the_page(page):
    assert "luminous R" in (page.evaluate(DEEP_TEXT_JS, ".fg-readout-text") or "")
    assert "Brightness: absolute" in (page.evaluate(DEEP_TEXT_JS, ".fg-bright-text") or "")


#: The page's tabs, in the order the test opens them (ending where it started).
TAB_TITLES = ("Colour → thickness", "Spectrum → thickness", "Gratings", "Lab library", "Film explorer")
#: Longest a tab may take to be built and drawn after it is opened (s), and how long its figures must stay
#: the same to count as drawn (s).
TAB_BUILT_WITHIN_S, TAB_STEADY_S = 30, 1.5


def _figures_settled(page):
    """Wait until the page's figures (titles) have stayed the same for TAB_STEADY_S."""
    last, since, t_end = None, time.monotonic(), time.monotonic() + TAB_BUILT_WITHIN_S
    while time.monotonic() < t_end:
        now = sorted(f[0] for f in page.evaluate(FIGURE_RANGES_JS))
        if now != last:
            last, since = now, time.monotonic()
        elif time.monotonic() - since >= TAB_STEADY_S:
            return
        time.sleep(0.25)


def test_every_tab_opens_without_a_range_warning_and_with_finite_ranges(page):
    for title in TAB_TITLES:
        page.get_by_text(title, exact=True).first.click()
        _figures_settled(page)
    assert not [m for m in page.messages if RANGE_WARNING in m]
    for title, *ends in page.evaluate(FIGURE_RANGES_JS):
        assert all(isinstance(v, (int, float)) and v == v for v in ends), (title, ends)
