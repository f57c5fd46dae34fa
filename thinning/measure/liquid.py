"""The neck measured against the liquid's own shadow.

A liquid thread is a refracting cylinder, not a grey absorber (docs/physics.md
§8.1): its rims are dark, its middle can be nearly as bright as the
backlight, and it is lighter than the opaque plates. A width scaled by the
plates' shadow depth is therefore short by a fixed fraction of D. The rows
around each frame's neck (the fit window of the row pass, :mod:`thinning.measure.neck`)
are measured again here from their own pixels:

- the backlight of each row is the layout's light field times the row's own
  gain, read on the row's margins (flicker and a rolling read-out's banded
  rows alike); ``d = 1 − I/B`` is the fraction of the light the liquid takes;
- where the row shows a resolved dark rim at both edges (a run of pixels
  near the rim's darkest level), each edge is the half-level crossing between
  the local background just outside it and the rim just inside it (unbiased
  for any symmetric blur, whatever the thread does further in: a bright
  lens band or a bright line at its centre);
- those rows also calibrate the liquid's **mean deficit** f = ∫d / D (a
  point-spread function moves light without losing it, and in ray optics the
  thread's transmission profile scales with its radius, so f is a property
  of the liquid and the optics, the same for a wide and a narrow thread);
- a row whose rims are no longer resolved (blur and the bright band fill the
  dip) takes D = ∫d / f with the latest calibration: the narrowest resolved
  rows the recording showed, so a thread whose look changes with its width
  is calibrated where it is closest to the unresolved ones.

The diameter of the frame is then the minimum of a quadratic fitted along
the axis to those widths across the axis, as in :mod:`thinning.measure.neck`.

The rows' widths, integrated deficits and each frame's calibration ratio, and the
neck fit, are compiled (:func:`thinning.measure.compiled.liquid_widths` reading the
pixels from the bands, :func:`~thinning.measure.compiled.liquid_necks`) where the
install built the module; the numpy path here (:func:`_row_widths`, :func:`_neck_fit`)
gives the same numbers otherwise. The running calibration (:class:`LiquidShadow`) stays
in Python.
"""

from __future__ import annotations

import math
import statistics
import warnings
from dataclasses import dataclass, field

import numpy as np

from . import compiled
from .neck import MAX_HALF_WINDOW, MIN_HALF_WINDOW, _smooth3, quadratic_fits
from .rows import CLIPPED_EDGE_LIMIT, TRACE_LEVEL

#: A rim counts as resolved when it reaches RIM_DEPTH of the liquid's own depth (the layout
#: frame's darkest level; shallower, the blur or the bright band fills the dip) and at least
#: RIM_RUN_PX pixels next to the edge lie within RIM_PLATEAU of its darkest level.
RIM_DEPTH = 0.9
RIM_RUN_PX = 3
RIM_PLATEAU = 0.85
#: A thin rim (narrower than the blur) counts when its peak deficit reaches THIN_RIM_PEAK of the
#: liquid's depth and the profile inward of it dips to at most THIN_RIM_DIP of that peak.
#: The dip must stay at least THIN_RIM_FLOOR of the depth above the background: a liquid's middle
#: loses at least the Fresnel reflections of its two surfaces (about 4 % for n = 1.33 at normal
#: incidence, ((n − 1)/(n + 1))² each), so a run back at the background level is a gap between
#: two objects, not a thread's middle.
THIN_RIM_PEAK = 0.25
THIN_RIM_DIP = 0.6
THIN_RIM_FLOOR = 0.03
#: Intensity of the first bright Fresnel fringe outside a straight edge in coherent light, over
#: the unobstructed light (Born & Wolf, Principles of Optics, straight-edge diffraction, from
#: memory: 1.37; the geometric edge lies at 1/4 of the light).
FRESNEL_FIRST_MAXIMUM = 1.37
#: The calibration in use: the median of the last frames' (the narrowest resolved thread's).
CALIBRATION_FRAMES = 5
#: Columns on each side of a row's integration window whose mean is its background level (the
#: light field's own error beside the thread: uneven light, a row read out with another gain),
#: averaged over GROUND_ROWS rows along the axis.
BASELINE_PX = 8
GROUND_ROWS = 7
#: Rows measured beyond the row pass's neck window on each side: room for the new fit's own
#: window (its thinnest row may move) and for the background's running mean along the axis.
WINDOW_GUARD_ROWS = 8
#: Fewest resolved rows in a frame for its calibration to count.
MIN_CALIBRATION_ROWS = 3
#: The rules above in the order the compiled remeasurement takes them (``liquid_widths`` in
#: thinning/measure/_rowscan.c).
COMPILED_RULES = (RIM_DEPTH, RIM_RUN_PX, RIM_PLATEAU, THIN_RIM_PEAK, THIN_RIM_DIP, THIN_RIM_FLOOR,
                  FRESNEL_FIRST_MAXIMUM, BASELINE_PX, GROUND_ROWS)


@dataclass
class LiquidShadow:
    """The liquid's mean deficit, calibrated on resolved rows as the recording goes on.

    ``mean_deficit`` is ∫d / D (d the fraction of the light taken), None until a
    frame with resolved rims was seen; ``fallback`` the value used before that:
    the depth of the liquid's darkest part in the layout frame.
    """

    fallback: float
    recent: list = field(default_factory=list)

    @property
    def mean_deficit(self) -> float | None:
        return float(statistics.median(self.recent)) if self.recent else None

    def value(self) -> float:
        return self.fallback if not self.recent else self.mean_deficit

    def update(self, frame_value: float) -> None:
        if not (math.isfinite(frame_value) and 0.02 < frame_value <= 1.5):
            return
        self.recent.append(frame_value)
        del self.recent[:-CALIBRATION_FRAMES]


def remeasure_necks(bands, layout, rows, record, shadow: LiquidShadow, *, row_noise_px=0.1):
    """Measure the neck rows of a block of frames against the liquid's own shadow (in place).

    ``bands`` the block's bands (axis along the rows), ``rows`` their
    :class:`~thinning.measure.rows.RowBlock`, ``record`` the per-frame necks of
    the row pass (``diameter_px``, ``neck_position_px``, ``axis_angle_deg``,
    ``fit_rows``), whose ``diameter_px`` is replaced; ``shadow`` the running
    calibration, updated frame by frame in order.
    """
    diameter = record["diameter_px"]
    todo = np.flatnonzero(np.isfinite(diameter))
    if todo.size == 0 or layout.light is None or layout.clipped_background > CLIPPED_EDGE_LIMIT:
        return  # (a saturated backlight hides the light level: the row pass's steepest edges stand)
    n = rows.cut_width.shape[1]
    axial0 = float(layout.axial_range[0])
    i0 = np.clip(np.rint(record["neck_position_px"][todo] - axial0).astype(np.int64), 0, n - 1)
    # the rows of the row pass's neck fit and a guard either side for the new fit's window
    half = int(np.clip(record["fit_rows"][todo].max() // 2 + 1 + WINDOW_GUARD_ROWS,
                       MIN_HALF_WINDOW + WINDOW_GUARD_ROWS, MAX_HALF_WINDOW))
    offsets = np.arange(-half, half + 1)
    r_idx = i0[:, None] + offsets[None, :]
    in_band = (r_idx >= 0) & (r_idx < n)
    r_idx = np.clip(r_idx, 0, n - 1)
    in_band &= rows.has[todo[:, None], r_idx] | np.isfinite(rows.cut_width[todo[:, None], r_idx])
    centre = rows.centre[todo[:, None], r_idx]
    guess = rows.cut_width[todo[:, None], r_idx] / (2.0 * min(layout.liquid_depth, 1.0))
    # only the columns a frame's neck rows can reach: their integration windows, the
    # background beside them and the rim search (the band is as wide as the widest body)
    width = np.asarray(bands[todo[0]]).shape[1]
    reach = _reach(guess, layout.margin_px)
    cen = np.where(np.isfinite(centre), centre, width / 2.0)
    pad = BASELINE_PX + layout.margin_px + 6
    first = np.clip(np.floor((cen - reach).min(axis=1)) - pad, 0, width - 1).astype(np.int64)
    last = np.clip(np.ceil((cen + reach).max(axis=1)) + pad, 0, width - 1).astype(np.int64)
    span = int(min(width, (last - first).max() + 1))
    first = np.minimum(first, width - span)
    # the calibration, frame by frame in order (on the rows near the neck), then the widths of
    # the unresolved rows
    near = in_band & (np.abs(offsets)[None, :] <= np.clip(record["fit_rows"][todo] // 2 + 1,
                                                          MIN_HALF_WINDOW, MAX_HALF_WINDOW)[:, None])
    widths, resolved, totals, ratios, used = _liquid_rows(
        [bands[b] for b in todo], r_idx, first, span, centre - first[:, None], guess, rows.gain[todo],
        near, layout)
    calibrated = np.empty(todo.size)
    value = shadow.value()
    for k, ok in enumerate(used >= MIN_CALIBRATION_ROWS):
        if ok:
            shadow.update(float(ratios[k]))
            value = shadow.value()
        calibrated[k] = value
    slope = np.tan(np.radians(record["axis_angle_deg"][todo]))
    new = _liquid_necks(widths, resolved, totals, in_band, calibrated, np.sqrt(1.0 + slope * slope),
                        row_noise_px)
    good = np.isfinite(new)
    diameter[todo[good]] = new[good]


def _liquid_necks(widths, resolved, totals, in_band, calibrated, stretch, row_noise_px):
    """The diameter (px) of each frame from its rows: those ``in_band`` whose rims were not
    ``resolved`` take D = ∫d / f (``totals / calibrated``), widths across the axis (divided by
    ``stretch``, 1 / cosine of its tilt) go to :func:`_neck_fit`; compiled where installed."""
    if compiled.COMPILED:
        return compiled.liquid_necks(widths, resolved, totals, in_band, calibrated, stretch,
                                     row_noise_px, MAX_HALF_WINDOW, MIN_HALF_WINDOW)
    widths = np.where(in_band & ~resolved, totals / calibrated[:, None], widths)
    widths[~(widths > 0)] = np.nan
    across = widths / stretch[:, None]
    return _neck_fit(across, in_band & np.isfinite(across), row_noise_px)


def _neck_fit(across, ok, row_noise_px):
    """The minimum of a quadratic along the axis through the rows around the thinnest one.

    The rows: contiguous around the thinnest (smoothed over three rows), whose
    smoothed width stays within ``max(3·row_noise_px, 1.5 %)`` of it, half-length
    between :data:`MIN_HALF_WINDOW` and :data:`MAX_HALF_WINDOW` (the rule of
    :func:`thinning.measure.neck.necks_of`). NaN where fewer than three rows.
    """
    nf, nr = across.shape
    frames = np.arange(nf)
    smooth = _smooth3(across, ok)
    i_min = np.argmin(smooth, axis=1)
    w_min = smooth[frames, i_min]
    level = w_min + np.maximum(3.0 * row_noise_px, 0.015 * w_min)
    j = np.arange(nr)
    outside = ~(smooth <= level[:, None])
    before = np.where(outside & (j < i_min[:, None]), j, -1).max(axis=1)
    after = np.where(outside & (j > i_min[:, None]), j, nr).min(axis=1)
    lo = np.maximum(before + 1, i_min - MAX_HALF_WINDOW)
    hi = np.minimum(after - 1, i_min + MAX_HALF_WINDOW)
    mid = (lo + hi) // 2
    half = np.maximum((hi - lo + 1) // 2, MIN_HALF_WINDOW)
    sel = (j >= (mid - half)[:, None]) & (j <= (mid + half)[:, None]) & ok
    y = (j - i_min[:, None]).astype(np.float64)
    a, b, c, solvable = quadratic_fits(y, np.where(sel, across, 0.0), sel)
    count = sel.sum(axis=1)
    solvable &= count >= 5
    with np.errstate(invalid="ignore", divide="ignore"):
        y_min = np.where(sel, y, np.inf).min(axis=1)
        y_max = np.where(sel, y, -np.inf).max(axis=1)
        vertex = np.where(a > 0, -b / (2.0 * a), np.nan)
        inside = solvable & np.isfinite(vertex) & (y_min <= vertex) & (vertex <= y_max)
        bottom = c - b * b / (4.0 * a)
        ends = np.minimum(np.minimum(a * y_min * y_min + b * y_min + c, c), a * y_max * y_max + b * y_max + c)
        mean = np.where(sel, across, 0.0).sum(axis=1) / count
    diameter = np.where(solvable, np.where(inside, bottom, ends), mean)
    return np.where(count >= 3, diameter, np.nan)


def _liquid_rows(bands, r_idx, first, span, centre, guess, gains, near, layout):
    """:func:`_row_widths` of the rows ``r_idx`` (frame, row) of ``bands`` (one per frame) over
    columns ``first`` … ``first + span − 1`` (``centre`` in those columns), and each frame's
    calibration of the mean deficit: the median of ∫d / D over its resolved rows ``near`` the
    neck (NaN without any) and how many they are. Compiled
    (:func:`thinning.measure.compiled.liquid_widths`, pixels read from the bands) where
    installed, else in numpy on the gathered deficit.
    """
    gains = np.asarray(gains).astype(np.float32)
    if compiled.COMPILED:
        return compiled.liquid_widths(compiled.Bands(bands), r_idx, first, span, centre, guess,
                                      layout.light.backlight, gains, float(layout.saturation),
                                      layout.margin_px, layout.core_px, *_levels(layout),
                                      COMPILED_RULES, near)
    # d = 1 − I / B, B the light field times the frame's gain (none at the sensor's saturation)
    pixels = np.stack([np.asarray(band)[:, a:a + span][r]
                       for band, a, r in zip(bands, first, r_idx)]).astype(np.float32)
    cols = first[:, None] + np.arange(span)[None, :]
    light = layout.light.backlight[r_idx[:, :, None], cols[:, None, :]]
    deficit = 1.0 - pixels / (light * gains[:, None, None])
    deficit[pixels >= layout.saturation] = 0.0
    widths, resolved, totals = _row_widths(deficit, centre, guess, layout)
    use = near & resolved & np.isfinite(widths) & (widths > 0)
    with warnings.catch_warnings(), np.errstate(invalid="ignore", divide="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)  # frames without such rows: NaN
        ratios = np.nanmedian(np.where(use, totals / widths, np.nan), axis=1)
    return widths, resolved, totals, ratios, use.sum(axis=1)


def _levels(layout):
    """The detection threshold of a dark pixel, the liquid's own depth and the pixel noise, as
    fractions of the light (Python floats: the float32 deficit is compared in float32)."""
    depth = float(1.0 - (layout.liquid_fraction if layout.liquid_fraction is not None
                         else layout.shadow_fraction))
    return float(layout.detection_level(TRACE_LEVEL) * depth), depth, float(layout.noise) * depth


def _reach(guess, margin):
    """How far (px) from a row's centre its integration window reaches, for half-width ``guess``."""
    return np.where(np.isfinite(guess), guess, 0.0) + 2 * margin + 3


def _row_widths(deficit, centre, guess, layout):
    """Widths along the rows (px), whether both rims were resolved, and the integrated deficit.

    ``deficit`` (frame, row, column) the fraction of the light taken; ``centre``
    and ``guess`` the row pass's centre and half-width of each row (band
    coordinates, px). Unresolved rows get NaN widths (the caller divides their
    integrated deficit by the liquid's mean deficit).
    """
    nf, nr, w = deficit.shape
    m, core = layout.margin_px, layout.core_px
    cols = np.arange(w, dtype=np.float64)
    reach = _reach(guess, m)
    cen = np.where(np.isfinite(centre), centre, w / 2.0)
    lo = np.clip(np.floor(cen - reach), 0, w - 1).astype(np.int64)
    hi = np.clip(np.ceil(cen + reach), 0, w - 1).astype(np.int64)
    within = (cols[None, None, :] >= lo[:, :, None]) & (cols[None, None, :] <= hi[:, :, None])
    threshold, depth, noise = _levels(layout)
    dark = within & (deficit > threshold)
    has = dark.any(axis=2)
    lj = np.where(has, np.argmax(dark, axis=2), lo)
    rj = np.where(has, w - 1 - np.argmax(dark[:, :, ::-1], axis=2), hi)
    # the integrated deficit over the thread and a few blur widths beyond both ends, above the
    # background level beside the thread
    s0 = np.clip(lj - m, 0, w)
    e0 = np.clip(rj + m + 1, 0, w)
    cum = np.zeros((nf, nr, w + 1), np.float64)
    np.cumsum(deficit.astype(np.float64), axis=2, out=cum[:, :, 1:])  # (faster than dtype=)

    def span_sum(a, b):
        return (np.take_along_axis(cum, b[:, :, None], 2)[:, :, 0]
                - np.take_along_axis(cum, a[:, :, None], 2)[:, :, 0])

    side = BASELINE_PX
    l0, r1 = np.clip(s0 - side, 0, w), np.clip(e0 + side, 0, w)
    with np.errstate(invalid="ignore", divide="ignore"):
        left_ground = np.where(s0 > l0, span_sum(l0, s0) / (s0 - l0), np.nan)
        right_ground = np.where(r1 > e0, span_sum(e0, r1) / (r1 - e0), np.nan)
    left_ground = np.where(np.isfinite(left_ground), left_ground, right_ground)
    right_ground = np.where(np.isfinite(right_ground), right_ground, left_ground)
    ground = _along_axis_mean(np.where(has, 0.5 * (left_ground + right_ground), np.nan), GROUND_ROWS)
    total = span_sum(s0, e0) - np.nan_to_num(ground) * (e0 - s0)
    left, left_ok = _rim_edge(deficit, lj, rj, m, core, inward=+1, depth=depth, noise=noise)
    right, right_ok = _rim_edge(deficit, rj, lj, m, core, inward=-1, depth=depth, noise=noise)
    resolved = has & left_ok & right_ok & (rj - lj >= 2 * RIM_RUN_PX)
    widths = np.where(resolved, right - left, np.nan)
    return widths, resolved, total


def _rim_edge(deficit, edge, other, margin, core, *, inward, depth, noise=0.0):
    """Sub-pixel position of one edge (pixel centres at whole numbers) and whether its rim is resolved.

    ``edge`` the outermost dark pixel of each row on this side, ``other`` the
    one on the other side, ``inward`` +1 for a left edge, −1 for a right one.
    The background is the median of four pixels just beyond ``margin`` outside
    the edge; the edge is where the profile crosses half the liquid's own
    ``depth`` above it, searched from outside in (the full depth, not the rim's
    darkest pixel: a rim a little short of it would move the crossing outward).
    The rim is resolved when its darkest deficit within ``core`` pixels inside
    the edge (never past the middle) lies at least :data:`RIM_DEPTH` × ``depth``
    above the background, with :data:`RIM_RUN_PX` pixels within
    :data:`RIM_PLATEAU` of that darkest level.

    Otherwise a **thin rim** (narrower than the blur: a refracting thread under
    diffuse light, or at a small aperture, is dark only in a sliver at its
    edge) still places the edge when a clear dip inward separates it from the
    thread's lighter middle (:data:`THIN_RIM_DIP`, never back to the background:
    :data:`THIN_RIM_FLOOR`): the rim's light deficit,
    summed from outside to that dip, is a dark strip of ``area / depth``
    pixels whose centroid no symmetric blur moves, so its outer side is the
    centroid less half that width.
    """
    nf, nr, w = deficit.shape
    middle = (edge + other) // 2
    steps = np.arange(-(margin + 4), core + margin + 1)
    cols = edge[:, :, None] + inward * steps[None, None, :]
    valid = (cols >= 0) & (cols < w)
    inner_far = (steps[None, None, :] >= 0) & (inward * (cols - middle[:, :, None]) <= 0)
    inner = inner_far & (steps[None, None, :] <= core)
    values = np.take_along_axis(deficit, np.clip(cols, 0, w - 1), axis=2).astype(np.float64)
    values = np.where(valid, values, np.nan)
    rim = np.max(values, axis=2, where=inner & ~np.isnan(values), initial=-np.inf)
    rim[rim == -np.inf] = np.nan  # rows at the side of the band: no pixels there
    ground = _median4(values[:, :, :4])
    ground = np.where(np.isfinite(ground), ground, 0.0)
    # partially coherent light: a straight edge's Fresnel fringes put the geometric edge at a
    # quarter of the light for coherent light (first bright fringe 1.37 of it) and at half for
    # incoherent light; the bright overshoot just outside the edge measures the coherent share
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # rows at the side of the band
        dip = np.nanmin(np.where((steps >= -margin) & (steps < 0), values, np.nan), axis=2)
    overshoot = np.clip(np.nan_to_num(ground - dip) - 3.0 * noise, 0.0, None)
    coherent = np.clip(overshoot / (FRESNEL_FIRST_MAXIMUM - 1.0) / depth, 0.0, 1.0)
    level = ground + depth * (0.5 + 0.25 * coherent)
    run = np.sum(inner & (values >= ground[:, :, None] + RIM_PLATEAU * (rim - ground)[:, :, None]), axis=2)
    above = (values >= level[:, :, None]) & (steps[None, None, :] >= -margin)
    first = np.argmax(above, axis=2)
    found = above.any(axis=2) & (first > 0)
    j = np.clip(first, 1, steps.size - 1)
    v1 = np.take_along_axis(values, j[:, :, None], 2)[:, :, 0]
    v0 = np.take_along_axis(values, (j - 1)[:, :, None], 2)[:, :, 0]
    with np.errstate(all="ignore"):
        frac = np.clip((level - v0) / (v1 - v0), 0.0, 1.0)
    position = edge + inward * (steps[j - 1] + frac)
    ok = (found & np.isfinite(rim) & (rim - ground >= RIM_DEPTH * depth) & (run >= RIM_RUN_PX)
          & np.isfinite(position))
    thin, thin_ok = _thin_rim(values, steps, inner, inner_far, ground, margin, depth)
    thin_ok &= ~ok
    return (np.where(ok, position, edge + inward * thin),
            ok | thin_ok)


def _thin_rim(values, steps, inner, inner_far, ground, margin, depth):
    """Outer side of a rim narrower than the blur (steps from the edge pixel; see :func:`_rim_edge`)."""
    d = np.where(np.isnan(values), -np.inf, values - ground[:, :, None])
    peak_at = np.argmax(np.where(inner, d, -np.inf), axis=2)
    peak = np.take_along_axis(d, peak_at[:, :, None], 2)[:, :, 0]
    index = np.arange(steps.size)[None, None, :]
    beyond = inner_far & (index > peak_at[:, :, None])
    dip_at = np.argmin(np.where(beyond, d, np.inf), axis=2)
    dip = np.take_along_axis(d, dip_at[:, :, None], 2)[:, :, 0]
    weight = np.where((steps[None, None, :] >= -margin) & (index < dip_at[:, :, None]), d, 0.0)
    weight = np.where(np.isfinite(weight), weight, 0.0)
    half = 0.5 * np.where(np.isfinite(dip), dip, 0.0)
    area = weight.sum(axis=2) + half
    with np.errstate(all="ignore"):
        centroid = ((weight * steps[None, None, :]).sum(axis=2) + half * steps[dip_at]) / area
        outer = centroid - 0.5 * area / depth
    ok = (beyond.any(axis=2) & np.isfinite(peak) & np.isfinite(dip) & np.isfinite(outer)
          & (peak >= THIN_RIM_PEAK * depth) & (dip <= THIN_RIM_DIP * peak)
          & (dip >= THIN_RIM_FLOOR * depth) & (area > 0))
    return outer, ok


def _median4(values):
    """``np.nanmedian(values, axis=2)`` of four values per entry, without its generic cost."""
    v = np.sort(values, axis=2)  # NaN last
    count = np.isfinite(v).sum(axis=2)
    a, b, c = v[:, :, 0], v[:, :, 1], v[:, :, 2]
    return np.select([count == 4, count == 3, count == 2, count == 1],
                     [0.5 * (b + c), b, 0.5 * (a + b), a], np.nan)


def _along_axis_mean(values, size):
    """Mean of each entry and its neighbours along the rows (axis 1), ``size`` in all; NaN ignored."""
    ok = np.isfinite(values)
    v = np.where(ok, values, 0.0)
    kernel = np.ones(size)
    num = np.apply_along_axis(lambda x: np.convolve(x, kernel, mode="same"), 1, v)
    den = np.apply_along_axis(lambda x: np.convolve(x, kernel, mode="same"), 1, ok.astype(float))
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 0, num / den, np.nan)
