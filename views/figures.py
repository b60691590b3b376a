"""Figures that open empty: ranges that stay finite until their data arrive.

BokehJS cannot size a data range with nothing in it and logs "could not set initial ranges"
each time it lays such a figure out (every tab switch). A figure whose data come later
(a photo, a fit) gets an invisible placeholder renderer whose two points span a sensible
extent: data ranges include invisible renderers (``only_visible`` is False by default), so the
range is finite from the first layout. Where the placeholder's extent lies inside any real data
(a photo's pixels start at 0) it can stay; elsewhere :meth:`RangeHolder.release` takes it away
when the data arrive and :meth:`RangeHolder.hold` puts it back when they are cleared.
"""

from __future__ import annotations

from bokeh.models import ColumnDataSource

__all__ = ["RangeHolder"]


class RangeHolder:
    """An invisible two-point renderer on ``fig`` spanning ``x`` × ``y`` (data units)."""

    def __init__(self, fig, x=(0.0, 1.0), y=(0.0, 1.0)):
        self.x, self.y = list(x), list(y)
        self.source = ColumnDataSource(dict(x=self.x, y=self.y))
        self.renderer = fig.scatter("x", "y", source=self.source, size=0, visible=False)

    def hold(self) -> None:
        """Span the placeholder's extent again (the figure's data were cleared)."""
        if not self.source.data["x"]:
            self.source.data = dict(x=self.x, y=self.y)

    def release(self) -> None:
        """Take the placeholder away (the figure has data of its own now)."""
        if self.source.data["x"]:
            self.source.data = dict(x=[], y=[])
