"""Speed of thickness from colour, each figure beside brute force and today's method in the same run.

Run:  python benchmarks/bench_inverse.py            (about 2-3 minutes on 2 cores)
      python benchmarks/bench_inverse.py --quick    (a 3 MP photo instead of 12 MP)

1. Photo to thickness map, three invented 12-megapixel scenes (4000 x 3000) of a bevelled thermal oxide on
   silicon, 50 -> 600 nm left to right with a slight bow top to bottom and 100 px of bare silicon at the left
   for calibration, seen by a camera with a white-balance error (linear gains 1.15, 1.0, 0.85) and an
   exposure error (x0.7). Colours come from the independent pipeline of tests/outside_pipeline.py (tmm +
   refractiveindex.info + colour-science) on a 1 nm thickness grid, interpolated per pixel.
     a. "no noise": 8-bit sRGB, no sensor noise (few distinct colours);
     b. "3 DN noise": 8-bit sRGB with Gaussian noise of 3 code values per channel (what every camera has);
     c. "all distinct": 16-bit sRGB with the same noise (3 x 257 code values): every pixel its own colour.
   Three matchers of the same CIELAB colours (those ``thickness_map`` computes), window 0-1000 nm:
     - brute force: CIEDE2000 (colour-science) of each colour against every point of the colour path,
       timed on a random sample of 2000 colours and EXTRAPOLATED to all the scene's colours;
     - today's method before this change: per-order k-d trees in CIELAB and ΔE00 on the nearest points
       (a copy, ``match_kdtree`` below); timed in full on a and b, on a 10 % sample of c EXTRAPOLATED;
     - the colour table (``physics.inverse._match``): cold (a new table) and warm (the table cached by an
       earlier photo of the same stack and lamp, the usual case on a production line).
   Agreement with brute force on the 2000 sampled colours: the share whose best thickness is within 0.5 nm
   (one path step) of brute force's, or whose path point is within 0.02 ΔE00 of brute force's minimum (on
   a flat stretch of the path, such as the bare silicon strip, colour cannot pin the thickness and brute
   force's point is one of many equally good), for all of them and for those that match (brute force's
   ΔE00 <= 6).
   Then the whole ``thickness_map`` (decode, calibration, matching, order resolution, statistics), warm; on c
   also with the compiled loops of physics/colourkernel.py switched off (the numpy passes, as before them).
   Peak memory: of one thickness_map call (tracemalloc, which counts numpy's arrays), and the process's
   peak resident set (resource.getrusage; the references and the scenes themselves included).
   Today's method runs in chunks of 50,000 colours, as thickness_map ran it.
   A calibrated map: the 3 DN scene with a camera calibration (physics.camera.calibrate_from_reference on six
   boxes of the wedge) and a flat field, every pixel read through the calibration, beside the gains-only map.
   Goals: 3 DN noise <= 1.5 s, all distinct and the calibrated map <= 3 s, peak <= 2 GB, agreement >= 99.9 %.
2. A typed colour to ranked candidates with ``thickness_candidates``: median of 20 calls (20 different
   colours). Reference: brute force, CIEDE2000 against a 0.1 nm colour path computed in the same run.
   Goal: at most 50 ms.

The machine is shared: the load average is printed with the figures.
"""

from __future__ import annotations

import os
import resource
import sys
import time
import tracemalloc
import warnings

import numpy as np
from scipy.spatial import cKDTree

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)
sys.path.insert(0, os.path.join(ROOT, "tests"))
warnings.simplefilter("ignore")

import outside_pipeline as op  # noqa: E402
import physics.colourtable as ct  # noqa: E402
from physics import inverse  # noqa: E402
from physics.appearance import color_map  # noqa: E402
from physics.color import delta_e_2000, srgb_to_xyz, xyz_to_lab  # noqa: E402
from physics.inverse import thickness_candidates, thickness_map  # noqa: E402
from physics.stackfile import load_preset  # noqa: E402

WIDTH, HEIGHT, BARE_PX = 4000, 3000, 100
GAINS, EXPOSURE, NOISE_DN = (1.15, 1.0, 0.85), 0.7, 3.0
SAMPLE = 2000
KDTREE_SHARE_DISTINCT = 0.1
KDTREE_CHUNK = 50_000
GOAL_NOISE_S, GOAL_DISTINCT_S, GOAL_PEAK_GB, GOAL_AGREE = 1.5, 3.0, 2.0, 0.999
GOAL_TYPED_S = 0.050
AGREE_NM = 0.5
AS_GOOD_DE = 0.02


def match_kdtree(lab, path):
    """Today's matcher before the colour table (a copy kept as the reference): per order, a k-d tree gives
    the KNN_PER_ORDER nearest path points in CIELAB; ΔE00 is evaluated for the ORDERS_COMPARED orders
    nearest by ΔE76."""
    U = lab.shape[0]
    ref = path.lab_display
    orders = np.unique(path.order)
    kk = inverse.KNN_PER_ORDER
    all_idx = np.empty((orders.size, U, kk), dtype=np.int64)
    all_d = np.empty((orders.size, U))
    for k, o in enumerate(orders):
        sel = np.flatnonzero(path.order == o)
        tree = cKDTree(ref[sel])
        dist, idx = tree.query(lab, k=min(kk, sel.size), workers=-1)
        idx = idx.reshape(U, -1)
        if idx.shape[1] < kk:
            idx = np.concatenate([idx, np.repeat(idx[:, -1:], kk - idx.shape[1], axis=1)], axis=1)
        all_idx[k] = sel[idx]
        all_d[k] = np.asarray(dist).reshape(U, -1)[:, 0]
    n_cmp = min(inverse.ORDERS_COMPARED, orders.size)
    near = np.argsort(all_d, axis=0)[:n_cmp]
    cols = np.arange(U)
    idx = all_idx[near, cols[None, :]]
    de = delta_e_2000(ref[idx], lab[None, :, None, :])
    j = np.argmin(de, axis=2)
    best_de = np.take_along_axis(de, j[..., None], axis=2)[..., 0]
    best_i = np.take_along_axis(idx, j[..., None], axis=2)[..., 0]
    rank = np.argsort(best_de, axis=0)
    i1 = best_i[rank[0], cols]
    return path.thickness_nm[i1], best_de[rank[0], cols], path.order[i1]


def match_brute(lab, path):
    """Brute force: ΔE00 (colour-science) of each colour against every path point; (t1, de1)."""
    ref = path.lab_display
    t1, d1 = np.empty(lab.shape[0]), np.empty(lab.shape[0])
    for a in range(0, lab.shape[0], 100):
        de = delta_e_2000(ref[None, :, :], lab[a:a + 100, None, :])
        j = np.argmin(de, axis=1)
        t1[a:a + 100], d1[a:a + 100] = path.thickness_nm[j], de[np.arange(j.size), j]
    return t1, d1


def as_good(t, lab, bt, bd, path):
    """Within AGREE_NM of brute force's thickness, or at a path point (the one nearest t) whose ΔE00 is within
    AS_GOOD_DE of brute force's minimum (a flat stretch of the path: bare substrate, the grey of thick films,
    where many points are equally good and brute force's is one of them)."""
    k = np.clip(np.rint((t - path.thickness_nm[0]) / (path.thickness_nm[1] - path.thickness_nm[0])).astype(int),
                0, path.thickness_nm.size - 1)
    de = delta_e_2000(path.lab_display[k], np.asarray(lab, float))
    return (np.abs(t - bt) <= AGREE_NM + 1e-6) | (de <= bd + AS_GOOD_DE)


def scene(width, height, noise_dn, bits, seed=3):
    """(image (H, W, 3) uint8/uint16, bare box): the invented scene described above."""
    grid = np.arange(0.0, 661.0, 1.0)
    lin_grid = op.oxide_linear_srgb(grid)                               # tmm + colour-science, (G, 3)
    x, y = np.arange(width), np.arange(height)
    wedge = np.where(x < BARE_PX, 0.0, 50.0 + 550.0 * (x - BARE_PX) / (width - BARE_PX - 1))
    bow = 20.0 * np.sin(np.pi * y / (height - 1))
    truth = np.where(wedge[None, :] > 0, wedge[None, :] + bow[:, None], 0.0).astype(np.float32)
    full = 2 ** bits - 1
    img = np.empty((height, width, 3), dtype=np.uint8 if bits == 8 else np.uint16)
    rng = np.random.default_rng(seed)
    scale = np.asarray(GAINS) * EXPOSURE
    for r0 in range(0, height, 250):
        t = truth[r0:r0 + 250]
        lin = np.clip(np.stack([np.interp(t, grid, lin_grid[:, c]) for c in range(3)], axis=-1) * scale, 0, 1)
        v = np.where(lin <= 0.0031308, 12.92 * lin, 1.055 * lin ** (1 / 2.4) - 0.055) * full
        if noise_dn:
            v = v + rng.normal(0.0, noise_dn * full / 255.0, v.shape)
        img[r0:r0 + 250] = np.clip(np.rint(v), 0, full)
    return img, (0, 0, BARE_PX, height)


def peak_gb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e6      # kB on Linux


def traced(fn, *args, **kw):
    """(result, seconds, peak GB of memory allocated during the call, as tracemalloc counts numpy's arrays)."""
    tracemalloc.start()
    t0 = time.perf_counter()
    out = fn(*args, **kw)
    seconds = time.perf_counter() - t0
    peak = tracemalloc.get_traced_memory()[1] / 1e9
    tracemalloc.stop()
    return out, seconds, peak


def kdtree_in_chunks(lab, path):
    """Today's matcher as thickness_map ran it: in chunks of 50,000 colours."""
    parts = [match_kdtree(lab[a:a + KDTREE_CHUNK], path)
             for a in range(0, lab.shape[0], KDTREE_CHUNK)]
    return tuple(np.concatenate(p) for p in zip(*parts))


def colours_of(img, box, stack, path):
    """The CIELAB colours thickness_map matches (distinct codes of 8-bit photos, every pixel of large
    16-bit ones) and the gains of its calibration box."""
    gains = inverse._calibration_gains(_photo(img), box, "substrate", stack, 0, 0.0, "D65", "2", "unpolarized", 0.0)
    codes, inv, lin = inverse._unique_linear(img, 8 if img.dtype == np.uint8 else 16)
    return inverse._lab_from_linear(lin * gains, "D65", "2")


def _photo(img):
    from physics.imageio import load_image
    return load_image(img)


def bench_scene(name, img, box, stack, path, rng):
    lab = colours_of(img, box, stack, path)
    n = lab.shape[0]
    sample = rng.choice(n, size=min(SAMPLE, n), replace=False)
    t0 = time.perf_counter()
    bt, bd = match_brute(lab[sample].astype(float), path)
    t_brute = (time.perf_counter() - t0) / sample.size * n
    if name == "all distinct":
        part = rng.choice(n, size=int(KDTREE_SHARE_DISTINCT * n), replace=False)
        t0 = time.perf_counter()
        kdtree_in_chunks(lab[part].astype(float), path)
        t_kd = (time.perf_counter() - t0) / part.size * n
        kd_note = f"EXTRAPOLATED from {KDTREE_SHARE_DISTINCT:.0%}"
    else:
        t0 = time.perf_counter()
        kdtree_in_chunks(lab.astype(float), path)
        t_kd = time.perf_counter() - t0
        kd_note = "in full"
    kt, kd, _ = match_kdtree(lab[sample].astype(float), path)
    ct._TABLES.clear()
    t0 = time.perf_counter()
    inverse._match(lab, path)
    t_cold = time.perf_counter() - t0
    t0 = time.perf_counter()
    t1, d1, *_ = inverse._match(lab, path)
    t_warm = time.perf_counter() - t0
    matched = bd <= inverse.MATCH_DE_MAX
    agree = as_good(t1[sample], lab[sample], bt, bd, path)
    strict = np.abs(t1[sample] - bt) <= AGREE_NM + 1e-6
    agree_kd = as_good(kt, lab[sample], bt, bd, path)
    thickness_map(img, stack, 0, (0, 1000), reference_box=box)                # the first, for the figures below
    _, t_map, map_peak = traced(thickness_map, img, stack, 0, (0, 1000), reference_box=box)
    t0 = time.perf_counter()
    thickness_map(img, stack, 0, (0, 1000), reference_box=box)
    t_map = min(t_map, time.perf_counter() - t0)                                   # best of 2 (untraced)
    return dict(name=name, n=n, t_brute=t_brute, t_kd=t_kd, kd_note=kd_note, t_cold=t_cold, t_warm=t_warm,
                t_map=t_map, agree=agree.mean(), agree_matched=agree[matched].mean() if matched.any() else np.nan,
                agree_kd=agree_kd.mean(), strict=strict[matched].mean() if matched.any() else np.nan, de_gap=float(np.percentile(d1[sample] - bd, 99.9)),
                table_mb=sum(t.nbytes for t in ct._TABLES.values()) / 1e6, peak=peak_gb(), map_peak=map_peak,
                load=os.getloadavg()[0])


def calibrated_inputs(img, stack):
    """(calibration, flat field) for a scene: a matrix calibration (physics.camera.calibrate_from_reference) from
    six 6 x 12 px boxes along the top edge of the wedge, where the bow is under 0.3 nm, at the scene's own
    thicknesses, and a flat field of an even bare-silicon frame (the scene's lamp has no fall-off)."""
    from physics import camera
    height, width = img.shape[:2]
    xs = np.linspace(300, width - 700, 6).astype(int)
    boxes = [(int(x), 0, int(x) + 6, 12) for x in xs]
    known = [50.0 + 550.0 * (x + 2.5 - BARE_PX) / (width - BARE_PX - 1) for x in xs]
    bare = np.empty_like(img)
    bare[:] = img[5, BARE_PX // 2]
    flat = camera.flat_field(bare)
    return camera.calibrate_from_reference(img, boxes, known, stack, flat_field=flat), flat


def bench_calibrated(img, box, stack):
    """Whole thickness_map of the 3 DN scene with a camera calibration and a flat field (every pixel its own
    colour, read through the calibration) beside the gains-only map of the same photo; warm, best of 2."""
    cal, flat = calibrated_inputs(img, stack)
    out = {}
    for name, kw in (("gains", dict(reference_box=box)), ("calibrated", dict(calibration=cal, flat_field=flat))):
        thickness_map(img, stack, 0, (0, 1000), **kw)                          # the first: warm caches
        _, t, peak = traced(thickness_map, img, stack, 0, (0, 1000), **kw)
        t0 = time.perf_counter()
        thickness_map(img, stack, 0, (0, 1000), **kw)
        out[name] = (min(t, time.perf_counter() - t0), peak)
    return out


def bench_typed(stack):
    thick = np.linspace(30.0, 950.0, 20)
    colours = [op.stack_hex(((op.SIO2, float(t)),)) for t in thick]
    thickness_candidates(colours[0], stack, 0, (0, 1000))                  # warm caches
    times, ours = [], []
    for c in colours:
        t0 = time.perf_counter()
        cands = thickness_candidates(c, stack, 0, (0, 1000))
        times.append(time.perf_counter() - t0)
        ours.append(cands[0].thickness_nm)
    t0 = time.perf_counter()
    d = np.arange(0.0, 1000.0 + 1e-9, 0.1)
    path_lab = color_map(stack, 0, d, [0.0]).lab[:, 0, :]
    t_path = time.perf_counter() - t0
    times_b, brute = [], []
    for c in colours:
        t0 = time.perf_counter()
        rgb = np.array([int(c[i:i + 2], 16) for i in (1, 3, 5)]) / 255.0
        de = delta_e_2000(path_lab, xyz_to_lab(srgb_to_xyz(rgb))[None, :])
        brute.append(d[int(np.argmin(de))])
        times_b.append(time.perf_counter() - t0)
    diff = np.abs(np.array(ours) - np.array(brute))
    return dict(t_ours=float(np.median(times)), t_brute_de=float(np.median(times_b)), t_path=t_path,
                diff_med=float(np.median(diff)), diff_max=float(diff.max()),
                truth_err=float(np.max(np.abs(np.array(ours) - thick))))


def main():
    quick = "--quick" in sys.argv
    width, height = (2000, 1500) if quick else (WIDTH, HEIGHT)
    stack = load_preset("thermal_oxide_on_silicon").stack
    path = inverse._colour_path(stack, 0, 0.0, 1000.0, 0.0, "D65", "2", "unpolarized", 0.0)
    rng = np.random.default_rng(11)
    print(f"load average at start: {os.getloadavg()[0]:.2f} (2 cores; shared machine)", flush=True)
    rows = []
    for name, noise, bits in (("no noise", 0.0, 8), ("3 DN noise", NOISE_DN, 8), ("all distinct", NOISE_DN, 16)):
        print(f"building the {width * height / 1e6:.0f} MP scene '{name}' ...", flush=True)
        img, box = scene(width, height, noise, bits)
        r = bench_scene(name, img, box, stack, path, rng)
        if name == "all distinct":
            bench_numpy_passes(img, box, stack, r["t_map"])
        if name == "3 DN noise":
            cal_rows = bench_calibrated(img, box, stack)
            print(f"  calibrated map (calibration + flat field, per pixel) {cal_rows['calibrated'][0]:.2f} s, peak "
                  f"{cal_rows['calibrated'][1]:.2f} GB, beside the gains-only map {cal_rows['gains'][0]:.2f} s; load "
                  f"{os.getloadavg()[0]:.1f}", flush=True)
        del img
        rows.append(r)
        print(f"  {r['n']:,} colours matched; brute force {r['t_brute']:.1f} s (EXTRAPOLATED from {SAMPLE}), "
              f"k-d trees {r['t_kd']:.2f} s ({r['kd_note']}), table cold {r['t_cold']:.2f} s, warm "
              f"{r['t_warm']:.2f} s; whole thickness_map {r['t_map']:.2f} s; load {r['load']:.1f}", flush=True)
    print()
    print(f"{'scene':14s} {'colours':>11s} {'brute s':>9s} {'k-d s':>8s} {'table s':>8s} {'cold s':>7s} "
          f"{'map s':>7s} {'brute/tab':>9s} {'k-d/tab':>8s} {'agree':>8s} {'matched':>8s} {'k-d agr':>8s} "
          f"{'0.5 nm':>7s} {'map GB':>7s} {'RSS GB':>7s} {'load':>5s}")
    for r in rows:
        print(f"{r['name']:14s} {r['n']:11,d} {r['t_brute']:9.1f} {r['t_kd']:8.2f} {r['t_warm']:8.2f} "
              f"{r['t_cold']:7.2f} {r['t_map']:7.2f} {r['t_brute'] / r['t_warm']:8.0f}x {r['t_kd'] / r['t_warm']:7.1f}x "
              f"{r['agree']:8.2%} {r['agree_matched']:8.2%} {r['agree_kd']:8.2%} {r['strict']:7.2%} {r['map_peak']:7.2f} {r['peak']:7.2f} "
              f"{r['load']:5.1f}")
    print(f"  'table s' is the warm colour-table match, 'cold s' with a new table; 'map s' the whole thickness_map "
          f"(warm); agreement = share of {SAMPLE} sampled colours whose thickness is within {AGREE_NM} nm of brute "
          f"force or whose path point is within {AS_GOOD_DE} ΔE00 of its minimum ('matched': those with brute-force ΔE00 <= {inverse.MATCH_DE_MAX:g}; '0.5 nm': matched "
          f"ones within {AGREE_NM} nm alone, the bare silicon strip's flat stretch of the path included); table memory "
          f"{rows[-1]['table_mb']:.0f} MB; 'map GB' the peak of memory allocated by one thickness_map call "
          f"(tracemalloc), 'RSS GB' the process's peak resident set so far (the references and scenes included)")
    print(f"calibrated map of the 3 DN scene (calibrate_from_reference + flat_field, every pixel through the "
          f"calibration): {cal_rows['calibrated'][0]:.2f} s, peak {cal_rows['calibrated'][1]:.2f} GB (tracemalloc); the "
          f"gains-only map of the same photo {cal_rows['gains'][0]:.2f} s")
    b = bench_typed(stack)
    print(f"typed colour: thickness_candidates median {b['t_ours'] * 1000:.1f} ms vs brute force (0.1 nm path "
          f"{b['t_path'] * 1000:.0f} ms + match {b['t_brute_de'] * 1000:.1f} ms); best vs brute force median "
          f"{b['diff_med']:.2f} nm, max {b['diff_max']:.2f} nm; vs truth max {b['truth_err']:.2f} nm")
    noise = next(r for r in rows if r["name"] == "3 DN noise")
    distinct = next(r for r in rows if r["name"] == "all distinct")
    goals = [(f"3 DN noise map <= {GOAL_NOISE_S:g} s", noise["t_map"] <= GOAL_NOISE_S, f"{noise['t_map']:.2f} s"),
             (f"all distinct <= {GOAL_DISTINCT_S:g} s", distinct["t_map"] <= GOAL_DISTINCT_S,
              f"{distinct['t_map']:.2f} s"),
             (f"calibrated map (every pixel its own colour) <= {GOAL_DISTINCT_S:g} s",
              cal_rows["calibrated"][0] <= GOAL_DISTINCT_S, f"{cal_rows['calibrated'][0]:.2f} s"),
             (f"peak <= {GOAL_PEAK_GB:g} GB", max(r["map_peak"] for r in rows) <= GOAL_PEAK_GB,
              f"{max(r['map_peak'] for r in rows):.2f} GB"),
             (f"agreement of matched colours >= {GOAL_AGREE:.1%}", min(r["agree_matched"] for r in rows) >= GOAL_AGREE,
              f"{min(r['agree_matched'] for r in rows):.2%}"),
             (f"typed colour <= {GOAL_TYPED_S * 1000:g} ms", b["t_ours"] <= GOAL_TYPED_S, f"{b['t_ours'] * 1000:.1f} ms")]
    print("goals:", "; ".join(f"{name}: {'met' if ok else 'NOT met'} ({got})" for name, ok, got in goals),
          f"(load average now {os.getloadavg()[0]:.2f})")


def bench_numpy_passes(img, box, stack, compiled_s):
    """The whole map of the 'all distinct' scene with the compiled loops of physics.colourkernel switched off
    (the numpy passes throughout), beside the compiled map's time; best of 2."""
    import physics.colourkernel as ck
    saved = ck.kernels, ct.kernel
    ck.kernels, ct.kernel = (lambda: None), (lambda: None)
    try:
        best = np.inf
        for _ in range(2):
            t0 = time.perf_counter()
            thickness_map(img, stack, 0, (0, 1000), reference_box=box)
            best = min(best, time.perf_counter() - t0)
    finally:
        ck.kernels, ct.kernel = saved
    print(f"  the same map with the numpy passes (numba's compiled loops off): {best:.2f} s, "
          f"{best / compiled_s:.1f}x the compiled map's {compiled_s:.2f} s; load {os.getloadavg()[0]:.1f}", flush=True)


if __name__ == "__main__":
    main()
