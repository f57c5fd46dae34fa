"""Where the filament is: orientation, end bodies, band, levels, blur and noise, from one frame.

:func:`find_layout` looks at the first frame that shows a filament: which
way it runs, where the end bodies are (plates, or nozzle and substrate: dark
bodies with straight sides at the ends of the axis), the lateral band worth
analysing, the light field of that band (:mod:`thinning.measure.light`), the
shadow level, the blur and the noise, and the plate (nozzle) width for a
calibration by reference width. Coordinates are pixels of the full frame:
``axial`` runs along the filament (y for a vertical filament, x for a
horizontal one), ``lateral`` across it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

from ..errors import ThinningError
from .light import LightField, _background, _fit_backlight
from .rows import BACKGROUND_COLUMNS, _oriented, measure_rows


ORIENTATIONS = ("vertical", "horizontal")


class NoFilament(ThinningError, ValueError):
    """No filament in view (message: one sentence for the user)."""


class UnusableRoi(ThinningError, ValueError):
    """A region of interest that leaves too little of the frame (one sentence for the user)."""


#: The smallest region (pixels a side) a layout is looked for in.
MIN_ROI_PX = 8


def roi_within(roi, shape) -> tuple[int, int, int, int]:
    """``roi`` (``x0, y0, x1, y1``, or None for the whole frame) clipped to frames of ``shape``
    (rows, columns); raises :class:`UnusableRoi` when less than :data:`MIN_ROI_PX` a side is left."""
    h, w = shape
    x0, y0, x1, y1 = (0, 0, w, h) if roi is None else (int(v) for v in roi)
    x1, y1 = min(x1, w), min(y1, h)
    if x1 - x0 < MIN_ROI_PX or y1 - y0 < MIN_ROI_PX:
        if roi is None:
            raise UnusableRoi(f"The {w}×{h}-pixel frames are smaller than {MIN_ROI_PX}×{MIN_ROI_PX} "
                              "pixels: too small to measure.")
        raise UnusableRoi(f"--roi {','.join(str(int(v)) for v in roi)} leaves less than "
                          f"{MIN_ROI_PX}×{MIN_ROI_PX} pixels of the {w}×{h}-pixel frames; give a "
                          "crop inside them.")
    return x0, y0, x1, y1


@dataclass(frozen=True)
class Layout:
    """Where to measure, found once from the first frame (pixels, full-frame coordinates).

    ``roi`` is ``x0, y0, x1, y1`` (numpy slicing) of the region analysed;
    ``thread_span`` the axial range ``[start, stop)`` between the end bodies
    in the first frame; ``band`` the lateral range ``[start, stop)`` analysed
    (within the roi); ``end_widths_px`` the widths along the image rows of the
    bodies at the start and end of the axis (None where there is none, ``inf`` for a body that
    fills the band, like a substrate); ``plate_width_px`` the plate width
    (plates) or nozzle outer diameter (dripping) across the axis, sub-pixel, or None.
    ``background_level`` and ``shadow_level`` are grey levels of the first
    frame; ``blur_sigma_px`` the estimated Gaussian-equivalent blur of an
    edge; ``noise`` the per-pixel noise as a fraction of the shadow depth;
    ``saturation`` the grey level at which the sensor clips; ``axis_slope``
    the filament direction (lateral shift per axial pixel) from the straight
    sides of the end bodies (or the centre line); ``clipped_background`` the
    fraction of the background of the region at the sensor's maximum; ``light`` the static
    light field of the band (:class:`~thinning.measure.light.LightField`);
    ``liquid_fraction`` the light level of the liquid's own darkest part over the
    backlight, measured on the free filament of the first frame (a refracting or
    weakly absorbing liquid is lighter than the opaque end bodies, whose level is
    ``shadow_level``); None falls back to the end bodies' level.
    """

    orientation: str
    roi: tuple[int, int, int, int]
    thread_span: tuple[int, int]
    plate_width_px: float | None
    band: tuple[int, int]
    end_widths_px: tuple[float | None, float | None]
    axis_px: float
    background_level: float
    shadow_level: float
    blur_sigma_px: float
    noise: float
    geometry: str = "plates"
    saturation: float = math.inf
    axis_slope: float = 0.0
    clipped_background: float = 0.0
    light: LightField | None = field(default=None, compare=False, repr=False)
    liquid_fraction: float | None = None

    @property
    def axial_range(self) -> tuple[int, int]:
        """``[start, stop)`` of the roi along the filament axis."""
        x0, y0, x1, y1 = self.roi
        return (y0, y1) if self.orientation == "vertical" else (x0, x1)

    @property
    def shadow_fraction(self) -> float:
        """Shadow level as a fraction of the backlight (first frame)."""
        return self.shadow_level / self.background_level

    @property
    def margin_px(self) -> int:
        """How far beyond an edge the deficit is integrated (about 3 blur widths)."""
        return int(math.ceil(3.0 * self.blur_sigma_px)) + 2

    @property
    def face_px(self) -> int:
        """Rows next to an end body's face left out of the free span (about 3 blur widths)."""
        return int(math.ceil(3.0 * self.blur_sigma_px)) + 1

    @property
    def liquid_depth(self) -> float:
        """The liquid's own shadow depth in units of the end bodies' (1: as dark as a plate)."""
        if self.liquid_fraction is None:
            return 1.0
        return (1.0 - self.liquid_fraction) / max(1.0 - self.shadow_fraction, 1e-6)

    @property
    def detect_fraction(self) -> float:
        """The shadow level the detection thresholds are set against: the liquid's own."""
        if self.liquid_fraction is None:
            return self.shadow_fraction
        return max(self.liquid_fraction, self.shadow_fraction)

    def detection_level(self, level) -> float:
        """``level`` (a fraction of the liquid's depth) raised to six times the pixel noise."""
        noise = self.noise * (1.0 - self.shadow_fraction)  # fraction of the backlight
        return max(level, 6.0 * noise / max(1.0 - self.detect_fraction, 1e-6))

    def presence_threshold(self, level) -> float:
        """Smallest peak deficit (in units of the end bodies' depth) of a row crossed by the
        thread: ``level`` of the liquid's own depth, or five times the noise where larger."""
        return max(level * min(self.liquid_depth, 1.0), 5.0 * self.noise)

    @property
    def core_px(self) -> int:
        """How far inside the detection crossing a pixel is surely full shadow."""
        return int(math.ceil(3.5 * self.blur_sigma_px)) + 1


def _axis_score(mask):
    """How well 'axis along rows' explains a dark mask: wide at the ends, narrow between."""
    n = mask.shape[0]
    counts = mask.sum(axis=1).astype(float)
    rows_with = float(np.mean(counts > 0))
    e = max(1, n // 30)
    ends = 0.5 * (np.median(counts[:e]) + np.median(counts[-e:]))
    middle = counts[n // 5: n - n // 5]
    inner = float(middle.min()) if middle.size else 0.0
    return rows_with * (ends + 1.0) / (inner + 1.0) + rows_with


def _dark_at_both_ends(mask):
    """Whether the rows at both ends of the axis (the first and last 1/30) hold shadow."""
    e = max(1, mask.shape[0] // 30)
    return bool(mask[:e].any() and mask[-e:].any())


def _extent(mask):
    """First and last dark column of every row (−1 where the row has none)."""
    has = mask.any(axis=1)
    first = np.where(has, np.argmax(mask, axis=1), -1)
    last = np.where(has, mask.shape[1] - 1 - np.argmax(mask[:, ::-1], axis=1), -1)
    return has, first, last


def _end_body(has, first, last, n_lat, *, from_end):
    """Rows of a body at one end of the axis: (count, extent, cut) or (0, None, False).

    A body (plate, nozzle, substrate) is dark at the very end and has straight
    sides over at least 5 rows, up to a face where the silhouette changes
    width; a liquid foot widening towards the end of the region is no body.
    ``extent`` is inf for a body filling the region's width; ``cut`` tells a
    body that one side of the region cuts (its visible width is not its width).
    """
    idx = np.arange(has.size)[::-1] if from_end else np.arange(has.size)
    if not has[idx[0]]:
        return 0, None, False
    f0, l0 = first[idx[0]], last[idx[0]]
    if l0 - f0 + 1 < 8:
        return 0, None, False
    count = _straight_sides(has[idx], first[idx].astype(float), last[idx].astype(float))
    if count < 5 or count > has.size - 5:
        return 0, None, False
    full = f0 <= 1 and l0 >= n_lat - 2
    return count, (math.inf if full else float(l0 - f0 + 1)), (f0 <= 1) != (l0 >= n_lat - 2)


#: How far (px) a body's side may stray from the straight line through its rows so far, and
#: how steep (lateral px per axial px, about 6°) that line may be: a plate or nozzle is a
#: straight-sided solid set close to the axis; a liquid's curved sides are neither.
SIDE_SLACK_PX = 2.0
MAX_SIDE_SLOPE = 0.1


def _straight_sides(has, first, last):
    """Rows from the start whose two sides stay on straight lines (within :data:`SIDE_SLACK_PX`).

    Each row is checked against the least-squares lines through the rows before it, so a tilted
    body's sides may drift steadily while a liquid foot's shoulder, which bends away, ends the run;
    sides steeper than :data:`MAX_SIDE_SLOPE` over the first five rows are no body (0).
    """
    n = 0
    s0 = s1 = 0.0
    sf = sff = sl = sll = 0.0  # running sums of y and y·k for both sides
    for k in range(has.size):
        if not has[k]:
            break
        if n >= 2:
            denom = n * s1 - s0 * s0
            kf = float(k)
            pf = ((s1 * sf - s0 * sff) + (n * sff - s0 * sf) * kf) / denom
            pl = ((s1 * sl - s0 * sll) + (n * sll - s0 * sl) * kf) / denom
            if abs(first[k] - pf) > SIDE_SLACK_PX or abs(last[k] - pl) > SIDE_SLACK_PX:
                break
            if n >= 5:
                bf, bl = (n * sff - s0 * sf) / denom, (n * sll - s0 * sl) / denom
                if max(abs(bf), abs(bl)) > MAX_SIDE_SLOPE:
                    return 0 if n == 5 else n
        elif n == 1 and (abs(first[k] - first[0]) > SIDE_SLACK_PX
                         or abs(last[k] - last[0]) > SIDE_SLACK_PX):
            break
        n += 1
        s0 += k
        s1 += k * k
        sf += first[k]
        sff += first[k] * k
        sl += last[k]
        sll += last[k] * k
    return n


def find_layout(frame, *, geometry="plates", roi=None) -> Layout:
    """Find orientation, end bodies, band and levels from one frame.

    ``geometry`` is ``"plates"`` or ``"dripping"``; ``roi`` optional
    ``(x0, y0, x1, y1)`` in full-frame pixels. Raises :class:`NoFilament`
    when the frame shows no dark object on a bright background, :class:`UnusableRoi` when the
    roi leaves too little of it (:func:`roi_within`).
    """
    frame = np.asarray(frame)
    if frame.ndim != 2:
        raise ValueError("find_layout expects a 2-D grey frame")
    x0, y0, x1, y1 = roi_within(roi, frame.shape)
    region = np.asarray(frame[y0:y1, x0:x1], dtype=np.float32)
    bright = float(np.percentile(region, 98))
    dark = float(np.percentile(region, 0.5))
    noise_abs = _noise_of(region)
    if bright - dark < max(8.0 * noise_abs, 0.05 * max(bright, 1.0)):
        raise NoFilament("No filament in view: the frame shows no dark shadow on a bright background.")
    mask = region < 0.5 * (bright + dark)
    if mask.mean() < 1e-3:
        raise NoFilament("No filament in view: the frame shows no dark shadow on a bright background.")
    # the axis runs from end to end of the shadow (bodies at both ends), then the better score;
    # plates wider than the view on one side make the other reading look like a neck
    orientation = max((("vertical", mask), ("horizontal", mask.T)),
                      key=lambda o: (_dark_at_both_ends(o[1]), _axis_score(o[1])))[0]
    if orientation == "vertical":
        axial, lateral = (y0, y1), (x0, x1)
    else:
        axial, lateral, mask = (x0, x1), (y0, y1), mask.T
    n_ax, n_lat = mask.shape
    has, first, last = _extent(mask)
    n0, ext_start, cut_start = _end_body(has, first, last, n_lat, from_end=False)
    n1, ext_end, cut_end = _end_body(has, first, last, n_lat, from_end=True)
    if n0 + n1 >= n_ax - 4:
        raise NoFilament("No filament in view: the frame is dark from end to end.")
    free = np.zeros(n_ax, bool)
    free[n0:n_ax - n1] = True
    free &= has
    centre_rows = free if free.any() else has
    axis = float(np.median(0.5 * (first[centre_rows] + last[centre_rows])))
    # half-extent of everything that is not a band-filling body
    body_rows = np.zeros(n_ax, bool)
    body_rows[:n0] = ext_start is not None and math.isfinite(ext_start)
    body_rows[n_ax - n1:] = ext_end is not None and math.isfinite(ext_end)
    keep = has & (free | body_rows)
    half = float(np.max(np.maximum(axis - first[keep], last[keep] - axis))) + 1.0 if keep.any() else 4.0
    levels = _levels(region if orientation == "vertical" else region.T, mask, bright, dark)
    blur = levels["blur"]
    reach = half + (math.ceil(3.0 * blur) + 2) + BACKGROUND_COLUMNS + 2
    b0 = max(0, int(math.floor(axis - reach)))
    b1 = min(n_lat, int(math.ceil(axis + reach)) + 1)
    band = (lateral[0] + b0, lateral[0] + b1)
    span = (axial[0] + n0, axial[0] + n_ax - n1)
    provisional = Layout(orientation=orientation, roi=(x0, y0, x1, y1), thread_span=span,
                         plate_width_px=None, band=band, end_widths_px=(None, None),
                         axis_px=lateral[0] + axis, background_level=levels["background"],
                         shadow_level=levels["shadow"], blur_sigma_px=blur,
                         noise=noise_abs / max(levels["background"] - levels["shadow"], 1e-6),
                         geometry=geometry, saturation=_saturation(frame))
    background = region[~mask] if orientation == "vertical" else region.T[~mask]
    clipped = float(np.mean(background >= provisional.saturation)) if background.size else 0.0
    provisional = replace(provisional, clipped_background=clipped)
    block = _oriented(frame, orientation, axial, band)
    rows = measure_rows(block, provisional, shadow_fraction=provisional.shadow_fraction)
    floor = levels["shadow"] + 0.3 * (levels["background"] - levels["shadow"])
    bg = _background(block, rows, saturation=provisional.saturation, floor=floor)
    light, used = _fit_backlight(block, bg, noise_abs)
    provisional = replace(provisional, light=LightField.of(light, used))
    # the end bodies' shadow level from their own rims where there are bodies, else from any
    # thick rows; the liquid's own level apart (a refracting liquid is lighter than a plate)
    body_rim = np.zeros(n_ax, bool)
    body_rim[:n0] = True
    body_rim[n_ax - n1:] = True
    rim_ratio = measure_rows(block, provisional, shadow_fraction=provisional.shadow_fraction)["rim_ratio"]
    fraction = _rim_fraction(rim_ratio, body_rim)
    if fraction is None:
        fraction = _rim_fraction(rim_ratio, np.ones(n_ax, bool))
    if fraction is not None:
        provisional = replace(provisional, shadow_level=fraction * levels["background"])
    # sub-pixel widths of the end bodies, with the row machinery itself
    rows = measure_rows(block, provisional, shadow_fraction=provisional.shadow_fraction)
    widths = []
    for count, ext, sl in ((n0, ext_start, slice(0, n0)), (n1, ext_end, slice(n_ax - n1, n_ax))):
        if count == 0 or ext is None:
            widths.append(None)
        elif not math.isfinite(ext):
            widths.append(math.inf)
        else:
            inner = rows["cut_width"][sl][2:-2] if count > 6 else rows["cut_width"][sl]
            inner = inner[np.isfinite(inner)]
            widths.append(float(np.median(inner)) if inner.size else float(ext))
    shadow = provisional.shadow_level
    # the filament's direction: the straight sides of the end bodies, else the centre line
    index = np.arange(n_ax, dtype=float)
    slopes, weights = [], []
    for count, ext, sl in ((n0, ext_start, slice(1, max(1, n0 - 2))),
                           (n1, ext_end, slice(n_ax - n1 + 2, n_ax - 1))):
        sides = np.zeros(n_ax, bool)
        sides[sl] = True
        sides &= rows["has"] & ~rows["truncated"]
        if ext is not None and math.isfinite(ext) and sides.sum() >= 6:
            slopes.append(float(np.polyfit(index[sides], rows["centre"][sides], 1)[0]))
            weights.append(float(sides.sum()) ** 3)
    if slopes:
        axis_slope = float(np.average(slopes, weights=weights))
    else:
        line = free & rows["has"] & ~rows["truncated"]
        axis_slope = float(np.polyfit(index[line], rows["centre"][line], 1)[0]) if line.sum() >= 6 else 0.0
    # a body cut by the side of the region shows only part of its width: no reference
    plate = _reference_width([None if cut else v for v, cut in zip(widths, (cut_start, cut_end))],
                             geometry)
    if plate is not None:
        plate /= math.sqrt(1.0 + axis_slope * axis_slope)  # across the axis, not along the row
    face = int(math.ceil(3.0 * blur)) + 1
    liquid = _liquid_fraction(block, light, rows["has"], slice(n0 + face, n_ax - n1 - face),
                              noise_abs / max(levels["background"], 1e-6))
    return replace(provisional, plate_width_px=plate, axis_slope=axis_slope,
                   end_widths_px=(widths[0], widths[1]),
                   noise=noise_abs / max(levels["background"] - float(shadow), 1e-6),
                   liquid_fraction=liquid)


def _liquid_fraction(block, light, has, free, noise):
    """The liquid's own darkest level over the backlight on the free rows of the first frame.

    Each row's shadow level of I / B (the median of its pixels within a tenth of the row's
    range of its darkest 3-pixel mean); the median over the rows crossed by a clear shadow
    (darker than five times the relative ``noise``). None without such rows.
    """
    rows = np.flatnonzero(has[free]) + (free.start or 0)
    if rows.size < 3:
        return None
    ratio = np.asarray(block[rows], dtype=np.float64) / np.asarray(light[rows], dtype=np.float64)
    smooth = (ratio[:, :-2] + ratio[:, 1:-1] + ratio[:, 2:]) / 3.0
    darkest = smooth.min(axis=1)
    # the level of the row's shadow: the median of its pixels within the darkest tenth of the
    # row's range (the darkest single value is biased dark by the noise)
    top = np.where(ratio <= (darkest + 0.1 * (1.0 - darkest))[:, None], ratio, np.nan)
    low = np.nanmedian(top, axis=1)
    low = low[low < 1.0 - 5.0 * noise]
    if low.size < 3:
        return None
    return float(min(max(np.median(low), -0.5), 0.95))


def _saturation(frame):
    """Grey level at which the sensor clips: 255, 4095 (12 bits in 16) or 65535."""
    if frame.dtype == np.uint8:
        return 255.0
    if np.issubdtype(frame.dtype, np.integer):
        return 4095.0 if int(frame.max()) <= 4095 else float(np.iinfo(frame.dtype).max)
    return math.inf


def _reference_width(widths, geometry):
    """Plate width (mean of the plates) or nozzle diameter (the narrower finite body)."""
    finite = [v for v in widths if v is not None and math.isfinite(v)]
    if not finite:
        return None
    if geometry == "plates":
        return float(np.mean(finite))
    return float(min(finite))


def _noise_of(region):
    """Per-pixel noise (grey levels) from differences of neighbouring pixels, robustly."""
    diff = np.diff(region, axis=1)
    mad = np.median(np.abs(diff - np.median(diff)))
    return float(mad / 0.6745 / math.sqrt(2.0))


def _levels(block, mask, bright, dark):
    """Background, shadow level and blur from one frame (axis along rows)."""
    background = float(np.median(block[~mask])) if (~mask).any() else bright
    depth = max(background - dark, 1e-6)
    # blur: an erf edge rises from 10 % to 90 % over 2.563 σ (closed form); pixel
    # integration adds 1/12 px² of variance, removed in quadrature
    d = (background - block) / depth
    has, first, last = _extent(mask)
    sigmas = []
    width = mask.shape[1]
    # rows whose edges run along the axis (a slanted edge is cut wider than it is)
    steady = np.zeros_like(has)
    steady[2:-2] = (has[2:-2] & has[:-4] & has[4:] & (np.abs(first[4:] - first[:-4]) <= 1)
                    & (np.abs(last[4:] - last[:-4]) <= 1) & (last[2:-2] - first[2:-2] >= 16))
    candidates = np.flatnonzero(steady)
    for row in candidates[:: max(1, candidates.size // 64)]:
        for edge, sign in ((first[row], 1), (last[row], -1)):
            lo, hi = edge - 10, edge + 11
            if lo < 0 or hi > width:
                continue
            seg = d[row, lo:hi][::sign]
            seg = np.maximum.accumulate(np.clip(seg, 0.0, 1.0))
            if seg[0] > 0.1 or seg[-1] < 0.9:
                continue
            x10, x90 = np.interp([0.1, 0.9], seg + np.arange(seg.size) * 1e-9, np.arange(seg.size))
            sigmas.append((x90 - x10) / 2.563)
    blur = float(np.median(sigmas)) if sigmas else 1.0
    blur = float(np.sqrt(max(blur * blur - 1.0 / 12.0, 0.09)))
    blur = float(np.clip(blur, 0.3, 8.0))
    core = block[mask]
    shadow = float(np.percentile(core, 20)) if core.size else dark
    return {"background": background, "shadow": shadow, "blur": blur}


def _rim_fraction(rim_ratio, rows_ok):
    """Shadow level over backlight from the rims of the thick steady rows ``rows_ok`` (None
    when fewer than three)."""
    values = rim_ratio[rows_ok]
    values = values[np.isfinite(values)]
    if values.size < 3:
        return None
    middle = float(np.partition(values, values.size // 2)[values.size // 2])
    return min(max(middle, -0.5), 0.9)
