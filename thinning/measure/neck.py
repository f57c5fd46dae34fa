"""The neck of a frame: the minimum diameter from a quadratic fitted along the axis.

Around the thinnest rows of the free filament (between beads, if any) a
quadratic in the axial coordinate is fitted to the widths across the local
axis and its minimum taken, which averages the row noise instead of picking
its most negative excursion (the raw minimum of noisy rows is biased low).
"""

from __future__ import annotations

import numpy as np

from .profile import MAX_BEND_DEG, ProfileBlock, axis_slopes


#: Half-length (rows) of the neck fit's window: at most, and at least.
MAX_HALF_WINDOW = 40
MIN_HALF_WINDOW = 3


def _smooth3(values, ok):
    """Mean over each valid row and its valid neighbours along the last axis (inf where invalid)."""
    v = np.where(ok, values, 0.0)
    c = ok.astype(np.float64)
    total = v.copy()
    count = c.copy()
    total[..., 1:] += v[..., :-1]
    total[..., :-1] += v[..., 1:]
    count[..., 1:] += c[..., :-1]
    count[..., :-1] += c[..., 1:]
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(ok, total / count, np.inf)


def quadratic_fits(x, y, use):
    """Least-squares ``a x² + b x + c`` of each row of ``y`` over the entries ``use``.

    ``x``, ``y``, ``use`` (fit, point); normal equations solved by Cramer's
    rule. Returns ``a, b, c`` and whether each fit was solvable (matrix not
    singular).
    """
    x = np.where(use, x, 0.0)
    y = np.where(use, y, 0.0)
    x2 = x * x
    n, s1, s2 = use.sum(axis=1).astype(np.float64), x.sum(axis=1), x2.sum(axis=1)
    s3, s4 = (x2 * x).sum(axis=1), (x2 * x2).sum(axis=1)
    t0, t1, t2 = y.sum(axis=1), (x * y).sum(axis=1), (x2 * y).sum(axis=1)
    det = s4 * (s2 * n - s1 * s1) - s3 * (s3 * n - s1 * s2) + s2 * (s3 * s1 - s2 * s2)
    solvable = np.abs(det) >= 1e-12 * np.maximum(np.abs(s4 * s2 * n), 1e-300)
    det = np.where(solvable, det, 1.0)
    a = (t2 * (s2 * n - s1 * s1) - s3 * (t1 * n - s1 * t0) + s2 * (t1 * s1 - s2 * t0)) / det
    b = (s4 * (t1 * n - t0 * s1) - t2 * (s3 * n - s1 * s2) + s2 * (s3 * t0 - t1 * s2)) / det
    c = (s4 * (s2 * t0 - s1 * t1) - s3 * (s3 * t0 - s2 * t1) + t2 * (s3 * s1 - s2 * s2)) / det
    return a, b, c, solvable


def necks_of(profiles: ProfileBlock, *, row_noise_px=0.1, max_half_window=MAX_HALF_WINDOW,
             min_half_window=MIN_HALF_WINDOW, max_bend_deg=MAX_BEND_DEG) -> dict:
    """Minimum diameter of each frame of a block from a local quadratic fit along the axis.

    ``row_noise_px``: expected noise of one row's width; the fit window
    takes the contiguous rows around the thinnest one whose smoothed width
    stays within ``max(3·row_noise_px, 1.5 %)`` of it, half-length between
    ``min_half_window`` and ``max_half_window`` rows. The widths are taken
    across the local axis, whose angle is fitted to the centre line over
    the same rows (within ``max_bend_deg`` of the frame's axis). The fit
    averages the row noise instead of picking its most negative excursion.
    Returns arrays per frame: ``diameter_px``, ``neck_position_px``,
    ``axis_angle_deg``, ``axis_lateral_px``, ``min_contrast``, ``fit_rows``,
    ``beads`` (NaN / 0 / False where there is no connected thread).
    """
    cut = profiles.cut_width_px
    ok = profiles.valid & np.isfinite(cut)
    nb, n = cut.shape
    frames = np.arange(nb)
    smooth = _smooth3(cut, ok)
    beads = _has_beads(smooth, ok)
    i0 = np.argmin(smooth, axis=1)
    w0 = smooth[frames, i0]
    level = w0 + np.maximum(3.0 * row_noise_px, 0.015 * w0)
    outside = ~(smooth <= level[:, None])
    j = np.arange(n)
    before = np.where(outside & (j < i0[:, None]), j, -1).max(axis=1)  # last outside row before
    after = np.where(outside & (j > i0[:, None]), j, n).min(axis=1)  # first outside row after
    lo = np.maximum(before + 1, i0 - max_half_window)
    hi = np.minimum(after - 1, i0 + max_half_window)
    mid = (lo + hi) // 2
    half = np.maximum((hi - lo + 1) // 2, min_half_window)
    measured = profiles.connected & (ok.sum(axis=1) >= 3)
    # the fit: rows mid ± half, widths across the local axis over those rows
    sel = (j >= (mid - half)[:, None]) & (j <= (mid + half)[:, None]) & ok
    centre = profiles.centre_px
    slope = axis_slopes(profiles.axial_px, centre, sel & np.isfinite(centre), profiles.slope,
                        max_bend_deg)
    cosine = 1.0 / np.sqrt(1.0 + slope * slope)
    y = (j - i0[:, None]).astype(np.float64)  # axial offset from the thinnest row
    w = cut * cosine[:, None]
    a, b, c, solvable = quadratic_fits(y, w, sel)
    count = sel.sum(axis=1)
    solvable &= count >= 5
    with np.errstate(invalid="ignore", divide="ignore"):
        y_min = np.where(sel, y, np.inf).min(axis=1)
        y_max = np.where(sel, y, -np.inf).max(axis=1)
        vertex = np.where(a > 0, -b / (2.0 * a), np.nan)
        inside = solvable & np.isfinite(vertex) & (y_min <= vertex) & (vertex <= y_max)
        bottom = c - b * b / (4.0 * a)
        # no minimum inside the window: the fit's lowest point in it
        ends = np.minimum(np.minimum(a * y_min * y_min + b * y_min + c, c),
                          a * y_max * y_max + b * y_max + c)
        mean = np.where(sel, w, 0.0).sum(axis=1) / count
    diameter = np.where(solvable, np.where(inside, bottom, ends), mean)
    position = profiles.axial_px[i0] + np.where(inside, vertex, 0.0)
    missing = ~measured
    return {"diameter_px": np.where(missing, np.nan, diameter),
            "neck_position_px": np.where(missing, np.nan, position),
            "axis_angle_deg": np.where(missing, np.nan, np.degrees(np.arctan(slope))),
            "axis_lateral_px": np.where(missing, np.nan, centre[frames, i0]),
            "min_contrast": np.where(missing, np.nan, profiles.contrast[frames, i0]),
            "fit_rows": np.where(missing, 0, count), "beads": beads & measured}


def _has_beads(smooth, ok):
    """A bead: a swelling of the thread with clearly thinner thread on both sides (per profile)."""
    w = np.where(ok, smooth, np.inf)
    left = np.minimum.accumulate(w, axis=-1)
    right = np.minimum.accumulate(w[..., ::-1], axis=-1)[..., ::-1]
    thread = np.maximum(left, right)
    bead = ok & np.isfinite(thread) & (w > 1.6 * thread) & (w > thread + 3.0)
    return bead.any(axis=-1)
