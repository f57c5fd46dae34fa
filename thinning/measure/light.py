"""The backlight of a layout's band: a smooth light field with the dust on it, refitted as
more background shows.

:class:`LightField` is fitted once through the background of the first
frame (:func:`fit_light_field`: a 2-D quadratic for ramps and vignetting,
with small dark specks of dust kept as they are) and refitted on a later
frame that shows more background (:func:`refresh_light`). It carries what
the row pass reads from it: the inverse field, the margin sums of each row
(where a frame's flicker gain is read) and the threshold maps of the
detection level.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING

import numpy as np

from .rows import BACKGROUND_COLUMNS, _oriented, measure_rows

if TYPE_CHECKING:
    from .layout import Layout


@dataclass(frozen=True)
class LightField:
    """The static backlight of a layout's band (grey levels of the first frame, axis along rows).

    ``backlight`` the field, ``pixels`` the number of background pixels it was
    fitted to; derived once (:meth:`of`): ``inverse`` 1 / field (float32),
    ``margin_light`` the field's sum over the margin columns of each row,
    ``lit_rows`` rows whose margins are lit, ``gain_rows`` every 4th lit row
    (where the flicker gain of a frame is read).
    """

    backlight: np.ndarray = field(repr=False)
    pixels: int
    inverse: np.ndarray = field(repr=False)
    margin_light: np.ndarray = field(repr=False)
    lit_rows: np.ndarray = field(repr=False)
    gain_rows: np.ndarray = field(repr=False)
    _thresholds: dict = field(default_factory=dict, compare=False, repr=False)

    @classmethod
    def of(cls, backlight, pixels) -> "LightField":
        """The light field ``backlight`` (fitted to ``pixels`` background pixels) with its derived maps."""
        p = backlight
        k = min(BACKGROUND_COLUMNS, max(1, p.shape[1] // 6))
        margins = p[:, :k].sum(axis=1) + p[:, -k:].sum(axis=1)
        top = float(np.median(margins))
        lit = margins > 0.5 * top
        gain_rows = np.flatnonzero(lit)[::4]
        if gain_rows.size < 5:
            gain_rows = np.arange(p.shape[0])
        return cls(backlight=p, pixels=int(pixels), inverse=(1.0 / p).astype(np.float32),
                   margin_light=margins.astype(np.float64), lit_rows=lit, gain_rows=gain_rows)

    def threshold_map(self, dtype, level, gain, shadow_fraction):
        """Grey level per pixel of a deficit of ``level`` under this field × ``gain``.

        ``shadow_fraction`` is the shadow level over the backlight. Returns the
        map in the frame's dtype; kept, and rebuilt when the gain moves by more
        than 8 % (it only has to find each row's dark extent, not its edges).
        """
        key = (np.dtype(dtype).str, level, shadow_fraction)
        entry = self._thresholds.get(key)
        if entry is None or abs(gain / entry[0] - 1.0) > 0.08:
            level_map = self.backlight * np.float32(gain * (1.0 - level * (1.0 - shadow_fraction)))
            if np.issubdtype(np.dtype(dtype), np.integer):
                level_map = np.clip(np.round(level_map), 0, np.iinfo(dtype).max).astype(dtype)
            entry = (gain, level_map)
            self._thresholds[key] = entry
        return entry[1]


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
    do not count as shadow when the thread later passes over them; a dark patch
    longer than :data:`DUST_MAX_ROWS` along the axis is a faint thread, not dust.
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
        dark = _compact(dark)
    if dark.any():
        import cv2

        spot = cv2.dilate(dark.astype(np.uint8), np.ones((5, 5), np.uint8)).astype(bool) & bg
        weight = cv2.blur(bg.astype(np.float32), (3, 3))
        smooth = cv2.blur(np.where(bg, block, 0.0).astype(np.float32), (3, 3))
        field_ = np.where(spot, smooth / np.maximum(weight, 1e-6), field_)
    return field_.astype(np.float32), int(bg.sum())


#: A dark patch of the background longer than this along the axis (rows) is no speck of dust
#: but a faint thread (or its rim under diffuse light): it never becomes part of the light field.
DUST_MAX_ROWS = 16


def _compact(dark):
    """The dark patches of ``dark`` short along the axis (rows, axis 0): specks of dust."""
    import cv2

    count, labels, stats, _ = cv2.connectedComponentsWithStats(dark.astype(np.uint8), connectivity=8)
    short = stats[:, cv2.CC_STAT_HEIGHT] <= DUST_MAX_ROWS
    short[0] = False  # the background label
    return short[labels]


def refresh_light(frame, layout: Layout, *, min_gain=1.1) -> Layout | None:
    """Refit the light field on a later frame that shows more background, else None.

    As the filament thins and the plates part, background hides behind less
    liquid: the field is refitted when this frame offers at least
    ``min_gain`` times the background pixels of the current fit. The new field
    is scaled to the first frame's brightness.
    """
    if layout.light is None:
        return None
    block = _oriented(np.asarray(frame), layout.orientation, layout.axial_range, layout.band)
    rows = measure_rows(block, layout, shadow_fraction=layout.shadow_fraction)
    gain = rows["gain"]
    depth = (layout.background_level - layout.shadow_level) * gain
    floor = layout.shadow_level * gain + 0.3 * depth
    bg = _background(block, rows, saturation=layout.saturation, floor=floor)
    if bg.sum() < min_gain * layout.light.pixels:  # not worth a fit
        return None
    light, used = _fit_backlight(block, bg, layout.noise * depth)
    if used < min_gain * layout.light.pixels:
        return None
    return replace(layout, light=LightField.of(light / np.float32(gain), used))
