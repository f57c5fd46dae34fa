"""One diameter series, prepared once: validation, noise, outliers, resolution floor.

:func:`prepare_series` takes the per-frame series of a recording (time in s
on the recording's clock, diameter in m, NaN where no thread was measured)
and keeps the usable frames: finite diameters after the start of free
thinning, above the resolution floor, not outliers. An outlier is a frame
whose ln D departs from the running median of its 9 neighbours by more than
5 noise standard deviations (σ_D/D; beads, dust, mis-measured frames),
tested twice so a bead does not drag its neighbours out. Everything after it
(:mod:`thinning.kinematics`, :mod:`thinning.regimes`, :mod:`thinning.fits`,
:mod:`thinning.rheology`) works on the prepared :class:`DiameterSeries`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.ndimage import median_filter
from scipy.signal import savgol_filter


def check_series(time_s, diameter_m):
    """``(t, d)`` as float arrays; ``ValueError`` unless they are 1-D and of one length."""
    t = np.asarray(time_s, dtype=float)
    d = np.asarray(diameter_m, dtype=float)
    if t.ndim != 1 or t.shape != d.shape:
        raise ValueError("time_s and diameter_m must be 1-D arrays of the same length")
    return t, d


@dataclass(frozen=True)
class DiameterSeries:
    """The usable part of a series.

    ``index`` holds the positions (in the input arrays) of the usable frames,
    in time order; ``time_s``/``diameter_m`` their values; ``noise_m`` the
    diameter noise (given or estimated); ``outlier_index`` and
    ``below_floor_index`` the positions left out for each reason.
    """

    index: np.ndarray
    time_s: np.ndarray
    diameter_m: np.ndarray
    noise_m: float
    resolution_floor_m: float
    outlier_index: np.ndarray
    below_floor_index: np.ndarray

    @property
    def n(self) -> int:
        return int(self.index.size)


def estimate_diameter_noise(diameter_m, *, minimum_m=0.0) -> float:
    """Noise standard deviation of D (m) from residuals about a local quadratic (7 frames).

    The quadratic is fitted both to D and to ln D (whose residuals, times D,
    are diameter noise too) and the smaller estimate is kept: real curvature
    only ever inflates an estimate, and an exponential stretch is straight in
    ln D. Robust (median absolute deviation), so beads and the steep last
    frames do not inflate it. ``diameter_m`` must be finite, in time order.
    """
    d = np.asarray(diameter_m, dtype=float)
    if d.size < 9:
        return float(minimum_m)

    def mad_sigma(resid):
        # residual of a 7-point quadratic smoother has variance σ²·(1 − 1/3)
        return 1.4826 * np.median(np.abs(resid - np.median(resid))) / np.sqrt(2.0 / 3.0)

    in_d = mad_sigma(d - savgol_filter(d, 7, 2))
    lnd = np.log(d)
    in_log = mad_sigma((lnd - savgol_filter(lnd, 7, 2)) * d)
    return float(max(min(in_d, in_log), minimum_m))


def last_thread_position(time_s, diameter_m, *, t_start_s=None) -> int | None:
    """Position of the last frame showing a thread, when every later frame shows none.

    None when the last frame of the record still shows a thread (no breakup
    within the record) or no frame shows one.
    """
    t = np.asarray(time_s, dtype=float)
    d = np.asarray(diameter_m, dtype=float)
    has = np.isfinite(d) & (d > 0)
    if t_start_s is not None:
        has &= t >= t_start_s - 1e-12
    if not has.any():
        return None
    last = int(np.flatnonzero(has)[-1])
    if last == d.size - 1:
        return None
    return last


def flag_outliers(time_s, diameter_m, *, noise_m, threshold=5.0, size=9):
    """Frames whose ln D departs from the running median of its neighbours by > ``threshold`` σ.

    σ = σ_D/D. Two passes: the second median leaves out what the first
    flagged, so a bead does not drag its neighbours out with it. Frames below
    the resolution floor take part as neighbours (a bead lifts a thin frame
    above the floor).
    """
    t = np.asarray(time_s, dtype=float)
    lnd = np.log(np.asarray(diameter_m, dtype=float))
    bad = np.zeros(lnd.size, dtype=bool)
    if lnd.size < size:
        return bad
    for _ in range(2):
        keep = ~bad
        med = median_filter(lnd[keep], size=size, mode="nearest")
        ref = np.interp(t, t[keep], med)
        bad = np.abs(lnd - ref) > threshold * noise_m / np.exp(ref)
    return bad


def prepare_series(time_s, diameter_m, *, resolution_floor_m, diameter_noise_m=None,
                   t_start_s=None, outlier_threshold=5.0) -> DiameterSeries:
    """Select the usable frames: finite D, after ``t_start_s``, above the floor, not outliers."""
    t, d = check_series(time_s, diameter_m)
    finite = np.isfinite(t) & np.isfinite(d) & (d > 0)
    if t_start_s is not None:
        finite &= t >= t_start_s - 1e-12
    order = np.flatnonzero(finite)
    order = order[np.argsort(t[order], kind="stable")]
    above = d[order] >= resolution_floor_m
    floor_noise = 0.01 * resolution_floor_m / 3.0  # 0.01 px: keeps weights finite on clean data
    if diameter_noise_m is not None:
        noise = float(diameter_noise_m)
    else:
        noise = estimate_diameter_noise(d[order[above]], minimum_m=floor_noise)
    noise = max(noise, floor_noise)
    bad = flag_outliers(t[order], d[order], noise_m=noise, threshold=outlier_threshold)
    outliers = order[bad & above]
    below_floor = order[~above & ~bad]
    cand = order[above & ~bad]
    return DiameterSeries(
        index=cand, time_s=t[cand], diameter_m=d[cand], noise_m=noise,
        resolution_floor_m=float(resolution_floor_m), outlier_index=outliers,
        below_floor_index=below_floor,
    )
