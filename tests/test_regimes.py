"""Locating the thinning regimes on hand-made series with known stretches."""

import numpy as np
import pytest

from thinning import laws
from thinning.kinematics import local_exponents, local_log_slopes
from thinning.regimes import KINDS, Regime, locate_regimes
from thinning.series import estimate_diameter_noise, flag_outliers, prepare_series

PIXEL = 5e-6
FLOOR = 3 * PIXEL


def noisy(d, rng, px=0.1):
    return d + rng.normal(0.0, px * PIXEL, d.size)


def ec_then(kind_after, rng, *, lam=2e-3, fps=20000):
    """An exponential (elasto-capillary) stretch from 200 µm, then a linear fall to zero."""
    t = np.arange(int(0.03 * fps)) / fps
    t_switch = 3 * lam * np.log(200e-6 / 60e-6)
    ec = 200e-6 * np.exp(-t / (3 * lam))
    if kind_after == "linear":
        speed = 60e-6 / (3 * lam) * 0.5     # slower than the exponential's speed at the switch
        after = 60e-6 - speed * (t - t_switch)
    else:
        after = ec
    d = np.where(t < t_switch, ec, after)
    d = noisy(d, rng)
    d[d < 0.5 * PIXEL] = np.nan
    return t, d, t_switch


def test_exponential_stretch_is_elasto_capillary_with_its_lambda():
    rng = np.random.default_rng(1)
    t, d, _ = ec_then("none", rng)
    regs = locate_regimes(t, d, resolution_floor_m=FLOOR)
    assert [r.kind for r in regs] == ["elasto-capillary"]
    r = regs[0]
    assert isinstance(r, Regime)
    assert r.value == pytest.approx(2e-3, rel=0.01)
    assert r.diameter_end_m >= FLOOR
    assert r.cut_by_floor
    assert r.diameter_start_m / r.diameter_end_m > 5


def test_linear_stretch_after_the_elastic_one_is_finite_extensibility_never_visco_capillary():
    # docs/physics.md §3.4: the terminal stretch is linear in time too
    rng = np.random.default_rng(2)
    t, d, t_switch = ec_then("linear", rng)
    regs = locate_regimes(t, d, resolution_floor_m=FLOOR)
    kinds = [r.kind for r in regs]
    assert kinds == ["elasto-capillary", "finite-extensibility"], kinds
    assert regs[0].t_end_s <= t_switch + 1e-4
    assert regs[1].t_start_s >= t_switch - 1e-4


def test_newtonian_laws_are_named_by_their_exponent():
    rng = np.random.default_rng(3)
    t = np.arange(0, 0.1, 1e-4)
    vc = laws.visco_capillary_diameter(t, t_b=0.1, surface_tension=0.06, viscosity=0.8)
    ic = laws.inertio_capillary_diameter(t * 0.03, t_c=0.003, surface_tension=0.06, density=1000.0)
    for d, expected in ((vc, "visco-capillary"), (ic, "inertio-capillary")):
        d = noisy(d, rng)
        d[d < 0.5 * PIXEL] = np.nan
        regs = locate_regimes(t, d, resolution_floor_m=FLOOR)
        assert [r.kind for r in regs] == [expected]
        n0 = 1.0 if expected == "visco-capillary" else 2 / 3
        assert regs[0].value == pytest.approx(n0, abs=0.05)


def test_power_law_then_exponential():
    # inertio-capillary necking, then elastic stress takes over (the usual polymer record)
    rng = np.random.default_rng(4)
    fluid = laws.Fluid(0.06, 1e-3, 1000.0, 2.0, 1e-3)
    hist = laws.filament_model(fluid, 1e-3, duration=1.0)
    t = np.arange(0, 0.02, 5e-5)
    d = noisy(hist.diameter_at(t), rng)
    d[d < 0.5 * PIXEL] = np.nan
    regs = locate_regimes(t, d, resolution_floor_m=FLOOR)
    kinds = [r.kind for r in regs]
    assert kinds == ["inertio-capillary", "elasto-capillary"], kinds
    assert regs[0].t_end_s < regs[1].t_start_s
    assert regs[1].value == pytest.approx(1e-3, rel=0.02)


def test_frames_before_the_start_and_below_the_floor_are_ignored():
    rng = np.random.default_rng(5)
    t, d, _ = ec_then("none", rng)
    d2 = d.copy()
    d2[t < 0.002] = 0.4e-3  # plates still moving
    a = locate_regimes(t, d, resolution_floor_m=FLOOR, t_start_s=0.002)
    b = locate_regimes(t, d2, resolution_floor_m=FLOOR, t_start_s=0.002)
    assert a == b
    assert a[0].t_start_s >= 0.002
    series = prepare_series(t, d, resolution_floor_m=FLOOR)
    assert np.all(series.diameter_m >= FLOOR)


def test_no_regime_in_a_flat_or_tiny_series():
    rng = np.random.default_rng(6)
    t = np.arange(300) * 1e-4
    assert locate_regimes(t, noisy(np.full(300, 1e-4), rng), resolution_floor_m=FLOOR) == []
    assert locate_regimes(t[:4], np.full(4, 1e-4), resolution_floor_m=FLOOR) == []
    assert locate_regimes(t, np.full(300, np.nan), resolution_floor_m=FLOOR) == []


def test_noise_estimate_in_pixels():
    rng = np.random.default_rng(7)
    t, d, _ = ec_then("none", rng)
    good = np.isfinite(d) & (d > FLOOR)
    assert estimate_diameter_noise(d[good]) == pytest.approx(0.1 * PIXEL, rel=0.15)


def test_outliers_are_flagged_without_their_neighbours():
    rng = np.random.default_rng(8)
    t, d, _ = ec_then("none", rng)
    good = np.flatnonzero(np.isfinite(d))
    hit = rng.choice(good[:300], size=10, replace=False)
    d[hit] *= 2.0
    bad = flag_outliers(t[good], d[good], noise_m=0.1 * PIXEL)
    assert set(good[bad]) == set(hit)


def test_local_slopes_on_an_exponential_are_exact_and_exponents_infinite():
    t = np.arange(400) * 1e-4
    d = 1e-4 * np.exp(-t / 0.006)
    sl = local_log_slopes(t, d, noise_m=1e-7)
    np.testing.assert_allclose(sl.slope_1_s, -1 / 0.006, rtol=1e-4)
    np.testing.assert_allclose(sl.relaxation_time_s, 0.002, rtol=1e-4)
    expo, _ = local_exponents(t, sl)
    assert np.all(np.abs(expo[np.isfinite(expo)]) > 100)


def test_kinds_are_the_contract_names():
    assert set(KINDS) == {"inertio-capillary", "visco-capillary", "elasto-capillary",
                          "finite-extensibility"}
    r = Regime("elasto-capillary", 0.1, 0.2, 50, 1e-4, 1e-5, 0.01)
    assert r.to_dict() == {"kind": "elasto-capillary", "t_start_s": 0.1, "t_end_s": 0.2}
