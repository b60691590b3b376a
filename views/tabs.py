"""Tabs of the page that are built when first opened."""

from __future__ import annotations

import panel as pn

__all__ = ["BuiltOnFirstOpen"]


class BuiltOnFirstOpen:
    """A tab whose section is built the first time the tab is opened, or the first time another tab needs it.

    Opening the page builds only the film explorer: each page is built on the server's event loop, which
    every open page shares, so the other tabs (the gratings tab alone costs more than the explorer) wait
    until someone looks at them. Until then the tab holds a one-line placeholder. Attribute access is
    passed to the section, building it first, so the lab library can load into a tab not yet opened.
    """

    def __init__(self, build):
        self._build, self.section = build, None
        self.holder = pn.Column(pn.pane.Markdown("Preparing this tab…", margin=(10, 12)), sizing_mode="stretch_both")

    @property
    def built(self) -> bool:
        return self.section is not None

    def get(self):
        if self.section is None:
            self.section = self._build()
            self.holder.objects = [self.section.panel()]
        return self.section

    def __getattr__(self, name):
        if name.startswith("_") or name in ("section", "holder"):
            raise AttributeError(name)
        return getattr(self.get(), name)
