"""The row pass: each row of a band, its dark extent, partial-area width, centre and rim level.

:func:`measure_block` measures a block of frames of one layout at once and
returns a typed :class:`RowBlock` (arrays per frame and row). The pass has
one compiled coding (:mod:`thinning.measure.compiled`, used where the
install built it) and one numpy coding (:func:`_scan_rows_numpy`), chosen in
:func:`measure_bands` only; tests hold the two equal. The layout's own
first look at a frame, before its light field exists, uses the full-row
pass :func:`measure_rows` (also the light field's refresh).

Method, per row (axis along the rows of the band):

1. Deficit d = (B − I)/(B − S), B the light field times the frame's flicker
   gain, S = f·B the shadow level: 0 in the background, 1 in full shadow.
2. The row's dark extent is where d exceeds ``detect_level``: its outer
   ends, so the bright lens streak of a transparent thread does not split
   it (a separate dark speck beside the filament is dropped).
3. The row width is the integrated deficit over a window reaching a few
   blur widths beyond both edges, with the core of a thick row (well inside
   both edges) counted as full shadow. A point-spread function moves light
   without losing it, so this partial-area width is unbiased for any blur,
   defocus or motion smear. Each edge is the end of its zone minus (plus)
   the zone's integrated deficit; a thin row is centred on its deficit
   centroid; a row fainter than the detection level is measured by its
   integrated deficit on the centre line.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields

import numpy as np

from . import compiled


#: Background columns used on each side of the band to estimate the backlight of a row.
BACKGROUND_COLUMNS = 6


#: Deficit level (fraction of the shadow depth) at which a row is taken to hold the filament.
DETECT_LEVEL = 0.25
#: The same, for the stream of frames, as a fraction of the liquid's own depth (at least six times
#: the noise): a thin thread under diffuse light shows two shallow rims (docs/physics.md §8.1).
TRACE_LEVEL = 0.12


#: Fraction of the background at the sensor's maximum above which edges are placed at the
#: steepest light gradient instead of by partial area (measured with scripts/optics_probe.py:
#: below it the partial area is the better of the two, above it by far the better is the gradient).
CLIPPED_EDGE_LIMIT = 0.85
#: Smallest mean deficit (fraction of the light) of a gap that joins two dark runs of a row into one
#: thread: the bright lens band of a refracting thread loses light to reflection at both surfaces
#: (about 4 % at n = 1.33, ((n − 1)/(n + 1))² each, docs/physics.md §8.1), the background between
#: the thread and a speck of dust loses none.
LENS_GAP_DEFICIT = 0.02


@dataclass
class RowBlock:
    """The row pass of a block of frames: arrays (frame, row), axis along the rows of the band.

    ``has`` rows crossed by a clear shadow; ``peak`` the peak deficit (1 =
    full shadow); ``centre`` the row's centre (px, band coordinates);
    ``core_n`` pixels of a thick row's core counted as full shadow;
    ``cut_width`` the partial-area width along the row (px; NaN without a
    shadow); ``truncated`` rows whose integration window leaves the band;
    ``rim_ratio`` the light level of a thick steady row's dark rims over the
    backlight (NaN elsewhere); ``light`` the row's backlight relative to the
    layout's; ``gain`` the flicker gain of each frame (per frame).
    """

    has: np.ndarray
    peak: np.ndarray
    centre: np.ndarray
    core_n: np.ndarray
    cut_width: np.ndarray
    truncated: np.ndarray
    rim_ratio: np.ndarray
    light: np.ndarray
    gain: np.ndarray

    def __len__(self):
        return self.cut_width.shape[0]

    def frame(self, b) -> "RowBlock":
        """The rows of frame ``b`` alone, as a block of one frame."""
        return RowBlock(**{f.name: getattr(self, f.name)[b:b + 1] for f in fields(self)})


def _oriented(frame, orientation, axial, lateral, *, dtype=np.float32):
    """The frame region with the filament axis along rows (``dtype=None``: as stored, contiguous)."""
    if orientation == "vertical":
        block = frame[axial[0]:axial[1], lateral[0]:lateral[1]]
    else:
        block = frame[lateral[0]:lateral[1], axial[0]:axial[1]].T
    if dtype is None:
        return np.ascontiguousarray(block)
    return np.asarray(block, dtype=dtype)


def _box(values, half):
    """Running mean over ``2·half + 1`` entries along axis 0 (edges: shorter windows)."""
    n = values.shape[0]
    c = np.concatenate(([0.0], np.cumsum(values, dtype=np.float64)))
    i = np.arange(n)
    lo = np.clip(i - half, 0, n)
    hi = np.clip(i + half + 1, 0, n)
    return (c[hi] - c[lo]) / (hi - lo)


def measure_rows(block, layout, *, shadow_fraction, detect_level=DETECT_LEVEL):
    """Row-wise width, centre and levels of one band block (float32, axis along rows)."""
    n, w = block.shape
    k = min(BACKGROUND_COLUMNS, max(1, w // 6))
    scale = np.float32(1.0 / max(1.0 - shadow_fraction, 1e-3))
    margins = block[:, :k].sum(axis=1) + block[:, w - k:].sum(axis=1)
    if layout.light is not None:
        # backlight = flicker gain × the static light field of the layout
        inv_light = layout.light.inverse
        ratio = margins / layout.light.margin_light
        lit = layout.light.lit_rows & np.isfinite(ratio)
        clipped = bool(block.max() >= layout.saturation)
        if clipped:  # a brighter frame clips part of the background: judge by the rest
            lit &= np.maximum(block[:, :k].max(axis=1), block[:, w - k:].max(axis=1)) < layout.saturation
        if lit.sum() >= 5:
            gain = float(np.median(ratio[lit]))
        else:  # margins clipped or dark: the unclipped background anywhere in the band
            sub = (block[::3, ::3] * inv_light[::3, ::3]).ravel()
            sub = sub[block[::3, ::3].ravel() < layout.saturation]
            bright = sub[sub > 0.6 * np.percentile(sub, 95)] if sub.size else sub
            gain = float(np.median(bright)) if bright.size else 1.0
        light = ratio / gain
        deficit = block * inv_light
        deficit *= np.float32(-scale / gain)
        deficit += scale
        if clipped:
            deficit[block >= layout.saturation] = 0.0
    else:
        # backlight interpolated linearly between the margins of each row
        gain = 1.0
        left_bg = _box(block[:, :k].mean(axis=1), 3)
        right_bg = _box(block[:, w - k:].mean(axis=1), 3)
        xl = 0.5 * (k - 1)
        xr = w - 1 - 0.5 * (k - 1)
        slope = (right_bg - left_bg) / (xr - xl)
        cols = np.arange(w, dtype=np.float32) - np.float32(xl)
        backlight = left_bg.astype(np.float32)[:, None] + slope.astype(np.float32)[:, None] * cols
        inv_light = 1.0 / backlight
        deficit = (1.0 - block * inv_light) * scale
        top = max(float(np.median(left_bg)), float(np.median(right_bg)))
        light = np.minimum(left_bg, right_bg) / max(top, 1e-6)
    pair = deficit[:, :-1] + deficit[:, 1:]
    peak = 0.5 * pair.max(axis=1)
    mask = pair > 2.0 * detect_level
    has = mask.any(axis=1)
    rows = np.arange(n)
    lj = np.argmax(mask, axis=1)
    rj = (w - 2) - np.argmax(mask[:, ::-1], axis=1)
    # rows whose dark pixels do not form one run (a dust speck or a stray shadow beside the
    # filament): keep the run holding the darkest pixel, with runs closer than a few pixels
    gappy = has & (mask.sum(axis=1) < rj - lj + 1)
    if gappy.any():
        for r in np.flatnonzero(gappy):
            lj[r], rj[r] = _main_run(mask[r], pair[r], deficit[r] / scale, lj[r], rj[r])
    # sub-pixel detection crossings of the pair average (pair j is centred at j + 0.5)
    lprev = np.maximum(lj - 1, 0)
    p0, p1 = pair[rows, lprev], pair[rows, lj]
    step = np.where(p1 - p0 > 1e-6, p1 - p0, 1.0)
    xl_cross = np.where(lj > 0, lprev + 0.5 + (2.0 * detect_level - p0) / step, lj + 0.5)
    rnext = np.minimum(rj + 1, w - 2)
    q0, q1 = pair[rows, rj], pair[rows, rnext]
    step = np.where(q0 - q1 > 1e-6, q0 - q1, 1.0)
    xr_cross = np.where(rj < w - 2, rj + 0.5 + (q0 - 2.0 * detect_level) / step, rj + 0.5)
    centre = 0.5 * (xl_cross + xr_cross)
    # integrated deficit over [left − margin, right + margin], core counted as full shadow
    m, a = layout.margin_px, layout.core_px
    cum = np.empty((n, w + 1), dtype=np.float32)
    cum[:, 0] = 0.0
    np.cumsum(deficit, axis=1, out=cum[:, 1:])
    s0 = np.clip(lj - m, 0, w)
    e0 = np.clip(rj + 2 + m, 0, w)
    total = cum[rows, e0] - cum[rows, s0]
    fa = lj + a
    fb = rj + 2 - a
    filled = fb > fa
    fa_c = np.clip(fa, 0, w)
    fb_c = np.clip(fb, 0, w)
    core_sum = cum[rows, fb_c] - cum[rows, fa_c]
    edge_sum = np.where(filled, total - core_sum, total)
    core_n = np.where(filled, fb - fa, 0).astype(np.float64)
    # rim level of thick rows (over the backlight): full shadow there, whatever a lens streak
    # does further in; NaN on rows too thin to have a rim
    thick = filled & (fb - fa > 12) & has
    # ... on rows whose edges run along the axis: across a slanted edge (a meniscus foot)
    # the row reaches less deep into the shadow than its length says
    steady = np.zeros(n, bool)
    steady[2:-2] = ((np.abs(lj[4:] - lj[:-4]) <= 1) & (np.abs(rj[4:] - rj[:-4]) <= 1)
                    & has[4:] & has[:-4])
    thick &= steady
    rim_ratio = np.full(n, np.nan)
    if thick.any():
        tr, ta, tb = rows[thick], fa[thick], fb[thick]
        samples = [(tr, ta), (tr, ta + 1), (tr, tb - 1), (tr, tb - 2)]
        rim_ratio[thick] = np.mean([block[i, j] * inv_light[i, j] for i, j in samples], axis=0) / gain
    truncated = (lj - m < 0) | (rj + 2 + m > w)
    return {"has": has, "peak": peak, "centre": centre, "edge_sum": edge_sum.astype(np.float64),
            "core_n": core_n, "cut_width": np.where(has, edge_sum + core_n, np.nan),
            "truncated": truncated, "rim_ratio": rim_ratio,
            "light": light, "window": (s0, e0), "gain": gain}


def measure_block(frames, layout, *, detect_level=TRACE_LEVEL) -> RowBlock:
    """Row measurements of several frames of one layout at once: arrays (frame, row).

    The same quantities as measuring each frame alone (:func:`thinning.measure.profile.locate_edges`),
    with the fixed cost of each call shared by the block. ``frames`` is a
    sequence of 2-D frames of one shape; the bands are read inside them (a
    horizontal filament's are transposed into one stack). The result goes to
    :func:`rim_fractions` and :func:`thinning.measure.profile.profiles_of` (or
    :func:`thinning.measure.compiled.necks`).
    """
    axial = layout.axial_range
    if layout.light is None:
        each = [measure_rows(_oriented(np.asarray(f), layout.orientation, axial, layout.band),
                              layout, shadow_fraction=layout.shadow_fraction,
                              detect_level=detect_level) for f in frames]
        return RowBlock(**{f.name: np.stack([np.asarray(r[f.name]) for r in each])
                           for f in fields(RowBlock)})
    return measure_bands(band_views(frames, layout), layout, detect_level=detect_level)


def band_views(frames, layout) -> list:
    """The band of each frame, axis along the rows: views into the frames (a vertical
    filament's, when they share a layout in memory) or one transposed stack."""
    import cv2

    (a0, a1), (b0, b1) = layout.axial_range, layout.band
    frames = [np.asarray(frame) for frame in frames]
    if layout.orientation == "vertical":
        bands = [frame[a0:a1, b0:b1] for frame in frames]  # views: no copy
        first = bands[0]
        if not all(band.strides == first.strides and band.strides[1] == band.itemsize
                   for band in bands):  # frames laid out otherwise: one stack
            bands = list(np.stack(bands))
    else:  # the axis along the rows: each band transposed into one stack
        stack = np.empty((len(frames), a1 - a0, b1 - b0), frames[0].dtype)
        for block, frame in zip(stack, frames):
            cv2.transpose(frame[b0:b1, a0:a1], block)
        bands = list(stack)
    return bands


def measure_bands(bands, layout, *, detect_level=TRACE_LEVEL) -> RowBlock:
    """The per-frame path of :func:`_measure_rows`: same quantities, a fraction of the work.

    Each row's dark extent comes from one comparison with a threshold map
    (the layout's light field at ``detect_level``, under the frame's flicker
    gain); the deficit is then integrated only over two zones per row, from
    ``margin`` outside to ``core`` inside each edge (one window for a thin
    row), and the core of a thick row counts as full shadow. The edges are
    partial-area positions: the end of the left zone minus its integrated
    deficit, the start of the right zone plus its own; a thin row is placed
    at its deficit centroid. ``bands`` is a list of the frames' bands (row,
    column; axis along the rows) in the frames' own dtype, rows contiguous.
    The row pass is compiled (:mod:`thinning.measure.compiled`) where the install
    built it, numpy otherwise (on a stack of the bands). Returns arrays
    (frame, row), and the gain of each frame.
    """
    n, w = bands[0].shape
    if (n, w) != layout.light.inverse.shape:
        raise ValueError(f"frames of another size than the first: band {n}×{w}, "
                         f"layout {layout.light.inverse.shape}")
    k = min(BACKGROUND_COLUMNS, max(1, w // 6))
    probe_rows = layout.light.gain_rows
    if compiled.COMPILED:
        bands = compiled.Bands(bands)
        gains, clipped = compiled.frame_gains(bands, probe_rows, layout.light.margin_light, k,
                                             float(layout.saturation))
    else:
        bands = np.stack(bands)
        gains, clipped = _frame_gains_numpy(bands, probe_rows, layout.light.margin_light, k,
                                            layout.saturation)
    for b in np.flatnonzero(clipped | (probe_rows.size < 5)):
        sample = bands[b][probe_rows]
        ratio = ((sample[:, :k].sum(axis=1, dtype=np.int64) + sample[:, w - k:].sum(axis=1, dtype=np.int64))
                 / layout.light.margin_light[probe_rows])
        gains[b] = _frame_gain(bands[b], layout, ratio, sample, k, bool(clipped[b]))
    level = layout.detection_level(detect_level)
    maps = [layout.light.threshold_map(bands[0].dtype, level, g, layout.detect_fraction) for g in gains]
    distinct = list({id(m): m for m in maps}.values())
    which = {id(m): i for i, m in enumerate(distinct)}
    map_of_frame = np.array([which[id(m)] for m in maps])
    thresholds = distinct[0][None] if len(distinct) == 1 else np.stack(distinct)
    scan = compiled.scan_rows if compiled.COMPILED else _scan_rows_numpy
    rows = RowBlock(**scan(bands, thresholds, map_of_frame, layout.light.inverse, gains,
                           float(layout.saturation), 1.0 / max(1.0 - layout.shadow_fraction, 1e-3),
                           layout.margin_px, layout.core_px, LENS_GAP_DEFICIT), gain=gains)
    if layout.clipped_background > CLIPPED_EDGE_LIMIT:
        _steepest_edges(bands, rows, layout.margin_px)
    return rows


def _steepest_edges(bands, rows, reach):
    """Widths of a frame whose backlight saturates the sensor: from the steepest light gradient.

    Where nearly all the background sits at the camera's maximum, the light
    level is unknown and the outer part of each edge is cut off, so the
    partial-area width reads low (by a pixel or more). For a symmetric blur
    the steepest point of an edge is the edge itself, and it stays in view
    while the light is under about twice the maximum: each edge is placed
    there (a parabola through the gradient around its extreme, searched
    within ``reach`` px of the partial-area edge). Rows with a shadow get
    these widths and centres (arrays set in place; ``core_n`` = width, so
    the shadow-level rescaling leaves them as they are).
    """
    has = rows.has & np.isfinite(rows.cut_width) & np.isfinite(rows.centre)
    if not has.any():
        return
    pixels = np.stack([np.asarray(band) for band in bands]).astype(np.float32)
    w = pixels.shape[2]
    frame, row = np.nonzero(has)
    centre, cut = rows.centre[has], rows.cut_width[has]
    steps = np.arange(-reach - 1, reach + 2)

    def edge(guess, falling):
        # light gradient between pixel c and c + 1 (at c + 0.5), signed to peak at the edge
        cols = np.rint(guess - 0.5).astype(np.int64)[:, None] + steps
        np.clip(cols, 0, w - 1, out=cols)
        values = pixels[frame[:, None], row[:, None], cols]
        grad = np.diff(values, axis=1) * (-1.0 if falling else 1.0)
        k = np.clip(np.argmax(grad[:, 1:-1], axis=1) + 1, 1, grad.shape[1] - 2)
        i = np.arange(k.size)
        before, at, after = grad[i, k - 1], grad[i, k], grad[i, k + 1]
        curve = before - 2.0 * at + after
        with np.errstate(invalid="ignore", divide="ignore"):
            shift = np.where(curve < 0, 0.5 * (before - after) / curve, 0.0)
        return cols[i, k] + 0.5 + np.clip(shift, -0.5, 0.5)

    left, right = edge(centre - 0.5 * cut, True), edge(centre + 0.5 * cut, False)
    rows.cut_width[has] = right - left
    rows.centre[has] = 0.5 * (left + right)
    rows.core_n[has] = right - left


def _frame_gains_numpy(blocks, gain_rows, margin_light, k, saturation):
    """:func:`thinning.compiled.frame_gains` in numpy."""
    nb, n, w = blocks.shape
    sample = blocks[:, gain_rows]
    margins = (sample[:, :, :k].sum(axis=2, dtype=np.int64)
               + sample[:, :, w - k:].sum(axis=2, dtype=np.int64))
    ratio = margins / margin_light[gain_rows]
    top = np.maximum(sample[:, :, :k].max(axis=2), sample[:, :, w - k:].max(axis=2))
    clipped = top.max(axis=1, initial=0) >= saturation
    if ratio.shape[1]:
        gains = np.partition(ratio, ratio.shape[1] // 2, axis=1)[:, ratio.shape[1] // 2]
    else:
        gains = np.ones(nb)
    return gains, clipped


def _scan_rows_numpy(blocks, thresholds, map_of_frame, inv_light, gains, saturation, scale,
                     margin, core, dim):
    """:func:`thinning.compiled.scan_rows` in numpy, for installs without the compiled module."""
    import cv2

    nb, n, w = blocks.shape
    flat_inv = inv_light.ravel()
    flat = blocks.ravel()
    row_start = np.arange(n) * w
    starts = (np.arange(nb) * (n * w))[:, None] + row_start  # (frame, row) flat index of column 0
    threshold = thresholds[0] if thresholds.shape[0] == 1 else thresholds[map_of_frame]
    mask = blocks < threshold
    flat_mask = mask.ravel()
    lj = np.argmax(mask, axis=2)
    has = flat_mask.take(starts + lj)
    flipped = cv2.flip(mask.view(np.uint8).reshape(nb * n, w), 1).view(bool)
    rj = (w - 1) - np.argmax(flipped, axis=1).reshape(nb, n)
    light = ~(mask[:, :, 0] & mask[:, :, w - 1])
    m, a = margin, core
    step = np.arange(2 * a)
    probe = step < (rj - lj + 1)[:, :, None]
    head = flat_mask.take(np.minimum(lj[:, :, None] + step, w - 1) + starts[:, :, None])
    tail = flat_mask.take(np.maximum(rj[:, :, None] - step, 0) + starts[:, :, None])
    gappy = has & (probe & ~(head & tail)).any(axis=2)
    if gappy.any():
        for b, r in zip(*np.nonzero(gappy)):
            darkness = -(blocks[b, r] * inv_light[r])
            lj[b, r], rj[b, r] = _main_run(mask[b, r], darkness, 1.0 + darkness / np.float32(gains[b]),
                                           lj[b, r], rj[b, r], dim=dim)
    zone = m + a
    core_start = lj + a
    core_stop = rj + 1 - a
    thick = (core_stop >= core_start) & has
    base = lj - m
    cols = base[:, :, None] + np.arange(2 * zone)
    cols[:, :, zone:] += ((core_stop - zone - base) * thick)[:, :, None]
    stop = np.where(thick, w, np.minimum(rj + 1 + m, w))
    use = (cols >= 0) & (cols < stop[:, :, None])
    truncated = has & ((base < 0) | (np.where(thick, core_stop + m, rj + 1 + m) > w))
    np.maximum(cols, 0, out=cols)
    np.minimum(cols, w - 1, out=cols)
    cols += row_start[:, None]
    values = flat.take(cols + (np.arange(nb) * (n * w))[:, None, None])
    deficit = values * flat_inv.take(cols)
    deficit *= (-scale / gains).astype(np.float32)[:, None, None]
    deficit += np.float32(scale)
    deficit[values >= saturation] = 0.0  # clipped: no deficit known
    deficit *= use
    weights = np.zeros((2 * zone, 3), np.float32)  # left-zone sum, right-zone sum, first moment
    weights[:zone, 0] = weights[zone:, 1] = 1.0
    weights[:, 2] = np.arange(2 * zone)
    sums = (deficit @ weights).astype(np.float64)  # one small product per row
    left_sum, right_sum, moment = sums[:, :, 0], sums[:, :, 1], sums[:, :, 2]
    edge_sum = left_sum + right_sum
    core_n = (core_stop - core_start) * thick
    with np.errstate(invalid="ignore", divide="ignore"):
        centroid = base + moment / edge_sum
    centre = np.where(thick, 0.5 * ((core_start - 0.5 - left_sum) + (core_stop - 0.5 + right_sum)),
                      centroid)
    centre[~has] = np.nan
    peak = deficit.max(axis=2).astype(np.float64)
    peak[thick] = 1.0
    cut = edge_sum + core_n
    cut[~has] = np.nan
    for b in np.flatnonzero(~has.all(axis=1)):
        _faint_rows(blocks[b], inv_light, has[b], centre[b], peak[b], cut[b], gains[b], scale, m)
    rim_rows = thick & (core_n > 12)
    rim_rows[:, 2:-2] &= (np.abs(lj[:, 4:] - lj[:, :-4]) <= 1) & (np.abs(rj[:, 4:] - rj[:, :-4]) <= 1)
    rim_rows[:, :2] = rim_rows[:, -2:] = False
    rim_ratio = np.full((nb, n), np.nan)
    if rim_rows.any():
        tr = starts[rim_rows]
        ta, tb = core_start[rim_rows], core_stop[rim_rows]
        picks = np.concatenate([tr + ta, tr + ta + 1, tr + tb - 1, tr + tb - 2])
        local = picks % (n * w)
        vals = (flat.take(picks) * flat_inv.take(local)).reshape(4, -1).sum(axis=0) * 0.25
        rim_ratio[rim_rows] = vals / np.broadcast_to(gains.astype(np.float32)[:, None], (nb, n))[rim_rows]
    return {"has": has, "peak": peak, "centre": centre, "core_n": core_n.astype(np.float64),
            "cut_width": cut, "truncated": truncated, "rim_ratio": rim_ratio,
            "light": light.astype(np.float64)}


def _frame_gain(block, layout, ratio, sample, k, clipped):
    """Flicker gain of one frame whose margins clip (or too few lit rows): the unclipped rest."""
    w = block.shape[1]
    if clipped:
        ratio = ratio[np.maximum(sample[:, :k].max(axis=1), sample[:, w - k:].max(axis=1))
                      < layout.saturation]
    if ratio.size >= 5:
        return float(np.partition(ratio, ratio.size // 2)[ratio.size // 2])
    # margins clipped or dark: the unclipped background anywhere in the band
    inv_light = layout.light.inverse
    sub = (block[::3, ::3] * inv_light[::3, ::3]).ravel()
    sub = sub[block[::3, ::3].ravel() < layout.saturation]
    bright = sub[sub > 0.6 * np.percentile(sub, 95)] if sub.size else sub
    return float(np.median(bright)) if bright.size else 1.0


def _faint_rows(block, inv_light, has, centre, peak, cut, gain, scale, margin):
    """Rows of one frame without a clear shadow: their faintest trace of one (arrays set in place).

    A thread fainter than the detection level (narrower than the blur) is
    still measured by its integrated deficit in a window on the centre line.
    """
    n, w = block.shape
    flat, flat_inv, row_start = block.ravel(), inv_light.ravel(), np.arange(n) * w
    m = margin
    empty = np.flatnonzero(~has)
    faint = 1.0 - (block[empty] * inv_light[empty]).min(axis=1) / gain
    peak[empty] = faint * scale
    if has.sum() >= 5:
        y = np.flatnonzero(has).astype(np.float64)
        c = centre[has]
        slope = float(np.dot(y - y.mean(), c - c.mean()) / max(np.dot(y - y.mean(), y - y.mean()), 1e-9))
        if not (math.isfinite(slope) and math.isfinite(c.mean())):
            return
        guess = np.rint(c.mean() + slope * (empty - y.mean())).astype(np.int64)
        window = np.arange(-(m + 2), m + 3)
        wc = guess[:, None] + window
        inside_w = (wc >= 0) & (wc < w)
        wc = np.minimum(np.maximum(wc, 0), w - 1) + row_start[empty][:, None]
        d = (1.0 - flat.take(wc) * flat_inv.take(wc) / gain) * scale * inside_w
        cut[empty] = np.where(inside_w.all(axis=1), d.sum(axis=1), np.nan)
        with np.errstate(invalid="ignore", divide="ignore"):
            centre[empty] = (d * (wc - row_start[empty][:, None])).sum(axis=1) / cut[empty]


def _main_run(mask_row, pair_row, deficit_row, lo, hi, *, bridge_px=3, dim=LENS_GAP_DEFICIT):
    """First and last index of the dark run holding the row's darkest pair.

    Runs are joined across a gap of at most ``bridge_px``, a gap narrower than a
    quarter of the narrower run beside it, or a gap whose mean fractional deficit
    ``deficit_row`` is at least ``dim``: the bright lens band of a transparent
    thread between its two dark rims still loses light (reflection at both
    surfaces), the background between the thread and a speck does not.
    """
    on = mask_row[lo:hi + 1]
    edges = np.flatnonzero(np.diff(np.concatenate(([0], on.astype(np.int8), [0]))))
    starts, stops = edges[::2], edges[1::2] - 1
    keep_s, keep_e = [starts[0]], [stops[0]]
    for a, b in zip(starts[1:], stops[1:]):
        gap = a - keep_e[-1] - 1
        gap_deficit = float(np.mean(deficit_row[lo + keep_e[-1] + 1:lo + a], dtype=np.float64)) if gap > 0 else 0.0
        if (gap <= bridge_px or gap <= 0.25 * min(keep_e[-1] - keep_s[-1] + 1, b - a + 1)
                or gap_deficit >= dim):
            keep_e[-1] = b
        else:
            keep_s.append(a)
            keep_e.append(b)
    darkest = int(np.argmax(pair_row[lo:hi + 1]))
    for a, b in zip(keep_s, keep_e):
        if a <= darkest <= b:
            return lo + a, lo + b
    return lo + keep_s[0], lo + keep_e[-1]


def rim_fractions(rows) -> np.ndarray:
    """Shadow level over backlight measured on each frame's thick rims (NaN without enough of them).

    ``rows`` from :func:`measure_block`; the median of the rim levels of the
    thick steady rows of each frame, within −0.5 … 0.9.
    """
    ratio = rows.rim_ratio
    count = np.isfinite(ratio).sum(axis=1)
    middle = np.sort(ratio, axis=1)[np.arange(ratio.shape[0]), count // 2]  # NaN sort last
    return np.where(count >= 3, np.clip(middle, -0.5, 0.9), np.nan)
