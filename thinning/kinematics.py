"""Kinematics of a thinning thread: local slopes of ln D, local power-law exponents, lines.

The tools the regimes and the rheology share, on a prepared series
(:mod:`thinning.series`):

- :func:`local_log_slopes`: sliding weighted least-squares lines through ln D
  (weights (D/σ_D)², σ_D the diameter noise, constant in pixels), each window
  spanning about 0.2 in ln D, widened where the slope would be imprecise; the
  strain rate is ε̇ = −2 d ln D/dt and the local relaxation time
  λ(t) = 2/(3 ε̇) (Anna & McKinley 2001);
- :func:`local_exponents`: the local exponent n of D ∝ (t_c − t)^n without
  knowing t_c, from the inverse strain rate, a line in t of slope −1/(2n);
- :func:`weighted_line`: the one weighted least-squares line of the package;
- :func:`fit_power_law`: D = A (t_c − t)^n by nonlinear least squares.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.ndimage import median_filter
from scipy.optimize import least_squares


@dataclass(frozen=True)
class LocalSlopes:
    """Sliding weighted line fits of ln D: slope (1/s), its standard error, fitted ln D, window."""

    slope_1_s: np.ndarray
    slope_se_1_s: np.ndarray
    log_diameter_fit: np.ndarray
    left: np.ndarray
    right: np.ndarray

    @property
    def strain_rate_1_s(self) -> np.ndarray:
        return -2.0 * self.slope_1_s

    @property
    def relaxation_time_s(self) -> np.ndarray:
        """Local λ = −1/(3 d ln D/dt), NaN where D is not falling."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self.slope_1_s < 0, -1.0 / (3.0 * self.slope_1_s), np.nan)


def _window_bounds(log_d, *, log_span, min_half, max_half):
    """Per point, the inclusive window [left, right] spanning about ``log_span`` in ln D."""
    n = log_d.size
    smooth = median_filter(log_d, size=min(5, n) | 1, mode="nearest")
    mono = np.minimum.accumulate(smooth)  # D only falls during free thinning
    key = -mono                           # increasing
    half = log_span / 2.0
    i = np.arange(n)
    left = np.searchsorted(key, key - half, side="left")
    right = np.searchsorted(key, key + half, side="right") - 1
    left = np.clip(np.minimum(left, i - min_half), np.maximum(i - max_half, 0), None)
    right = np.clip(np.maximum(right, i + min_half), None, np.minimum(i + max_half, n - 1))
    left = np.clip(left, 0, n - 1)
    right = np.clip(right, 0, n - 1)
    return left, right


def _line_fits(x, y, w, left, right):
    """Weighted lines through (x, y) over inclusive windows [left, right], via prefix sums."""
    def csum(v):
        return np.concatenate([[0.0], np.cumsum(v)])

    p_w, p_x, p_y, p_xx, p_xy = (csum(v) for v in (w, w * x, w * y, w * x * x, w * x * y))
    r1 = right + 1
    s_w = p_w[r1] - p_w[left]
    with np.errstate(divide="ignore", invalid="ignore"):
        xm = (p_x[r1] - p_x[left]) / s_w
        ym = (p_y[r1] - p_y[left]) / s_w
        sxx = (p_xx[r1] - p_xx[left]) - s_w * xm * xm
        sxy = (p_xy[r1] - p_xy[left]) - s_w * xm * ym
        slope = np.where(sxx > 0, sxy / sxx, np.nan)
        se = np.where(sxx > 0, 1.0 / np.sqrt(sxx), np.nan)
    return slope, se, ym + slope * (x - xm)


def _lopsided_quadratic(x, y, w, left, right, slope, se, fit, *, max_offset=0.1):
    """Slope at the point itself from a weighted quadratic where its window is lopsided.

    A line through a one-sided window (ends of the data) gives the slope at
    the window's middle, not at the point; a quadratic evaluated at the point
    removes that first-order bias. Windows with ≤ 3 points keep the line.
    """
    i = np.arange(x.size)
    lopsided = np.flatnonzero((np.abs(0.5 * (left + right) - i) > max_offset * (right - left))
                              & (right - left >= 3))
    slope, se, fit = slope.copy(), se.copy(), fit.copy()
    for k in lopsided:
        sl = slice(left[k], right[k] + 1)
        u = x[sl] - x[k]
        a = np.vstack([np.ones_like(u), u, u * u]).T
        aw = a * w[sl, None]
        try:
            cov = np.linalg.inv(a.T @ aw)
        except np.linalg.LinAlgError:
            continue
        coef = cov @ (aw.T @ y[sl])
        slope[k], se[k], fit[k] = coef[1], np.sqrt(cov[1, 1]), coef[0]
    return slope, se, fit


def local_log_slopes(time_s, diameter_m, *, noise_m, log_span=0.2, min_half_width=1,
                     max_half_width=100, half_width=None, target_rel_se=None) -> LocalSlopes:
    """Sliding weighted least-squares lines through ln D, one per point.

    Weights are (D/σ_D)² (noise constant in D makes σ_lnD = σ_D/D). Each
    window spans about ``log_span`` in ln D, clipped to [``min_half_width``,
    ``max_half_width``] points either side (one-sided at the ends, where a
    quadratic gives the slope at the point itself). With
    ``target_rel_se``, a point whose slope is less precise than that is refitted
    over 2, 4, 8 times the span (noisy thin frames get wider windows). A fixed
    ``half_width`` (points) overrides the adaptive choice. Returns slopes
    d ln D/dt (1/s) with standard errors from the weights.
    """
    t = np.asarray(time_s, dtype=float)
    d = np.asarray(diameter_m, dtype=float)
    y = np.log(d)
    n = y.size
    # weights from a running median, not the noisy D (which would favour positive noise)
    w = (median_filter(d, size=min(5, n) | 1, mode="nearest") / noise_m) ** 2
    scale = np.median(np.diff(t)) if n > 1 else 1.0
    x = (t - t[0]) / scale
    if half_width is not None:
        i = np.arange(n)
        left = np.clip(i - half_width, 0, n - 1)
        right = np.clip(i + half_width, 0, n - 1)
        slope, se, fit = _line_fits(x, y, w, left, right)
    else:
        left, right = _window_bounds(y, log_span=log_span, min_half=min_half_width,
                                     max_half=max_half_width)
        slope, se, fit = _line_fits(x, y, w, left, right)
        if target_rel_se is not None:
            for k in (2.0, 4.0, 8.0):
                poor = ~(np.abs(se / slope) <= target_rel_se)
                if not poor.any():
                    break
                l2, r2 = _window_bounds(y, log_span=k * log_span, min_half=min_half_width,
                                        max_half=int(k * max_half_width))
                s2, e2, f2 = _line_fits(x, y, w, l2, r2)
                slope, se, fit = (np.where(poor, a, b) for a, b in ((s2, slope), (e2, se), (f2, fit)))
                left, right = np.where(poor, l2, left), np.where(poor, r2, right)
        slope, se, fit = _lopsided_quadratic(x, y, w, left, right, slope, se, fit)
    return LocalSlopes(slope_1_s=slope / scale, slope_se_1_s=se / scale, log_diameter_fit=fit,
                       left=left, right=right)


def weighted_line(x, y, w):
    """Weighted least-squares line through (x, y), weights ``w``: ``(slope, intercept at x = 0,
    covariance)``, the covariance 2×2 (intercept, slope) from the weights alone."""
    a = np.vstack([np.ones_like(x), x]).T
    aw = a * w[:, None]
    cov = np.linalg.inv(a.T @ aw)
    coef = cov @ (aw.T @ y)
    return coef[1], coef[0], cov


def local_exponents(time_s, slopes: LocalSlopes, *, min_half_width=3, max_half_width=200,
                    span_factor=2.0):
    """Local power-law exponent n(t) and its standard error, free of the singular time.

    For D ∝ (t_c − t)^n the inverse strain rate q = 1/ε̇ = (t_c − t)/(2n) is a
    line in t (docs/physics.md §3.5), so n = −1/(2 dq/dt). dq/dt comes from sliding
    weighted line fits of q over windows ``span_factor`` times those of the ln D
    fits. An elasto-capillary stretch has dq/dt = 0 (n infinite).
    """
    t = np.asarray(time_s, dtype=float)
    s = slopes.slope_1_s
    with np.errstate(divide="ignore", invalid="ignore"):
        q = -1.0 / (2.0 * s)
        q_se = slopes.slope_se_1_s / (2.0 * s * s)
    ok = np.isfinite(q) & np.isfinite(q_se) & (q > 0) & (q_se > 0)
    n = t.size
    i = np.arange(n)
    half = np.clip(np.ceil(span_factor * (slopes.right - slopes.left) / 2.0), min_half_width,
                   max_half_width).astype(int)
    left = np.clip(i - half, 0, n - 1)
    right = np.clip(i + half, 0, n - 1)
    w = np.where(ok, 1.0 / np.where(ok, q_se, 1.0) ** 2, 0.0)
    y = np.where(ok, q, 0.0)
    scale = np.median(np.diff(t)) if n > 1 else 1.0
    x = (t - t[0]) / scale
    dq, dq_se, _ = _line_fits(x, y, w, left, right)
    dq, dq_se = dq / scale, dq_se / scale
    with np.errstate(divide="ignore", invalid="ignore"):
        expo = -1.0 / (2.0 * dq)
        # the q values of neighbouring windows share frames: inflate for that
        expo_se = 2.0 * expo * expo * dq_se * np.sqrt(slopes.right - slopes.left + 1.0)
    expo = np.where(ok, expo, np.nan)
    return expo, expo_se


def fit_power_law(time_s, diameter_m, *, t_c_min, exponent=None):
    """Least-squares D = A (t_c − t)^n (uniform weights in D), t_c > ``t_c_min``.

    ``exponent`` fixes n; otherwise n is free. Returns (A, t_c, n, rms residual)
    or None when the fit fails.
    """
    t = np.asarray(time_s, dtype=float)
    d = np.asarray(diameter_m, dtype=float)
    if t.size < 4:
        return None
    span = max(t[-1] - t[0], np.finfo(float).tiny)
    n0 = 1.0 if exponent is None else exponent
    # start: for the trial exponent, D^(1/n) is linear in t
    q = d ** (1.0 / n0)
    slope, icpt = np.polyfit(t - t[0], q, 1)
    if slope < 0:
        tc0 = t[0] - icpt / slope
    else:
        tc0 = t[-1] + span
    tc0 = max(tc0, t_c_min + 1e-6 * span)
    # parametrise t_c = t_c_min + exp(u)·span so it stays above the bound
    u0 = np.log((tc0 - t_c_min) / span)
    scale = np.median(d)

    def unpack(p):  # A in units of D per span^n
        tc = t_c_min + np.exp(p[1]) * span
        n = exponent if exponent is not None else p[2]
        return p[0] * scale, tc, n

    def resid_scaled(p):
        a, tc, n = unpack(p)
        return (a * ((tc - t) / span) ** n - d) / scale

    p0 = [d[0] / ((tc0 - t[0]) / span) ** n0 / scale, u0] + ([] if exponent is not None else [n0])
    try:
        sol = least_squares(resid_scaled, p0, method="lm", max_nfev=2000)
    except (ValueError, FloatingPointError):
        return None
    if not sol.success:
        return None
    a, tc, n = unpack(sol.x)
    rms = float(np.sqrt(np.mean(sol.fun ** 2))) * scale
    return a / span ** n, tc, float(n), rms
