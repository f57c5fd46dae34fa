"""Where the filament is, and its two edges on every row, to a fraction of a pixel.

:func:`find_layout` looks at the first frame that shows a filament: which way
it runs, where the end bodies are (plates, or nozzle and substrate: dark
bodies with straight sides at the ends of the axis), the lateral band worth
analysing, the light field of that band, the shadow level, the blur and the
noise. :func:`locate_edges` then measures one frame in that layout and
returns a :class:`Profile`; :func:`refresh_light` refits the light field on
a later frame that shows more background. For a stream, :func:`measure_block`
measures a block of frames at once (compiled in :mod:`thinning.rowscan` where
the install built it, numpy otherwise) and :func:`profiles_of` turns it into
the profiles of the block, with the same results as :func:`locate_edges`
frame by frame.

Method, per frame (vectorised over rows, axis along the rows of the band):

1. Illumination. The backlight is the layout's static light field (a 2-D
   quadratic through the background of the band, with dark specks of dust
   kept as seen) times this frame's flicker gain, read on the bright
   margins beside the filament; the shadow level is S = f·B, with f
   measured on the dark rims of thick, straight sections (plates and thick
   liquid alike). Uneven, vignetted and flickering light are followed.
2. Deficit d = (B − I)/(B − S): 0 in the background, 1 in full shadow.
3. Each row's dark extent is where d exceeds ``detect_level``: its outer
   ends, so the bright lens streak of a transparent thread does not split
   it (a separate dark speck beside the filament is dropped).
4. The row width is the integrated deficit over a window reaching a few
   blur widths beyond both edges, with the core of a thick row (well inside
   both edges) counted as full shadow. A point-spread function moves light
   without losing it, so this partial-area width is unbiased for any blur,
   defocus or motion smear, even when a thin thread is blurred into a
   shallow dip that a 50 % threshold underestimates
   (``shared/reference/physics.md`` §8 table). Each edge is the end of its
   zone minus (plus) the zone's integrated deficit; a thin row is centred on
   its deficit centroid.
5. The axis direction is a straight-line fit of the centre line, kept within
   a degree and a half of the direction of the end bodies' straight sides;
   widths across the axis are row widths × cos(angle).

Coordinates are pixels of the full frame: ``axial`` runs along the filament
(y for a vertical filament, x for a horizontal one), ``lateral`` across it.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field, replace

import numpy as np

from .errors import ThinningError
from . import rowscan

log = logging.getLogger(__name__)

ORIENTATIONS = ("vertical", "horizontal")
#: Background columns used on each side of the band to estimate the backlight of a row.
BACKGROUND_COLUMNS = 6
#: Deficit level (fraction of the shadow depth) at which a row is taken to hold the filament.
DETECT_LEVEL = 0.25
#: Smallest peak deficit for a row to count as crossed by the thread (connectivity).
PRESENCE_LEVEL = 0.12
#: Largest departure (degrees) of a frame's axis from the layout's, and of the neck's from the frame's.
MAX_BEND_DEG = 1.5
#: Fraction of the background at the sensor's maximum above which edges are placed at the
#: steepest light gradient instead of by partial area (measured with scripts/optics_probe.py:
#: below it the partial area is the better of the two, above it by far the better is the gradient).
CLIPPED_EDGE_LIMIT = 0.85


class NoFilament(ThinningError, ValueError):
    """No filament in view (message: one sentence for the user)."""


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
    fraction of the background of the region at the sensor's maximum; ``backlight`` the static
    light field of the band (grey levels of the first frame, axis along rows)
    and ``light_pixels`` the number of background pixels it was fitted to.
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
    light_pixels: int = 0
    clipped_background: float = 0.0
    backlight: np.ndarray | None = field(default=None, compare=False, repr=False)

    @property
    def inverse_backlight(self) -> np.ndarray:
        """1 / backlight map (float32, band block shape, axis along rows)."""
        return self._derived()[0]

    @property
    def margin_light(self) -> np.ndarray:
        """Sum of the backlight map over the margin columns of each row."""
        return self._derived()[1]

    @property
    def lit_rows(self) -> np.ndarray:
        """Rows whose margins are lit in the backlight map."""
        return self._derived()[2]

    def threshold_map(self, dtype, level, gain):
        """Grey level per pixel of a deficit of ``level`` under the light field × ``gain``.

        Returns the map in the frame's dtype; cached, rebuilt when the gain
        moves by more than 8 % (it only has to find each row's dark extent, not
        its edges).
        """
        key = (np.dtype(dtype).str, level)
        cache = self.__dict__.setdefault("_thresholds", {})
        entry = cache.get(key)
        if entry is None or abs(gain / entry[0] - 1.0) > 0.08:
            f = self.shadow_fraction
            level_map = self.backlight * np.float32(gain * (1.0 - level * (1.0 - f)))
            if np.issubdtype(np.dtype(dtype), np.integer):
                level_map = np.clip(np.round(level_map), 0, np.iinfo(dtype).max).astype(dtype)
            entry = (gain, level_map)
            cache[key] = entry
        return entry[1]

    @property
    def gain_rows(self) -> np.ndarray:
        """Every 4th lit row: where the flicker gain of a frame is read."""
        return self._derived()[3]

    def _derived(self):
        cache = self.__dict__.get("_cache")
        if cache is None:
            p = self.backlight
            k = min(BACKGROUND_COLUMNS, max(1, p.shape[1] // 6))
            margins = p[:, :k].sum(axis=1) + p[:, -k:].sum(axis=1)
            top = float(np.median(margins))
            lit = margins > 0.5 * top
            gain_rows = np.flatnonzero(lit)[::4]
            if gain_rows.size < 5:
                gain_rows = np.arange(p.shape[0])
            cache = ((1.0 / p).astype(np.float32), margins.astype(np.float64), lit, gain_rows)
            object.__setattr__(self, "_cache", cache)
        return cache

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
    def core_px(self) -> int:
        """How far inside the detection crossing a pixel is surely full shadow."""
        return int(math.ceil(3.5 * self.blur_sigma_px)) + 1


@dataclass(frozen=True)
class Profile:
    """The filament in one frame: one entry per row of the band (axis along rows).

    ``axial_px`` row positions along the axis; ``left_px``/``right_px`` the
    edges (lateral, full-frame); ``cut_width_px`` the width along the image
    row; ``width_px`` the width across the local axis; ``centre_px`` the
    centre line; ``angle_deg`` the axis angle of this frame from the image
    axis (a straight-line fit of the centre line over the free rows);
    ``contrast`` the peak deficit of the row (1 = full shadow); ``valid``
    rows where the width was measured in the free part of the filament;
    ``present`` rows crossed by a shadow; ``body`` rows belonging to the end
    bodies. ``free_span`` is the axial ``[start, stop)`` between the bodies
    of this frame, ``connected`` whether every row of it is crossed by the
    thread, ``shadow_fraction`` the shadow level over backlight used and
    ``rim_fraction`` the one measured on this frame (NaN without thick rows).
    """

    axial_px: np.ndarray
    left_px: np.ndarray
    right_px: np.ndarray
    width_px: np.ndarray
    cut_width_px: np.ndarray
    centre_px: np.ndarray
    angle_deg: float
    contrast: np.ndarray
    valid: np.ndarray
    present: np.ndarray
    body: np.ndarray
    free_span: tuple[int, int]
    connected: bool
    shadow_fraction: float
    rim_fraction: float


# ---------------------------------------------------------------------------------------------
# layout


def _oriented(frame, orientation, axial, lateral, *, dtype=np.float32):
    """The frame region with the filament axis along rows (``dtype=None``: as stored, contiguous)."""
    if orientation == "vertical":
        block = frame[axial[0]:axial[1], lateral[0]:lateral[1]]
    else:
        block = frame[lateral[0]:lateral[1], axial[0]:axial[1]].T
    if dtype is None:
        return np.ascontiguousarray(block)
    return np.asarray(block, dtype=dtype)


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
    slack = 2.0 + 0.08 * np.arange(idx.size)  # a tilted body's sides drift slowly
    inside = has[idx] & (np.abs(first[idx] - f0) <= slack) & (np.abs(last[idx] - l0) <= slack)
    count = int(np.argmin(inside)) if not inside.all() else int(inside.size)
    if count < 5 or count > has.size - 5:
        return 0, None, False
    full = f0 <= 1 and l0 >= n_lat - 2
    return count, (math.inf if full else float(l0 - f0 + 1)), (f0 <= 1) != (l0 >= n_lat - 2)


def find_layout(frame, *, geometry="plates", roi=None) -> Layout:
    """Find orientation, end bodies, band and levels from one frame.

    ``geometry`` is ``"plates"`` or ``"dripping"``; ``roi`` optional
    ``(x0, y0, x1, y1)`` in full-frame pixels. Raises :class:`NoFilament`
    when the frame shows no dark object on a bright background.
    """
    frame = np.asarray(frame)
    if frame.ndim != 2:
        raise ValueError("find_layout expects a 2-D grey frame")
    h, w = frame.shape
    if roi is None:
        roi = (0, 0, w, h)
    x0, y0, x1, y1 = (int(v) for v in roi)
    x1, y1 = min(x1, w), min(y1, h)
    if x1 - x0 < 8 or y1 - y0 < 8:
        raise ValueError(f"the region of interest {roi} is too small (at least 8×8 pixels)")
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
    rows = _measure_rows(block, provisional, shadow_fraction=provisional.shadow_fraction)
    floor = levels["shadow"] + 0.3 * (levels["background"] - levels["shadow"])
    bg = _background(block, rows, saturation=provisional.saturation, floor=floor)
    light, used = _fit_backlight(block, bg, noise_abs)
    provisional = replace(provisional, backlight=light, light_pixels=used)
    fraction = _rim_fraction(_measure_rows(block, provisional,
                                           shadow_fraction=provisional.shadow_fraction)["rim_ratio"],
                             np.ones(n_ax, bool))
    if fraction is not None:
        provisional = replace(provisional, shadow_level=fraction * levels["background"])
    # sub-pixel widths of the end bodies, with the row machinery itself
    rows = _measure_rows(block, provisional, shadow_fraction=provisional.shadow_fraction)
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
    return replace(provisional, plate_width_px=plate, axis_slope=axis_slope,
                   end_widths_px=(widths[0], widths[1]),
                   noise=noise_abs / max(levels["background"] - float(shadow), 1e-6))


def _saturation(frame):
    """Grey level at which the sensor clips: 255, 4095 (12 bits in 16) or 65535."""
    if frame.dtype == np.uint8:
        return 255.0
    if np.issubdtype(frame.dtype, np.integer):
        return 4095.0 if int(frame.max()) <= 4095 else float(np.iinfo(frame.dtype).max)
    return math.inf


def _background(block, rows, *, saturation=math.inf, floor=-math.inf):
    """Background pixels of a band: outside every row's integration window, brighter than
    ``floor`` (not in a body's shadow) and below ``saturation`` (not clipped)."""
    n, w = block.shape
    s0, e0 = rows["window"]
    cols = np.arange(w)
    inside = (cols[None, :] >= (s0 - 2)[:, None]) & (cols[None, :] < (e0 + 2)[:, None])
    return ~(inside & rows["has"][:, None]) & (block < saturation) & (block > floor)


def _fit_backlight(block, bg, noise_abs, *, degree=2):
    """Static light field of the band: a 2-D polynomial through the background ``bg``, plus dust.

    The polynomial (``degree`` in the axial and lateral coordinate) carries the
    ramp and vignetting of the light; small dark specks of dust on the
    background are kept as they are (smoothed over 3×3 pixels), so that they
    do not count as shadow when the thread later passes over them.
    """
    n, w = block.shape
    v = np.linspace(-1.0, 1.0, n)[:, None] * np.ones((1, w))
    u = np.ones((n, 1)) * np.linspace(-1.0, 1.0, w)[None, :]
    terms = [u ** i * v ** j for i in range(degree + 1) for j in range(degree + 1 - i)]
    sub = np.zeros((n, w), bool)
    sub[::2, ::2] = True
    use = bg & sub
    if use.sum() < 4 * len(terms):
        use = bg
    if use.sum() < len(terms):
        return np.full((n, w), float(np.median(block)), np.float32), 0
    design = np.stack([t[use] for t in terms], axis=1)
    target = block[use].astype(np.float64)
    keep = np.ones(target.size, bool)
    for _ in range(3):  # drop dust and stray shadow from the fit
        coef, *_ = np.linalg.lstsq(design[keep], target[keep], rcond=None)
        resid = target - design @ coef
        spread = 1.4826 * np.median(np.abs(resid[keep])) + 1e-6
        keep = np.abs(resid) < 4.0 * spread
    field_ = sum(c * t for c, t in zip(coef, terms))
    field_ = np.maximum(field_, 1e-3 * max(float(np.max(field_)), 1.0))
    # dust: background clearly darker than the field; replaced by the smoothed frame
    ratio = block / field_
    dark = bg & (ratio < 1.0 - max(6.0 * noise_abs / float(np.median(field_)), 0.02))
    if dark.any():
        import cv2

        spot = cv2.dilate(dark.astype(np.uint8), np.ones((5, 5), np.uint8)).astype(bool) & bg
        weight = cv2.blur(bg.astype(np.float32), (3, 3))
        smooth = cv2.blur(np.where(bg, block, 0.0).astype(np.float32), (3, 3))
        field_ = np.where(spot, smooth / np.maximum(weight, 1e-6), field_)
    return field_.astype(np.float32), int(bg.sum())


def refresh_light(frame, layout: Layout, *, min_gain=1.1) -> Layout | None:
    """Refit the light field on a later frame that shows more background, else None.

    As the filament thins and the plates part, background hides behind less
    liquid: the field is refitted when this frame offers at least
    ``min_gain`` times the background pixels of the current fit. The new field
    is scaled to the first frame's brightness.
    """
    if layout.backlight is None:
        return None
    block = _oriented(np.asarray(frame), layout.orientation, layout.axial_range, layout.band)
    rows = _measure_rows(block, layout, shadow_fraction=layout.shadow_fraction)
    gain = rows["gain"]
    depth = (layout.background_level - layout.shadow_level) * gain
    floor = layout.shadow_level * gain + 0.3 * depth
    bg = _background(block, rows, saturation=layout.saturation, floor=floor)
    if bg.sum() < min_gain * layout.light_pixels:  # not worth a fit
        return None
    light, used = _fit_backlight(block, bg, layout.noise * depth)
    if used < min_gain * layout.light_pixels:
        return None
    return replace(layout, backlight=light / np.float32(gain), light_pixels=used)


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


# ---------------------------------------------------------------------------------------------
# per frame


def _box(values, half):
    """Running mean over ``2·half + 1`` entries along axis 0 (edges: shorter windows)."""
    n = values.shape[0]
    c = np.concatenate(([0.0], np.cumsum(values, dtype=np.float64)))
    i = np.arange(n)
    lo = np.clip(i - half, 0, n)
    hi = np.clip(i + half + 1, 0, n)
    return (c[hi] - c[lo]) / (hi - lo)


def _measure_rows(block, layout, *, shadow_fraction, detect_level=DETECT_LEVEL):
    """Row-wise width, centre and levels of one band block (float32, axis along rows)."""
    n, w = block.shape
    k = min(BACKGROUND_COLUMNS, max(1, w // 6))
    scale = np.float32(1.0 / max(1.0 - shadow_fraction, 1e-3))
    margins = block[:, :k].sum(axis=1) + block[:, w - k:].sum(axis=1)
    if layout.backlight is not None:
        # backlight = flicker gain × the static light field of the layout
        inv_light = layout.inverse_backlight
        ratio = margins / layout.margin_light
        lit = layout.lit_rows & np.isfinite(ratio)
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
            lj[r], rj[r] = _main_run(mask[r], pair[r], lj[r], rj[r])
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


def measure_block(frames, layout: Layout, *, detect_level=DETECT_LEVEL) -> dict:
    """Row measurements of several frames of one layout at once: arrays (frame, row).

    The same quantities as measuring each frame alone (:func:`locate_edges`),
    with the fixed cost of each call shared by the block. ``frames`` is a
    sequence of 2-D frames of one shape; the bands are read inside them (a
    horizontal filament's are transposed into one stack). The result goes to
    :func:`rim_fractions` and :func:`profiles_of` (or
    :func:`thinning.rowscan.necks`).
    """
    axial = layout.axial_range
    if layout.backlight is None:
        each = [_measure_rows(_oriented(np.asarray(f), layout.orientation, axial, layout.band),
                              layout, shadow_fraction=layout.shadow_fraction,
                              detect_level=detect_level) for f in frames]
        rows = {key: np.stack([r[key] for r in each]) for key in each[0] if key != "window"}
        rows["window"] = tuple(np.stack([r["window"][i] for r in each]) for i in (0, 1))
        return rows
    import cv2

    (a0, a1), (b0, b1) = axial, layout.band
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
    return _measure_bands(bands, layout, detect_level=detect_level)


def _measure_bands(bands, layout, *, detect_level=DETECT_LEVEL):
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
    The row pass is compiled (:mod:`thinning.rowscan`) where the install
    built it, numpy otherwise (on a stack of the bands). Returns arrays
    (frame, row), and the gain of each frame.
    """
    n, w = bands[0].shape
    if (n, w) != layout.inverse_backlight.shape:
        raise ValueError(f"frames of another size than the first: band {n}×{w}, "
                         f"layout {layout.inverse_backlight.shape}")
    k = min(BACKGROUND_COLUMNS, max(1, w // 6))
    probe_rows = layout.gain_rows
    if rowscan.COMPILED:
        bands = rowscan.Bands(bands)
        gains, clipped = rowscan.frame_gains(bands, probe_rows, layout.margin_light, k,
                                             float(layout.saturation))
    else:
        bands = np.stack(bands)
        gains, clipped = _frame_gains_numpy(bands, probe_rows, layout.margin_light, k,
                                            layout.saturation)
    for b in np.flatnonzero(clipped | (probe_rows.size < 5)):
        sample = bands[b][probe_rows]
        ratio = ((sample[:, :k].sum(axis=1, dtype=np.int64) + sample[:, w - k:].sum(axis=1, dtype=np.int64))
                 / layout.margin_light[probe_rows])
        gains[b] = _frame_gain(bands[b], layout, ratio, sample, k, bool(clipped[b]))
    maps = [layout.threshold_map(bands[0].dtype, detect_level, g) for g in gains]
    distinct = list({id(m): m for m in maps}.values())
    which = {id(m): i for i, m in enumerate(distinct)}
    map_of_frame = np.array([which[id(m)] for m in maps])
    thresholds = distinct[0][None] if len(distinct) == 1 else np.stack(distinct)
    scan = rowscan.scan_rows if rowscan.COMPILED else _scan_rows_numpy
    rows = scan(bands, thresholds, map_of_frame, layout.inverse_backlight, gains,
                float(layout.saturation), 1.0 / max(1.0 - layout.shadow_fraction, 1e-3),
                layout.margin_px, layout.core_px)
    rows["gain"] = gains
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
    has = rows["has"] & np.isfinite(rows["cut_width"]) & np.isfinite(rows["centre"])
    if not has.any():
        return
    pixels = np.stack([np.asarray(band) for band in bands]).astype(np.float32)
    w = pixels.shape[2]
    frame, row = np.nonzero(has)
    centre, cut = rows["centre"][has], rows["cut_width"][has]
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
    rows["cut_width"][has] = right - left
    rows["centre"][has] = 0.5 * (left + right)
    rows["core_n"][has] = right - left


def _frame_gains_numpy(blocks, gain_rows, margin_light, k, saturation):
    """:func:`thinning.rowscan.frame_gains` in numpy."""
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
                     margin, core):
    """:func:`thinning.rowscan.scan_rows` in numpy, for installs without the compiled module."""
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
            lj[b, r], rj[b, r] = _main_run(mask[b, r], -(blocks[b, r] * inv_light[r]), lj[b, r], rj[b, r])
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
    inv_light = layout.inverse_backlight
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


def _main_run(mask_row, pair_row, lo, hi, *, bridge_px=3):
    """First and last index of the dark run holding the row's darkest pair (gaps ≤ bridge_px joined)."""
    on = mask_row[lo:hi + 1]
    edges = np.flatnonzero(np.diff(np.concatenate(([0], on.astype(np.int8), [0]))))
    starts, stops = edges[::2], edges[1::2] - 1
    # join runs separated by a gap that is short, or narrow beside both runs (the bright
    # lens streak between the two dark rims of a transparent thread)
    keep_s, keep_e = [starts[0]], [stops[0]]
    for a, b in zip(starts[1:], stops[1:]):
        gap = a - keep_e[-1] - 1
        if gap <= bridge_px or gap <= 0.25 * min(keep_e[-1] - keep_s[-1] + 1, b - a + 1):
            keep_e[-1] = b
        else:
            keep_s.append(a)
            keep_e.append(b)
    darkest = int(np.argmax(pair_row[lo:hi + 1]))
    for a, b in zip(keep_s, keep_e):
        if a <= darkest <= b:
            return lo + a, lo + b
    return lo + keep_s[0], lo + keep_e[-1]


def axis_slopes(y, centre, ok, base_slope, max_bend_deg):
    """Direction of the centre line (lateral px per axial px) of each frame over its rows ``ok``.

    ``y`` the axial position of each row; ``centre`` and ``ok`` (frame, row);
    ``base_slope`` the direction to keep to, per frame or one for all. A
    straight-line fit, kept within ``max_bend_deg`` of ``base_slope`` (the
    end bodies' direction, or the frame's own): the liquid's own centre line
    wanders near plate corners, beads and retracting tips. Frames with fewer
    than 5 rows keep ``base_slope``.
    """
    bend = math.tan(math.radians(max_bend_deg))
    count = ok.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(ok, y, 0.0).sum(axis=1) / count
        dy = np.where(ok, y - mean[:, None], 0.0)
        slope = (dy * np.where(ok, centre, 0.0)).sum(axis=1) / (dy * dy).sum(axis=1)
    base = np.broadcast_to(np.asarray(base_slope, dtype=np.float64), slope.shape)
    return np.where(count >= 5, np.clip(slope, base - bend, base + bend), base)


def locate_edges(frame, layout: Layout, *, shadow_fraction=None, detect_level=DETECT_LEVEL,
                 presence_level=PRESENCE_LEVEL, max_bend_deg=MAX_BEND_DEG) -> Profile:
    """Both edges of the filament on every row of the band, sub-pixel (see module docstring).

    ``shadow_fraction``: shadow level over backlight to use (e.g. a running
    estimate over earlier frames); None measures it on this frame's thick
    rims, falling back to the layout's. ``detect_level``: deficit fraction
    whose outer crossings locate the filament on a row; ``presence_level``:
    smallest peak deficit of a row crossed by the thread; ``max_bend_deg``:
    largest departure of this frame's axis from the layout's direction.
    """
    rows = measure_block([frame], layout, detect_level=detect_level)
    fraction = rim_fractions(rows) if shadow_fraction is None else [float(shadow_fraction)]
    return profiles_of(rows, layout, shadow_fraction=fraction, presence_level=presence_level,
                       max_bend_deg=max_bend_deg).frame(0)


def rim_fractions(rows) -> np.ndarray:
    """Shadow level over backlight measured on each frame's thick rims (NaN without enough of them).

    ``rows`` from :func:`measure_block`; the median of the rim levels of the
    thick steady rows of each frame, within −0.5 … 0.9.
    """
    ratio = rows["rim_ratio"]
    count = np.isfinite(ratio).sum(axis=1)
    middle = np.sort(ratio, axis=1)[np.arange(ratio.shape[0]), count // 2]  # NaN sort last
    return np.where(count >= 3, np.clip(middle, -0.5, 0.9), np.nan)


def profiles_of(rows, layout: Layout, *, shadow_fraction, presence_level=PRESENCE_LEVEL,
                max_bend_deg=MAX_BEND_DEG) -> "ProfileBlock":
    """The profiles of a block of frames from their row measurements (options of :func:`locate_edges`).

    ``shadow_fraction``: per frame, the shadow level over backlight to scale
    the widths to (NaN: the layout's).
    """
    axial = layout.axial_range
    cut = rows["cut_width"]
    nb, n = cut.shape
    j = np.arange(n)
    body = _body_rows(rows, cut, layout, n)
    none = ~body.any(axis=1)
    start = np.where(body.all(axis=1), n, np.argmin(body, axis=1))
    stop = np.where(body.all(axis=1), n, n - np.argmin(body[:, ::-1], axis=1))
    face = np.where(none, 0, int(math.ceil(3.0 * layout.blur_sigma_px)) + 1)
    lo = start + np.where(start > 0, face, 0)
    hi = stop - np.where(stop < n, face, 0)
    free = (j >= lo[:, None]) & (j < hi[:, None])
    own = rim_fractions(rows)
    new = np.asarray(shadow_fraction, dtype=np.float64)
    fraction = layout.shadow_fraction
    scaled = np.isfinite(new) & (new != fraction)
    peak = rows["peak"]
    if scaled.any():
        # re-scale the partial sums to this frame's own shadow level (flicker, exposure)
        with np.errstate(invalid="ignore", divide="ignore"):
            gain = np.where(scaled, (1.0 - fraction) / (1.0 - new), 1.0)
        core_n = rows["core_n"]
        cut = np.where(scaled[:, None], (cut - core_n) * gain[:, None] + core_n, cut)
        peak = np.where(scaled[:, None], peak * gain.astype(peak.dtype)[:, None], peak)
    fractions = np.where(scaled, new, fraction)
    present = peak > max(presence_level, 5.0 * layout.noise)
    valid = free & np.isfinite(cut) & ~rows["truncated"]
    connected = free.any(axis=1) & (present | ~free).all(axis=1)
    y = np.arange(n, dtype=np.float64) + axial[0]
    centre = rows["centre"] + layout.band[0]
    slope = axis_slopes(y, centre, valid, layout.axis_slope, max_bend_deg)
    cosine = 1.0 / np.sqrt(1.0 + slope * slope)
    return ProfileBlock(axial_px=y, centre_px=centre, cut_width_px=cut,
                        width_px=cut * cosine[:, None], slope=slope, contrast=peak, valid=valid,
                        present=present, body=body, free_start=axial[0] + start,
                        free_stop=axial[0] + stop, connected=connected,
                        shadow_fraction=fractions.astype(np.float64), rim_fraction=own)


@dataclass(frozen=True)
class ProfileBlock:
    """The profiles of a block of frames of one layout: :class:`Profile`'s fields as arrays.

    Per (frame, row): ``centre_px``, ``cut_width_px``, ``width_px``,
    ``contrast``, ``valid``, ``present``, ``body``; per frame: ``slope``
    (axis direction, lateral px per axial px), ``free_start``/``free_stop``
    (the free span, axial px), ``connected``, ``shadow_fraction``,
    ``rim_fraction``; ``axial_px`` the rows' axial positions.
    """

    axial_px: np.ndarray
    centre_px: np.ndarray
    cut_width_px: np.ndarray
    width_px: np.ndarray
    slope: np.ndarray
    contrast: np.ndarray
    valid: np.ndarray
    present: np.ndarray
    body: np.ndarray
    free_start: np.ndarray
    free_stop: np.ndarray
    connected: np.ndarray
    shadow_fraction: np.ndarray
    rim_fraction: np.ndarray

    def __len__(self):
        return self.slope.size

    def frame(self, b) -> Profile:
        """The :class:`Profile` of frame ``b`` of the block."""
        half = 0.5 * self.cut_width_px[b]
        return Profile(axial_px=self.axial_px, left_px=self.centre_px[b] - half,
                       right_px=self.centre_px[b] + half, width_px=self.width_px[b],
                       cut_width_px=self.cut_width_px[b], centre_px=self.centre_px[b],
                       angle_deg=math.degrees(math.atan(self.slope[b])), contrast=self.contrast[b],
                       valid=self.valid[b], present=self.present[b], body=self.body[b],
                       free_span=(int(self.free_start[b]), int(self.free_stop[b])),
                       connected=bool(self.connected[b]),
                       shadow_fraction=float(self.shadow_fraction[b]),
                       rim_fraction=float(self.rim_fraction[b]))


def _rim_fraction(rim_ratio, rows_ok):
    """Shadow level over backlight from the rims of thick steady rows (None when too few).

    Plates and nozzle count as well as the liquid: in a backlit shadowgraph the
    refracting liquid is as dark as the solid bodies outside its lens streak.
    """
    values = rim_ratio[rows_ok]
    values = values[np.isfinite(values)]
    if values.size < 3:
        return None
    middle = float(np.partition(values, values.size // 2)[values.size // 2])
    return min(max(middle, -0.5), 0.9)


def _body_rows(rows, cut, layout, n):
    """Rows of the end bodies (frame, row): contiguous from each end, as wide as the body or unlit."""
    no_light = rows["light"] < 0.5 * (1.0 + layout.shadow_fraction)
    body = np.zeros(no_light.shape, bool)
    j = np.arange(n)
    for end, width in enumerate(layout.end_widths_px):
        if width is None:
            continue
        if math.isfinite(width):
            wide = no_light | (cut >= width - max(1.0, 0.02 * width))  # NaN: not wide
        else:
            wide = no_light
        seq = wide if end == 0 else wide[:, ::-1]
        count = np.where(seq.all(axis=1), n, np.argmin(seq, axis=1))
        body |= (j < count[:, None]) if end == 0 else (j >= n - count[:, None])
    return body
