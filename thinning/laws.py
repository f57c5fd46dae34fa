"""The published capillary-thinning laws and a 0-D filament model, in SI units.

One place for the physics: the synthetic recordings (:mod:`thinning.synth`)
integrate :func:`filament_model` numerically; the fits (:mod:`thinning.fits`)
use the closed-form laws below. Tests check one against the other.

Sources (see ``docs/physics.md``):

- inertio-capillary: R = X_IC (σ/ρ)^(1/3) (t_c − t)^(2/3), X_IC ≈ 0.717
  (Eggers 1997; value quoted by Eggers & Villermaux 2008);
- visco-capillary: R = 0.0709 (σ/η)(t_b − t) (Papageorgiou 1995);
- elasto-capillary: D/D0 = (G D0 / 4σ)^(1/3) exp(−t / 3λ)
  (Anna & McKinley 2001; McKinley 2005);
- finite extensibility: D ≈ (σ/η_E,∞)(t_b − t), η_E,∞ ≈ 2 η_p L²
  (Anna & McKinley 2001; Wagner, Bourouiba & McKinley 2015).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp

#: Radius coefficient of Papageorgiou's (1995) Stokes similarity solution.
PAPAGEORGIOU_COEFFICIENT = 0.0709
#: Axial force factor X of the Newtonian similarity solution (McKinley & Tripathi 2000).
NEWTONIAN_FORCE_FACTOR = 0.7127
#: Inviscid inertio-capillary prefactor X_IC (Eggers & Villermaux 2008, from memory; docs/physics.md §3.1).
INERTIO_CAPILLARY_PREFACTOR = 0.717
#: Standard gravity, m/s².
GRAVITY = 9.80665


def inertio_capillary_diameter(t, *, t_c, surface_tension, density,
                               prefactor=INERTIO_CAPILLARY_PREFACTOR):
    """Diameter (m) of an inviscid pinching neck, D = 2 X (σ/ρ)^(1/3) (t_c − t)^(2/3).

    ``t``, ``t_c`` in s; σ in N/m; ρ in kg/m³. Zero at and after ``t_c``.
    """
    tau = np.clip(t_c - np.asarray(t, dtype=float), 0.0, None)
    return 2.0 * prefactor * np.cbrt(surface_tension / density) * tau ** (2.0 / 3.0)


def visco_capillary_diameter(t, *, t_b, surface_tension, viscosity,
                             coefficient=PAPAGEORGIOU_COEFFICIENT):
    """Diameter (m) of a Newtonian thread in the Stokes regime, D = 2·0.0709 (σ/η)(t_b − t).

    ``viscosity`` is the shear viscosity in Pa·s. Zero at and after ``t_b``.
    """
    tau = np.clip(t_b - np.asarray(t, dtype=float), 0.0, None)
    return 2.0 * coefficient * surface_tension / viscosity * tau


def elasto_capillary_diameter(t, *, initial_diameter, elastic_modulus, surface_tension,
                              relaxation_time, t0=0.0):
    """Diameter (m) in the elasto-capillary regime of a dilute (Oldroyd-B) solution.

    D(t) = D0 (G D0 / 4σ)^(1/3) exp(−(t − t0) / 3λ); D0 in m, G in Pa, λ in s.
    """
    d0 = initial_diameter
    prefactor = np.cbrt(elastic_modulus * d0 / (4.0 * surface_tension))
    return d0 * prefactor * np.exp(-(np.asarray(t, dtype=float) - t0) / (3.0 * relaxation_time))


def elastic_modulus_from_intercept(fitted_diameter_at_t0, initial_diameter, surface_tension):
    """Apparent modulus G = 4σ (D_fit(t0)/D0)³ / D0 (Pa), the inverse of the EC prefactor."""
    return 4.0 * surface_tension * (fitted_diameter_at_t0 / initial_diameter) ** 3 / initial_diameter


def finite_extensibility_diameter(t, *, t_b, surface_tension, terminal_extensional_viscosity):
    """Diameter (m) in the terminal finite-extensibility regime, D = (σ/η_E,∞)(t_b − t)."""
    tau = np.clip(t_b - np.asarray(t, dtype=float), 0.0, None)
    return surface_tension / terminal_extensional_viscosity * tau


def elasto_capillary_strain_rate(relaxation_time):
    """Constant Hencky strain rate (1/s) of the elasto-capillary regime, ε̇ = 2/(3λ)."""
    return 2.0 / (3.0 * relaxation_time)


# --- dimensionless groups --------------------------------------------------------------

def rayleigh_time(radius, *, surface_tension, density):
    """Inertio-capillary (Rayleigh) time t_R = (ρ R³ / σ)^(1/2), s."""
    return np.sqrt(density * radius ** 3 / surface_tension)


def visco_capillary_time(radius, *, surface_tension, viscosity):
    """Visco-capillary time t_v = η R / σ, s."""
    return viscosity * radius / surface_tension


def ohnesorge_number(radius, *, surface_tension, density, viscosity):
    """Oh = η / (ρ σ R)^(1/2)."""
    return viscosity / np.sqrt(density * surface_tension * radius)


def deborah_number(relaxation_time, radius, *, surface_tension, density):
    """Intrinsic Deborah number De = λ / t_R."""
    return relaxation_time / rayleigh_time(radius, surface_tension=surface_tension, density=density)


def elasto_capillary_number(relaxation_time, radius, *, surface_tension, viscosity):
    """Ec = λ σ / (η R)."""
    return relaxation_time * surface_tension / (viscosity * radius)


def bond_number(radius, *, surface_tension, density):
    """Bo = ρ g R² / σ."""
    return density * GRAVITY * radius ** 2 / surface_tension


# --- the 0-D filament model ------------------------------------------------------------

@dataclass(frozen=True)
class Fluid:
    """A polymer solution for the 0-D model (SI units).

    ``polymer_modulus`` G (Pa) and ``relaxation_time`` λ (s) describe the
    dumbbells; ``extensibility`` L² (None: Oldroyd-B, infinitely extensible).
    ``polymer_modulus = 0`` gives a Newtonian liquid of viscosity
    ``solvent_viscosity``. ``density`` 0 drops inertia.
    """

    surface_tension: float
    solvent_viscosity: float
    density: float = 1000.0
    polymer_modulus: float = 0.0
    relaxation_time: float = 1.0
    extensibility: float | None = None

    @property
    def polymer_viscosity(self):
        """η_p = G λ, Pa·s."""
        return self.polymer_modulus * self.relaxation_time

    @property
    def zero_shear_viscosity(self):
        """η_0 = η_s + η_p, Pa·s."""
        return self.solvent_viscosity + self.polymer_viscosity

    @property
    def terminal_extensional_viscosity(self):
        """η_E,∞ ≈ 2 η_p L² (Pa·s), None for an Oldroyd-B fluid."""
        if self.extensibility is None or self.polymer_modulus == 0:
            return None
        return 2.0 * self.polymer_viscosity * self.extensibility


@dataclass(frozen=True)
class FilamentHistory:
    """Solution of :func:`filament_model`: times (s), neck diameter (m), axial conformation."""

    time_s: np.ndarray
    diameter_m: np.ndarray
    axial_conformation: np.ndarray
    breakup_time_s: float | None

    def diameter_at(self, t):
        """Neck diameter (m) at times ``t`` (s) by log-linear interpolation; 0 after breakup."""
        t = np.asarray(t, dtype=float)
        d = np.exp(np.interp(t, self.time_s, np.log(self.diameter_m)))
        d = np.where(t < self.time_s[0], self.diameter_m[0], d)
        if self.breakup_time_s is not None:
            d = np.where(t >= self.breakup_time_s, 0.0, d)
        return d


def _neck_speed(radius, driving_stress, fluid, inertia_coefficient):
    """−dR/dt (m/s) that balances the net capillary stress by viscous and inertial resistance.

    S = 3 η_s ε̇ + k ρ Ṙ², with ε̇ = −2Ṙ/R; k ρ Ṙ² alone gives the inertio-capillary
    law R ∝ (t_c − t)^(2/3); 3 η_s ε̇ alone with S = (2X − 1) σ/R gives Papageorgiou's.
    """
    if driving_stress <= 0.0:
        return 0.0
    b = 6.0 * fluid.solvent_viscosity / radius
    a = inertia_coefficient * fluid.density
    if a == 0.0:
        return driving_stress / b
    if b == 0.0:
        return np.sqrt(driving_stress / a)
    # root of a u² + b u − S = 0 written to avoid cancellation
    return 2.0 * driving_stress / (b + np.sqrt(b * b + 4.0 * a * driving_stress))


def filament_model(fluid: Fluid, initial_diameter, *, duration, force_factor=NEWTONIAN_FORCE_FACTOR,
                   inertio_capillary_prefactor=INERTIO_CAPILLARY_PREFACTOR,
                   initial_conformation=1.0, breakup_diameter=None, n_output=4000):
    """Integrate the 0-D model of a thinning neck from D0 at t = 0 (free thinning start).

    Force balance on the neck (our own blend of the published limits)::

        (2X − 1) σ/R − G f (A_zz − A_rr) = 3 η_s ε̇ + k ρ Ṙ²,   ε̇ = −2 Ṙ/R

    with FENE-P dumbbells (f = 1/(1 − (A_zz + 2A_rr)/L²), f = 1 for Oldroyd-B)::

        dA_zz/dt = 2 ε̇ A_zz − f (A_zz − 1)/λ,   dA_rr/dt = −ε̇ A_rr − f (A_rr − 1)/λ.

    k = (3/2)² (2X − 1) / X_IC³ makes the inviscid limit the inertio-capillary law; the
    viscous limit is Papageorgiou's with X = 0.7127; the elastic limit thins at
    ε̇ = 2/(3λ). ``initial_conformation`` is A_zz at t = 0 (pre-stretch of the
    step). Integration ends when D falls to ``breakup_diameter`` (default
    D0·1e-4) or at ``duration`` (s). Returns a :class:`FilamentHistory` on a
    grid dense in log D.
    """
    d0 = float(initial_diameter)
    r0 = d0 / 2.0
    r_end = (breakup_diameter if breakup_diameter is not None else d0 * 1e-4) / 2.0
    k = (1.5 ** 2) * (2.0 * force_factor - 1.0) / inertio_capillary_prefactor ** 3
    g = fluid.polymer_modulus
    lam = fluid.relaxation_time
    l2 = fluid.extensibility

    def rates(_t, y):
        log_r, log_azz, arr = y
        r = np.exp(log_r)
        azz = np.exp(log_azz)
        f = 1.0
        if l2 is not None:
            f = 1.0 / max(1.0 - (azz + 2.0 * arr) / l2, 1e-9)
        stress = g * f * (azz - arr)
        s = (2.0 * force_factor - 1.0) * fluid.surface_tension / r - stress
        u = _neck_speed(r, s, fluid, k)
        # with S ≤ 0 the neck holds still; keep a creeping rate so stress relaxes
        rate = 2.0 * u / r
        dlog_azz = 2.0 * rate - f * (azz - 1.0) / (lam * azz) if g > 0 else 0.0
        darr = -rate * arr - f * (arr - 1.0) / lam if g > 0 else 0.0
        return [-u / r, dlog_azz, darr]

    def reached_breakup(_t, y):
        return y[0] - np.log(r_end)

    reached_breakup.terminal = True
    reached_breakup.direction = -1

    y0 = [np.log(r0), np.log(initial_conformation), 1.0]
    sol = solve_ivp(rates, (0.0, duration), y0, method="LSODA", events=reached_breakup,
                    rtol=1e-9, atol=1e-12, dense_output=True)
    if not sol.success:
        raise RuntimeError(f"0-D filament model failed: {sol.message}")
    t_end = sol.t[-1]
    broke = bool(sol.t_events[0].size)
    t = np.unique(np.concatenate([np.linspace(0.0, t_end, n_output), sol.t]))
    y = sol.sol(t)
    return FilamentHistory(
        time_s=t,
        diameter_m=2.0 * np.exp(y[0]),
        axial_conformation=np.exp(y[1]),
        breakup_time_s=float(t_end) if broke else None,
    )
