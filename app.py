"""fringegauge browser page. Serve with `panel serve app.py` (http://localhost:5006/app)."""

from functools import partial

import panel as pn

from physics.materials import page_wording
from views.explorer import FilmExplorer, _esc
from views.fit import SpectrumFitSection
from views.grating import GratingSection
from views.inverse import ColourToThickness, locked
from views.library import LibrarySection
from views.offline import serve_everything_locally
from views.pagebuild import BuiltOnFirstOpen, spare_explorers
from views.limits import page_closed, quiet_closed_connections, served
from views.urlstate import PageLink

serve_everything_locally()                        # a lab intranet often has no way out
pn.extension("filedropper", design="native", notifications=False)

#: The page address follows the state this long after the last change (ms).
ADDRESS_DELAY_MS = 400


def tab_opened(tabs, library, title, now=None):
    """Build a tab's section when it is first opened (off the loop when served); sections that draw only
    while their tab is open are told so; the library is re-read when its tab is opened. ``now`` (a dict
    of the page's) keeps the open tab for a section that arrives from its builder after the person moved on."""
    inverse = tabs["Colour → thickness"]
    now = {} if now is None else now
    now["tab"] = title

    def shown():
        if inverse.built:
            inverse.set_shown(now.get("tab") == "Colour → thickness")
    if title in tabs:
        tabs[title].open_soon(pn.state.curdoc, then=shown)
    shown()
    if title == "Lab library":
        library.refresh()


def page():
    quiet_closed_connections()                     # a tab closed mid-write is normal, not a traceback
    if served():
        pn.state.on_session_destroyed(page_closed)          # defined outside: this module is gone by then
    explorer = spare_explorers(FilmExplorer).take() if served() else FilmExplorer()
    pending, follow = [], []

    def built(title, make):
        """Build a tab's section; from then on the page address follows its settings too."""
        def followed(section):
            for fn in follow:
                fn(title, section)
        return BuiltOnFirstOpen(make, on_built=followed)

    def colour_section():
        inverse = ColourToThickness(explorer)
        inverse.set_shown(False)
        return inverse

    tabs = {"Colour → thickness": built("Colour → thickness", colour_section),
            "Spectrum → thickness": built("Spectrum → thickness", lambda: SpectrumFitSection(explorer)),
            "Gratings": built("Gratings", GratingSection)}
    library = LibrarySection(explorer, tabs["Colour → thickness"], tabs["Gratings"])
    layout = explorer.panel(extra_tabs=[*((title, tab.holder) for title, tab in tabs.items()),
                                        ("Lab library", library.panel())],
                            without_stack={"Gratings", "Lab library"}, on_tab=locked(partial(tab_opened, tabs, library, now={})))
    switcher = layout[1]
    link = PageLink(explorer, tabs, switcher, ["Film explorer", *tabs, "Lab library"])
    note = pn.pane.Alert("", alert_type="warning", visible=False, margin=(2, 10), css_classes=["fg-link-note"])
    args = pn.state.session_args or {}
    if args:
        errors = link.apply_link_state(args)
        if errors:
            note.object = "Opening this link: " + " ".join(_esc(page_wording(e)) for e in errors)
            note.visible = True
    if pn.state.location is not None:
        location = pn.state.location

        def write_address(*_):
            pending.clear()
            location.search = link.query()

        def address_soon(*_):
            """Write the address once a drag pauses, not on every slider step (each write is a message)."""
            doc = pn.state.curdoc
            if not served(doc):
                write_address()
            elif not pending:
                pending.append(doc.add_timeout_callback(write_address, ADDRESS_DELAY_MS))
        explorer.state.param.watch(address_soon, list(explorer.state.param))
        switcher.param.watch(address_soon, "active")
        follow.append(lambda title, section: link.follow(title, section, address_soon))
        for title, tab in tabs.items():
            if tab.built:                              # built by the link itself
                link.follow(title, tab.section, address_soon)
        pn.state.onload(write_address)
    return pn.Column(note, layout, sizing_mode="stretch_both", margin=0)


page().servable(title="fringegauge")
