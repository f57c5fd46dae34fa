"""The uncertainty budget of the headline numbers: every term the recording lets us estimate.

A fit's bootstrap interval (:mod:`thinning.fits`) carries the scatter of the
points, with correlated noise, and the choice of the window's edges. What it
leaves out is systematic, and on real recordings larger:

- ``diameter_bias``: the edge method's residual bias, bounded by
  :data:`EDGE_BIAS_PX` pixels (measured on two renderers with different
  optics, README "Accuracy"): a constant offset of B within the window (which
  moves a slope of ln D, not one of D) and a change of B from one end of the
  window to the other (the bias depends on the width), in quadrature;
- ``local_drift``: the local value drifting across the window (a thread
  thinning not quite exponentially: solvent drag early, finite extensibility
  late; or not quite linearly); the fluid's value may lie anywhere in that
  range, so half the range of the local value over the window counts;
- ``whole_curve_difference``: the local-slope value against the whole-curve
  filament model's (:mod:`thinning.modelfit`), when that fit describes the
  record (:attr:`thinning.modelfit.ModelFit.describes_record`): the model accounts for
  the solvent and finite extensibility the window's line ignores, so the
  interval reaches the model's value and its own interval (the gap plus the
  model's half-width, both relative to the local value); for λ, a model whose
  own half-width exceeds ``ELASTIC_TOLERANCE`` cannot narrow the question, and
  the term is that tolerance, or the gap where larger;
- ``unchecked_model_departure`` (λ only, in place of the former when no
  whole-curve fit describes the record): the local λ is accepted as constant
  within ±:data:`ELASTIC_TOLERANCE` across the elastic stretch
  (:func:`thinning.regimes.find_elastocapillary_run`), and nothing in the
  record then tells how far the fluid's λ lies from the window's, so that
  tolerance bounds it;
- ``pixel_size``: the calibration, when it came from a reference width
  measured in the frame (each edge within :data:`EDGE_BIAS_PX`); a given pixel
  size is taken as exact (verify it with a reference liquid).

Each term is a relative 95 % half-width; they are independent and add in
quadrature (JCGM 100:2008, the GUM, §5.1, with each bound read as a 95 %
half-width). The interval keeps the bootstrap's asymmetry:
``[v − √(a² + r²v²), v + √(b² + r²v²)]`` with a, b the bootstrap's distances
below and above and r the other terms combined. Pure functions: arrays and
fits in, :class:`Budget` out.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .kinematics import weighted_line

#: Bound of the edge method's residual diameter bias (px): on refracting threads (the second
#: renderer) the per-band median errors run from −0.10 px (3–6 px) to +0.10 px (80+ px), and
#: partially coherent light adds up to about 0.25 px on wide threads (README "Accuracy").
EDGE_BIAS_PX = 0.15
#: The relative constancy of the local λ the elastic stretch is located by (thinning.regimes).
ELASTIC_TOLERANCE = 0.05


@dataclass(frozen=True)
class Budget:
    """The 95 % interval of one headline number and its terms (relative half-widths)."""

    value: float
    interval: tuple
    terms: dict = field(default_factory=dict)

    @property
    def relative_half_width(self) -> float:
        return math.sqrt(sum(v * v for v in self.terms.values()))


def combine(value: float, scatter_interval, terms: dict) -> Budget:
    """The budget of ``value`` from the bootstrap's interval and the other relative terms."""
    lo, hi = (float(v) for v in scatter_interval)
    if not (np.isfinite(lo) and np.isfinite(hi) and np.isfinite(value) and value != 0):
        return Budget(value, (math.nan, math.nan), {})
    below, above = max(value - lo, 0.0), max(hi - value, 0.0)
    rest = math.sqrt(sum(v * v for v in terms.values()))
    scale = abs(value)
    interval = (value - math.hypot(below, rest * scale), value + math.hypot(above, rest * scale))
    return Budget(value, interval, {"scatter_and_window": 0.5 * (below + above) / scale, **terms})


def _window(t, d, window_s, floor):
    ok = np.isfinite(t) & np.isfinite(d) & (d > 0) & (d >= floor)
    ok &= (t >= window_s[0] - 1e-12) & (t <= window_s[1] + 1e-12)
    return t[ok], d[ok]


def _drift_of_slope(x, y, w):
    """Half the range, relative to the mean slope, of the local slope dy/dx of a weighted
    quadratic through (x, y) over the span of x (0 when the curvature is within its noise)."""
    xc = x - x.mean()
    scale = max(np.ptp(xc), np.finfo(float).tiny)
    u = xc / scale
    a = np.vstack([np.ones_like(u), u, u * u]).T
    aw = a * w[:, None]
    normal = a.T @ aw
    coef = np.linalg.solve(normal, aw.T @ y)
    resid = y - a @ coef
    dof = max(x.size - 3, 1)
    s2 = max(float(np.sum(w * resid * resid)) / dof, 1.0)
    cov = np.linalg.inv(normal) * s2
    slope, _, _ = weighted_line(x, y, w)
    curvature_span = abs(coef[2]) * 2.0 * (u.max() - u.min()) / scale  # change of dy/dx across
    noise_span = 2.0 * math.sqrt(max(cov[2, 2], 0.0)) * 2.0 * (u.max() - u.min()) / scale
    if slope == 0:
        return 0.0
    return max(curvature_span - noise_span, 0.0) / 2.0 / abs(slope)


def _bias_term(x, d, w, bias_m, *, log):
    """Relative change of the fitted slope under a bias of D bounded by ``bias_m``: a constant
    offset of ``bias_m`` and a change of ``bias_m`` from the window's start to its end (linear
    in x), added in quadrature."""
    span = x.max() - x.min()
    if not span > 0:
        return 0.0
    y = np.log(d) if log else d
    s0, _, _ = weighted_line(x, y, w)
    if s0 == 0:
        return 0.0

    def moved(shift):
        y_shifted = np.log(np.clip(d + shift, 1e-300, None)) if log else d + shift
        return abs(weighted_line(x, y_shifted, w)[0] / s0 - 1.0)

    ramp = bias_m * (0.5 - (x - x.min()) / span)
    return math.hypot(moved(np.full(x.size, bias_m)), moved(ramp))


def _model_term(local, model_value, model_fit, *, prior=None):
    """The whole-curve term, relative to the local value (the budget scales every term by it):
    the gap to the model's value plus the model's own half-width, so the interval reaches the
    model's value and its interval. With ``prior`` (the bound that holds without a model), a
    model whose own half-width exceeds it cannot narrow the question: the term is then the
    prior, or the gap where that is larger. None when no usable model fit describes the record."""
    if model_fit is None or not model_fit or model_value is None or not np.isfinite(model_value):
        return None
    if not model_fit.describes_record:
        return None
    gap = abs(model_value - local) / abs(local)
    reach = _half_width(model_fit, model_value) * abs(model_value) / abs(local)
    if prior is not None and reach > prior:
        return max(gap, prior)
    return gap + reach


def _half_width(model_fit, value):
    """The whole-curve fit's relative 95 % half-width of ``value`` (0 when open or unknown)."""
    lo, hi = (model_fit.relaxation_time_ci95_s if model_fit.model == "viscoelastic"
              else model_fit.solvent_viscosity_ci95_Pa_s)
    half = 0.5 * (hi - lo) / value
    return float(half) if np.isfinite(half) and half > 0 else 0.0


def relaxation_time_budget(t, d, fit, *, noise_m, floor_m, pixel_size_m, model_fit=None) -> Budget:
    """Budget of the local-slope λ of an elasto-capillary ``fit`` (t s, d m, noise and floor m)."""
    lam = fit.values["relaxation_time_s"]
    tw, dw = _window(t, d, fit.window_s, floor_m)
    w = (dw / noise_m) ** 2
    terms = {"diameter_bias": _bias_term(tw, dw, w, EDGE_BIAS_PX * pixel_size_m, log=True),
             "local_drift": _drift_of_slope(tw, np.log(dw), w)}
    model_lam = model_fit.relaxation_time_s if model_fit and model_fit.model == "viscoelastic" else None
    difference = _model_term(lam, model_lam, model_fit, prior=ELASTIC_TOLERANCE)
    if difference is not None:
        terms["whole_curve_difference"] = difference
    else:
        terms["unchecked_model_departure"] = ELASTIC_TOLERANCE
    return combine(lam, fit.ci95["relaxation_time_s"], terms)


def shear_viscosity_budget(t, d, fit, *, noise_m, floor_m, pixel_size_m, pixel_size_rel=0.0,
                           model_fit=None) -> Budget:
    """Budget of the visco-capillary η (η ∝ 1/(dD/dt): pixel size enters once)."""
    eta = fit.values["shear_viscosity_Pa_s"]
    tw, dw = _window(t, d, fit.window_s, floor_m)
    w = np.full(tw.size, 1.0 / noise_m ** 2)
    terms = {"diameter_bias": _bias_term(tw, dw, w, EDGE_BIAS_PX * pixel_size_m, log=False),
             "local_drift": _drift_of_slope(tw, dw, w)}
    if pixel_size_rel:
        terms["pixel_size"] = pixel_size_rel
    model_eta = (model_fit.solvent_viscosity_Pa_s
                 if model_fit and model_fit.model == "newtonian" and not model_fit.solvent_viscosity_fixed
                 else None)
    difference = _model_term(eta, model_eta, model_fit)
    if difference is not None:
        terms["whole_curve_difference"] = difference
    return combine(eta, fit.ci95["shear_viscosity_Pa_s"], terms)


def elastic_modulus_budget(fit, lam_budget: Budget, *, initial_diameter_m, pixel_size_m,
                           pixel_size_rel=0.0) -> Budget:
    """Budget of G = 4σ (D_fit(t0)/D0)³/D0: the intercept's bootstrap, the edge bias of D0 and
    of D_fit(t0) (3× and 4× in G), the pixel size (G ∝ 1/length) and λ's systematic terms
    carried through the extrapolation of the line back to t0."""
    g = fit.values["elastic_modulus_Pa"]
    d_t0 = fit.values["diameter_at_t0_m"]
    bias = EDGE_BIAS_PX * pixel_size_m
    terms = {"diameter_bias": math.hypot(3.0 * bias / d_t0, 4.0 * bias / initial_diameter_m)}
    if pixel_size_rel:
        terms["pixel_size"] = pixel_size_rel
    # ln D_fit(t0) = ln D_w + (t_w − t0)/(3λ): a relative error δ in the slope moves it by δ·Δ,
    # Δ the extrapolated fall in ln D (G takes it three times)
    fall = abs(math.log(d_t0) - math.log(_diameter_at(fit, fit.window_s[0])))
    systematic = math.sqrt(sum(v * v for k, v in lam_budget.terms.items() if k != "scatter_and_window"))
    if systematic and fall:
        terms["slope_extrapolation"] = 3.0 * systematic * fall
    return combine(g, fit.ci95["elastic_modulus_Pa"], terms)


def model_fit_budget(t, d, model_fit, *, noise_m, floor_m, pixel_size_m, pixel_size_rel=0.0):
    """The whole-curve fit's interval of λ (viscoelastic) or η_s (Newtonian) with the systematic
    terms its likelihood leaves out: the diameter bias bounded by :data:`EDGE_BIAS_PX` over the
    fitted stretch (from its start to the floor) and, for η_s, the pixel size. Returns
    ``(Budget, key)`` with ``key`` the ``ModelFit`` field of the widened interval, or None when
    the fit has no finite interval to widen."""
    if not model_fit:
        return None
    if model_fit.model == "viscoelastic":
        key, value = "relaxation_time_ci95_s", model_fit.relaxation_time_s
    elif model_fit.model == "newtonian" and not model_fit.solvent_viscosity_fixed:
        key, value = "solvent_viscosity_ci95_Pa_s", model_fit.solvent_viscosity_Pa_s
    else:
        return None
    stat = getattr(model_fit, key)
    if not (np.isfinite(value) and all(np.isfinite(stat))):
        return None
    ok = np.isfinite(t) & np.isfinite(d) & (d >= floor_m) & (t >= model_fit.t_start_s - 1e-12)
    tw, dw = t[ok], d[ok]
    if tw.size < 3:
        return None
    viscoelastic = model_fit.model == "viscoelastic"
    w = (dw / noise_m) ** 2 if viscoelastic else np.full(tw.size, 1.0 / noise_m ** 2)
    terms = {"diameter_bias": _bias_term(tw, dw, w, EDGE_BIAS_PX * pixel_size_m, log=viscoelastic)}
    if pixel_size_rel and not viscoelastic:
        terms["pixel_size"] = pixel_size_rel
    combined = combine(value, stat, terms)
    named = {("likelihood" if name == "scatter_and_window" else name): size
             for name, size in combined.terms.items()}
    return Budget(value, combined.interval, named), key


def _diameter_at(fit, t):
    law = fit.law
    if not law:
        return fit.values["diameter_at_t0_m"]
    return fit.values["diameter_at_t0_m"] * math.exp(-(t - law["t0"]) / (3.0 * fit.values["relaxation_time_s"]))


def reference_width_uncertainty(plate_width_px: float | None) -> float:
    """Relative uncertainty of a pixel size from a reference width of ``plate_width_px``
    pixels: each of its two edges within :data:`EDGE_BIAS_PX`."""
    if plate_width_px is None or not plate_width_px > 0:
        return 0.0
    return 2.0 * EDGE_BIAS_PX / float(plate_width_px)
