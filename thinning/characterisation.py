"""From a minimum-diameter series to regimes and rheology numbers: the one entry point.

:func:`characterise` locates the regimes (:mod:`thinning.regimes`), fits the
laws (:mod:`thinning.fits`), derives the per-frame curves and dimensionless
groups (:mod:`thinning.rheology`) and says what may make the numbers
untrustworthy (:class:`thinning.findings.Finding`). Pure: arrays in, a
:class:`Characterisation` out.
"""

from __future__ import annotations

import dataclasses
import logging
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from . import regimes as rg
from .checks import Code, Finding, Severity
from .fits import (Fit, estimate_breakup_time, fit_elastocapillary, fit_finite_extensibility,
                   fit_inertiocapillary, fit_viscocapillary)
from .modelfit import ModelFit, fit_filament_model
from .series import check_series
from .uncertainty import (elastic_modulus_budget, model_fit_budget, relaxation_time_budget,
                          shear_viscosity_budget)
from .units import GEOMETRIES
from .rheology import derived_curves, dimensionless_groups, extensional_viscosity_max

logger = logging.getLogger(__name__)

UNDETERMINED = "undetermined"
#: Resolution floor in pixels (docs/physics.md §8: widths below ~3 blur sizes are biased).
FLOOR_PIXELS = 3.0
#: Fewer frames than this in the headline window make the number doubtful (docs/contract.md).
MIN_WINDOW_FRAMES = 10
#: Frames above the floor beyond which the whole-curve fit takes every k-th one (its cost).
MODEL_MAX_POINTS = 1500
#: Bond number above which gravity may sag the bridge (Warwaruk et al. 2025: Bo > 0.5).
SAGGING_BOND_NUMBER = 0.5
#: An elastic window ended by the floor is doubtful when D falls by less than this inside it.
MIN_FLOOR_CUT_DECREASE = 3.0
#: The sub-floor (in pixels) down to which an elastic stretch not seen above the floor is
#: sought: the integrated shadow of a thread narrower than the blur still scales with its
#: width, down to about one pixel (measured on both test renderers, DEVELOPERS.md).
SUB_FLOOR_PIXELS = 1.0
#: ... and at least this many times the diameter noise (each point then within 10 %).
SUB_FLOOR_NOISE = 10.0


@dataclass(frozen=True)
class Characterisation:
    """Regimes and rheology numbers of one record (SI units, None where not applicable)."""

    regime: str
    regimes: list
    relaxation_time_s: float | None
    relaxation_time_ci95_s: tuple | None
    fit_window_s: tuple | None
    fit_window_frames: int | None
    free_thinning_start_s: float
    initial_diameter_m: float | None
    elastic_modulus_Pa: float | None
    shear_viscosity_Pa_s: float | None
    extensional_viscosity_max_Pa_s: float | None
    extensional_viscosity_terminal_Pa_s: float | None
    breakup_time_s: float | None
    filament_lifetime_s: float | None
    trouton_ratio_max: float | None
    finite_extensibility_L2: float | None
    groups: dict
    resolution_floor_m: float
    diameter_noise_m: float | None
    fits: dict = field(default_factory=dict)
    curves: pd.DataFrame = field(default_factory=pd.DataFrame)
    findings: list = field(default_factory=list)
    breakup_seen: str | None = None
    filament_lifetime_basis: str | None = None
    filament_lifetime_min_s: float | None = None
    model_fit: ModelFit | None = None
    #: Result key → {term: relative 95 % half-width} (:mod:`thinning.uncertainty`).
    uncertainty_budget: dict = field(default_factory=dict)
    elastic_modulus_ci95_Pa: tuple | None = None
    shear_viscosity_ci95_Pa_s: tuple | None = None
    extensional_viscosity_max_ci95_Pa_s: tuple | None = None

    @property
    def ohnesorge_number(self):
        return self.groups.get("ohnesorge_number")

    @property
    def deborah_number(self):
        return self.groups.get("deborah_number")

    @property
    def elasto_capillary_number(self):
        return self.groups.get("elasto_capillary_number")

    @property
    def bond_number(self):
        return self.groups.get("bond_number")

    def result_fields(self) -> dict:
        """The rheology keys of ``result.json`` (docs/contract.md), plus extras; JSON-ready, no NaN."""
        def num(v):
            if v is None:
                return None
            v = float(v)
            return v if np.isfinite(v) else None

        def pair(p):
            if p is None:
                return None
            a, b = num(p[0]), num(p[1])
            return None if a is None or b is None else [a, b]

        out = {
            "regime": self.regime,
            "regimes": [r.to_dict() for r in self.regimes],
            "relaxation_time_s": num(self.relaxation_time_s),
            "relaxation_time_ci95_s": pair(self.relaxation_time_ci95_s),
            "fit_window_s": pair(self.fit_window_s),
            "fit_window_frames": None if self.fit_window_frames is None else int(self.fit_window_frames),
            "free_thinning_start_s": num(self.free_thinning_start_s),
            "initial_diameter_m": num(self.initial_diameter_m),
            "elastic_modulus_Pa": num(self.elastic_modulus_Pa),
            "shear_viscosity_Pa_s": num(self.shear_viscosity_Pa_s),
            "extensional_viscosity_max_Pa_s": num(self.extensional_viscosity_max_Pa_s),
            "extensional_viscosity_terminal_Pa_s": num(self.extensional_viscosity_terminal_Pa_s),
            "breakup_time_s": num(self.breakup_time_s),
            "filament_lifetime_s": num(self.filament_lifetime_s),
            "breakup_seen": self.breakup_seen,
            "filament_lifetime_basis": self.filament_lifetime_basis,
            "filament_lifetime_min_s": num(self.filament_lifetime_min_s),
            "trouton_ratio_max": num(self.trouton_ratio_max),
            "finite_extensibility_L2": num(self.finite_extensibility_L2),
            "resolution_floor_m": num(self.resolution_floor_m),
            "diameter_noise_m": num(self.diameter_noise_m),
        }
        for key in GROUP_KEYS:
            out[key] = num(self.groups.get(key))
        out["fits"] = {name: f.to_dict() for name, f in self.fits.items()}
        out["model_fit"] = self.model_fit.to_dict() if self.model_fit else None
        out["uncertainty_budget"] = {key: {term: num(v) for term, v in terms.items()}
                                     for key, terms in self.uncertainty_budget.items()}
        out["elastic_modulus_ci95_Pa"] = pair(self.elastic_modulus_ci95_Pa)
        out["shear_viscosity_ci95_Pa_s"] = pair(self.shear_viscosity_ci95_Pa_s)
        out["extensional_viscosity_max_ci95_Pa_s"] = pair(self.extensional_viscosity_max_ci95_Pa_s)
        return out

    @classmethod
    def from_fields(cls, data: dict) -> "Characterisation":
        """The characterisation read back from the rheology keys of ``result.json`` (see
        :meth:`result_fields`; missing keys are None): no curves, no findings, fits without
        their residuals and law arguments."""
        def pair(p):
            return None if p is None else tuple(p)

        frames = data.get("fit_window_frames")
        return cls(
            regime=data.get("regime") or UNDETERMINED,
            regimes=[rg.Regime.from_dict(r) for r in data.get("regimes") or []],
            relaxation_time_s=data.get("relaxation_time_s"),
            relaxation_time_ci95_s=pair(data.get("relaxation_time_ci95_s")),
            fit_window_s=pair(data.get("fit_window_s")),
            fit_window_frames=None if frames is None else int(frames),
            free_thinning_start_s=data.get("free_thinning_start_s"),
            initial_diameter_m=data.get("initial_diameter_m"),
            elastic_modulus_Pa=data.get("elastic_modulus_Pa"),
            shear_viscosity_Pa_s=data.get("shear_viscosity_Pa_s"),
            extensional_viscosity_max_Pa_s=data.get("extensional_viscosity_max_Pa_s"),
            extensional_viscosity_terminal_Pa_s=data.get("extensional_viscosity_terminal_Pa_s"),
            breakup_time_s=data.get("breakup_time_s"),
            filament_lifetime_s=data.get("filament_lifetime_s"),
            breakup_seen=data.get("breakup_seen"),
            filament_lifetime_basis=data.get("filament_lifetime_basis"),
            filament_lifetime_min_s=data.get("filament_lifetime_min_s"),
            trouton_ratio_max=data.get("trouton_ratio_max"),
            finite_extensibility_L2=data.get("finite_extensibility_L2"),
            groups={key: data.get(key) for key in GROUP_KEYS},
            resolution_floor_m=data.get("resolution_floor_m"),
            diameter_noise_m=data.get("diameter_noise_m"),
            fits={name: Fit.from_dict(f) for name, f in (data.get("fits") or {}).items()},
            model_fit=ModelFit.from_dict(data["model_fit"]) if data.get("model_fit") else None,
            uncertainty_budget=dict(data.get("uncertainty_budget") or {}),
            elastic_modulus_ci95_Pa=pair(data.get("elastic_modulus_ci95_Pa")),
            shear_viscosity_ci95_Pa_s=pair(data.get("shear_viscosity_ci95_Pa_s")),
            extensional_viscosity_max_ci95_Pa_s=pair(data.get("extensional_viscosity_max_ci95_Pa_s")))

    def interval(self, key: str):
        """The 95 % interval ``(low, high)`` behind the headline number ``key`` (a
        ``result.json`` key), taken from the fit that gave it; None when there is none."""
        if key == "relaxation_time_s":
            return self.relaxation_time_ci95_s
        if key == "elastic_modulus_Pa" and self.elastic_modulus_ci95_Pa is not None:
            return tuple(self.elastic_modulus_ci95_Pa) if self.regime == rg.ELASTO_CAPILLARY else None
        if key == "shear_viscosity_Pa_s" and self.shear_viscosity_ci95_Pa_s is not None:
            return tuple(self.shear_viscosity_ci95_Pa_s)
        if key == "extensional_viscosity_max_Pa_s":
            ci = self.extensional_viscosity_max_ci95_Pa_s
            return None if ci is None or not all(np.isfinite(ci)) else tuple(ci)
        source = _INTERVAL_SOURCES.get(key)
        if source is None:
            return None
        fit = self.fits.get(source[0])
        if not fit or (key == "elastic_modulus_Pa" and self.regime != rg.ELASTO_CAPILLARY):
            return None
        interval = fit.ci95.get(source[1])
        if interval is None or not all(np.isfinite(interval)):
            return None
        return tuple(float(v) for v in interval)


#: Headline key → (fit, value name) whose interval it carries.
_INTERVAL_SOURCES = {
    "elastic_modulus_Pa": ("elasto-capillary", "elastic_modulus_Pa"),
    "shear_viscosity_Pa_s": ("visco-capillary", "shear_viscosity_Pa_s"),
    "extensional_viscosity_terminal_Pa_s": ("finite-extensibility", "terminal_extensional_viscosity_Pa_s"),
}
#: The dimensionless groups written to ``result.json``.
GROUP_KEYS = ("ohnesorge_number", "deborah_number", "elasto_capillary_number", "bond_number")


def _check_inputs(time_s, diameter_m, *, surface_tension, pixel_size_m, fps_hz, geometry):
    t, d = check_series(time_s, diameter_m)
    for name, v in (("surface_tension", surface_tension), ("pixel_size_m", pixel_size_m),
                    ("fps_hz", fps_hz)):
        if not (v is not None and np.isfinite(v) and v > 0):
            raise ValueError(f"{name} must be a positive number, got {v!r}")
    if geometry not in GEOMETRIES:
        raise ValueError(f"geometry must be one of {GEOMETRIES}, got {geometry!r}")
    return t, d


def _initial_diameter(t, d, t0, outliers):
    """D0: the diameter of the first frame with a thread at or after ``t0`` that is not an outlier."""
    good = np.isfinite(d) & (d > 0) & (t >= t0 - 1e-12)
    good[outliers] = False
    ok = np.flatnonzero(good)
    if ok.size == 0:
        return None
    return float(d[ok[np.argmin(t[ok])]])


def _longest(regs, kind):
    pick = [r for r in regs if r.kind == kind]
    if not pick:
        return None
    return max(pick, key=lambda r: (np.log(r.diameter_start_m / r.diameter_end_m), r.n_frames))


def characterise(time_s, diameter_m, *, surface_tension, pixel_size_m, fps_hz,
                 free_thinning_start_s, breakup_time_s=None, density=None, solvent_viscosity=None,
                 zero_shear_viscosity=None, geometry="plates", seed: int, diameter_noise_m=None,
                 resolution_floor_m=None, breakup_parted=None,
                 pixel_size_rel=0.0) -> Characterisation:
    """Regimes, relaxation time, viscosities and quality findings of one diameter series.

    As :func:`characterise_at_floor`; with the default floor (3 pixel sizes), a record
    whose elasto-capillary stretch is not found above it, or only its unsettled start,
    is characterised again down to the sub-floor (:func:`sub_floor`). When that finds
    a (settled) elasto-capillary stretch, that characterisation stands, its floor is
    the sub-floor and the finding ``window-below-floor`` makes it doubtful: widths
    under a few pixels rest on the thread's integrated shadow, not on resolved edges
    (docs/physics.md §8).
    """
    args = dict(surface_tension=surface_tension, pixel_size_m=pixel_size_m, fps_hz=fps_hz,
                free_thinning_start_s=free_thinning_start_s, breakup_time_s=breakup_time_s,
                density=density, solvent_viscosity=solvent_viscosity,
                zero_shear_viscosity=zero_shear_viscosity, geometry=geometry, seed=seed,
                diameter_noise_m=diameter_noise_m, breakup_parted=breakup_parted,
                pixel_size_rel=pixel_size_rel)
    first = characterise_at_floor(time_s, diameter_m, resolution_floor_m=resolution_floor_m, **args)
    unsettled = Code.ELASTIC_NOT_SETTLED in {f.code for f in first.findings}
    if resolution_floor_m is not None or (first.regime == rg.ELASTO_CAPILLARY and not unsettled):
        return first
    floor = sub_floor(pixel_size_m, first.diameter_noise_m)
    if not floor < first.resolution_floor_m:
        return first
    below = characterise_at_floor(time_s, diameter_m, resolution_floor_m=floor, **args)
    if below.regime != rg.ELASTO_CAPILLARY or \
            Code.ELASTIC_NOT_SETTLED in {f.code for f in below.findings}:
        return first
    lo, hi = below.fit_window_s
    moved = "" if first.regime != rg.ELASTO_CAPILLARY else \
        " (the stretch above it was only the unsettled passage from viscous to elastic thinning)"
    finding = Finding(
        Code.WINDOW_BELOW_FLOOR, Severity.DOUBTFUL,
        f"The elasto-capillary stretch lies below the resolution floor "
        f"({first.resolution_floor_m * 1e6:.3g} µm){moved}: λ comes from widths down to "
        f"{floor * 1e6:.3g} µm, read from the thread's integrated shadow rather than resolved "
        f"edges, so it is less certain than its interval says; film at higher magnification.",
        (lo, hi))
    return dataclasses.replace(below, findings=[*below.findings, finding])


def sub_floor(pixel_size_m: float, diameter_noise_m: float | None) -> float:
    """The lowest width (m) a sub-floor elastic stretch is fitted to: one pixel, or
    :data:`SUB_FLOOR_NOISE` times the diameter noise when that is larger."""
    noise = diameter_noise_m if diameter_noise_m is not None and np.isfinite(diameter_noise_m) else 0.0
    return max(SUB_FLOOR_PIXELS * pixel_size_m, SUB_FLOOR_NOISE * noise)


def characterise_at_floor(time_s, diameter_m, *, surface_tension, pixel_size_m, fps_hz,
                          free_thinning_start_s, breakup_time_s=None, density=None,
                          solvent_viscosity=None, zero_shear_viscosity=None, geometry="plates",
                          seed: int, diameter_noise_m=None, resolution_floor_m=None,
                          breakup_parted=None, pixel_size_rel=0.0) -> Characterisation:
    """Regimes, relaxation time, viscosities and quality findings of one diameter series,
    every fit stopping at one resolution floor.

    ``time_s`` (s, recording clock) and ``diameter_m`` (m, NaN where no thread)
    are per frame; frames before ``free_thinning_start_s`` are ignored. σ in
    N/m, ρ in kg/m³, viscosities in Pa·s (all optional but σ). The resolution
    floor defaults to 3 pixel sizes; ``diameter_noise_m`` is estimated from the
    data when None. ``breakup_time_s`` None: estimated from the record (None
    when the filament never broke). ``breakup_parted`` False: the thread
    faded below the optical resolution before it was seen to part, so the
    breakup time is a lower bound and the lifetime is extrapolated by a
    fitted law that reaches the last measured frames, or else left empty
    (:func:`filament_lifetime`); None or True: the breakup was seen.
    ``seed`` seeds the bootstrap. ``pixel_size_rel`` is the pixel size's relative
    uncertainty (95 %; 0 for a given pixel size, taken as exact), a term of the
    uncertainty budget (:mod:`thinning.uncertainty`).
    ``geometry`` ("plates" or "dripping") is checked and recorded: the
    elasto-capillary prefactor is the same for both (D0 = 2R0, docs/physics.md
    §3.3), so the numbers are computed alike.
    """
    t, d = _check_inputs(time_s, diameter_m, surface_tension=surface_tension,
                         pixel_size_m=pixel_size_m, fps_hz=fps_hz, geometry=geometry)
    t0 = float(free_thinning_start_s)
    floor = FLOOR_PIXELS * pixel_size_m if resolution_floor_m is None else float(resolution_floor_m)
    findings: list[Finding] = []
    t_b = breakup_time_s if breakup_time_s is not None else estimate_breakup_time(t, d, t_start_s=t0)
    ra = rg.analyse_regimes(t, d, resolution_floor_m=floor, diameter_noise_m=diameter_noise_m,
                            t_start_s=t0)
    d0 = _initial_diameter(t, d, t0, ra.series.outlier_index)
    regs = ra.regimes
    noise = ra.series.noise_m if ra.series.n else diameter_noise_m
    d_fit = d.copy()
    d_fit[ra.series.outlier_index] = np.nan  # the fits never see beads or spikes
    common = dict(diameter_noise_m=noise, resolution_floor_m=floor)
    polymer_viscosity = None
    if zero_shear_viscosity is not None and solvent_viscosity is not None:
        polymer_viscosity = zero_shear_viscosity - solvent_viscosity
        if not polymer_viscosity > 0:
            polymer_viscosity = None

    fits: dict[str, Fit] = {}
    ec, vc = _longest(regs, rg.ELASTO_CAPILLARY), _longest(regs, rg.VISCO_CAPILLARY)
    ic, fe = _longest(regs, rg.INERTIO_CAPILLARY), _longest(regs, rg.FINITE_EXTENSIBILITY)
    if ec is not None and d0 is not None:
        fits["elasto-capillary"] = fit_elastocapillary(
            t, d_fit, window_s=(ec.t_start_s, ec.t_end_s), surface_tension=surface_tension,
            initial_diameter=d0, t0=t0, seed=seed, **common)
    if vc is not None:
        fits["visco-capillary"] = fit_viscocapillary(
            t, d_fit, window_s=(vc.t_start_s, vc.t_end_s), surface_tension=surface_tension,
            seed=seed + 1, **common)
    if ic is not None:
        fits["inertio-capillary"] = fit_inertiocapillary(
            t, d_fit, window_s=(ic.t_start_s, ic.t_end_s), surface_tension=surface_tension,
            density=density, seed=seed + 2, **common)
    if fe is not None:
        fits["finite-extensibility"] = fit_finite_extensibility(
            t, d_fit, window_s=(fe.t_start_s, fe.t_end_s), surface_tension=surface_tension,
            polymer_viscosity=polymer_viscosity, seed=seed + 3, **common)

    # the elastic stretch heads when there is one; else the Newtonian law that covers the larger
    # fall of ln D (a few frames of one law near the floor do not outrank a record of the other)
    newtonian = sorted(((kind, reg) for kind, reg in ((rg.VISCO_CAPILLARY, vc), (rg.INERTIO_CAPILLARY, ic))
                        if fits.get(kind)),
                       key=lambda kr: -np.log(kr[1].diameter_start_m / kr[1].diameter_end_m))
    headline, head_fit, head_regime = UNDETERMINED, None, None
    for kind, reg in [(rg.ELASTO_CAPILLARY, ec)] + newtonian:
        f = fits.get(kind)
        if f:
            headline, head_fit, head_regime = kind, f, reg
            break

    lam = lam_ci = g = None
    if headline == rg.ELASTO_CAPILLARY:
        lam = head_fit.values["relaxation_time_s"]
        lam_ci = head_fit.ci95["relaxation_time_s"]
        if not all(np.isfinite(lam_ci)):
            lam_ci = None
        g = head_fit.values["elastic_modulus_Pa"]
    eta_shear = fits["visco-capillary"].values["shear_viscosity_Pa_s"] if fits.get("visco-capillary") else None
    fe_fit = fits.get("finite-extensibility")
    eta_terminal = fe_fit.values["terminal_extensional_viscosity_Pa_s"] if fe_fit else None
    l2 = fe_fit.values.get("finite_extensibility_L2") if fe_fit else None

    curves = derived_curves(t, d, surface_tension=surface_tension,
                            initial_diameter=d0 if d0 is not None else np.nan, t_start_s=t0,
                            resolution_floor_m=floor, diameter_noise_m=noise)
    eta_max, eta_max_ci = extensional_viscosity_max(curves)

    eta0 = zero_shear_viscosity
    if eta0 is None and solvent_viscosity is not None:
        eta0 = solvent_viscosity
        findings.append(Finding(Code.VISCOSITY_FALLBACK, Severity.NOTE,
                                "No zero-shear viscosity was given, so the solvent viscosity stands in "
                                "for it in the Trouton ratio and the Ohnesorge number."))
    elif eta0 is None and eta_shear is not None:
        eta0 = eta_shear
    trouton = eta_max / eta0 if (eta_max is not None and eta0) else None
    groups = dimensionless_groups(initial_diameter=d0 if d0 is not None else np.nan,
                                  surface_tension=surface_tension, density=density, viscosity=eta0,
                                  relaxation_time=lam) if d0 is not None else \
        dimensionless_groups(initial_diameter=np.nan, surface_tension=surface_tension)

    whole = dict(surface_tension=surface_tension, floor=floor, noise=noise, density=density,
                 solvent_viscosity=solvent_viscosity, seed=seed)
    model_fit = _whole_curve_fit(t, d_fit, fits.get(rg.ELASTO_CAPILLARY), t0=t0, **whole)
    if not (model_fit and model_fit.describes_record) and regs \
            and regs[0].t_start_s > t0:
        # the model does not describe the record from the free-thinning start (a drop that
        # spreads on its substrate before its neck is a free filament): from where the first
        # thinning law holds instead, if that describes it
        later = _whole_curve_fit(t, d_fit, fits.get(rg.ELASTO_CAPILLARY), t0=regs[0].t_start_s,
                                 **whole)
        if later and later.describes_record:
            model_fit = later
    findings += _model_findings(model_fit, lam, lam_ci)
    budget, g_ci, eta_ci = {}, None, None
    common_budget = dict(noise_m=noise, floor_m=floor, pixel_size_m=pixel_size_m)
    if headline == rg.ELASTO_CAPILLARY and lam_ci is not None:
        lam_budget = relaxation_time_budget(t, d_fit, head_fit, model_fit=model_fit, **common_budget)
        if all(np.isfinite(lam_budget.interval)):
            lam_ci = lam_budget.interval
            budget["relaxation_time_s"] = lam_budget.terms
            if d0 is not None:
                g_budget = elastic_modulus_budget(head_fit, lam_budget, initial_diameter_m=d0,
                                                  pixel_size_m=pixel_size_m,
                                                  pixel_size_rel=pixel_size_rel)
                if all(np.isfinite(g_budget.interval)):
                    g_ci, budget["elastic_modulus_Pa"] = g_budget.interval, g_budget.terms
    if eta_shear is not None:
        eta_budget = shear_viscosity_budget(t, d_fit, fits["visco-capillary"], model_fit=model_fit,
                                            pixel_size_rel=pixel_size_rel, **common_budget)
        if all(np.isfinite(eta_budget.interval)):
            eta_ci, budget["shear_viscosity_Pa_s"] = eta_budget.interval, eta_budget.terms
    if model_fit:
        # the whole-curve interval gains the systematic terms its likelihood leaves out (after
        # the budgets above, which add the fit's own statistical half-width to theirs)
        widened = model_fit_budget(t, d_fit, model_fit, pixel_size_rel=pixel_size_rel,
                                   **common_budget)
        if widened is not None and all(np.isfinite(widened[0].interval)):
            model_budget, key = widened
            model_fit = dataclasses.replace(model_fit, **{key: tuple(model_budget.interval)})
            budget["model_fit"] = model_budget.terms
    lifetime, basis, lifetime_min, law = filament_lifetime(
        t, d_fit, t0, t_b, breakup_parted, fits, fps_hz=fps_hz, surface_tension=surface_tension)
    if basis is not None and basis != "observed":
        done = (f"the filament lifetime, {lifetime * 1e3:.4g} ms, is extrapolated with the {law} law "
                "fitted up to the last measured frames" if basis == "extrapolated" else
                f"the filament lifetime is at least {lifetime_min * 1e3:.4g} ms and is left empty: "
                "no fitted law reaches the last measured frames to extrapolate it")
        findings.append(Finding(Code.BREAKUP_FADED, Severity.NOTE,
            f"The thread faded below the optical resolution before it was seen to part: the "
            f"breakup came at {t_b * 1e3:.4g} ms or later, and {done}."))
    findings += _findings(ra, regs, headline, head_fit, head_regime, t_b=t_b, fps_hz=fps_hz,
                          floor=floor, groups=groups, lam=lam)
    return Characterisation(
        regime=headline, regimes=regs, relaxation_time_s=lam,
        relaxation_time_ci95_s=None if lam_ci is None else tuple(lam_ci),
        fit_window_s=None if head_fit is None else head_fit.window_s,
        fit_window_frames=None if head_fit is None else head_fit.n_points,
        free_thinning_start_s=t0, initial_diameter_m=d0, elastic_modulus_Pa=g,
        shear_viscosity_Pa_s=eta_shear, extensional_viscosity_max_Pa_s=eta_max,
        extensional_viscosity_terminal_Pa_s=eta_terminal, breakup_time_s=t_b,
        filament_lifetime_s=lifetime, trouton_ratio_max=trouton, finite_extensibility_L2=l2,
        groups=groups, resolution_floor_m=floor, diameter_noise_m=noise, fits=fits, curves=curves,
        findings=findings, breakup_seen=None if t_b is None else
        ("faded" if breakup_parted is False else "parted"),
        filament_lifetime_basis=basis, filament_lifetime_min_s=lifetime_min, model_fit=model_fit,
        uncertainty_budget=budget, elastic_modulus_ci95_Pa=g_ci, shear_viscosity_ci95_Pa_s=eta_ci,
        extensional_viscosity_max_ci95_Pa_s=eta_max_ci)


def _whole_curve_fit(t, d, ec_fit, *, surface_tension, t0, floor, noise, density, solvent_viscosity,
                     seed) -> ModelFit | None:
    """The 0-D filament model fitted from the free-thinning start to the floor
    (:func:`thinning.modelfit.fit_filament_model`), started from the local-slope
    elasto-capillary fit when there is one; None when no fit could be made."""
    start = None
    if ec_fit:
        a, b = ec_fit.window_s
        inside = np.isfinite(d) & (t >= a - 1e-12) & (t <= b + 1e-12)
        if inside.any():
            start = {"relaxation_time_s": ec_fit.values["relaxation_time_s"], "window_s": (a, b),
                     "diameter_at_window_start_m": float(d[np.flatnonzero(inside)[0]])}
    usable = np.flatnonzero((t >= t0 - 1e-12) & np.isfinite(d) & (d >= floor))
    if usable.size > MODEL_MAX_POINTS:
        # every k-th frame of a long record: the fit's cost grows with the points, and its
        # whitening of correlated noise allows for the gaps (its statistical interval widens
        # by about √k, still far inside the budget's other terms on such records)
        step = int(np.ceil(usable.size / MODEL_MAX_POINTS))
        keep = np.zeros(t.size, dtype=bool)
        keep[usable[::step]] = True
        d = np.where(keep | (t < t0 - 1e-12), d, np.nan)
    try:
        fit = fit_filament_model(t, d, surface_tension=surface_tension, t_start_s=t0,
                                 resolution_floor_m=floor, noise_m=noise, density=density,
                                 solvent_viscosity=solvent_viscosity, start=start, seed=seed)
    except (ArithmeticError, np.linalg.LinAlgError) as exc:  # the record stands without it
        logger.warning("the whole-curve model fit failed: %s", exc)
        return None
    return fit if fit else None


def _model_findings(model_fit, lam, lam_ci):
    """A note when the whole-curve model does not describe the record, when its λ and the
    local-slope λ disagree beyond both (statistical) intervals, or when only one of the two sees
    elasticity."""
    if model_fit is None:
        return []
    if not model_fit.describes_record:
        return [Finding(Code.MODEL_FIT_DISAGREES, Severity.NOTE,
                        f"The whole-curve filament model ({model_fit.model}) does not describe this "
                        f"record (reduced χ² {model_fit.reduced_chi2:.3g}): its numbers are left out "
                        "of the uncertainty budget.")]
    if lam is None:
        return []
    model_lam = model_fit.relaxation_time_s if model_fit.model == "viscoelastic" else None
    if model_lam is None or not np.isfinite(model_lam):
        return [Finding(Code.MODEL_FIT_DISAGREES, Severity.NOTE,
                        f"The local-slope fit gives λ = {lam * 1e3:.4g} ms, but the whole-curve "
                        "filament model fits the record better without elasticity.")]
    lo, hi = model_fit.relaxation_time_ci95_s
    lo = lo if np.isfinite(lo) else -np.inf
    hi = hi if np.isfinite(hi) else np.inf
    a, b = lam_ci if lam_ci is not None else (lam, lam)
    if hi < a or b < lo:
        return [Finding(Code.MODEL_FIT_DISAGREES, Severity.NOTE,
                        f"The whole-curve filament model gives λ = {model_lam * 1e3:.4g} ms, the "
                        f"local-slope fit {lam * 1e3:.4g} ms: their 95 % intervals do not overlap, "
                        "so one of them is off (the thread may not follow the model, or the "
                        "window may miss the settled elastic stretch).")]
    return []


#: The time (s) a law's neck of diameter D (m) still has before breakup, from its fit's values:
#: D = v (t_b − t) visco-capillary (v the thinning speed), D = A (t_c − t)^(2/3)
#: inertio-capillary, D = (σ/η_E,∞)(t_b − t) finite-extensibility (docs/physics.md).
_REMAINING = {
    "visco-capillary": lambda d, v, sigma: d / v["thinning_speed_m_s"],
    "inertio-capillary": lambda d, v, sigma: (d / v["prefactor_m_s23"]) ** 1.5,
    "finite-extensibility": lambda d, v, sigma: d * v["terminal_extensional_viscosity_Pa_s"] / sigma,
}
#: A law extrapolates a faded thread's breakup only when its window ends this close to the
#: last measured frame (fraction of the lifetime; at least EXTRAPOLATION_FRAMES frames).
EXTRAPOLATION_REACH = 0.25
EXTRAPOLATION_FRAMES = 5
#: Last measured frames whose extrapolations are pooled (median).
EXTRAPOLATION_ANCHORS = 3


def filament_lifetime(t, d, t0, t_b, parted, fits, *, fps_hz, surface_tension):
    """``(lifetime s, basis, lower bound s, law)`` of a record with breakup ``t_b`` (s).

    ``basis`` is ``"observed"`` (the thread was seen to part, or ``parted``
    is None); ``"extrapolated"`` (it faded: among the visco-capillary,
    inertio-capillary and finite-extensibility fits whose window reaches the
    last measured frames, the one that ends last carries each of the last
    measured diameters to zero at its own rate, and the median of those
    breakups counts, never before ``t_b``); or ``"lower-bound"`` (it faded and
    no law reaches: the lifetime is None and ``t_b − t0`` its lower bound).
    All None without a breakup.
    """
    if t_b is None:
        return None, None, None, None
    if parted is not False:
        return t_b - t0, "observed", None, None
    measured = np.flatnonzero(np.isfinite(d) & (d > 0) & (t >= t0) & (t <= t_b))
    if measured.size == 0:
        return None, "lower-bound", t_b - t0, None
    last = float(t[measured[-1]])
    reach = max(EXTRAPOLATION_FRAMES / fps_hz, EXTRAPOLATION_REACH * (t_b - t0))
    laws = [(fits[name].window_s[1], name) for name in _REMAINING
            if fits.get(name) and fits[name].window_s[1] >= last - reach]
    if not laws:
        return None, "lower-bound", t_b - t0, None
    name = max(laws)[1]
    anchors = measured[-EXTRAPOLATION_ANCHORS:]
    with np.errstate(invalid="ignore", divide="ignore"):
        ends = t[anchors] + _REMAINING[name](d[anchors], fits[name].values, surface_tension)
    end = float(np.median(ends))
    if not np.isfinite(end):
        return None, "lower-bound", t_b - t0, None
    return max(end, t_b) - t0, "extrapolated", t_b - t0, name


#: A Newtonian fit whose predicted breakup comes earlier than observed by more than this
#: fraction of its own predicted remaining life flags elastic arrest below the floor.
LATE_BREAKUP_FRACTION = 0.5


def _findings(ra, regs, headline, head_fit, head_regime, *, t_b, fps_hz, floor, groups, lam):
    out = []
    series = ra.series
    if headline == UNDETERMINED:
        out.append(Finding(Code.NO_USABLE_REGIME, Severity.DOUBTFUL,
                           "No thinning regime could be located in the record, so no rheology "
                           "number from it can be trusted."))
    elif headline != rg.ELASTO_CAPILLARY:
        out.append(Finding(Code.NO_ELASTIC_REGIME, Severity.NOTE,
                           f"No elasto-capillary stretch was found: the liquid thinned like a "
                           f"Newtonian one ({headline}), so there is no relaxation time."))
    if head_fit is not None and head_fit.n_points < MIN_WINDOW_FRAMES:
        what = ("the frame rate is too low for this relaxation time"
                if headline == rg.ELASTO_CAPILLARY else "the frame rate is too low for this liquid")
        out.append(Finding(Code.FEW_FRAMES_IN_WINDOW, Severity.DOUBTFUL,
                           f"Only {head_fit.n_points} frames lie in the {headline} fit window; {what}.",
                           head_fit.window_s))
    if head_regime is not None and head_regime.cut_by_floor:
        fall = head_regime.diameter_start_m / head_regime.diameter_end_m
        if headline == rg.ELASTO_CAPILLARY and fall < MIN_FLOOR_CUT_DECREASE:
            out.append(Finding(Code.WINDOW_CUT_BY_FLOOR, Severity.DOUBTFUL,
                               f"The resolution floor ({floor * 1e6:.3g} µm) cuts the elasto-capillary "
                               f"window short: the diameter falls only {fall:.2g}-fold inside it.",
                               head_fit.window_s))
        else:
            out.append(Finding(Code.FLOOR_ENDS_WINDOW, Severity.NOTE,
                               f"The {headline} window ends at the resolution floor "
                               f"({floor * 1e6:.3g} µm); thinner frames were left out of the fits.",
                               head_fit.window_s))
    if headline == rg.ELASTO_CAPILLARY and ra.elastic_unsettled:
        out.append(Finding(Code.ELASTIC_NOT_SETTLED, Severity.DOUBTFUL,
                           "The strain rate kept falling after the elasto-capillary window, so the "
                           "window may be the passage from viscous to elastic thinning; the settled "
                           "elastic stretch lies later, near or below the resolution floor.",
                           head_fit.window_s if head_fit is not None else None))
    if headline in (rg.VISCO_CAPILLARY, rg.INERTIO_CAPILLARY) and head_fit:
        # a Newtonian thread breaks when its law says; one that lives on far beyond that was
        # held up by elastic stress in a stretch too thin to resolve
        predicted = head_fit.values.get("breakup_time_s", head_fit.values.get("singular_time_s"))
        start = head_fit.window_s[0]
        observed = t_b
        if predicted is not None and observed is not None and predicted > start:
            late = observed - predicted
            if late > max(LATE_BREAKUP_FRACTION * (predicted - start), 5.0 / fps_hz):
                out.append(Finding(Code.LATE_BREAKUP, Severity.DOUBTFUL,
                    f"The thread broke {late * 1e3:.3g} ms after the {headline} law predicts, "
                    "so elastic stress probably held it in a stretch too thin to measure; the "
                    "liquid may not be Newtonian and no relaxation time could be resolved.",
                    (predicted, observed)))
    if t_b is None and series.n:
        out.append(Finding(Code.NO_BREAKUP, Severity.NOTE,
                           "The filament did not break within the record."))
    if series.outlier_index.size:
        out.append(Finding(Code.OUTLIER_FRAMES, Severity.NOTE,
                           f"{series.outlier_index.size} frames stood out from the thinning trend "
                           f"(beads or mis-measured frames) and were left out of the fits."))
    bo = groups.get("bond_number")
    if bo is not None and bo > SAGGING_BOND_NUMBER:
        out.append(Finding(Code.GRAVITY_SAGGING, Severity.NOTE,
                           f"The Bond number is {bo:.2g}, so gravity may sag the filament "
                           f"and move its neck."))
    if lam is not None and lam * fps_hz < 10:
        out.append(Finding(Code.FEW_FRAMES_PER_RELAXATION_TIME, Severity.NOTE,
                           f"The camera takes only {lam * fps_hz:.2g} frames per relaxation time; "
                           f"at least 10 are advisable."))
    return out
