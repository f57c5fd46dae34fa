"""characterise(): the diameter series → regimes and rheology numbers, end to end on series."""

import json

import numpy as np
import pytest

from thinning.characterise import characterise
from thinning.laws import Fluid, filament_model


def camera_series(fluid, d0, *, fps, pixel, noise_px, rng, t0=0.002, tail_frames=20):
    """The 0-D model sampled by a camera: pixel noise, NaN after the thread vanishes (< 0.5 px).

    Frames before ``t0`` show the plates still moving (a constant, larger diameter).
    """
    hist = filament_model(fluid, d0, duration=50.0)
    end = hist.breakup_time_s if hist.breakup_time_s is not None else hist.time_s[-1]
    n_pre = int(round(t0 * fps))
    t = np.arange(n_pre + int(end * fps) + tail_frames) / fps
    tm = t - n_pre / fps
    true = hist.diameter_at(np.clip(tm, 0.0, None))
    d = true + rng.normal(0.0, noise_px * pixel, t.size)
    d[tm < 0] = 1.3 * d0
    d[true < 0.5 * pixel] = np.nan
    return t, d, n_pre / fps


def test_smoke_polymer_and_newtonian():
    rng = np.random.default_rng(1)
    fl = Fluid(0.06, 1e-3, 1000.0, 2.0, 1e-3)
    t, d, t0 = camera_series(fl, 1e-3, fps=20000, pixel=5e-6, noise_px=0.1, rng=rng)
    c = characterise(t, d, surface_tension=0.06, pixel_size_m=5e-6, fps_hz=20000,
                     free_thinning_start_s=t0, density=1000.0, seed=1)
    assert c.regime == "elasto-capillary"
    assert c.relaxation_time_s == pytest.approx(1e-3, rel=0.02)
    lo, hi = c.relaxation_time_ci95_s
    assert lo < c.relaxation_time_s < hi
    fields = c.result_fields()
    json.dumps(fields, allow_nan=False)
    assert len(c.curves) == t.size
