"""The compiled liquid-shadow remeasurement against its numpy path (thinning/measure/liquid.py).

``liquid_widths`` and ``liquid_necks`` in thinning/measure/_rowscan.c read the neck rows'
pixels from the bands and compute the same float32 deficit and the same float64 arithmetic as
the numpy path, in numpy's summation order (sequential cumulative sums, pairwise ``sum``), so
on these recordings the two agree bit for bit. The tolerances below leave room for a build
that reorders floating point (an FMA-contracting compiler, another numpy's summation order); a
resolved flag could then differ only at a knife-edge tie of a rim test (a rim exactly at
RIM_DEPTH of the depth, a plateau pixel exactly at RIM_PLATEAU, a thin rim's area exactly 0),
none of which these recordings hold, so ``resolved`` must agree exactly.

Recordings: the beaded thread of ``tests/conftest.py`` under three optics (8-bit, 12-bit with
dust and streaks, horizontal with a clipping backlight: the saturated pixels) from
:mod:`thinning.synth`, and refracting threads from :mod:`thinning.raysynth` (collimated 8-bit;
diffuse 16-bit, whose rims are mostly thinner than the blur; horizontal and partially
coherent: the Fresnel overshoot).
"""

import types

import numpy as np
import pytest

from thinning import laws, raysynth
from thinning.measure import compiled, liquid, measure_recording


@pytest.fixture(params=[
    raysynth.RayOptics(numerical_aperture=0.06, illumination_half_angle_deg=0.4),
    raysynth.RayOptics(numerical_aperture=0.1, illumination_half_angle_deg=30.0, bit_depth=16,
                       read_noise=0.003),
    raysynth.RayOptics(numerical_aperture=0.08, orientation="horizontal", coherent_fraction=0.5,
                       flicker=0.03),
], ids=["collimated-8-bit", "diffuse-16-bit", "horizontal-coherent"])
def refracting_recording(request):
    """The frames of a small refracting elastic bridge to breakup (357 frames of 120 × 100 px)."""
    if not compiled.COMPILED:
        pytest.skip("the compiled row pass was not built in this install")
    fluid = laws.Fluid(surface_tension=0.06, solvent_viscosity=0.5, density=1000.0,
                       polymer_modulus=2.0, relaxation_time=0.05)
    scene = raysynth.RayScene(fluid=fluid, plate_diameter_m=0.8e-3, initial_diameter_m=0.25e-3,
                              pixel_size_m=10e-6, fps_hz=300.0, frame_size_px=(120, 100),
                              refractive_index=1.4)
    frames, _ = raysynth.render_recording(scene, request.param, seed=1)
    return list(frames)


def _both(fn, calls):
    """``fn`` run compiled and in numpy on the same inputs: the pair of results is kept in
    ``calls``, the compiled one returned."""
    def run(*args):
        fast = fn(*args)
        compiled.COMPILED = False
        try:
            plain = fn(*args)
        finally:
            compiled.COMPILED = True
        calls.append((fast, plain))
        return fast
    return run


def _assert_same(a, b, name, *, rtol=1e-6, atol=1e-9):
    a, b = np.asarray(a, float), np.asarray(b, float)
    assert np.array_equal(np.isnan(a), np.isnan(b)), name
    np.testing.assert_allclose(a[~np.isnan(a)], b[~np.isnan(b)], rtol=rtol, atol=atol, err_msg=name)


def _check_paths(frames, monkeypatch):
    rows, necks = [], []
    monkeypatch.setattr(liquid, "_liquid_rows", _both(liquid._liquid_rows, rows))
    monkeypatch.setattr(liquid, "_liquid_necks", _both(liquid._liquid_necks, necks))
    fast = measure_recording(frames, n_frames=len(frames))
    monkeypatch.undo()
    assert rows and len(rows) == len(necks)
    resolved = unresolved = calibrating = 0
    for (widths, res, totals, ratios, used), (widths0, res0, totals0, ratios0, used0) in rows:
        assert np.array_equal(res, res0)
        assert np.array_equal(used, used0)
        _assert_same(widths, widths0, "widths")
        _assert_same(totals, totals0, "totals")
        _assert_same(ratios, ratios0, "calibration ratios")
        resolved += int(res.sum())
        unresolved += int((~res).sum())
        calibrating += int((used >= liquid.MIN_CALIBRATION_ROWS).sum())
    for diameter, diameter0 in necks:
        _assert_same(diameter, diameter0, "neck diameters", rtol=0.0, atol=1e-6)
    assert resolved > 100 and unresolved > 100 and calibrating >= 3  # both kinds of row, calibrated
    # the diameter series, with the remeasurement in numpy throughout (the row pass compiled)
    monkeypatch.setattr(liquid, "compiled", types.SimpleNamespace(COMPILED=False))
    plain = measure_recording(frames, n_frames=len(frames))
    a, b = fast.table["diameter_px"].to_numpy(float), plain.table["diameter_px"].to_numpy(float)
    assert np.isfinite(a).sum() > 30
    _assert_same(a, b, "diameter series", rtol=0.0, atol=1e-6)


def test_compiled_remeasurement_matches_numpy_on_grey_threads(beaded_recording, monkeypatch):
    _check_paths(beaded_recording, monkeypatch)


def test_compiled_remeasurement_matches_numpy_on_refracting_threads(refracting_recording, monkeypatch):
    _check_paths(refracting_recording, monkeypatch)
