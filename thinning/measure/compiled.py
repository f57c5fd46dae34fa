"""The per-frame hot path of the measurement, compiled: a block of bands → row arrays → necks.

:func:`thinning.measure.rows.measure_block` hands a block of bands (the region
analysed of each frame, axis along the rows: views into the decoded frames,
or a transposed copy for a horizontal filament) to :func:`frame_gains` and
:func:`scan_rows`, and :func:`thinning.measure.record.measure_recording` the resulting
rows to :func:`necks`, and :func:`thinning.measure.liquid.remeasure_necks` the neck rows of
each frame to :func:`liquid_widths` (their pixels read from the bands: widths against the
liquid's own shadow, integrated deficits, the calibration of each frame) and
:func:`liquid_necks` (the quadratic neck fit of those widths), when the compiled module
``thinning.measure._rowscan`` (``thinning/measure/_rowscan.c``, built by ``setup.py`` when a
C compiler is at hand) is installed. Without it the numpy path in :mod:`thinning.measure.rows`,
:mod:`thinning.measure.profile`, :mod:`thinning.measure.neck` and :mod:`thinning.measure.liquid`
gives the same quantities, about three and a half times slower (the benchmark recording).
The C functions are called through :mod:`ctypes`, which releases the GIL, so a block is
measured while the decoding threads go on with the next frames.
"""

from __future__ import annotations

import ctypes
import importlib.util
import os

import numpy as np

#: Set (to anything but 0) to make a missing compiled module an error instead of a fallback.
REQUIRE_ENV = "THINNING_REQUIRE_COMPILED"


def _load():
    spec = importlib.util.find_spec("thinning.measure._rowscan")
    if spec is None or not spec.origin:
        if os.environ.get(REQUIRE_ENV, "0") not in ("", "0"):
            raise ImportError(f"thinning.measure._rowscan was not built, and {REQUIRE_ENV} asks for it")
        return None
    lib = ctypes.CDLL(spec.origin)
    p, i, d = ctypes.c_void_p, ctypes.c_int64, ctypes.c_double
    for suffix in ("u8", "u16"):
        gains = getattr(lib, f"frame_gains_{suffix}")
        gains.argtypes = [p, i, i, i, i, p, i, p, i, d, p, p]
        gains.restype = ctypes.c_int
        scan = getattr(lib, f"scan_rows_{suffix}")
        scan.argtypes = [p, i, i, i, i, p, p, p, p, d, d, i, i, d, p, p, p, p, p, p, p, p]
        scan.restype = ctypes.c_int
        liquid = getattr(lib, f"liquid_widths_{suffix}")
        liquid.argtypes = [p, i, i, i, p, i, p, i, p, p, p, p, d, i, i, d, d, d] + [p] * 7
        liquid.restype = ctypes.c_int
    lib.necks.argtypes = [i, i] + [p] * 7 + [d, p, p, i, d, d, d, d, d, d, i, i] + [p] * 10
    lib.necks.restype = ctypes.c_int
    lib.liquid_necks.argtypes = [i, i] + [p] * 6 + [d, i, i, p]
    lib.liquid_necks.restype = ctypes.c_int
    return lib


_lib = _load()
#: Whether the compiled row pass is installed.
COMPILED = _lib is not None


def _suffix(dtype):
    if dtype == np.uint8:
        return "u8"
    if dtype == np.uint16:
        return "u16"
    raise TypeError(f"the compiled row pass reads 8- or 16-bit frames, not {dtype}")


class Bands:
    """A block of bands for the compiled passes: 2-D views (row, column) sharing shape, dtype
    and row stride, with contiguous rows (such as the same region of each decoded frame)."""

    def __init__(self, views):
        first = views[0]
        self.shape, self.dtype = first.shape, first.dtype
        stride, item = first.strides[0], first.itemsize
        for view in views:
            if (view.shape != self.shape or view.dtype != self.dtype or view.strides[0] != stride
                    or view.strides[1] != item):
                raise ValueError("the bands of a block must share shape, dtype and row stride, "
                                 "with contiguous rows")
        self.views = views
        self.stride = stride // item  # pixels from one row to the next
        self.pointers = (ctypes.c_void_p * len(views))(*[view.ctypes.data for view in views])

    def __len__(self):
        return len(self.views)

    def __getitem__(self, b):
        return self.views[b]


def _check(status):
    if status != 0:
        raise MemoryError("the compiled row pass could not allocate its row buffers")


def frame_gains(bands: Bands, gain_rows, margin_light, k, saturation):
    """Flicker gain and clipping of each band of a block.

    The gain is the upper median, over ``gain_rows``, of the ratio of the
    row's ``k`` margin columns on each side to ``margin_light`` (the light
    field's margin sums per row); ``clipped`` tells the frames where one of
    those margin pixels reaches ``saturation`` (their gain is to be judged
    by the unclipped rows). Returns ``gains`` (float64) and ``clipped`` (bool).
    """
    (n, w), nb = bands.shape, len(bands)
    rows = np.ascontiguousarray(gain_rows, dtype=np.int64)
    light = np.ascontiguousarray(margin_light, dtype=np.float64)
    gains = np.empty(nb)
    clipped = np.zeros(nb, np.uint8)
    _check(getattr(_lib, f"frame_gains_{_suffix(bands.dtype)}")(
        bands.pointers, bands.stride, nb, n, w, rows.ctypes.data, rows.size, light.ctypes.data, k,
        saturation, gains.ctypes.data, clipped.ctypes.data))
    return gains, clipped.view(bool)


def scan_rows(bands: Bands, thresholds, map_of_frame, inv_light, gains, saturation, scale, margin,
              core, dim):
    """Row measurements of a block of bands (see :func:`thinning.measure.rows.measure_block`).

    ``bands`` the bands of the frames (axis along the rows), such as views
    into the decoded frames themselves (no copy).
    ``thresholds`` (map, row, column) grey levels of the detection level in
    the frames' dtype, ``map_of_frame`` which map each frame uses;
    ``inv_light`` 1 / light field (float32); ``gains`` from
    :func:`frame_gains` (pixels at ``saturation`` carry no deficit);
    ``scale`` = 1 / (1 − shadow fraction);
    ``margin``/``core`` the zone reach outside and inside an edge (px); ``dim`` the
    smallest mean deficit (fraction of the light) of a gap joining two dark runs of a row
    (the lens band of a refracting thread).
    Returns a dict of arrays (frame, row): has, peak, centre, core_n,
    cut_width, truncated, rim_ratio, light.
    """
    (n, w), nb = bands.shape, len(bands)
    dtype = bands.dtype
    thresholds = np.ascontiguousarray(thresholds, dtype=dtype)
    index = np.ascontiguousarray(map_of_frame, dtype=np.int64)
    inv = np.ascontiguousarray(inv_light, dtype=np.float32)
    gains = np.ascontiguousarray(gains, dtype=np.float64)
    out = {"has": np.zeros((nb, n), np.uint8), "peak": np.empty((nb, n)),
           "centre": np.full((nb, n), np.nan), "core_n": np.zeros((nb, n)),
           "cut_width": np.full((nb, n), np.nan), "truncated": np.zeros((nb, n), np.uint8),
           "rim_ratio": np.full((nb, n), np.nan), "light": np.ones((nb, n))}
    _check(getattr(_lib, f"scan_rows_{_suffix(dtype)}")(
        bands.pointers, bands.stride, nb, n, w, thresholds.ctypes.data, index.ctypes.data, inv.ctypes.data,
        gains.ctypes.data, saturation, scale, margin, core, dim,
        *(out[key].ctypes.data for key in ("has", "peak", "centre", "core_n", "cut_width",
                                           "truncated", "rim_ratio", "light"))))
    out["has"] = out["has"].view(bool)
    out["truncated"] = out["truncated"].view(bool)
    return out


#: Per-frame results of :func:`necks`, in the order the C function writes them, and their dtypes.
NECK_COLUMNS = (("diameter_px", np.float64), ("neck_position_px", np.float64),
                ("axis_angle_deg", np.float64), ("axis_lateral_px", np.float64),
                ("min_contrast", np.float64), ("fit_rows", np.int64), ("beads", np.uint8),
                ("thread_connected", np.uint8), ("filament_seen", np.uint8),
                ("plate_gap_px", np.float64))


def necks(rows, fraction, *, layout_fraction, end_widths, face_px, axial0, band0, present_level,
          layout_slope, bend, row_noise, max_half, min_half):
    """The neck of each frame of a block: :func:`thinning.measure.profile.profiles_of` and
    :func:`thinning.measure.neck.necks_of` in one compiled pass (same arithmetic).

    ``rows`` a :class:`~thinning.measure.rows.RowBlock` from :func:`scan_rows`; ``fraction`` the shadow level over
    backlight of each frame (NaN: ``layout_fraction``); ``end_widths`` the
    layout's two end-body widths (None, a width in px, or inf); the rest
    are the layout's numbers and the neck fit's options (px, slopes as
    tangents). Returns a dict of per-frame arrays named as :data:`NECK_COLUMNS`.
    """
    nb, n = rows.cut_width.shape
    kinds = np.array([0 if v is None else (1 if np.isfinite(v) else 2) for v in end_widths], np.int64)
    widths = np.array([v if v is not None and np.isfinite(v) else 0.0 for v in end_widths])
    inputs = [np.ascontiguousarray(getattr(rows, key), dtype=np.float64)
              for key in ("cut_width", "core_n", "peak", "centre")]
    inputs.append(np.ascontiguousarray(rows.truncated, dtype=np.uint8))
    inputs.append(np.ascontiguousarray(rows.light, dtype=np.float64))
    inputs.append(np.ascontiguousarray(fraction, dtype=np.float64))
    out = {name: np.empty(nb, dtype) for name, dtype in NECK_COLUMNS}
    _check(_lib.necks(nb, n, *(a.ctypes.data for a in inputs), layout_fraction, kinds.ctypes.data,
                      widths.ctypes.data, face_px, axial0, band0, present_level, layout_slope, bend,
                      row_noise, max_half, min_half, *(out[name].ctypes.data for name, _ in NECK_COLUMNS)))
    for name in ("beads", "thread_connected", "filament_seen"):
        out[name] = out[name].view(bool)
    return out


def liquid_widths(bands: Bands, rows, first, span, centre, guess, backlight, gains, saturation,
                  margin, core, threshold, depth, noise, rules, near):
    """The neck rows of a block measured against the liquid's own shadow, and each frame's
    calibration: :func:`thinning.measure.liquid._row_widths` on the deficit of their pixels and
    the calibration ratios of :func:`~thinning.measure.liquid.remeasure_necks`, in one compiled
    pass (same arithmetic) that reads the pixels from the bands.

    ``rows`` (frame, row) the band row of each neck row, read over the columns ``first`` (per
    frame) to ``first + span − 1``; ``centre`` (those columns) and ``guess`` (frame, row) the
    row pass's centre and half-width (px); ``backlight`` the layout's light field, ``gains``
    the frames' flicker gains (pixels at ``saturation`` carry no deficit); ``margin``/``core``
    px; ``threshold``, ``depth`` and ``noise`` fractions of the light; ``rules`` the numbers of
    :mod:`thinning.measure.liquid` in the order of its ``COMPILED_RULES``; ``near`` (frame,
    row) the rows that calibrate. Returns widths (px, NaN where unresolved), resolved (bool)
    and the integrated deficits (px), (frame, row); the median ratio of deficit to width of
    each frame's resolved ``near`` rows (NaN without any) and how many they are.
    """
    (n, w), nb, nr = bands.shape, len(bands), np.shape(rows)[1]
    rows, centre, guess = (np.ascontiguousarray(a, dtype=t) for a, t in
                           ((rows, np.int64), (centre, np.float64), (guess, np.float64)))
    near = np.ascontiguousarray(near, dtype=np.uint8)
    first = np.ascontiguousarray(first, dtype=np.int64)
    gains = np.ascontiguousarray(gains, dtype=np.float32)
    light = np.ascontiguousarray(backlight, dtype=np.float32)
    rules = np.ascontiguousarray(rules, dtype=np.float64)
    if (any(a.shape != (nb, nr) for a in (rows, centre, guess, near)) or first.shape != (nb,)
            or gains.shape != (nb,) or light.shape != (n, w) or rules.shape != (9,)
            or (nb and (rows.min() < 0 or rows.max() >= n or first.min() < 0 or first.max() + span > w))):
        raise ValueError("the neck rows and their columns do not fit the bands")
    widths, resolved, totals = np.empty((nb, nr)), np.zeros((nb, nr), np.uint8), np.empty((nb, nr))
    ratios, used = np.empty(nb), np.empty(nb, np.int64)
    _check(getattr(_lib, f"liquid_widths_{_suffix(bands.dtype)}")(
        bands.pointers, bands.stride, nb, w, rows.ctypes.data, nr, first.ctypes.data, span,
        centre.ctypes.data, guess.ctypes.data, light.ctypes.data, gains.ctypes.data, saturation,
        margin, core, threshold, depth, noise, rules.ctypes.data, near.ctypes.data,
        widths.ctypes.data, resolved.ctypes.data, totals.ctypes.data, ratios.ctypes.data,
        used.ctypes.data))
    return widths, resolved.view(bool), totals, ratios, used


def liquid_necks(widths, resolved, totals, in_band, calibrated, stretch, row_noise, max_half,
                 min_half):
    """The diameter of each frame from the remeasured rows (:func:`liquid_widths`): the rows
    ``in_band`` and not ``resolved`` take ``totals / calibrated``, the widths are divided by
    ``stretch`` (1 / cosine of the axis' tilt) and :func:`thinning.measure.liquid._neck_fit`
    (same arithmetic) takes their minimum; NaN where fewer than three rows.
    """
    nb, nr = np.shape(widths)
    rows = [np.ascontiguousarray(a, dtype=t) for a, t in
            ((widths, np.float64), (resolved, np.uint8), (totals, np.float64), (in_band, np.uint8))]
    frames = [np.ascontiguousarray(a, dtype=np.float64) for a in (calibrated, stretch)]
    if any(a.shape != (nb, nr) for a in rows) or any(a.shape != (nb,) for a in frames):
        raise ValueError("the rows and frames of a block differ in shape")
    diameter = np.empty(nb)
    _check(_lib.liquid_necks(nb, nr, *(a.ctypes.data for a in rows + frames), row_noise, max_half,
                             min_half, diameter.ctypes.data))
    return diameter
