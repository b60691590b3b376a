"""Reading a photo's thickness map as a fab does: a line profile, the wafer's usable area, site statistics.

Part of the colour tab (views/inverse.py): its declared state is :class:`WaferSettings`, its widgets
are bound to that state, and every number comes from ``physics.wafer``. The wafer's circle is drawn
on the photo (a box dragged around the wafer; the circle is the one inscribed in it), the line by
tapping its two ends.
"""

from __future__ import annotations

import numpy as np
import panel as pn
import param
from bokeh.models import ColumnDataSource, Range1d
from bokeh.plotting import figure

from physics import InputError
from physics.wafer import SITE_HALF_SIZE_PX, SITE_PATTERNS, area_statistics, line_profile, wafer_sites

from .explorer import _esc

#: Edge exclusion offered first (mm): 3 mm is a usual figure for 150-300 mm wafers (common practice).
DEFAULT_EDGE_EXCLUSION_MM = 3.0
#: Wafer diameter offered first (mm): a 150 mm monitor wafer (common practice for furnace monitors).
DEFAULT_DIAMETER_MM = 150.0
#: Colours of what is drawn over the photo and the map: the line, the wafer's edge, its usable edge, sites.
LINE_COLOUR, WAFER_COLOUR, USABLE_COLOUR, SITE_COLOUR = "#ff7f0e", "#ffffff", "#ffd700", "#000000"
#: Width of the site table beside the profile (px): room for a summary and four columns.
SITE_TABLE_PX = 460


class WaferSettings(param.Parameterized):
    """The wafer seen in the photo: its size (or the pixel size), its edge exclusion and the site pattern."""

    diameter_mm = param.Number(default=DEFAULT_DIAMETER_MM, bounds=(1.0, 1000.0),
                               doc="Wafer diameter, mm: with the circle drawn on the photo it sets the scale.")
    mm_per_px = param.Number(default=None, allow_None=True, bounds=(1e-6, 100.0),
                             doc="Size of one photo pixel on the wafer, mm; when given it sets the scale instead "
                                 "of the diameter.")
    edge_exclusion_mm = param.Number(default=DEFAULT_EDGE_EXCLUSION_MM, bounds=(0.0, 100.0),
                                     doc="Ring at the wafer's edge left out of the statistics, mm.")
    pattern = param.Selector(default=9, objects=sorted(SITE_PATTERNS), doc="Sites measured on the wafer.")


class PhotoReading:
    """Line profile, wafer circle and sites for one :class:`views.inverse.ColourToThickness` section."""

    def __init__(self, section):
        self.sec = section
        self.settings = WaferSettings()
        self.line_start = None
        self.line = None                      # ((x0, y0), (x1, y1)) pixels
        self.circle = None                    # (cx, cy, r) pixels
        self.sites = None
        self.profile = None
        st = self.settings
        self.diameter = pn.widgets.FloatInput.from_param(st.param.diameter_mm, name="Wafer diameter (mm)",
                                                         width=150, css_classes=["fg-wafer-diameter"])
        self.pixel = pn.widgets.FloatInput.from_param(st.param.mm_per_px, name="or pixel size (mm)", width=150,
                                                      css_classes=["fg-wafer-pixel"])
        self.exclusion = pn.widgets.FloatInput.from_param(st.param.edge_exclusion_mm, name="Edge exclusion (mm)",
                                                          width=150, css_classes=["fg-wafer-exclusion"])
        self.pattern = pn.widgets.Select.from_param(st.param.pattern, name="Sites", width=150,
                                                    css_classes=["fg-wafer-pattern"])
        self.info = pn.pane.HTML("", margin=(0, 5), styles={"font-size": "12px"}, css_classes=["fg-wafer-info"])
        self.site_table = pn.pane.HTML("", margin=(5, 5), width=SITE_TABLE_PX, css_classes=["fg-sites"])
        self.line_src = ColumnDataSource(dict(x=[], y=[]))
        self.ends_src = ColumnDataSource(dict(x=[], y=[], label=[]))
        self.circle_src = ColumnDataSource(dict(x=[], y=[], d=[], color=[], dash=[]))
        self.site_src = ColumnDataSource(dict(x=[], y=[], label=[]))
        for fig in (section.photo_fig, section.tmap_fig):
            fig.line(x="x", y="y", source=self.line_src, line_color=LINE_COLOUR, line_width=2)
            fig.scatter(x="x", y="y", source=self.ends_src, marker="circle", size=7, color=LINE_COLOUR)
            fig.ellipse(x="x", y="y", width="d", height="d", source=self.circle_src, fill_alpha=0.0,
                        line_color="color", line_dash="dash", line_width=2)
        section.tmap_fig.scatter(x="x", y="y", source=self.site_src, marker="circle_cross", size=10,
                                 fill_alpha=0.0, line_color=SITE_COLOUR, line_width=1.5)
        self.prof_src = ColumnDataSource(dict(d=[], t=[]))
        pf = figure(height=250, sizing_mode="stretch_width", tools="pan,wheel_zoom,reset,save",
                    title="Thickness along the line (tap its two ends on the photo in 'profile line' mode)",
                    x_axis_label="distance along the line (px)", y_axis_label="thickness (nm)",
                    x_range=Range1d(0, 1), y_range=Range1d(0, 1), css_classes=["fg-profile"])
        pf.line(x="d", y="t", source=self.prof_src, line_color="#3b6fa0", line_width=2)
        self.prof_fig = pf
        from .inverse import locked             # the section's module, loaded by now
        st.param.watch(locked(lambda *events: self.refresh()), ["diameter_mm", "mm_per_px", "edge_exclusion_mm", "pattern"])
        self._draw()

    # ------------------------------------------------------------------ input from the photo
    def tap(self, x: float, y: float) -> None:
        """One end of the profile line: the first tap starts a line, the second ends it."""
        if self.line_start is None or self.line is not None:
            self.line_start, self.line = (float(x), float(y)), None
        else:
            self.line = (self.line_start, (float(x), float(y)))
        self.refresh()

    def set_circle(self, box) -> None:
        """The wafer's circle: the one inscribed in a box (x0, y0, x1, y1) pixels dragged around the wafer."""
        x0, y0, x1, y1 = (float(v) for v in box)
        r = 0.25 * (abs(x1 - x0) + abs(y1 - y0))
        if r < 2:
            self.sec.photo_msg.show_error("The wafer's box is too small: drag a box around the whole wafer.")
            return
        self.circle = (0.5 * (x0 + x1), 0.5 * (y0 + y1), r)
        self.sec.photo_msg.show_error(None)
        self.refresh()

    def clear(self) -> None:
        """A new photo: no line, no circle."""
        self.line_start = self.line = self.circle = self.sites = self.profile = None
        self.refresh()

    # ------------------------------------------------------------------ computed from the map
    def scale(self):
        """mm per pixel, or None when neither a pixel size nor a circle with a diameter is known."""
        st = self.settings
        if st.mm_per_px is not None:
            return st.mm_per_px
        if self.circle is not None:
            return st.diameter_mm / (2.0 * self.circle[2])
        return None

    def refresh(self) -> None:
        """Profile and sites of the map shown, and what is drawn; a bad setting is said, never raised."""
        result = self.sec.result
        T = None if result is None else result.thickness_nm
        notes = []
        self.profile = self.sites = None
        if T is not None and self.line is not None:
            try:
                self.profile = line_profile(T, *self.line, mm_per_px=self.scale())
            except InputError as exc:
                notes.append(f"Line: {exc}")
        if T is not None and self.circle is not None:
            st = self.settings
            try:
                self.sites = wafer_sites(T, self.circle[:2], self.circle[2], diameter_mm=st.diameter_mm,
                                         mm_per_px=st.mm_per_px, edge_exclusion_mm=st.edge_exclusion_mm,
                                         pattern=st.pattern)
            except InputError as exc:
                notes.append(f"Wafer: {exc}")
        self._draw()
        self._tables(notes)

    def area_stats(self):
        """Statistics of the map over the wafer's usable area, or None without a circle and a map."""
        if self.sites is None:
            return None
        cx, cy, r = self.circle
        return area_statistics(self.sec.result.thickness_nm, (cx, cy), r,
                               self.settings.edge_exclusion_mm / self.sites.mm_per_px)

    def _draw(self):
        line = self.line or ((self.line_start,) if self.line_start else ())
        self.ends_src.data = dict(x=[p[0] for p in line], y=[p[1] for p in line], label=["start", "end"][:len(line)])
        self.line_src.data = (dict(x=[self.line[0][0], self.line[1][0]], y=[self.line[0][1], self.line[1][1]])
                              if self.line else dict(x=[], y=[]))
        if self.circle:
            cx, cy, r = self.circle
            scale = self.scale()
            e = self.settings.edge_exclusion_mm / scale if scale else 0.0
            rows = [(2 * r, WAFER_COLOUR)] + ([(2 * (r - e), USABLE_COLOUR)] if 0 < e < r else [])
            self.circle_src.data = dict(x=[cx] * len(rows), y=[cy] * len(rows), d=[d for d, _ in rows],
                                        color=[c for _, c in rows], dash=["dash"] * len(rows))
        else:
            self.circle_src.data = dict(x=[], y=[], d=[], color=[], dash=[])
        s = self.sites
        self.site_src.data = (dict(x=list(s.x_px), y=list(s.y_px), label=[str(i + 1) for i in range(s.x_px.size)])
                              if s is not None else dict(x=[], y=[], label=[]))
        p = self.profile
        self.prof_src.data = dict(d=p.distance, t=p.thickness_nm) if p is not None else dict(d=[], t=[])
        if p is not None:
            t = p.thickness_nm[np.isfinite(p.thickness_nm)]
            lo, hi = (float(t.min()), float(t.max())) if t.size else (0.0, 1.0)
            pad = max(0.05 * (hi - lo), 1.0)
            self.prof_fig.x_range.update(start=0.0, end=max(float(p.distance[-1]), 1e-9))
            self.prof_fig.y_range.update(start=lo - pad, end=hi + pad)
        self.prof_fig.xaxis.axis_label = f"distance along the line ({p.unit if p is not None else 'px'})"

    def _tables(self, notes):
        parts = []
        if self.circle:
            cx, cy, r = self.circle
            scale = self.scale()
            parts.append(f"Wafer circle: centre ({cx:.0f}, {cy:.0f}) px, radius {r:.0f} px"
                         + (f", {scale * 1000:.1f} µm a pixel" if scale else ""))
        else:
            parts.append("No wafer circle: choose 'wafer circle' and drag a box around the wafer.")
        self.info.object = _esc(" ".join(parts + notes))
        s = self.sites
        if s is None:
            self.site_table.object = ""
            return
        st = s.stats
        area = self.area_stats()
        rows = "".join(f"<tr><td>{i + 1}</td><td>{_mm(x)}</td><td>{_mm(y)}</td><td><b>"
                       + (f"{t:.1f}" if np.isfinite(t) else "not measured") + "</b></td></tr>"
                       for i, (x, y, t) in enumerate(zip(s.x_mm, s.y_mm, s.thickness_nm)))
        summary = (f"{s.pattern} sites ({st['measured']} measured) inside {self.settings.edge_exclusion_mm:g} mm edge "
                   f"exclusion: mean {st['mean_nm']:.1f} nm, standard deviation {st['std_nm']:.2f} nm, range "
                   f"{st['min_nm']:.1f}–{st['max_nm']:.1f} nm, uniformity (max − min)/(2 mean) "
                   f"{100 * st['uniformity']:.2f} %.")
        if area is not None and area["pixels"]:
            summary += (f" Whole usable area: mean {area['mean_nm']:.1f} nm, range P1–P99 {area['p_low_nm']:.1f}–"
                        f"{area['p_high_nm']:.1f} nm, {area['valid_fraction']:.0%} of it matched"
                        + (f" (read on a grid of one pixel in {area['stride']} each way)." if area["stride"] > 1
                           else "."))
        self.site_table.object = (
            f"<div style='font-size:13px'>{_esc(summary)}</div>"
            "<table style='font-size:12px' cellpadding='2'><tr><th>site</th><th>x (mm)</th><th>y (mm, up)</th>"
            f"<th>thickness (nm)</th></tr>{rows}</table>"
            "<div style='font-size:11px;color:#555'>Site layouts: centre and rings of equally spaced sites, the "
            "outer ring on the usable edge (this tool's layouts in the usual form, common practice); each site is "
            f"the mean of a {2 * SITE_HALF_SIZE_PX + 1} × {2 * SITE_HALF_SIZE_PX + 1} px square. Not certified "
            "metrology.</div>")

    def csv_rows(self):
        """Rows for the statistics CSV: one per site (site, x_mm, y_mm, thickness_nm), after a header row."""
        s = self.sites
        if s is None:
            return []
        return [["site", "x_mm", "y_mm", "thickness_nm"]] + [
            [i + 1, _mm(x, 3), _mm(y, 3), f"{t:.3f}" if np.isfinite(t) else ""]
            for i, (x, y, t) in enumerate(zip(s.x_mm, s.y_mm, s.thickness_nm))]

    def controls(self):
        """The wafer settings, for the photo's column."""
        return pn.Column(pn.Row(self.diameter, self.pixel, margin=0), pn.Row(self.exclusion, self.pattern, margin=0),
                         self.info, margin=0)


def _mm(v: float, digits: int = 1) -> str:
    """A site coordinate in mm, with no "-0.0" for a coordinate on an axis."""
    return f"{round(float(v), digits) + 0.0:.{digits}f}"
