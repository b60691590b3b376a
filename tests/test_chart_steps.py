"""The printed reference chart's steps: each patch carries its thickness, hex and L*a*b*."""

import io

import numpy as np
import pytest
from PIL import Image

from physics.errors import InputError
from views.explorer import FilmExplorer
from views.render import strip_layout, strip_png
from views.state import MAX_CHART_STEPS, compute_chart_steps

KW = dict(title="Reference colours (invented test chart)", footer="computed colours")


def _steps(n):
    return [(10.0 * i, "#%02x%02x%02x" % (20 * i % 256, 100, 200), (50.0 + i, -3.0, 7.0)) for i in range(n)]


def test_steps_add_patches_of_their_colour_below_the_strip():
    t = np.linspace(0.0, 300.0, 50)
    rgb = np.full((50, 3), 0.5)
    plain = strip_layout(t, **KW)
    steps = _steps(12)
    with_steps = strip_layout(t, steps=steps, steps_caption="one every 10 nm", **KW)
    assert with_steps.height > plain.height + 200
    img = Image.open(io.BytesIO(strip_png(rgb, t, steps=steps, steps_caption="one every 10 nm", **KW))).convert("RGB")
    assert img.size == (with_steps.width, with_steps.height)
    # the patches' colours are in the image, below the strip
    below = np.asarray(img)[plain.rows[-1].y1 + 40:]
    for _, hex_, _ in steps[:3]:
        want = np.array([int(hex_[i:i + 2], 16) for i in (1, 3, 5)])
        assert np.any(np.all(below == want, axis=-1)), hex_


@pytest.mark.parametrize("bad", [[(1.0, "red", (1, 2, 3))], [(1.0, "#zzzzzz", (1, 2, 3))],
                                 [(1.0, "#112233", (1, 2))], [(float("nan"), "#112233", (1, 2, 3))], [(1.0,)]])
def test_bad_steps_are_refused_with_a_sentence(bad):
    with pytest.raises(InputError, match="steps"):
        strip_png(np.full((2, 3), 0.5), [0.0, 1.0], steps=bad, **KW)


def test_the_explorer_chart_steps_are_round_and_match_the_strip():
    ex = FilmExplorer()
    st = compute_chart_steps(ex.state, ex._scale)
    assert st.step_nm == 25.0 and st.thickness_nm.size <= MAX_CHART_STEPS + 1
    assert np.allclose(np.diff(st.thickness_nm), st.step_nm)
    # a step's colour is the strip's colour at that thickness
    i = int(np.argmin(np.abs(ex._strip.thickness_nm - 100.0)))
    j = int(np.argmin(np.abs(st.thickness_nm - ex._strip.thickness_nm[i])))
    assert np.allclose(st.lab[j], ex._strip.lab[i], atol=1.5)
    png = ex._strip_png().getvalue()
    assert Image.open(io.BytesIO(png)).size[1] > 1200
