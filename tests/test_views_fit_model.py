"""The spectrum tab's film-model editor, driven from its objects without a browser.

The measured spectrum is made outside the project: reflectance of a silicon-nitride film on silicon from the
tmm package (coh_tmm), with the nitride's n from the refractiveindex.info page of Luke et al. 2015
(main/Si3N4/Luke) and silicon's from the page of the curated "Si", plus seeded noise. The fit starts from the
explorer's thermal oxide, not from that page.
"""

import json
import re

import numpy as np
import pytest
import tmm

from physics import material
from views.explorer import FilmExplorer
from views.fit import SpectrumFitSection

WL = np.linspace(400.0, 1000.0, 250)
#: Noise of the invented measurement (rms reflectance): a good reflectometer's 0.1-0.3 % (common practice).
NOISE = 0.002
D_TRUE = 500.0


@pytest.fixture(scope="module")
def nitride_csv():
    nitride, si = material("main/Si3N4/Luke"), material("Si")
    R = np.array([tmm.coh_tmm("s", [1.0, complex(nitride.nk(w)), complex(si.nk(w))], [np.inf, D_TRUE, np.inf],
                              0.0, w)["R"] for w in WL])
    R += np.random.default_rng(7).normal(0.0, NOISE, WL.size)
    text = ("Invented coating-shop export: PECVD nitride on a silicon monitor\nwavelength_nm,reflectance\n"
            + "\n".join(f"{w:.2f},{r:.6f}" for w, r in zip(WL, R)))
    return text.encode(), float(nitride.nk(633.0).real)


@pytest.fixture()
def section():
    s = SpectrumFitSection(FilmExplorer())            # thermal oxide on silicon, swept layer 0, 0°
    s.ex.state.set_stack(ambient="1.0")               # vacuum above, as the tmm spectrum has it
    return s


def _fit(section, csv, model="cauchy", **ticks):
    assert section.load_file("sample", csv, "nitride_invented.csv")
    section.film_model.value = model
    for name, value in ticks.items():
        getattr(section, f"film_{name}").value = value
    assert section.run_fit(sync=True)


def _shown(section, pattern):
    text = re.sub(r"<[^>]+>", " ", section.verdict.object)
    match = re.search(pattern, text)
    assert match, text
    return [float(g) for g in match.groups()]


def test_cauchy_fit_shows_thickness_n_and_parameters_and_goes_into_the_explorer(section, nitride_csv):
    csv, n633 = nitride_csv
    _fit(section, csv)
    assert not section.fit_msg.message.visible
    d, sd = _shown(section, r"d = ([\d.]+) ± ([\d.]+) nm \(1σ\)")
    assert d == pytest.approx(D_TRUE, rel=0.01) and 0 < sd < 10
    n, sn = _shown(section, r"n = ([\d.]+) ± ([\d.]+), k = 0 \(a transparent model\)\s+at 633 nm")
    assert abs(n - n633) < 0.01 and 0 < sn < 0.05          # Luke et al. 2015 page, n(633 nm) ≈ 2.04
    table = section.details.object
    for label in ("thickness d", "Cauchy A", "Cauchy B", "Cauchy C", "µm²"):
        assert label in table
    assert "rms residual" in section.verdict.object and "Cauchy A trade" in section.verdict.object
    assert "model='fixed'" not in section.verdict.object        # the page's words, not the API's
    assert section.fit_button.label == "Fit thickness and film"
    nk = section.film.nk_src.data
    assert len(nk["wl"]) == 200 and np.all(np.asarray(nk["n_hi"]) > np.asarray(nk["n_lo"]))
    assert section.film.nk_fig.visible and not section.scan_fig.visible
    assert len(section.model_src.data["res"]) == WL.size

    # "Use this fitted film": the explorer's layer becomes the fitted nitride
    assert section.film.use_button.visible
    before = json.loads(section.ex.state.stack_json)["layers"][0]["material"]
    assert section.use_fitted_film()
    state = section.ex.state
    layer = json.loads(state.stack_json)["layers"][0]
    assert layer["material"] != before and layer["material"]["kind"] == "cauchy"
    assert "nitride_invented.csv" in layer["material"]["source"]
    assert state.thickness_nm == pytest.approx(section.film.result.thickness_nm)
    assert abs(float(state.stack.layers[0].material.nk(633.0).real) - n633) < 0.01
    assert "layer 1 is now" in section.film.use_status.object and not section.film.use_button.visible
    assert section.film.result is not None                       # the fit stays shown: it is the stack's film now
    section._on_state()                                           # as a served page calls it, a tick later
    assert section.film.result is not None
    assert "fitted" in state.file_text()                          # and a saved stack file holds it
    section.ex.state.angle_deg = 10.0                             # another angle: that fit no longer applies
    assert section.film.result is None and "changed since the last fit" in section.verdict.object


def test_roughness_goes_into_the_stack_as_its_own_layer(section, nitride_csv):
    csv, _ = nitride_csv
    _fit(section, csv, roughness=True)
    r = section.film.result
    assert r.roughness_nm is not None and "surface roughness layer" in section.verdict.object
    assert "surface roughness layer" in section.details.object
    assert section.use_fitted_film()
    layers = json.loads(section.ex.state.stack_json)["layers"]
    assert [l["material"]["kind"] for l in layers] == ["effective-medium", "cauchy"]
    assert section.ex.state.swept_layer == 1
    assert layers[0]["thickness_nm"] == pytest.approx(r.roughness_nm)


def test_bad_requests_are_sentences_and_nothing_is_lost(section, nitride_csv):
    csv, _ = nitride_csv
    short = ("wl,R\n" + "\n".join(f"{400 + 10 * i},{0.3 + 0.001 * i:.4f}" for i in range(30))).encode()
    assert section.load_file("sample", short, "short.csv")
    section.film_model.value = "tauc-lorentz"
    for box in (section.film_roughness, section.film_spread, section.free_scale, section.free_offset):
        box.value = True
    section.run_fit(sync=True)
    msg = section.fit_msg.message.object
    assert section.fit_msg.message.visible and "free parameters" in msg and "need at least" in msg
    assert "fixed constants" in msg and "model=" not in msg
    assert section.film.result is None and section.spectrum[0].size == 30

    section.ex.state.set_stack(layers=[{"material": "SiO2", "thickness_nm": 500.0},
                                       {"material": "SiO2", "thickness_nm": 100.0}])
    section.second.value = 1
    assert section.load_file("sample", csv, "nitride_invented.csv")
    section.film_model.value = "cauchy"
    assert not section.run_fit(sync=True)
    assert "one unknown layer" in section.fit_msg.message.object
    assert section.spectrum[0].size == WL.size


def test_fixed_constants_is_the_thickness_fit_of_before(section, nitride_csv):
    csv, _ = nitride_csv
    assert section.load_file("sample", csv, "nitride_invented.csv")
    assert section.film_model.value == "fixed" and section.fit_button.label == "Fit thickness"
    section.run_fit(sync=True)
    assert section.result is not None and section.film.result is None
    assert not section.film.nk_fig.visible and section.scan_fig.visible


def test_model_and_ticks_travel_in_the_link_and_the_panel_holds_them(section):
    import panel as pn

    fields = {f.key: f for f in section.link_fields()}
    section.film_model.value = "tauc-lorentz"
    section.film_spread.value = True
    state = {k: fields[k].read() for k in ("s_model", "s_rough", "s_spread")}
    assert state == {"s_model": "tauc-lorentz", "s_rough": "0", "s_spread": "1"}
    section.film_model.value, section.film_spread.value = "fixed", False
    for key, text in state.items():
        assert fields[key].write(text) is None
    assert section.film_model.value == "tauc-lorentz" and section.film_spread.value
    assert not section.film_roughness.value
    assert "give one of" in fields["s_model"].write("drude")
    page = section.panel()
    assert section.film_model in page.select(pn.widgets.Select)
    assert section.film.use_button in page.select(pn.widgets.Button)
    assert any(p.object is section.film.nk_fig for p in page.select(pn.pane.Bokeh))


def test_the_fitted_film_downloads_with_its_parameters(section, nitride_csv):
    csv, _ = nitride_csv
    _fit(section, csv, model="cauchy-urbach")
    assert not section.film.download.disabled
    text = section.film._nk_csv().getvalue()
    assert "not certified metrology" in text and "nitride_invented.csv" in text and "k_exponent_per_ev" in text
    rows = [l.split(",") for l in text.splitlines() if l and not l.startswith("#")]
    assert rows[0] == ["wavelength_nm", "n", "sigma_n", "k", "sigma_k", "n_lo68", "n_hi68", "k_lo68", "k_hi68"]
    assert len(rows) == 201
    k, k_lo, k_hi = (np.array([float(r[i]) for r in rows[1:]]) for i in (3, 7, 8))
    assert np.all(k_lo >= 0) and np.all(k_lo <= k + 1e-12) and np.all(k_hi >= k - 1e-12)    # the sampled band
    spec = json.loads(text.split("stores it: ")[1].splitlines()[0])
    assert spec["kind"] == "cauchy" and len(spec["urbach"]) == 3


def test_two_term_sellmeier_and_the_instrument_bandwidth_on_the_page(section, nitride_csv):
    """The two-term Sellmeier is offered; a bandwidth typed on the page reaches the fit and is said in the verdict;
    a bandwidth out of range is refused beside its field; progress reaches the bar."""
    csv, n633 = nitride_csv
    assert "sellmeier-2" in section.film_model.options.values()
    section.film.bandwidth.input.value = "2"
    section.film.slit.value = "triangular"
    told = []
    section._show_progress = lambda job, f, text: told.append(f)
    _fit(section, csv, model="sellmeier-2")
    assert "Sellmeier B₂" in section.details.object
    assert "2 nm triangular slit" in section.verdict.object
    n, _ = _shown(section, r"n = ([\d.]+) ± ([\d.]+), k = 0 \(a transparent model\)\s+at 633 nm")
    assert abs(n - n633) < 0.01
    assert section.film.result.bandwidth_nm == 2.0 and section.film.result.slit == "triangular"
    assert told and max(told) == 1.0
    section.film.bandwidth.input.value = "80"
    assert not section.run_fit(sync=True)
    assert section.film.bandwidth.message.visible and "50" in section.film.bandwidth.message.object
    fields = {f.key: f for f in section.link_fields()}
    assert fields["s_bw"].write("1.5") is None and section.film.bandwidth.input.value == "1.5"
    assert fields["s_slit"].write("gaussian") is None and section.film.slit.value == "gaussian"
