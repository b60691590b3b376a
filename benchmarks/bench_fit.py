"""Speed of the thickness fit, beside a brute-force reference computed in the same run.

Run:  python benchmarks/bench_fit.py

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
from physics import fit_thickness  # noqa: E402
from physics.stackfile import load_preset  # noqa: E402

WL = np.linspace(400.0, 1000.0, 250)
SIGMA = 0.003
STEP_NM = 0.1
GOAL_ONE_S = 0.300
GOAL_TWO_S = 3.0


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


if __name__ == "__main__":
    main()
