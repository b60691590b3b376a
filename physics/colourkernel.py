"""Compiled per-pixel loops of the photo map: colour-table answers, CIELAB of 16-bit codes, order choice.

The colour-table pass of :class:`physics.colourtable.ColourTable` (lookup and answer in one loop) is the
main one:

The numpy pass (``ColourTable._lookup`` then ``ColourTable._answer``) makes a dozen temporary arrays per chunk
of colours and gathers 132-byte records; on a 12 MP photo whose every pixel is its own colour it is memory
bound at about 1.5 s per core. This loop does the same arithmetic (float32, the same formulas) one colour at a
time in registers, compiled by numba (BSD-2-Clause) without the interpreter lock, so two threads share the
photo. Colours whose cell or vertex is not built yet, or that lie outside the table, are handed back as
misses: the numpy pass answers them (and builds what they need).

The other loops do in one pass what :func:`physics.colourtable.lab_from_linear` (on decoded 16-bit codes) and
:func:`physics.inverse._resolve` (pixel by pixel, when every pixel is its own colour) do with a dozen full-size
numpy temporaries, each of which costs its page faults on a 12 MP map.

:func:`kernels` returns the compiled functions, or None where numba is not installed or is switched off by
the environment variable ``FRINGEGAUGE_NO_JIT=1`` (the numpy code then runs: the same answers to float32
rounding, checked in tests/test_colourtable.py and tests/test_inverse.py).
"""

from __future__ import annotations

import os
import threading

_lock = threading.Lock()
_compiled = None
_tried = False
_disabled = False


def _build():
    import numba
    import numpy as np

    @numba.njit(nogil=True, cache=True, fastmath=False, boundscheck=False)
    def answer_span(x, lo3, inv_step, half, nv, s1, s2, fine, block_of, blocks, n_blocks, n_slots, rec, t_lo, t_hi,
                    max_corr, t1, de1, o1, t2, de2, o2, miss):
        """Answer colours x (m, 3) found in the table into the outputs; their row numbers that are not found
        go to ``miss`` (returned: how many). Non-finite colours get NaN, inf, 0 (not misses)."""
        n_miss = 0
        for i in range(x.shape[0]):
            c0, c1, c2 = x[i, 0], x[i, 1], x[i, 2]
            if not (np.isfinite(c0) and np.isfinite(c1) and np.isfinite(c2)):
                t1[i] = np.nan
                t2[i] = np.nan
                de1[i] = np.inf
                de2[i] = np.inf
                o1[i] = 0
                o2[i] = 0
                continue
            u0 = np.floor((c0 - lo3[0]) * inv_step + half)
            u1 = np.floor((c1 - lo3[1]) * inv_step + half)
            u2 = np.floor((c2 - lo3[2]) * inv_step + half)
            if not (u0 >= 0 and u0 < nv[0] and u1 >= 0 and u1 < nv[1] and u2 >= 0 and u2 < nv[2]):
                miss[n_miss] = i
                n_miss += 1
                continue
            v0, v1, v2 = np.int64(u0), np.int64(u1), np.int64(u2)
            cell = ((v0 // fine) * s1 + v1 // fine) * s2 + v2 // fine
            blk = block_of[cell]
            if blk < 0 or blk >= n_blocks:
                miss[n_miss] = i
                n_miss += 1
                continue
            slot = blocks[blk, ((v0 % fine) * fine + v1 % fine) * fine + v2 % fine]
            if slot < 0 or slot >= n_slots:
                miss[n_miss] = i
                n_miss += 1
                continue
            r = rec[slot]
            dx = np.float32(c0) - r[0]
            dy = np.float32(c1) - r[1]
            dz = np.float32(c2) - r[2]
            xx, xy, xz, yy, yz, zz = dx * dx, dx * dy, dx * dz, dy * dy, dy * dz, dz * dz
            fa = (r[3] + r[4] * dx + r[5] * dy + r[6] * dz + r[7] * xx + r[8] * xy + r[9] * xz + r[10] * yy
                  + r[11] * yz + r[12] * zz)
            fb = (r[13] + r[14] * dx + r[15] * dy + r[16] * dz + r[17] * xx + r[18] * xy + r[19] * xz + r[20] * yy
                  + r[21] * yz + r[22] * zz)
            ca = r[23] * dx + r[24] * dy + r[25] * dz
            cb = r[26] * dx + r[27] * dy + r[28] * dz
            if ca < -max_corr:
                ca = -max_corr
            elif ca > max_corr:
                ca = max_corr
            if cb < -max_corr:
                cb = -max_corr
            elif cb > max_corr:
                cb = max_corr
            ta = r[29] + ca
            tb = r[30] + cb
            da = np.sqrt(fa) if fa > 0 else np.float32(0.0)
            db = np.sqrt(fb) if fb > 0 else np.float32(0.0)
            oa, ob = np.int16(r[31]), np.int16(r[32])
            if db < da:                       # the other order's basin is the better one at this colour
                ta, tb = tb, ta
                da, db = db, da
                oa, ob = ob, oa
            if ta < t_lo:
                ta = t_lo
            elif ta > t_hi:
                ta = t_hi
            if tb < t_lo:
                tb = t_lo
            elif tb > t_hi:
                tb = t_hi
            t1[i], de1[i], o1[i] = ta, da, oa
            t2[i], de2[i], o2[i] = tb, db, ob
        return n_miss

    @numba.njit(nogil=True, cache=True, boundscheck=False)
    def lab_of_codes(codes, table, coef, lab):
        """CIELAB (float32) of pixel codes (n, 3) decoded by ``table`` (code -> linear value), through the
        3x3 ``coef`` (linear RGB -> XYZ / white, float32): as physics.colourtable.lab_from_linear."""
        eps = np.float32((6.0 / 29.0) ** 3)
        k = np.float32(1.0 / (3 * (6.0 / 29.0) ** 2))
        c = np.float32(4.0 / 29.0)
        for i in range(codes.shape[0]):
            r, g, b = table[codes[i, 0]], table[codes[i, 1]], table[codes[i, 2]]
            fx = r * coef[0, 0] + g * coef[0, 1] + b * coef[0, 2]
            fy = r * coef[1, 0] + g * coef[1, 1] + b * coef[1, 2]
            fz = r * coef[2, 0] + g * coef[2, 1] + b * coef[2, 2]
            fx = np.cbrt(fx) if fx > eps else fx * k + c
            fy = np.cbrt(fy) if fy > eps else fy * k + c
            fz = np.cbrt(fz) if fz > eps else fz * k + c
            lab[i, 0] = np.float32(116.0) * fy - np.float32(16.0)
            lab[i, 1] = np.float32(500.0) * (fx - fy)
            lab[i, 2] = np.float32(200.0) * (fy - fz)

    @numba.njit(nogil=True, cache=True, boundscheck=False)
    def margins(de1, de2, max_de, margin_de, margin, confident):
        """|ΔE00 margin| (NaN where not finite) and the confident flag of every pixel (as inverse._resolve);
        returns (how many are confident, whether any other-order match is acceptable)."""
        n_conf = 0
        any_other = False
        for i in range(de1.shape[0]):
            m = de2[i] - de1[i]
            margin[i] = abs(m) if np.isfinite(m) else np.nan
            ok = de1[i] <= max_de and m >= margin_de
            confident[i] = ok
            n_conf += ok
            if de2[i] <= max_de:
                any_other = True
        return n_conf, any_other

    @numba.njit(nogil=True, cache=True, boundscheck=False)
    def choose(t1, de1, o1, t2, de2, o2, margin, confident, ref, step, width, use_ref, nominal, max_de,
               margin_de, undecided):
        """Per pixel, as inverse._resolve: the other order where the pixel is not confident and it lies nearer
        the smoothed reference (``ref`` on a grid ``step`` coarser; NaN there falls back to ``nominal``, itself
        NaN when none); then unmatched pixels emptied. t1, de1 and o1 become the map (in place)."""
        for i in range(t1.shape[0]):
            d2 = de2[i]
            maybe = d2 <= max_de and margin[i] < margin_de
            if use_ref and not confident[i]:
                r = ref[(i // width) // step, (i % width) // step]
                if np.isnan(r):
                    r = nominal
                if d2 <= max_de and np.isfinite(r) and abs(t2[i] - r) < abs(t1[i] - r):
                    t1[i] = t2[i]
                    de1[i] = d2
                    o1[i] = o2[i]
            if de1[i] > max_de:
                t1[i] = np.nan
                o1[i] = 0
            undecided[i] = maybe and np.isfinite(t1[i])

    @numba.njit(nogil=True, cache=True, boundscheck=False)
    def lab_of_linear(lin, coef, lab):
        """CIELAB (float32) of linear values (n, 3), each first rounded to float32, through ``coef`` (linear ->
        XYZ / white, float32): as physics.colourtable.lab_from_linear."""
        eps = np.float32((6.0 / 29.0) ** 3)
        k = np.float32(1.0 / (3 * (6.0 / 29.0) ** 2))
        c = np.float32(4.0 / 29.0)
        for i in range(lin.shape[0]):
            r, g, b = np.float32(lin[i, 0]), np.float32(lin[i, 1]), np.float32(lin[i, 2])
            fx = r * coef[0, 0] + g * coef[0, 1] + b * coef[0, 2]
            fy = r * coef[1, 0] + g * coef[1, 1] + b * coef[1, 2]
            fz = r * coef[2, 0] + g * coef[2, 1] + b * coef[2, 2]
            fx = np.cbrt(fx) if fx > eps else fx * k + c
            fy = np.cbrt(fy) if fy > eps else fy * k + c
            fz = np.cbrt(fz) if fz > eps else fz * k + c
            lab[i, 0] = np.float32(116.0) * fy - np.float32(16.0)
            lab[i, 1] = np.float32(500.0) * (fx - fy)
            lab[i, 2] = np.float32(200.0) * (fy - fz)

    @numba.njit(nogil=True, cache=True, boundscheck=False)
    def histogram(x, lo, scale, nbins, counts):
        """counts[j] += values of x in bin j = min(int((x - lo) * scale), nbins - 1) (x >= lo, in x's dtype),
        as inverse._order_statistics bins them."""
        for i in range(x.shape[0]):
            b = np.int64((x[i] - lo) * scale)
            if b > nbins - 1:
                b = nbins - 1
            counts[b] += 1

    @numba.njit(nogil=True, cache=True, boundscheck=False)
    def in_bin(x, lo, scale, nbins, j, out):
        """The values of x in bin j (as :func:`histogram`) into out, in order; returns how many."""
        n = 0
        for i in range(x.shape[0]):
            b = np.int64((x[i] - lo) * scale)
            if b > nbins - 1:
                b = nbins - 1
            if b == j:
                out[n] = x[i]
                n += 1
        return n

    @numba.njit(nogil=True, cache=True, boundscheck=False)
    def order_counts(order, valid, lo, nv, step, gw, per_cell):
        """Count the pixels of a (h, w) order map into bins ((row // step) * gw + col // step) * (nv + 1) +
        (order - lo), or + nv where not valid (as inverse._order_outliers bins them)."""
        h, w = order.shape
        for y in range(h):
            base = (y // step) * gw
            for x in range(w):
                r = np.int64(order[y, x]) - lo if valid[y, x] else nv
                per_cell[(base + x // step) * (nv + 1) + r] += 1

    @numba.njit(nogil=True, cache=True, boundscheck=False)
    def order_flags(order, valid, lo, nv, step, gw, allowed, flags):
        """flags (h, w) = not allowed[bin] of each pixel, its bin as in :func:`order_counts`."""
        h, w = order.shape
        for y in range(h):
            base = (y // step) * gw
            for x in range(w):
                r = np.int64(order[y, x]) - lo if valid[y, x] else nv
                flags[y, x] = not allowed[(base + x // step) * (nv + 1) + r]

    @numba.njit(nogil=True, cache=True, boundscheck=False)
    def finite_values(x, out):
        """The finite values of x (1-D) into out, in order; returns how many."""
        n = 0
        for i in range(x.shape[0]):
            if np.isfinite(x[i]):
                out[n] = x[i]
                n += 1
        return n

    @numba.njit(nogil=True, cache=True, boundscheck=False)
    def moments(v):
        """(sum, sum of squares, min, max) of v (1-D, finite, not empty), summed in float64."""
        s = 0.0
        ss = 0.0
        lo = v[0]
        hi = v[0]
        for i in range(v.shape[0]):
            a = np.float64(v[i])
            s += a
            ss += a * a
            if v[i] < lo:
                lo = v[i]
            if v[i] > hi:
                hi = v[i]
        return s, ss, lo, hi

    from types import SimpleNamespace
    return SimpleNamespace(answer_span=answer_span, lab_of_codes=lab_of_codes, lab_of_linear=lab_of_linear,
                           margins=margins, choose=choose, histogram=histogram, in_bin=in_bin, order_counts=order_counts,
                           order_flags=order_flags, finite_values=finite_values, moments=moments)


def disable() -> None:
    """No compiled loops in this process (the numpy code throughout) until :func:`warm` is called: for the web
    page's own process, whose heavy work runs in worker processes and whose event loop must never wait for
    numba's import or a first compilation."""
    global _disabled
    _disabled = True


def kernel():
    """The compiled per-colour pass (see the module docstring), or None."""
    k = kernels()
    return None if k is None else k.answer_span


def kernels():
    """The compiled loops (a namespace: answer_span, lab_of_codes, lab_of_linear, margins, choose, histogram,
    in_bin, order_counts, order_flags, finite_values, moments), or None (see the module docstring)."""
    global _compiled, _tried
    if _disabled:
        return None
    if _tried:
        return _compiled
    with _lock:
        if not _tried:
            if os.environ.get("FRINGEGAUGE_NO_JIT", "") not in ("", "0"):
                _compiled = None
            else:
                try:
                    built = _build()
                    _exercise(built)
                    _compiled = built
                except Exception:                      # numba missing or unusable here: the numpy passes
                    _compiled = None
            _tried = True
    return _compiled


def warm() -> bool:
    """Compile (or load from numba's cache) every loop, so that the first photo map of a new process does not
    pay for it, and undo :func:`disable`; True when the compiled loops are in use."""
    global _disabled
    _disabled = False
    return kernels() is not None


def _exercise(k) -> None:
    """Run every loop once on a few values, with the argument types the map passes (numba compiles one
    version per type signature): a loop that cannot compile or run here fails now, not in a user's map."""
    import numpy as np

    f32 = np.zeros(2, np.float32)
    i16 = np.zeros(2, np.int16)
    for dt in (np.float32, np.float64):
        k.answer_span(np.zeros((2, 3), dt), np.zeros(3, dt), dt(2.0), dt(0.5), np.ones(3, dt), np.int64(1), np.int64(1),
                      np.int64(4), np.full(1, -1, np.int32), np.full((1, 64), -1, np.int32), np.int64(0), np.int64(0),
                      np.zeros((1, 33), np.float32), np.float32(0), np.float32(1), np.float32(0.75),
                      f32.copy(), f32.copy(), i16.copy(), f32.copy(), f32.copy(), i16.copy(), np.zeros(2, np.int64))
        x = np.array([1.0, 2.0], dt)
        k.lab_of_linear(np.zeros((2, 3), dt), np.eye(3, dtype=np.float32), np.zeros((2, 3), np.float32))
        k.histogram(x, x.min(), dt(1.0), 4096, np.zeros(4096, np.int64))
        k.in_bin(x, x.min(), dt(1.0), 4096, 0, np.empty(2, dt))
        k.finite_values(x, np.empty(2, dt))
        k.moments(x)
    k.lab_of_codes(np.zeros((2, 3), np.uint16), np.zeros(65536, np.float32), np.eye(3, dtype=np.float32),
                   np.zeros((2, 3), np.float32))
    conf = np.zeros(2, bool)
    k.margins(f32, f32, np.float32(6), np.float32(2), f32.copy(), conf)
    k.choose(f32.copy(), f32.copy(), i16.copy(), f32, f32, i16, f32, conf, np.zeros((1, 1)), 2, 2, True, float("nan"),
             np.float32(6), np.float32(2), conf.copy())
    order, valid = np.zeros((2, 2), np.int16), np.ones((2, 2), bool)
    k.order_counts(order, valid, 0, 1, 1, 2, np.zeros(16, np.int64))
    k.order_flags(order, valid, 0, 1, 1, 2, np.ones(16, bool), np.zeros((2, 2), bool))
