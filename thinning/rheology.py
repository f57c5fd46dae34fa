"""Strain rate, Hencky strain, apparent extensional viscosity and dimensionless groups.

Kinematics of a slender thinning cylinder (McKinley 2005; docs/physics.md §4):
ε̇ = −2 d ln D/dt, ε = 2 ln(D0/D), and the apparent extensional viscosity in
the X = 1 convention, η_E = σ/(−dD/dt). Derivatives come from sliding
weighted line fits of ln D (:func:`thinning.kinematics.local_log_slopes`), never
from differences of raw frames.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from . import laws
from .kinematics import local_log_slopes
from .series import check_series, prepare_series

#: Columns of :func:`derived_curves`, in order.
CURVE_COLUMNS = ("time_s", "diameter_m", "strain_rate_1_s", "strain_rate_se_1_s", "hencky_strain",
                 "apparent_extensional_viscosity_Pa_s", "above_resolution_floor", "outlier", "resolved")


def derived_curves(time_s, diameter_m, *, surface_tension, initial_diameter, t_start_s=None,
                   resolution_floor_m=0.0, diameter_noise_m=None, target_rel_se=0.025) -> pd.DataFrame:
    """Per-frame kinematics of the thinning filament, one row per input frame, same order.

    Columns: ``time_s``, ``diameter_m`` (as given); ``strain_rate_1_s``
    ε̇ = −2 d ln D/dt (1/s) and its standard error ``strain_rate_se_1_s``;
    ``hencky_strain`` 2 ln(D0/D) with D0 = ``initial_diameter`` (m);
    ``apparent_extensional_viscosity_Pa_s`` σ/(−dD/dt) (X = 1, σ in N/m);
    ``above_resolution_floor`` and ``outlier`` flags; ``resolved`` marks frames
    whose rate is known to 10 % from a window centred on them (within a tenth of
    its width; not one-sided at the ends of the usable data). Rates and viscosity are
    NaN before ``t_start_s``, where there is no thread, below the floor and at
    outlier frames; the strain is NaN where there is no thread or before
    ``t_start_s``.
    """
    t, d = check_series(time_s, diameter_m)
    n = t.size
    rate = np.full(n, np.nan)
    rate_se = np.full(n, np.nan)
    visc = np.full(n, np.nan)
    resolved = np.zeros(n, dtype=bool)
    series = prepare_series(t, d, resolution_floor_m=resolution_floor_m,
                            diameter_noise_m=diameter_noise_m, t_start_s=t_start_s)
    if series.n >= 5:
        sl = local_log_slopes(series.time_s, series.diameter_m, noise_m=series.noise_m,
                              target_rel_se=target_rel_se)
        rate[series.index] = sl.strain_rate_1_s
        rate_se[series.index] = 2.0 * sl.slope_se_1_s
        speed = -sl.slope_1_s * np.exp(sl.log_diameter_fit)   # −dD/dt, m/s
        with np.errstate(divide="ignore", invalid="ignore"):
            visc[series.index] = np.where(speed > 0, surface_tension / speed, np.nan)
            centred = np.abs(0.5 * (sl.left + sl.right) - np.arange(series.n)) <= 0.1 * (sl.right - sl.left)
            resolved[series.index] = centred & (np.abs(sl.slope_se_1_s / sl.slope_1_s) <= 0.1)
    thread = np.isfinite(d) & (d > 0)
    if t_start_s is not None:
        thread &= t >= t_start_s - 1e-12
    with np.errstate(divide="ignore", invalid="ignore"):
        strain = np.where(thread, 2.0 * np.log(initial_diameter / np.where(thread, d, 1.0)), np.nan)
    outlier = np.zeros(n, dtype=bool)
    outlier[series.outlier_index] = True
    return pd.DataFrame({
        "time_s": t,
        "diameter_m": d,
        "strain_rate_1_s": rate,
        "strain_rate_se_1_s": rate_se,
        "hencky_strain": strain,
        "apparent_extensional_viscosity_Pa_s": visc,
        "above_resolution_floor": thread & (np.nan_to_num(d) >= resolution_floor_m),
        "outlier": outlier,
        "resolved": resolved,
    }, columns=list(CURVE_COLUMNS))


def extensional_viscosity_max(curves: pd.DataFrame) -> tuple[float | None, tuple | None]:
    """The largest apparent extensional viscosity (Pa·s) above the resolution floor, and its 95 %
    interval; (None, None) when there is none.

    The largest value of the ``apparent_extensional_viscosity_Pa_s`` column (a smoothed curve:
    local fits, :func:`derived_curves`) over the frames above the floor that are not outliers,
    so that the number, the file's column and the plot agree. η_E ∝ 1/(d ln D/dt), so the
    interval is η_E / (1 ± 1.96 r), r the local slope's relative standard error (an open upper
    end, NaN, when 1.96 r ≥ 1).
    """
    visc = curves["apparent_extensional_viscosity_Pa_s"].to_numpy()
    good = (curves["above_resolution_floor"].to_numpy() & ~curves["outlier"].to_numpy()
            & np.isfinite(visc))
    if not good.any():
        return None, None
    at = np.flatnonzero(good)[np.argmax(visc[good])]
    value = float(visc[at])
    rate, se = curves["strain_rate_1_s"].to_numpy()[at], curves["strain_rate_se_1_s"].to_numpy()[at]
    r = abs(se / rate) if rate and np.isfinite(se) else np.nan
    if not np.isfinite(r):
        return value, None
    half = 1.96 * r
    return value, (value / (1.0 + half), value / (1.0 - half) if half < 1.0 else float("nan"))


def dimensionless_groups(*, initial_diameter, surface_tension, density=None, viscosity=None,
                         relaxation_time=None) -> dict:
    """Ohnesorge, Deborah, elasto-capillary and Bond numbers at R0 = D0/2 (None where not computable).

    ``viscosity`` is the zero-shear viscosity η0 (Pa·s), ``density`` ρ
    (kg/m³), ``relaxation_time`` λ (s). Also the Rayleigh and visco-capillary
    times (s). Definitions: docs/physics.md §2 (McKinley 2005; Rodd et al. 2005).
    """
    r0 = 0.5 * float(initial_diameter)
    sigma = float(surface_tension)
    has_rho = density is not None and density > 0
    has_eta = viscosity is not None and viscosity > 0
    has_lam = relaxation_time is not None and relaxation_time > 0
    out = {"ohnesorge_number": None, "deborah_number": None, "elasto_capillary_number": None,
           "bond_number": None, "rayleigh_time_s": None, "visco_capillary_time_s": None}
    if has_rho:
        out["rayleigh_time_s"] = float(laws.rayleigh_time(r0, surface_tension=sigma, density=density))
        out["bond_number"] = float(laws.bond_number(r0, surface_tension=sigma, density=density))
    if has_eta:
        out["visco_capillary_time_s"] = float(laws.visco_capillary_time(r0, surface_tension=sigma,
                                                                          viscosity=viscosity))
    if has_rho and has_eta:
        out["ohnesorge_number"] = float(laws.ohnesorge_number(r0, surface_tension=sigma,
                                                              density=density, viscosity=viscosity))
    if has_lam and has_rho:
        out["deborah_number"] = float(laws.deborah_number(relaxation_time, r0, surface_tension=sigma,
                                                          density=density))
    if has_lam and has_eta:
        out["elasto_capillary_number"] = float(laws.elasto_capillary_number(
            relaxation_time, r0, surface_tension=sigma, viscosity=viscosity))
    return out
