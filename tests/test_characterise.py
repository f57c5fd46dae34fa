"""characterise(): a diameter series → regimes and rheology numbers, end to end (series only, no images).

Truth: the series come from the 0-D filament model (``laws.filament_model``)
sampled at the camera rate with pixel noise, or from the closed-form laws. The
truth for λ is the model fluid's dumbbell relaxation time. For a finite
extensibility (FENE-P) fluid the thinning rate in its elasto-capillary window is
only approximately 2/(3λ) (the chains' finite length speeds it up as they
stretch), so the apparent λ is a slightly different object; the matrix
tolerance (every case within 5 %) covers it, and the coverage test uses
fluids whose model λ is what the data show.
"""

import json
import math

import numpy as np
import pytest

from thinning.characterisation import Characterisation, characterise
from thinning.checks import Severity
from thinning.laws import Fluid, filament_model
from thinning.modelfit import ModelFit

CONTRACT_KEYS = {
    "regime", "regimes", "relaxation_time_s", "relaxation_time_ci95_s", "fit_window_s",
    "fit_window_frames", "free_thinning_start_s", "initial_diameter_m", "elastic_modulus_Pa",
    "shear_viscosity_Pa_s", "extensional_viscosity_max_Pa_s", "extensional_viscosity_terminal_Pa_s",
    "breakup_time_s", "filament_lifetime_s",
}


def blurred(true_m, pixel):
    """What an edge finder reports: thin threads (< 3 px) come out too thin (docs/physics.md §8)."""
    small = true_m < 3 * pixel
    return np.where(small, true_m * (0.6 + 0.4 * true_m / (3 * pixel)), true_m)


def camera_series(fluid, d0, *, fps, pixel, noise_px, rng, t0=0.002, tail_frames=20):
    """The 0-D model seen by a camera: blur bias, pixel noise, NaN once the thread is < 0.5 px.

    Frames before ``t0`` show the plates still moving (a constant, larger diameter).
    """
    hist = filament_model(fluid, d0, duration=50.0)
    end = hist.breakup_time_s if hist.breakup_time_s is not None else hist.time_s[-1]
    n_pre = int(round(t0 * fps))
    t = np.arange(n_pre + int(end * fps) + tail_frames) / fps
    tm = t - n_pre / fps
    true = hist.diameter_at(np.clip(tm, 0.0, None))
    d = blurred(true, pixel) + rng.normal(0.0, noise_px * pixel, t.size)
    d[tm < 0] = 1.3 * d0
    d[true < 0.5 * pixel] = np.nan
    return t, d, n_pre / fps


def closed_form_ec_series(rng, *, lam, fps, pixel, noise_px, d0=1e-3, t0=0.002, d_switch=0.3e-3,
                          t_switch=1.5e-3):
    """An inertio-capillary-like neck down to ``d_switch``, then exactly D ∝ exp(−t/3λ)."""
    n = int((t0 + t_switch + 3 * lam * np.log(d_switch / (0.4 * pixel)) + 1e-3) * fps)
    t = np.arange(n) / fps
    tm = t - t0
    neck = d0 * (1 - (1 - (d_switch / d0) ** 1.5) * np.clip(tm / t_switch, 0, 1)) ** (2 / 3)
    ec = d_switch * np.exp(-(tm - t_switch) / (3 * lam))
    true = np.where(tm < t_switch, neck, ec)
    d = blurred(true, pixel) + rng.normal(0.0, noise_px * pixel, n)
    d[tm < 0] = 1.3 * d0
    d[true < 0.5 * pixel] = np.nan
    return t, d, t0


def run(fluid, d0, *, fps, pixel, noise_px, seed, geometry="plates", **kw):
    rng = np.random.default_rng(seed)
    t, d, t0 = camera_series(fluid, d0, fps=fps, pixel=pixel, noise_px=noise_px, rng=rng)
    return characterise(t, d, surface_tension=fluid.surface_tension, pixel_size_m=pixel, fps_hz=fps,
                        free_thinning_start_s=t0, density=fluid.density or None,
                        solvent_viscosity=fluid.solvent_viscosity,
                        zero_shear_viscosity=fluid.zero_shear_viscosity, geometry=geometry,
                        seed=seed, **kw)


# (λ s, G Pa, η_s Pa·s, ρ kg/m³, L², D0 m, fps, pixel m, noise px, geometry). Each is measurable:
# elastic stress takes over while D is still ≥ 40 px, and ≥ 100 frames fall in the EC window.
POLYMER_MATRIX = [
    (0.5e-3, 5.0, 1e-3, 1000, None, 1e-3, 50000, 5e-6, 0.1, "dripping"),
    (0.5e-3, 5.0, 1e-3, 1000, 1e4, 1e-3, 50000, 5e-6, 0.2, "plates"),
    (2e-3, 2.0, 2e-3, 1000, None, 1e-3, 20000, 5e-6, 0.3, "plates"),
    (2e-3, 5.0, 5e-3, 1000, 1e5, 1e-3, 20000, 10e-6, 0.2, "dripping"),
    (10e-3, 1.0, 10e-3, 1000, None, 2e-3, 10000, 10e-6, 0.05, "plates"),
    (10e-3, 10.0, 1e-3, 1000, 1e3, 1e-3, 10000, 5e-6, 0.2, "plates"),
    (0.1, 1.0, 20e-3, 1000, 1e4, 2e-3, 5000, 10e-6, 0.3, "plates"),
    (0.1, 0.5, 50e-3, 0, None, 3e-3, 2000, 20e-6, 0.1, "dripping"),
    (0.5, 0.5, 100e-3, 1000, None, 3e-3, 2000, 20e-6, 0.2, "plates"),
    (2.0, 0.2, 100e-3, 1000, 1e5, 3e-3, 2000, 20e-6, 0.1, "plates"),
]

# (η Pa·s, ρ kg/m³, D0 m, fps, pixel m, noise px, expected regime)
NEWTONIAN_MATRIX = [
    (1.0, 0.0, 1e-3, 5000, 5e-6, 0.2, "visco-capillary"),
    (1.0, 1260.0, 2e-3, 2000, 10e-6, 0.1, "visco-capillary"),
    (0.5, 0.0, 3e-3, 5000, 20e-6, 0.3, "visco-capillary"),
    (0.5, 1200.0, 1e-3, 10000, 5e-6, 0.2, "visco-capillary"),
    (1e-3, 1000.0, 1e-3, 50000, 5e-6, 0.1, "inertio-capillary"),
    (1e-3, 1000.0, 2e-3, 20000, 10e-6, 0.2, "inertio-capillary"),
]


def window_value(fluid, d0, c):
    """λ_w: the relaxation time the noise-free model shows over the analysis's window, −1/(3 s)."""
    hist = filament_model(fluid, d0, duration=50.0)
    a, b = np.array(c.fit_window_s) - c.free_thinning_start_s
    tt = np.linspace(a, b, 400)
    return -1.0 / (3.0 * np.polyfit(tt, np.log(hist.diameter_at(tt)), 1)[0])


@pytest.mark.slow
def test_relaxation_time_over_the_polymer_matrix():
    # Truth: the fluid's λ. With L² = 10³ the model never thins at a constant rate (the chains
    # are near full length before the start-up overshoot has died away: its local λ runs from
    # +8 % to −7 % across the elastic stretch), so that case is held to 10 % of λ; every case
    # must also return, within 5 %, the λ_w the noise-free model shows in the chosen window.
    errors = []
    for k, (lam, g, eta_s, rho, l2, d0, fps, pixel, noise, geometry) in enumerate(POLYMER_MATRIX):
        fluid = Fluid(0.06, eta_s, rho, g, lam, l2)
        c = run(fluid, d0, fps=fps, pixel=pixel, noise_px=noise, seed=100 + k, geometry=geometry)
        assert c.regime == "elasto-capillary", (k, c.regimes)
        kinds = [r.kind for r in c.regimes]
        assert "visco-capillary" not in kinds[kinds.index("elasto-capillary"):], (k, kinds)
        err = abs(c.relaxation_time_s / lam - 1.0)
        errors.append(err)
        assert err <= (0.10 if l2 is not None and l2 < 1e4 else 0.05), (k, err)
        assert c.relaxation_time_s == pytest.approx(window_value(fluid, d0, c), rel=0.05), k
        assert c.fit_window_frames >= 100
    assert np.median(errors) <= 0.02, errors


def test_newtonian_matrix_gives_regime_and_viscosity_without_relaxation_time():
    for k, (eta, rho, d0, fps, pixel, noise, expected) in enumerate(NEWTONIAN_MATRIX):
        fluid = Fluid(0.063, eta, rho)
        c = run(fluid, d0, fps=fps, pixel=pixel, noise_px=noise, seed=200 + k)
        assert c.regime == expected, (k, c.regimes)
        assert c.relaxation_time_s is None and c.relaxation_time_ci95_s is None
        assert all(r.kind != "elasto-capillary" for r in c.regimes)
        if expected == "visco-capillary":
            # Papageorgiou (1995): D = 0.1418 σ/η (t_b − t) gives η back within 5 %
            assert c.shear_viscosity_Pa_s == pytest.approx(eta, rel=0.05), k
        else:
            # Eggers & Villermaux (2008), from memory (docs/physics.md §3.1): exponent 2/3
            assert c.fits["inertio-capillary"].values["exponent"] == pytest.approx(2 / 3, abs=0.05)
        assert any(f.code == "no-elastic-regime" for f in c.findings)


@pytest.mark.slow
def test_interval_covers_the_true_relaxation_time_about_95_percent():
    # truth: the λ of the closed-form elasto-capillary law the series follows exactly; the
    # bootstrap's share of the budget (scatter and window), which alone must cover it here
    hits, n = 0, 0
    for k in range(120):
        rng = np.random.default_rng(1000 + k)
        noise = (0.1, 0.2, 0.3)[k % 3]
        lam, fps = ((2e-3, 20000), (5e-3, 10000))[k % 2]
        t, d, t0 = closed_form_ec_series(rng, lam=lam, fps=fps, pixel=5e-6, noise_px=noise)
        c = characterise(t, d, surface_tension=0.06, pixel_size_m=5e-6, fps_hz=fps,
                         free_thinning_start_s=t0, seed=k)
        lo, hi = c.fits["elasto-capillary"].ci95["relaxation_time_s"]   # scatter and window
        hits += lo <= lam <= hi
        n += 1
    assert 0.88 <= hits / n <= 0.99, hits / n


@pytest.mark.slow
def test_interval_on_the_filament_model_covers_its_window_value():
    # Truth: the relaxation time the noise-free model shows in the window the analysis chose,
    # λ_w = −1/(3 s) from its ln D slope there. The Oldroyd-B model's own local value sits
    # 0.1–0.4 % above its λ (the solvent's share of the stress), a physics offset that the
    # matrix test bounds; this test checks that the interval honestly carries noise and window.
    fluid = Fluid(0.06, 1e-3, 1000.0, 2.0, 2e-3)
    hist = filament_model(fluid, 1e-3, duration=1.0)
    hits, n = 0, 100
    for k in range(n):
        rng = np.random.default_rng(2000 + k)
        t, d, t0 = camera_series(fluid, 1e-3, fps=10000, pixel=5e-6, noise_px=0.2, rng=rng)
        c = characterise(t, d, surface_tension=0.06, pixel_size_m=5e-6, fps_hz=10000,
                         free_thinning_start_s=t0, density=1000.0, seed=k)
        a, b = np.array(c.fit_window_s) - t0
        tt = np.linspace(a, b, 200)
        slope = np.polyfit(tt, np.log(hist.diameter_at(tt)), 1)[0]
        lam_w = -1.0 / (3.0 * slope)
        lo, hi = c.fits["elasto-capillary"].ci95["relaxation_time_s"]   # scatter and window
        hits += lo <= lam_w <= hi
        assert lam_w == pytest.approx(fluid.relaxation_time, rel=0.005)
    assert 0.88 <= hits / n <= 0.99, hits / n


def test_water_bridge_breaks_within_a_few_milliseconds():
    # common practice: a millimetre water bridge pinches off within a few milliseconds
    # (docs/physics.md §7: 2.2–3.7 ms from the inertio-capillary time)
    c = run(Fluid(0.072, 1e-3, 1000.0), 1e-3, fps=20000, pixel=5e-6, noise_px=0.1, seed=5)
    assert 1e-3 < c.filament_lifetime_s < 6e-3
    assert c.regime == "inertio-capillary"


def test_dilute_polymer_bridge_lasts_a_second_or_more():
    # common practice: a dilute polymer solution with λ near 0.1 s keeps its bridge for
    # a second or more
    fluid = Fluid(0.06, 20e-3, 1000.0, 1.0, 0.1)
    c = run(fluid, 2e-3, fps=2000, pixel=10e-6, noise_px=0.1, seed=6)
    assert c.filament_lifetime_s >= 1.0
    assert c.relaxation_time_s == pytest.approx(0.1, rel=0.02)


def test_result_fields_hold_the_contract_keys_and_no_nan():
    c = run(Fluid(0.06, 1e-3, 1000.0, 2.0, 1e-3), 1e-3, fps=20000, pixel=5e-6, noise_px=0.1, seed=1)
    fields = c.result_fields()
    assert CONTRACT_KEYS <= set(fields)
    text = json.dumps(fields, allow_nan=False)
    assert "NaN" not in text
    assert fields["regime"] == "elasto-capillary"
    assert [set(r) for r in fields["regimes"]] == [{"kind", "t_start_s", "t_end_s"}] * len(fields["regimes"])
    starts = [r["t_start_s"] for r in fields["regimes"]]
    assert starts == sorted(starts)
    lo, hi = fields["relaxation_time_ci95_s"]
    assert lo < fields["relaxation_time_s"] < hi
    assert fields["fit_window_frames"] >= 10
    assert fields["filament_lifetime_s"] == pytest.approx(fields["breakup_time_s"]
                                                         - fields["free_thinning_start_s"])
    # elastic modulus follows the contract's intercept relation from the headline fit
    fit = c.fits["elasto-capillary"]
    d_t0, d0, sigma = fit.values["diameter_at_t0_m"], fields["initial_diameter_m"], 0.06
    assert fields["elastic_modulus_Pa"] == pytest.approx(4 * sigma * (d_t0 / d0) ** 3 / d0)
    assert set(fields["fits"]) == set(c.fits)


def test_curves_match_the_input_frame_for_frame():
    rng = np.random.default_rng(3)
    t, d, t0 = camera_series(Fluid(0.06, 1e-3, 1000.0, 2.0, 1e-3), 1e-3, fps=20000, pixel=5e-6,
                             noise_px=0.1, rng=rng)
    c = characterise(t, d, surface_tension=0.06, pixel_size_m=5e-6, fps_hz=20000,
                     free_thinning_start_s=t0, seed=1)
    assert len(c.curves) == t.size
    np.testing.assert_array_equal(c.curves["time_s"].to_numpy(), t)
    before = t < t0
    assert c.curves.loc[before, "strain_rate_1_s"].isna().all()
    assert c.curves.loc[np.isnan(d), "hencky_strain"].isna().all()


def test_frames_before_free_thinning_are_ignored():
    rng = np.random.default_rng(4)
    fluid = Fluid(0.06, 1e-3, 1000.0, 2.0, 1e-3)
    t, d, t0 = camera_series(fluid, 1e-3, fps=20000, pixel=5e-6, noise_px=0.1, rng=rng)
    kw = dict(surface_tension=0.06, pixel_size_m=5e-6, fps_hz=20000, free_thinning_start_s=t0, seed=2)
    a = characterise(t, d, **kw)
    d2 = d.copy()
    d2[t < t0] = rng.uniform(0.2e-3, 3e-3, (t < t0).sum())  # plates moving: anything at all
    b = characterise(t, d2, **kw)
    assert a.relaxation_time_s == b.relaxation_time_s
    assert a.initial_diameter_m == pytest.approx(d[np.searchsorted(t, t0)])


def test_beads_and_spikes_do_not_move_the_relaxation_time():
    rng = np.random.default_rng(7)
    fluid = Fluid(0.06, 1e-3, 1000.0, 2.0, 2e-3)
    t, d, t0 = camera_series(fluid, 1e-3, fps=20000, pixel=5e-6, noise_px=0.1, rng=rng)
    kw = dict(surface_tension=0.06, pixel_size_m=5e-6, fps_hz=20000, free_thinning_start_s=t0, seed=3)
    clean = characterise(t, d, **kw)
    spoiled = d.copy()
    ok = np.flatnonzero(np.isfinite(d) & (t > t0 + 0.004))
    hit = rng.choice(ok[: ok.size * 3 // 4], size=12, replace=False)
    spoiled[hit] *= rng.uniform(1.5, 3.0, hit.size)          # the neck measured on a bead
    spoiled[hit[:3] + 1] = np.nan                              # and a few lost frames
    c = characterise(t, spoiled, **kw)
    assert c.regime == "elasto-capillary"
    assert c.relaxation_time_s == pytest.approx(clean.relaxation_time_s, rel=0.01)
    assert any(f.code == "outlier-frames" for f in c.findings)


def test_too_few_frames_in_the_elastic_window_is_doubtful():
    # λ = 0.5 ms filmed at 2 kHz: the elastic stretch spans only a handful of frames
    rng = np.random.default_rng(8)
    t, d, t0 = closed_form_ec_series(rng, lam=0.5e-3, fps=2000, pixel=5e-6, noise_px=0.05,
                                     d_switch=0.15e-3)
    c = characterise(t, d, surface_tension=0.06, pixel_size_m=5e-6, fps_hz=2000,
                     free_thinning_start_s=t0, seed=1)
    assert c.regime == "elasto-capillary"
    assert c.fit_window_frames < 10
    codes = {f.code: f for f in c.findings}
    assert codes["few-frames-in-window"].severity is Severity.DOUBTFUL
    assert "frame rate is too low" in codes["few-frames-in-window"].message
    assert c.relaxation_time_s == pytest.approx(0.5e-3, rel=0.05)


def test_window_cut_short_by_the_floor_is_doubtful():
    # a coarse pixel: the elastic stretch starts at 30 µm and the floor sits at 3 × 6 µm
    rng = np.random.default_rng(9)
    t, d, t0 = closed_form_ec_series(rng, lam=5e-3, fps=20000, pixel=6e-6, noise_px=0.1,
                                     d_switch=45e-6)
    c = characterise(t, d, surface_tension=0.06, pixel_size_m=6e-6, fps_hz=20000,
                     free_thinning_start_s=t0, seed=1)
    assert c.regime == "elasto-capillary"
    codes = {f.code: f for f in c.findings}
    assert codes["window-cut-by-floor"].severity is Severity.DOUBTFUL
    assert c.relaxation_time_s == pytest.approx(5e-3, rel=0.05)


def test_nothing_usable_is_undetermined_and_doubtful():
    rng = np.random.default_rng(10)
    t = np.arange(400) / 10000
    d = 0.5e-3 + rng.normal(0, 1e-6, t.size)   # a thread that never thins
    c = characterise(t, d, surface_tension=0.06, pixel_size_m=5e-6, fps_hz=10000,
                     free_thinning_start_s=0.0, seed=1)
    assert c.regime == "undetermined"
    assert c.relaxation_time_s is None and c.fit_window_s is None
    codes = {f.code: f for f in c.findings}
    assert codes["no-usable-regime"].severity is Severity.DOUBTFUL
    assert codes["no-breakup"].severity is Severity.NOTE
    assert c.breakup_time_s is None and c.filament_lifetime_s is None
    json.dumps(c.result_fields(), allow_nan=False)


def test_empty_series_is_undetermined():
    t = np.arange(50) / 1000
    c = characterise(t, np.full(50, np.nan), surface_tension=0.06, pixel_size_m=5e-6, fps_hz=1000,
                     free_thinning_start_s=0.0, seed=1)
    assert c.regime == "undetermined" and c.initial_diameter_m is None
    json.dumps(c.result_fields(), allow_nan=False)


def test_large_bond_number_warns_of_sagging():
    # Warwaruk et al. (2025): Bo > 0.5 gives sagging/oscillation; D0 = 4 mm water-like: Bo ≈ 0.54
    c = run(Fluid(0.072, 50e-3, 1000.0, 1.0, 0.05), 4e-3, fps=2000, pixel=20e-6, noise_px=0.1, seed=2)
    assert c.bond_number == pytest.approx(1000 * 9.80665 * 2e-3 ** 2 / 0.072, rel=0.02)
    assert any(f.code == "gravity-sagging" and f.severity is Severity.NOTE for f in c.findings)


def test_dimensionless_groups_reported():
    fluid = Fluid(0.06, 1e-3, 1000.0, 2.0, 1e-3)
    c = run(fluid, 1e-3, fps=20000, pixel=5e-6, noise_px=0.1, seed=1)
    fields = c.result_fields()
    r0 = c.initial_diameter_m / 2
    t_r = np.sqrt(1000 * r0 ** 3 / 0.06)
    assert fields["deborah_number"] == pytest.approx(c.relaxation_time_s / t_r)
    assert fields["ohnesorge_number"] == pytest.approx(fluid.zero_shear_viscosity / np.sqrt(1000 * 0.06 * r0))
    assert fields["elasto_capillary_number"] == pytest.approx(
        c.relaxation_time_s * 0.06 / (fluid.zero_shear_viscosity * r0))
    assert fields["trouton_ratio_max"] == pytest.approx(
        fields["extensional_viscosity_max_Pa_s"] / fluid.zero_shear_viscosity)


def test_finite_extensibility_follows_the_elastic_stretch():
    # L² = 10³ with a strong modulus: the terminal stretch shows above the floor
    fluid = Fluid(0.06, 1e-3, 1000.0, 10.0, 10e-3, 1e3)
    c = run(fluid, 1e-3, fps=10000, pixel=2e-6, noise_px=0.1, seed=11)
    kinds = [r.kind for r in c.regimes]
    assert kinds[-2:] == ["elasto-capillary", "finite-extensibility"]
    eta_inf = c.extensional_viscosity_terminal_Pa_s
    # Anna & McKinley (2001): the terminal viscosity is bounded by 2 η_p L² (FENE-P plateau)
    assert 0.05 * fluid.terminal_extensional_viscosity < eta_inf <= 1.2 * fluid.terminal_extensional_viscosity
    assert c.finite_extensibility_L2 == pytest.approx(eta_inf / (2 * fluid.polymer_viscosity))


@pytest.mark.parametrize("bad", [dict(surface_tension=0.0), dict(pixel_size_m=-1.0),
                                 dict(fps_hz=float("nan")), dict(geometry="jet")])
def test_bad_arguments_raise(bad):
    kw = dict(surface_tension=0.06, pixel_size_m=5e-6, fps_hz=1000.0, free_thinning_start_s=0.0, seed=1)
    kw.update(bad)
    with pytest.raises(ValueError):
        characterise(np.arange(10.0), np.ones(10), **kw)


@pytest.mark.parametrize("disturbance", ["correlated-noise", "timing-jitter", "wobble", "dropouts"])
def test_relaxation_time_is_robust_to_disturbances(disturbance):
    # Oldroyd-B, λ = 2 ms, 20 kHz, 5 µm/px, 0.2 px noise plus one disturbance; tolerance 2 %
    fluid = Fluid(0.06, 1e-3, 1000.0, 2.0, 2e-3)
    hist = filament_model(fluid, 1e-3, duration=1.0)
    fps, pixel, t0 = 20000, 5e-6, 0.002
    n = int((t0 + hist.breakup_time_s) * fps) + 20
    nominal = np.arange(n) / fps
    for k in range(8):
        rng = np.random.default_rng(300 + k)
        shot = nominal + (rng.uniform(-0.1, 0.1, n) / fps if disturbance == "timing-jitter" else 0)
        true = hist.diameter_at(np.clip(shot - t0, 0.0, None))
        e = rng.normal(0.0, 0.2 * pixel, n)
        if disturbance == "correlated-noise":          # AR(1), coefficient 0.6
            for i in range(1, n):
                e[i] = 0.6 * e[i - 1] + 0.8 * e[i]
        if disturbance == "wobble":                    # a 700 Hz vibration of 0.3 px
            e += 0.3 * pixel * np.sin(2 * np.pi * 700 * nominal)
        d = blurred(true, pixel) + e
        if disturbance == "dropouts":                  # 5 % of frames without a diameter
            d[rng.choice(n, n // 20, replace=False)] = np.nan
        d[nominal < t0] = 1.3e-3
        d[true < 0.5 * pixel] = np.nan
        c = characterise(nominal, d, surface_tension=0.06, pixel_size_m=pixel, fps_hz=fps,
                         free_thinning_start_s=t0, density=1000.0, seed=k)
        assert c.regime == "elasto-capillary", (k, c.regimes)
        assert c.relaxation_time_s == pytest.approx(2e-3, rel=0.02), k


def test_newtonian_liquids_with_correlated_noise_show_no_elastic_stretch():
    cases = [(Fluid(0.063, 1.0, 1260.0), 5000, "visco-capillary"),
             (Fluid(0.072, 1e-3, 1000.0), 50000, "inertio-capillary")]
    for fluid, fps, expected in cases:
        hist = filament_model(fluid, 1e-3, duration=1.0)
        t = np.arange(int(hist.breakup_time_s * fps) + 20) / fps
        for k in range(6):
            rng = np.random.default_rng(400 + k)
            e = rng.normal(0.0, 0.3 * 5e-6, t.size)
            for i in range(1, t.size):
                e[i] = 0.6 * e[i - 1] + 0.8 * e[i]
            true = hist.diameter_at(t)
            d = blurred(true, 5e-6) + e
            d[true < 2.5e-6] = np.nan
            c = characterise(t, d, surface_tension=fluid.surface_tension, pixel_size_m=5e-6,
                             fps_hz=fps, free_thinning_start_s=0.0, density=fluid.density, seed=k)
            assert c.regime == expected, (k, c.regimes)


def _model_series(fluid, d0, fps, pixel, noise_px=0.1, seed=0):
    hist = filament_model(fluid, d0, duration=10.0)
    t = np.arange(0.0, hist.breakup_time_s + 10 / fps, 1.0 / fps)
    d = hist.diameter_at(t)
    d = d + np.random.default_rng(seed).normal(0.0, noise_px * pixel, t.size)
    d[hist.diameter_at(t) < 0.5 * pixel] = np.nan
    last = np.flatnonzero(np.isfinite(d))[-1]
    return t, d, (t[last] + 0.5 / fps)


@pytest.mark.parametrize("fluid,d0,fps,pixel,seed,code", [
    # viscous solvent, weak elasticity: the local λ dips to ~0.9 ms at the viscous-to-elastic
    # passage and settles at 1.4 ms only below about 4 px (from the 0-D model itself)
    (Fluid(0.031, 0.033, 1000.0, 2.65, 1.414e-3, 3.9e4), 1.16e-3, 18763.0, 20e-6, 3,
     "elastic-not-settled"),
    # λ = 3 ms, but the elastic stretch lies entirely below 4 px: the visco-capillary law
    # predicts breakup some 20 ms before the thread actually breaks
    (Fluid(0.059, 0.024, 1000.0, 1.24, 3.05e-3, 4.0e4), 0.775e-3, 5088.0, 24.7e-6, 4,
     "late-breakup"),
], ids=["transition-mistaken-for-the-elastic-stretch", "thread-held-up-below-the-floor"])
def test_an_elastic_stretch_out_of_reach_is_right_or_doubtful(fluid, d0, fps, pixel, seed, code):
    # either λ within 10 % of the fluid's, or the record says why it cannot be trusted
    t, d, t_b = _model_series(fluid, d0, fps, pixel)
    c = characterise(t, d, surface_tension=fluid.surface_tension, pixel_size_m=pixel, fps_hz=fps,
                     free_thinning_start_s=0.0, breakup_time_s=t_b, seed=seed)
    lam = fluid.relaxation_time
    right = c.relaxation_time_s is not None and abs(c.relaxation_time_s / lam - 1) <= 0.1
    flagged = any(f.code == code and f.doubtful for f in c.findings)
    assert right or flagged, (c.relaxation_time_s, [f.code for f in c.findings])


# --- the filament lifetime of a thread that fades before it parts -----------------------------

def _faded(fluid, d0, *, fps, pixel, seed, parted):
    """Camera series of the 0-D model that loses the thread below 10 px (a blurry view), its
    breakup placed after the last frame with a thread."""
    rng = np.random.default_rng(seed)
    t, d, t0 = camera_series(fluid, d0, fps=fps, pixel=pixel, noise_px=0.1, rng=rng)
    thin = np.flatnonzero((t >= t0) & ~(d >= 10.0 * pixel))
    d[thin[0]:] = np.nan
    last = np.flatnonzero(np.isfinite(d) & (t >= t0))[-1]
    t_b = float(t[last]) + 0.5 / fps
    c = characterise(t, d, surface_tension=fluid.surface_tension, pixel_size_m=pixel, fps_hz=fps,
                     free_thinning_start_s=t0, breakup_time_s=t_b, breakup_parted=parted,
                     density=fluid.density or None, seed=seed)
    true_end = t0 + filament_model(fluid, d0, duration=50.0).breakup_time_s
    return c, t_b, true_end


def test_a_faded_viscous_thread_has_its_lifetime_extrapolated():
    # visco-capillary thinning is linear to zero (Papageorgiou 1995, via docs/physics.md): the
    # law carries the last measured diameters over the sub-pixel tail to the true breakup
    fluid = Fluid(surface_tension=0.06, solvent_viscosity=1.0, density=1260.0)
    c, t_b, true_end = _faded(fluid, 1e-3, fps=5000, pixel=5e-6, seed=4, parted=False)
    assert c.regime == "visco-capillary"
    assert c.breakup_seen == "faded" and c.filament_lifetime_basis == "extrapolated"
    assert c.filament_lifetime_min_s == pytest.approx(t_b - c.free_thinning_start_s)
    assert t_b < true_end  # the observed breakup is a lower bound …
    end = c.free_thinning_start_s + c.filament_lifetime_s
    assert abs(end - true_end) <= 1.0 / 5000  # … and the extrapolation lands within a frame
    assert "breakup-faded" in {f.code for f in c.findings}


def test_a_faded_elastic_thread_has_only_a_lower_bound():
    # an elastic thread still thinning exponentially when it fades has no law to carry it to zero
    fluid = Fluid(surface_tension=0.06, solvent_viscosity=1e-3, density=1000.0,
                  polymer_modulus=2.0, relaxation_time=2e-3)
    c, t_b, _ = _faded(fluid, 1e-3, fps=20000, pixel=5e-6, seed=5, parted=False)
    assert c.regime == "elasto-capillary"
    assert c.filament_lifetime_basis == "lower-bound" and c.filament_lifetime_s is None
    assert c.filament_lifetime_min_s == pytest.approx(t_b - c.free_thinning_start_s)
    fields = c.result_fields()
    assert fields["filament_lifetime_s"] is None and fields["breakup_seen"] == "faded"


def test_a_thread_seen_parting_has_its_observed_lifetime():
    fluid = Fluid(surface_tension=0.06, solvent_viscosity=1.0, density=1260.0)
    c, t_b, _ = _faded(fluid, 1e-3, fps=5000, pixel=5e-6, seed=4, parted=True)
    assert c.breakup_seen == "parted" and c.filament_lifetime_basis == "observed"
    assert c.filament_lifetime_s == pytest.approx(t_b - c.free_thinning_start_s)
    assert c.filament_lifetime_min_s is None


@pytest.mark.slow
def test_whole_curve_fit_recovers_lambda_over_the_polymer_matrix():
    # the 0-D filament model fitted from the free-thinning start to the floor
    # (thinning.modelfit): truth is the fluid's λ, held to 1 % in every case and its
    # profile-likelihood interval covering it in at least 8 of the 10
    covered = 0
    for k, (lam, g, eta_s, rho, l2, d0, fps, pixel, noise, geometry) in enumerate(POLYMER_MATRIX):
        fluid = Fluid(0.06, eta_s, rho, g, lam, l2)
        c = run(fluid, d0, fps=fps, pixel=pixel, noise_px=noise, seed=100 + k, geometry=geometry)
        m = c.model_fit
        assert m and m.model == "viscoelastic", k
        assert m.relaxation_time_s == pytest.approx(lam, rel=0.01), k
        lo, hi = m.relaxation_time_ci95_s
        covered += lo <= lam <= hi
    assert covered >= 8


def test_whole_curve_fit_is_in_the_result_and_reads_back():
    c = run(Fluid(0.06, 1e-3, 1000.0, 2.0, 1e-3), 1e-3, fps=20000, pixel=5e-6, noise_px=0.1, seed=1)
    fields = json.loads(json.dumps(c.result_fields(), allow_nan=False))
    m = fields["model_fit"]
    assert m["model"] == "viscoelastic" and m["solvent_viscosity_fixed"] and m["describes_record"]
    assert m["relaxation_time_s"] == pytest.approx(1e-3, rel=0.02)
    lo, hi = m["relaxation_time_ci95_s"]
    assert lo < m["relaxation_time_s"] < hi
    back = Characterisation.from_fields(fields)
    assert back.model_fit.to_dict() == m


def test_newtonian_record_gets_its_viscosity_from_the_whole_curve_too():
    fluid = Fluid(0.063, 1.0, 0.0)
    t, d, t0 = camera_series(fluid, 1e-3, fps=5000, pixel=5e-6, noise_px=0.2,
                             rng=np.random.default_rng(4))
    c = characterise(t, d, surface_tension=0.063, pixel_size_m=5e-6, fps_hz=5000,
                     free_thinning_start_s=t0, seed=4)          # η not given: fitted
    assert c.regime == "visco-capillary"
    m = c.model_fit
    assert m.model == "newtonian" and not m.solvent_viscosity_fixed
    assert m.solvent_viscosity_Pa_s == pytest.approx(1.0, rel=0.03)
    lo, hi = m.solvent_viscosity_ci95_Pa_s
    assert lo < 1.0 < hi


@pytest.mark.parametrize("model_lam, model_ci, disagrees", [
    (1.10e-3, (1.08e-3, 1.12e-3), True),     # intervals apart
    (1.015e-3, (1.005e-3, 1.03e-3), False),  # intervals overlap
    (1.10e-3, (math.nan, 1.12e-3), False),   # open lower end reaches the local interval
])
def test_the_two_relaxation_times_are_compared_by_their_intervals(model_lam, model_ci, disagrees):
    from thinning.characterisation import _model_findings
    fit = ModelFit(model="viscoelastic", relaxation_time_s=model_lam, relaxation_time_ci95_s=model_ci,
                   reduced_chi2=1.0, success=True)
    found = _model_findings(fit, 1.0e-3, (0.99e-3, 1.01e-3))
    assert bool(found) == disagrees
    assert all(f.code == "model-fit-disagrees" for f in found)
    newtonian = ModelFit(model="newtonian", solvent_viscosity_Pa_s=1.0, reduced_chi2=1.0, success=True)
    assert [f.code for f in _model_findings(newtonian, 1.0e-3, (0.99e-3, 1.01e-3))] == \
        ["model-fit-disagrees"]
    # a model that does not describe the record says so, whatever its λ
    poor = ModelFit(model="newtonian", solvent_viscosity_Pa_s=1.0, reduced_chi2=7000.0, success=True)
    (note,) = _model_findings(poor, None, None)
    assert "does not describe this record" in note.message


def _sub_floor_series(*, elastic, seed, pixel=5e-6, fps=3000.0, lam=0.02, noise_px=0.02):
    """Visco-capillary thinning (Papageorgiou's law, D falls linearly) from 60 px to 2.8 px, then,
    when ``elastic``, an elasto-capillary stretch D ∝ exp(−t/3λ) wholly below the 3 px floor
    (down to 0.3 px); else the linear law goes on to breakup. Closed forms, pixel noise."""
    rng = np.random.default_rng(seed)
    d0, d_switch, speed = 60 * pixel, 2.8 * pixel, 8.5e-3          # m, m, m/s (η = 1 Pa·s)
    t_switch = (d0 - d_switch) / speed
    t = np.arange(int((t_switch + 3 * lam * np.log(d_switch / (0.3 * pixel))) * fps)) / fps
    linear = d0 - speed * t
    true = np.where(t < t_switch, linear, d_switch * np.exp(-(t - t_switch) / (3 * lam))) \
        if elastic else linear
    d = true + rng.normal(0.0, noise_px * pixel, t.size)
    d[true < 0.3 * pixel] = np.nan
    return t, d


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_elastic_stretch_below_the_floor_is_fitted_there_and_flagged(seed):
    # truth: the closed-form λ of the stretch, which lies wholly below the 3 px floor
    t, d = _sub_floor_series(elastic=True, seed=seed)
    args = dict(surface_tension=0.06, pixel_size_m=5e-6, fps_hz=3000.0, free_thinning_start_s=0.0,
                seed=seed)
    c = characterise(t, d, **args)
    assert c.regime == "elasto-capillary"
    assert c.relaxation_time_s == pytest.approx(0.02, rel=0.03)
    lo, hi = c.relaxation_time_ci95_s
    assert lo <= 0.02 <= hi
    below = [f for f in c.findings if f.code == "window-below-floor"]
    assert below and below[0].severity is Severity.DOUBTFUL
    assert c.resolution_floor_m < 3 * 5e-6
    # a caller who fixes the floor gets that floor: no stretch above it, no λ
    fixed = characterise(t, d, resolution_floor_m=15e-6, **args)
    assert fixed.regime != "elasto-capillary" and fixed.relaxation_time_s is None


def test_newtonian_thread_below_the_floor_stays_newtonian():
    # truth: Papageorgiou's linear visco-capillary law all the way down: nothing elastic below
    t, d = _sub_floor_series(elastic=False, seed=4)
    c = characterise(t, d, surface_tension=0.06, pixel_size_m=5e-6, fps_hz=3000.0,
                     free_thinning_start_s=0.0, seed=4)
    assert c.regime == "visco-capillary"
    assert "window-below-floor" not in {f.code for f in c.findings}
