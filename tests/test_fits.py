"""Fits of the thinning laws: values against the published laws, intervals, failures."""

import json

import numpy as np
import pytest

from thinning import laws
from thinning.fits import (Fit, estimate_breakup_time, fit_elastocapillary, fit_finite_extensibility,
                           fit_inertiocapillary, fit_viscocapillary)

SIGMA = 0.06


def test_elastocapillary_fit_returns_the_published_rate_and_intercept():
    # Anna & McKinley (2001); McKinley (2005): D/D0 = (G D0/4σ)^(1/3) exp(−t/3λ), i.e. ln D
    # falls at 1/(3λ) and the strain rate is 2/(3λ); G from the intercept at t0
    rng = np.random.default_rng(1)
    lam, g, d0, t0 = 3e-3, 5.0, 1e-3, 0.002
    t = t0 + np.arange(0, 0.03, 1e-4)
    d_true = laws.elasto_capillary_diameter(t, initial_diameter=d0, elastic_modulus=g,
                                            surface_tension=SIGMA, relaxation_time=lam, t0=t0)
    d = d_true + rng.normal(0, 0.1 * 5e-6, t.size)
    f = fit_elastocapillary(t, d, window_s=(t[0], t[-1]), surface_tension=SIGMA,
                            initial_diameter=d0, t0=t0, seed=1, resolution_floor_m=15e-6)
    assert f and f.success
    assert f.values["relaxation_time_s"] == pytest.approx(lam, rel=0.01)
    assert f.values["strain_rate_1_s"] == pytest.approx(2 / (3 * lam), rel=0.01)
    assert f.values["elastic_modulus_Pa"] == pytest.approx(g, rel=0.03)
    lo, hi = f.ci95["relaxation_time_s"]
    assert lo < f.values["relaxation_time_s"] < hi
    # the bootstrap interval is about ±1.96 analytic standard errors on white noise
    half = 1.96 * f.stderr["relaxation_time_s_analytic"]
    assert 0.5 * half < (hi - lo) / 2 < 2.0 * half
    assert f.n_points == np.count_nonzero(d >= 15e-6)
    assert 0.5 < f.reduced_chi2 < 2.0
    assert f.residuals.shape == (f.n_points,)


def test_closed_form_elastic_law_matches_the_filament_model():
    # the 0-D model (numerical) and the closed form (used by the fits) must agree on the rate:
    # in the model's elasto-capillary stretch ln D falls at 1/(3λ) (Anna & McKinley 2001)
    fluid = laws.Fluid(SIGMA, 1e-3, 1000.0, 2.0, 2e-3)
    hist = laws.filament_model(fluid, 1e-3, duration=1.0)
    t = np.linspace(0.006, 0.02, 300)
    d = hist.diameter_at(t)
    f = fit_elastocapillary(t, d, window_s=(t[0], t[-1]), surface_tension=SIGMA,
                            initial_diameter=1e-3, t0=0.0, seed=1, diameter_noise_m=1e-8)
    assert f.values["relaxation_time_s"] == pytest.approx(fluid.relaxation_time, rel=0.005)
    closed = laws.elasto_capillary_diameter(t, initial_diameter=1e-3,
                                            elastic_modulus=f.values["elastic_modulus_Pa"],
                                            surface_tension=SIGMA,
                                            relaxation_time=f.values["relaxation_time_s"])
    np.testing.assert_allclose(closed, d, rtol=0.01)


def test_viscocapillary_fit_uses_papageorgiou():
    # Papageorgiou (1995): R = 0.0709 (σ/η)(t_b − t), so D = 0.1418 (σ/η)(t_b − t)
    rng = np.random.default_rng(2)
    eta, t_b = 0.8, 0.1
    t = np.arange(0.0, 0.098, 2e-4)
    d = 0.1418 * SIGMA / eta * (t_b - t) + rng.normal(0, 1e-6, t.size)
    f = fit_viscocapillary(t, d, window_s=(0.0, 0.09), surface_tension=SIGMA, seed=3)
    assert f.values["shear_viscosity_Pa_s"] == pytest.approx(eta, rel=0.01)
    assert f.values["breakup_time_s"] == pytest.approx(t_b, abs=5e-4)
    lo, hi = f.ci95["shear_viscosity_Pa_s"]
    assert lo < eta < hi
    # the same law as laws.visco_capillary_diameter
    np.testing.assert_allclose(laws.visco_capillary_diameter(t, t_b=t_b, surface_tension=SIGMA,
                                                             viscosity=eta),
                               0.1418 * SIGMA / eta * (t_b - t), rtol=1e-12)


def test_inertiocapillary_fit_recovers_the_prefactor_and_the_two_thirds_exponent():
    # Eggers & Villermaux (2008), from memory (docs/physics.md §3.1): R = 0.717 (σ/ρ)^(1/3) (t_c − t)^(2/3)
    rng = np.random.default_rng(4)
    rho, t_c = 1000.0, 3e-3
    t = np.arange(0, 2.9e-3, 2e-5)
    d = laws.inertio_capillary_diameter(t, t_c=t_c, surface_tension=SIGMA, density=rho)
    d = d + rng.normal(0, 0.5e-6, t.size)
    f = fit_inertiocapillary(t, d, window_s=(0, t[-1]), surface_tension=SIGMA, density=rho, seed=5,
                             resolution_floor_m=15e-6)
    assert f.values["prefactor_X_IC"] == pytest.approx(0.717, rel=0.02)
    assert f.values["singular_time_s"] == pytest.approx(t_c, abs=2e-5)
    assert f.values["exponent"] == pytest.approx(2 / 3, abs=0.03)
    lo, hi = f.ci95["prefactor_X_IC"]
    assert lo < 0.717 < hi


def test_inertiocapillary_fit_on_the_water_model():
    # The 0-D model's inviscid limit: k ρ Ṙ² = (2X − 1) σ/R with k = (3/2)² (2X − 1)/X_IC³ gives
    # R = X_IC (σ/ρ)^(1/3) τ^(2/3) with the inviscid similarity prefactor X_IC = 0.717
    # (Eggers & Villermaux 2008, from memory in docs/physics.md §3.1). Exponent 2/3: Eggers (1997).
    hist = laws.filament_model(laws.Fluid(0.072, 1e-3, 1000.0), 1e-3, duration=1.0)
    t = np.arange(0.0, hist.breakup_time_s, 2e-5)
    d = hist.diameter_at(t)
    f = fit_inertiocapillary(t, d, window_s=(0.0, t[-1]), surface_tension=0.072, density=1000.0,
                             seed=1, resolution_floor_m=20e-6, diameter_noise_m=1e-7)
    assert f.values["exponent"] == pytest.approx(2 / 3, abs=0.03)
    assert f.values["prefactor_X_IC"] == pytest.approx(0.717, rel=0.03)


def test_inertiocapillary_fit_without_density_gives_only_the_dimensional_prefactor():
    t = np.arange(0, 2.9e-3, 2e-5)
    d = laws.inertio_capillary_diameter(t, t_c=3e-3, surface_tension=SIGMA, density=1000.0)
    f = fit_inertiocapillary(t, d, window_s=(0, t[-1]), surface_tension=SIGMA, seed=5,
                             diameter_noise_m=1e-7)
    assert "prefactor_X_IC" not in f.values
    expected = 2 * 0.717 * np.cbrt(SIGMA / 1000.0)
    assert f.values["prefactor_m_s23"] == pytest.approx(expected, rel=1e-3)


def test_finite_extensibility_fit_gives_terminal_viscosity_and_l2():
    # Anna & McKinley (2001): D ≈ (σ/η_E,∞)(t_b − t), η_E,∞ ≈ 2 η_p L²
    rng = np.random.default_rng(6)
    eta_p, l2, t_b = 0.05, 2e4, 0.5
    eta_inf = 2 * eta_p * l2
    t = np.arange(0.4, 0.499, 1e-4)
    d = laws.finite_extensibility_diameter(t, t_b=t_b, surface_tension=SIGMA,
                                           terminal_extensional_viscosity=eta_inf)
    d = d + rng.normal(0, 0.05e-6, t.size)
    f = fit_finite_extensibility(t, d, window_s=(0.4, 0.49), surface_tension=SIGMA,
                                 polymer_viscosity=eta_p, seed=7)
    assert f.values["terminal_extensional_viscosity_Pa_s"] == pytest.approx(eta_inf, rel=0.02)
    assert f.values["finite_extensibility_L2"] == pytest.approx(l2, rel=0.02)


def test_bootstrap_is_seeded():
    rng = np.random.default_rng(8)
    t = np.arange(0, 0.02, 1e-4)
    d = 1e-4 * np.exp(-t / 6e-3) + rng.normal(0, 5e-7, t.size)
    kw = dict(window_s=(0, 0.02), surface_tension=SIGMA, initial_diameter=1e-3, t0=0.0)
    a = fit_elastocapillary(t, d, seed=11, **kw)
    b = fit_elastocapillary(t, d, seed=11, **kw)
    c = fit_elastocapillary(t, d, seed=12, **kw)
    assert a.ci95 == b.ci95
    assert a.ci95 != c.ci95
    assert a.values == c.values


def test_impossible_fits_are_falsy_with_a_reason():
    t = np.arange(10) * 1e-3
    d = np.full(10, 1e-4)
    few = fit_elastocapillary(t, d, window_s=(0.0, 0.002), surface_tension=SIGMA,
                              initial_diameter=1e-3, t0=0.0, seed=1)
    assert not few and "usable frames" in few.message
    flat = fit_viscocapillary(t, d + np.arange(10) * 1e-7, window_s=(0.0, 0.01), surface_tension=SIGMA,
                              seed=1)
    assert not flat and "does not fall" in flat.message
    empty = fit_finite_extensibility(t, d, window_s=(0.005, 0.005), surface_tension=SIGMA, seed=1)
    assert not empty and "empty" in empty.message
    json.dumps(few.to_dict(), allow_nan=False)


def test_to_dict_is_plain_json():
    rng = np.random.default_rng(9)
    t = np.arange(0, 0.02, 1e-4)
    d = 1e-4 * np.exp(-t / 6e-3) + rng.normal(0, 5e-7, t.size)
    f = fit_elastocapillary(t, d, window_s=(0, 0.02), surface_tension=SIGMA, initial_diameter=1e-3,
                            t0=0.0, seed=1)
    out = f.to_dict()
    assert isinstance(f, Fit)
    assert set(out) == {"model", "success", "message", "values", "ci95", "stderr", "window_s",
                        "n_points", "reduced_chi2"}
    # D ∝ exp(−t / 6 ms) = exp(−t / 3λ): λ = 2 ms
    assert json.loads(json.dumps(out, allow_nan=False))["values"]["relaxation_time_s"] == \
        pytest.approx(2e-3, rel=0.02)


def test_breakup_time_lies_between_the_last_thread_and_the_first_empty_frame():
    t = np.arange(100) * 1e-4
    d = np.clip(0.1418 * SIGMA / 1.0 * (0.00805 - t), 0, None)
    d[d < 2e-7] = np.nan
    t_b = estimate_breakup_time(t, d)
    last = np.flatnonzero(np.isfinite(d))[-1]
    assert t[last] <= t_b <= t[last + 1]
    assert t_b == pytest.approx(0.00805, abs=1e-6)  # linear extrapolation of a linear neck
    # the thread still there in the last frame: no breakup within the record
    assert estimate_breakup_time(t, np.full(100, 1e-4)) is None
    assert estimate_breakup_time(t, np.full(100, np.nan)) is None
