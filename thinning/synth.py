"""Synthetic backlit shadowgraph recordings of a thinning filament, with their truth.

The neck history comes from :func:`thinning.laws.filament_model`; this module
only draws it. Per frame it builds the liquid's radius profile R(a) along the
filament axis: end plates (or a nozzle above a substrate with a spreading
sessile drop) met by smooth menisci, a neck whose minimum is exactly the
model's D(t)/2 at a known position (localised for Newtonian liquids, a long
uniform thread in elasto-capillary thinning), optional beads, and after
breakup two halves whose tips recede. The silhouette becomes exact per-row
pixel coverage (8 sub-rows per pixel row, exact 1-D coverage across; tilt
rotates the geometry, not the image), is blurred by the optics' PSF and
painted as a backlit image with uneven light, flicker, lens streak, dust,
shot and read noise, quantised to the bit depth.

Timeline of a record (recording clock ``frame / fps_hz``): ``pre_roll_s`` at
rest, ``stretch_duration_s`` of plate motion (dripping: the drop touches the
substrate and drains), free thinning from ``pre_roll_s + stretch_duration_s``
(the model's t = 0), breakup, and a few frames of the retracting halves.

Conventions: SI units in names; pixel coordinates have their origin at the
centre of the top-left pixel (pixel ``i`` spans ``i - 0.5 .. i + 0.5``), x to
the right, y down. A horizontal recording is the vertical one transposed:
the upper end appears on the left. The truth is in the filament's own frame:
jitter moves the neck position, never the diameter.

The files (containers and the truth JSON) are written by :mod:`thinning.synth_io`,
shared with the ray-traced renderer :mod:`thinning.raysynth`; its names
(``Truth``, ``FORMATS``, ``truth_path``, ``load_truth`` …) stay importable from here.
"""

from __future__ import annotations

import dataclasses
import logging
import math
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy.ndimage import minimum_filter1d

from thinning import laws
from thinning.units import GEOMETRIES
from thinning.synth_io import (FORMATS, Truth, check_format, load_truth, truth_path, write_frames,
                               write_truth)

log = logging.getLogger(__name__)

__all__ = ["Optics", "Scene", "Truth", "render_recording", "write_recording", "write_truth",
           "load_truth", "truth_path", "write_benchmark_recording", "benchmark_scene",
           "standard_scenes", "dilute_polymer_plates", "boger_fluid_plates",
           "newtonian_viscous_plates", "water_like_dripping", "polymer_dripping", "random_case",
           "ARTEFACTS", "FORMATS"]

#: Sub-rows per pixel row used to integrate coverage along the image rows' normal.
SUB_ROWS = 8
#: Frames kept after breakup when the record length is chosen automatically.
FRAMES_AFTER_BREAKUP = 10
#: Largest record generated automatically (frames).
MAX_AUTO_FRAMES = 200_000
#: Scene states averaged over the exposure when ``Optics.exposure_fraction`` > 0.
SUB_EXPOSURES = 5
#: Threads narrower than this (px, full width) show no lens streak.
STREAK_MIN_WIDTH_PX = 15.0

BLUR_KINDS = ("gaussian", "disk", "lorentzian")
ORIENTATIONS = ("vertical", "horizontal")


# --- parameters ---------------------------------------------------------------------------

@dataclass(frozen=True)
class Optics:
    """Camera and illumination of the shadowgraph (pixels and fractions of full scale).

    ``blur_kind``: ``"gaussian"`` (PSF of standard deviation ``blur_sigma_px``),
    ``"disk"`` (defocus, uniform disk of radius 2σ) or ``"lorentzian"`` (a
    Gaussian core with a broad halo: weights 0.7/0.2/0.1 at σ, 3σ, 9σ).
    ``motion_blur_px`` is a box smear of that length along the thread axis
    (``motion_blur_axis="axial"``) or across it (``"across"``). ``full_well``
    is the electron count at full scale that sets the shot noise;
    ``streak_strength`` the relative brightness of the lens streak (0..1);
    ``exposure_fraction`` the exposure as a fraction of the frame interval:
    above 0 each frame averages the scene over the exposure (moving edges
    smear, the last frames before breakup fade), truth at the frame's time.
    """

    blur_sigma_px: float = 1.0
    blur_kind: str = "gaussian"
    motion_blur_px: float = 0.0
    background_level: float = 0.85
    shadow_level: float = 0.08
    uneven_light: float = 0.15
    flicker: float = 0.02
    shot_noise: bool = True
    read_noise: float = 0.004
    dust_specks: int = 3
    jitter_px: float = 0.15
    tilt_deg: float = 0.0
    lens_streak: bool = True
    orientation: str = "vertical"
    bit_depth: int = 8
    motion_blur_axis: str = "axial"
    full_well: float = 20000.0
    streak_strength: float = 0.45
    exposure_fraction: float = 0.0

    def __post_init__(self):
        if self.blur_kind not in BLUR_KINDS:
            raise ValueError(f"blur_kind must be one of {BLUR_KINDS}, not {self.blur_kind!r}")
        if self.orientation not in ORIENTATIONS:
            raise ValueError(f"orientation must be one of {ORIENTATIONS}, not {self.orientation!r}")
        if self.bit_depth not in (8, 12, 16):
            raise ValueError(f"bit_depth must be 8, 12 or 16, not {self.bit_depth!r}")
        if self.motion_blur_axis not in ("axial", "across"):
            raise ValueError("motion_blur_axis must be 'axial' or 'across'")
        if not 0.0 <= self.shadow_level < self.background_level <= 1.0:
            raise ValueError("need 0 <= shadow_level < background_level <= 1")
        if self.blur_sigma_px < 0 or self.motion_blur_px < 0 or self.jitter_px < 0:
            raise ValueError("blur, motion blur and jitter must not be negative")
        if not 0.0 <= self.exposure_fraction <= 1.0:
            raise ValueError("exposure_fraction must lie in [0, 1]")
        if abs(self.tilt_deg) > 20.0:
            raise ValueError("tilt_deg beyond ±20° is not supported")
        if self.full_well <= 0 or self.read_noise < 0 or self.flicker < 0 or self.uneven_light < 0:
            raise ValueError("full_well must be positive; noise, flicker and uneven light non-negative")


@dataclass(frozen=True)
class Scene:
    """The experiment being filmed (SI units).

    ``geometry="plates"``: step stretch between two end plates of
    ``plate_diameter_m``; ``"dripping"``: nozzle (outer diameter
    ``plate_diameter_m``) above a substrate with a spreading sessile drop.
    ``frame_size_px`` is (pixels along the axis, pixels across), i.e.
    (height, width) of a vertical recording; a horizontal one is transposed.
    ``gap_m``: distance plate to plate (nozzle to substrate) during free
    thinning; None fills the frame, leaving about 8 % of it for each end.
    Timeline of the record: ``pre_roll_s`` at rest (plates at the initial
    gap; for dripping, a pendant drop growing towards the substrate), then
    ``stretch_duration_s`` of plate motion (dripping: drainage after contact),
    then free thinning from ``free_thinning_start_s = pre_roll_s +
    stretch_duration_s``. ``sagging`` moves the neck towards the lower end by
    that fraction of the gap. ``n_frames=None`` records until shortly after
    breakup.
    """

    fluid: laws.Fluid
    geometry: str = "plates"
    plate_diameter_m: float = 3e-3
    initial_diameter_m: float = 1e-3
    pixel_size_m: float = 10e-6
    fps_hz: float = 10000.0
    n_frames: int | None = None
    frame_size_px: tuple[int, int] = (256, 512)
    stretch_duration_s: float = 0.0
    pre_roll_s: float = 0.0
    beads: bool = False
    sagging: float = 0.0
    initial_conformation: float = 1.0
    gap_m: float | None = None

    def __post_init__(self):
        if self.geometry not in GEOMETRIES:
            raise ValueError(f"geometry must be one of {GEOMETRIES}, not {self.geometry!r}")
        if min(self.plate_diameter_m, self.initial_diameter_m, self.pixel_size_m, self.fps_hz) <= 0:
            raise ValueError("plate and initial diameters, pixel size and frame rate must be positive")
        if self.initial_diameter_m >= self.plate_diameter_m:
            raise ValueError("initial_diameter_m must be smaller than plate_diameter_m")
        if self.stretch_duration_s < 0 or self.pre_roll_s < 0:
            raise ValueError("stretch_duration_s and pre_roll_s must not be negative")
        if not -0.3 <= self.sagging <= 0.3:
            raise ValueError("sagging must lie within ±0.3 of the gap")
        if self.n_frames is not None and self.n_frames < 1:
            raise ValueError("n_frames must be at least 1")
        n_axis, n_across = self.frame_size_px
        if n_axis < 32 or n_across < 16:
            raise ValueError("frame_size_px is too small (at least 32 along the axis, 16 across)")
        if self.plate_diameter_m / self.pixel_size_m > n_across - 4:
            raise ValueError("the plate (nozzle) does not fit across the frame: "
                             "use a larger pixel size or a wider frame")
        if self.gap_m is not None and self.gap_m / self.pixel_size_m > n_axis - 8:
            raise ValueError("gap_m does not fit along the frame")


def _scene_dict(scene: Scene) -> dict:
    d = dataclasses.asdict(scene)
    d["frame_size_px"] = list(scene.frame_size_px)
    return d


# --- the record's timeline: one state per frame --------------------------------------------

@dataclass(frozen=True)
class _Style:
    """Shape parameters of the liquid profile (px, dimensionless)."""

    cone_slope: tuple[float, float]     # far-field slope of the neck, upper / lower side
    thread_fraction: float              # final half-thread length / shorter side length
    thread_curvature: float             # relative thickening of the thread at its ends
    foot_fraction: tuple[float, float]  # meniscus (foot) length / side length, upper / lower


def _style(fluid: laws.Fluid, initial_diameter_m: float, geometry: str) -> _Style:
    elastic = fluid.polymer_modulus > 0
    if fluid.density > 0:
        oh = laws.ohnesorge_number(initial_diameter_m / 2, surface_tension=fluid.surface_tension,
                                   density=fluid.density, viscosity=fluid.zero_shear_viscosity)
    else:
        oh = math.inf
    inertial = oh < 0.3
    lower_foot = 0.35 if geometry == "dripping" else 0.15
    if elastic:
        return _Style((0.7, 0.7), 0.75, 0.03, (0.15, lower_foot))
    if inertial:  # asymmetric cones of inertial pinch-off, steep on the lower side
        return _Style((0.5, 1.0), 0.0, 0.1, (0.15, lower_foot))
    return _Style((0.3, 0.3), 0.25, 0.1, (0.15, lower_foot))


def _estimate_lifetime_s(fluid: laws.Fluid, d0: float) -> float:
    """Rough time to breakup (s), to size the model integration."""
    r0 = d0 / 2
    t = d0 / (2 * laws.PAPAGEORGIOU_COEFFICIENT * fluid.surface_tension
              / max(fluid.zero_shear_viscosity, 1e-6))
    if fluid.density > 0:
        t = min(t, (r0 / (laws.INERTIO_CAPILLARY_PREFACTOR
                          * np.cbrt(fluid.surface_tension / fluid.density))) ** 1.5)
    if fluid.polymer_modulus > 0:
        t += 30.0 * fluid.relaxation_time
    return float(t)


def _model(scene: Scene):
    """Run the 0-D model long enough; returns (history, number of frames)."""
    fluid, d0 = scene.fluid, scene.initial_diameter_m
    t_ft = scene.pre_roll_s + scene.stretch_duration_s
    if scene.n_frames is not None:
        duration = max(scene.n_frames / scene.fps_hz - t_ft, 2.0 / scene.fps_hz)
        hist = laws.filament_model(fluid, d0, duration=duration,
                                   initial_conformation=scene.initial_conformation)
        return hist, scene.n_frames
    duration = 3.0 * _estimate_lifetime_s(fluid, d0)
    for _ in range(4):
        hist = laws.filament_model(fluid, d0, duration=duration,
                                   initial_conformation=scene.initial_conformation)
        if hist.breakup_time_s is not None:
            break
        duration *= 5.0
    t_end = hist.breakup_time_s if hist.breakup_time_s is not None else hist.time_s[-1]
    n = int(math.floor((t_ft + t_end) * scene.fps_hz)) + 1 + FRAMES_AFTER_BREAKUP
    if n > MAX_AUTO_FRAMES:
        log.warning("record cut at %d frames (breakup would need %d)", MAX_AUTO_FRAMES, n)
        n = MAX_AUTO_FRAMES
    return hist, n


@dataclass(frozen=True)
class _Timeline:
    """Per-frame geometry in the filament's own frame (px; a along the axis, from the gap centre)."""

    time_s: np.ndarray
    phase: np.ndarray
    r_min: np.ndarray          # neck radius (px); 0 after breakup, NaN while pendant
    a_upper: np.ndarray        # axial position of the upper plate face / nozzle tip
    a_lower: np.ndarray        # axial position of the lower plate face / substrate
    a_neck: np.ndarray
    half_thread: np.ndarray    # half length of the uniform thread (px)
    tip_retraction: np.ndarray # distance of each broken half's tip from the pinch point (px)
    bead_radius: np.ndarray    # px, 0: no bead
    lower_end_radius: np.ndarray  # radius where liquid meets the lower end (plate, or drop base)
    pendant_length: np.ndarray # dripping pre-roll: drop length below the nozzle (px)
    pendant_radius: float      # widest radius of the pendant drop (px)
    r_start: float             # largest neck radius of the record (px)
    plate_radius: float
    style: _Style
    breakup_time_s: float | None
    free_thinning_start_s: float


def _timeline(scene: Scene, hist, n_frames: int, *, times=None) -> _Timeline:
    """State of the scene at each frame time (or at ``times``, s) of an ``n_frames`` record."""
    px = scene.pixel_size_m
    n_axis = scene.frame_size_px[0]
    rp = scene.plate_diameter_m / 2 / px
    r0 = scene.initial_diameter_m / 2 / px
    gap = scene.gap_m / px if scene.gap_m is not None else n_axis - 2 * max(6.0, 0.08 * n_axis)
    style = _style(scene.fluid, scene.initial_diameter_m, scene.geometry)
    t = np.arange(n_frames) / scene.fps_hz if times is None else np.asarray(times, float)
    n = t.size
    t_pre, t_ft = scene.pre_roll_s, scene.pre_roll_s + scene.stretch_duration_s
    tau = t - t_ft

    t_b_model = hist.breakup_time_s
    t_b = t_ft + t_b_model if t_b_model is not None else None
    if t_b is not None and t_b >= n_frames / scene.fps_hz:
        t_b = None

    # free thinning: the model, exactly
    d_model = hist.diameter_at(np.clip(tau, 0.0, None))
    r_min = d_model / 2 / px
    phase = np.where(tau >= 0, "free", "rest").astype(object)

    # before free thinning: a fatter bridge (plates) or the drop's approach (dripping)
    r_fat = min(0.85 * rp, 2.0 * r0) if scene.stretch_duration_s > 0 else r0
    gap0 = gap * (r0 / r_fat) ** 2 if scene.geometry == "plates" else gap
    progress = np.clip((t - t_pre) / scene.stretch_duration_s, 0.0, 1.0) \
        if scene.stretch_duration_s > 0 else np.ones_like(t)
    h = gap0 + (gap - gap0) * progress
    pre = tau < 0
    r_min = np.where(pre, r0 * np.sqrt(gap / h), r_min) if scene.geometry == "plates" else \
        np.where(pre, r_fat + (r0 - r_fat) * progress, r_min)
    phase[pre & (t >= t_pre)] = "stretch"
    a_lower = np.full(n, gap / 2)
    a_upper = a_lower - h

    pendant_length = np.zeros(n)
    if scene.geometry == "dripping" and scene.pre_roll_s > 0:
        pend = t < t_pre
        pendant_length = np.where(pend, gap * (0.6 + 0.4 * t / t_pre), 0.0)
        phase[pend] = "pendant"
        r_min = np.where(pend, np.nan, r_min)

    broken = np.zeros(n, bool) if t_b is None else t >= t_b
    phase[broken] = "broken"
    r_min = np.where(broken, 0.0, r_min)

    a_neck = a_upper + (0.5 + scene.sagging) * h
    side = np.minimum(a_neck - a_upper, a_lower - a_neck)
    ratio = np.clip(r_min / r0, 0.0, 1.0)
    ratio = np.where(pre | np.isnan(ratio), 1.0, ratio)
    half_thread = style.thread_fraction * side * (1.0 - ratio)

    # retraction of the halves after breakup: capillary (Culick) or visco-capillary speed
    fluid = scene.fluid
    tip = np.zeros(n)
    if t_b is not None:
        r_ref = max(float(hist.diameter_m[-1]) / 2, px)
        speeds = [2.0 * fluid.surface_tension / max(fluid.zero_shear_viscosity, 1e-9)]
        if fluid.density > 0:
            speeds.append(math.sqrt(2.0 * fluid.surface_tension / (fluid.density * r_ref)))
        speed_px = min(speeds) / px
        tip = np.where(broken, np.minimum(speed_px * (t - t_b) + 1.0, 0.6 * side), 0.0)

    bead = np.zeros(n)
    if scene.beads and fluid.polymer_modulus > 0:
        onset = 0.25 * r0
        with np.errstate(divide="ignore", invalid="ignore"):
            strain = np.log(onset / np.maximum(r_min, 1e-12))
        growth = np.where((tau > 0) & (strain > 0), -np.expm1(-strain), 0.0)
        # the beads stay as they were at breakup
        at_breakup = np.log(onset / max(float(hist.diameter_m[-1]) / 2 / px, 1e-12))
        growth = np.where(broken, -np.expm1(-max(at_breakup, 0.0)), growth)
        bead = np.minimum(2.5 * onset * growth, half_thread / 6.0)
        bead = np.where(bead > np.maximum(r_min, 0) * 1.2, bead, 0.0)

    lower_radius = np.full(n, rp)
    if scene.geometry == "dripping":
        t_contact = t_pre
        lifetime = (t_b if t_b is not None else n_frames / scene.fps_hz) - t_contact
        tau_spread = max(lifetime, 1.0 / scene.fps_hz) * 0.5
        grow = -np.expm1(-np.clip(t - t_contact, 0.0, None) / tau_spread)
        lower_radius = rp * (1.0 + 1.2 * grow)
        lower_radius = np.minimum(lower_radius, 0.4 * scene.frame_size_px[1])

    return _Timeline(time_s=t, phase=phase.astype(str), r_min=r_min, a_upper=a_upper,
                     a_lower=a_lower, a_neck=a_neck, half_thread=half_thread,
                     tip_retraction=tip, bead_radius=bead, lower_end_radius=lower_radius,
                     pendant_length=pendant_length,
                     pendant_radius=min(1.4 * rp, 0.42 * scene.frame_size_px[1]),
                     r_start=max(r_fat, r0),
                     plate_radius=rp, style=style, breakup_time_s=t_b,
                     free_thinning_start_s=t_ft)


# --- the radius profile --------------------------------------------------------------------

def _softplus(x):
    return np.logaddexp(0.0, x)


def _foot(x):
    """e^x − 1 − x: zero with zero slope at 0, steep near the end (the meniscus)."""
    return np.expm1(x) - x


def _side_radius(d, *, r_min, half_thread, slope, transition, curvature):
    """Radius (px) of the neck and thread at distance d ≥ 0 from the neck, without the foot."""
    scale = max(half_thread, transition)
    s2 = (d / scale) ** 2
    thread = r_min * (1.0 + curvature * s2 / (1.0 + s2))
    q = transition * (_softplus((d - half_thread) / transition) - _softplus(-half_thread / transition))
    return np.sqrt(thread ** 2 + (slope * q) ** 2)


def _profile(a, tl: _Timeline, i: int, *, overlap_px: float = 0.0) -> np.ndarray:
    """Liquid radius (px) at axial positions ``a`` (px from the gap centre) in frame ``i``.

    ``overlap_px``: the liquid continues that far into the plates (nozzle, substrate) at the
    radius where it meets them, hidden behind them; a tilted silhouette then joins them
    without a gap.
    """
    a = np.asarray(a, dtype=float)
    r = np.zeros_like(a)
    a_up, a_lo = tl.a_upper[i], tl.a_lower[i]
    rp = tl.plate_radius
    if tl.phase[i] == "pendant":
        # an elongated pendant drop: bulging from the nozzle's radius to its widest, rounded below
        length = tl.pendant_length[i]
        widest = tl.pendant_radius
        d = a - a_up
        shoulder = 0.4 * length
        upper = (d >= 0) & (d < shoulder)
        lower = (d >= shoulder) & (d <= length)
        r[upper] = rp + (widest - rp) * np.sin(0.5 * np.pi * d[upper] / shoulder)
        r[lower] = widest * np.sqrt(np.clip(1.0 - ((d[lower] - shoulder) / (length - shoulder)) ** 2,
                                            0.0, None))
        r[(d < 0) & (d >= -overlap_px)] = rp
        return r
    a_n = tl.a_neck[i]
    r_min = max(float(tl.r_min[i]), 0.0)
    st = tl.style
    tip = tl.tip_retraction[i]
    for sign, end, r_end, slope_nom, foot_frac in (
            (-1.0, a_up, rp, st.cone_slope[0], st.foot_fraction[0]),
            (1.0, a_lo, tl.lower_end_radius[i], st.cone_slope[1], st.foot_fraction[1])):
        d = sign * (a - a_n)
        d_end = sign * (end - a_n)
        mask = (d >= 0) & (d < d_end)       # the face itself belongs to the solid
        if overlap_px > 0:
            r[(d >= d_end) & (d <= d_end + overlap_px)] = r_end
        if not mask.any():
            continue
        dd = d[mask]
        transition = max(2.0, 0.05 * d_end + 2.0 * r_min)
        geometry = dict(half_thread=tl.half_thread[i], transition=transition,
                        curvature=st.thread_curvature)
        # cone slope chosen so the neck never outgrows the end it meets
        q_end = float(_side_radius(np.array([d_end]), r_min=0.0, slope=1.0, **geometry)[0])
        room = min(rp, float(r_end)) - tl.r_start * (1.0 + st.thread_curvature)
        slope = min(slope_nom, 0.75 * max(room, 0.0) / max(q_end, 1e-9))
        core = _side_radius(dd, r_min=r_min, slope=slope, **geometry)
        core_end = float(_side_radius(np.array([d_end]), r_min=r_min, slope=slope, **geometry)[0])
        foot_len = max(foot_frac * d_end, 1.0)
        alpha = max(float(r_end) - core_end, 0.0) / _foot(d_end / foot_len)
        rr = core + alpha * _foot(dd / foot_len)
        if tl.bead_radius[i] > 0:
            rb = tl.bead_radius[i]
            u = (dd - 0.5 * tl.half_thread[i]) / (1.3 * rb)
            bead = rb * np.sqrt(np.clip(1.0 - u ** 2, 0.0, None))
            rr = (rr ** 8 + bead ** 8) ** 0.125
        if tip > 0:
            # a rounded tip, blunter the further it has receded
            rr = rr * np.sqrt(-np.expm1(-np.clip(dd - tip, 0.0, None) / (2.0 + 0.05 * tip)))
        r[mask] = np.maximum(r[mask], np.minimum(rr, float(r_end)))
    return r


# --- coverage: exact 1-D per sub-row ---------------------------------------------------------

class _Coverage:
    """Accumulates signed half-line coverages per sub-row, then integrates once."""

    def __init__(self, height: int, width: int):
        self.height, self.width = height, width
        self.q: list[np.ndarray] = []
        self.w: list[np.ndarray] = []
        self.row: list[np.ndarray] = []

    def add(self, lo, hi, rows, weight):
        """Add weight × coverage of [lo, hi] (x, pixel-centre coordinates) on each sub-row."""
        lo = np.asarray(lo, float)
        self.q += [lo + 0.5, np.maximum(hi, lo) + 0.5]
        weight = np.broadcast_to(np.asarray(weight, float), lo.shape)
        self.w += [weight, -weight]
        self.row += [rows, rows]

    def image(self) -> np.ndarray:
        """Coverage per pixel (float32, height × width)."""
        stride = self.width + 2
        if not self.q:
            return np.zeros((self.height, self.width), np.float32)
        q = np.concatenate(self.q)
        w = np.concatenate(self.w)
        row = np.concatenate(self.row)
        keep = (q < self.width) & (w != 0)
        q, w, row = np.clip(q[keep], 0.0, None), w[keep], row[keep]
        if q.size == 0:
            return np.zeros((self.height, self.width), np.float32)
        base = np.floor(q)
        frac = q - base
        idx = row * stride + base.astype(np.int64)
        flat = np.bincount(np.concatenate([idx, idx + 1]),
                           weights=np.concatenate([w * (1.0 - frac), w * frac]),
                           minlength=self.height * stride)
        dense = flat[: self.height * stride].reshape(self.height, stride)
        # every row's weights sum to zero: nothing left of the first or right of the last entry
        first, last = int(base.min()), min(int(base.max()) + 2, self.width)
        out = np.zeros((self.height, self.width), np.float32)
        if last > first:
            out[:, first:last] = np.cumsum(dense[:, first:last], axis=1, dtype=np.float32)
        return out


def _strip_interval(y, ox, oy, sin_t, cos_t, half_width):
    """x-interval of the strip |c| ≤ half_width on image rows y."""
    centre = ox + (y - oy) * sin_t / cos_t
    return centre - half_width / cos_t, centre + half_width / cos_t


def _halfplane_interval(y, ox, oy, sin_t, cos_t, a_limit, below: bool):
    """x-interval of {a ≥ a_limit} (below=True) or {a ≤ a_limit} on rows y."""
    big = 1e7
    lo = np.full_like(y, -big)
    hi = np.full_like(y, big)
    rest = a_limit - (y - oy) * cos_t       # (x − ox)·sinθ must be ≥ (below) or ≤ this
    if sin_t == 0.0:
        inside = rest <= 0 if below else rest >= 0
        return np.where(inside, lo, big), np.where(inside, hi, big)
    bound = ox + rest / sin_t
    if (sin_t > 0) == below:
        return bound, hi
    return lo, bound


def _intersect(a, b):
    return np.maximum(a[0], b[0]), np.minimum(a[1], b[1])


# --- PSF -----------------------------------------------------------------------------------

def _disk_kernel(radius: float) -> np.ndarray:
    n = int(math.ceil(radius)) + 1
    sub = 8
    g = (np.arange(-n * sub, (n + 1) * sub) + 0.5) / sub - 0.5
    xx, yy = np.meshgrid(g, g)
    inside = (xx ** 2 + yy ** 2 <= radius ** 2).astype(float)
    k = inside.reshape(2 * n + 1, sub, 2 * n + 1, sub).mean(axis=(1, 3))
    return (k / k.sum()).astype(np.float32)


def _line_kernel(length: float, angle_rad: float) -> np.ndarray:
    """Normalised box smear of ``length`` px along direction (sin a, cos a) in (x, y)."""
    n = int(math.ceil(length / 2)) + 1
    k = np.zeros((2 * n + 1, 2 * n + 1))
    samples = np.linspace(-length / 2, length / 2, max(int(length * 16), 2))
    xs = n + samples * math.sin(angle_rad)
    ys = n + samples * math.cos(angle_rad)
    x0, y0 = np.floor(xs).astype(int), np.floor(ys).astype(int)
    fx, fy = xs - x0, ys - y0
    for dx, dy, w in ((0, 0, (1 - fx) * (1 - fy)), (1, 0, fx * (1 - fy)),
                      (0, 1, (1 - fx) * fy), (1, 1, fx * fy)):
        np.add.at(k, (y0 + dy, x0 + dx), w)
    return (k / k.sum()).astype(np.float32)


def _blur(image: np.ndarray, optics: Optics, motion_kernel) -> np.ndarray:
    import cv2

    s = optics.blur_sigma_px
    border = cv2.BORDER_REPLICATE
    if s > 0:
        if optics.blur_kind == "gaussian":
            image = cv2.GaussianBlur(image, (0, 0), s, borderType=border)
        elif optics.blur_kind == "disk":
            image = cv2.filter2D(image, -1, _cached_disk(2.0 * s), borderType=border)
        else:
            image = (0.7 * cv2.GaussianBlur(image, (0, 0), s, borderType=border)
                     + 0.2 * cv2.GaussianBlur(image, (0, 0), 3 * s, borderType=border)
                     + 0.1 * cv2.GaussianBlur(image, (0, 0), 9 * s, borderType=border))
    if motion_kernel is not None:
        image = cv2.filter2D(image, -1, motion_kernel, borderType=border)
    return image


_DISKS: dict[float, np.ndarray] = {}


def _cached_disk(radius: float) -> np.ndarray:
    if radius not in _DISKS:
        _DISKS[radius] = _disk_kernel(radius)
    return _DISKS[radius]


# --- the renderer --------------------------------------------------------------------------

@dataclass(frozen=True)
class _Camera:
    """Fixed per-record image properties drawn from the seed."""

    gain: np.ndarray        # illumination field × dust attenuation (float32, H × W)
    jitter: np.ndarray      # per-frame (dx, dy) px
    flicker: np.ndarray     # per-frame relative backlight factor
    ox: float               # axis cross position (x, px) at the gap centre
    oy: float               # gap centre (y, px)
    noise_seed: np.random.SeedSequence


def _camera(scene: Scene, optics: Optics, n_frames: int, seed: int) -> _Camera:
    height, width = scene.frame_size_px
    ss = np.random.SeedSequence(seed)
    layout_ss, frame_ss, noise_ss = ss.spawn(3)
    rng = np.random.default_rng(layout_ss)
    yy, xx = np.mgrid[0:height, 0:width].astype(np.float64)
    half = 0.5 * max(height, width)
    phi = rng.uniform(0, 2 * np.pi)
    ramp = ((xx - width / 2) * np.cos(phi) + (yy - height / 2) * np.sin(phi)) / half
    cx, cy = width / 2 + rng.uniform(-0.2, 0.2) * width, height / 2 + rng.uniform(-0.2, 0.2) * height
    vignette = 0.5 - ((xx - cx) ** 2 + (yy - cy) ** 2) / (2 * half ** 2)
    gain = 1.0 + optics.uneven_light * (0.6 * ramp + 0.4 * vignette)
    for _ in range(optics.dust_specks):
        x0, y0 = rng.uniform(0, width), rng.uniform(0, height)
        size, depth = rng.uniform(1.0, 3.0), rng.uniform(0.15, 0.45)
        gain *= 1.0 - depth * np.exp(-((xx - x0) ** 2 + (yy - y0) ** 2) / (2 * size ** 2))
    ox = (width - 1) / 2 + rng.uniform(-2.0, 2.0)
    oy = (height - 1) / 2
    frng = np.random.default_rng(frame_ss)
    jitter = frng.normal(0.0, optics.jitter_px, (n_frames, 2)) if optics.jitter_px > 0 \
        else np.zeros((n_frames, 2))
    flicker = 1.0 + optics.flicker * frng.standard_normal(n_frames)
    return _Camera(gain=gain.astype(np.float32), jitter=jitter, flicker=flicker, ox=ox, oy=oy,
                   noise_seed=noise_ss)


class _Renderer:
    def __init__(self, scene: Scene, optics: Optics, tl: _Timeline, cam: _Camera, hist):
        self.scene, self.optics, self.cam = scene, optics, cam
        # the scene's states drawn into each frame: one, or several spread over the exposure
        self.n_states = SUB_EXPOSURES if optics.exposure_fraction > 0 else 1
        if self.n_states > 1:
            n = tl.time_s.size
            spread = ((np.arange(self.n_states) + 0.5) / self.n_states - 0.5) * optics.exposure_fraction
            times = (np.arange(n)[:, None] + spread[None, :]).ravel() / scene.fps_hz
            tl = _timeline(scene, hist, n, times=times)
        self.tl = tl
        self.height, self.width = scene.frame_size_px
        theta = math.radians(optics.tilt_deg)
        self.sin_t, self.cos_t = math.sin(theta), math.cos(theta)
        rows = np.repeat(np.arange(self.height), SUB_ROWS)
        offsets = (np.arange(SUB_ROWS) + 0.5) / SUB_ROWS - 0.5
        self.rows = rows
        self.y_sub = rows + np.tile(offsets, self.height)
        self.motion_kernel = None
        if optics.motion_blur_px > 0:
            angle = theta if optics.motion_blur_axis == "axial" else theta + math.pi / 2
            self.motion_kernel = _line_kernel(optics.motion_blur_px, angle)
        from scipy.special import ndtri

        self.normal_lut = ndtri((np.arange(65536) + 0.5) / 65536).astype(np.float32)
        self.noise_rng = np.random.default_rng(cam.noise_seed)
        self.max_value = float(2 ** optics.bit_depth - 1)
        self.gain_background = cam.gain * np.float32(optics.background_level)
        self.gain_contrast = cam.gain * np.float32(optics.background_level - optics.shadow_level)
        self.dtype = np.uint8 if optics.bit_depth == 8 else np.uint16

    def _liquid_edges(self, tl, i, ox, oy):
        """x of the left and right silhouette edge on every sub-row, for state ``i``."""
        y = self.y_sub
        if self.sin_t == 0.0:
            r = _profile((y - oy) / self.cos_t, tl, i)
            return ox - r, ox + r, r
        overlap = max(tl.plate_radius, tl.lower_end_radius[i]) * abs(self.sin_t / self.cos_t) + 2.0
        a_lo = tl.a_upper[i] - overlap - 1.0
        a_hi = tl.a_lower[i] + overlap + 1.0
        a = np.linspace(a_lo, a_hi, int((a_hi - a_lo) * SUB_ROWS) + 2)
        r = _profile(a, tl, i, overlap_px=overlap)
        s, c = self.sin_t, self.cos_t
        xl, yl = ox + a * s - r * c, oy + a * c + r * s
        xr, yr = ox + a * s + r * c, oy + a * c - r * s
        # the edge curves as functions of y (first crossing where a steep edge folds over)
        left = np.interp(y, np.maximum.accumulate(yl), xl, left=np.nan, right=np.nan)
        right = np.interp(y, np.maximum.accumulate(yr), xr, left=np.nan, right=np.nan)
        empty = np.isnan(left) | np.isnan(right)
        left, right = np.where(empty, 0.0, left), np.where(empty, 0.0, right)
        return left, right, 0.5 * (right - left) * c

    def coverage(self, i: int) -> np.ndarray:
        """Opaque fraction of every pixel in frame ``i`` (lens streak counted negative)."""
        cam = self.cam
        ox, oy = cam.ox + cam.jitter[i, 0], cam.oy + cam.jitter[i, 1]
        cov = _Coverage(self.height, self.width)
        k = self.n_states
        for j in range(i * k, (i + 1) * k):
            self._draw(cov, j, ox, oy, 1.0 / (SUB_ROWS * k))
        return cov.image()

    def _draw(self, cov: _Coverage, i: int, ox: float, oy: float, weight: float) -> None:
        tl = self.tl
        y, s, c = self.y_sub, self.sin_t, self.cos_t
        rows = self.rows
        solids = []
        strip = _strip_interval(y, ox, oy, s, c, tl.plate_radius)
        solids.append(_intersect(strip, _halfplane_interval(y, ox, oy, s, c, tl.a_upper[i], False)))
        if self.scene.geometry == "plates":
            solids.append(_intersect(strip, _halfplane_interval(y, ox, oy, s, c, tl.a_lower[i], True)))
        else:
            solids.append(_halfplane_interval(y, ox, oy, s, c, tl.a_lower[i], True))
        left, right, radius = self._liquid_edges(tl, i, ox, oy)
        liquid = (left, right)
        cov.add(*liquid, rows, weight)
        touching = np.zeros(y.shape, bool)
        for solid in solids:
            cov.add(*solid, rows, weight)
            if s != 0.0:    # untilted, the liquid ends where the solids begin: no overlap
                both = _intersect(liquid, solid)
                cov.add(*both, rows, -weight)
                touching |= both[1] > both[0]
        if self.optics.lens_streak and self.optics.streak_strength > 0:
            rmin = STREAK_MIN_WIDTH_PX / 2
            x = np.clip((radius - rmin) / rmin, 0.0, 1.0)
            amp = self.optics.streak_strength * x * x * (3 - 2 * x)
            # on the axis, narrow, and clear of both edges by at least 3 px
            mid = ox + (y - oy) * s / c
            half = np.clip(0.04 * (right - left), 0.75, 3.0)
            amp[touching | (mid - half < left + 3.0) | (mid + half > right - 3.0)] = 0.0
            # ... and at least 4 px from where the liquid ends along the axis (tips, plates)
            amp = minimum_filter1d(amp, 8 * SUB_ROWS + 1, mode="constant", cval=0.0)
            if amp.any():
                cov.add(mid - half, mid + half, rows, -weight * amp)

    def frame(self, i: int) -> np.ndarray:
        o = self.optics
        blurred = _blur(self.coverage(i), o, self.motion_kernel)
        # light = flicker × gain × (background − (background − shadow) × coverage), in place
        light = np.multiply(blurred, self.gain_contrast, out=blurred)
        np.subtract(self.gain_background, light, out=light)
        light *= np.float32(self.cam.flicker[i])
        if o.shot_noise or o.read_noise > 0:
            if o.shot_noise:
                spread = light * np.float32(1.0 / o.full_well)
                spread += np.float32(o.read_noise ** 2)
                np.maximum(spread, 0.0, out=spread)
                np.sqrt(spread, out=spread)
            else:
                spread = np.float32(o.read_noise)
            u = np.frombuffer(self.noise_rng.bytes(2 * light.size), np.uint16)
            noise = self.normal_lut[u].reshape(light.shape)
            noise *= spread
            light += noise
        light *= np.float32(self.max_value)
        light += np.float32(0.5)
        np.clip(light, 0.0, self.max_value, out=light)
        out = light.astype(self.dtype)
        if o.orientation == "horizontal":
            out = np.ascontiguousarray(out.T)
        return out


def _truth(scene: Scene, optics: Optics, tl: _Timeline, cam: _Camera, seed: int) -> Truth:
    n = tl.time_s.size
    px = scene.pixel_size_m
    s, c = math.sin(math.radians(optics.tilt_deg)), math.cos(math.radians(optics.tilt_deg))
    diameter_px = np.where(np.isin(tl.phase, ("broken", "pendant")), np.nan, 2.0 * tl.r_min)
    ox = cam.ox + cam.jitter[:, 0]
    oy = cam.oy + cam.jitter[:, 1]
    neck_axial = oy + tl.a_neck * c
    neck_cross = ox + tl.a_neck * s
    no_neck = np.isnan(diameter_px)
    neck_axial = np.where(no_neck, np.nan, neck_axial)
    neck_cross = np.where(no_neck, np.nan, neck_cross)
    fluid = scene.fluid
    height, width = scene.frame_size_px
    shape = (height, width) if optics.orientation == "vertical" else (width, height)
    return Truth(
        frame=np.arange(n), time_s=tl.time_s, diameter_m=diameter_px * px, diameter_px=diameter_px,
        neck_position_px=neck_axial, neck_cross_px=neck_cross,
        axis_angle_deg=np.full(n, optics.tilt_deg),
        upper_end_px=oy + tl.a_upper * c, lower_end_px=oy + tl.a_lower * c, phase=tl.phase,
        fps_hz=float(scene.fps_hz), pixel_size_m=float(px),
        plate_diameter_m=float(scene.plate_diameter_m),
        initial_diameter_m=float(scene.initial_diameter_m),
        free_thinning_start_s=float(tl.free_thinning_start_s),
        breakup_time_s=tl.breakup_time_s,
        relaxation_time_s=float(fluid.relaxation_time) if fluid.polymer_modulus > 0 else None,
        fluid={**dataclasses.asdict(fluid),
               "zero_shear_viscosity": fluid.zero_shear_viscosity,
               "terminal_extensional_viscosity": fluid.terminal_extensional_viscosity},
        geometry=scene.geometry, orientation=optics.orientation, frame_shape=shape,
        bit_depth=optics.bit_depth, dtype="uint8" if optics.bit_depth == 8 else "uint16",
        optics=dataclasses.asdict(optics), scene=_scene_dict(scene), seed=int(seed),
    )


def render_recording(scene: Scene, optics: Optics, *, seed: int) -> tuple[Iterator[np.ndarray], Truth]:
    """Frames (a generator of 2-D uint8/uint16 arrays, streamed) and the truth of a recording.

    Deterministic: the same arguments give identical frames.
    """
    hist, n = _model(scene)
    tl = _timeline(scene, hist, n)
    cam = _camera(scene, optics, n, seed)
    truth = _truth(scene, optics, tl, cam, seed)

    def frames():
        renderer = _Renderer(scene, optics, tl, cam, hist)
        for i in range(n):
            yield renderer.frame(i)

    return frames(), truth


def write_recording(scene: Scene, optics: Optics, path, *, fmt: str, seed: int,
                    quality: int = 90, playback_fps: float = 25.0) -> Truth:
    """Render and write a recording in constant memory; the truth goes beside it.

    ``fmt``: ``"avi-raw"`` (uncompressed 8-bit grey), ``"avi-mjpg"`` (lossy,
    JPEG ``quality`` 0–100, 8-bit), ``"mkv-ffv1"`` / ``"mp4-ffv1"`` (lossless,
    8 or 16-bit), ``"tiff"`` (one multi-page stack), ``"png-folder"``
    (``frame_0001.png`` …, 1-based, in a folder created at ``path``). Video
    containers carry ``playback_fps`` (≤ 60/s), never the true frame rate.
    The truth is written to ``<file>.truth.json`` or ``<folder>/truth.json``.
    """
    check_format(fmt, optics.bit_depth, playback_fps)
    path = Path(path)
    frames, truth = render_recording(scene, optics, seed=seed)
    write_frames(frames, path, fmt=fmt, n_frames=truth.n_frames, frame_shape=truth.frame_shape,
                 bit_depth=optics.bit_depth, quality=quality, playback_fps=playback_fps)
    write_truth(truth, path / "truth.json" if fmt == "png-folder" else truth_path(path))
    return truth


# --- presets -------------------------------------------------------------------------------

def dilute_polymer_plates(**overrides) -> Scene:
    """Dilute aqueous polymer (λ = 5 ms) between 3 mm plates, 10 kHz, 12 µm/px, with a step stretch."""
    fluid = laws.Fluid(surface_tension=0.062, solvent_viscosity=1.0e-3, density=1000.0,
                       polymer_modulus=2.0, relaxation_time=5e-3, extensibility=2.0e4)
    base = dict(fluid=fluid, geometry="plates", plate_diameter_m=3e-3, initial_diameter_m=0.8e-3,
                pixel_size_m=12e-6, fps_hz=10000.0, frame_size_px=(400, 320),
                stretch_duration_s=5e-3, pre_roll_s=1e-3)
    return Scene(**{**base, **overrides})


def boger_fluid_plates(**overrides) -> Scene:
    """Viscous Boger fluid (λ = 2 s, η_s = 10 Pa·s, σ = 36 mN/m) between 6 mm plates, 20 frames/s."""
    fluid = laws.Fluid(surface_tension=0.036, solvent_viscosity=10.0, density=1030.0,
                       polymer_modulus=5.0, relaxation_time=2.0)
    base = dict(fluid=fluid, geometry="plates", plate_diameter_m=6e-3, initial_diameter_m=2.0e-3,
                pixel_size_m=20e-6, fps_hz=20.0, frame_size_px=(400, 360))
    return Scene(**{**base, **overrides})


def newtonian_viscous_plates(**overrides) -> Scene:
    """Glycerol (1 Pa·s, σ = 63 mN/m) between 4 mm plates: visco-capillary thinning, 2 kHz."""
    fluid = laws.Fluid(surface_tension=0.063, solvent_viscosity=1.0, density=1260.0)
    base = dict(fluid=fluid, geometry="plates", plate_diameter_m=4e-3, initial_diameter_m=1.2e-3,
                pixel_size_m=15e-6, fps_hz=2000.0, frame_size_px=(400, 320))
    return Scene(**{**base, **overrides})


def water_like_dripping(**overrides) -> Scene:
    """Water from a 1.2 mm nozzle onto a substrate: inertio-capillary pinch-off, 50 kHz, 5 µm/px."""
    fluid = laws.Fluid(surface_tension=0.072, solvent_viscosity=1.0e-3, density=998.0)
    base = dict(fluid=fluid, geometry="dripping", plate_diameter_m=1.2e-3, initial_diameter_m=0.6e-3,
                pixel_size_m=5e-6, fps_hz=50000.0, frame_size_px=(512, 384))
    return Scene(**{**base, **overrides})


def polymer_dripping(**overrides) -> Scene:
    """Dilute polymer (λ = 0.5 ms) dripping from a 1 mm nozzle onto a substrate, 25 kHz, 5 µm/px."""
    fluid = laws.Fluid(surface_tension=0.060, solvent_viscosity=1.0e-3, density=1000.0,
                       polymer_modulus=1.0, relaxation_time=0.5e-3, extensibility=1.0e4)
    base = dict(fluid=fluid, geometry="dripping", plate_diameter_m=1.0e-3, initial_diameter_m=0.5e-3,
                pixel_size_m=5e-6, fps_hz=25000.0, frame_size_px=(512, 320))
    return Scene(**{**base, **overrides})


def standard_scenes() -> dict[str, Scene]:
    """The named presets, by name."""
    return {f.__name__: f() for f in (dilute_polymer_plates, boger_fluid_plates,
                                      newtonian_viscous_plates, water_like_dripping,
                                      polymer_dripping)}


def benchmark_scene(n_frames: int = 20000) -> Scene:
    """A long, slowly thinning elastic filament in 256 × 512 frames, breaking near the end."""
    fluid = laws.Fluid(surface_tension=0.036, solvent_viscosity=5.0, density=1030.0,
                       polymer_modulus=3.0, relaxation_time=1.0, extensibility=300.0)
    scene = Scene(fluid=fluid, geometry="plates", plate_diameter_m=4e-3, initial_diameter_m=1.5e-3,
                  pixel_size_m=15e-6, fps_hz=1000.0, n_frames=None, frame_size_px=(256, 512))
    hist, _ = _model(scene)
    lifetime = hist.breakup_time_s if hist.breakup_time_s is not None else hist.time_s[-1]
    fps = 0.97 * n_frames / lifetime
    return dataclasses.replace(scene, fps_hz=float(fps), n_frames=int(n_frames))


def write_benchmark_recording(path, n_frames: int = 20000, seed: int = 0,
                              orientation: str = "vertical") -> Truth:
    """The benchmark file: an 8-bit MJPG AVI of 512 × 256 frames (width × height), the filament
    across the short side (``"vertical"``) or, turned, along the long one (``"horizontal"``)."""
    return write_recording(benchmark_scene(n_frames), Optics(orientation=orientation), path,
                           fmt="avi-mjpg", seed=seed)


# --- random cases for probes and coverage tests ----------------------------------------------

#: The artefacts the "artefacts" family draws one or two of.
ARTEFACTS = ("dust", "streak", "motion-across", "motion-along", "halo", "clipping")
#: Largest η_p/η_s drawn: beyond about 100 the 0-D model stalls near breakup (too stiff).
MAX_POLYMER_TO_SOLVENT = 50.0


def _log_uniform(rng, lo, hi):
    return float(math.exp(rng.uniform(math.log(lo), math.log(hi))))


def _draw_fluid(rng, kind: str, d0: float):
    """A fluid of ``kind`` ("elastic", "viscous", "inertial") for initial diameter d0, or None."""
    sigma, rho = rng.uniform(0.020, 0.075), rng.uniform(800.0, 1300.0)
    if kind == "elastic":
        eta, lam = _log_uniform(rng, 1e-3, 10.0), _log_uniform(rng, 3e-4, 1.0)
        g = _log_uniform(rng, 0.5, 100.0)
        if (g * lam > MAX_POLYMER_TO_SOLVENT * eta or g * d0 / (4.0 * sigma) > 0.5
                or laws.elasto_capillary_number(lam, d0 / 2, surface_tension=sigma,
                                                viscosity=eta + g * lam) < 1.0):
            return None
        ext = _log_uniform(rng, 1e3, 1e5) if rng.random() < 0.6 else None
        return laws.Fluid(surface_tension=sigma, solvent_viscosity=eta, density=rho,
                          polymer_modulus=g, relaxation_time=lam, extensibility=ext)
    eta = _log_uniform(rng, 0.05, 10.0) if kind == "viscous" else _log_uniform(rng, 1e-3, 0.02)
    oh = laws.ohnesorge_number(d0 / 2, surface_tension=sigma, density=rho, viscosity=eta)
    if (kind == "viscous" and oh < 0.5) or (kind == "inertial" and oh > 0.2):
        return None
    return laws.Fluid(surface_tension=sigma, solvent_viscosity=eta, density=rho)


def _draw_scene(rng, family: str):
    """A scene of ``family`` with its frame rate set from the model, or None (draw again)."""
    from thinning.raysynth import elastic_window_s

    still = family == "newtonian-still"
    kind = str(rng.choice(["viscous", "inertial"])) if still or rng.random() >= 0.6 else "elastic"
    dripping = not still and rng.random() < (0.2 if family == "refraction" else 0.3)
    n_axis, n_across = int(rng.integers(160, 513)), int(rng.integers(128, 385))
    px = _log_uniform(rng, 2e-6, 20e-6)
    plate = rng.uniform(0.3, 0.75) * n_across * px
    gap = rng.uniform(0.55, 0.84) * n_axis * px
    if not 0.5e-3 <= plate <= 6e-3 or not 0.8 <= gap / (plate / 2) <= 8.0:
        return None
    wide = family == "refraction"
    d0 = plate * (rng.uniform(0.3, 0.6) if dripping else rng.uniform(0.3, 0.45) if wide
                  else rng.uniform(0.15, 0.4))
    if wide and d0 / px < 80:
        return None
    fluid = _draw_fluid(rng, kind, d0)
    if fluid is None:
        return None
    base = Scene(fluid=fluid, geometry="dripping" if dripping else "plates", plate_diameter_m=plate,
                 initial_diameter_m=d0, gap_m=gap, pixel_size_m=px, fps_hz=1000.0,
                 frame_size_px=(n_axis, n_across),
                 sagging=rng.uniform(-0.15, 0.15) if rng.random() < 0.4 else 0.0,
                 beads=kind == "elastic" and rng.random() < 0.15)
    hist, _ = _model(base)
    life = hist.breakup_time_s
    if life is None:
        return None
    changes = {}
    if not still and (dripping or rng.random() < 0.6):
        changes["stretch_duration_s"] = rng.uniform(0.05, 0.2) * life
        if dripping or rng.random() < 0.5:
            changes["pre_roll_s"] = rng.uniform(0.02, 0.08) * life
    t_end = changes.get("stretch_duration_s", 0.0) + changes.get("pre_roll_s", 0.0) + life
    fps = (int(rng.integers(120, 500)) - FRAMES_AFTER_BREAKUP) / t_end
    if kind == "elastic":
        window = elastic_window_s(hist, fluid.relaxation_time)
        if window <= 0.0:
            return None
        fps = max(fps, 16.0 / window)
    if math.floor(t_end * fps) + 1 + FRAMES_AFTER_BREAKUP > 600:
        return None
    return dataclasses.replace(base, fps_hz=float(fps), **changes)


def _draw_optics(rng, family: str) -> Optics:
    background = rng.uniform(0.6, 0.9)
    o = dict(blur_sigma_px=rng.uniform(0.5, 2.0), blur_kind=str(rng.choice(["gaussian", "disk"])),
             background_level=background, shadow_level=rng.uniform(0.02, 0.15),
             uneven_light=rng.uniform(0.0, 0.3), flicker=rng.uniform(0.0, 0.04),
             read_noise=rng.uniform(0.001, 0.008), full_well=_log_uniform(rng, 5e3, 4e4),
             dust_specks=int(rng.integers(0, 4)), jitter_px=rng.uniform(0.0, 0.3),
             tilt_deg=rng.uniform(-3.0, 3.0) if rng.random() < 0.5 else 0.0,
             streak_strength=rng.uniform(0.0, 0.45), orientation=str(rng.choice(ORIENTATIONS)),
             bit_depth=int(rng.choice([8, 8, 8, 12, 16])))
    if family == "refraction":
        o["streak_strength"] = rng.uniform(0.6, 0.95)
    if family == "artefacts":
        for name in rng.choice(ARTEFACTS, size=int(rng.integers(1, 3)), replace=False):
            if name == "dust":
                o["dust_specks"] = int(rng.integers(10, 41))
            elif name == "streak":
                o["streak_strength"] = rng.uniform(0.7, 0.95)
            elif name == "motion-across":
                o.update(motion_blur_px=rng.uniform(1.0, 3.0), motion_blur_axis="across")
            elif name == "motion-along":
                o.update(motion_blur_px=rng.uniform(1.0, 4.0), motion_blur_axis="axial")
            elif name == "halo":
                o["blur_kind"] = "lorentzian"
            else:                       # the backlight at or just under full scale: noise clips
                o["background_level"] = rng.uniform(0.93, 1.0)
    return Optics(**o)


def random_case(seed: int, *, family: str = "regular") -> tuple[Scene, Optics]:
    """A (scene, optics) drawn across this renderer's ranges for ``family`` (deterministic per seed).

    The family names are :data:`thinning.raysynth.FAMILIES`. Common ranges:
    pixel 2–20 µm; plate / nozzle 0.5–6 mm (30–75 % of the frame's width);
    frames ≤ 512 × 512; σ 20–75 mN/m; ρ 800–1300 kg/m³; records of about
    110–600 frames ending 10 frames after breakup, elastic windows ≥ 16 frames;
    Gaussian or disk blur σ 0.5–2 px; shot and read noise; 8/12/16 bits.

    - ``"regular"``: elastic (60 %; η_p/η_s ≤ 50; beads in 15 %) and Newtonian (viscous
      Oh > 0.5, inertial Oh < 0.2) liquids, plates (step stretch or still) and
      dripping, both orientations, tilt (±3° in half), sagging, uneven light,
      flicker, jitter, a weak lens streak;
    - ``"artefacts"``: as regular, plus one or two of :data:`ARTEFACTS`;
    - ``"refraction"``: wide threads (D0 ≥ 80 px) with a strong lens streak;
    - ``"newtonian-still"``: viscous or inertial Newtonian liquids between still
      plates, free thinning from frame 0.
    """
    from thinning.raysynth import FAMILIES

    if family not in FAMILIES:
        raise ValueError(f"family must be one of {FAMILIES}, not {family!r}")
    rng = np.random.default_rng([int(seed), FAMILIES.index(family), 7])
    for _ in range(500):
        scene = _draw_scene(rng, family)
        if scene is not None:
            return scene, _draw_optics(rng, family)
    raise RuntimeError(f"no {family} case drawn for seed {seed}")
