"""The minimum neck diameter of every frame, the start of free thinning and the breakup.

:func:`measure_recording` makes one pass over a stream of frames (constant
memory in the number of frames): it finds the layout on the first frame
that shows a filament, measures the frames in blocks
(:func:`thinning.measure.rows.measure_block`, then the profiles and necks of the
block: :func:`thinning.compiled.necks` where it is compiled, else
:func:`thinning.measure.profile.profiles_of` and :func:`thinning.measure.neck.necks_of`), and reduces each
frame to one row:

- the neck is the thinnest part of the free filament (between beads, if
  any): around the thinnest rows a quadratic in the axial coordinate is
  fitted to the widths and its minimum taken, which averages the row noise
  instead of picking its most negative excursion (the raw minimum of noisy
  rows is biased low);
- a frame whose free span has a row without shadow has no connected thread:
  its diameter is NaN, and the pinch-off instant lies between the last frame
  with a thread and the first without;
- free thinning starts when the gap between the end bodies (plate faces, or
  nozzle and the foot of the drop on the substrate) stops changing.

Everything is in pixels and frames; :func:`to_physical` applies the
calibration once.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from typing import Iterable

import numpy as np
import pandas as pd

from ..checks import Code, Finding, Severity
from . import compiled
from .layout import Layout, NoFilament, find_layout
from .light import refresh_light
from .neck import MAX_HALF_WINDOW, MIN_HALF_WINDOW, necks_of
from .profile import MAX_BEND_DEG, PRESENCE_LEVEL, Profile, ProfileBlock, bend_slope, profiles_of
from .liquid import LiquidShadow, remeasure_necks
from .defects import CHECK_EVERY, DefectivePixels
from .rows import CLIPPED_EDGE_LIMIT, band_views, measure_bands, rim_fractions

log = logging.getLogger(__name__)


#: Thread diameter (px) below which frames without a connected thread are expected flicker.
GAP_THIN_PX = 2.0


#: Smallest diameter of the last thread (px, and in blur widths σ) for the thread to be seen
#: parting: a thinner one may have faded below the optical resolution and parted later.
PARTED_MIN_PX = 2.0
PARTED_MIN_BLUR = 1.5


#: Number of frames shown in the picture strip (:func:`thinning.plots.strip_snapshots` picks
#: them once the start of free thinning, the fit window and the breakup are known).
SNAPSHOTS = 6
#: Most frames with a thread kept, spread evenly, as the strip's candidates (besides the last
#: frame with a thread): constant memory whatever the length of the record.
SNAPSHOT_CANDIDATES = 16


#: Weight of a new frame in the running estimate of the shadow level.
SHADOW_SMOOTHING = 0.1


#: Tilt of the axis (degrees) above which a finding is raised.
TILT_LIMIT_DEG = 2.0


#: Pixels of band measured together (about 4 MB of 8-bit frames): a stack of frames shares
#: the fixed cost of each numpy call on the profiles.
BLOCK_PIXELS = 1 << 22


TABLE_COLUMNS = ["frame", "diameter_px", "neck_position_px", "axis_angle_deg", "axis_lateral_px",
                 "min_contrast", "thread_connected", "filament_seen", "plate_gap_px", "beads",
                 "fit_rows"]


@dataclass
class NeckSeries:
    """The neck of every frame of one recording, in pixels and frames.

    ``table`` has one row per frame with the columns of :data:`TABLE_COLUMNS`:
    ``diameter_px`` (minimum neck diameter across the axis; NaN where there
    is no connected thread and from the breakup on), ``neck_position_px``
    (axial coordinate of the neck: from the top of the frame, or from its
    left for a horizontal filament), ``axis_angle_deg`` (local axis angle at
    the neck), ``axis_lateral_px`` (lateral position of the axis at the
    neck), ``min_contrast`` (peak shadow depth at the neck, 1 = full shadow),
    ``thread_connected``, ``filament_seen`` (any shadow in the band),
    ``plate_gap_px`` (axial gap between the end bodies, the motion signal),
    ``beads`` (beads on the thread in this frame), ``fit_rows`` (rows used by
    the neck fit). ``free_thinning_start_frame`` and ``breakup_frame`` are in
    frames (``breakup_frame`` None when the thread did not break; the frame
    after the last one with a thread, less half a frame); ``breakup_parted``
    tells a thread seen parting (its last diameter resolved) from one that
    faded below the optical resolution, whose breakup is only a lower bound
    (None without breakup); ``diameter_noise_px`` is the per-frame noise of ``diameter_px``;
    ``snapshots`` a few ``(frame index, frame, profile)`` of frames with a connected thread,
    spread evenly from the first such frame, and the last one with a thread (never one from
    the breakup on): the candidates of the picture strip.
    """

    table: pd.DataFrame
    layout: Layout
    free_thinning_start_frame: float
    breakup_frame: float | None
    diameter_noise_px: float
    breakup_parted: bool | None = None
    findings: list[Finding] = field(default_factory=list)
    snapshots: list[tuple[int, np.ndarray, Profile]] = field(default_factory=list)


def _gaps(profiles: ProfileBlock, layout: Layout):
    """Axial gap between the end bodies of each frame (NaN unless both ends have a body).

    With one end body only, the position of its face stands in for the gap.
    """
    first, last = profiles.body[:, 0], profiles.body[:, -1]
    start, stop = profiles.free_start.astype(np.float64), profiles.free_stop.astype(np.float64)
    gap = np.full(len(profiles), math.nan)
    if layout.end_widths_px[1] is not None:
        gap = np.where(last, stop, gap)
    if layout.end_widths_px[0] is not None:
        gap = np.where(first, start, gap)
    return np.where(first & last, stop - start, gap)


class _Snapshots:
    """Frames with a connected thread for the picture strip, in constant memory.

    Every ``step``-th frame counted from the first one with a thread is kept, the step doubling
    (and every other kept frame dropped) whenever more than :data:`SNAPSHOT_CANDIDATES` are held,
    so they stay spread evenly over the thread's life so far; the last frame with a thread is
    kept besides. Which of them the strip shows is chosen later, when the start of free
    thinning, the fit window and the breakup are known (:func:`thinning.plots.strip_snapshots`).
    Frames without a thread (before the bridge forms, gaps, after breakup) are never kept.
    """

    def __init__(self):
        self.kept = []
        self.origin = None
        self.step = 1
        self.last = None

    def wants(self, index):
        """Whether frame ``index``, which has a connected thread, is one of the spread frames."""
        if self.origin is None:
            self.origin = index
        return (index - self.origin) % self.step == 0

    def keep(self, index, frame, profile):
        self.kept.append((index, np.array(frame, copy=True), profile))
        if len(self.kept) > SNAPSHOT_CANDIDATES:
            self.step *= 2
            self.kept = [s for s in self.kept if (s[0] - self.origin) % self.step == 0]

    def keep_last(self, index, frame, profile_of):
        """Frame ``index`` is the latest with a thread (``profile_of()`` gives its profile)."""
        self.last = (index, np.array(frame, copy=True), profile_of())

    def result(self):
        if self.last is None or any(s[0] == self.last[0] for s in self.kept):
            return list(self.kept)
        return self.kept + [self.last]


def measure_recording(frames: Iterable[np.ndarray], *, geometry="plates", roi=None,
                      n_frames=None) -> NeckSeries:
    """Measure the neck in every frame of a stream (one pass, constant memory).

    Parameters
    ----------
    frames : iterable of 2-D uint8 or uint16 arrays
        The frames in order, iterated once (a :class:`~thinning.frames.FrameSource`).
    geometry : {"plates", "dripping"}
    roi : tuple of int, optional
        ``(x0, y0, x1, y1)`` in full-frame pixels; found automatically otherwise.
    n_frames : int, optional
        The expected count; accepted for compatibility and no longer needed (the frames of the
        picture strip are spread over the thread's life as it is measured).

    Returns
    -------
    NeckSeries
        The neck of every frame in pixels, the layout, the start of free
        thinning, the breakup frame and the findings.

    Raises
    ------
    NoFilament
        When no frame shows a filament.

    Notes
    -----
    The few small least-squares fits of the light field run on one BLAS
    thread: an idle BLAS thread pool spins, taking the cores from the
    decoders (about 5 % of the CPU time of a streamed recording).
    """
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        return _measure_stream(frames, geometry=geometry, roi=roi, n_frames=n_frames)


def _measure_stream(frames, *, geometry, roi, n_frames) -> NeckSeries:
    del n_frames  # the strip's frames no longer depend on the expected count
    layout = None
    fraction = None
    records = []
    pending = []  # (index, frame) waiting to be measured with the current layout
    snaps = _Snapshots()
    defects = DefectivePixels()
    for index, frame in enumerate(frames):
        if index % CHECK_EVERY == 0 or layout is None:
            defects.update(frame)
        frame = defects.repair(frame)
        if layout is None:
            try:
                layout = find_layout(frame, geometry=geometry, roi=roi)
            except NoFilament:
                records.append(_empty(index))
                continue
            fraction = layout.shadow_fraction
            row_noise = _row_noise(layout)
            liquid = LiquidShadow(fallback=1.0 - layout.detect_fraction)
            first = index
            axial = layout.axial_range
            block_frames = max(1, BLOCK_PIXELS // ((axial[1] - axial[0]) * (layout.band[1] - layout.band[0])))
        since = index - first
        if since >= 8 and since & (since - 1) == 0:  # 8, 16, 32, … frames after the layout
            fraction = _measure_pending(pending, layout, fraction, row_noise, records, snaps, liquid)
            layout = refresh_light(frame, layout) or layout
        pending.append((index, frame))
        if len(pending) >= block_frames:
            fraction = _measure_pending(pending, layout, fraction, row_noise, records, snaps, liquid)
    if layout is None:
        raise NoFilament("No filament in view in any frame of the recording.")
    _measure_pending(pending, layout, fraction, row_noise, records, snaps, liquid)
    table = pd.DataFrame({column: np.concatenate([r[column] for r in records])
                          for column in TABLE_COLUMNS})
    series = summarise(table, layout, snapshots=snaps.result())
    if len(defects):
        series.findings.insert(0, Finding(Code.DEFECTIVE_PIXELS, Severity.NOTE,
            f"{len(defects)} defective sensor pixel(s) (stuck, hot or dead: single pixels unlike "
            "all their neighbours) were replaced by their neighbours' median before measuring."))
    return series


def _measure_pending(pending, layout, fraction, row_noise, records, snaps, liquid):
    """Measure the buffered frames as one block, in order; empties ``pending``, returns the shadow fraction."""
    if not pending:
        return fraction
    bands = band_views([f for _, f in pending], layout)
    rows = measure_bands(bands, layout)
    fractions = []  # the running estimate of the shadow level before each frame
    for own in rim_fractions(rows):
        fractions.append(fraction)
        if np.isfinite(own):
            fraction += SHADOW_SMOOTHING * (own - fraction)
    frames = [index for index, _ in pending]
    if compiled.COMPILED:
        record = compiled.necks(rows, fractions, **_neck_options(layout, row_noise))
        profile_of = _single_profiles(rows, layout, fractions)
    else:
        profiles = profiles_of(rows, layout, shadow_fraction=fractions)
        record = necks_of(profiles, row_noise_px=row_noise)
        record.update(thread_connected=profiles.connected, filament_seen=profiles.present.any(axis=1),
                      plate_gap_px=_gaps(profiles, layout))
        profile_of = profiles.frame
    remeasure_necks(bands, layout, rows, record, liquid, row_noise_px=row_noise)
    record["frame"] = np.array(frames)
    records.append(record)
    connected = np.asarray(record["thread_connected"], dtype=bool)
    for b, (index, frame) in enumerate(pending):
        if connected[b] and snaps.wants(index):
            snaps.keep(index, frame, profile_of(b))
    if connected.any():
        b = int(np.flatnonzero(connected)[-1])
        snaps.keep_last(pending[b][0], pending[b][1], lambda: profile_of(b))
    pending.clear()
    return fraction


def _neck_options(layout: Layout, row_noise):
    """The numbers of :func:`thinning.compiled.necks` for one layout (see :func:`necks_of`)."""
    return {"layout_fraction": layout.shadow_fraction, "end_widths": layout.end_widths_px,
            "face_px": layout.face_px,
            "axial0": float(layout.axial_range[0]), "band0": float(layout.band[0]),
            "present_level": layout.presence_threshold(PRESENCE_LEVEL),
            "layout_slope": layout.axis_slope, "bend": bend_slope(MAX_BEND_DEG),
            "row_noise": row_noise, "max_half": MAX_HALF_WINDOW, "min_half": MIN_HALF_WINDOW}


def _single_profiles(rows, layout, fractions):
    """A function giving the :class:`Profile` of frame ``b`` of the block (for the snapshots)."""
    def profile_of(b):
        return profiles_of(rows.frame(b), layout, shadow_fraction=[fractions[b]]).frame(0)
    return profile_of


def _empty(index):
    """The record of a frame before the first one that shows a filament."""
    return {"frame": np.array([index]), "diameter_px": [math.nan], "neck_position_px": [math.nan],
            "axis_angle_deg": [math.nan], "axis_lateral_px": [math.nan], "min_contrast": [math.nan],
            "thread_connected": [False], "filament_seen": [False], "plate_gap_px": [math.nan],
            "beads": [False], "fit_rows": [0]}


def _row_noise(layout: Layout):
    """Expected noise (px) of one row's width: per-pixel noise over a thin thread's window."""
    window = 2 * layout.margin_px + 4
    return float(layout.noise * math.sqrt(window))


def summarise(table: pd.DataFrame, layout: Layout, *, snapshots=()) -> NeckSeries:
    """Breakup, start of free thinning, noise and findings from the per-frame table."""
    table = table.copy()
    connected = table["thread_connected"].to_numpy(bool)
    seen = table["filament_seen"].to_numpy(bool)
    frames = table["frame"].to_numpy()
    findings = []
    breakup = parted = None
    if connected.any():
        first = int(np.flatnonzero(connected)[0])
        last = int(np.flatnonzero(connected)[-1])
        if last < len(table) - 1:
            if seen[last + 1]:
                breakup = float(frames[last]) + 0.5
                final = float(table["diameter_px"].iloc[last])
                parted = final >= max(PARTED_MIN_PX, PARTED_MIN_BLUR * layout.blur_sigma_px)
            else:
                findings.append(Finding(Code.FILAMENT_LOST, Severity.DOUBTFUL,
                    f"The filament disappeared from view after frame {int(frames[last])} "
                    "without a visible breakup."))
        gaps = ~connected[first:last + 1]
        if gaps.any():
            longest = _longest_run(gaps)
            lost = ~seen[first:last + 1] & gaps
            # a sub-pixel thread flickering out of view just before it breaks is expected;
            # gaps in a thread that was still thicker than GAP_THIN_PX are not
            before = pd.Series(np.where(connected, table["diameter_px"].to_numpy(float), np.nan))
            before = before.ffill().to_numpy()[first:last + 1]
            thick_gap = gaps & (before >= GAP_THIN_PX)
            serious = _longest_run(thick_gap) >= 3 or (lost & thick_gap).any()
            severity = Severity.DOUBTFUL if serious else Severity.NOTE
            findings.append(Finding(Code.THREAD_GAPS, severity,
                f"No connected thread was found in {int(gaps.sum())} frame(s) before the final "
                f"breakup (longest run {longest}); their diameters are left empty."))
        if first > 0:
            findings.append(Finding(Code.NO_FILAMENT_FRAMES, Severity.NOTE,
                f"The first {first} frame(s) show no connected filament; their diameters are empty."))
        table.loc[table.index > last, "diameter_px"] = np.nan
    else:
        findings.append(Finding(Code.NO_CONNECTED_THREAD, Severity.DOUBTFUL,
            "No frame shows a connected thread between the ends; nothing could be measured."))
    table.loc[~table["thread_connected"], "diameter_px"] = np.nan
    end = len(table) if breakup is None else int(breakup + 0.5)
    # the bridge forms when the drop touches the substrate (dripping) or stands between still
    # plates: free thinning then runs from the first frame with a connected thread; the
    # sessile drop keeps spreading, so the gap between the end bodies is no motion signal there
    start = None
    if layout.geometry != "dripping":
        start = free_thinning_start(table["plate_gap_px"].to_numpy(float)[:end])
    if start is None:
        start = float(np.flatnonzero(connected)[0]) if connected.any() else 0.0
    noise = diameter_noise(table["diameter_px"].to_numpy(float)[int(start):end])
    findings.extend(_quality_findings(table.iloc[:end], layout, start))
    return NeckSeries(table=table, layout=layout, free_thinning_start_frame=float(start),
                      breakup_frame=breakup, diameter_noise_px=noise, breakup_parted=parted,
                      findings=findings, snapshots=list(snapshots))


def _longest_run(mask):
    return max((last - first + 1 for first, last in _runs(np.asarray(mask, bool))), default=0)


def _running_median(values, half):
    """Median over each entry and ``half`` entries either side (shorter windows at the ends)."""
    padded = np.concatenate((np.full(half, np.nan), values, np.full(half, np.nan)))
    return np.nanmedian(np.lib.stride_tricks.sliding_window_view(padded, 2 * half + 1), axis=1)


def free_thinning_start(gap_px, *, span=4, min_change_px=2.0, settle_px=1.0, hold_fraction=0.1):
    """First frame after the plates stopped moving, or None when they did not move in the record.

    ``gap_px``: the axial gap between the end bodies per frame (NaN where
    unknown). A frame is within a motion when the median-filtered gap
    changes by more than ``max(min_change_px, 10 % of the largest change)``
    between ``span`` frames before and after it. A motion counts only when
    the gap then holds, with no motion, for at least ``2 span`` frames and
    ``hold_fraction`` of the frames measured: the liquid feet draining on
    still plates change the gap up to breakup and never hold, so a record
    whose only motion runs into its last frames is one of still plates
    (docs/physics.md, "Start of free thinning"). The motion has ended at
    the first frame after it whose gap is within ``settle_px`` of the gap
    held afterwards.
    """
    idx = np.flatnonzero(np.isfinite(gap_px))
    if idx.size < 2 * span + 2:
        return None
    g = _running_median(gap_px[idx], 2)
    change = np.abs(g[2 * span:] - g[:-2 * span])
    limit = max(min_change_px, 0.1 * float(change.max()))
    moving = change > limit
    hold = max(2 * span, int(math.ceil(hold_fraction * g.size)))
    runs = _runs(moving)
    starts = [first for first, _ in runs[1:]] + [moving.size]  # where the next motion begins
    for (_, last), next_start in reversed(list(zip(runs, starts))):
        if next_start - last - 1 < hold:
            continue  # no hold after it: the feet draining, not the plates
        centre = last + span
        after = g[min(centre + span, g.size - 1): centre + 3 * span + 1]
        held = float(np.median(after)) if after.size else float(g[-1])
        for j in range(max(0, centre - span), g.size):
            if abs(g[j] - held) <= settle_px:
                return float(idx[j])
        return float(idx[-1])
    return None


def _runs(mask):
    """(first, last) index of every run of True in a boolean array."""
    edges = np.diff(np.concatenate(([0], mask.astype(np.int8), [0])))
    return list(zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1) - 1))


def diameter_noise(diameter_px):
    """Per-frame noise of a diameter series from its second differences (robust; px)."""
    d = diameter_px[np.isfinite(diameter_px)]
    if d.size < 8:
        return math.nan
    second = np.diff(d, 2)
    mad = np.median(np.abs(second - np.median(second)))
    return float(1.4826 * mad / math.sqrt(6.0))


def _frame_range(mask, frames):
    hit = frames[mask]
    return f"frames {int(hit.min())}–{int(hit.max())}"


def _quality_findings(table, layout: Layout, start):
    findings = _clipping_findings(layout)
    frames = table["frame"].to_numpy()
    measured = table["diameter_px"].notna().to_numpy()
    if not measured.any():
        return findings
    angle = table["axis_angle_deg"].to_numpy(float)[measured]
    tilt = float(np.median(angle))
    if abs(tilt) > TILT_LIMIT_DEG:
        findings.append(Finding(Code.TILT, Severity.NOTE,
            f"The filament axis is tilted by {abs(tilt):.1f}° from the image axis; diameters are "
            "measured across the axis, but check the camera alignment."))
    lateral = table["axis_lateral_px"].to_numpy(float)[measured]
    diam = table["diameter_px"].to_numpy(float)[measured]
    if lateral.size >= 10:
        k = max(3, lateral.size // 10)
        drift = abs(float(np.median(lateral[-k:]) - np.median(lateral[:k])))
        if drift > max(3.0, 0.5 * float(np.nanmedian(diam[:k]))):
            findings.append(Finding(Code.AXIS_DRIFT, Severity.NOTE,
                f"The filament axis drifted sideways by {drift:.1f} px during the record."))
    beads = table["beads"].to_numpy(bool) & measured
    if beads.sum() >= max(3, 0.05 * measured.sum()):
        findings.append(Finding(Code.BEADS, Severity.NOTE,
            f"Beads formed on the thread ({_frame_range(beads, frames)}); the diameter is the "
            "thread's minimum between them."))
    floor = 3.0 * layout.blur_sigma_px
    contrast = table["min_contrast"].to_numpy(float)
    low = measured & ((table["diameter_px"].to_numpy(float) < floor) | (contrast < 0.8))
    if low.any():
        findings.append(Finding(Code.CONTRAST_LOSS, Severity.NOTE,
            f"The thread is narrower than about three blur widths ({floor:.1f} px) in "
            f"{int(low.sum())} frame(s) ({_frame_range(low, frames)}): it is blurred into a "
            "low-contrast dip and those diameters are less reliable."))
    return findings


def _clipping_findings(layout: Layout):
    """A backlight that saturates the sensor hides the outer part of each edge's light profile
    (see :func:`thinning.measure.rows._steepest_edges`): a note, or doubtful when nearly all clips."""
    share = layout.clipped_background
    if share < 0.05:
        return []
    advice = "Lower the exposure or the backlight so the background stays below the maximum."
    if share > CLIPPED_EDGE_LIMIT:  # the edges came from the steepest light gradient
        return [Finding(Code.BACKGROUND_CLIPPED, Severity.DOUBTFUL,
            f"{share:.0%} of the background is at the camera's maximum grey level, so the light "
            "level is unknown: edges were placed at the steepest light gradient, which reads "
            "diameters low by up to a few tenths of a pixel (more the brighter the light). "
            + advice)]
    return [Finding(Code.BACKGROUND_CLIPPED, Severity.NOTE,
        f"{share:.0%} of the background is at the camera's maximum grey level: where the light "
        "saturates the sensor, edges may read slightly inward. " + advice)]


def to_physical(series: NeckSeries, calibration) -> pd.DataFrame:
    """The per-frame table in SI units on the recording's clock (``calibration.time_s``: the
    file's time stamps where they are the clock, else t = frame / fps).

    Columns: ``frame, time_s, diameter_m, neck_position_m, axis_angle_deg,
    thread_connected, min_contrast, plate_gap_m``.
    """
    t = series.table
    px = calibration.pixel_size_m
    return pd.DataFrame({
        "frame": t["frame"].to_numpy(int),
        "time_s": calibration.time_s(t["frame"].to_numpy(float)),
        "diameter_m": t["diameter_px"].to_numpy(float) * px,
        "neck_position_m": t["neck_position_px"].to_numpy(float) * px,
        "axis_angle_deg": t["axis_angle_deg"].to_numpy(float),
        "thread_connected": t["thread_connected"].to_numpy(bool),
        "min_contrast": t["min_contrast"].to_numpy(float),
        "plate_gap_m": t["plate_gap_px"].to_numpy(float) * px,
    })
