"""fringegauge browser page: `panel serve app.py`."""

import panel as pn

pn.extension()

pn.pages = None
pn.Column(
    "# fringegauge",
    "The optics core is in place (`physics/`); the film explorer page is being built.",
).servable(title="fringegauge")
