"""Whole-curve fit of the 0-D filament model to a neck-diameter series D(t).

The model is the one of :func:`thinning.laws.filament_model` (SI units)::

    (2X − 1) σ/R − G f (A_zz − A_rr) = 3 η_s ε̇ + k ρ Ṙ²,    ε̇ = −2 Ṙ/R
    dA_zz/dt = 2 ε̇ A_zz − f (A_zz − 1)/λ,   dA_rr/dt = −ε̇ A_rr − f (A_rr − 1)/λ
    f = 1/(1 − (A_zz + 2 A_rr)/L²)   (FENE-P; f = 1, L² → ∞: Oldroyd-B)

started at rest-relaxed dumbbells (A_zz = A_rr = 1) from the diameter D0 at
the free-thinning start t0. The published limits it blends: the elastic
stretch thins at ε̇ = 2/(3λ) and the finite-extensibility end at a constant
speed set by η_E,∞ ≈ 2 η_p L² (Entov & Hinch 1997, J. Non-Newtonian Fluid
Mech. 72:31; Anna & McKinley 2001, J. Rheol. 45:115; Wagner, Bourouiba &
McKinley 2015, J. Non-Newtonian Fluid Mech. 218 — from memory, as in
``shared/reference/physics.md``), Papageorgiou's (1995) viscous and the
inviscid inertio-capillary (Eggers 1997) pinch-off.

Integration
    The neck is followed in x = ln(D0/D) rather than in time, with the net
    stress S = 3 η_s ε̇ + k ρ Ṙ² (as ln S) and A_rr as state: S > 0 always,
    and A_zz follows from the stress algebraically. In x the system is stiff
    (the stress settles on the capillary pressure at a rate ~ the
    elasto-capillary number), so it is integrated with the L-stable,
    stiffly accurate Rosenbrock method RODAS4 (Hairer & Wanner 1996, *Solving
    Ordinary Differential Equations II*, §IV.7; coefficients of their RODAS4
    set) with one step-size sequence shared by a batch of parameter sets, all
    advanced together in numpy. Times at data points come from Hermite
    interpolation of x(t). Newtonian liquids (G = 0) have a closed form.

Fit
    Free: ln λ, ln G, w = 1/(G L²) (unless L² is given or Oldroyd-B is
    asked for), ln η_s (unless given), ln D0 and t0 (a time shift, exact).
    Starting values come from the longest near-exponential stretch (λ, and w
    from the record's end, by a fit of the model started on the elastic
    balance), then a spread of transients (G, η_s) integrated in one batch;
    the three best are refined, the best goes to a batched Levenberg–Marquardt
    on the model itself (finite-difference Jacobian from neighbours
    integrated with the same steps; one integration per iteration), polished
    on frozen steps. Weak priors on ln G (±2), ln η_s (±3), ln D0 (±0.5) and
    t0 (± one frame about the given start) only act along directions the
    record leaves flat (G and D0 when the early transient is not seen).

Intervals
    Residuals are whitened for AR(1) noise (coefficient estimated from the
    residuals) and scaled by the residual variance; the 95 % interval of λ
    is the profile-likelihood set Δχ²/s² ≤ t²(0.975, n − p) (on frozen
    steps, so χ² is smooth); η_s gets the profile interval in the Newtonian
    fit and a Wald interval (in ln η_s) in the elastic one.

Limits (see the module's tests): the transient makes the likelihood rugged
and, when it is not resolved, flat in G and D0; a fit can settle in a wrong
basin, which then shows as a reduced χ² well above 1 — or, rarely, not.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import stats

from . import laws

#: 2X − 1 with the Newtonian axial-force factor X (McKinley & Tripathi 2000), as in laws.
_CAPILLARY = 2.0 * laws.NEWTONIAN_FORCE_FACTOR - 1.0
#: k of k ρ Ṙ², making the inviscid limit R = X_IC (σ/ρ)^(1/3) τ^(2/3) (laws.filament_model).
_INERTIA = 1.5 ** 2 * _CAPILLARY / laws.INERTIO_CAPILLARY_PREFACTOR ** 3

# --- RODAS4 (Hairer & Wanner 1996, §IV.7): y' = F(x, y) ------------------------------
# (I/(hγ) − J) k_i = F(x + c_i h, y + Σ a_ij k_j) + Σ (C_ij/h) k_j + d_i h ∂F/∂x
_GAMMA = 0.25
_A = np.zeros((6, 6))
_A[1, 0] = 1.544
_A[2, :2] = (0.9466785280815826, 0.2557011698983284)
_A[3, :3] = (3.314825187068521, 2.896124015972201, 0.9986419139977817)
_A[4, :4] = (1.221224509226641, 6.019134481288629, 12.53708332932087, -0.6878860361058950)
_A[5, :4] = _A[4, :4]
_A[5, 4] = 1.0
_C = np.zeros((6, 6))
_C[1, 0] = -5.6688
_C[2, :2] = (-2.430093356833875, -0.2063599157091915)
_C[3, :3] = (-0.1073529058151375, -9.594562251023355, -20.47028614809616)
_C[4, :4] = (7.496443313967647, -10.24680431464352, -33.99990352819905, 11.70890893206160)
_C[5, :5] = (8.083246795921522, -7.981132988064893, -31.52159432874371, 16.31930543123136,
             -6.058818238834054)
_M = np.r_[_A[4, :4], 1.0, 1.0]          # y_new = y + Σ m_i k_i (stiffly accurate)
_CX = np.array([0.0, 0.386, 0.21, 0.63, 1.0, 1.0])
_DX = np.array([0.25, -0.1043, 0.1035, -0.0362, 0.0, 0.0])
_FD = 1e-7                               # finite-difference step of the Jacobian


# --- the polymer model in x = ln(D0/D) -----------------------------------------------

class _Batch:
    """Parameter sets of a batch of trajectories (arrays of one length) and the rates."""

    def __init__(self, relaxation_time, modulus, inv_l2, solvent_viscosity, d0, *, density,
                 surface_tension):
        lam, g, u, eta, d0 = np.broadcast_arrays(*(np.atleast_1d(np.asarray(v, dtype=float))
                                                   for v in (relaxation_time, modulus, inv_l2,
                                                             solvent_viscosity, d0)))
        self.size = lam.size
        self.inv_lam = 1.0 / lam
        self.g = g
        self.inv_g = 1.0 / g
        self.u = u
        self.u3 = 3.0 * u
        self.b = 6.0 * eta
        self.b2 = self.b ** 2
        self.inertial = bool(density) and density > 0
        r0 = d0 / 2.0
        self.p0 = _CAPILLARY * surface_tension / r0          # capillary pressure at x = 0
        self.kr4 = 4.0 * _INERTIA * (density or 0.0) * r0 ** 2  # 4 k ρ R0²

    def speed(self, s, a4):
        """ẋ = −Ṙ/R (1/s) for net stress e^s (Pa); a4 = 4 k ρ R² (kg/m)."""
        big_s = np.exp(s)
        if self.inertial:
            return 2.0 * big_s / (self.b + np.sqrt(self.b2 + a4 * big_s))
        return big_s / self.b

    def rates(self, p, a4, s, arr):
        """d(ln S)/dx, dA_rr/dx and dt/dx at capillary pressure p (Pa)."""
        big_s = np.exp(s)
        tau = p - big_s                                     # polymer stress G f (A_zz − A_rr)
        ut = self.u * tau
        f = (1.0 + ut * self.inv_g) / (1.0 - self.u3 * arr)
        azz = arr + tau * self.inv_g / f
        if self.inertial:
            xd = 2.0 * big_s / (self.b + np.sqrt(self.b2 + a4 * big_s))
        else:
            xd = big_s / self.b
        w = f * self.inv_lam / xd
        dzz = 4.0 * azz - w * (azz - 1.0)
        drr = -2.0 * arr - w * (arr - 1.0)
        ds = p - f * ((self.g + ut) * dzz + (2.0 * ut - self.g) * drr)
        return ds / big_s, drr, 1.0 / xd


def _rodas_step(m: _Batch, x, h, y):
    """One RODAS4 step of the batch from x over h (both scalars); y is (3, B): ln S, A_rr, t."""
    n = m.size
    ex = math.exp(x)
    exe = math.exp(x + _FD)
    p = m.p0 * ex
    a4 = m.kr4 / (ex * ex)
    pp = np.empty((4, n))
    pp[:3] = p
    pp[3] = m.p0 * exe
    aa = np.empty((4, n))
    aa[:3] = a4
    aa[3] = m.kr4 / (exe * exe)
    s4 = np.empty((4, n))
    s4[:] = y[0]
    s4[1] += _FD
    r4 = np.empty((4, n))
    r4[:] = y[1]
    r4[2] += _FD
    f4 = np.empty((3, 4, n))
    f4[0], f4[1], f4[2] = m.rates(pp, aa, s4, r4)
    f0 = f4[:, 0]
    jac = (f4[:, 1:] - f0[:, None]) * (1.0 / _FD)   # (rate, [s, A_rr, x], B)
    q = 1.0 / (h * _GAMMA)
    m00 = q - jac[0, 0]
    m01 = jac[0, 1]
    m10 = jac[1, 0]
    m11 = q - jac[1, 1]
    idet = 1.0 / (m00 * m11 - m01 * m10)
    js0 = jac[2, 0] / q
    js1 = jac[2, 1] / q
    fx = jac[:, 2] * h
    k = np.empty((6, 3, n))
    k2 = k.reshape(6, 3 * n)
    ch = _C / h
    for i in range(6):
        if i == 0:
            rhs = f0 + _DX[0] * fx
        else:
            yi = y + (_A[i, :i] @ k2[:i]).reshape(3, n)
            exi = math.exp(x + _CX[i] * h)
            rhs = np.empty((3, n))
            rhs[0], rhs[1], rhs[2] = m.rates(m.p0 * exi, m.kr4 / (exi * exi), yi[0], yi[1])
            rhs += (ch[i, :i] @ k2[:i]).reshape(3, n)
            if _DX[i]:
                rhs += _DX[i] * fx
        k0 = (m11 * rhs[0] + m01 * rhs[1]) * idet
        k1 = (m00 * rhs[1] + m10 * rhs[0]) * idet
        k[i, 0] = k0
        k[i, 1] = k1
        k[i, 2] = rhs[2] / q + js0 * k0 + js1 * k1
    return y + (_M @ k2).reshape(3, n), k[5]


@dataclass(frozen=True)
class _Paths:
    """Trajectories on a shared grid of x = ln(D0/D): times t (s) and ẋ (1/s) at the nodes."""

    x: np.ndarray      # (N,)
    t: np.ndarray      # (B, N)
    xdot: np.ndarray   # (B, N)
    ok: np.ndarray     # (B,) integration succeeded


def _polymer_paths(m: _Batch, x_end, *, tol=1e-4, weight=None, start=None, grid=None,
                   h_max=0.5, h_min=1e-5, max_steps=400) -> _Paths:
    """Integrate every member from x = 0 to ``x_end`` with one shared step sequence.

    Adaptive: the step keeps the RMS of the embedded error in A_rr and ẋ·t
    (time in units of the local thinning time) below ``tol``/``weight`` for
    every member (weights: 1, the default, for members whose accuracy
    matters, 0.1 for finite-difference neighbours, which only need to
    follow); ln S, the stiff component, matters only through them. With
    ``grid`` (the nodes of an earlier run) the steps are those, so the result
    is a smooth function of the parameters. ``start`` (ln S, A_rr) per member
    replaces the relaxed start S = (2X − 1)σ/R0, A_rr = 1. Members whose state
    turns non-finite, or that would need a step below ``h_min``, are marked
    failed; the integration stops when every weight-1 member has failed, and
    all fail if the steps run out before ``x_end`` (the grid's end, with one).
    """
    n = m.size
    weight = np.ones(n) if weight is None else np.asarray(weight, dtype=float)
    control = weight >= 1.0
    y = np.empty((3, n))
    y[0], y[1] = (np.log(m.p0), 1.0) if start is None else start
    y[2] = 0.0
    ok = np.ones(n, dtype=bool)
    xs = [0.0]
    ts = [y[2].copy()]
    xds = [m.speed(y[0], m.kr4)]
    if grid is not None:
        x_end, max_steps = float(grid[-1]), grid.size - 1
    x, h = 0.0, 0.02
    with np.errstate(all="ignore"):
        for i in range(max_steps):
            if x >= x_end - 1e-12 or not (ok & control).any():
                break
            h = grid[i + 1] - grid[i] if grid is not None else min(h, x_end - x)
            y_new, e = _rodas_step(m, x, h, y)
            xd = m.speed(y_new[0], m.kr4 * math.exp(-2.0 * (x + h)))
            err = weight * np.sqrt((e[1] ** 2 + (e[2] * xd) ** 2) / 2.0) / tol
            err = np.where(np.isfinite(err) & np.isfinite(y_new).all(axis=0) & (xd > 0), err,
                           np.inf)
            if grid is not None:
                ok &= np.isfinite(err)
                worst = 0.0
            else:
                worst = float(np.max(err[ok])) if ok.any() else 0.0
                if worst > 1.0 and h <= h_min:
                    ok &= err <= 1.0            # these members cannot be followed: drop them
                    worst = float(np.max(err[ok])) if ok.any() else 0.0
            if worst <= 1.0:
                x += h
                y = np.where(ok, y_new, y)
                xs.append(x)
                ts.append(np.where(ok, y_new[2], np.nan))
                xds.append(np.where(ok, xd, np.nan))
            fac = 0.9 * max(worst, 1e-10) ** -0.25 if math.isfinite(worst) else 0.25
            h = max(min(h * min(4.0, max(0.2, fac)), h_max), h_min)
    if x < x_end - 1e-12:
        ok[:] = False
    return _Paths(x=np.array(xs), t=np.array(ts).T, xdot=np.array(xds).T, ok=ok)


# --- a trajectory at the data times ----------------------------------------------------

def _locate(grid_t, tau):
    """Index k with grid_t[k] ≤ τ < grid_t[k+1] (clipped) per row of grid_t (K, N), tau (K, n).

    One search over the rows laid end to end (each row shifted past the last).
    """
    k_rows, n_nodes = grid_t.shape
    lo = min(float(grid_t.min()), float(tau.min()))
    width = max(float(grid_t.max()), float(tau.max())) - lo + 1.0
    shift = (np.arange(k_rows) * 2.0 * width)[:, None]
    flat = (grid_t - lo + shift).ravel()
    k = np.searchsorted(flat, (tau - lo + shift).ravel(), side="right").reshape(tau.shape)
    k -= (np.arange(k_rows) * n_nodes)[:, None] + 1
    return np.clip(k, 0, n_nodes - 2)


def _path_diameter(tau, x, t, xdot, d0):
    """D (m) and dD/dτ (m/s) at times τ (s) after t0 along trajectories.

    Rows of ``t`` and ``xdot`` (K, N) are node times and ẋ at the nodes ``x``
    (N,); τ is (K, n) or (n,), ``d0`` a scalar or (K, 1). Cubic Hermite
    interpolation of x(τ); D0 before τ = 0; beyond the last node x continues
    at the last slope.
    """
    t = np.maximum.accumulate(t, axis=1)
    tau = np.broadcast_to(tau, (t.shape[0], np.shape(tau)[-1]))
    k = _locate(t, tau)
    flat = k + (np.arange(t.shape[0]) * t.shape[1])[:, None]
    t_flat = t.ravel()
    v_flat = xdot.ravel()
    t0 = t_flat[flat]
    t1 = t_flat[flat + 1]
    v0 = v_flat[flat]
    v1 = v_flat[flat + 1]
    x0 = x[k]
    x1 = x[k + 1]
    dlt = np.maximum(t1 - t0, 1e-300)
    s = np.clip((tau - t0) / dlt, 0.0, 1.0)
    s2 = s * s
    s3 = s2 * s
    xi = ((2 * s3 - 3 * s2 + 1) * x0 + (3 * s2 - 2 * s3) * x1
          + dlt * ((s3 - 2 * s2 + s) * v0 + (s3 - s2) * v1))
    vi = ((6 * s2 - 6 * s) * (x0 - x1) / dlt + (3 * s2 - 4 * s + 1) * v0
          + (3 * s2 - 2 * s) * v1)
    t_last = t[:, -1:]
    v_last = xdot[:, -1:]
    beyond = tau > t_last
    xi = np.where(beyond, x[-1] + v_last * (tau - t_last), xi)
    vi = np.where(beyond, v_last, vi)
    before = tau <= 0
    xi = np.where(before, 0.0, xi)
    vi = np.where(before, 0.0, vi)
    d = d0 * np.exp(-xi)
    return d, -d * vi


# --- the Newtonian closed form ---------------------------------------------------------

def _newtonian_time(r, r0, eta, density, surface_tension):
    """Time (s) for a Newtonian neck to thin from radius r0 to r (m).

    From 6 η ẋ + k ρ R² ẋ² = (2X − 1) σ/R: dt/dR = −(b + w)/(2cσ),
    w = (b² + 4kρcσR)^(1/2), b = 6η, integrated in closed form and written
    without cancellation: t = (R0 − R)[b + (2/3)(w0² + w0 w + w²)/(w0 + w)]/(2cσ).
    """
    c_s = _CAPILLARY * surface_tension
    b = 6.0 * eta
    kk = 4.0 * _INERTIA * (density or 0.0) * c_s
    w0 = np.sqrt(b * b + kk * r0)
    w = np.sqrt(b * b + kk * r)
    return (r0 - r) * (b + (2.0 / 3.0) * (w0 * w0 + w0 * w + w * w) / (w0 + w)) / (2.0 * c_s)


def _newtonian_diameter(tau, d0, eta, density, surface_tension):
    """D (m) and dD/dτ (m/s) of a Newtonian neck τ (s) after it starts thinning from D0.

    Rows of ``eta`` (K, 1) against times ``tau`` (K, n) or (n,). Zero after
    breakup. The closed form t(R) is tabulated on a grid dense in ln R and
    inverted by interpolation, then polished by two Newton steps.
    """
    r0 = d0 / 2.0
    c_s = _CAPILLARY * surface_tension
    eta = np.asarray(eta, dtype=float).reshape(-1, 1)
    b = 6.0 * eta
    kk = 4.0 * _INERTIA * (density or 0.0) * c_s
    tau = np.broadcast_to(np.maximum(tau, 0.0), (eta.shape[0], np.shape(tau)[-1]))
    grid = r0 * np.exp(-np.linspace(0.0, 12.0, 241))
    t_grid = _newtonian_time(grid[None, :], r0, eta, density, surface_tension)
    t_break = _newtonian_time(0.0, r0, eta, density, surface_tension)
    log_r = np.empty(tau.shape)
    for k in range(tau.shape[0]):
        log_r[k] = np.interp(tau[k], t_grid[k], np.log(grid))
    r = np.exp(log_r)
    for _ in range(2):
        g = _newtonian_time(r, r0, eta, density, surface_tension) - tau
        r = np.clip(r + g * 2.0 * c_s / (b + np.sqrt(b * b + kk * r)), 0.0, r0)
    broken = tau >= t_break
    r = np.where(broken, 0.0, r)
    speed = np.where(broken | (tau <= 0), 0.0, 2.0 * c_s / (b + np.sqrt(b * b + kk * r)))
    return 2.0 * r, -2.0 * speed


# --- batched, bounded Levenberg–Marquardt ---------------------------------------------------

def _levenberg_marquardt(resid_jac, p0, lower, upper, free, *, max_iter=60, rtol=1e-9, atol=0.0,
                         mu=1e-4, max_step=None):
    """Minimise Σ r² for each row of ``p0`` (K, q) within [lower, upper] (q,) or (K, q).

    ``resid_jac(p)`` returns residuals (K, n) and Jacobians (K, n, q) for
    parameter rows p; coordinates where ``free`` (K, q) is False stay put; a
    step is shortened (as a whole) so that no coordinate moves by more than
    ``max_step`` (q,), which keeps nearly flat directions from sending the
    linearisation far out. A row stops when the step predicted by its
    linearisation would lower χ² by less than max(``rtol``·χ², ``atol``).
    Returns (p, χ², residuals, J at p).
    """
    p = np.array(p0, dtype=float)
    lower = np.broadcast_to(lower, p.shape)
    upper = np.broadcast_to(upper, p.shape)
    free = np.broadcast_to(free, p.shape)
    r, jac = resid_jac(p)
    chi2 = np.sum(r * r, axis=1)
    chi2 = np.where(np.isfinite(chi2), chi2, np.inf)
    mu = np.full(p.shape[0], float(mu))
    done = ~np.isfinite(chi2)
    eye = np.eye(p.shape[1])
    for _ in range(max_iter):
        grad_all = np.einsum("kni,kn->ki", jac, r)
        # coordinates held by a bound they are pushed against take no part in the step
        active = ((p <= lower) & (grad_all > 0)) | ((p >= upper) & (grad_all < 0))
        use = free & ~active
        jf = np.where(use[:, None, :], jac, 0.0)
        jtj = np.einsum("kni,knj->kij", jf, jf)
        grad = np.where(use, grad_all, 0.0)
        scale = np.where(use, np.maximum(np.einsum("kii->ki", jtj), 1e-30), 1.0)
        a = jtj + (mu[:, None] * scale)[:, :, None] * eye + (~use)[:, :, None] * eye
        raw = -np.linalg.solve(a, grad[..., None])[..., 0]
        raw = np.where(use & np.isfinite(raw), raw, 0.0)
        if max_step is not None:
            raw *= np.minimum(1.0, np.min(max_step / np.maximum(np.abs(raw), 1e-300), axis=1,
                                          keepdims=True))
        step = np.clip(p + raw, lower, upper) - p
        clipped = np.any(np.abs(step - raw) > 1e-12 * (1.0 + np.abs(raw)), axis=1)
        pred = -(2.0 * np.einsum("ki,ki->k", grad, step)
                 + np.einsum("ki,kij,kj->k", step, jtj, step))
        done |= (pred <= np.maximum(rtol * chi2, atol)) & ~clipped
        if done.all():
            break
        hopeless = (pred <= 0) & ~done     # a clipped step that does not descend: shorten it
        trial = np.where((done | hopeless)[:, None], p, p + step)
        r_t, jac_t = resid_jac(trial)
        chi2_t = np.sum(r_t * r_t, axis=1)
        chi2_t = np.where(np.isfinite(chi2_t), chi2_t, np.inf)
        better = (chi2_t < chi2) & ~done & ~hopeless
        p = np.where(better[:, None], trial, p)
        r = np.where(better[:, None], r_t, r)
        jac = np.where(better[:, None, None], jac_t, jac)
        chi2 = np.where(better, chi2_t, chi2)
        mu = np.where(better, np.maximum(mu / 10.0, 1e-9), mu * 8.0)
        done |= mu >= 1e10
    return p, chi2, r, jac


# --- data, noise and whitening -------------------------------------------------------------

#: Fewest usable frames a fit accepts.
MIN_POINTS = 8


@dataclass(frozen=True)
class _Data:
    """The frames a fit uses and what it knows of them (SI units)."""

    t: np.ndarray        # frame times (s), increasing
    d: np.ndarray        # diameters (m)
    gap: np.ndarray      # frames between consecutive points (≥ 1), length n − 1
    d0: float            # diameter at the free-thinning start (m)
    t_start: float       # the given free-thinning start (s)
    noise: float         # diameter noise (m)
    density: float | None
    surface_tension: float


def _select(time_s, diameter_m, *, t_start_s, resolution_floor_m, noise_m, density,
            surface_tension):
    """The frames of free thinning above the floor, or the reason there are too few."""
    t = np.asarray(time_s, dtype=float)
    d = np.asarray(diameter_m, dtype=float)
    if t.shape != d.shape or t.ndim != 1:
        raise ValueError("time_s and diameter_m must be 1-D arrays of the same length")
    order = np.argsort(t, kind="stable")
    t, d = t[order], d[order]
    after = np.isfinite(t) & (t >= t_start_s - 1e-9 * max(abs(t_start_s), 1e-30))
    t, d = t[after], d[after]
    below = np.flatnonzero(np.isfinite(d) & (d < resolution_floor_m))
    if below.size:
        t, d = t[:below[0]], d[:below[0]]
    usable = np.isfinite(d) & (d > 0)
    if not usable.any():
        return "no finite diameter above the resolution floor after the free-thinning start"
    frame = np.arange(t.size)[usable]
    t, d = t[usable], d[usable]
    if t.size < MIN_POINTS:
        return (f"only {t.size} usable frames between the free-thinning start and the "
                f"resolution floor (need {MIN_POINTS})")
    # D at the start: the first frame, moved back to t_start along the first two frames'
    # slope (by half the first frame at most)
    slope = (d[0] - d[1]) / max(t[1] - t[0], 1e-300)
    d0 = float(d[0] + min(max(slope * (t[0] - t_start_s), 0.0), 0.5 * d[0]))
    if not np.log(d0 / d.min()) > 0.2:
        return "the diameter does not fall (less than 20 % from start to end)"
    if noise_m is not None and noise_m > 0:
        noise = float(noise_m)
    else:  # residual of the 3-point mean has variance 1.5 σ²
        second = d[1:-1] - 0.5 * (d[:-2] + d[2:])
        noise = 1.4826 * float(np.median(np.abs(second - np.median(second)))) / math.sqrt(1.5)
        noise = max(noise, 1e-6 * float(np.median(d)))
    return _Data(t=t, d=d, gap=np.diff(frame).astype(float), d0=d0, t_start=float(t_start_s),
                 noise=noise, density=density if density else None,
                 surface_tension=float(surface_tension))


def _whiten(v, phi, gap, axis=-1):
    """Prais–Winsten transform of residual-like arrays for AR(1) noise of coefficient φ per frame.

    e_0 = v_0, e_i = (v_i − a_i v_(i−1))/(1 − a_i²)^(1/2) with a_i = φ^gap_i, so
    that white noise of the marginal variance stays at that variance.
    """
    if phi <= 0:
        return v
    v = np.moveaxis(v, axis, -1)
    a = phi ** gap
    out = np.empty_like(v)
    out[..., 0] = v[..., 0]
    out[..., 1:] = (v[..., 1:] - a * v[..., :-1]) / np.sqrt(1.0 - a * a)
    return np.moveaxis(out, -1, axis)


def _ar1(resid, gap, n_params):
    """AR(1) coefficient per frame from fit residuals (bias-corrected lag-1 autocorrelation).

    Kendall's correction (1 + 3ρ)/n plus n_params/n for the fitted parameters;
    clipped to [0, 0.95] (an anti-correlated estimate is read as white noise).
    """
    n = resid.size
    pairs = gap == 1
    den = float(np.sum(resid * resid))
    if n < 8 or den <= 0 or pairs.sum() < 4:
        return 0.0
    rho = float(np.sum(resid[1:][pairs] * resid[:-1][pairs])) / den * n / pairs.sum()
    rho += (1.0 + 3.0 * rho + n_params) / n
    return float(np.clip(rho, 0.0, 0.95))


# --- the Newtonian fit -------------------------------------------------------------------------

_LOG_ETA = (math.log(1e-5), math.log(1e4))


def _newtonian_residuals(data, phi, free_eta, eta_fixed):
    """Residual/Jacobian function over rows p = [ln η, t0] for the Newtonian closed form."""
    def resid_jac(p):
        eta = np.exp(p[:, 0]) if free_eta else np.full(p.shape[0], eta_fixed)
        h = 1e-6
        etas = np.concatenate([eta, eta * math.exp(h)])[:, None]
        tau = data.t[None, :] - np.concatenate([p[:, 1], p[:, 1]])[:, None]
        d, dd = _newtonian_diameter(tau, data.d0, etas, data.density, data.surface_tension)
        k = p.shape[0]
        r = (data.d - d[:k]) / data.noise
        jac = np.empty(r.shape + (2,))
        jac[..., 0] = -(d[k:] - d[:k]) / h / data.noise
        jac[..., 1] = dd[:k] / data.noise
        return _whiten(r, phi, data.gap), _whiten(jac, phi, data.gap, axis=1)
    return resid_jac


def _t0_bounds(data):
    span = data.t[-1] - data.t[0]
    return data.t[0] - 0.5 * span, data.t[0] + 0.05 * span


def _newtonian_guess(data):
    """(η, t0) from the mean thinning speed over the record (Papageorgiou's coefficient)."""
    speed = (data.d[0] - data.d[-1]) / max(data.t[-1] - data.t[0], 1e-300)
    eta = 2.0 * laws.PAPAGEORGIOU_COEFFICIENT * data.surface_tension / max(speed, 1e-300)
    return float(np.clip(eta, 1e-5, 1e4)), float(data.t[0])


@dataclass(frozen=True)
class _Outcome:
    """A fitted model before it becomes a :class:`ModelFit` (internal)."""

    kind: str                     # "newtonian" | "viscoelastic"
    values: dict
    chi2_white: float
    chi2_plain: float
    n_free: int
    scale2: float
    phi: float
    intervals: dict
    curve_state: tuple


def _newtonian_bounds(data, free):
    lo = np.array([_LOG_ETA[0], _t0_bounds(data)[0]])
    hi = np.array([_LOG_ETA[1], _t0_bounds(data)[1]])
    return lo, hi, np.array([[free, True]])


def _newtonian_least_squares(data, solvent_viscosity, phi, rows=False):
    """(η, t0) of the Newtonian closed form by least squares from three starting viscosities."""
    free = solvent_viscosity is None
    eta0, t00 = _newtonian_guess(data)
    if not free:
        eta0 = float(solvent_viscosity)
    lo, hi, mask = _newtonian_bounds(data, free)
    starts = np.array([[math.log(eta0) + dv, t00] for dv in ((-1.5, 0.0, 1.5) if free else (0.0,))])
    starts[:, 0] = np.clip(starts[:, 0], lo[0], hi[0])
    p, chi2, _, _ = _levenberg_marquardt(_newtonian_residuals(data, phi, free, eta0), starts, lo,
                                         hi, mask)
    best = p[int(np.argmin(chi2))]
    if rows:
        return best[None, :]
    return (math.exp(best[0]) if free else eta0), float(best[1])


def _fit_newtonian(data, *, solvent_viscosity):
    """Least squares of the Newtonian closed form; profile-likelihood interval of η."""
    free = solvent_viscosity is None
    eta0 = float(solvent_viscosity) if not free else 0.0   # only used when η is fixed
    lo, hi, mask = _newtonian_bounds(data, free)
    starts = _newtonian_least_squares(data, solvent_viscosity, 0.0, rows=True)
    plain = _newtonian_residuals(data, 0.0, free, eta0)(starts)[0][0]
    phi = _ar1(plain, data.gap, 1 + free)
    fun = _newtonian_residuals(data, phi, free, eta0)
    p, chi2, _, jac = _levenberg_marquardt(fun, starts, lo, hi, mask)
    n_free = 1 + int(free)
    dof = max(data.t.size - n_free, 1)
    scale2 = float(chi2[0]) / dof
    intervals = {}
    if free:
        ends = _profile_intervals(fun, p[0], lo, hi, mask[0], [0], jac[0], chi2[0], scale2, dof)
        intervals["eta"] = tuple(float(v) for v in np.exp(ends[0]))
    eta = math.exp(p[0, 0]) if free else eta0
    plain = _newtonian_residuals(data, 0.0, free, eta0)(p)[0][0]
    return _Outcome(kind="newtonian", values={"eta": eta, "t0": float(p[0, 1]), "G": 0.0,
                                              "lam": math.nan, "L2": None},
                    chi2_white=float(chi2[0]), chi2_plain=float(np.sum(plain ** 2)),
                    n_free=n_free, scale2=scale2, phi=phi, intervals=intervals,
                    curve_state=("newtonian", data.d0, float(p[0, 1]), eta, data.density,
                                 data.surface_tension))


# --- profile likelihood ------------------------------------------------------------------------

def _profile_starts(p_hat, jac, scale2, dof, indices, lower, upper, max_step=None,
                    reach=(1.0,)):
    """Rows at ``reach`` Wald half-widths (t·SE) either side of ``p_hat`` in each index.

    The other coordinates follow the Wald regression line (their conditional
    optimum under the quadratic approximation), each by at most half its
    ``max_step``: along poorly determined directions (G, η_s when the
    transient is not seen) the linearisation does not hold that far. Rows
    run over indices, then sides (−, +), then ``reach``.
    """
    t_crit = float(stats.t.ppf(0.975, dof))
    cov = np.linalg.pinv(jac.T @ jac) * scale2
    cap = np.full(p_hat.size, np.inf) if max_step is None else 0.5 * np.asarray(max_step)
    rows = []
    for index in indices:
        sd = math.sqrt(max(cov[index, index], 1e-300))
        for side in (-1.0, 1.0):
            for k in reach:
                move = np.clip(side * k * t_crit * cov[:, index] / sd, -cap, cap)
                move[index] = side * k * t_crit * sd
                rows.append(p_hat + move)
    return np.clip(np.array(rows), lower, upper)


#: Where the profile is evaluated, in Wald half-widths either side.
_PROFILE_REACH = (0.8, 1.4)


def _profile_intervals(fun, p_hat, lower, upper, free, indices, jac, chi2_min, scale2, dof, *,
                       max_step=None):
    """95 % profile-likelihood intervals of the coordinates ``indices`` of ``p_hat``.

    The set {Δχ²/s² ≤ t²(0.975, dof)}. The profile (the other free
    coordinates re-optimised) is evaluated at 0.8 and 1.4 Wald half-widths
    either side, all in one batch, each started on the Wald line or, where
    that is worse, with the coordinate moved alone; the signed root √(Δχ²/s²), close to linear
    in the coordinate, is interpolated to ±t (extrapolated along its last
    segment when it stays below). A side whose profile stays flat is NaN.
    ``max_step`` bounds the re-optimisation's steps (see
    :func:`_levenberg_marquardt`). Returns {index: (low, high)}.
    """
    t_crit = float(stats.t.ppf(0.975, dof))
    nr = len(_PROFILE_REACH)
    rows = _profile_starts(p_hat, jac, scale2, dof, indices, lower, upper, max_step,
                           _PROFILE_REACH)
    idx = np.repeat(indices, 2 * nr)
    # where the Wald line leads somewhere worse than moving the coordinate alone, start there
    alone = np.repeat(p_hat[None, :], rows.shape[0], axis=0)
    alone[np.arange(rows.shape[0]), idx] = rows[np.arange(rows.shape[0]), idx]
    r_both, _ = fun(np.r_[rows, alone])
    chi2_both = np.sum(r_both * r_both, axis=1)
    chi2_both = np.where(np.isfinite(chi2_both), chi2_both, np.inf)
    worse = chi2_both[:rows.shape[0]] > chi2_both[rows.shape[0]:]
    rows[worse] = alone[worse]
    mask = np.repeat(free[None, :], rows.shape[0], axis=0)
    mask[np.arange(rows.shape[0]), idx] = False
    _, chi2, _, _ = _levenberg_marquardt(fun, rows, lower, upper, mask, max_iter=6, rtol=1e-8,
                                         atol=0.01 * scale2, max_step=max_step)
    off = np.abs(rows[np.arange(rows.shape[0]), idx] - p_hat[idx]).reshape(len(indices), 2, nr)
    root = np.sqrt(np.maximum(chi2 - chi2_min, 0.0) / scale2).reshape(len(indices), 2, nr)
    out = {}
    for j, index in enumerate(indices):
        ends = []
        for k, side in enumerate((-1.0, 1.0)):
            o = np.r_[0.0, off[j, k]]
            q = np.maximum.accumulate(np.r_[0.0, root[j, k]])
            if not (np.isfinite(o).all() and np.isfinite(q).all()) or q[-1] <= 0:
                ends.append(math.nan)
            elif q[-1] >= t_crit:
                ends.append(p_hat[index] + side * float(np.interp(t_crit, q, o)))
            else:   # beyond the last point: continue its slope
                slope = (q[-1] - q[-2]) / max(o[-1] - o[-2], 1e-300)
                ends.append(p_hat[index] + side * (o[-1] + (t_crit - q[-1]) / slope)
                            if slope > 0 else math.nan)
        out[index] = (ends[0], ends[1])
    return out


# --- the viscoelastic fit --------------------------------------------------------------------
#
# θ = (ln λ, ln G, w, ln η_s, ln D0): λ in s, G in Pa, η_s in Pa·s, D0 in m and
# w = 1/(G L²) in 1/Pa, so that the end of the record (which sets G L², through
# η_E,∞ ≈ 2 G λ L²) pins w when the early transient (which alone sets G) is not seen,
# and w = 0 is Oldroyd-B.

_LAM, _G, _W, _ETA, _D0 = range(5)
#: Largest move of θ in one least-squares step (w in units of the space's ``w_scale``).
_MAX_STEP = np.array([0.3, 0.7, 2.0, 0.7, 0.1])
#: Finite-difference steps of θ (w in units of the space's ``w_scale``).
_STEP = np.array([1e-4, 1e-4, 1e-3, 1e-4, 1e-5])
#: FENE-P needs 3 A_rr / L² < 1; L² is kept above 20.
_INV_L2_MAX = 0.05


@dataclass(frozen=True)
class _Space:
    """Which θ coordinates are fitted, their bounds, a fixed 1/L² when L² is given, and the
    weak priors that keep directions the record cannot resolve from drifting.

    ``prior_mean``/``prior_sd`` have six entries: θ and t0 (s); an infinite SD is no prior.
    ``w_scale`` (1/Pa) is the w at which finite extensibility starts to show at the floor.
    """

    free: list
    lower: np.ndarray
    upper: np.ndarray
    inv_l2: float | None      # fixed 1/L² (0: Oldroyd-B), or None when w is fitted
    prior_mean: np.ndarray
    prior_sd: np.ndarray
    w_scale: float


def _batch(theta, data, space):
    """A :class:`_Batch` from parameter rows θ (K, 5)."""
    g = np.exp(theta[:, _G])
    u = (np.minimum(theta[:, _W] * g, _INV_L2_MAX) if space.inv_l2 is None
         else np.full(g.shape, space.inv_l2))
    return _Batch(np.exp(theta[:, _LAM]), g, u, np.exp(theta[:, _ETA]), np.exp(theta[:, _D0]),
                  density=data.density, surface_tension=data.surface_tension)


def _x_end(data, theta):
    """The x = ln(D0/D) every row of θ must reach to pass the smallest diameter."""
    return float(np.max(theta[:, _D0])) - math.log(float(data.d.min())) + 0.3


def _on_manifold(theta, data):
    """(ln S, A_rr) of a thread already in the elasto-capillary balance at D0 = e^θ_D0.

    There ε̇ = 2/(3λ): S = 3 η_s ε̇ + k ρ R² (ε̇/2)², and A_rr has relaxed to its
    steady f/(f + 2/3) ≈ 0.6.
    """
    rate = 1.0 / (3.0 * np.exp(theta[:, _LAM]))
    r0 = np.exp(theta[:, _D0]) / 2.0
    s = 6.0 * np.exp(theta[:, _ETA]) * rate + _INERTIA * (data.density or 0.0) * (r0 * rate) ** 2
    return np.log(s), np.full(theta.shape[0], 0.6)


def _model_residuals(data, space, fixed, phi, *, tol, grid=None, on_manifold=False, priors=True):
    """Residual/Jacobian function over rows p = [θ_free, t0] of the 0-D model.

    Each row is integrated with one finite-difference neighbour per free
    coordinate, all in one batch (shared steps, so the differences are
    smooth); t0 enters exactly, as a shift. ``fixed`` is the full θ whose
    other coordinates hold; ``grid`` freezes the integration steps. A row
    whose trajectory fails has infinite residuals. With ``priors`` the weak
    priors follow the data residuals.
    """
    free = space.free
    nf = len(free)
    h = _STEP[free] * np.where(np.array(free) == _W, space.w_scale, 1.0)
    eye = np.eye(5)[free]
    keys = free + [5]
    cols = [j for j, key in enumerate(keys) if np.isfinite(space.prior_sd[key])]
    mean = space.prior_mean[[keys[j] for j in cols]]
    sd = space.prior_sd[[keys[j] for j in cols]]

    def resid_jac(p):
        k = p.shape[0]
        theta = np.repeat(fixed[None, :], k, axis=0)
        theta[:, free] = p[:, :nf]
        members = np.concatenate([theta] + [theta + h[j] * eye[j] for j in range(nf)])
        weight = np.r_[np.ones(k), np.full(k * nf, 0.1)]
        paths = _polymer_paths(_batch(members, data, space), _x_end(data, members), tol=tol,
                               weight=weight, grid=grid,
                               start=_on_manifold(members, data) if on_manifold else None)
        tau = data.t[None, :] - np.tile(p[:, nf], nf + 1)[:, None]
        d, dd = _path_diameter(tau, paths.x, paths.t, paths.xdot,
                               np.exp(members[:, _D0])[:, None])
        d = d.reshape(nf + 1, k, -1)
        r = (data.d - d[0]) / data.noise
        jac = np.empty(r.shape + (nf + 1,))
        for j in range(nf):
            jac[..., j] = -(d[j + 1] - d[0]) / (h[j] * data.noise)
        jac[..., nf] = dd[:k] / data.noise
        bad = ~paths.ok.reshape(nf + 1, k).all(axis=0) | ~np.isfinite(r).all(axis=1)
        r[bad] = np.inf
        jac[bad] = 0.0
        r = _whiten(r, phi, data.gap)
        jac = _whiten(jac, phi, data.gap, axis=1)
        if not priors or not cols:
            return r, jac
        r_p = (p[:, cols] - mean) / sd
        j_p = np.zeros((k, len(cols), nf + 1))
        j_p[:, np.arange(len(cols)), cols] = 1.0 / sd
        return np.concatenate([r, r_p], axis=1), np.concatenate([jac, j_p], axis=1)
    return resid_jac


def _local_slopes(t, y, lo, hi):
    """Least-squares slope of y(t) over the index windows [lo_i, hi_i]."""
    tc = t - t.mean()
    c = [np.r_[0.0, np.cumsum(v)] for v in (np.ones(t.size), tc, tc * tc, y, tc * y)]
    s0, s1, s2, sy, sty = (v[hi + 1] - v[lo] for v in c)
    return (s0 * sty - s1 * sy) / np.maximum(s0 * s2 - s1 * s1, 1e-300)


def _elastic_window(data, *, span=0.1, tolerance=0.15):
    """(first, last) frame of the longest stretch of near-constant d ln D/dt.

    Local slopes over windows of ±``span`` in ln D (at least ±2 frames); a
    stretch is the run of frames whose slope is within ``tolerance`` of a
    candidate's; the longest in ln D fallen times its share of the frames wins.
    """
    y = np.log(data.d)
    n = y.size
    ym = -np.minimum.accumulate(y)            # increasing
    idx = np.arange(n)
    lo = np.minimum(np.searchsorted(ym, ym - span, side="left"), idx - 2).clip(0, n - 1)
    hi = np.maximum(np.searchsorted(ym, ym + span, side="right") - 1, idx + 2).clip(0, n - 1)
    slope = _local_slopes(data.t, y, lo, hi)
    cand = np.flatnonzero(slope < 0)
    if cand.size == 0:
        return 0, n - 1
    cand = cand[np.linspace(0, cand.size - 1, min(cand.size, 200)).astype(int)]
    with np.errstate(divide="ignore", invalid="ignore"):
        close = np.abs(slope[None, :] / slope[cand, None] - 1.0) < tolerance
    left = np.where(~close & (idx[None, :] < cand[:, None]), idx[None, :], -1).max(axis=1) + 1
    right = np.where(~close & (idx[None, :] > cand[:, None]), idx[None, :], n).min(axis=1) - 1
    score = (ym[right] - ym[left]) * np.sqrt((right - left + 1) / n)
    best = int(np.argmax(score))
    return int(left[best]), int(right[best])


def _paths_t0_residuals(paths, d0, data):
    """Residual/Jacobian over t0 alone (rows p (K, 1)), one exact trajectory per row."""
    def resid_jac(p):
        d, dd = _path_diameter(data.t[None, :] - p[:, :1], paths.x, paths.t, paths.xdot, d0)
        return (data.d - d) / data.noise, (dd / data.noise)[..., None]
    return resid_jac


def _best_t0(paths, d0, data):
    """Best t0 per trajectory: a coarse scan (on at most 60 frames), then least squares."""
    lo, hi = _t0_bounds(data)
    grid = np.linspace(lo, hi, 16)
    k = paths.t.shape[0]
    sub = np.unique(np.linspace(0, data.t.size - 1, min(data.t.size, 60)).astype(int))
    tau = (data.t[sub][None, :] - grid[:, None]).ravel()
    d, _ = _path_diameter(tau, paths.x, paths.t, paths.xdot, d0)
    chi2 = np.sum(((data.d[sub] - d.reshape(k, grid.size, sub.size)) / data.noise) ** 2, axis=2)
    chi2 = np.where(np.isfinite(chi2), chi2, np.inf)
    t0 = grid[np.argmin(chi2, axis=1)][:, None]
    t0, chi2, _, _ = _levenberg_marquardt(_paths_t0_residuals(paths, d0, data), t0, lo, hi,
                                         np.ones((k, 1), dtype=bool), rtol=1e-6)
    return t0[:, 0], np.where(paths.ok, chi2, np.inf)


def _elastic_start(data, start, space, g_guess, eta_guess):
    """λ and w from the elastic stretch alone: the model started on the elastic balance.

    The frames from the start of the longest near-exponential stretch (or of
    ``start["window_s"]``) on are fitted with the thread already in the
    elasto-capillary balance at their first diameter (:func:`_on_manifold`);
    λ, w (unless L² is given), η_s (unless given; weakly held to its guess)
    and that first frame's time are free, G stays at its guess (it hardly
    matters there). Returns (λ, w, η_s, first frame) or None.
    """
    first, last = _elastic_window(data)
    if start and start.get("window_s") is not None:
        first = int(np.clip(np.searchsorted(data.t, float(start["window_s"][0])), 0,
                            data.t.size - MIN_POINTS))
    lam0 = start.get("relaxation_time_s") if start else None
    if not (lam0 and lam0 > 0):
        sl = slice(first, max(last, first + 3) + 1)
        slope = np.polyfit(data.t[sl], np.log(data.d[sl]), 1)[0]
        lam0 = -1.0 / (3.0 * slope) if slope < 0 else (data.t[-1] - data.t[0]) / 3.0
    sub = dataclasses.replace(data, t=data.t[first:], d=data.d[first:], gap=data.gap[first:])
    if sub.t.size < MIN_POINTS:
        return None
    c_s = _CAPILLARY * data.surface_tension
    tail = slice(max(sub.t.size - max(4, sub.t.size // 8), 0), None)
    speed = -np.polyfit(sub.t[tail], sub.d[tail], 1)[0]
    ws = [0.0]
    if space.inv_l2 is None and speed > 0 and c_s / speed > 3.0 * eta_guess:
        ws.append(2.0 * float(lam0) / (c_s / speed - 3.0 * eta_guess))  # 1/(G L²) from η_E,∞
    # η_s sets the solvent's share 3 η_s ε̇ of the stress along the stretch: fitted too
    # (from the start given, when it is free), weakly held to it
    eta_free = _ETA in space.free
    free = [_LAM] + ([_W] if space.inv_l2 is None else []) + ([_ETA] if eta_free else [])
    prior_mean = np.zeros(6)
    prior_mean[_ETA] = math.log(eta_guess)
    prior_sd = np.full(6, math.inf)
    prior_sd[_ETA] = 2.0 if eta_free else math.inf
    sub_space = dataclasses.replace(space, free=free, prior_mean=prior_mean, prior_sd=prior_sd)
    fixed = np.array([math.log(lam0), math.log(g_guess), 0.0, math.log(eta_guess),
                      math.log(sub.d[0])])
    rows = np.array([[math.log(lam0)] + ([w] if space.inv_l2 is None else [])
                     + ([math.log(eta_guess)] if eta_free else []) + [sub.t[0]]
                     for w in (ws if space.inv_l2 is None else [0.0])])
    lo = np.r_[space.lower[free], sub.t[0] - (sub.t[-1] - sub.t[0])]
    hi = np.r_[space.upper[free], sub.t[0] + 3.0 * (sub.t[1] - sub.t[0])]
    fun = _model_residuals(sub, sub_space, fixed, 0.0, tol=1e-4, on_manifold=True)
    p, chi2, _, _ = _levenberg_marquardt(fun, rows, lo, hi, np.ones(rows.shape, dtype=bool),
                                         max_iter=6, rtol=1e-5, atol=0.5)
    if not np.isfinite(chi2).any():
        return None
    best = p[int(np.argmin(chi2))]
    w = best[free.index(_W)] if space.inv_l2 is None else 0.0
    eta = math.exp(best[free.index(_ETA)]) if eta_free else eta_guess
    return math.exp(best[0]), w, eta, first


def _fit_viscoelastic(data, *, solvent_viscosity, extensibility, start, eta_guess):
    """Least squares of the 0-D model over the whole record; profile likelihood of λ (and η_s).

    Starting values: λ, w and η_s from the elastic stretch
    (:func:`_elastic_start`); G from where that stretch, extrapolated back,
    meets the start (affine stretching, G (D0/D)^4 = (2X − 1)σ/R); η_s also
    from the thinning before it (Newtonian-like at η_s + η_p). A spread of G
    (×0.3, 1, 3) and η_s (×1 … 0.01) is integrated in one batch; the three
    best have their transient (G, η_s, t0) refined with λ and w held, and the
    best goes to a Levenberg–Marquardt on the model itself (finite-difference
    Jacobian, one integration per iteration), with weak priors on ln G (±2),
    ln D0 (±0.5), ln η_s (±3) and t0 (± one frame about ``t_start_s``) that
    only matter along directions the record leaves flat. The residuals'
    AR(1) coefficient then whitens a polish on frozen steps, where the
    profile of λ is taken.
    """
    if extensibility == "fit":
        inv_l2 = None
    elif extensibility is None or extensibility == "oldroyd-b":
        inv_l2 = 0.0
    else:
        inv_l2 = 1.0 / float(extensibility)
    free = [_LAM, _G] + ([_W] if inv_l2 is None else []) + (
        [_ETA] if solvent_viscosity is None else []) + [_D0]
    nf = len(free)
    d_first = float(data.d[0])
    c_s = _CAPILLARY * data.surface_tension
    r0 = data.d0 / 2.0
    w_scale = float(data.d.min()) / (2.0 * c_s)
    lower = np.array([math.log(1e-7), math.log(1e-3), 0.0, _LOG_ETA[0], math.log(0.9 * d_first)])
    upper = np.array([math.log(1e3), math.log(1e6), 1.0, _LOG_ETA[1], math.log(5.0 * d_first)])
    eta0 = eta_guess if solvent_viscosity is None else float(solvent_viscosity)
    first, _ = _elastic_window(data)
    if solvent_viscosity is None and first >= 4:
        # the thinning before the elastic stretch is Newtonian-like at η_0 = η_s + η_p
        pre = dataclasses.replace(data, t=data.t[:first + 1], d=data.d[:first + 1],
                                  gap=data.gap[:first])
        eta0 = _newtonian_least_squares(pre, None, 0.0)[0]
    frame = float(np.median(np.diff(data.t) / data.gap))
    inf = math.inf
    # w at which L² is reached at the smallest diameter, where A_zz ≈ (2X − 1)σ/(G R)
    space = _Space(free=free, lower=lower, upper=upper, inv_l2=inv_l2,
                   prior_mean=np.zeros(6), prior_sd=np.full(6, inf), w_scale=w_scale)
    g_amp = c_s / r0 * (float(data.d[first]) / data.d0) ** 3   # refined once λ is known
    eta_fracs = (1.0, 0.3, 0.1, 0.03, 0.01) if solvent_viscosity is None else (1.0,)
    found = _elastic_start(data, start, space, g_amp, eta0 * 0.3)
    if found is None:
        return "too few frames in the elastic stretch to start the fit"
    lam1, w1, eta1, first = found
    d_w, t_w = float(data.d[first]), float(data.t[first])
    d_ec0 = d_w * math.exp((t_w - data.t_start) / (3.0 * lam1))
    g_amp = c_s / r0 * min(d_ec0 / data.d0, 1.0) ** 3
    etas = [eta0 * fe for fe in eta_fracs] + ([eta1] if solvent_viscosity is None else [])
    cands = np.array([[math.log(lam1), math.log(g), w1, math.log(eta), math.log(data.d0)]
                      for g in (0.3 * g_amp, g_amp, 3.0 * g_amp) for eta in etas])
    cands = np.clip(cands, lower, upper)
    paths = _polymer_paths(_batch(cands, data, space), _x_end(data, cands), tol=1e-2, h_max=1.0)
    t0s, chi2s = _best_t0(paths, np.exp(cands[:, _D0])[:, None], data)
    order = np.argsort(chi2s)[:3]
    if not np.isfinite(chi2s[order[0]]):
        return "the 0-D model could not be integrated at the starting values"
    # the three best starts: their transient (G, η_s, t0) refined with λ, w held
    space = dataclasses.replace(
        space, prior_mean=np.array([0.0, cands[order[0], _G], 0.0, math.log(eta0),
                                    math.log(data.d0), data.t_start]),
        prior_sd=np.array([inf, 2.0, inf, 3.0, 0.5, max(frame, 1e-300)]))
    t_lo, t_hi = _t0_bounds(data)
    lo = np.r_[lower[free], t_lo]
    hi = np.r_[upper[free], t_hi]
    tol = float(np.clip(0.03 * data.noise / data.d0, 3e-6, 3e-5))
    max_step = np.r_[_MAX_STEP[free] * np.where(np.array(free) == _W, w_scale, 1.0), 3.0 * frame]
    rows = np.c_[cands[order][:, free], t0s[order]]
    transient = np.array([k in (_G, _ETA) for k in free] + [True])
    p3, chi3, _, _ = _levenberg_marquardt(
        _model_residuals(data, space, cands[order[0]], 0.0, tol=10.0 * tol), rows, lo, hi,
        np.repeat(transient[None, :], rows.shape[0], axis=0), max_iter=5, rtol=1e-4, atol=1.0,
        max_step=max_step)
    if not np.isfinite(chi3).any():
        return "the 0-D model could not be integrated at the starting values"
    best = int(np.argmin(chi3))
    centre = cands[order[best]].copy()
    centre[free] = p3[best, :nf]
    space = dataclasses.replace(space, prior_mean=np.r_[space.prior_mean[:_G], centre[_G],
                                                        space.prior_mean[_G + 1:]])
    mask = np.ones((1, nf + 1), dtype=bool)
    p = np.r_[centre[free], p3[best, nf]][None, :]
    # Levenberg–Marquardt on the model itself: first with adaptive steps (χ² then carries a
    # little noise of the integration, so this only brings the fit close) ...
    fun = _model_residuals(data, space, centre, 0.0, tol=tol)
    p, chi2, r, jac = _levenberg_marquardt(fun, p, lo, hi, mask, max_iter=10, rtol=1e-5,
                                           atol=0.5, max_step=max_step)
    if not np.isfinite(chi2[0]):
        return "the 0-D model could not be integrated near the fitted values"
    theta = centre.copy()
    theta[free] = p[0, :nf]
    dof = max(data.t.size - nf - 1, 1)
    which = [free.index(_LAM)] + ([free.index(_ETA)] if _ETA in free else [])
    plain = r[0, :data.t.size]            # φ = 0 so far: the data part is unwhitened
    phi = _ar1(plain, data.gap, nf + 1)   # correlated noise: whiten with its AR(1) coefficient
    scale2 = max(float(np.sum(_whiten(plain, phi, data.gap) ** 2)) / dof, 1e-12)
    # ... then on steps frozen on a grid fine for the optimum and the profile's reach, where
    # χ² is a smooth function of the parameters: polish (whitened), then profile
    reach = _profile_starts(p[0], jac[0], scale2, dof, which[:1], lo, hi, max_step,
                            _PROFILE_REACH)
    span = np.repeat(theta[None, :], reach.shape[0] + 1, axis=0)
    span[1:, free] = reach[:, :nf]
    grid = _polymer_paths(_batch(span, data, space), _x_end(data, span), tol=tol / 2.0).x
    fun = _model_residuals(data, space, theta, phi, tol=tol, grid=grid)
    p, chi2, r_hat, jac_hat = _levenberg_marquardt(fun, p, lo, hi, mask, max_iter=4, rtol=1e-8,
                                                   atol=0.02 * scale2, max_step=max_step)
    theta[free] = p[0, :nf]
    if not np.isfinite(chi2[0]):
        return "the 0-D model could not be integrated near the fitted values"
    p_hat = p[0]
    chi2_min = float(chi2[0])
    scale2 = float(np.sum(r_hat[0, :data.t.size] ** 2)) / dof
    ends = _profile_intervals(fun, p_hat, lo, hi, np.ones(nf + 1, dtype=bool), which[:1],
                              jac_hat[0], chi2_min, scale2, dof, max_step=max_step)
    intervals = {"lam": tuple(float(v) for v in np.exp(ends[which[0]]))}
    cov = np.linalg.pinv(jac_hat[0].T @ jac_hat[0]) * scale2
    if _ETA in free:   # η_s only sets the transient here: a Wald interval in ln η_s
        half = float(stats.t.ppf(0.975, dof)) * math.sqrt(max(cov[which[1], which[1]], 0.0))
        intervals["eta"] = (float(np.exp(theta[_ETA] - half)), float(np.exp(theta[_ETA] + half)))
    g = math.exp(theta[_G])
    values = {"lam": math.exp(theta[_LAM]), "G": g, "eta": math.exp(theta[_ETA]),
              "t0": float(p_hat[nf]), "L2": None}
    if inv_l2 is not None:
        values["L2"] = None if inv_l2 == 0 else 1.0 / inv_l2
    else:
        j = free.index(_W)
        if theta[_W] > 2.0 * math.sqrt(max(cov[j, j], 0.0)):
            values["L2"] = 1.0 / (theta[_W] * g)
    final = _polymer_paths(_batch(theta[None, :], data, space), 0.0, grid=grid)
    d_fit, _ = _path_diameter(data.t - p_hat[nf], final.x, final.t, final.xdot,
                              math.exp(theta[_D0]))
    plain = (data.d - d_fit[0]) / data.noise
    return _Outcome(kind="viscoelastic", values=values, chi2_white=chi2_min,
                    chi2_plain=float(np.sum(plain ** 2)), n_free=nf + 1, scale2=scale2, phi=phi,
                    intervals=intervals,
                    curve_state=("viscoelastic", math.exp(theta[_D0]), float(p_hat[nf]), final.x,
                                 final.t[0], final.xdot[0]))


# --- the result ----------------------------------------------------------------------------------

def _plain(v):
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


@dataclass(frozen=True)
class ModelFit:
    """The whole-curve fit of the 0-D filament model (SI units).

    ``model`` is ``"viscoelastic"`` (λ, G, L², η_s fitted) or ``"newtonian"``
    (G = 0; η_s only). The interval of λ, and of η_s in a Newtonian fit, is
    the 95 % profile-likelihood interval (NaN where a side stays open, with
    a note in ``message``); η_s of an elastic fit has a Wald interval in
    ln η_s. ``solvent_viscosity_fixed`` says η_s was given rather than fitted
    (its interval is then NaN). ``finite_extensibility_L2`` is None for
    Oldroyd-B or when the data cannot tell L² from infinity.
    ``noise_correlation`` is the AR(1) coefficient per frame the residuals
    were whitened with. ``success`` False: no usable fit, ``message`` says why.
    """

    model: str = ""
    relaxation_time_s: float = math.nan
    relaxation_time_ci95_s: tuple = (math.nan, math.nan)
    elastic_modulus_Pa: float = math.nan
    finite_extensibility_L2: float | None = None
    solvent_viscosity_Pa_s: float = math.nan
    solvent_viscosity_ci95_Pa_s: tuple = (math.nan, math.nan)
    solvent_viscosity_fixed: bool = False
    t_start_s: float = math.nan
    reduced_chi2: float = math.nan
    n_points: int = 0
    noise_correlation: float = math.nan
    success: bool = False
    message: str = ""
    _state: tuple = field(default=(), repr=False, compare=False)

    def __bool__(self) -> bool:
        return self.success

    @property
    def describes_record(self) -> bool:
        """Whether the fit describes the record: reduced χ² at most :data:`DESCRIBES_RECORD_CHI2`
        (the report and the uncertainty budget use its numbers only then)."""
        return self.success and math.isfinite(self.reduced_chi2) and \
            self.reduced_chi2 <= DESCRIBES_RECORD_CHI2

    def curve(self, t):
        """The fitted D(t) (m) at recording times ``t`` (s); NaN for a failed fit."""
        t = np.asarray(t, dtype=float)
        if not self._state:
            return np.full(t.shape, np.nan)
        kind, d0, t0 = self._state[:3]
        tau = np.atleast_1d(t - t0).ravel()
        if kind == "newtonian":
            eta, density, sigma = self._state[3:]
            d, _ = _newtonian_diameter(tau[None, :], d0, np.array([[eta]]), density, sigma)
        else:
            x, t_nodes, v_nodes = self._state[3:6]
            d, _ = _path_diameter(tau, x, t_nodes[None, :], v_nodes[None, :], d0)
        return d[0].reshape(t.shape)

    def to_dict(self) -> dict:
        """The ``model_fit`` object of ``result.json``: plain Python, None for NaN."""
        return {
            "relaxation_time_s": _plain(self.relaxation_time_s),
            "relaxation_time_ci95_s": [_plain(v) for v in self.relaxation_time_ci95_s],
            "elastic_modulus_Pa": _plain(self.elastic_modulus_Pa),
            "finite_extensibility_L2": _plain(self.finite_extensibility_L2),
            "solvent_viscosity_Pa_s": _plain(self.solvent_viscosity_Pa_s),
            "t_start_s": _plain(self.t_start_s),
            "reduced_chi2": _plain(self.reduced_chi2),
            "model": self.model,
            "solvent_viscosity_ci95_Pa_s": [_plain(v) for v in self.solvent_viscosity_ci95_Pa_s],
            "solvent_viscosity_fixed": self.solvent_viscosity_fixed,
            "n_points": int(self.n_points),
            "noise_correlation": _plain(self.noise_correlation),
            "message": self.message,
            "describes_record": self.describes_record,
        }

    @classmethod
    def from_dict(cls, data: dict) -> "ModelFit":
        """The fit read back from its :meth:`to_dict` form (no curve)."""
        def num(v):
            return math.nan if v is None else float(v)

        def pair(p):
            return tuple(num(v) for v in (p or (None, None)))

        l2 = data.get("finite_extensibility_L2")
        return cls(model=str(data.get("model") or ""),
                   relaxation_time_s=num(data.get("relaxation_time_s")),
                   relaxation_time_ci95_s=pair(data.get("relaxation_time_ci95_s")),
                   elastic_modulus_Pa=num(data.get("elastic_modulus_Pa")),
                   finite_extensibility_L2=None if l2 is None else float(l2),
                   solvent_viscosity_Pa_s=num(data.get("solvent_viscosity_Pa_s")),
                   solvent_viscosity_ci95_Pa_s=pair(data.get("solvent_viscosity_ci95_Pa_s")),
                   solvent_viscosity_fixed=bool(data.get("solvent_viscosity_fixed")),
                   t_start_s=num(data.get("t_start_s")), reduced_chi2=num(data.get("reduced_chi2")),
                   n_points=int(data.get("n_points") or 0),
                   noise_correlation=num(data.get("noise_correlation")),
                   success=True, message=str(data.get("message") or ""))


#: A fit describes the record when its reduced χ² is at most this (allowing for correlated noise,
#: which inflates the reduced χ² of the white-noise sum by up to (1 + φ)/(1 − φ)); the uncertainty
#: budget and the report use its numbers only then.
DESCRIBES_RECORD_CHI2 = 4.0


def _failed(message, n_points=0) -> ModelFit:
    return ModelFit(success=False, message=message, n_points=n_points)


def _as_result(o: _Outcome, data: _Data, eta_fixed: bool) -> ModelFit:
    n = data.t.size
    v = o.values
    key = "lam" if o.kind == "viscoelastic" else "eta"
    ends = o.intervals.get(key, (0.0, 0.0))
    message = ("" if np.isfinite(ends).all() else
               f"the profile of {'λ' if key == 'lam' else 'η_s'} stays below the 95 % level on "
               "one side within reach: that end of the interval is open (NaN)")
    return ModelFit(
        model=o.kind,
        relaxation_time_s=v["lam"],
        relaxation_time_ci95_s=o.intervals.get("lam", (math.nan, math.nan)),
        elastic_modulus_Pa=v["G"],
        finite_extensibility_L2=v["L2"],
        solvent_viscosity_Pa_s=v["eta"],
        solvent_viscosity_ci95_Pa_s=o.intervals.get("eta", (math.nan, math.nan)),
        solvent_viscosity_fixed=eta_fixed,
        t_start_s=v["t0"],
        reduced_chi2=o.chi2_plain / max(n - o.n_free, 1),
        n_points=n,
        noise_correlation=o.phi,
        success=True,
        message=message,
        _state=o.curve_state,
    )


#: Evidence (Δχ² over the residual variance) the elastic model needs to win over the Newtonian one.
ELASTIC_EVIDENCE = 30.0


def _plainly_newtonian(data, newt):
    """True when the Newtonian fit leaves nothing for elasticity to explain.

    Its residuals are at the noise (reduced χ² ≤ 2, with the correlation
    allowed for) and no stretch of the record thins near-exponentially over
    more than 0.5 in ln D: the elastic fit, which could not win, is skipped.
    """
    dof = max(data.t.size - newt.n_free, 1)
    first, last = _elastic_window(data)
    span = math.log(data.d[first] / data.d[last])
    return newt.chi2_plain / dof <= 2.0 * (1.0 + newt.phi) / (1.0 - newt.phi) and span < 0.5


def fit_filament_model(time_s, diameter_m, *, surface_tension, t_start_s, resolution_floor_m,
                       noise_m, density=None, solvent_viscosity=None, start=None, seed,
                       extensibility="fit", model="auto") -> ModelFit:
    """Fit the 0-D filament model to D(t) from the free-thinning start down to the floor.

    Parameters
    ----------
    time_s, diameter_m : array_like
        The series (s, m); NaN where no thread. Frames before ``t_start_s``,
        from the first one below ``resolution_floor_m`` (m) on, and NaN are
        left out.
    surface_tension : float
        σ, N/m.
    t_start_s : float
        Start of free thinning on the recording's clock (s); the model's own
        start t0 is fitted near it (reported as ``t_start_s``).
    resolution_floor_m, noise_m : float
        Smallest trustworthy diameter and the diameter noise (m); ``noise_m``
        None estimates it from the data (it only scales ``reduced_chi2``:
        intervals use the residual variance).
    density : float, optional
        ρ (kg/m³): adds the inertial resistance k ρ Ṙ²; None leaves it out.
    solvent_viscosity : float, optional
        η_s (Pa·s) held fixed; None fits it.
    start : dict, optional
        Local-slope starting values: ``relaxation_time_s``, and
        ``window_s`` (t_first, t_last) with ``diameter_at_window_start_m``.
        Without it the elastic stretch is found from the local slopes of ln D.
    seed : int
        Accepted for the common signature of the fits; this fit draws no
        random numbers, so equal input gives equal output.
    extensibility : "fit", None, "oldroyd-b" or float
        Fit L², use Oldroyd-B (L² → ∞), or hold L² at the given value.
    model : "auto", "viscoelastic" or "newtonian"
        "auto" fits both and keeps the elastic model when it improves χ² by
        more than ``ELASTIC_EVIDENCE`` residual variances (inflated for
        correlated noise).

    Returns
    -------
    ModelFit
        Falsy with the reason in ``message`` when no fit can be made.
    """
    del seed  # deterministic: see the docstring
    if model not in ("auto", "viscoelastic", "newtonian"):
        raise ValueError(f"model must be 'auto', 'viscoelastic' or 'newtonian', not {model!r}")
    data = _select(time_s, diameter_m, t_start_s=t_start_s, resolution_floor_m=resolution_floor_m,
                   noise_m=noise_m, density=density, surface_tension=surface_tension)
    if isinstance(data, str):
        return _failed(data)
    eta_fixed = solvent_viscosity is not None
    with np.errstate(all="ignore"):
        newt = _fit_newtonian(data, solvent_viscosity=solvent_viscosity)
        if model == "newtonian" or (model == "auto" and _plainly_newtonian(data, newt)):
            return _as_result(newt, data, eta_fixed)
        visc = _fit_viscoelastic(data, solvent_viscosity=solvent_viscosity,
                                 extensibility=extensibility, start=start,
                                 eta_guess=newt.values["eta"])
    if isinstance(visc, str):
        return _failed(visc, data.t.size) if model == "viscoelastic" else _as_result(newt, data,
                                                                                     eta_fixed)
    if model == "auto":
        dof = max(data.t.size - visc.n_free, 1)
        inflation = (1.0 + visc.phi) / (1.0 - visc.phi)
        gain = (newt.chi2_plain - visc.chi2_plain) / max(visc.chi2_plain / dof, 1e-300)
        if gain < ELASTIC_EVIDENCE * inflation:
            return _as_result(newt, data, eta_fixed)
    return _as_result(visc, data, eta_fixed)
