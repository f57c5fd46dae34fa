"""Fits of the thinning laws to a diameter series, with honest 95 % intervals.

Each ``fit_*`` takes the whole series (time in s, diameter in m, NaN where no
thread), a fit window ``window_s = (t_start, t_end)`` on the recording's clock
and returns a :class:`Fit`; a fit that cannot be made returns a falsy
:class:`Fit` with the reason in ``message`` instead of raising.

Intervals come from a residual block bootstrap about a smooth (quadratic)
description of the data in and around the window, with the window's edges
jittered by a few frames in every replicate, so they carry both the scatter
and the sensitivity to the window choice. The bootstrap is seeded from
``seed``: the same input gives the same interval.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np

from . import laws
from .kinematics import fit_power_law, weighted_line
from .series import check_series, estimate_diameter_noise, last_thread_position

logger = logging.getLogger(__name__)

#: Diameter coefficient of Papageorgiou's (1995) solution, D = 0.1418 (σ/η)(t_b − t).
PAPAGEORGIOU_DIAMETER_COEFFICIENT = 2.0 * laws.PAPAGEORGIOU_COEFFICIENT


@dataclass(frozen=True)
class Fit:
    """The outcome of one fit (SI units; names of ``values`` carry their unit).

    ``ci95`` maps a value's name to its 95 % interval (low, high), ``stderr``
    to its standard error; ``residuals`` are D_data − D_fit (m) over the
    window; ``reduced_chi2`` uses the diameter noise. ``success`` False means
    no usable fit, ``message`` says why. ``law`` holds the keyword arguments
    (SI) of the model's closed-form law in :mod:`thinning.laws`, which
    :meth:`curve` evaluates (empty for a fit read back from ``result.json``).
    """

    model: str
    values: dict = field(default_factory=dict)
    ci95: dict = field(default_factory=dict)
    stderr: dict = field(default_factory=dict)
    window_s: tuple = (float("nan"), float("nan"))
    n_points: int = 0
    reduced_chi2: float = float("nan")
    residuals: np.ndarray = field(default_factory=lambda: np.empty(0))
    success: bool = False
    message: str = ""
    law: dict = field(default_factory=dict, compare=False, repr=False)

    def __bool__(self) -> bool:
        return self.success

    def curve(self, t):
        """The fitted law's diameter (m) at times ``t`` (s); NaN where it cannot be evaluated
        (a failed fit, one read back from a file, an inertio-capillary fit without the density)."""
        t = np.asarray(t, dtype=float)
        law = LAWS.get(self.model)
        if not self.success or law is None or not self.law:
            return np.full(t.shape, np.nan)
        with np.errstate(all="ignore"):
            return np.asarray(law(t, **self.law), dtype=float)

    @classmethod
    def from_dict(cls, data: dict) -> "Fit":
        """A fit read back from its :meth:`to_dict` form (no residuals, no law arguments)."""
        def num(v):
            return float("nan") if v is None else float(v)

        window = data.get("window_s") or [None, None]
        return cls(model=str(data.get("model", "")),
                   values={k: num(v) for k, v in (data.get("values") or {}).items()},
                   ci95={k: (num(a), num(b)) for k, (a, b) in (data.get("ci95") or {}).items()},
                   stderr={k: num(v) for k, v in (data.get("stderr") or {}).items()},
                   window_s=(num(window[0]), num(window[1])), n_points=int(data.get("n_points") or 0),
                   reduced_chi2=num(data.get("reduced_chi2")), success=bool(data.get("success")),
                   message=str(data.get("message") or ""))

    def to_dict(self) -> dict:
        """Plain Python (JSON-ready: no NaN, no arrays) without the residuals."""
        def num(v):
            v = float(v)
            return v if np.isfinite(v) else None

        return {
            "model": self.model,
            "success": bool(self.success),
            "message": self.message,
            "values": {k: num(v) for k, v in self.values.items()},
            "ci95": {k: [num(a), num(b)] for k, (a, b) in self.ci95.items()},
            "stderr": {k: num(v) for k, v in self.stderr.items()},
            "window_s": [num(self.window_s[0]), num(self.window_s[1])],
            "n_points": int(self.n_points),
            "reduced_chi2": num(self.reduced_chi2),
        }


#: The closed-form law of each fit model (keyword arguments in ``Fit.law``).
LAWS = {
    "elasto-capillary": laws.elasto_capillary_diameter,
    "visco-capillary": laws.visco_capillary_diameter,
    "inertio-capillary": laws.inertio_capillary_diameter,
    "finite-extensibility": laws.finite_extensibility_diameter,
}


def _failed(model, message, window_s=(float("nan"), float("nan")), n_points=0) -> Fit:
    logger.debug("%s fit failed: %s", model, message)
    return Fit(model=model, window_s=tuple(float(w) for w in window_s), n_points=n_points,
               success=False, message=message)


# --- shared machinery ------------------------------------------------------------------

@dataclass(frozen=True)
class _Selection:
    t: np.ndarray       # usable frames, time order
    d: np.ndarray
    s: int              # window start/end positions in t (inclusive)
    e: int
    noise_m: float


def _select(time_s, diameter_m, window_s, *, resolution_floor_m, diameter_noise_m, min_points):
    t, d = check_series(time_s, diameter_m)
    ok = np.isfinite(t) & np.isfinite(d) & (d > 0)
    if resolution_floor_m is not None:
        ok &= d >= resolution_floor_m
    order = np.flatnonzero(ok)
    order = order[np.argsort(t[order], kind="stable")]
    t, d = t[order], d[order]
    lo, hi = float(window_s[0]), float(window_s[1])
    if not hi > lo:
        return "the fit window is empty"
    eps = 1e-9 * max(abs(hi), abs(lo), 1e-30)
    inside = np.flatnonzero((t >= lo - eps) & (t <= hi + eps))
    if inside.size < min_points:
        return f"only {inside.size} usable frames in the fit window (need {min_points})"
    if diameter_noise_m is not None:
        noise = float(diameter_noise_m)
    else:
        noise = estimate_diameter_noise(d)
    if not noise > 0:
        noise = 1e-3 * float(np.median(d[inside]))  # noise-free data: any positive scale
    return _Selection(t=t, d=d, s=int(inside[0]), e=int(inside[-1]), noise_m=noise)


def _bootstrap_lines(x, y, w, s, e, *, rng, n_boot, jitter, block=None):
    """Slope and intercept replicates of a weighted line over jittered windows.

    Resamples blocks of standardised residuals about a weighted quadratic
    through the window, then refits the line on a sub-window whose edges move
    inwards by up to ``jitter`` frames (frames outside the window were judged
    to belong to another regime, so the window never grows).
    """
    xs, ys, ws = x[s:e + 1], y[s:e + 1], w[s:e + 1]
    xc = xs - xs.mean()
    scale = max(np.ptp(xc), np.finfo(float).tiny)
    a = np.vstack([np.ones_like(xc), xc / scale, (xc / scale) ** 2]).T
    aw = a * ws[:, None]
    smooth = a @ np.linalg.solve(a.T @ aw, aw.T @ ys)
    z = (ys - smooth) * np.sqrt(ws)
    m = z.size
    z = (z - z.mean()) * np.sqrt(m / max(m - 3, 1))  # undo the shrinkage of fitted residuals
    block = block or max(1, int(round(m ** (1.0 / 3.0))))
    n_blocks = int(np.ceil(m / block))
    jitter = int(max(0, min(jitter, (m - 3) // 4)))
    slopes = np.empty(n_boot)
    icpts = np.empty(n_boot)
    for b in range(n_boot):
        starts = rng.integers(0, m - block + 1, size=n_blocks)
        zz = np.concatenate([z[k:k + block] for k in starts])[:m]
        ystar = smooth + zz / np.sqrt(ws)
        a0 = int(rng.integers(0, jitter + 1))
        b0 = m - 1 - int(rng.integers(0, jitter + 1))
        sl, ic, _ = weighted_line(xs[a0:b0 + 1], ystar[a0:b0 + 1], ws[a0:b0 + 1])
        slopes[b], icpts[b] = sl, ic
    return slopes, icpts


def _default_jitter(n):
    return int(max(2, min(10, n // 10)))


def _interval(samples):
    good = samples[np.isfinite(samples)]
    if good.size < 10:
        return (float("nan"), float("nan"))
    lo, hi = np.percentile(good, [2.5, 97.5])
    return (float(lo), float(hi))


def _stderr(samples):
    good = samples[np.isfinite(samples)]
    return float(np.std(good, ddof=1)) if good.size > 2 else float("nan")


# --- elasto-capillary ------------------------------------------------------------------

def fit_elastocapillary(time_s, diameter_m, *, window_s, surface_tension, initial_diameter, t0,
                        diameter_noise_m=None, seed, resolution_floor_m=None, n_boot=500,
                        jitter_frames=None, min_points=4) -> Fit:
    """Relaxation time λ (s) and apparent modulus G (Pa) from D = D_fit(t0) exp(−(t − t0)/3λ).

    Weighted least squares of ln D in t over ``window_s`` (weights (D/σ_D)²,
    Anna & McKinley 2001; McKinley 2005). G follows the contract
    G = 4σ (D_fit(t0)/D0)³/D0 (``laws.elastic_modulus_from_intercept``), with
    ``t0`` the free-thinning start and D0 = ``initial_diameter``.
    """
    model = "elasto-capillary"
    sel = _select(time_s, diameter_m, window_s, resolution_floor_m=resolution_floor_m,
                  diameter_noise_m=diameter_noise_m, min_points=min_points)
    if isinstance(sel, str):
        return _failed(model, sel, window_s)
    x = sel.t - t0
    sl = slice(sel.s, sel.e + 1)
    # weights (D/σ_D)² from the fitted diameter, not the noisy one (which would favour
    # frames with positive noise), and ln D corrected for E[ln(D + e)] ≈ ln D − σ²/2D²
    w = (sel.d / sel.noise_m) ** 2
    slope, icpt, _ = weighted_line(x[sl], np.log(sel.d[sl]), w[sl])
    d_fit = np.exp(icpt + slope * x)
    w = (d_fit / sel.noise_m) ** 2
    y = np.log(sel.d) + 0.5 * (sel.noise_m / d_fit) ** 2
    slope, icpt, cov = weighted_line(x[sl], y[sl], w[sl])
    n = sel.e - sel.s + 1
    if not slope < 0:
        return _failed(model, "the diameter does not fall in the fit window",
                       (sel.t[sel.s], sel.t[sel.e]), n)
    resid_log = y[sl] - (icpt + slope * x[sl])
    chi2 = float(np.sum(w[sl] * resid_log ** 2) / max(n - 2, 1))
    rng = np.random.default_rng(seed)
    jitter = _default_jitter(n) if jitter_frames is None else int(jitter_frames)
    b_slope, b_icpt = _bootstrap_lines(x, y, w, sel.s, sel.e, rng=rng, n_boot=n_boot, jitter=jitter)
    with np.errstate(divide="ignore", invalid="ignore"):
        b_lam = np.where(b_slope < 0, -1.0 / (3.0 * b_slope), np.nan)
    lam = -1.0 / (3.0 * slope)
    d_t0 = float(np.exp(icpt))
    g = laws.elastic_modulus_from_intercept(d_t0, initial_diameter, surface_tension)
    b_g = laws.elastic_modulus_from_intercept(np.exp(b_icpt), initial_diameter, surface_tension)
    values = {"relaxation_time_s": lam, "elastic_modulus_Pa": g, "diameter_at_t0_m": d_t0,
              "strain_rate_1_s": laws.elasto_capillary_strain_rate(lam)}
    ci = {"relaxation_time_s": _interval(b_lam), "elastic_modulus_Pa": _interval(b_g),
          "diameter_at_t0_m": _interval(np.exp(b_icpt))}
    se = {"relaxation_time_s": _stderr(b_lam), "elastic_modulus_Pa": _stderr(b_g),
          "relaxation_time_s_analytic": float(np.sqrt(cov[1, 1] * max(chi2, 1.0)) / (3 * slope ** 2))}
    resid = sel.d[sl] - np.exp(icpt + slope * x[sl])
    law = {"initial_diameter": initial_diameter, "elastic_modulus": g,
           "surface_tension": surface_tension, "relaxation_time": lam, "t0": t0}
    return Fit(model=model, values=values, ci95=ci, stderr=se,
               window_s=(float(sel.t[sel.s]), float(sel.t[sel.e])), n_points=n,
               reduced_chi2=chi2, residuals=resid, success=True, message="", law=law)


# --- linear laws (visco-capillary, finite extensibility) -------------------------------

def _fit_linear(time_s, diameter_m, *, window_s, diameter_noise_m, seed, resolution_floor_m,
                n_boot, jitter_frames, min_points):
    sel = _select(time_s, diameter_m, window_s, resolution_floor_m=resolution_floor_m,
                  diameter_noise_m=diameter_noise_m, min_points=min_points)
    if isinstance(sel, str):
        return sel, None
    t_ref = sel.t[sel.s]
    x = sel.t - t_ref
    w = np.full(sel.d.size, 1.0 / sel.noise_m ** 2)
    sl = slice(sel.s, sel.e + 1)
    slope, icpt, _ = weighted_line(x[sl], sel.d[sl], w[sl])
    n = sel.e - sel.s + 1
    if not slope < 0:
        return "the diameter does not fall in the fit window", (sel, n)
    resid = sel.d[sl] - (icpt + slope * x[sl])
    chi2 = float(np.sum(w[sl] * resid ** 2) / max(n - 2, 1))
    rng = np.random.default_rng(seed)
    jitter = _default_jitter(n) if jitter_frames is None else int(jitter_frames)
    b_slope, b_icpt = _bootstrap_lines(x, sel.d, w, sel.s, sel.e, rng=rng, n_boot=n_boot,
                                       jitter=jitter)
    speed = -slope
    t_b = t_ref + icpt / speed
    with np.errstate(divide="ignore", invalid="ignore"):
        b_speed = np.where(b_slope < 0, -b_slope, np.nan)
        b_tb = t_ref + b_icpt / b_speed
    return None, dict(sel=sel, n=n, speed=speed, t_b=t_b, b_speed=b_speed, b_tb=b_tb, chi2=chi2,
                      resid=resid, window=(float(sel.t[sel.s]), float(sel.t[sel.e])))


def fit_viscocapillary(time_s, diameter_m, *, window_s, surface_tension, diameter_noise_m=None,
                       seed, resolution_floor_m=None, n_boot=400, jitter_frames=None,
                       min_points=4) -> Fit:
    """Shear viscosity η (Pa·s) from Papageorgiou's D = 0.1418 (σ/η)(t_b − t).

    Least squares of D in t (uniform weights) over ``window_s``; the radius
    coefficient 0.0709 is Papageorgiou (1995). Also returns the singular time
    t_b (s) and the thinning speed −dD/dt (m/s).
    """
    model = "visco-capillary"
    why, r = _fit_linear(time_s, diameter_m, window_s=window_s, diameter_noise_m=diameter_noise_m,
                         seed=seed, resolution_floor_m=resolution_floor_m, n_boot=n_boot,
                         jitter_frames=jitter_frames, min_points=min_points)
    if why is not None:
        return _failed(model, why, window_s, 0 if r is None else r[1])
    k = PAPAGEORGIOU_DIAMETER_COEFFICIENT * surface_tension
    eta = k / r["speed"]
    b_eta = k / r["b_speed"]
    values = {"shear_viscosity_Pa_s": eta, "breakup_time_s": r["t_b"], "thinning_speed_m_s": r["speed"]}
    ci = {"shear_viscosity_Pa_s": _interval(b_eta), "breakup_time_s": _interval(r["b_tb"]),
          "thinning_speed_m_s": _interval(r["b_speed"])}
    se = {"shear_viscosity_Pa_s": _stderr(b_eta), "breakup_time_s": _stderr(r["b_tb"])}
    law = {"t_b": r["t_b"], "surface_tension": surface_tension, "viscosity": eta}
    return Fit(model=model, values=values, ci95=ci, stderr=se, window_s=r["window"],
               n_points=r["n"], reduced_chi2=r["chi2"], residuals=r["resid"], success=True, law=law)


def fit_finite_extensibility(time_s, diameter_m, *, window_s, surface_tension,
                             polymer_viscosity=None, diameter_noise_m=None, seed,
                             resolution_floor_m=None, n_boot=400, jitter_frames=None,
                             min_points=4) -> Fit:
    """Terminal extensional viscosity η_E,∞ (Pa·s) from D = (σ/η_E,∞)(t_b − t).

    Least squares of D in t over ``window_s`` (Anna & McKinley 2001); with the
    polymer viscosity η_p (Pa·s) also the extensibility L² = η_E,∞/(2 η_p)
    (FENE-P, Wagner, Bourouiba & McKinley 2015).
    """
    model = "finite-extensibility"
    why, r = _fit_linear(time_s, diameter_m, window_s=window_s, diameter_noise_m=diameter_noise_m,
                         seed=seed, resolution_floor_m=resolution_floor_m, n_boot=n_boot,
                         jitter_frames=jitter_frames, min_points=min_points)
    if why is not None:
        return _failed(model, why, window_s, 0 if r is None else r[1])
    eta = surface_tension / r["speed"]
    b_eta = surface_tension / r["b_speed"]
    values = {"terminal_extensional_viscosity_Pa_s": eta, "breakup_time_s": r["t_b"]}
    ci = {"terminal_extensional_viscosity_Pa_s": _interval(b_eta),
          "breakup_time_s": _interval(r["b_tb"])}
    se = {"terminal_extensional_viscosity_Pa_s": _stderr(b_eta)}
    if polymer_viscosity is not None and polymer_viscosity > 0:
        values["finite_extensibility_L2"] = eta / (2.0 * polymer_viscosity)
        ci["finite_extensibility_L2"] = tuple(v / (2.0 * polymer_viscosity)
                                              for v in ci["terminal_extensional_viscosity_Pa_s"])
    law = {"t_b": r["t_b"], "surface_tension": surface_tension, "terminal_extensional_viscosity": eta}
    return Fit(model=model, values=values, ci95=ci, stderr=se, window_s=r["window"],
               n_points=r["n"], reduced_chi2=r["chi2"], residuals=r["resid"], success=True, law=law)


# --- inertio-capillary -----------------------------------------------------------------

def fit_inertiocapillary(time_s, diameter_m, *, window_s, surface_tension, density=None,
                         diameter_noise_m=None, seed, resolution_floor_m=None, n_boot=300,
                         jitter_frames=None, min_points=5) -> Fit:
    """Prefactor X_IC and singular time t_c of D = 2 X_IC (σ/ρ)^(1/3) (t_c − t)^(2/3).

    With the exponent fixed at 2/3 (Eggers 1997), D^(3/2) is a line in t,
    fitted by weighted least squares; X_IC needs the density (else only the
    dimensional prefactor A of D = A (t_c − t)^(2/3), m/s^(2/3), is given).
    ``exponent`` is a free-exponent fit of the same window, the regime check
    (2/3 expected; inviscid theory X_IC ≈ 0.717, Eggers & Villermaux 2008).
    """
    model = "inertio-capillary"
    sel = _select(time_s, diameter_m, window_s, resolution_floor_m=resolution_floor_m,
                  diameter_noise_m=diameter_noise_m, min_points=min_points)
    if isinstance(sel, str):
        return _failed(model, sel, window_s)
    t_ref = sel.t[sel.s]
    x = sel.t - t_ref
    y = sel.d ** 1.5
    w = 1.0 / (1.5 * np.sqrt(sel.d) * sel.noise_m) ** 2
    sl = slice(sel.s, sel.e + 1)
    n = sel.e - sel.s + 1
    slope, icpt, _ = weighted_line(x[sl], y[sl], w[sl])
    if not slope < 0:
        return _failed(model, "the diameter does not fall in the fit window",
                       (sel.t[sel.s], sel.t[sel.e]), n)
    rate = -slope                       # A^(3/2)
    t_c = t_ref + icpt / rate
    a = rate ** (2.0 / 3.0)
    d_fit = a * np.clip(t_c - sel.t[sl], 0, None) ** (2.0 / 3.0)
    resid = sel.d[sl] - d_fit
    chi2 = float(np.sum(resid ** 2) / sel.noise_m ** 2 / max(n - 2, 1))
    rng = np.random.default_rng(seed)
    jitter = _default_jitter(n) if jitter_frames is None else int(jitter_frames)
    b_slope, b_icpt = _bootstrap_lines(x, y, w, sel.s, sel.e, rng=rng, n_boot=n_boot, jitter=jitter)
    with np.errstate(divide="ignore", invalid="ignore"):
        b_rate = np.where(b_slope < 0, -b_slope, np.nan)
        b_a = b_rate ** (2.0 / 3.0)
        b_tc = t_ref + b_icpt / b_rate
    values = {"prefactor_m_s23": a, "singular_time_s": t_c}
    ci = {"prefactor_m_s23": _interval(b_a), "singular_time_s": _interval(b_tc)}
    se = {"singular_time_s": _stderr(b_tc)}
    if density is not None and density > 0:
        k = 2.0 * np.cbrt(surface_tension / density)
        values["prefactor_X_IC"] = a / k
        ci["prefactor_X_IC"] = tuple(v / k for v in ci["prefactor_m_s23"])
        se["prefactor_X_IC"] = _stderr(b_a / k)
    free = fit_power_law(sel.t[sl], sel.d[sl], t_c_min=sel.t[sel.e])
    if free is not None:
        values["exponent"] = free[2]
    law = {}
    if "prefactor_X_IC" in values:
        law = {"t_c": t_c, "surface_tension": surface_tension, "density": density,
               "prefactor": values["prefactor_X_IC"]}
    return Fit(model=model, values=values, ci95=ci, stderr=se,
               window_s=(float(sel.t[sel.s]), float(sel.t[sel.e])), n_points=n,
               reduced_chi2=chi2, residuals=resid, success=True, law=law)


# --- breakup ---------------------------------------------------------------------------

def estimate_breakup_time(time_s, diameter_m, *, t_start_s=None, n_last=5) -> float | None:
    """Pinch-off instant (s), between the last frame with a thread and the first without.

    The last ``n_last`` frames with a thread are extrapolated linearly to D = 0
    and the result is kept inside that frame interval (its midpoint when the
    extrapolation fails). None when the last frame still shows a thread.
    """
    t = np.asarray(time_s, dtype=float)
    d = np.asarray(diameter_m, dtype=float)
    last = last_thread_position(t, d, t_start_s=t_start_s)
    if last is None:
        return None
    t_last, t_next = t[last], t[last + 1]
    has = np.flatnonzero(np.isfinite(d[:last + 1]) & (d[:last + 1] > 0))
    if t_start_s is not None:
        has = has[t[has] >= t_start_s - 1e-12]
    pick = has[-n_last:]
    if pick.size >= 2:
        slope, icpt = np.polyfit(t[pick] - t_last, d[pick], 1)
        if slope < 0:
            return float(np.clip(t_last - icpt / slope, t_last, t_next))
    return float(0.5 * (t_last + t_next))
