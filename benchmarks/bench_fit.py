"""Speed of the thickness fit, beside a brute-force reference computed in the same run.

Run:  python benchmarks/bench_fit.py          (everything; "film": cases 3-5 only; "map": case 5 only)

1. One unknown layer: thermal oxide on silicon, window 0-3000 nm, 250 wavelengths 400-1000 nm,
   Gaussian noise sigma 0.003 (seeded), ten spectra with thicknesses spread over the window.
   Figure: the median time of ``fit_thickness`` over the ten. Goal: <= 300 ms.
   Reference (brute force): ``Stack.reflectance`` at every 0.1 nm of the window (30 001 spectra)
   and the best sum of squares. Its time is measured on a subset of 1 001 thicknesses (a 100 nm
   stretch around the truth, where its best is also taken) and extrapolated linearly to the
   30 001 of the full window; the spectra cost the same at any thickness.
2. Two unknown layers: nitride (0-1000 nm) on oxide (0-1000 nm) on silicon, three spectra.
   Figure: the median time. Goal: <= 3 s. Reference: brute force over 0.1 nm in each layer,
   10 001² spectra, extrapolated from the time per spectrum measured in (1)'s way on this stack.

Both thickness accuracies (fit vs truth, brute force vs truth) are printed beside the times.

3. Film fit, thickness + 3-parameter Cauchy (``fit_film(model="cauchy")``): an invented nitride-like Cauchy
   film on silicon, window 0-2000 nm, 500 wavelengths 400-1000 nm, noise sigma 0.002, five thicknesses,
   each fit started from a generic glass-like Cauchy. Figure: the median time. Goal: <= 1 s.
   Reference (brute force over the same four parameters): thickness every 0.5 nm of the window, A every
   0.002 over 1.3-2.6, B every 0.0005 um^2 over 0-0.04, C every 0.0001 um^4 over 0-0.002; one
   ``sweep`` of all thicknesses per (A, B, C), its time measured on a few and multiplied by their number.
   Its accuracy is taken on a sub-grid around the truth (the best of that sub-grid).
4. Film fit, thickness + Tauc-Lorentz (``fit_film(model="tauc-lorentz")``), an invented Tauc-Lorentz film,
   three thicknesses. Goal: <= 3 s. Reference: brute force with eps_inf every 0.02 (1-3), Eg every
   0.05 eV (3-6), A every 2 eV (20-300), E0 every 0.1 eV (5-12), C every 0.05 eV (0.5-4), extrapolated
   in the same way.
5. Wafer map sharing one dispersion (``fit_film(..., thickness_per_spectrum=True)``): 25 points of an invented
   nitride-like Cauchy film on silicon, thicknesses 450-560 nm across the wafer, 500 wavelengths 400-1000 nm,
   noise sigma 0.002, one fit over 25 thicknesses + A, B, C. Goal: <= 10 s, with progress. Figures: the time,
   the number of progress reports, the largest thickness error and the n(633) error; beside it (same run) the
   brute force over the same parameters, (A, B, C) grid of case 3 x every 0.5 nm of 0-2000 nm for each of the
   25 points (time per material measured, multiplied out), and 25 separate one-point fits (each its own
   dispersion: the map without the shared index). Then the same at the cap, 50 points.
"""

from __future__ import annotations

import os
import sys
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
warnings.simplefilter("ignore")

import physics.fit as fit_module  # noqa: E402
from physics import CauchyMaterial, Layer, Stack, TaucLorentzMaterial, fit_film, fit_thickness, sweep  # noqa: E402
from physics.stackfile import load_preset  # noqa: E402

WL = np.linspace(400.0, 1000.0, 250)
SIGMA = 0.003
STEP_NM = 0.1
GOAL_ONE_S = 0.300
GOAL_TWO_S = 3.0
FILM_WL = np.linspace(400.0, 1000.0, 500)
FILM_SIGMA = 0.002
FILM_WINDOW = (0.0, 2000.0)
FILM_STEP_NM = 0.5
GOAL_CAUCHY_S = 1.0
GOAL_TL_S = 3.0
GOAL_MAP_S = 10.0
#: Brute-force axes (lo, hi, step) of the film models' parameters, beside the thickness.
CAUCHY_AXES = ((1.3, 2.6, 0.002), (0.0, 0.04, 0.0005), (0.0, 0.002, 0.0001))
TL_AXES = ((1.0, 3.0, 0.02), (3.0, 6.0, 0.05), (20.0, 300.0, 2.0), (5.0, 12.0, 0.1), (0.5, 4.0, 0.05))


def noisy(stack, seed):
    return stack.reflectance(WL) + np.random.default_rng(seed).normal(0.0, SIGMA, WL.size)


def brute_force(stack, R, layer, thicknesses):
    """Best thickness by evaluating the full model at every given thickness; returns (best, seconds)."""
    t0 = time.perf_counter()
    ssr = np.array([np.sum((stack.with_thickness(layer, float(d)).reflectance(WL) - R) ** 2)
                    for d in thicknesses])
    return float(thicknesses[int(np.argmin(ssr))]), time.perf_counter() - t0


class RefineTimer:
    """Times the least-squares refinements inside fit_thickness (where the time goes)."""

    def __init__(self):
        self.seconds, self.calls, self.nfev, self._orig = 0.0, 0, 0, fit_module.least_squares

    def __call__(self, *args, **kwargs):
        t0 = time.perf_counter()
        sol = self._orig(*args, **kwargs)
        self.seconds += time.perf_counter() - t0
        self.calls += 1
        self.nfev += sol.nfev
        return sol


def timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0


def main():
    oxide = load_preset("thermal_oxide_on_silicon").stack
    nitride = load_preset("nitride_on_oxide_on_silicon").stack
    fit_thickness(WL, noisy(oxide.with_thickness(0, 500.0), 0), oxide)          # warm the material tables

    # 1. one unknown layer
    truths = np.linspace(150.0, 2850.0, 10)
    fit_times, fit_err, bf_err, bf_per_spectrum, agree = [], [], [], [], []
    for i, d in enumerate(truths):
        R = noisy(oxide.with_thickness(0, d), 100 + i)
        r, t = timed(lambda: fit_thickness(WL, R, oxide, 0, (0.0, 3000.0)))
        fit_times.append(t)
        fit_err.append(abs(r.thickness_nm - d))
        sub = np.round(np.arange(d - 50.0, d + 50.0 + 1e-9, STEP_NM), 1)
        best, tb = brute_force(oxide, R, 0, sub)
        bf_per_spectrum.append(tb / sub.size)
        bf_err.append(abs(best - d))
        agree.append(abs(best - r.thickness_nm))
    n_full = int(round(3000.0 / STEP_NM)) + 1
    t_bf = float(np.median(bf_per_spectrum)) * n_full
    t_fit = float(np.median(fit_times))
    timer = RefineTimer()                      # a second pass, timed inside, for the breakdown
    fit_module.least_squares = timer
    try:
        t_all = sum(timed(lambda: fit_thickness(WL, noisy(oxide.with_thickness(0, d), 100 + i), oxide, 0,
                                                (0.0, 3000.0)))[1] for i, d in enumerate(truths))
    finally:
        fit_module.least_squares = timer._orig

    # 2. two unknown layers
    pairs = [(120.0, 640.0), (480.0, 90.0), (850.0, 400.0)]
    two_times, two_err = [], []
    for i, (d1, d2) in enumerate(pairs):
        R = noisy(nitride.with_thickness(0, d1).with_thickness(1, d2), 200 + i)
        r, t = timed(lambda: fit_thickness(WL, R, nitride, 0, (0.0, 1000.0), second_layer=1,
                                           second_thickness_nm=(0.0, 1000.0)))
        two_times.append(t)
        two_err.append(max(abs(r.thickness_nm - d1), abs(r.second_thickness_nm - d2)))
    sub = np.round(np.arange(0.0, 100.0 + 1e-9, STEP_NM), 1)
    _, tb = brute_force(nitride, noisy(nitride, 300), 0, sub)
    n_two = (int(round(1000.0 / STEP_NM)) + 1) ** 2
    t_bf2 = tb / sub.size * n_two
    t_two = float(np.median(two_times))

    print(f"{WL.size} wavelengths {WL[0]:g}-{WL[-1]:g} nm, noise sigma {SIGMA:g}; brute force at {STEP_NM:g} nm steps")
    print(f"{'case':62s} {'seconds':>10s} {'ratio':>9s} {'max |err| nm':>13s}")
    print(f"{'brute force, 1 layer 0-3000 nm (extrapolated from 1001/spectrum)':62s} {t_bf:10.2f} {'1.0':>9s} "
          f"{max(bf_err):13.3f}")
    print(f"{'fit_thickness, 1 layer 0-3000 nm (median of 10)':62s} {t_fit:10.3f} {t_bf / t_fit:8.0f}x "
          f"{max(fit_err):13.3f}")
    print(f"{'  (slowest of the 10)':62s} {max(fit_times):10.3f}")
    print(f"  fit vs brute force: max |difference| {max(agree):.3f} nm (brute force grid step {STEP_NM:g} nm)")
    print(f"  where the time goes: least-squares refinement {100 * timer.seconds / t_all:.0f} % "
          f"({timer.calls / truths.size:.1f} starts and {timer.nfev / truths.size:.0f} model spectra per fit), "
          f"scan and the rest {100 * (1 - timer.seconds / t_all):.0f} %")
    print(f"{'brute force, 2 layers 0-1000 nm each (extrapolated)':62s} {t_bf2:10.0f} {'1.0':>9s} {'-':>13s}")
    print(f"{'fit_thickness, 2 layers 0-1000 nm each (median of 3)':62s} {t_two:10.3f} {t_bf2 / t_two:8.0f}x "
          f"{max(two_err):13.3f}")
    ok1, ok2 = t_fit <= GOAL_ONE_S, t_two <= GOAL_TWO_S
    print(f"goal one layer <= {GOAL_ONE_S * 1000:.0f} ms:", "met" if ok1 else "NOT met")
    print(f"goal two layers <= {GOAL_TWO_S:g} s:", "met" if ok2 else "NOT met")
    film_cases()


def axis_count(lo, hi, step):
    return int(round((hi - lo) / step)) + 1


def film_brute_force_seconds(stack, materials, R):
    """Seconds per material of the brute force: one sweep over every thickness of the window, best SSR."""
    d = np.arange(FILM_WINDOW[0], FILM_WINDOW[1] + 1e-9, FILM_STEP_NM)
    t0 = time.perf_counter()
    for m in materials:
        model = sweep(Stack([Layer(m, 0.0)], stack.substrate, stack.ambient), 0, d, [0.0], FILM_WL)[:, 0, :]
        np.min(np.sum((model - R) ** 2, axis=1))
    return (time.perf_counter() - t0) / len(materials)


def film_case(name, truth, thicknesses, model, axes, build, goal, local_axes=None):
    si = load_preset("thermal_oxide_on_silicon").stack.substrate
    start = Stack([Layer(CauchyMaterial(1.6, 0.005), 0.0)], si, ambient=1.0)
    times, d_err, n_err = [], [], []
    for i, d in enumerate(thicknesses):
        R = (Stack([Layer(truth, d)], si, ambient=1.0).reflectance(FILM_WL)
             + np.random.default_rng(400 + i).normal(0.0, FILM_SIGMA, FILM_WL.size))
        r, t = timed(lambda: fit_film(FILM_WL, R, start, model=model, thickness_nm=FILM_WINDOW))
        times.append(t)
        d_err.append(abs(r.thickness_nm - d))
        n_err.append(abs(float(r.n_at(633.0)) - float(truth.nk(633.0).real)))
    samples = [build([lo + (hi - lo) * f for lo, hi, _ in axes]) for f in (0.3, 0.5, 0.7)]
    per_material = film_brute_force_seconds(start, samples, R)
    n_materials = int(np.prod([axis_count(*a) for a in axes]))
    t_bf = per_material * n_materials
    t_fit = float(np.median(times))
    label = f"{name}: brute force, {n_materials:.2e} materials x {axis_count(*FILM_WINDOW, FILM_STEP_NM)} thicknesses"
    print(f"{label + ' (extrapolated)':62s} {t_bf:10.3g} {'1.0':>9s}")
    print(f"{name + f': fit_film (median of {len(times)})':62s} {t_fit:10.3f} {t_bf / t_fit:9.2e}x {max(d_err):13.3f}"
          f"   max |n(633) err| {max(n_err):.4f}")
    if local_axes is not None:
        d_true = thicknesses[-1]
        grids = [np.arange(c - w, c + w + 1e-12, st) for c, w, st in local_axes]
        d = np.arange(d_true - 2.0, d_true + 2.0 + 1e-9, FILM_STEP_NM)
        best = (np.inf, None)
        for p in np.stack(np.meshgrid(*grids, indexing="ij"), -1).reshape(-1, len(grids)):
            model_R = sweep(Stack([Layer(build(p), 0.0)], si, ambient=1.0), 0, d, [0.0], FILM_WL)[:, 0, :]
            ssr = np.sum((model_R - R) ** 2, axis=1)
            if ssr.min() < best[0]:
                best = (ssr.min(), (d[np.argmin(ssr)], p))
        print(f"  brute force on a sub-grid centred on the truth ({np.prod([g.size for g in grids]) * d.size} points; "
              "it contains the truth, so this shows the grid, not the search): "
              f"|thickness err| {abs(best[1][0] - d_true):.3f} nm, |n(633) err| "
              f"{abs(float(build(best[1][1]).nk(633.0).real) - float(truth.nk(633.0).real)):.4f}")
    print(f"goal {name} <= {goal:g} s:", "met" if t_fit <= goal else "NOT met")


def film_map_case(points, goal=None):
    si = load_preset("thermal_oxide_on_silicon").stack.substrate
    truth = CauchyMaterial(1.98, 0.018, 0.0003)
    start = Stack([Layer(CauchyMaterial(1.6, 0.005), 0.0)], si, ambient=1.0)
    ds = np.linspace(450.0, 560.0, points)
    rng = np.random.default_rng(500)
    spectra = [Stack([Layer(truth, d)], si, ambient=1.0).reflectance(FILM_WL) + rng.normal(0.0, FILM_SIGMA, FILM_WL.size)
               for d in ds]
    told = []
    r, t = timed(lambda: fit_film([FILM_WL] * points, spectra, start, model="cauchy", thickness_nm=FILM_WINDOW,
                                  thickness_per_spectrum=True, progress=lambda f, text: told.append(f)))
    d_err = float(np.max(np.abs(np.array(r.thicknesses_nm) - ds)))
    n_err = abs(float(r.n_at(633.0)) - float(truth.nk(633.0).real))
    samples = [CauchyMaterial(*[lo + (hi - lo) * f for lo, hi, _ in CAUCHY_AXES]) for f in (0.3, 0.5, 0.7)]
    t_bf = film_brute_force_seconds(start, samples, spectra[0]) * np.prod([axis_count(*a) for a in CAUCHY_AXES]) * points
    label = f"map of {points} points: brute force (A, B, C) x d per point (extrapolated)"
    print(f"{label:62s} {t_bf:10.3g} {'1.0':>9s}")
    if goal is not None:
        singles, t_single = [], 0.0
        for d, R in zip(ds, spectra):
            one, ts = timed(lambda: fit_film(FILM_WL, R, start, model="cauchy", thickness_nm=FILM_WINDOW))
            singles.append(abs(one.thickness_nm - d))
            t_single += ts
        print(f"{f'map of {points} points: {points} separate one-point fits':62s} {t_single:10.3f} "
              f"{t_bf / t_single:9.2e}x {max(singles):13.3f}")
    print(f"{f'map of {points} points: one joint fit, shared dispersion':62s} {t:10.3f} {t_bf / t:9.2e}x {d_err:13.3f}"
          f"   |n(633) err| {n_err:.4f}; {len(told)} progress reports")
    if goal is not None:
        print(f"goal map of {points} points <= {goal:g} s with progress:", "met" if t <= goal and told else "NOT met")


def film_cases():
    print(f"film fits: {FILM_WL.size} wavelengths {FILM_WL[0]:g}-{FILM_WL[-1]:g} nm, noise sigma {FILM_SIGMA:g}, window "
          f"{FILM_WINDOW[0]:g}-{FILM_WINDOW[1]:g} nm; brute force thickness step {FILM_STEP_NM:g} nm")
    cauchy = lambda p: CauchyMaterial(*p)                                          # noqa: E731
    film_case("Cauchy + d", CauchyMaterial(1.98, 0.018, 0.0003), [250.0, 420.0, 800.0, 1250.0, 1700.0], "cauchy",
              CAUCHY_AXES, cauchy, GOAL_CAUCHY_S,
              local_axes=((1.98, 0.01, 0.002), (0.018, 0.002, 0.0005), (0.0003, 0.0002, 0.0001)))
    film_case("Tauc-Lorentz + d", TaucLorentzMaterial(1.2, 4.5, 60.0, 8.0, 3.0), [150.0, 500.0, 1100.0],
              "tauc-lorentz", TL_AXES, lambda p: TaucLorentzMaterial(*p), GOAL_TL_S)
    film_map_case(25, GOAL_MAP_S)
    film_map_case(50)


if __name__ == "__main__":
    if sys.argv[1:] == ["film"]:
        film_cases()
    elif sys.argv[1:] == ["map"]:
        film_map_case(25, GOAL_MAP_S)
        film_map_case(50)
    else:
        main()
