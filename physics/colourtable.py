"""Colour → colour-path matching at a cost independent of how many distinct colours a photo has.

A photo's colours are matched to the colour path of :mod:`physics.inverse` (CIELAB of the unknown layer's
thicknesses, every :data:`physics.inverse.LUT_STEP_NM`) by CIEDE2000: for each colour, the best path point
overall and the best of any other fringe order. Brute force compares every colour with every path point;
here a 3-D table over CIELAB, built lazily for the colours met and cached per path, answers each colour by a
lookup and a few multiplications.

The table
---------
CIELAB is cut into coarse cells of :data:`COARSE_STEP` units. The first time a colour falls in a cell, the
cell's centre is matched exactly (every :data:`SCAN_STRIDE`-th path point, then a descent to the exact local
minima along the full path), and the local minima that could be the best or the best of another order for any
colour in the cell are kept as the cell's seeds: an order whose best ΔE00 at the centre exceeds the second
best order's by more than twice the largest change of ΔE00 across the cell (:data:`DE00_LIPSCHITZ` times the
cell's half-diagonal), or a minimum that far above its order's best, can win nowhere in the cell. Inside a
cell the colours are snapped to vertices :data:`FINE_STEP` apart; a vertex is solved exactly the first time it
is met: descent from the cell's seeds to the exact best and best-other-order path points, a parabola through
ΔE00² at the best point and its two neighbours (the refined thickness and ΔE00), and the gradient of ΔE00² with
respect to the observed colour by central differences.

A colour is then answered from its vertex q by first-order corrections for its offset Δ = c - q: the
thickness moves by w·Δ, where w = M t / (tᵀ M t) is the derivative of the ΔE00-nearest point along the path
(t the path's tangent, nm⁻¹, and M the local metric of ΔE00², its Hessian at the path point), and ΔE00² by
g·Δ + Δᵀ A Δ, with g its exact gradient at the vertex and A = M - M t tᵀ M / (tᵀ M t) the metric across the
path. A cell whose centre is farther than :data:`FAR_DE` from every path point (a colour no film of the stack
shows) is answered from its centre alone: such colours are never a match at any ΔE00 limit up to
``FAR_DE - DE00_LIPSCHITZ * half-diagonal``.

Agreement with brute force (CIEDE2000 against every path point) is checked in ``tests/test_colourtable.py``
and measured in ``benchmarks/bench_inverse.py``: the thickness within 0.5 nm (one path step) of brute
force's, or at a path point within 0.02 ΔE00 of brute force's minimum (a flat stretch of the path, where
colour cannot pin the thickness), for about 99.9 % of a photo's matched colours. The misses are colours
where two minima of the path tie to a few hundredths of a ΔE00.

Conventions: CIELAB (L*, a*, b*) on the last axis; thicknesses in nm; "order" as the path's fringe order.

References
----------
CIE 142-2001 and G. Sharma, W. Wu, E. N. Dalal, Color Res. Appl. 30, 21 (2005) (CIEDE2000, the formula and
its hue conventions, implemented in :func:`delta_e_2000_fast`); CIE 015:2018, sec. 8.2.1 (CIELAB,
:func:`lab_from_xyz`).
"""

from __future__ import annotations

import hashlib
import threading
from collections import OrderedDict
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from .colourkernel import kernel, kernels

__all__ = ["ColourTable", "colour_table", "delta_e_2000_fast", "lab_from_xyz", "lab_from_linear", "COARSE_STEP", "FINE_STEP",
           "FAR_DE", "DE00_LIPSCHITZ", "SCAN_STRIDE", "TABLES_CACHED"]

#: Side of a coarse cell of the table, CIELAB units: small enough that few path minima can win inside one
#: cell, large enough that a photo touches a few thousand.
COARSE_STEP = 2.0
#: Vertices per coarse cell along each axis; FINE_STEP = COARSE_STEP / FINE_PER_COARSE.
FINE_PER_COARSE = 4
#: Spacing of the solved vertices, CIELAB units: the first-order corrections over at most half this keep the
#: thickness within a small fraction of a 0.5 nm path step of the brute-force answer.
FINE_STEP = COARSE_STEP / FINE_PER_COARSE
#: Largest change of ΔE00 (to a fixed colour) per CIELAB unit moved: the chroma weight (1 + G) <= 1.5 of a*
#: times the largest gain sqrt(1 + |R_T|/2) <= 1.37 of the rotation term is 2.05 (CIE 142-2001's formula);
#: 2.5 leaves room for the hue terms near the neutral axis.
DE00_LIPSCHITZ = 2.0
#: A coarse cell whose centre is farther than this ΔE00 from the whole path is answered from its centre.
FAR_DE = 24.0
#: Every SCAN_STRIDE-th path point (and each order's first and last) is scanned at a cell centre; the local
#: minima found are then followed along the full path. A fringe order spans far more points than this.
SCAN_STRIDE = 12
#: Most seeds (path minima) kept per cell, best first.
MAX_SEEDS = 16
#: Largest first-order thickness correction from a vertex (nm): where the path barely changes colour (bare
#: substrate, the grey of thick films) the derivative is huge and colour cannot pin the thickness anyway.
MAX_CORRECTION_NM = 0.75
#: Largest first-order move (path points) of a seed from a cell centre to a vertex before the descent.
MAX_SHIFT = 16
#: Colours per chunk of the numpy per-colour pass (a few MB of working arrays).
CHUNK = 65_536
#: Fewest pixels for which :func:`lab_from_linear` runs compiled (a photo map's bands; the page's own process
#: never runs compiled loops, see physics.colourkernel.disable).
COMPILED_MIN_PIXELS = 1 << 18
#: Fewest colours for which the compiled pass (:mod:`physics.colourkernel`) runs, and per thread of it.
KERNEL_MIN_COLOURS = 4096
#: Chunks from which the per-colour pass runs in threads (below, thread start-up and the interpreter lock
#: cost more than a second core gives).
PARALLEL_SPANS = 4
#: Tables kept (one per colour path, least recently used dropped first); each holds at most a few hundred MB.
TABLES_CACHED = 3
#: Step (CIELAB units) of the finite differences of ΔE00² (the metric and the gradients).
FD_STEP = 0.02
#: Table bounds, CIELAB: L* [-8, 120), a* and b* [-160, 160); colours outside are solved one by one.
_LO = np.array([-8.0, -160.0, -160.0])
_HI = np.array([120.0, 160.0, 160.0])

_25_7 = 25.0 ** 7

#: Column order of a stored record (see ColourTable._records): q (3); the ten ΔE00² coefficients (value,
#: gradient, metric) of the best answer, then of the other order's; w of each (3 + 3); τ of each; order of each.
_ANSWER_LAYOUT = np.r_[0:3, 7:17, 22:32, 4:7, 19:22, 3, 18, 17, 32]


# ---------------------------------------------------------------------- CIEDE2000 and CIELAB
def _de00_sq(L1, a1, b1, L2, a2, b2):
    """ΔE00² of colour arrays given channel by channel (broadcasting), CIE 142-2001 / Sharma et al. 2005."""
    C1 = np.sqrt(a1 * a1 + b1 * b1)
    C2 = np.sqrt(a2 * a2 + b2 * b2)
    Cb = 0.5 * (C1 + C2)
    Cb7 = Cb * Cb
    Cb7 = Cb7 * Cb7 * Cb7 * Cb
    G1 = 1.5 - 0.5 * np.sqrt(Cb7 / (Cb7 + _25_7))            # 1 + G
    a1p = G1 * a1
    a2p = G1 * a2
    C1p = np.sqrt(a1p * a1p + b1 * b1)
    C2p = np.sqrt(a2p * a2p + b2 * b2)
    h1 = np.arctan2(b1, a1p)
    h2 = np.arctan2(b2, a2p)
    h1 = np.where(h1 < 0, h1 + 2 * np.pi, h1)                 # hue angles 0..2π (Sharma et al., eq. 7)
    h2 = np.where(h2 < 0, h2 + 2 * np.pi, h2)
    prod = C1p * C2p
    dh = h2 - h1
    dh = np.where(dh > np.pi, dh - 2 * np.pi, np.where(dh < -np.pi, dh + 2 * np.pi, dh))
    dH = 2.0 * np.sqrt(prod) * np.sin(0.5 * dh)               # zero when either chroma is zero
    hs = h1 + h2
    hb = np.where(np.abs(h1 - h2) > np.pi, np.where(hs < 2 * np.pi, hs + 2 * np.pi, hs - 2 * np.pi), hs) * 0.5
    hb = np.where(prod == 0, hs, hb)
    ch = np.cos(hb)
    sh = np.sin(hb)
    c2, s2 = ch * ch - sh * sh, 2 * sh * ch                   # cos, sin of 2h, 3h, 4h by the angle sums
    c3, s3 = c2 * ch - s2 * sh, s2 * ch + c2 * sh
    c4 = c2 * c2 - s2 * s2
    s4 = 2 * s2 * c2
    # T = 1 - 0.17 cos(h - 30°) + 0.24 cos 2h + 0.32 cos(3h + 6°) - 0.20 cos(4h - 63°)
    T = (1.0 - 0.17 * (ch * np.cos(np.pi / 6) + sh * np.sin(np.pi / 6)) + 0.24 * c2
         + 0.32 * (c3 * np.cos(np.pi / 30) - s3 * np.sin(np.pi / 30))
         - 0.20 * (c4 * np.cos(63 * np.pi / 180) + s4 * np.sin(63 * np.pi / 180)))
    u = (hb * (180 / np.pi) - 275.0) / 25.0
    dtheta = (np.pi / 6) * np.exp(-u * u)
    Cbp = 0.5 * (C1p + C2p)
    Cbp7 = Cbp * Cbp
    Cbp7 = Cbp7 * Cbp7 * Cbp7 * Cbp
    Rc = 2.0 * np.sqrt(Cbp7 / (Cbp7 + _25_7))
    Lm = 0.5 * (L1 + L2) - 50.0
    Lm = Lm * Lm
    x = (L2 - L1) / (1.0 + 0.015 * Lm / np.sqrt(20.0 + Lm))
    y = (C2p - C1p) / (1.0 + 0.045 * Cbp)
    z = dH / (1.0 + 0.015 * Cbp * T)
    return np.maximum(x * x + y * y + z * z - np.sin(2 * dtheta) * Rc * y * z, 0.0)


def delta_e_2000_fast(lab1, lab2, dtype=np.float64) -> np.ndarray:
    """CIEDE2000 ΔE00 between CIELAB colours (broadcast on the last axis), in plain numpy.

    The same formula as :func:`physics.color.delta_e_2000` (which calls colour-science), written for speed:
    the cosines of 2h, 3h and 4h come from cos h and sin h by the angle-sum identities. In float64 it agrees
    with colour-science to 1e-9; float32 (about twice as fast) to about 1e-4.

    Parameters
    ----------
    lab1, lab2 : array_like (..., 3)
    dtype : float32 or float64

    References
    ----------
    CIE 142-2001; G. Sharma, W. Wu, E. N. Dalal, Color Res. Appl. 30, 21 (2005), eqs. 1-22.
    """
    a = np.asarray(lab1, dtype=dtype)
    b = np.asarray(lab2, dtype=dtype)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        return np.sqrt(_de00_sq(a[..., 0], a[..., 1], a[..., 2], b[..., 0], b[..., 1], b[..., 2]))


def lab_from_linear(lin, matrix, white_xyz, dtype=np.float32) -> np.ndarray:
    """CIELAB of linear RGB (n, 3) through a 3x3 matrix to XYZ, relative to a white: :func:`lab_from_xyz`
    of ``lin @ matrix.T``, channel by channel in ``dtype``, in chunks shared by two threads (fast and lean on
    millions of pixels)."""
    lin = np.asarray(lin).reshape(-1, 3)
    M = np.asarray(matrix, dtype=float)
    white = np.asarray(white_xyz, dtype=float)
    white = white / white[1]
    out = np.empty(lin.shape, dtype=dtype)
    eps, k, c = (6.0 / 29.0) ** 3, 1.0 / (3 * (6.0 / 29.0) ** 2), 4.0 / 29.0

    def part(a):
        x = lin[a:a + (1 << 18)].astype(dtype, copy=False)
        f = []
        for row in range(3):
            v = (x[:, 0] * dtype(M[row, 0] / white[row]) + x[:, 1] * dtype(M[row, 1] / white[row])
                 + x[:, 2] * dtype(M[row, 2] / white[row]))
            f.append(np.where(v > eps, np.cbrt(v), v * dtype(k) + dtype(c)))
        o = out[a:a + (1 << 18)]
        o[:, 0] = 116.0 * f[1] - 16.0
        o[:, 1] = 500.0 * (f[0] - f[1])
        o[:, 2] = 200.0 * (f[1] - f[2])

    jit = (kernels() if lin.shape[0] > COMPILED_MIN_PIXELS and dtype == np.float32
           and lin.dtype in (np.float32, np.float64) else None)
    if jit is not None:                                         # compiled: one pass, no temporaries
        coef = np.ascontiguousarray(M / white[:, None], dtype=np.float32)
        lin = np.ascontiguousarray(lin)
        edges = np.linspace(0, lin.shape[0], 3).astype(int) if lin.shape[0] > 1 << 18 else np.array([0, lin.shape[0]])
        run = lambda j: jit.lab_of_linear(lin[edges[j]:edges[j + 1]], coef, out[edges[j]:edges[j + 1]])  # noqa: E731
        if edges.size > 2:
            with ThreadPoolExecutor(2) as pool:
                list(pool.map(run, range(edges.size - 1)))
        else:
            run(0)
        return out
    starts = range(0, lin.shape[0], 1 << 18)
    if len(starts) > 1:                                         # numpy releases the GIL: two cores share it
        with ThreadPoolExecutor(2) as pool:
            list(pool.map(part, starts))
    else:
        for a in starts:
            part(a)
    return out


def lab_from_xyz(xyz, white_xyz) -> np.ndarray:
    """CIELAB of XYZ relative to a white (both on the last axis; the white is scaled to Y = 1).

    The CIE formula: f(t) = t^(1/3) above (6/29)³, else t / (3 (6/29)²) + 4/29; L* = 116 f(Y) - 16,
    a* = 500 (f(X) - f(Y)), b* = 200 (f(Y) - f(Z)). The same numbers as colour-science's ``XYZ_to_Lab``
    (to 1e-12), at a tenth of its time on millions of colours.

    References
    ----------
    CIE 015:2018, sec. 8.2.1.
    """
    xyz = np.asarray(xyz, dtype=float)
    white = np.asarray(white_xyz, dtype=float)
    t = xyz / (white / white[1])
    eps = (6.0 / 29.0) ** 3
    f = np.where(t > eps, np.cbrt(t), t / (3 * (6.0 / 29.0) ** 2) + 4.0 / 29.0)
    out = np.empty_like(f)
    out[..., 0] = 116.0 * f[..., 1] - 16.0
    out[..., 1] = 500.0 * (f[..., 0] - f[..., 1])
    out[..., 2] = 200.0 * (f[..., 1] - f[..., 2])
    return out


# ---------------------------------------------------------------------- the table
class ColourTable:
    """The lazily built matching table of one colour path (see the module docstring).

    Parameters
    ----------
    lab : (N, 3) CIELAB of the path points (the colours compared with)
    thickness_nm : (N,) increasing thicknesses of the path points
    order : (N,) fringe order of each point (constant on runs of consecutive points)
    """

    def __init__(self, lab, thickness_nm, order):
        self.P = np.ascontiguousarray(lab, dtype=np.float64)
        self.P32 = self.P.astype(np.float32)                            # the search runs in float32
        self.t = np.asarray(thickness_nm, dtype=np.float64)
        self.order = np.asarray(order).astype(np.int64)
        n = self.t.size
        self.n = n
        starts = np.r_[0, np.flatnonzero(np.diff(self.order)) + 1]
        ends = np.r_[starts[1:] - 1, n - 1]
        seg = np.repeat(np.arange(starts.size), ends - starts + 1)
        self.seg_lo, self.seg_hi = starts[seg], ends[seg]          # (N,) first and last index of each order
        self.n_orders = starts.size
        self.scan = np.unique(np.r_[np.arange(0, n, SCAN_STRIDE), starts, ends])
        self._metric()
        self.lock = threading.Lock()
        self.shape = np.ceil((_HI - _LO) / COARSE_STEP).astype(int)
        self.block_of = np.full(int(np.prod(self.shape)), -1, dtype=np.int32)   # coarse cell -> block
        self.blocks = np.zeros((0, FINE_PER_COARSE ** 3), dtype=np.int32)      # block -> vertex slots
        self.seeds = np.zeros((0, MAX_SEEDS), dtype=np.int32)                  # block -> seed path indices
        self.records = np.zeros((0, 33), dtype=np.float32)                     # slot -> answer (see _records)
        self.n_blocks = 0
        self.n_slots = 0

    # -- path quantities ----------------------------------------------------
    def _metric(self):
        """Per path point: tangent t (Lab per nm), metric M of ΔE00² (its Hessian in the observed colour at
        the point, by symmetric finite differences), w = M t / tᵀMt and A = M - M t tᵀ M / tᵀMt."""
        P, t, n = self.P, self.t, self.n
        tan = np.zeros_like(P)
        if n > 1:
            i = np.arange(n)
            a = np.clip(i - 1, 0, n - 1)
            b = np.clip(i + 1, 0, n - 1)
            tan = (P[b] - P[a]) / (t[b] - t[a])[:, None]
        h = FD_STEP
        dirs = np.array([[1, 0, 0], [0, 1, 0], [0, 0, 1], [1, 1, 0], [1, 0, 1], [0, 1, 1]], float) * h
        f = np.empty((n, 6))
        for k, d in enumerate(dirs):
            f[:, k] = 0.5 * (self._f(P + d, P) + self._f(P - d, P))
        M = np.empty((n, 3, 3))
        for k in range(3):
            M[:, k, k] = f[:, k] / (h * h)
        for k, (p, q) in enumerate(((0, 1), (0, 2), (1, 2))):
            M[:, p, q] = M[:, q, p] = (f[:, 3 + k] - f[:, p] - f[:, q]) / (2 * h * h)
        Mt = np.einsum("nij,nj->ni", M, tan)
        tMt = np.einsum("ni,ni->n", tan, Mt)
        ok = tMt > 1e-12
        w = np.where(ok[:, None], Mt / np.where(ok, tMt, 1.0)[:, None], 0.0)
        A = M - np.where(ok[:, None, None], Mt[:, :, None] * Mt[:, None, :] / np.where(ok, tMt, 1.0)[:, None, None], 0)
        self.tan, self.w, self.M = tan, w, M
        self.M6 = np.stack([M[:, 0, 0], M[:, 0, 1], M[:, 0, 2], M[:, 1, 1], M[:, 1, 2], M[:, 2, 2]], axis=1)
        self.A6 = np.stack([A[:, 0, 0], A[:, 0, 1], A[:, 0, 2], A[:, 1, 1], A[:, 1, 2], A[:, 2, 2]], axis=1)

    @staticmethod
    def _f(c, p):
        """ΔE00² between colours (..., 3) and path points (..., 3), float64."""
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            return _de00_sq(c[..., 0], c[..., 1], c[..., 2], p[..., 0], p[..., 1], p[..., 2])

    def _fi(self, c, idx, P=None):
        """ΔE00² between colours c (m, 3) and the path points idx (m, k): (m, k), in the dtype of P."""
        p = (self.P if P is None else P)[idx]
        c = c.astype(p.dtype, copy=False)
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            return _de00_sq(c[:, None, 0], c[:, None, 1], c[:, None, 2], p[..., 0], p[..., 1], p[..., 2])

    # -- exact solving ------------------------------------------------------
    def _descend(self, c, idx):
        """Follow each start index (m, k) downhill in ΔE00² along its order to a local minimum: (idx, f).

        Both neighbours of each start are tried once; the walk then goes on in the downhill direction, one
        point per round, on the starts still moving only."""
        m, k = idx.shape
        P, lo, hi = self.P32, self.seg_lo, self.seg_hi
        flat = idx.reshape(-1).astype(np.int64)
        real = np.flatnonzero(flat >= 0)                                   # -1 = no start
        i = flat[real]
        cr = c.astype(np.float32)[real // k]
        f = self._f(cr, P[i])
        left, right = np.maximum(i - 1, lo[i]), np.minimum(i + 1, hi[i])
        fl, fr = self._f(cr, P[left]), self._f(cr, P[right])
        go_l = (fl < f) & (fl <= fr)
        go_r = (fr < f) & ~go_l
        i = np.where(go_l, left, np.where(go_r, right, i))
        f = np.where(go_l, fl, np.where(go_r, fr, f))
        step = np.where(go_l, -1, 1)
        act = np.flatnonzero(go_l | go_r)
        while act.size:
            cur = i[act]
            nxt = np.clip(cur + step[act], lo[cur], hi[cur])
            fn = self._f(cr[act], P[nxt])
            better = (fn < f[act]) & (nxt != cur)
            act = act[better]
            i[act] = nxt[better]
            f[act] = fn[better]
        out_i = np.full(m * k, -1, dtype=np.int64)
        out_f = np.full(m * k, np.inf)
        out_i[real], out_f[real] = i, f
        return out_i.reshape(m, k), out_f.reshape(m, k)

    def _best_two(self, idx, f):
        """Per row: (index, f) of the best start and of the best of another order (-1, inf when none)."""
        m = idx.shape[0]
        rows = np.arange(m)
        j1 = np.argmin(f, axis=1)
        i1 = idx[rows, j1]
        other = self.order[idx] != self.order[i1][:, None]
        f2 = np.where(other, f, np.inf)
        j2 = np.argmin(f2, axis=1)
        i2 = np.where(np.isfinite(f2[rows, j2]), idx[rows, j2], -1)
        return i1, f[rows, j1], i2

    def _centre(self, z):
        """Exact answer and seeds at colours z (m, 3): (i1, i2, seeds (m, MAX_SEEDS), best f)."""
        m = z.shape[0]
        r = np.sqrt(3.0) * COARSE_STEP / 2                                  # half-diagonal of a cell
        margin = (2 * DE00_LIPSCHITZ * r)
        fs = self._fi(z, np.broadcast_to(self.scan, (m, self.scan.size)), self.P32)
        scan = self.scan
        same_l = np.r_[False, self.order[scan[1:]] == self.order[scan[:-1]]]
        same_r = np.r_[self.order[scan[1:]] == self.order[scan[:-1]], False]
        left = np.where(same_l[None, :], np.c_[np.full((m, 1), np.inf), fs[:, :-1]], np.inf)
        right = np.where(same_r[None, :], np.c_[fs[:, 1:], np.full((m, 1), np.inf)], np.inf)
        is_min = (fs <= left) & (fs <= right)
        cand = np.where(is_min, fs, np.inf)
        k = min(MAX_SEEDS, scan.size)
        part = np.argpartition(cand, k - 1, axis=1)[:, :k] if k < scan.size else np.tile(np.arange(scan.size), (m, 1))
        start = scan[part]
        ok = np.isfinite(np.take_along_axis(cand, part, axis=1))
        start = np.where(ok, start, start[:, :1])                           # pad with a real minimum
        idx, f = self._descend(z, start)
        # Per order: its best f; keep orders that can be first or second in the cell, and minima near their best.
        o = self.order[idx]
        best_o = np.full((m, idx.shape[1]), np.inf)
        for j in range(idx.shape[1]):
            same = o == o[:, j:j + 1]
            best_o[:, j] = np.min(np.where(same, f, np.inf), axis=1)
        d = np.sqrt(f)
        dbest = np.sqrt(best_o)
        i1, f1, i2 = self._best_two(idx, f)
        f2 = np.where(i2 >= 0, self._fi(z, np.maximum(i2, 0)[:, None])[:, 0], np.inf)
        second = np.sqrt(np.maximum(f1, f2))
        keep = (dbest <= second[:, None] + margin) & (d <= dbest + margin)
        # distinct seeds, best first, at most MAX_SEEDS
        by_d = np.argsort(np.where(keep, d, np.inf), axis=1, kind="stable")
        sidx = np.take_along_axis(np.where(keep, idx, -1), by_d, axis=1)
        k = sidx.shape[1]
        earlier = np.triu(np.ones((k, k), bool), 1)                          # [j', j]: j' before j
        dup = np.any((sidx[:, :, None] == sidx[:, None, :]) & earlier[None], axis=1)
        sidx = np.where(dup, -1, sidx)
        srt = np.take_along_axis(sidx, np.argsort(sidx < 0, axis=1, kind="stable"), axis=1)[:, :MAX_SEEDS]
        if srt.shape[1] < MAX_SEEDS:
            srt = np.c_[srt, np.full((m, MAX_SEEDS - srt.shape[1]), -1)]
        return i1, i2, srt.astype(np.int32), f1

    def _records(self, q, i1, i2):
        """Answers at colours q (m, 3) with best path index i1 and best-other index i2 (-1 = none): (m, 33).

        Built as: q (3); then for best and other: thickness τ (nm, parabola-refined), w (3), ΔE00² at q
        (refined), its gradient g in the observed colour (3, central differences), A as the coefficients of
        dx², dx dy, dx dz, dy², dy dz, dz² (6), order; so that ΔE00² = [1, Δ, products of Δ] · (ΔE00², g, A).
        Returned with the columns regrouped as :data:`_ANSWER_LAYOUT` says (both answers' like parts side by
        side, for :meth:`_answer`).
        """
        m = q.shape[0]
        out = np.zeros((m, 33))
        out[:, :3] = q
        for b, idx in enumerate((i1, i2)):
            base = 3 + 15 * b
            none = idx < 0
            i = np.where(none, 0, idx)
            il = np.maximum(i - 1, self.seg_lo[i])
            ir = np.minimum(i + 1, self.seg_hi[i])
            f = self._fi(q, np.stack([il, i, ir], axis=1))
            fl, fc, fr = f[:, 0], f[:, 1], f[:, 2]
            curv = fl - 2 * fc + fr
            inner = (il < i) & (ir > i) & (curv > 0)
            s = np.where(inner, 0.5 * (fl - fr) / np.where(inner, curv, 1.0), 0.0)
            s = np.clip(s, -0.5, 0.5)                                       # in steps, around point i
            step = np.where(s >= 0, self.t[ir] - self.t[i], self.t[i] - self.t[il])
            tau = self.t[i] + s * step
            fmin = np.where(inner, fc - 0.25 * curv * s * s * 2, fc)          # parabola's value at s
            fmin = np.maximum(fmin, 0.0)
            p = self.P[i] + (tau - self.t[i])[:, None] * self.tan[i]
            g = np.empty((m, 3))                                          # central differences at q
            for k in range(3):
                e = np.zeros(3)
                e[k] = FD_STEP
                g[:, k] = (self._f(q + e, p) - self._f(q - e, p)) / (2 * FD_STEP)
            # A minimum at an end of its order (the window's end, or where the order changes) is not a
            # stationary point of the path: the nearest point stays there as the colour moves, so its thickness
            # takes no first-order correction and ΔE00² grows with the full metric M, not the one across the path.
            A = np.where(inner[:, None], self.A6[i], self.M6[i]) * np.array([1.0, 2.0, 2.0, 1.0, 2.0, 1.0])
            out[:, base] = np.where(none, np.nan, tau)
            out[:, base + 1:base + 4] = np.where(none[:, None] | ~inner[:, None], 0.0, self.w[i])
            out[:, base + 4] = np.where(none, np.inf, fmin)
            out[:, base + 5:base + 8] = np.where(none[:, None], 0.0, g)
            out[:, base + 8:base + 14] = np.where(none[:, None], 0.0, A)
            out[:, base + 14] = np.where(none, 0, self.order[i])
        return out[:, _ANSWER_LAYOUT].astype(np.float32)

    def _append(self, recs):
        n = recs.shape[0]
        need = self.n_slots + n
        if need > self.records.shape[0]:
            grown = np.zeros((max(need, 2 * self.records.shape[0], 4096), 33), dtype=np.float32)
            grown[:self.n_slots] = self.records[:self.n_slots]
            self.records = grown
        self.records[self.n_slots:need] = recs
        first = self.n_slots
        self.n_slots = need
        return np.arange(first, need, dtype=np.int32)

    def _new_blocks(self, cells):
        """Build the coarse cells (linear ids): seeds, and the centre's answer for far cells."""
        ijk = np.stack(np.unravel_index(cells, self.shape), axis=1)
        z = _LO + (ijk * FINE_PER_COARSE + (FINE_PER_COARSE - 1) / 2) * FINE_STEP   # centre of its vertices
        i1, i2, seeds, f1 = _in_chunks(self._centre, z, 2048)
        m = cells.size
        need = self.n_blocks + m
        if need > self.blocks.shape[0]:
            cap = max(need, 2 * self.blocks.shape[0], 1024)
            nb = np.full((cap, FINE_PER_COARSE ** 3), -1, dtype=np.int32)
            nb[:self.n_blocks] = self.blocks[:self.n_blocks]
            ns = np.full((cap, MAX_SEEDS), -1, dtype=np.int32)
            ns[:self.n_blocks] = self.seeds[:self.n_blocks]
            self.blocks, self.seeds = nb, ns
        ids = np.arange(self.n_blocks, need, dtype=np.int32)
        self.seeds[ids] = seeds
        far = np.sqrt(f1) > FAR_DE + DE00_LIPSCHITZ * np.sqrt(3.0) * COARSE_STEP / 2
        if far.any():
            slots = self._append(_in_chunks(self._records, z[far], 16384, i1[far], i2[far]))
            self.blocks[ids[far]] = slots[:, None]
        self.block_of[cells] = ids
        self.n_blocks = need

    def _solve(self, q, seeds, z):
        """Exact best and best-other-order indices at colours q (m, 3) from the seeds (m, S, -1 padded) of
        their cell centres z (m, 3); each seed first moves by the path's first-order shift w·(q - z)."""
        real = seeds >= 0
        start = np.where(real, seeds, 0)
        dt = np.einsum("msk,mk->ms", self.w[start], q - z)
        step = self.t[1] - self.t[0] if self.n > 1 else 1.0
        shift = np.clip(np.rint(dt / step), -MAX_SHIFT, MAX_SHIFT).astype(np.int64)
        start = np.where(real, np.clip(start + shift, self.seg_lo[start], self.seg_hi[start]), -1)
        idx, f = self._descend(q, start)
        i1, _, i2 = self._best_two(idx, f)
        return i1, i2

    def _slots(self, lab):
        """Slot of every colour (m, 3) in the table, building what is missing; -1 for colours outside it."""
        # vertices sit at _LO + v * FINE_STEP; vertex v belongs to coarse cell v // FINE_PER_COARSE
        v = np.floor((lab - _LO.astype(lab.dtype)) * lab.dtype.type(1 / FINE_STEP) + 0.5).astype(np.int64)
        inside = np.all((v >= 0) & (v < self.shape * FINE_PER_COARSE), axis=1)
        v[~inside] = 0
        c = v // FINE_PER_COARSE
        cell = np.ravel_multi_index((c[:, 0], c[:, 1], c[:, 2]), self.shape, mode="clip")
        sub = v - c * FINE_PER_COARSE
        sub = (sub[:, 0] * FINE_PER_COARSE + sub[:, 1]) * FINE_PER_COARSE + sub[:, 2]
        blk = self.block_of[cell]
        miss = inside & (blk < 0)
        if miss.any():
            self._new_blocks(np.unique(cell[miss]))
            blk = self.block_of[cell]
        slot = self.blocks[np.maximum(blk, 0), sub]
        miss = inside & (slot < 0)
        if miss.any():
            key = blk[miss].astype(np.int64) * FINE_PER_COARSE ** 3 + sub[miss]
            uk, first = np.unique(key, return_index=True)
            ub, us = uk // FINE_PER_COARSE ** 3, uk % FINE_PER_COARSE ** 3
            vq = v[np.flatnonzero(miss)[first]]                         # vertices solved in float64
            q = _LO + vq * FINE_STEP
            z = _LO + ((vq // FINE_PER_COARSE) * FINE_PER_COARSE + (FINE_PER_COARSE - 1) / 2) * FINE_STEP
            i1, i2 = _in_chunks(self._solve, q, 16384, self.seeds[ub], z)
            slots = self._append(_in_chunks(self._records, q, 16384, i1, i2))
            self.blocks[ub, us] = slots
            slot = self.blocks[np.maximum(blk, 0), sub]
        return np.where(inside, slot, -1)

    # -- answering ----------------------------------------------------------
    def _answer(self, lab, rec):
        """(t1, de1, o1, t2, de2, o2) of colours lab (m, 3) from their records (m, 33, :data:`_ANSWER_LAYOUT`)."""
        m = rec.shape[0]
        d = lab.astype(np.float32, copy=False) - rec[:, :3]
        X = np.empty((m, 10), dtype=np.float32)                          # 1, Δ, and the products of Δ
        X[:, 0] = 1.0
        X[:, 1:4] = d
        np.multiply(d, d[:, :1], out=X[:, 4:7])                           # dx dx, dx dy, dx dz
        np.multiply(d[:, 1:], d[:, 1:2], out=X[:, 7:9])                   # dy dy, dy dz
        np.multiply(d[:, 2], d[:, 2], out=X[:, 9])
        f = np.einsum("ij,ikj->ik", X, rec[:, 3:23].reshape(m, 2, 10))     # ΔE00² of both answers
        corr = np.einsum("ij,ikj->ik", d, rec[:, 23:29].reshape(m, 2, 3))  # their thickness corrections
        np.clip(corr, -MAX_CORRECTION_NM, MAX_CORRECTION_NM, out=corr)
        corr += rec[:, 29:31]
        np.maximum(f, 0, out=f)
        np.sqrt(f, out=f)
        o = rec[:, 31:33].astype(np.int16)
        swap = f[:, 1] < f[:, 0]                   # the other order's basin is the better one at this colour
        if swap.any():
            for a in (corr, f, o):
                a[swap] = a[swap, ::-1]
        return corr[:, 0], f[:, 0], o[:, 0], corr[:, 1], f[:, 1], o[:, 1]

    def _lookup(self, x, blocks, n_blocks, n_slots):
        """Slots of colours x (m, 3) in the table as it stood (``blocks``, ``n_blocks``, ``n_slots`` read
        together under the lock): read without the lock, so two threads answer at once; -1 where the colour
        is outside the table or its cell or vertex was not built by then (:meth:`_slots` builds those)."""
        v = x - _LO.astype(x.dtype)
        v *= x.dtype.type(1 / FINE_STEP)
        v += x.dtype.type(0.5)
        np.floor(v, out=v)                                               # as _slots: the nearest vertex
        inside = ((v >= 0) & (v < (self.shape * FINE_PER_COARSE).astype(v.dtype))).all(axis=1)
        v = v.astype(np.int32)
        v[~inside] = 0
        c = v // FINE_PER_COARSE
        cell = (c[:, 0] * np.int32(self.shape[1]) + c[:, 1]) * np.int32(self.shape[2]) + c[:, 2]
        v -= c * FINE_PER_COARSE
        sub = (v[:, 0] * FINE_PER_COARSE + v[:, 1]) * FINE_PER_COARSE + v[:, 2]
        blk = self.block_of.take(cell)
        ok = inside & (blk >= 0) & (blk < n_blocks)
        if n_blocks == 0:                                                # nothing built yet
            return np.full(x.shape[0], -1, dtype=np.int32)
        slot = blocks.reshape(-1).take(np.where(ok, blk, 0) * FINE_PER_COARSE ** 3 + sub)
        ok &= slot < n_slots
        slot[~ok] = -1
        return slot

    def match(self, lab, workers: int = 2, out=None):
        """Best path match and best match of another order for each colour.

        Parameters
        ----------
        lab : (U, 3) CIELAB colours
        workers : threads for the per-colour pass (the table is built in one thread)
        out : optional six arrays of the returned dtypes and length U to write the answers into

        Returns
        -------
        t1 (U,) float32 nm, de1 (U,) float32 ΔE00, o1 (U,) int16 order; t2, de2, o2 the best of another order
        (NaN, inf, 0 when the path has one order). Non-finite colours get NaN, inf, 0 for both.
        """
        lab = np.asarray(lab).reshape(-1, 3)
        if lab.dtype not in (np.float32, np.float64):
            lab = lab.astype(np.float64)
        kern = kernel()
        if kern is None or lab.shape[0] < KERNEL_MIN_COLOURS:
            answers = self._match_numpy(lab, workers)
            if out is None:
                return answers
            for o, a in zip(out, answers):
                o[...] = a
            return tuple(out)
        lab = np.ascontiguousarray(lab)
        U = lab.shape[0]
        if out is None:
            out = (np.empty(U, np.float32), np.empty(U, np.float32), np.empty(U, np.int16),
                   np.empty(U, np.float32), np.empty(U, np.float32), np.empty(U, np.int16))
        out = tuple(out)
        miss = np.empty(U, dtype=np.int64)
        with self.lock:                                                 # the table as it stands
            blocks, n_blocks, n_slots, records = self.blocks, self.n_blocks, self.n_slots, self.records
        dt = lab.dtype.type
        const = (_LO.astype(lab.dtype), dt(1 / FINE_STEP), dt(0.5), (self.shape * FINE_PER_COARSE).astype(lab.dtype),
                 np.int64(self.shape[1]), np.int64(self.shape[2]), np.int64(FINE_PER_COARSE), self.block_of, blocks,
                 np.int64(n_blocks), np.int64(n_slots), records, np.float32(self.t[0]), np.float32(self.t[-1]),
                 np.float32(MAX_CORRECTION_NM))

        def run(a, b):
            n = kern(lab[a:b], *const, *(o[a:b] for o in out), miss[a:b])
            return miss[a:a + n] + a

        parts = max(1, min(workers, U // KERNEL_MIN_COLOURS))
        edges = np.linspace(0, U, parts + 1).astype(int)
        if parts > 1:
            with ThreadPoolExecutor(parts) as pool:
                missed = list(pool.map(lambda k: run(edges[k], edges[k + 1]), range(parts)))
        else:
            missed = [run(0, U)]
        idx = np.concatenate(missed)
        if idx.size:                                                    # not built yet, or outside the table
            for o, v in zip(out, self._match_numpy(lab[idx], workers)):
                o[idx] = v
        return out

    def _match_numpy(self, lab, workers):
        """:meth:`match` in numpy (chunks of :data:`CHUNK` colours, in threads): the path that builds the table."""
        U = lab.shape[0]
        t1, t2 = np.full(U, np.nan, np.float32), np.full(U, np.nan, np.float32)
        de1, de2 = np.full(U, np.inf, np.float32), np.full(U, np.inf, np.float32)
        o1, o2 = np.zeros(U, np.int16), np.zeros(U, np.int16)
        lo, hi = float(self.t[0]), float(self.t[-1])

        def work(a, b):
            x = lab[a:b]
            every = bool(np.isfinite(np.add.reduce(x, axis=None)))     # a NaN or an inf anywhere makes the sum one
            good = None if every else np.isfinite(x).all(axis=1)
            if not every:
                x = np.where(good[:, None], x, 0.0)
            with self.lock:                                             # the table as it stands
                snapshot = self.blocks, self.n_blocks, self.n_slots, self.records
            slot = self._lookup(x, *snapshot[:3])
            rec = (snapshot[3].take(np.maximum(slot, 0), axis=0) if snapshot[2]
                   else np.zeros((x.shape[0], snapshot[3].shape[1]), dtype=np.float32))
            miss = np.flatnonzero(slot < 0)
            if miss.size:                                              # cells and vertices not built yet
                with self.lock:
                    built = self._slots(x[miss])
                    records = self.records                             # the array as grown so far
                got = built >= 0
                rec[miss[got]] = records.take(built[got], axis=0)
                out = miss[~got] if every else miss[~got & good[miss]]
                if out.size:                                           # outside the table: solved one by one
                    xo = x[out].astype(np.float64)
                    with self.lock:
                        i1, i2, _, _ = _in_chunks(self._centre, xo, 2048)
                    rec[out] = _in_chunks(self._records, xo, 16384, i1, i2)
            ans = self._answer(x, rec)
            g = slice(a, b)
            for k, (dst, val) in enumerate(zip((t1, de1, o1, t2, de2, o2), ans)):
                if k % 3 == 0:
                    val = np.clip(val, lo, hi)
                dst[g] = val if every else np.where(good, val, dst[g])

        spans = [(a, min(a + CHUNK, U)) for a in range(0, U, CHUNK)]
        if workers > 1 and len(spans) >= PARALLEL_SPANS:
            with ThreadPoolExecutor(workers) as pool:
                list(pool.map(lambda s: work(*s), spans))
        else:
            for s in spans:
                work(*s)
        return t1, de1, o1, t2, de2, o2

    @property
    def nbytes(self) -> int:
        """Memory held by the table's arrays, bytes."""
        return int(self.block_of.nbytes + self.blocks.nbytes + self.seeds.nbytes + self.records.nbytes)


def _in_chunks(fn, x, size, *more):
    """fn(x, *more) over row chunks of at most ``size`` (bounding the working arrays), results joined."""
    if x.shape[0] <= size:
        return fn(x, *more)
    parts = [fn(x[a:a + size], *(m[a:a + size] for m in more)) for a in range(0, x.shape[0], size)]
    if isinstance(parts[0], tuple):
        return tuple(np.concatenate(p) for p in zip(*parts))
    return np.concatenate(parts)


_TABLES: OrderedDict = OrderedDict()
_TABLES_LOCK = threading.Lock()


def colour_table(lab, thickness_nm, order) -> ColourTable:
    """The cached :class:`ColourTable` of a path (by its content; the :data:`TABLES_CACHED` most recent kept)."""
    lab = np.ascontiguousarray(lab, dtype=np.float64)
    t = np.ascontiguousarray(thickness_nm, dtype=np.float64)
    o = np.ascontiguousarray(order, dtype=np.int64)
    h = hashlib.blake2b(digest_size=16)
    for a in (lab, t, o):
        h.update(a.tobytes())
    key = h.digest()
    with _TABLES_LOCK:
        table = _TABLES.get(key)
        if table is not None:
            _TABLES.move_to_end(key)
            return table
        table = ColourTable(lab, t, o)
        _TABLES[key] = table
        while len(_TABLES) > TABLES_CACHED:
            _TABLES.popitem(last=False)
        return table
