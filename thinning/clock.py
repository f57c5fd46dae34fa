"""The recording's clock: the frame rate and per-frame times used, the exposure and the trigger.

Where each comes from (``clock_source`` in ``result.json``, docs/contract.md):

- ``"file"``: a native camera file's header (``.cine``, ``.mraw``) gives the
  recording rate and, for ``.cine``, a time stamp per frame. The stamps are the
  clock (time = the stamp minus frame 0's), so frames the camera dropped do not
  shift the times after them. An ``--fps`` more than :data:`FPS_AGREEMENT` off the
  header's rate is refused unless ``--fps-override`` is given.
- ``"option"``: ``--fps`` (a video container's rate is usually a playback rate, and
  TIFF stacks and image folders carry none); time = frame / fps.
- ``"container"``: a video container's own rate, used without ``--fps``
  (doubtful below :data:`PLAYBACK_RATE_LIMIT_HZ`, where it is likely a playback rate).

:func:`motion_blur_finding` warns when an edge moves more than
:data:`MOTION_BLUR_PX` during one exposure at the neck's measured speed.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .checks import Code, Finding, Severity
from .errors import ThinningError
from .units import AnalysisOptions, Calibration

#: An --fps within this relative difference of a native header's rate agrees with it (0.1 %).
FPS_AGREEMENT = 1e-3
#: Without --fps, a container rate below this (1/s) is used as doubtful (likely a playback rate).
PLAYBACK_RATE_LIMIT_HZ = 500.0
#: A gap between consecutive stamps longer than this many frame intervals means dropped frames.
DROPPED_GAP_FRAMES = 1.5
#: Motion blur (px an edge moves during one exposure) above which the record says so.
MOTION_BLUR_PX = 0.3
#: An --exposure within this relative difference of the file's own agrees with it.
EXPOSURE_AGREEMENT = 0.01


class ClockConflict(ThinningError, ValueError):
    """The options contradict the recording's own clock (message: one sentence for the user)."""


@dataclass(frozen=True)
class RecordingClock:
    """The clock an analysis used.

    ``fps_hz`` the frame rate (1/s; with stamps, the header's nominal rate),
    ``source`` ``"file"``, ``"option"`` or ``"container"``, ``frame_times_s``
    the per-frame times (s from frame 0) when the file's stamps are the clock,
    else None (time = frame / fps), ``exposure_s`` (s) and ``trigger_frame``
    (index within the record) where known. :meth:`calibration` gives the
    :class:`~thinning.units.Calibration` that converts frames to times.
    """

    fps_hz: float
    source: str
    frame_times_s: np.ndarray | None = field(default=None, compare=False, repr=False)
    exposure_s: float | None = None
    trigger_frame: int | None = None

    def calibration(self, pixel_size_m: float, frames_read: int | None = None) -> Calibration:
        """The calibration of this clock with ``pixel_size_m`` (m), stamps cut to the frames read."""
        times = self.frame_times_s
        if times is not None and frames_read is not None:
            times = times[:max(int(frames_read), 1)]
        return Calibration(fps_hz=self.fps_hz, pixel_size_m=pixel_size_m, frame_times_s=times)


def resolve_clock(options: AnalysisOptions, recording) -> tuple[RecordingClock, list[Finding]]:
    """The clock of ``recording`` (a :class:`thinning.frames.FrameSource`) under ``options``.

    Raises :class:`ClockConflict` when ``--fps`` contradicts a native header's
    recording rate without ``--fps-override``, when ``--fps-override`` comes
    without ``--fps``, or when nothing gives a rate.
    """
    findings: list[Finding] = []
    fps_option, file_rate = options.fps_hz, recording.fps
    from_file = recording.clock == "file" and file_rate is not None
    exposure_s = _exposure(options, recording, findings)
    trigger = recording.trigger_frame
    if options.fps_override and fps_option is None:
        raise ClockConflict("--fps-override was given without --fps; give the recording rate to "
                            "use, e.g. --fps 10kHz --fps-override.")
    if from_file and fps_option is not None and options.fps_override:
        findings.append(Finding(
            Code.CLOCK_OVERRIDDEN, Severity.NOTE,
            f"--fps-override: the clock is --fps {fps_option:g}/s, not the header's recording rate of "
            f"{file_rate:g}/s; times are frame / fps and the file's time stamps are not used."))
        return RecordingClock(fps_option, "option", None, exposure_s, trigger), findings
    if from_file:
        if fps_option is not None and abs(fps_option / file_rate - 1.0) > FPS_AGREEMENT:
            raise ClockConflict(
                f"--fps {fps_option:g}/s differs from the recording rate in the file's header "
                f"({file_rate:g}/s) by {abs(fps_option / file_rate - 1.0):.1%}; leave --fps out to use "
                "the header's, or add --fps-override to use yours.")
        stamps = recording.timestamps_s
        times = None if stamps is None else np.asarray(stamps, dtype=float)
        if times is not None:
            findings.extend(_dropped_frames(times, file_rate))
        return RecordingClock(file_rate, "file", times, exposure_s, trigger), findings
    if fps_option is not None:
        return RecordingClock(fps_option, "option", None, exposure_s, trigger), findings
    if file_rate is None:
        raise ClockConflict("The recording carries no frame rate; pass --fps with the camera's "
                            "recording rate, e.g. --fps 10kHz.")
    if file_rate < PLAYBACK_RATE_LIMIT_HZ:
        findings.append(Finding(
            Code.CONTAINER_FRAME_RATE, Severity.DOUBTFUL,
            f"No --fps given: the container's rate of {file_rate:g}/s was used, but for high-speed "
            "cameras it is usually a playback rate, and every time and λ scale with it; pass --fps "
            "with the camera's recording rate."))
    return RecordingClock(file_rate, "container", None, exposure_s, trigger), findings


def _exposure(options: AnalysisOptions, recording, findings) -> float | None:
    """The exposure (s): the file's own, else ``--exposure``; a disagreeing option is noted."""
    own, given = recording.exposure_s, options.exposure_s
    if own is None:
        return given
    if given is not None and abs(given / own - 1.0) > EXPOSURE_AGREEMENT:
        findings.append(Finding(
            Code.EXPOSURE_OPTION_UNUSED, Severity.NOTE,
            f"--exposure {given * 1e6:g} µs was not used: the file's header gives the exposure as "
            f"{own * 1e6:g} µs."))
    return own


def _dropped_frames(times: np.ndarray, fps_hz: float) -> list[Finding]:
    """A note when the stamps show frames the camera did not save (gaps over 1.5 intervals)."""
    if times.size < 2:
        return []
    steps = np.diff(times) * fps_hz
    gaps = steps > DROPPED_GAP_FRAMES
    if not gaps.any():
        return []
    missing = int(np.sum(np.rint(steps[gaps]) - 1))
    first = int(np.argmax(gaps))
    return [Finding(
        Code.FRAMES_DROPPED, Severity.NOTE,
        f"The file's time stamps show {missing} frame(s) missing in {int(gaps.sum())} gap(s), the "
        f"first after t = {times[first] * 1e3:.4g} ms; every time is taken from the stamps, so the "
        "gaps do not shift the clock.",
        (float(times[first]), float(times[first + 1])))]


def motion_blur_finding(time_s, diameter_m, *, exposure_s, pixel_size_m, floor_m,
                        t_range_s=None) -> Finding | None:
    """A note when an edge moves more than :data:`MOTION_BLUR_PX` during one exposure.

    The edge speed is half the neck's thinning rate |dD/dt| (each edge moves by
    half the change of D), from differences over five frames, on frames with
    D above ``floor_m`` and, when given, inside ``t_range_s`` (s, free thinning
    to breakup). Its 90th percentile stands for the fastest thinning (robust
    to single noisy frames). None when no exposure is known or the blur is
    smaller.
    """
    if exposure_s is None:
        return None
    t = np.asarray(time_s, dtype=float)
    d = np.asarray(diameter_m, dtype=float)
    keep = np.isfinite(t) & np.isfinite(d) & (d > floor_m)
    if t_range_s is not None:
        keep &= (t >= t_range_s[0]) & (t <= t_range_s[1])
    t, d = t[keep], d[keep]
    if t.size < 6:
        return None
    lag = 4
    rate = np.abs(d[lag:] - d[:-lag]) / np.maximum(t[lag:] - t[:-lag], 1e-12)
    speed_m_s = 0.5 * float(np.percentile(rate, 90))
    blur_px = speed_m_s * exposure_s / pixel_size_m
    if not blur_px > MOTION_BLUR_PX:
        return None
    return Finding(
        Code.MOTION_BLUR, Severity.NOTE,
        f"Motion blur: at the neck's measured speed (each edge up to {speed_m_s * 1e3:.3g} mm/s) an "
        f"exposure of {exposure_s * 1e6:.3g} µs smears each edge by {blur_px:.2g} px (over "
        f"{MOTION_BLUR_PX} px); a shorter exposure keeps edges sharp.",
        None if t_range_s is None else (float(t_range_s[0]), float(t_range_s[1])))
