"""The filament's profile in a frame: both edges of every row, the free span between the end
bodies, connectivity and the local axis.

:func:`profiles_of` turns the row pass of a block of frames
(:class:`~thinning.measure.rows.RowBlock`) into a :class:`ProfileBlock`;
:func:`locate_edges` measures one frame. The axis direction is a
straight-line fit of the centre line, kept within a degree and a half of
the direction of the end bodies' straight sides; widths across the axis are
row widths × cos(angle).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .layout import Layout
from .rows import TRACE_LEVEL, measure_block, rim_fractions


#: Smallest peak deficit for a row to count as crossed by the thread (connectivity).
PRESENCE_LEVEL = 0.12


#: Largest departure (degrees) of a frame's axis from the layout's, and of the neck's from the frame's.
MAX_BEND_DEG = 1.5


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


def bend_slope(max_bend_deg) -> float:
    """The largest departure of a direction, ``max_bend_deg`` (degrees), as a slope."""
    return math.tan(math.radians(max_bend_deg))


def axis_slopes(y, centre, ok, base_slope, max_bend_deg):
    """Direction of the centre line (lateral px per axial px) of each frame over its rows ``ok``.

    ``y`` the axial position of each row; ``centre`` and ``ok`` (frame, row);
    ``base_slope`` the direction to keep to, per frame or one for all. A
    straight-line fit, kept within ``max_bend_deg`` of ``base_slope`` (the
    end bodies' direction, or the frame's own): the liquid's own centre line
    wanders near plate corners, beads and retracting tips. Frames with fewer
    than 5 rows keep ``base_slope``.
    """
    bend = bend_slope(max_bend_deg)
    count = ok.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(ok, y, 0.0).sum(axis=1) / count
        dy = np.where(ok, y - mean[:, None], 0.0)
        slope = (dy * np.where(ok, centre, 0.0)).sum(axis=1) / (dy * dy).sum(axis=1)
    base = np.broadcast_to(np.asarray(base_slope, dtype=np.float64), slope.shape)
    return np.where(count >= 5, np.clip(slope, base - bend, base + bend), base)


def locate_edges(frame, layout: Layout, *, shadow_fraction=None, detect_level=TRACE_LEVEL,
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


def profiles_of(rows, layout: Layout, *, shadow_fraction, presence_level=PRESENCE_LEVEL,
                max_bend_deg=MAX_BEND_DEG) -> "ProfileBlock":
    """The profiles of a block of frames from their row measurements (options of :func:`locate_edges`).

    ``shadow_fraction``: per frame, the shadow level over backlight to scale
    the widths to (NaN: the layout's).
    """
    axial = layout.axial_range
    cut = rows.cut_width
    nb, n = cut.shape
    j = np.arange(n)
    body = _body_rows(rows, cut, layout, n)
    none = ~body.any(axis=1)
    start = np.where(body.all(axis=1), n, np.argmin(body, axis=1))
    stop = np.where(body.all(axis=1), n, n - np.argmin(body[:, ::-1], axis=1))
    face = np.where(none, 0, layout.face_px)
    lo = start + np.where(start > 0, face, 0)
    hi = stop - np.where(stop < n, face, 0)
    free = (j >= lo[:, None]) & (j < hi[:, None])
    own = rim_fractions(rows)
    new = np.asarray(shadow_fraction, dtype=np.float64)
    fraction = layout.shadow_fraction
    scaled = np.isfinite(new) & (new != fraction)
    peak = rows.peak
    if scaled.any():
        # re-scale the partial sums to this frame's own shadow level (flicker, exposure)
        with np.errstate(invalid="ignore", divide="ignore"):
            gain = np.where(scaled, (1.0 - fraction) / (1.0 - new), 1.0)
        core_n = rows.core_n
        cut = np.where(scaled[:, None], (cut - core_n) * gain[:, None] + core_n, cut)
        peak = np.where(scaled[:, None], peak * gain.astype(peak.dtype)[:, None], peak)
    fractions = np.where(scaled, new, fraction)
    present = peak > layout.presence_threshold(presence_level)
    valid = free & np.isfinite(cut) & ~rows.truncated
    connected = free.any(axis=1) & (present | ~free).all(axis=1)
    y = np.arange(n, dtype=np.float64) + axial[0]
    centre = rows.centre + layout.band[0]
    slope = axis_slopes(y, centre, valid, layout.axis_slope, max_bend_deg)
    cosine = 1.0 / np.sqrt(1.0 + slope * slope)
    return ProfileBlock(axial_px=y, centre_px=centre, cut_width_px=cut,
                        width_px=cut * cosine[:, None], slope=slope, contrast=peak, valid=valid,
                        present=present, body=body, free_start=axial[0] + start,
                        free_stop=axial[0] + stop, connected=connected,
                        shadow_fraction=fractions.astype(np.float64), rim_fraction=own)


def _body_rows(rows, cut, layout, n):
    """Rows of the end bodies (frame, row): contiguous from each end, as wide as the body or unlit."""
    no_light = rows.light < 0.5 * (1.0 + layout.shadow_fraction)
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
