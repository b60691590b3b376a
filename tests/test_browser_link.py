"""A link copied from the address bar opens every tab as it was, in a new page of headless Chromium."""

from pathlib import Path

import pytest

from tests.support.server import CHROMIUM, CHROMIUM_ARGS, DEEP_TEXT_JS, served_app

pytestmark = pytest.mark.browser

if not Path(CHROMIUM).exists():  # pragma: no cover - .ci/run installs it
    pytest.skip("Chromium is not installed at /usr/bin/chromium (apt-get install -y chromium)",
                allow_module_level=True)

from tests.test_browser import browser, server  # noqa: E402,F401  (the same served app and Chromium)

WAIT_MS = 30_000


def _open(browser, url, ready=None):
    ctx = browser.new_context(viewport={"width": 1366, "height": 768})
    pg = ctx.new_page()
    pg.console_errors = []
    pg.on("console", lambda m: pg.console_errors.append(m.text) if m.type == "error" else None)
    pg.on("pageerror", lambda e: pg.console_errors.append(str(e)))
    pg.goto(url)
    if ready:
        pg.get_by_text(ready).first.wait_for(timeout=WAIT_MS)
    else:
        pg.wait_for_function(f"() => ({DEEP_TEXT_JS})('.fg-hex')", timeout=WAIT_MS)
    return pg


def _type(pg, css, text):
    field = pg.locator(f"{css} input").first
    field.fill(text)
    field.press("Enter")


def _value(pg, css):
    return pg.locator(f"{css} input").first.input_value()


def _tab(pg, title):
    pg.get_by_text(title, exact=True).first.click()


def test_a_link_brings_back_every_tab_and_the_open_tab(browser, server):
    url, log_path = server
    pg = _open(browser, url)
    pg.locator("select").first.select_option(label="Silicon nitride on silicon")
    _type(pg, ".fg-thickness-field", "321")
    pg.wait_for_function("() => window.location.search.includes('d=321')", timeout=WAIT_MS)
    _tab(pg, "Colour → thickness")
    _type(pg, ".fg-colour-field", "#525a84")
    _type(pg, ".fg-nominal", "240")
    _tab(pg, "Spectrum → thickness")
    pg.get_by_text("Free offset (stray light)").first.click()
    _tab(pg, "Gratings")
    _type(pg, ".fg-grating-density", "600")
    pg.get_by_text("1666.7 nm").first.wait_for(timeout=WAIT_MS)
    pg.wait_for_function("() => window.location.search.includes('g_lpmm=600') && "
                         "window.location.search.includes('tab=gratings') && "
                         "window.location.search.includes('s_offset=1') && "
                         "window.location.search.includes('c_nominal=240')", timeout=WAIT_MS)
    link = pg.url
    assert len(link) < 30_000

    other = _open(browser, link, ready="1666.7 nm")      # the gratings tab is open, at 600 lines/mm     # the gratings tab is open, at 600 lines/mm
    assert _value(other, ".fg-grating-density") == "600"
    _tab(other, "Colour → thickness")
    assert _value(other, ".fg-colour-field") == "#525a84" and _value(other, ".fg-nominal") == "240"
    _tab(other, "Spectrum → thickness")
    box = other.get_by_role("checkbox", name="Free offset (stray light)").first
    assert box.is_checked()
    _tab(other, "Film explorer")
    other.wait_for_function(f"() => ({DEEP_TEXT_JS})('.fg-hex')", timeout=WAIT_MS)
    assert _value(other, ".fg-thickness-field") == "321"
    assert other.locator("select").first.evaluate("s => s.options[s.selectedIndex].text") == "Silicon nitride on silicon"
    assert pg.console_errors == [] and other.console_errors == []
    assert "Traceback" not in log_path.read_text()


def test_a_bad_link_field_is_named_on_the_page(browser, server):
    url, log_path = server
    pg = _open(browser, url + "?d=200&g_lpmm=nan&mystery=1", ready="Opening this link")
    note = pg.get_by_text("Opening this link").first
    text = note.text_content()
    assert "'g_lpmm'" in text and "not a number" in text and "'mystery'" in text
    assert _value(pg, ".fg-thickness-field") == "200"
    assert "Traceback" not in log_path.read_text()
