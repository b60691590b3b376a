"""fringegauge browser page. Serve with `panel serve app.py` (http://localhost:5006/app)."""

from functools import partial

import panel as pn

from views.explorer import FilmExplorer
from views.fit import SpectrumFitSection
from views.grating import GratingSection
from views.inverse import ColourToThickness, locked
from views.library import LibrarySection
from views.offline import serve_everything_locally
from views.pagebuild import BuiltOnFirstOpen, spare_explorers
from views.limits import page_closed, quiet_closed_connections, served
from views.urlstate import apply_query, state_to_query

serve_everything_locally()                        # a lab intranet often has no way out
pn.extension("filedropper", design="native", notifications=False)

#: The page address follows the state this long after the last change (ms).
ADDRESS_DELAY_MS = 400


def tab_opened(tabs, library, title):
    """Build a tab's section when it is first opened; sections that draw only while their tab is open are
    told so; the library is re-read when its tab is opened."""
    inverse = tabs["Colour → thickness"]
    if title in tabs:
        tabs[title].get()
    if inverse.built:
        inverse.set_shown(title == "Colour → thickness")
    if title == "Lab library":
        library.refresh()


def page():
    quiet_closed_connections()                     # a tab closed mid-write is normal, not a traceback
    if served():
        pn.state.on_session_destroyed(page_closed)          # defined outside: this module is gone by then
    explorer = spare_explorers(FilmExplorer).take() if served() else FilmExplorer()
    args = pn.state.session_args or {}
    if args:
        errors = apply_query(explorer.state, args)
        explorer._sync_widgets()
        if errors:
            explorer.file_msg.show_error(" ".join(errors))
    if pn.state.location is not None:
        location = pn.state.location

        pending = []

        def write_address(*_):
            pending.clear()
            location.search = state_to_query(explorer.state)

        def address_soon(*_):
            """Write the address once a drag pauses, not on every slider step (each write is a message)."""
            doc = pn.state.curdoc
            if not served(doc):
                write_address()
            elif not pending:
                pending.append(doc.add_timeout_callback(write_address, ADDRESS_DELAY_MS))
        explorer.state.param.watch(address_soon, list(explorer.state.param))
        pn.state.onload(write_address)
    def colour_section():
        inverse = ColourToThickness(explorer)
        inverse.set_shown(False)
        return inverse

    tabs = {"Colour → thickness": BuiltOnFirstOpen(colour_section),
            "Spectrum → thickness": BuiltOnFirstOpen(lambda: SpectrumFitSection(explorer)),
            "Gratings": BuiltOnFirstOpen(GratingSection)}
    library = LibrarySection(explorer, tabs["Colour → thickness"], tabs["Gratings"])
    return explorer.panel(extra_tabs=[*((title, tab.holder) for title, tab in tabs.items()),
                                      ("Lab library", library.panel())],
                          without_stack={"Gratings", "Lab library"}, on_tab=locked(partial(tab_opened, tabs, library)))


page().servable(title="fringegauge")
