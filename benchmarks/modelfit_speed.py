"""Time per recording of the whole-curve fit (thinning.modelfit.fit_filament_model).

Seeded series from the 0-D filament model (laws.filament_model): polymer
solutions across λ 0.3 ms–2 s, η_s 1 mPa·s–10 Pa·s, L² 10²–10⁵ or
Oldroyd-B, with and without inertia, 15–300 frames in the elastic stretch;
and Newtonian liquids with 50–300 frames. Prints, per kind, the fit's CPU
time (this process only, so other load on the machine counts less) and wall
time: median and maximum, with the number of frames fitted.

    python benchmarks/modelfit_speed.py [--elastic 30] [--newtonian 10]
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np

from thinning import laws
from thinning.modelfit import fit_filament_model


def _elastic(rng):
    while True:
        lam = 10 ** rng.uniform(math.log10(3e-4), math.log10(2.0))
        eta = 10 ** rng.uniform(-3, 1)
        sigma = rng.uniform(0.03, 0.07)
        d0 = 10 ** rng.uniform(math.log10(0.5e-3), math.log10(3e-3))
        g = 10 ** rng.uniform(-1, 1) * eta / lam
        if lam * sigma / (eta * d0 / 2) < 10 or not 0.05 <= g <= 500:
            continue
        l2 = None if rng.random() < 0.25 else 10 ** rng.uniform(2, 5)
        fluid = laws.Fluid(sigma, eta, 1000.0 if rng.random() < 0.5 else 0.0, g, lam, l2)
        px = d0 / rng.uniform(60, 300)
        duration = 3 * (3 * d0 / (0.1418 * sigma / (eta + g * lam)) + 40 * lam)
        hist = laws.filament_model(fluid, d0, duration=duration, n_output=40000,
                                   breakup_diameter=1.5 * px)
        keep = hist.diameter_m > 3 * px
        if hist.diameter_m[-1] > 3 * px:
            continue
        t, lnd = hist.time_s[keep], np.log(hist.diameter_m[keep])
        local = np.flatnonzero(np.abs(-1 / (3 * np.gradient(lnd, t)) / lam - 1) < 0.1)
        if local.size < 10 or lnd[local[0]] - lnd[local[-1]] < 0.8:
            continue
        fps = 10 ** rng.uniform(math.log10(15), math.log10(300)) / (t[local[-1]] - t[local[0]])
        if 25 < t[-1] * fps < 3000:
            return fluid, hist, px, fps


def _newtonian(rng):
    fluid = laws.Fluid(rng.uniform(0.03, 0.07), 10 ** rng.uniform(-3, 1),
                       1000.0 if rng.random() < 0.5 else 0.0)
    d0 = 10 ** rng.uniform(math.log10(0.5e-3), math.log10(3e-3))
    px = d0 / rng.uniform(60, 300)
    hist = laws.filament_model(fluid, d0, duration=1e4, n_output=40000, breakup_diameter=1.5 * px)
    t_floor = hist.time_s[np.flatnonzero(hist.diameter_m < 3 * px)[0]]
    return fluid, hist, px, 10 ** rng.uniform(math.log10(50), math.log10(300)) / t_floor


def _time(kind, make, count, seed0):
    cpu, wall, frames = [], [], []
    for seed in range(seed0, seed0 + count):
        rng = np.random.default_rng(seed)
        fluid, hist, px, fps = make(rng)
        t = rng.uniform(0, 0.5 / fps) + np.arange(0, hist.time_s[-1], 1 / fps)
        d = hist.diameter_at(t) + 0.2 * px * rng.normal(size=t.size)
        c0, w0 = time.process_time(), time.perf_counter()
        f = fit_filament_model(t, d, surface_tension=fluid.surface_tension, t_start_s=0.0,
                               resolution_floor_m=3 * px, noise_m=0.2 * px,
                               density=fluid.density or None, seed=seed)
        cpu.append(time.process_time() - c0)
        wall.append(time.perf_counter() - w0)
        frames.append(f.n_points)
    cpu, wall = np.array(cpu), np.array(wall)
    print(f"{kind:12s} {count:3d} recordings, {min(frames)}–{max(frames)} frames fitted: "
          f"CPU median {1e3 * np.median(cpu):.0f} ms, max {1e3 * cpu.max():.0f} ms; "
          f"wall median {1e3 * np.median(wall):.0f} ms, max {1e3 * wall.max():.0f} ms")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--elastic", type=int, default=30)
    parser.add_argument("--newtonian", type=int, default=10)
    args = parser.parse_args()
    _time("elastic", _elastic, args.elastic, 0)
    _time("Newtonian", _newtonian, args.newtonian, 1000)


if __name__ == "__main__":
    main()
