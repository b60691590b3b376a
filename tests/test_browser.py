"""The film explorer in headless Chromium (Debian's /usr/bin/chromium, driven by Playwright)."""

import csv
import io
import re
from pathlib import Path

import pytest
from PIL import Image

from tests.support.server import CHROMIUM, CHROMIUM_ARGS, DEEP_TEXT_JS, served_app

pytestmark = pytest.mark.browser

if not Path(CHROMIUM).exists():  # pragma: no cover - .ci/run installs it
    pytest.skip("Chromium is not installed at /usr/bin/chromium (apt-get install -y chromium)",
                allow_module_level=True)

from playwright.sync_api import sync_playwright  # noqa: E402

#: Console message types that count as page errors.
ERROR_TYPES = {"error"}


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    library = tmp_path_factory.mktemp("lab-library")
    with served_app(env={"FRINGEGAUGE_LIBRARY": str(library)}) as (url, log_path):
        yield url, log_path


@pytest.fixture(scope="module")
def browser():
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        yield b
        b.close()


@pytest.fixture()
def page(browser, server):
    url, log_path = server
    ctx = browser.new_context(viewport={"width": 1366, "height": 768}, accept_downloads=True)
    pg = ctx.new_page()
    pg.console_errors = []
    pg.on("console", lambda m: pg.console_errors.append(m.text) if m.type in ERROR_TYPES else None)
    pg.on("pageerror", lambda e: pg.console_errors.append(str(e)))
    outside = []                                  # a lab intranet may have no way out: nothing may be fetched
    pg.on("request", lambda r: outside.append(r.url) if not r.url.startswith((url.rsplit("/", 1)[0], "data:",
                                                                              "blob:")) else None)
    pg.goto(url)
    _wait_swatch(pg)
    yield pg
    ctx.close()
    assert outside == [], f"the page fetched from outside its server: {sorted(set(outside))[:5]}"
    assert "Traceback" not in log_path.read_text(), log_path.read_text()


def _swatch_text(pg):
    return pg.evaluate(DEEP_TEXT_JS, ".fg-hex") or ""


def _wait_swatch(pg, not_text=None, timeout=30_000):
    pg.wait_for_function(
        f"() => {{ const t = ({DEEP_TEXT_JS})('.fg-hex'); return t && t !== {not_text!r}; }}"
        if not_text else f"() => !!({DEEP_TEXT_JS})('.fg-hex')", timeout=timeout)
    return _swatch_text(pg)


def _physics_hex(thickness_nm, angle_deg=0.0):
    from physics import spectrum_to_xyz, srgb_to_hex, xyz_to_srgb
    from physics.appearance import colour_band_nm
    from physics.stackfile import load_preset

    st = load_preset("thermal_oxide_on_silicon").stack.with_thickness(0, thickness_nm)
    wl = colour_band_nm(st)
    return srgb_to_hex(xyz_to_srgb(spectrum_to_xyz(st.reflectance(wl, angle_deg), wl)))


def _swatch_thickness(pg):
    text = pg.evaluate(DEEP_TEXT_JS, ".fg-swatch-values")
    return float(re.search(r"([\d.]+) nm at", text).group(1))


def test_page_loads_without_errors(page):
    assert _swatch_text(page) == _physics_hex(100.0)
    page.wait_for_timeout(1500)
    assert page.console_errors == []


def test_thickness_slider_moves_the_swatch_to_the_physics_value(page):
    handle = page.locator(".fg-thickness-slider .noUi-handle").first
    handle.focus()
    before = _swatch_text(page)
    for _ in range(60):                       # 60 steps of 0.5 nm
        page.keyboard.press("ArrowRight")
    page.wait_for_function(f"() => ({DEEP_TEXT_JS})('.fg-swatch-values').includes('130.0 nm')", timeout=30_000)
    hex_now = _swatch_text(page)
    assert hex_now != before
    assert hex_now == _physics_hex(_swatch_thickness(page))
    # the typed field follows the slider once it comes to rest (not at every step, to spare the server)
    field = page.locator(".fg-thickness-field input").first
    page.wait_for_function("(el) => el.value === '130'", arg=field.element_handle(), timeout=10_000)
    assert page.console_errors == []


def test_dragging_the_slider_with_the_mouse_updates_swatch_and_field(page):
    handle = page.locator(".fg-thickness-slider .noUi-handle").first
    handle.scroll_into_view_if_needed()                # the sidebar scrolls; a mouse only reaches what is shown
    box = handle.bounding_box()
    page.mouse.move(box["x"] + box["width"] / 2, box["y"] + box["height"] / 2)
    page.mouse.down()
    for dx in range(10, 160, 10):                 # a drag in steps, as a hand makes it
        page.mouse.move(box["x"] + box["width"] / 2 + dx, box["y"] + box["height"] / 2)
        page.wait_for_timeout(30)
    page.mouse.up()
    field = page.locator(".fg-thickness-field input").first
    page.wait_for_function(f"""(el) => {{
        const t = ({DEEP_TEXT_JS})('.fg-swatch-values') || '';
        const m = t.match(/([\d.]+) nm at/);
        return m && Math.abs(parseFloat(m[1]) - parseFloat(el.value)) < 1e-6 && parseFloat(el.value) > 100;
    }}""", arg=field.element_handle(), timeout=15_000)
    assert _swatch_text(page) == _physics_hex(_swatch_thickness(page))
    assert page.console_errors == []


@pytest.mark.parametrize("bad", ["abc", "-5", "1e9"])
def test_bad_thickness_shows_inline_message_and_page_keeps_working(page, bad):
    field = page.locator(".fg-thickness-field input").first
    field.fill(bad)
    field.press("Enter")
    page.get_by_role("alert").filter(has_text="Thickness").first.wait_for(timeout=15_000)
    assert _swatch_thickness(page) == 100.0
    field.fill("250")
    field.press("Enter")
    page.wait_for_function(f"() => ({DEEP_TEXT_JS})('.fg-swatch-values').includes('250.0 nm')", timeout=30_000)
    assert _swatch_text(page) == _physics_hex(250.0)
    assert page.console_errors == []


def _download(page, css):
    with page.expect_download(timeout=60_000) as info:
        page.locator(f".{css} button, .{css} a").first.click()
    path = info.value.path()
    return Path(path).read_bytes()


def test_downloads_open_and_parse(page):
    page.locator(".fg-dl-csv").first.scroll_into_view_if_needed()
    data = _download(page, "fg-dl-csv")
    rows = [r for r in csv.reader(io.StringIO(data.decode())) if r and not r[0].startswith("#")]
    assert rows[0][0] == "wavelength_nm" and len(rows) > 300
    for css in ("fg-dl-map", "fg-dl-strip"):
        img = Image.open(io.BytesIO(_download(page, css)))
        assert img.format == "PNG" and img.size[0] >= 800
    assert page.console_errors == []


def test_link_opens_the_same_view(page, browser):
    field = page.locator(".fg-thickness-field input").first
    field.fill("321")
    field.press("Enter")
    page.wait_for_function(f"() => ({DEEP_TEXT_JS})('.fg-swatch-values').includes('321.0 nm')", timeout=30_000)
    page.wait_for_function("() => window.location.search.includes('d=321')", timeout=15_000)
    link = page.url
    other = browser.new_page()
    other.goto(link)
    other.wait_for_function(f"() => ({DEEP_TEXT_JS})('.fg-swatch-values') && "
                            f"({DEEP_TEXT_JS})('.fg-swatch-values').includes('321.0 nm')", timeout=30_000)
    assert other.evaluate(DEEP_TEXT_JS, ".fg-hex") == _physics_hex(321.0)
    other.close()


def test_typed_colour_to_candidates_in_the_page(page):
    page.get_by_text("Colour → thickness").click()
    field = page.locator(".fg-colour-field input").first
    field.fill("#525a84")
    field.press("Enter")
    page.get_by_text("Best match 100 nm").first.wait_for(timeout=30_000)
    field.fill("not a colour")
    field.press("Enter")
    page.get_by_role("alert").filter(has_text="is not a colour").first.wait_for(timeout=15_000)
    assert page.console_errors == []


def test_photo_to_thickness_map_in_the_page(page, tmp_path):
    """An invented bevelled oxide on a silicon monitor wafer, photographed with a colour cast."""
    import numpy as np
    from physics.appearance import color_map
    from physics.stackfile import load_preset

    st = load_preset("thermal_oxide_on_silicon").stack
    d = np.concatenate([np.zeros(60), np.linspace(50, 600, 340)])
    rgb = color_map(st, 0, d, [0.0]).rgb[:, 0, :]
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4) * np.array([1.1, 1.0, 0.9]) * 0.8
    enc = np.where(lin <= 0.0031308, 12.92 * lin, 1.055 * lin ** (1 / 2.4) - 0.055)
    img = np.repeat(np.round(enc * 255).astype(np.uint8)[None], 200, axis=0)
    path = tmp_path / "wedge.png"
    Image.fromarray(img).save(path)
    page.get_by_text("Colour → thickness").click()
    page.locator(".fg-photo-drop input[type=file]").first.set_input_files(str(path))
    page.get_by_text("No calibration box").first.wait_for(timeout=30_000)
    page.get_by_text("Make thickness map").first.click()
    page.get_by_text("of the region matched").first.wait_for(timeout=60_000)
    page.get_by_text("uniformity (max − min)/(2 mean)").first.wait_for(timeout=10_000)
    assert page.console_errors == []


def test_gratings_tab_answers_a_new_groove_density(page):
    page.get_by_text("Gratings", exact=True).first.click()
    page.get_by_text("833.3 nm").first.wait_for(timeout=30_000)        # groove spacing of the 1200 lines/mm preset
    page.get_by_text("Never look at a laser or the sun").first.wait_for(timeout=10_000)
    field = page.locator(".fg-grating-density input").first
    field.fill("600")
    field.press("Enter")
    page.get_by_text("1666.7 nm").first.wait_for(timeout=30_000)
    field.fill("abc")
    field.press("Enter")
    page.get_by_role("alert").filter(has_text="Groove density").first.wait_for(timeout=15_000)
    assert page.get_by_text("1666.7 nm").first.is_visible()
    assert page.console_errors == []


def test_stack_files_through_the_drop_zone_and_an_oversized_one_stopped_in_the_browser(page, tmp_path):
    """A 2 MB file is stopped by the drop zone before any of it is sent (the stack file cap is 1 MB);
    the page keeps working and then opens a real stack file."""
    before = _swatch_text(page)
    big = tmp_path / "huge_stack.json"
    big.write_bytes(b" " * 2_000_000)
    zone = page.locator(".fg-stack-file input[type=file]").first
    zone.set_input_files(str(big))
    page.wait_for_function(f"() => (({DEEP_TEXT_JS})('.filepond--file-status-main') || '').includes('too large')",
                           timeout=15_000)
    assert _swatch_text(page) == before
    zone.set_input_files(str(Path(__file__).resolve().parents[1] / "presets" / "broadband_ar_on_bk7.json"))
    _wait_swatch(page, not_text=before)
    page.wait_for_function(f"() => (({DEEP_TEXT_JS})('.fg-swatch-values') || '').includes('nm at')", timeout=15_000)
    assert page.console_errors == []


def test_every_tab_and_a_preset_change_fetch_nothing_from_outside(page):
    """A hidden tab's parts are updated while another is shown; their stylesheets must still come
    from this server (the page fixture fails on any request elsewhere)."""
    tabs = page.locator(".bk-tab")
    for i in range(1, tabs.count()):
        tabs.nth(i).click()
        page.wait_for_timeout(800)
    tabs.nth(0).click()
    before = _swatch_text(page)
    page.locator("select").first.select_option(index=2)
    _wait_swatch(page, not_text=before)
    page.locator("select").first.select_option(index=3)
    page.wait_for_timeout(1000)
    for i in range(1, tabs.count()):
        tabs.nth(i).click()
        page.wait_for_timeout(800)
    assert page.console_errors == []


def test_clicking_a_tick_box_s_words_ticks_it(page):
    page.get_by_text("Spectrum → thickness").click()
    words = page.get_by_text("Free scale (imperfect reference)").first
    words.scroll_into_view_if_needed()
    words.click()
    box = page.locator("label", has_text="Free scale").locator("input[type=checkbox]").first
    page.wait_for_function("(el) => el.checked", arg=box.element_handle(), timeout=10_000)
    assert page.console_errors == []


def test_spectrum_fit_in_the_page(page, tmp_path):
    """An invented oxide monitor wafer measured with a fibre probe: semicolon CSV in percent."""
    import numpy as np
    from physics.stackfile import load_preset

    st = load_preset("thermal_oxide_on_silicon").stack
    wl = np.linspace(400, 1000, 121)
    R = st.with_thickness(0, 640.0).reflectance(wl)
    path = tmp_path / "probe.csv"
    path.write_text("Wavelength (nm);Reflectance (%)\n" + "\n".join(f"{w:.1f};{100 * r:.4f}" for w, r in zip(wl, R)))
    page.get_by_text("Spectrum → thickness").click()
    page.locator(".fg-fit-sample-file input[type=file]").first.set_input_files(str(path))
    page.get_by_text("Reflectance read as percent").first.wait_for(timeout=30_000)
    page.locator(".fg-fit-run button").first.click()
    page.get_by_text("d = 639.9").or_(page.get_by_text("d = 640.0")).first.wait_for(timeout=60_000)
    assert page.console_errors == []


def test_film_fit_with_a_bandwidth_in_the_page(page, tmp_path):
    """The film-model fit in its worker process: an invented nitride-like Cauchy film (n = 1.98 + 0.018/λ², λ in
    µm) of 500 nm on silicon in percent, fitted with a Cauchy model through a 1 nm Gaussian slit."""
    import numpy as np
    from physics import CauchyMaterial, Layer, Stack, material

    wl = np.linspace(400, 1000, 151)
    R = Stack([Layer(CauchyMaterial(1.98, 0.018), 500.0)], material("Si"), ambient=1.0).reflectance(wl)
    path = tmp_path / "nitride.csv"
    path.write_text("Wavelength (nm);Reflectance (%)\n" + "\n".join(f"{w:.1f};{100 * r:.4f}" for w, r in zip(wl, R)))
    page.get_by_text("Spectrum → thickness").click()
    page.locator(".fg-fit-sample-file input[type=file]").first.set_input_files(str(path))
    page.get_by_text("Reflectance read as percent").first.wait_for(timeout=30_000)
    page.locator(".fg-fit-model select").first.select_option(label="Cauchy (transparent)")
    box = page.locator(".fg-fit-bandwidth input").first
    box.fill("1")
    box.press("Enter")
    page.get_by_text("read through the instrument's 1 nm slit").first.wait_for(timeout=30_000)     # the hint
    page.locator(".fg-fit-run button").first.click()
    page.get_by_text("instrument's 1 nm gaussian slit").first.wait_for(timeout=120_000)           # the verdict
    page.get_by_text("fitted with the film model").first.wait_for(timeout=5_000)
    assert page.console_errors == []


#: The texts of the lab library's list: every <option> under the list widget, through shadow roots.
LIBRARY_OPTIONS_JS = """() => {
  const out = [];
  const walk = (root, inside) => {
    for (const el of root.querySelectorAll('*')) {
      const here = inside || (el.classList && el.classList.contains('fg-lib-list'));
      if (here && el.tagName === 'OPTION') out.push(el.textContent);
      if (el.shadowRoot) walk(el.shadowRoot, here);
    }
  };
  walk(document, false);
  return out;
}"""


def _save_to_library(pg, name, user):
    pg.get_by_text("Lab library", exact=True).first.click()
    pg.get_by_label("Name to save under").fill(name)
    pg.get_by_label("Name to save under").press("Enter")
    pg.get_by_label("Your name or initials (saved with the item)").fill(user)
    pg.get_by_label("Your name or initials (saved with the item)").press("Enter")
    pg.get_by_text("Save to the lab library", exact=True).click()


def test_two_users_save_one_name_and_the_second_is_told(page, browser, server):
    name = "Gate oxide (line 3) invented"
    _save_to_library(page, name, "ak")
    page.wait_for_function(f"() => (({DEEP_TEXT_JS})('.fg-lib-text') || '').includes('Saved the stack')")
    other = browser.new_context(viewport={"width": 1366, "height": 768}).new_page()
    other.goto(server[0])
    _wait_swatch(other)
    _save_to_library(other, name, "bz")
    other.wait_for_function(f"() => (({DEEP_TEXT_JS})('.fg-lib-text') || '').includes('version 2')")
    assert "saved by ak" in other.evaluate(DEEP_TEXT_JS, ".fg-lib-text")
    other.context.close()
    page.get_by_text("Refresh list", exact=True).click()
    page.wait_for_function("() => (" + LIBRARY_OPTIONS_JS + ")().some(t => t.includes('v2') && t.includes('bz'))")
    assert "version 1" in page.evaluate(DEEP_TEXT_JS, ".fg-lib-entry")       # the user's choice is kept
    assert not page.console_errors
