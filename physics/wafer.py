"""Reading a thickness map the way a fab does: a line profile, a wafer's usable area, and site statistics.

Geometry of a photo: pixel (x, y) with x to the right and y down, as in
:func:`physics.thickness_map`; a pixel's value is taken at its centre (x + 0.5, y + 0.5).
On the wafer, site positions are in mm from the wafer centre with x to the right and y up
(so a site at +y mm lies above the centre in the photo); angles are counted from +x
towards +y (counter-clockwise as the photo is seen).

The usable area is the wafer less an edge exclusion ring (a rule of the trade: the outer few
mm are not specified). Site layouts are this tool's own, built the way fab layouts usually are
(common practice): a centre site and rings of equally spaced sites, the outer ring on the
usable edge. With R the usable radius (wafer radius less the edge exclusion):

===========  =====================================================================
pattern      sites
===========  =====================================================================
5            centre; 4 at R on the axes (0°, 90°, 180°, 270°)
9            centre; 4 at R/2 on the axes; 4 at R on the axes
13           centre; 4 at R/2 on the diagonals (45°, 135°, ...); 8 at R every 45° from 0°
49           centre; 8 at R/3 every 45°; 16 at 2R/3 every 22.5°; 24 at R every 15°; all from 0°
===========  =====================================================================

A site's thickness is the mean of the matched pixels of a small square around it that lie in
the usable area (:data:`SITE_HALF_SIZE_PX`); a site with none is reported as not measured.

References
----------
None for the layouts (this tool's own, in the usual centre-and-rings form, common practice);
the uniformity (max - min) / (2 mean) is the one of :func:`physics.thickness_map`'s statistics.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError, require_finite

__all__ = ["SITE_PATTERNS", "site_layout_mm", "wafer_mask", "WaferSites", "wafer_sites", "LineProfile",
           "line_profile", "area_statistics"]

#: Sites of each pattern as rings (radius as a fraction of the usable radius, number of sites, first angle °).
SITE_PATTERNS = {
    5: ((0.0, 1, 0.0), (1.0, 4, 0.0)),
    9: ((0.0, 1, 0.0), (0.5, 4, 0.0), (1.0, 4, 0.0)),
    13: ((0.0, 1, 0.0), (0.5, 4, 45.0), (1.0, 8, 0.0)),
    49: ((0.0, 1, 0.0), (1 / 3, 8, 0.0), (2 / 3, 16, 0.0), (1.0, 24, 0.0)),
}
#: Half-size (pixels) of the square averaged at each site: a few pixels, so one stray pixel does not
#: make a site, and far smaller than any site spacing on a photo of a whole wafer.
SITE_HALF_SIZE_PX = 4
#: Most pixels read for the statistics of a wafer's usable area: a larger area is read on a regular
#: grid of every k-th pixel each way (k the smallest that fits), which keeps a 24-megapixel photo's
#: statistics to a fraction of a second and its percentiles within a pixel row of the full count.
AREA_MAX_PIXELS = 2_000_000
#: Most samples along a line profile: one per pixel of the longest line a photo of the largest accepted
#: size can hold is far fewer.
PROFILE_MAX_SAMPLES = 20_000


def site_layout_mm(pattern: int, usable_radius_mm: float) -> np.ndarray:
    """Site positions (n, 2) in mm from the wafer centre (x right, y up), in :data:`SITE_PATTERNS` order.

    Raises InputError for an unknown pattern or a radius that is not positive.
    """
    if pattern not in SITE_PATTERNS:
        raise InputError(f"There is no {pattern!r}-site pattern; choose {', '.join(map(str, SITE_PATTERNS))}.")
    r = float(require_finite("usable_radius_mm", usable_radius_mm, minimum=0.0, min_inclusive=False, unit="mm"))
    pts = []
    for frac, n, first in SITE_PATTERNS[pattern]:
        ang = np.deg2rad(first + 360.0 * np.arange(n) / n)
        pts.append(np.stack([frac * r * np.cos(ang), frac * r * np.sin(ang)], axis=1))
    return np.concatenate(pts)


def _circle(centre_px, radius_px):
    c = require_finite("centre_px", centre_px).ravel()
    if c.size != 2:
        raise InputError(f"centre_px is the wafer centre (x, y) in pixels; got {centre_px!r}.")
    r = float(require_finite("radius_px", radius_px, minimum=0.0, min_inclusive=False, unit="px"))
    return float(c[0]), float(c[1]), r


def _usable_radius_px(radius_px, edge_exclusion_px) -> float:
    e = float(require_finite("edge_exclusion_px", edge_exclusion_px, minimum=0.0, unit="px"))
    if e >= radius_px:
        raise InputError(f"The edge exclusion ({e:g} px) leaves nothing of a wafer of radius {radius_px:g} px; "
                         "make it smaller than the radius.")
    return radius_px - e


def _row_spans(H: int, W: int, cx: float, cy: float, r: float):
    """Per row, the first and one-past-last column whose pixel centre lies within ``r`` of (cx, cy): (H,), (H,)."""
    dy = np.arange(H) + 0.5 - cy
    half = np.sqrt(np.maximum(r * r - dy * dy, 0.0))
    j0 = np.clip(np.ceil(cx - half - 0.5), 0, W).astype(np.int64)
    j1 = np.clip(np.floor(cx + half - 0.5) + 1, 0, W).astype(np.int64)
    j1[dy * dy > r * r] = 0
    return j0, np.maximum(j1, j0)


def wafer_mask(shape, centre_px, radius_px, edge_exclusion_px: float = 0.0) -> np.ndarray:
    """Pixels (H, W) bool whose centre lies within ``radius_px - edge_exclusion_px`` of the wafer centre."""
    cx, cy, r = _circle(centre_px, radius_px)
    H, W = int(shape[0]), int(shape[1])
    j0, j1 = _row_spans(H, W, cx, cy, _usable_radius_px(r, edge_exclusion_px))
    x = np.arange(W)
    return (x[None, :] >= j0[:, None]) & (x[None, :] < j1[:, None])


def area_statistics(thickness_nm, centre_px, radius_px, edge_exclusion_px: float = 0.0) -> dict:
    """Statistics (as :func:`physics.thickness_map`'s) of a map over a wafer's usable area, plus ``stride``:
    1 when every pixel was read, k when the area was read every k-th pixel each way
    (:data:`AREA_MAX_PIXELS`)."""
    from .inverse import _stats

    T = np.asarray(thickness_nm)
    cx, cy, r = _circle(centre_px, radius_px)
    H, W = T.shape
    j0, j1 = _row_spans(H, W, cx, cy, _usable_radius_px(r, edge_exclusion_px))
    area = int((j1 - j0).sum())
    k = max(1, int(np.ceil(np.sqrt(area / AREA_MAX_PIXELS))))
    parts = [T[i, j0[i] + (-j0[i]) % k:j1[i]:k] for i in range(0, H, k) if j1[i] > j0[i]]
    values = np.concatenate(parts) if parts else np.empty(0)
    out = _stats(values)
    out["stride"] = k
    return out


@dataclass(frozen=True)
class WaferSites:
    """Thickness at the sites of a pattern on a wafer.

    Attributes
    ----------
    pattern : int
    x_mm, y_mm : (n,) site positions from the wafer centre, mm (x right, y up)
    x_px, y_px : (n,) the same in photo pixels (x right, y down)
    thickness_nm : (n,) mean thickness at each site; NaN where no matched pixel of the usable area is there
    mm_per_px : float
    usable_radius_mm : float
    stats : dict
        sites, measured, mean_nm, std_nm (population), min_nm, max_nm, range_nm, uniformity
        ((max - min)/(2 mean)); over the measured sites.
    """

    pattern: int
    x_mm: np.ndarray
    y_mm: np.ndarray
    x_px: np.ndarray
    y_px: np.ndarray
    thickness_nm: np.ndarray
    mm_per_px: float
    usable_radius_mm: float
    stats: dict


def wafer_sites(thickness_nm, centre_px, radius_px, *, diameter_mm: float | None = None,
                mm_per_px: float | None = None, edge_exclusion_mm: float = 0.0, pattern: int = 9) -> WaferSites:
    """Thickness at the sites of ``pattern`` on a wafer seen in a thickness map.

    Parameters
    ----------
    thickness_nm : (H, W) array, NaN where unmatched
    centre_px, radius_px : the wafer's circle in the photo, pixels
    diameter_mm, mm_per_px : the scale: the wafer's diameter, or the size of a pixel (which wins when
        both are given)
    edge_exclusion_mm : ring at the wafer's edge left out, mm
    pattern : one of :data:`SITE_PATTERNS`

    Raises
    ------
    InputError
        No scale, a scale or exclusion out of range, an unknown pattern.
    """
    T = np.asarray(thickness_nm, dtype=float)
    if T.ndim != 2:
        raise InputError(f"thickness_nm must be a map (H, W); got shape {T.shape}.")
    cx, cy, r_px = _circle(centre_px, radius_px)
    if mm_per_px is not None:
        scale = float(require_finite("mm_per_px", mm_per_px, minimum=0.0, min_inclusive=False, unit="mm"))
    elif diameter_mm is not None:
        d = float(require_finite("diameter_mm", diameter_mm, minimum=0.0, min_inclusive=False, unit="mm"))
        scale = d / (2.0 * r_px)
    else:
        raise InputError("Give the wafer's diameter in mm or the size of a pixel in mm, so sites can be placed.")
    excl = float(require_finite("edge_exclusion_mm", edge_exclusion_mm, minimum=0.0, unit="mm"))
    radius_mm = r_px * scale
    if excl >= radius_mm:
        raise InputError(f"The edge exclusion ({excl:g} mm) leaves nothing of a wafer of radius {radius_mm:.4g} mm; "
                         "make it smaller than the radius.")
    usable = radius_mm - excl
    xy = site_layout_mm(pattern, usable)
    x_px, y_px = cx + xy[:, 0] / scale, cy - xy[:, 1] / scale
    r_use = usable / scale
    H, W = T.shape
    h = SITE_HALF_SIZE_PX
    values = np.full(len(xy), np.nan)
    for k, (x, y) in enumerate(zip(x_px, y_px)):
        i, j = int(np.floor(y)), int(np.floor(x))
        y0, y1, x0, x1 = max(i - h, 0), min(i + h + 1, H), max(j - h, 0), min(j + h + 1, W)
        if y0 >= y1 or x0 >= x1:
            continue
        yy, xx = np.ogrid[y0:y1, x0:x1]
        inside = (xx + 0.5 - cx) ** 2 + (yy + 0.5 - cy) ** 2 <= r_use ** 2      # the site's square, usable part
        v = T[y0:y1, x0:x1][inside]
        v = v[np.isfinite(v)]
        if v.size:
            values[k] = v.mean()
    return WaferSites(pattern, xy[:, 0], xy[:, 1], x_px, y_px, values, scale, usable, _site_stats(values))


def _site_stats(values: np.ndarray) -> dict:
    v = values[np.isfinite(values)]
    nan = float("nan")
    if not v.size:
        return {"sites": int(values.size), "measured": 0, "mean_nm": nan, "std_nm": nan, "min_nm": nan,
                "max_nm": nan, "range_nm": nan, "uniformity": nan}
    mean = float(v.mean())
    return {"sites": int(values.size), "measured": int(v.size), "mean_nm": mean, "std_nm": float(v.std()),
            "min_nm": float(v.min()), "max_nm": float(v.max()), "range_nm": float(v.max() - v.min()),
            "uniformity": float((v.max() - v.min()) / (2 * mean)) if mean > 0 else nan}


@dataclass(frozen=True)
class LineProfile:
    """Thickness along a line of a map.

    Attributes
    ----------
    distance : (n,) from the start, in pixels, or mm when a scale was given (``unit`` says which)
    thickness_nm : (n,) nearest pixel's thickness (NaN where unmatched)
    x_px, y_px : (n,) sample positions
    unit : "px" or "mm"
    """

    distance: np.ndarray
    thickness_nm: np.ndarray
    x_px: np.ndarray
    y_px: np.ndarray
    unit: str


def line_profile(thickness_nm, start_px, end_px, *, mm_per_px: float | None = None) -> LineProfile:
    """Thickness along the straight line from ``start_px`` to ``end_px`` ((x, y) pixels), one sample per pixel
    of length, each the nearest pixel's value (no interpolation across an order boundary or a gap)."""
    T = np.asarray(thickness_nm, dtype=float)
    if T.ndim != 2:
        raise InputError(f"thickness_nm must be a map (H, W); got shape {T.shape}.")
    a = require_finite("start_px", start_px).ravel()
    b = require_finite("end_px", end_px).ravel()
    if a.size != 2 or b.size != 2:
        raise InputError("A line runs from (x, y) to (x, y) in pixels.")
    H, W = T.shape
    for p, what in ((a, "start"), (b, "end")):
        if not (0 <= p[0] <= W and 0 <= p[1] <= H):
            raise InputError(f"The line's {what} ({p[0]:g}, {p[1]:g}) is outside the {W} x {H} map.")
    length = float(np.hypot(*(b - a)))
    if length < 1.0:
        raise InputError("The line is shorter than a pixel; tap its two ends farther apart.")
    n = int(min(PROFILE_MAX_SAMPLES, np.ceil(length) + 1))
    f = np.linspace(0.0, 1.0, n)
    x, y = a[0] + f * (b[0] - a[0]), a[1] + f * (b[1] - a[1])
    j = np.clip(np.floor(x).astype(int), 0, W - 1)
    i = np.clip(np.floor(y).astype(int), 0, H - 1)
    dist = f * length
    unit = "px"
    if mm_per_px is not None:
        dist = dist * float(require_finite("mm_per_px", mm_per_px, minimum=0.0, min_inclusive=False, unit="mm"))
        unit = "mm"
    return LineProfile(dist, T[i, j], x, y, unit)
