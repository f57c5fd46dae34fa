"""Per-frame kinematics and dimensionless groups."""

import numpy as np
import pytest
from scipy.signal import savgol_filter

from thinning.kinematics import local_log_slopes
from thinning.rheology import CURVE_COLUMNS, derived_curves, dimensionless_groups, extensional_viscosity_max

SIGMA = 0.06


def test_strain_rate_matches_scipy_savgol_derivative():
    # SciPy's Savitzky–Golay derivative (scipy.signal.savgol_filter, deriv=1) of ln D on a
    # smooth power law; a symmetric window gives the same slope for polyorder 1 and 2
    dt = 1e-5
    t = np.arange(0, 2.5e-3, dt)
    d = 1e-3 * ((3e-3 - t) / 3e-3) ** (2 / 3)
    half = 5
    ours = local_log_slopes(t, d, noise_m=1e-7, half_width=half).slope_1_s
    scipy_slope = savgol_filter(np.log(d), 2 * half + 1, 2, deriv=1, delta=dt)
    inner = slice(half, -half)
    np.testing.assert_allclose(ours[inner], scipy_slope[inner], rtol=2e-3)
    exact = -(2 / 3) / (3e-3 - t)
    np.testing.assert_allclose(ours[inner], exact[inner], rtol=5e-3)


def test_curves_on_an_exponential_follow_the_elastic_relations():
    # ε̇ = 2/(3λ) (Bazilevsky et al. 1990 via Sousa et al. 2017); η_E = 3λσ/D (docs/physics.md §4,
    # derived from the exponential); Hencky strain 2 ln(D0/D)
    rng = np.random.default_rng(1)
    lam = 2e-3
    t = np.arange(0, 0.02, 5e-5)
    d_true = 2e-4 * np.exp(-t / (3 * lam))
    d = d_true + rng.normal(0, 0.5e-6, t.size)
    c = derived_curves(t, d, surface_tension=SIGMA, initial_diameter=2e-4, resolution_floor_m=15e-6)
    assert list(c.columns) == list(CURVE_COLUMNS)
    ok = c["resolved"].to_numpy()
    assert ok.sum() > 200
    np.testing.assert_allclose(c["strain_rate_1_s"][ok], 2 / (3 * lam), rtol=0.06)
    np.testing.assert_allclose(c["apparent_extensional_viscosity_Pa_s"][ok],
                               3 * lam * SIGMA / d_true[ok], rtol=0.06)
    np.testing.assert_allclose(c["hencky_strain"], 2 * np.log(2e-4 / d))
    eta_max, (lo, hi) = extensional_viscosity_max(c)
    above = c["above_resolution_floor"].to_numpy()
    assert eta_max == pytest.approx(3 * lam * SIGMA / d_true[above].min(), rel=0.1)
    # the number is the column's own largest value above the floor, with an interval around it
    assert eta_max == np.nanmax(c["apparent_extensional_viscosity_Pa_s"][above])
    assert lo < eta_max < hi and lo < 3 * lam * SIGMA / d_true[above].min() * 1.1


def test_naive_trouton_ratio_of_a_newtonian_thread_is_7():
    # docs/physics.md §3.2 (derived from Papageorgiou 1995): with X = 1 a Newtonian visco-capillary
    # thread shows η_E = η/0.1418 = 7.05 η
    eta = 0.5
    t = np.arange(0, 0.05, 1e-4)
    d = 0.1418 * SIGMA / eta * (0.06 - t)
    c = derived_curves(t, d, surface_tension=SIGMA, initial_diameter=d[0], resolution_floor_m=15e-6,
                       diameter_noise_m=1e-7)
    ok = c["resolved"].to_numpy()
    np.testing.assert_allclose(c["apparent_extensional_viscosity_Pa_s"][ok] / eta, 7.05, rtol=0.02)


def test_undefined_frames_are_nan_and_order_is_kept():
    rng = np.random.default_rng(2)
    t = np.arange(0, 0.02, 5e-5)
    d = 2e-4 * np.exp(-t / 6e-3) + rng.normal(0, 0.5e-6, t.size)
    d[50:55] = np.nan
    d[-40:] = np.nan
    c = derived_curves(t, d, surface_tension=SIGMA, initial_diameter=2e-4, t_start_s=0.002,
                       resolution_floor_m=15e-6)
    assert len(c) == t.size
    np.testing.assert_array_equal(c["time_s"], t)
    rate = c["strain_rate_1_s"].to_numpy()
    assert np.isnan(rate[t < 0.002]).all()
    assert np.isnan(rate[np.isnan(d)]).all()
    assert np.isnan(c["hencky_strain"].to_numpy()[np.isnan(d)]).all()
    below = np.nan_to_num(d) < 15e-6
    assert np.isnan(rate[below]).all()
    assert not c["above_resolution_floor"].to_numpy()[below].any()


def test_dimensionless_groups_for_a_water_bridge():
    # docs/physics.md §2 worked numbers (own calculation there): water, R0 = 0.5 mm: t_R = 1.32 ms,
    # Oh = 0.0053; Bo = ρ g R0²/σ
    g = dimensionless_groups(initial_diameter=1e-3, surface_tension=0.072, density=1000.0,
                             viscosity=1e-3, relaxation_time=1e-3)
    assert g["rayleigh_time_s"] == pytest.approx(1.32e-3, rel=0.01)
    assert g["ohnesorge_number"] == pytest.approx(0.0053, rel=0.02)
    # worked by hand: Bo = 1000 · 9.80665 · (0.5e-3)² / 0.072 = 0.03405
    assert g["bond_number"] == pytest.approx(0.03405, rel=1e-3)
    assert g["deborah_number"] == pytest.approx(1e-3 / 1.32e-3, rel=0.01)
    # Ec = λσ/(η R0) = 1e-3 · 0.072 / (1e-3 · 0.5e-3) = 144 by hand, and equals De/Oh (docs/physics.md §2)
    assert g["elasto_capillary_number"] == pytest.approx(144.0, rel=1e-9)
    assert g["elasto_capillary_number"] == pytest.approx(g["deborah_number"] / g["ohnesorge_number"])


def test_dimensionless_groups_are_none_when_not_computable():
    g = dimensionless_groups(initial_diameter=1e-3, surface_tension=0.072)
    assert all(v is None for v in g.values())
    g = dimensionless_groups(initial_diameter=1e-3, surface_tension=0.072, viscosity=1.0)
    assert g["visco_capillary_time_s"] == pytest.approx(1.0 * 0.5e-3 / 0.072)
    assert g["ohnesorge_number"] is None and g["bond_number"] is None
