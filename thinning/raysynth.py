"""Ray-traced synthetic recordings of a refracting liquid thread, with their truth.

A second renderer, physically different from :mod:`thinning.synth`, so that
accuracy claims never rest on one way of drawing a filament. The liquid is not
an absorber: it is a transparent axisymmetric body of refractive index n whose
image is found by tracing light through it (docs/physics.md §8.1).

Geometry. Per frame the liquid is a radius profile R(z) along the filament axis
whose minimum is exactly the 0-D model's D(t)/2
(:func:`thinning.laws.filament_model`) at a known axial position: a core
(elastic: a long, nearly uniform thread; viscous Newtonian: a parabolic
hourglass; inertial Newtonian: an asymmetric cone-like neck) joined by a 4-norm
to spherical-cap drops on the end faces, whose bases are chosen so that the
liquid meets each plate's rim at its radius. Plates are opaque discs seen
edge-on (rectangles in the object plane, their faces reaching out of it and
shading tilted rays, :func:`face_transmission`); dripping has an opaque nozzle
above (shading likewise) and an opaque substrate below, taken as a thin sheet
in the object plane, with a spreading sessile drop. After breakup the core is
cut at two tips that recede from the pinch point. Timeline: ``pre_roll_s`` at
rest (dripping: a pendant drop growing towards the substrate),
``stretch_duration_s`` of exponential plate separation (dripping: drainage
after contact), free thinning from ``free_thinning_start_s`` (the model's t =
0), breakup, retracting halves.

Optics. An object-side telecentric lens of numerical aperture NA images the
plane through the filament axis (y = 0; the optical axis is y, the camera at
+y). For an image point (x, 0, z) the rays of the lens's acceptance cone are
straight lines through that point, uniformly distributed in direction cosines
(|(d_x, d_z)| < NA). Each is traced backwards: to where its extension meets the
liquid's camera-side surface (the last intersection along the ray), into the
liquid by 3-D Snell's law at the local cone surface (radius R, slope dR/dz, the
local-cone approximation), to the far surface, out again (total internal
reflection: no light), to the backlight, whose radiance is uniform within a
half-angle β about the optical axis (collimated ≈ 0.2–1°, diffuse up to ~40°;
Lambertian within its extent, with a soft rim). The pixel's light is the pupil
mean of radiance × Fresnel transmission (unpolarised light, exact Fresnel
equations, the polarisation followed through both interfaces) × exp(−κ × path),
relative to the backlight seen directly. Only directly transmitted light (one
passage, no internal or external reflections) is counted. Because ray optics
scales with R, this is tabulated once per recording against b/R, |dR/dz| and κR
(:func:`transmission_table`); a narrow backlight is sampled where it is seen
(the pupil region mapped onto it, found by Newton's method), a wide one over
the whole pupil. Frames are then drawn from the table's running integral, so
each sub-pixel column gets its exact area average across the axis, on
``supersample`` sub-rows per pixel row.

Image formation. Diffraction-limited Airy PSF of the NA at the wavelength,
convolved with the geometric defocus disk (radius |defocus| tan α), applied to
the supersampled image together with the box integration to pixels (both at
once, evaluated at pixel resolution by sub-pixel phase); optional motion blur
(sub-exposures averaged). Optional partially coherent light: the image's
amplitude is propagated by the paraxial Fresnel transfer function over
``fringe_distance_m`` and its intensity smoothed by the backlight's angular
size (the coherence envelope), giving a bright fringe outside each edge.
Sensor: veiling glare, uneven and flickering backlight, a drifting backlight
texture and dust blob, rolling read-out banding under a PWM lamp, shot and read
noise, quantisation to 8/12/16 bits (12-bit in uint16, maximum 4095), stuck
pixels. Every artefact is off by default.

Conventions: SI units in names; pixel coordinates have their origin at the
centre of the top-left pixel; a vertical recording has the axis along image
rows (z = row), a horizontal one is the vertical one transposed. The truth
(:class:`thinning.synth_io.Truth`, same schema as :mod:`thinning.synth`) is the
geometric minimum neck diameter perpendicular to the axis.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterator
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import numpy as np

from thinning import laws
from thinning.synth_io import FORMATS, Truth, check_format, truth_path, write_frames, write_truth
from thinning.units import GEOMETRIES

__all__ = ["RayOptics", "RayScene", "RayRenderer", "TransmissionTable", "render_recording",
           "write_recording", "random_case", "transmission_table", "trace_cone", "refract",
           "fresnel_reflectance", "airy_psf", "psf_kernel", "face_transmission", "elastic_window_s",
           "FAMILIES", "ARTEFACTS", "FORMATS", "RENDERER"]

#: Name of this renderer in the truth's ``optics`` record.
RENDERER = "raysynth"
ORIENTATIONS = ("vertical", "horizontal")
FAMILIES = ("regular", "artefacts", "refraction", "newtonian-still")
#: Frames kept after breakup when the record length is chosen automatically.
FRAMES_AFTER_BREAKUP = 10
#: Largest record generated automatically (frames).
MAX_AUTO_FRAMES = 20_000
#: Largest |dR/dz| tabulated; steeper surfaces use this row (they deflect all light away anyway).
SLOPE_MAX = 2.5
#: Relative width of the backlight's soft rim (fraction of sin β).
BACKLIGHT_RIM = 0.2
#: The Airy PSF is kept out to this many first-zero radii (beyond: ≈ 2/(π·3.83·6) ≈ 3 % of the
#: energy, dropped; the kept part is normalised to 1).
AIRY_SUPPORT_ZEROS = 6.0
#: Largest radius (px) to which the Airy pattern is kept (a defocus disk adds its own radius).
PSF_MAX_RADIUS_PX = 16.0
#: Exponent of the norm that joins the neck core to the end drops.
JOIN_NORM = 4.0
#: First zero of J1 (Airy first dark ring at v = 2π NA r / λ = this).
J1_FIRST_ZERO = 3.831705970207512

_GOLDEN_ANGLE = math.pi * (3.0 - math.sqrt(5.0))


# --- ray optics ------------------------------------------------------------------------------

def refract(direction, normal, n_from, n_to):
    """Refract unit ``direction`` vectors at unit ``normal`` vectors (3-D Snell's law).

    ``normal`` points to the side the light comes from (direction · normal < 0).
    Returns (refracted unit direction, cos θ_i, cos θ_t, total internal reflection
    mask); where totally reflected the direction is meaningless.
    """
    direction = np.asarray(direction, float)
    normal = np.asarray(normal, float)
    eta = n_from / n_to
    cos_i = -np.sum(direction * normal, axis=-1)
    sin2_t = eta * eta * (1.0 - cos_i * cos_i)
    tir = sin2_t > 1.0
    cos_t = np.sqrt(np.clip(1.0 - sin2_t, 0.0, None))
    out = eta * direction + (eta * cos_i - cos_t)[..., None] * normal
    return out, cos_i, cos_t, tir


def fresnel_reflectance(cos_i, n_from, n_to):
    """Energy reflectances (R_s, R_p) of a plane interface at incidence cosine ``cos_i``.

    Exact Fresnel equations for real indices; 1 under total internal reflection.
    The transmittances are 1 − R (and are the same both ways through an interface).
    """
    cos_i = np.asarray(cos_i, float)
    eta = n_from / n_to
    sin2_t = eta * eta * (1.0 - cos_i * cos_i)
    tir = sin2_t >= 1.0
    cos_t = np.sqrt(np.clip(1.0 - sin2_t, 0.0, None))
    with np.errstate(invalid="ignore", divide="ignore"):
        rs = ((n_from * cos_i - n_to * cos_t) / (n_from * cos_i + n_to * cos_t)) ** 2
        rp = ((n_from * cos_t - n_to * cos_i) / (n_from * cos_t + n_to * cos_i)) ** 2
    rs = np.where(tir, 1.0, np.nan_to_num(rs, nan=1.0))
    rp = np.where(tir, 1.0, np.nan_to_num(rp, nan=1.0))
    return rs, rp


@dataclass(frozen=True)
class RayPath:
    """Result of :func:`trace_cone` per ray (arrays of the rays' shape).

    ``exit_direction``: unit direction (…, 3) of the backward ray after the liquid,
    towards the backlight (−d for a ray that missed); ``transmittance``: Fresnel
    energy transmission of unpolarised light through both interfaces (1 for a miss);
    ``path_length``: chord inside the liquid in units of R; ``hit``: the ray met the
    liquid; ``lost``: it carries no backlight (total internal reflection, or outside
    the local cone's range of validity).
    """

    exit_direction: np.ndarray
    transmittance: np.ndarray
    path_length: np.ndarray
    hit: np.ndarray
    lost: np.ndarray


def _unit(x, y, z):
    norm = np.sqrt(x * x + y * y + z * z)
    return x / norm, y / norm, z / norm


def _refract_components(ix, iy, iz, nx, ny, nz, eta):
    """:func:`refract` on component arrays: (tx, ty, tz, cos θ_i, cos θ_t, TIR mask)."""
    cos_i = -(ix * nx + iy * ny + iz * nz)
    sin2_t = eta * eta * (1.0 - cos_i * cos_i)
    tir = sin2_t > 1.0
    cos_t = np.sqrt(np.clip(1.0 - sin2_t, 0.0, None))
    f = eta * cos_i - cos_t
    return eta * ix + f * nx, eta * iy + f * ny, eta * iz + f * nz, cos_i, cos_t, tir


def _s_vector(kx, ky, kz, nx, ny, nz):
    """Unit s-polarisation vector k × n (k × ẑ, or x̂, at normal incidence)."""
    sx, sy, sz = ky * nz - kz * ny, kz * nx - kx * nz, kx * ny - ky * nx
    norm = np.sqrt(sx * sx + sy * sy + sz * sz)
    degenerate = norm < 1e-12
    sx, sy, sz = np.where(degenerate, ky, sx), np.where(degenerate, -kx, sy), np.where(degenerate, 0.0, sz)
    norm = np.sqrt(sx * sx + sy * sy + sz * sz)
    sx = np.where(norm < 1e-12, 1.0, sx)
    norm = np.where(norm < 1e-12, 1.0, norm)
    return sx / norm, sy / norm, sz / norm


def _trace(q, s, dx, dy, dz, n, *, fresnel=True):
    """Backward trace on component arrays (see :func:`trace_cone`): exit direction components,
    transmittance (1 where hit and not lost when ``fresnel`` is False), path length, hit and
    lost masks."""
    with np.errstate(invalid="ignore", divide="ignore"):
        a = dx * dx + dy * dy - s * s * dz * dz
        b = 2.0 * (q * dx - s * dz)
        disc = b * b - 4.0 * a * (q * q - 1.0)
        hit = (disc >= 0.0) & (a > 0.0)
        t1 = (-b + np.sqrt(np.where(hit, disc, 0.0))) / np.where(hit, 2.0 * a, 1.0)
        x1, y1, z1 = q + t1 * dx, t1 * dy, t1 * dz
        rho1 = 1.0 + s * z1
        n1x, n1y, n1z = _unit(x1, y1, -s * rho1)
        # into the liquid (backwards: from air, at the camera-side surface)
        wx, wy, wz, cos_a1, _, _ = _refract_components(-dx, -dy, -dz, n1x, n1y, n1z, 1.0 / n)
        # the far surface: the other root along w from p1
        a2 = wx * wx + wy * wy - s * s * wz * wz
        b2 = 2.0 * (x1 * wx + y1 * wy - s * wz * rho1)
        c2 = x1 * x1 + y1 * y1 - rho1 * rho1
        t2 = (-b2 + np.sqrt(np.clip(b2 * b2 - 4.0 * a2 * c2, 0.0, None))) / np.where(a2 > 0.0, 2.0 * a2, 1.0)
        x2, y2, z2 = x1 + t2 * wx, y1 + t2 * wy, z1 + t2 * wz
        rho2 = 1.0 + s * z2
        valid = (rho1 > 0.0) & (a2 > 0.0) & (t2 > 0.0) & (rho2 > 0.0)
        n2x, n2y, n2z = _unit(x2, y2, -s * rho2)
        # out towards the backlight; the normal facing the ray is the inward one
        ex, ey, ez, _, cos_a2, tir = _refract_components(wx, wy, wz, -n2x, -n2y, -n2z, n)
    lost = hit & (~valid | tir)
    through = hit & ~lost
    ex = np.where(hit, np.where(lost, 0.0, ex), -dx)
    ey = np.where(hit, np.where(lost, 0.0, ey), -dy)
    ez = np.where(hit, np.where(lost, 0.0, ez), -dz)
    path = np.where(through, t2, 0.0)
    if not fresnel:
        return ex, ey, ez, np.where(lost, 0.0, 1.0), path, hit, lost
    # Fresnel, unpolarised: physical light enters at p2 (air→liquid) and leaves at p1
    rs_in, rp_in = fresnel_reflectance(np.where(through, cos_a2, 1.0), 1.0, n)
    rs_out, rp_out = fresnel_reflectance(np.where(through, cos_a1, 1.0), 1.0, n)
    s1 = _s_vector(np.where(through, ex, 0.0), np.where(through, ey, -1.0),
                   np.where(through, ez, 0.0),
                   np.where(through, n2x, 0.0), np.where(through, n2y, -1.0), np.where(through, n2z, 0.0))
    s2 = _s_vector(dx, dy, dz, np.where(through, n1x, 0.0), np.where(through, n1y, 1.0),
                   np.where(through, n1z, 0.0))
    cc = np.clip((s1[0] * s2[0] + s1[1] * s2[1] + s1[2] * s2[2]) ** 2, 0.0, 1.0)
    ts_in, tp_in, ts_out, tp_out = 1.0 - rs_in, 1.0 - rp_in, 1.0 - rs_out, 1.0 - rp_out
    trans = 0.5 * (ts_in * (ts_out * cc + tp_out * (1.0 - cc))
                   + tp_in * (ts_out * (1.0 - cc) + tp_out * cc))
    return ex, ey, ez, np.where(hit, np.where(lost, 0.0, trans), 1.0), path, hit, lost


def trace_cone(q, slope, direction, refractive_index) -> RayPath:
    """Trace camera-bound rays backwards through a liquid cone r = 1 + slope·z (units of R).

    The ray is the straight line through the image point (q, 0, 0) with unit
    direction ``direction`` (…, 3; d_y > 0, towards the camera). Its real path
    left the liquid at the line's last intersection with the surface; from there
    it is refracted into the liquid, traced to the far surface and refracted out.
    ``q``, ``slope`` broadcast against ``direction[..., 0]``. The optical axis is
    y, the filament axis z.
    """
    d = np.asarray(direction, float)
    shape = d.shape[:-1]
    q = np.broadcast_to(np.asarray(q, float), shape)
    s = np.broadcast_to(np.asarray(slope, float), shape)
    ex, ey, ez, trans, path, hit, lost = _trace(q, s, d[..., 0], d[..., 1], d[..., 2],
                                                float(refractive_index))
    return RayPath(exit_direction=np.stack([ex, ey, ez], axis=-1), transmittance=trans,
                   path_length=path, hit=hit, lost=lost)


def _backlight(ex, ey, ez, sin_beta):
    """Backlight radiance (0..1) seen along backward exit directions (components): uniform
    within the half-angle β about −y, with a soft rim of relative width :data:`BACKLIGHT_RIM`."""
    rim = BACKLIGHT_RIM * sin_beta
    value = np.clip((sin_beta + 0.5 * rim - np.hypot(ex, ez)) / rim, 0.0, 1.0)
    return np.where(ey < 0.0, value, 0.0)


def _sunflower(n: int) -> np.ndarray:
    """``n`` equal-area points in the unit disk (Vogel's spiral), shape (n, 2)."""
    k = np.arange(n)
    r = np.sqrt((k + 0.5) / n)
    phi = k * _GOLDEN_ANGLE
    return np.stack([r * np.cos(phi), r * np.sin(phi)], axis=-1)


def _directions(u):
    """Camera-bound unit directions from direction cosines u = (d_x, d_z), |u| < 1."""
    u = np.asarray(u, float)
    dy = np.sqrt(np.clip(1.0 - u[..., 0] ** 2 - u[..., 1] ** 2, 1e-12, None))
    return np.stack([u[..., 0], dy, u[..., 1]], axis=-1)


def _exit_transverse(q, slope, u, n):
    """(e_x, e_z) of the backward exit direction for pupil directions u; NaN where lost."""
    d = _directions(u)
    ex, _, ez, _, _, _, lost = _trace(q, slope, d[..., 0], d[..., 1], d[..., 2], n, fresnel=False)
    return np.where(lost[..., None], np.nan, np.stack([ex, ez], axis=-1))


def _source_preimage(q, slope, n, *, iterations=10, step=2e-5):
    """Pupil direction u0 whose backward ray leaves exactly towards the backlight's centre
    (Newton's method on the exit direction), the map's Jacobian there, and a success mask."""
    u = np.zeros(q.shape + (2,))
    step_x = np.array([step, 0.0])
    step_z = np.array([0.0, step])
    jac = np.zeros(q.shape + (2, 2))
    for it in range(iterations + 1):
        g = _exit_transverse(q, slope, u, n)
        jac[..., :, 0] = (_exit_transverse(q, slope, u + step_x, n) - g) / step
        jac[..., :, 1] = (_exit_transverse(q, slope, u + step_z, n) - g) / step
        det = jac[..., 0, 0] * jac[..., 1, 1] - jac[..., 0, 1] * jac[..., 1, 0]
        ok = np.isfinite(det) & (np.abs(det) > 1e-9) & np.all(np.isfinite(g), axis=-1)
        if it == iterations:
            break
        safe = np.where(ok, det, 1.0)
        du0 = -(jac[..., 1, 1] * g[..., 0] - jac[..., 0, 1] * g[..., 1]) / safe
        du1 = -(-jac[..., 1, 0] * g[..., 0] + jac[..., 0, 0] * g[..., 1]) / safe
        du = np.where(ok[..., None], np.stack([du0, du1], axis=-1), 0.0)
        size = np.linalg.norm(du, axis=-1, keepdims=True)
        du *= np.minimum(1.0, 0.2 / np.maximum(size, 1e-300))
        u = u + du
        norm = np.linalg.norm(u, axis=-1, keepdims=True)
        u *= np.minimum(1.0, 0.9 / np.maximum(norm, 1e-300))
    residual = np.linalg.norm(np.nan_to_num(g, nan=1.0), axis=-1)
    return u, jac, ok, residual


@dataclass(frozen=True)
class TransmissionTable:
    """Light through the liquid relative to the bare backlight, per recording.

    ``transmission[k, j, i]`` at κR = ``absorbance[k]`` (quadratically spaced; Napierian absorption
    coefficient × local radius), |dR/dz| = ``slope[j]`` (adaptive rows, dense where the bright band
    closes; :func:`_slope_rows`) and impact coordinate
    b/R = ``q[i]`` (1 beyond ``q[-1]``). ``deficit`` holds the running integral
    ∫_0^q (1 − T) dq' on the uniform grid ``q_uniform`` (float32, rows k·n_slope + j),
    from which pixels get exact area averages across the axis.
    """

    q: np.ndarray
    slope: np.ndarray
    absorbance: np.ndarray
    transmission: np.ndarray
    q_uniform: np.ndarray
    deficit: np.ndarray
    refractive_index: float
    numerical_aperture: float
    illumination_half_angle_deg: float


def _q_grid(numerical_aperture: float, n_inner: int = 640, n_outer: int = 128,
            n_rim: int = 64) -> np.ndarray:
    """Impact coordinates b/R traced: dense towards the rim (sin-spaced up to 1); then the
    penumbra of a straight thread just outside it, 1 < b/R < 1/cos α, where only the pupil rays
    tilted across the axis by more than about √(2(b/R − 1)) meet the liquid (quadratically
    spaced from 1, so that its √-like rise is linear in the index and the step in T at the rim
    stays sharp); then uniform out to where even the steepest tabulated surface stops catching
    pupil rays.

    The renderer integrates T linearly between these points: a coarse step just outside the
    rim (formerly the first uniform point, ~0.005 at NA 0.2) drew a ramp from the rim's darkness
    to the bare light, a shadow half a step wide beyond the true radius that no ray casts."""
    alpha = math.asin(numerical_aperture)
    q_rim = 1.0 / math.cos(alpha)
    q_max = q_rim + 1.2 * SLOPE_MAX * math.tan(alpha) + 0.02
    inner = np.sin(np.linspace(0.0, 0.5 * math.pi, n_inner))
    rim = 1.0 + (q_rim - 1.0) * np.linspace(0.0, 1.0, n_rim + 1)[1:] ** 2
    outer = np.linspace(q_rim, q_max, n_outer + 1)[1:]
    return np.concatenate([inner, rim, outer])


def _trace_rows(n: float, na: float, sin_beta: float, q: np.ndarray, slope: np.ndarray,
                absorbance: np.ndarray, pupil_samples: int) -> np.ndarray:
    """T[k, j, i] at κR = ``absorbance[k]``, |dR/dz| = ``slope[j]``, b/R = ``q[i]`` (see
    :func:`transmission_table`), relative to the bare backlight."""
    qq, ss = np.meshgrid(q, slope)                       # (n_slopes, n_q)
    # beyond q_rim + 1.2·|dR/dz|·tan α (+ a margin) no pupil ray meets the cone: T = 1 exactly
    alpha = math.asin(na)
    missed = (qq > 1.0 / math.cos(alpha) + 1.2 * ss * math.tan(alpha) + 0.02).ravel()
    entries_q = np.concatenate([qq.ravel()[~missed], [1e3]])      # the last: the bare backlight
    entries_s = np.concatenate([ss.ravel()[~missed], [0.0]])
    pattern = _sunflower(pupil_samples)
    reach = 1.3 * sin_beta * (1.0 + 0.5 * BACKLIGHT_RIM)
    pupil_area = math.pi * na * na
    sums = np.zeros((absorbance.size, entries_q.size))
    # rays per chunk: Newton's preimage search favours large chunks, the whole-pupil trace
    # smaller ones (its temporaries then stay in cache: ~25 % faster)
    chunk = max(1, (400_000 if reach < na else 120_000) // pupil_samples)
    for lo in range(0, entries_q.size, chunk):
        eq, es = entries_q[lo:lo + chunk], entries_s[lo:lo + chunk]
        if reach >= na:     # a wide backlight: the whole pupil, always
            todo = np.arange(eq.size)
            u = np.broadcast_to(na * pattern, (eq.size,) + pattern.shape)
            weight = np.full(eq.size, pupil_area / pupil_samples)
        else:
            u0, jac, ok, residual = _source_preimage(eq, es, n)
            det = np.where(ok, jac[:, 0, 0] * jac[:, 1, 1] - jac[:, 0, 1] * jac[:, 1, 0], 1.0)
            area = math.pi * reach ** 2 / np.abs(det)
            local = ok & (residual < 0.05 * sin_beta) & (area < 0.5 * pupil_area)
            inv = np.stack([np.stack([jac[:, 1, 1], -jac[:, 0, 1]], -1),
                            np.stack([-jac[:, 1, 0], jac[:, 0, 0]], -1)], -2) / det[:, None, None]
            # a located preimage wholly outside the pupil sees no backlight: nothing to trace
            extent = reach * np.sqrt(np.sum(inv * inv, axis=(1, 2)))
            todo = np.flatnonzero(~(local & (np.hypot(u0[:, 0], u0[:, 1]) - extent > na)))
            px, pz = reach * pattern[:, 0], reach * pattern[:, 1]
            iv = inv[todo]
            spread = np.stack([iv[:, None, 0, 0] * px + iv[:, None, 0, 1] * pz,
                               iv[:, None, 1, 0] * px + iv[:, None, 1, 1] * pz], axis=-1)
            u = np.where(local[todo, None, None], u0[todo, None, :] + spread, na * pattern[None, :, :])
            weight = np.where(local[todo], area[todo], pupil_area) / pupil_samples
        inside = np.hypot(u[..., 0], u[..., 1]) < na
        d = _directions(np.where(inside[..., None], u, 0.0))
        ex, ey, ez, tr, path, _, _ = _trace(eq[todo, None], es[todo, None], d[..., 0], d[..., 1],
                                            d[..., 2], n)
        light = np.where(inside, _backlight(ex, ey, ez, sin_beta) * tr, 0.0)
        for k, kr in enumerate(absorbance):
            sums[k, lo + todo] = weight * np.sum(light * np.exp(-kr * path), axis=1)
    trans = np.ones((absorbance.size, missed.size))
    trans[:, ~missed] = np.clip(sums[:, :-1] / sums[:, -1:], 0.0, None)
    return trans.reshape(absorbance.size, slope.size, q.size)


def _running_deficit(trans: np.ndarray, q: np.ndarray) -> np.ndarray:
    """∫_0^q (1 − T) dq' on the grid ``q`` (trapezoids; last axis)."""
    gaps = 1.0 - trans
    return np.concatenate([np.zeros(trans.shape[:-1] + (1,)),
                           np.cumsum(0.5 * (gaps[..., 1:] + gaps[..., :-1]) * np.diff(q), axis=-1)],
                          axis=-1)


#: Slope rows every table traces; more are added where the row's integrated deficit curves.
SLOPE_START = (0.0, 0.25, 0.5, 0.75, 1.0, 1.75, SLOPE_MAX)
#: Refinement target: the largest relative difference between two interpolants of a row's
#: integrated deficit (cubic spline, monotone PCHIP) at any interval's midpoint.
SLOPE_TOLERANCE = 3e-4
#: Smallest integrated deficit (units of R) the slope tolerance is relative to.
DEFICIT_FLOOR = 0.05
#: Intervals split per refinement pass.
SLOPE_BATCH = 4


def _deficit_in_slope(slope, total, s, *, kind="spline"):
    """The integrated deficit ``total`` (…, rows at ``slope``) interpolated at ``s`` in slope: a
    not-a-knot cubic spline (or the monotone PCHIP), clipped into its interval's range."""
    from scipy.interpolate import CubicSpline, PchipInterpolator

    cls = CubicSpline if kind == "spline" else PchipInterpolator
    estimate = cls(slope, total, axis=-1)(s)
    j = np.clip(np.searchsorted(slope, s, side="right") - 1, 0, slope.size - 2)
    d_a, d_b = total[..., j], total[..., j + 1]
    return np.clip(estimate, np.minimum(d_a, d_b), np.maximum(d_a, d_b))


def _slope_rows(n: float, na: float, sin_beta: float, q: np.ndarray, absorbance: np.ndarray,
                pupil_samples: int, max_rows: int, tolerance: float = SLOPE_TOLERANCE):
    """|dR/dz| rows and their T (absorbance, slope, q): :data:`SLOPE_START`, then, up to
    ``max_rows``, the midpoints of the intervals where two interpolants of the integrated
    deficit disagree most (by more than ``tolerance``, relative)."""
    slope = np.array(SLOPE_START[:max(2, max_rows)])
    slope[-1] = SLOPE_MAX
    trans = _trace_rows(n, na, sin_beta, q, slope, absorbance, pupil_samples)
    total = _running_deficit(trans, q)[..., -1]                 # (absorbance, slope)
    while slope.size < max_rows:
        mid = 0.5 * (slope[1:] + slope[:-1])
        spline = _deficit_in_slope(slope, total, mid)
        pchip = _deficit_in_slope(slope, total, mid, kind="pchip")
        disagree = np.max(np.abs(spline - pchip) / np.maximum(spline, DEFICIT_FLOOR), axis=0)
        split = np.argsort(-disagree)[:min(SLOPE_BATCH, max_rows - slope.size)]
        split = np.sort(split[disagree[split] > tolerance])
        if split.size == 0:
            break
        t_mid = _trace_rows(n, na, sin_beta, q, mid[split], absorbance, pupil_samples)
        slope = np.insert(slope, split + 1, mid[split])
        trans = np.insert(trans, split + 1, t_mid, axis=1)
        total = np.insert(total, split + 1, _running_deficit(t_mid, q)[..., -1], axis=1)
    return slope, trans


def _slope_spline(table: TransmissionTable):
    """Each row's integrated deficit (κR rows, slope rows) and the coefficients (4, slope rows − 1,
    κR rows) of its cubic spline in slope, as :func:`_deficit_in_slope` interpolates it (for
    :func:`_slope_blend`)."""
    from scipy.interpolate import CubicSpline

    total = table.deficit[:, -1].astype(float).reshape(table.absorbance.size, table.slope.size)
    return total, CubicSpline(table.slope, total, axis=1).c


def _slope_blend(table: TransmissionTable, slope, slab, spline=None):
    """Rows j, j + 1 of ``table`` and the weight of row j + 1 for |dR/dz| = ``slope`` at κR row
    ``slab`` (arrays, one per image row): the blend whose integrated deficit is the cubic
    spline's in slope (:func:`_deficit_in_slope`; ``spline``: its :func:`_slope_spline`), not
    the linear one — between rows the deficit curves strongly where a bright band closes."""
    s = np.clip(np.asarray(slope, float), 0.0, SLOPE_MAX)
    j = np.clip(np.searchsorted(table.slope, s, side="right") - 1, 0, table.slope.size - 2)
    s_a, s_b = table.slope[j], table.slope[j + 1]
    total, coefficients = _slope_spline(table) if spline is None else spline
    d_a, d_b = total[slab, j], total[slab, j + 1]
    c = coefficients[:, j, slab]
    ds = s - s_a
    estimate = ((c[0] * ds + c[1]) * ds + c[2]) * ds + c[3]
    gap = d_b - d_a
    flat = np.abs(gap) <= 1e-6
    w = np.where(flat, ds / (s_b - s_a), (estimate - d_a) / np.where(flat, 1.0, gap))
    return j, np.clip(w, 0.0, 1.0)


@lru_cache(maxsize=8)
def transmission_table(refractive_index: float, numerical_aperture: float,
                       illumination_half_angle_deg: float, *, absorbance_max: float = 0.0,
                       pupil_samples: int = 256, n_slopes: int = 29,
                       n_absorbance: int = 17, n_uniform: int = 4096) -> TransmissionTable:
    """Tabulate the liquid's transmission against b/R, |dR/dz| and κR (see the module notes).

    ``absorbance_max``: largest κR needed (0: clear liquid, one κR row). For a
    backlight narrower than about the pupil, each entry samples the pupil region
    that sees the backlight: u0 + J⁻¹·(disk of 1.3 sin β), u0 and J from Newton's
    method on the exit direction; otherwise the whole pupil. ``pupil_samples``
    rays per entry either way. ``n_slopes``: most |dR/dz| rows; they are added where the
    rows' integrated deficit ∫(1 − T) dq curves in slope (:func:`_slope_rows`), and the
    renderer blends a row's two neighbours so that its integrated deficit follows their cubic
    spline in slope (:func:`_slope_blend`).
    """
    n = float(refractive_index)
    na = float(numerical_aperture)
    sin_beta = math.sin(math.radians(illumination_half_angle_deg))
    q = _q_grid(na)
    absorbance = absorbance_max * np.linspace(0.0, 1.0, n_absorbance) ** 2 if absorbance_max > 0 \
        else np.zeros(1)
    slope, trans = _slope_rows(n, na, sin_beta, q, absorbance, pupil_samples, n_slopes)
    # running integral of the deficit, resampled on a uniform grid for the renderer; its step
    # divides 1, so that the rim (where T jumps and the integral has a kink) is a node
    q_uniform = np.arange(n_uniform) / math.floor((n_uniform - 1) / q[-1])
    gaps = 1.0 - trans
    cumulative = np.concatenate([np.zeros(trans.shape[:-1] + (1,)),
                                 np.cumsum(0.5 * (gaps[..., 1:] + gaps[..., :-1]) * np.diff(q), axis=-1)],
                                axis=-1)
    deficit = np.stack([np.interp(q_uniform, q, row) for row in cumulative.reshape(-1, q.size)])
    return TransmissionTable(q=q, slope=slope, absorbance=absorbance, transmission=trans,
                             q_uniform=q_uniform, deficit=deficit.astype(np.float32),
                             refractive_index=n, numerical_aperture=na,
                             illumination_half_angle_deg=float(illumination_half_angle_deg))


# --- point-spread function -------------------------------------------------------------------

def airy_psf(r_m, numerical_aperture: float, wavelength_m: float):
    """Diffraction-limited PSF (1/m²) at radius ``r_m`` (m): (π NA²/λ²)·[2 J1(v)/v]²,
    v = 2π NA r/λ. Integrates to 1 over the plane; first zero at r = 0.61 λ/NA."""
    from scipy.special import j1

    v = 2.0 * math.pi * numerical_aperture * np.asarray(r_m, float) / wavelength_m
    with np.errstate(invalid="ignore", divide="ignore"):
        amplitude = np.where(v > 1e-8, 2.0 * j1(v) / v, 1.0)
    return math.pi * (numerical_aperture / wavelength_m) ** 2 * amplitude ** 2


def psf_kernel(optics: RayOptics, pixel_size_m: float) -> np.ndarray:
    """The PSF on the supersampled grid (cells of pixel / ``optics.supersample``), summing to 1.

    Airy pattern of the NA (kept out to :data:`AIRY_SUPPORT_ZEROS` first-zero
    radii, at most :data:`PSF_MAX_RADIUS_PX`) convolved with the geometric defocus
    disk of radius |defocus| tan α, integrated over the cells.
    """
    from scipy.signal import fftconvolve

    cell = pixel_size_m / optics.supersample
    r_zero = J1_FIRST_ZERO / (2.0 * math.pi) * optics.wavelength_m / optics.numerical_aperture
    alpha = math.asin(optics.numerical_aperture)
    r_defocus = abs(optics.defocus_m) * math.tan(alpha)
    support = r_defocus + min(AIRY_SUPPORT_ZEROS * r_zero, PSF_MAX_RADIUS_PX * pixel_size_m)
    m = max(1, int(math.ceil(support / cell)))
    fine = int(min(15, max(3, math.ceil(5.0 * cell / r_zero)))) | 1   # odd: the centre is a sample
    h = cell / fine
    x = (np.arange((2 * m + 1) * fine) + 0.5) * h - (m + 0.5) * cell
    rr = np.hypot(x[:, None], x[None, :])
    airy = np.where(rr <= support, airy_psf(rr, optics.numerical_aperture, optics.wavelength_m), 0.0)
    if r_defocus > 0.5 * h:
        disk = (rr <= r_defocus).astype(float)
        airy = fftconvolve(airy, disk / disk.sum(), mode="same")
    kernel = airy.reshape(2 * m + 1, fine, 2 * m + 1, fine).sum(axis=(1, 3))
    kernel = np.clip(kernel, 0.0, None)
    return (kernel / kernel.sum()).astype(np.float32)


def _pixel_phases(kernel: np.ndarray, k: int):
    """Split "convolve the k-supersampled image with ``kernel``, then average each pixel's k × k
    cells" into k² correlations at pixel resolution, one per sub-pixel phase.

    Returns [(p, q, weights, anchor)]: pixel image = Σ filter2D(sub[p::k, q::k], weights, anchor).
    """
    size = kernel.shape[0]
    m = size // 2
    a = np.arange(size)
    sigma = np.arange(k)
    d = sigma[:, None] - a[None, :] + m                  # sub-pixel offset (σ, a)
    shift, phase = np.divmod(d, k)
    lo = int(shift.min())
    n = int(shift.max()) - lo + 1
    phases = []
    for p in range(k):
        rows, a_rows = np.nonzero(phase == p)
        for q in range(k):
            cols, a_cols = np.nonzero(phase == q)
            w = np.zeros((n, n))
            np.add.at(w, (shift[rows, a_rows][:, None] - lo, shift[cols, a_cols][None, :] - lo),
                      kernel[a_rows[:, None], a_cols[None, :]])
            phases.append((p, q, (w / (k * k)).astype(np.float32), (-lo, -lo)))
    return phases


# --- parameters ------------------------------------------------------------------------------

@dataclass(frozen=True)
class RayOptics:
    """Lens, backlight and camera (SI units; levels as fractions of full scale).

    Lens: object-side telecentric, ``numerical_aperture`` 0.01–0.3 (object side),
    ``wavelength_m`` 0.35–1 µm, ``defocus_m`` (object-plane offset; blur disk
    radius |defocus| tan α). Backlight: ``illumination_half_angle_deg`` β
    (collimated 0.2–1°, diffuse up to ~40°), ``background_level`` (its grey level
    before glare). Sampling: ``supersample`` sub-pixels per pixel and axis,
    ``pupil_samples`` rays per table entry. Motion blur: ``exposure_fraction`` of
    the frame interval, averaged over ``sub_exposures`` states. Sensor:
    ``bit_depth`` 8/12/16, ``full_well`` (electrons at full scale, 0: no shot
    noise), ``read_noise`` (rms, fraction of full scale), ``stuck_pixels``
    (count; half hot, half dead). Artefacts, all off by default:
    ``coherent_fraction`` of partially coherent light (0–1) with its Fresnel
    fringes after ``fringe_distance_m``; ``veiling_glare`` (fraction of the
    backlight added everywhere, 0–0.95: low contrast); ``uneven_light``
    (relative ramp and vignetting); ``flicker`` (rms relative frame-to-frame
    backlight change); ``texture_amplitude`` (rms relative backlight texture)
    drifting ``texture_speed_px`` per frame; ``dust_blob_depth`` (relative
    darkening at its centre, < 1) of radius ``dust_blob_radius_px`` crossing the
    frame once per record; ``banding_amplitude`` (relative per-row gain of a
    rolling read-out under a PWM lamp, < 0.5) of period ``banding_period_px``
    rows, its phase moving from frame to frame.
    """

    numerical_aperture: float = 0.1
    wavelength_m: float = 0.55e-6
    illumination_half_angle_deg: float = 0.5
    defocus_m: float = 0.0
    orientation: str = "vertical"
    bit_depth: int = 8
    background_level: float = 0.8
    full_well: float = 0.0
    read_noise: float = 0.0
    stuck_pixels: int = 0
    exposure_fraction: float = 0.0
    sub_exposures: int = 5
    supersample: int = 2
    pupil_samples: int = 256
    coherent_fraction: float = 0.0
    fringe_distance_m: float = 200e-6
    veiling_glare: float = 0.0
    uneven_light: float = 0.0
    flicker: float = 0.0
    texture_amplitude: float = 0.0
    texture_speed_px: float = 1.0
    dust_blob_depth: float = 0.0
    dust_blob_radius_px: float = 12.0
    banding_amplitude: float = 0.0
    banding_period_px: float = 48.0

    def __post_init__(self):
        if not 0.01 <= self.numerical_aperture <= 0.3:
            raise ValueError("numerical_aperture must lie in [0.01, 0.3]")
        if not 0.35e-6 <= self.wavelength_m <= 1.0e-6:
            raise ValueError("wavelength_m must lie in [0.35, 1.0] µm")
        if not 0.05 <= self.illumination_half_angle_deg <= 60.0:
            raise ValueError("illumination_half_angle_deg must lie in [0.05, 60]")
        if self.orientation not in ORIENTATIONS:
            raise ValueError(f"orientation must be one of {ORIENTATIONS}, not {self.orientation!r}")
        if self.bit_depth not in (8, 12, 16):
            raise ValueError(f"bit_depth must be 8, 12 or 16, not {self.bit_depth!r}")
        if not 0.0 < self.background_level <= 1.0:
            raise ValueError("background_level must lie in (0, 1]")
        if not 0.0 <= self.exposure_fraction <= 1.0 or self.sub_exposures < 1:
            raise ValueError("exposure_fraction must lie in [0, 1] and sub_exposures be at least 1")
        if self.supersample not in (1, 2, 3, 4) or self.pupil_samples < 16:
            raise ValueError("supersample must be 1–4 and pupil_samples at least 16")
        if not 0.0 <= self.coherent_fraction <= 1.0 or self.fringe_distance_m <= 0:
            raise ValueError("coherent_fraction must lie in [0, 1], fringe_distance_m be positive")
        if not 0.0 <= self.veiling_glare <= 0.95:
            raise ValueError("veiling_glare must lie in [0, 0.95]")
        if not 0.0 <= self.dust_blob_depth < 1.0 or not 0.0 <= self.banding_amplitude < 0.5:
            raise ValueError("dust_blob_depth must lie in [0, 1), banding_amplitude in [0, 0.5)")
        if min(self.full_well, self.read_noise, self.stuck_pixels, self.uneven_light, self.flicker,
               self.texture_amplitude) < 0:
            raise ValueError("noise, stuck pixels, uneven light, flicker and texture must not be negative")
        if min(self.dust_blob_radius_px, self.banding_period_px) <= 0:
            raise ValueError("dust_blob_radius_px and banding_period_px must be positive")


@dataclass(frozen=True)
class RayScene:
    """The experiment filmed (SI units).

    ``geometry="plates"``: a liquid bridge between two opaque coaxial plates of
    ``plate_diameter_m``; ``"dripping"``: a nozzle of outer diameter
    ``plate_diameter_m`` above an opaque substrate. ``gap_m``: plate face to face
    (nozzle tip to substrate) during free thinning; None: 80 % of the frame.
    ``frame_size_px`` is (pixels along the axis, pixels across). Timeline:
    ``pre_roll_s`` at rest (dripping: a pendant drop growing until it touches
    the substrate), ``stretch_duration_s`` of plate separation at a constant
    strain rate from ``gap_m / stretch_ratio`` (dripping: drainage after
    contact), then free thinning. ``sag`` (0–0.3) moves the neck below the
    mid-gap by that fraction of the gap, the lower drop growing at the upper's
    expense. The liquid has ``refractive_index`` (1.2–1.8) and a Napierian
    ``absorption_per_m`` (1/m; a dye). ``n_frames=None`` records until
    :data:`FRAMES_AFTER_BREAKUP` frames after breakup.
    """

    fluid: laws.Fluid
    geometry: str = "plates"
    plate_diameter_m: float = 3e-3
    initial_diameter_m: float = 1e-3
    gap_m: float | None = None
    pixel_size_m: float = 10e-6
    fps_hz: float = 10000.0
    frame_size_px: tuple[int, int] = (256, 400)
    n_frames: int | None = None
    pre_roll_s: float = 0.0
    stretch_duration_s: float = 0.0
    stretch_ratio: float = 3.0
    sag: float = 0.0
    refractive_index: float = 1.40
    absorption_per_m: float = 0.0
    initial_conformation: float = 1.0

    def __post_init__(self):
        if self.geometry not in GEOMETRIES:
            raise ValueError(f"geometry must be one of {GEOMETRIES}, not {self.geometry!r}")
        if min(self.plate_diameter_m, self.initial_diameter_m, self.pixel_size_m, self.fps_hz) <= 0:
            raise ValueError("plate and initial diameters, pixel size and frame rate must be positive")
        if self.pre_roll_s < 0 or self.stretch_duration_s < 0 or self.stretch_ratio <= 1.0:
            raise ValueError("pre_roll_s and stretch_duration_s must not be negative, stretch_ratio > 1")
        if not 0.0 <= self.sag <= 0.3:
            raise ValueError("sag must lie in [0, 0.3]")
        if not 1.2 <= self.refractive_index <= 1.8 or self.absorption_per_m < 0:
            raise ValueError("refractive_index must lie in [1.2, 1.8], absorption_per_m be >= 0")
        if self.n_frames is not None and self.n_frames < 1:
            raise ValueError("n_frames must be at least 1")
        n_axis, n_across = self.frame_size_px
        if n_axis < 48 or n_across < 32:
            raise ValueError("frame_size_px is too small (at least 48 along the axis, 32 across)")
        if self.plate_diameter_m / self.pixel_size_m > n_across - 8:
            raise ValueError("the plate (nozzle) does not fit across the frame")
        if self.gap_m is not None and not 8.0 <= self.gap_m / self.pixel_size_m <= n_axis - 8:
            raise ValueError("gap_m does not fit along the frame")
        start = self.initial_diameter_m * (math.sqrt(self.stretch_ratio) if self.stretch_duration_s > 0
                                           and self.geometry == "plates" else 1.0)
        if start >= 0.9 * self.plate_diameter_m:
            raise ValueError("the liquid bridge (initial diameter, before any stretch) must be "
                             "narrower than 0.9 of the plate (nozzle) diameter")

    @property
    def neck_style(self) -> str:
        """``"elastic"`` (polymer), ``"inertial"`` (Newtonian, Oh < 0.3) or ``"viscous"``."""
        fluid = self.fluid
        if fluid.polymer_modulus > 0:
            return "elastic"
        if fluid.density > 0 and laws.ohnesorge_number(
                self.initial_diameter_m / 2, surface_tension=fluid.surface_tension,
                density=fluid.density, viscosity=fluid.zero_shear_viscosity) < 0.3:
            return "inertial"
        return "viscous"


# --- the record's timeline -------------------------------------------------------------------

def _lifetime_guess(fluid: laws.Fluid, d0: float) -> float:
    """Order of the time (s) from free thinning to breakup, to size the model run."""
    r0 = d0 / 2
    t = r0 * fluid.zero_shear_viscosity / (laws.PAPAGEORGIOU_COEFFICIENT * fluid.surface_tension)
    if fluid.density > 0:
        t = min(t, laws.rayleigh_time(r0, surface_tension=fluid.surface_tension,
                                      density=fluid.density) * 3.0)
    if fluid.polymer_modulus > 0:
        t += 30.0 * fluid.relaxation_time
    return float(t)


def _model(scene: RayScene):
    """The 0-D model's history, long enough for the record, and the number of frames."""
    fluid, d0 = scene.fluid, scene.initial_diameter_m
    t_free = scene.pre_roll_s + scene.stretch_duration_s
    run = dict(initial_conformation=scene.initial_conformation)
    if scene.n_frames is not None:
        duration = max(scene.n_frames / scene.fps_hz - t_free, 2.0 / scene.fps_hz)
        return laws.filament_model(fluid, d0, duration=duration, **run), scene.n_frames
    duration = 2.0 * _lifetime_guess(fluid, d0)
    for _ in range(6):
        hist = laws.filament_model(fluid, d0, duration=duration, **run)
        if hist.breakup_time_s is not None:
            break
        duration *= 4.0
    else:
        raise ValueError("the filament does not break within a reasonable time: give n_frames")
    n = int(math.floor((t_free + hist.breakup_time_s) * scene.fps_hz)) + 1 + FRAMES_AFTER_BREAKUP
    if n > MAX_AUTO_FRAMES:
        raise ValueError(f"breakup needs {n} frames (more than {MAX_AUTO_FRAMES}): lower fps_hz "
                         "or give n_frames")
    return hist, n


@dataclass(frozen=True)
class _Timeline:
    """Geometry of the liquid at given instants (px; z is the image's axial coordinate)."""

    time_s: np.ndarray
    phase: np.ndarray          # "rest", "stretch", "free", "broken", "pendant"
    r_neck: np.ndarray         # neck radius; 0 once broken, NaN while pendant
    z_upper: np.ndarray        # upper plate face / nozzle tip
    z_lower: np.ndarray        # lower plate face / substrate
    z_neck: np.ndarray
    cap_upper: np.ndarray      # height of the drop on the upper face
    base_lower: np.ndarray     # base radius of the drop on the lower face (plate radius, or sessile)
    cap_lower: np.ndarray      # its height
    tip: np.ndarray            # distance of each broken half's tip from the pinch point
    pendant_length: np.ndarray
    end_radius: float          # plate / nozzle radius
    pendant_width: float
    r_start: float             # widest neck of the record
    style: str
    geometry: str
    free_thinning_start_s: float
    breakup_time_s: float | None


def _timeline(scene: RayScene, hist, n_frames: int, times) -> _Timeline:
    """The scene at ``times`` (s, recording clock) of a record of ``n_frames`` frames."""
    px = scene.pixel_size_m
    n_axis, n_across = scene.frame_size_px
    t = np.clip(np.asarray(times, float), 0.0, None)
    end = scene.plate_diameter_m / 2 / px
    r0 = scene.initial_diameter_m / 2 / px
    gap = scene.gap_m / px if scene.gap_m is not None else 0.8 * n_axis
    centre = (n_axis - 1) / 2
    z_lower = np.full(t.shape, centre + gap / 2)
    t_pre, t_free = scene.pre_roll_s, scene.pre_roll_s + scene.stretch_duration_s
    record_end = n_frames / scene.fps_hz
    t_break = t_free + hist.breakup_time_s if hist.breakup_time_s is not None else None
    if t_break is not None and t_break >= record_end:
        t_break = None
    style = scene.neck_style

    phase = np.full(t.shape, "free", dtype=object)
    phase[t < t_free] = "stretch"
    phase[t < t_pre] = "rest"
    progress = np.clip((t - t_pre) / scene.stretch_duration_s, 0.0, 1.0) \
        if scene.stretch_duration_s > 0 else np.ones(t.shape)
    r_free = hist.diameter_at(np.clip(t - t_free, 0.0, None)) / 2 / px
    pendant_length = np.zeros(t.shape)
    if scene.geometry == "plates":
        ratio = scene.stretch_ratio if scene.stretch_duration_s > 0 else 1.0
        height = gap / ratio * ratio ** progress           # constant strain rate
        r_start = r0 * math.sqrt(ratio)
        r_neck = np.where(t < t_free, r0 * np.sqrt(gap / height), r_free)
    else:
        height = np.full(t.shape, gap)
        r_start = max(r0, min(0.8 * end, 2.0 * r0)) if scene.stretch_duration_s > 0 else r0
        r_neck = np.where(t < t_free, r_start + (r0 - r_start) * progress, r_free)
        if t_pre > 0:
            pendant = t < t_pre
            phase[pendant] = "pendant"
            pendant_length = np.where(pendant, gap * (0.55 + 0.45 * t / t_pre), 0.0)
            r_neck = np.where(pendant, np.nan, r_neck)
    broken = np.zeros(t.shape, bool) if t_break is None else t >= t_break
    phase[broken] = "broken"
    r_neck = np.where(broken, 0.0, r_neck)
    z_upper = z_lower - height
    z_neck = z_upper + (0.5 + scene.sag) * height
    upper_room, lower_room = z_neck - z_upper, z_lower - z_neck

    # the end drops: fixed menisci, growing as an elastic thread drains into them
    drained = np.clip(1.0 - np.nan_to_num(r_neck, nan=r_start) / r_start, 0.0, 1.0)
    base = 0.45 * end if style == "elastic" else 0.3 * end
    grow = 1.0 + 0.5 * drained if style == "elastic" else np.ones(t.shape)
    cap_upper = np.minimum(base * grow * (1.0 - 1.5 * scene.sag), 0.7 * upper_room)
    pendant_width = min(1.25 * end, 0.42 * n_across)
    if scene.geometry == "plates":
        base_lower = np.full(t.shape, end)
        cap_lower = np.minimum(base * grow * (1.0 + 3.0 * scene.sag), 0.7 * lower_room)
    else:
        cap_upper = np.minimum(0.35 * end, 0.7 * upper_room)
        # the sessile drop spreads from the pendant drop's width, flattening as it goes
        a0, a_inf = 0.9 * pendant_width, min(2.2 * end, 0.45 * n_across)
        lifetime = (t_break if t_break is not None else record_end) - t_pre
        spread = -np.expm1(-np.clip(t - t_pre, 0.0, None) / max(0.4 * lifetime, 1.0 / scene.fps_hz))
        base_lower = a0 + (a_inf - a0) * spread
        contact_angle = np.radians(70.0 - 30.0 * spread)
        cap_lower = np.minimum(base_lower * np.tan(contact_angle / 2), 0.7 * lower_room)

    tip = np.zeros(t.shape)
    if t_break is not None:
        fluid = scene.fluid
        speed = fluid.surface_tension / max(fluid.zero_shear_viscosity, 1e-9)   # visco-capillary
        if fluid.density > 0:                                                    # Taylor–Culick
            r_ref = max(0.05 * scene.initial_diameter_m / 2, px)
            culick = math.sqrt(2.0 * fluid.surface_tension / (fluid.density * r_ref))
            speed = 1.0 / (1.0 / speed + 1.0 / culick)
        tip = np.where(broken, 1.0 + speed / px * (t - t_break), 0.0)
        tip = np.minimum(tip, np.maximum(upper_room, lower_room))
    return _Timeline(time_s=np.asarray(times, float), phase=phase.astype(str), r_neck=r_neck,
                     z_upper=z_upper, z_lower=z_lower, z_neck=z_neck, cap_upper=cap_upper,
                     base_lower=base_lower, cap_lower=cap_lower, tip=tip,
                     pendant_length=pendant_length, end_radius=end, pendant_width=pendant_width,
                     r_start=r_start, style=style, geometry=scene.geometry,
                     free_thinning_start_s=t_free,
                     breakup_time_s=t_break)


# --- the liquid's radius profile -------------------------------------------------------------

#: Cone slopes of the inertial neck, towards the upper and the lower end.
INERTIAL_SLOPES = (0.35, 1.6)


def _core(zeta, side, r, r_start, end, style):
    """Neck core radius (px) at signed distance ``zeta`` from the neck (px); ``side`` is the
    distance from the neck to the end face on that side. Equals ``r`` at 0, larger elsewhere."""
    x = zeta / side
    if style == "elastic":       # a long thread, thickening only near the drops
        return r * (1.0 + 0.05 * x * x) + 0.06 * r_start * x ** 4
    if style == "viscous":       # a parabolic hourglass
        return r + max(0.6 * end - r, 0.0) * x * x
    room = max(0.7 * end - r, 1e-9)   # inertial: two cones, steeper towards the lower end
    k = np.where(zeta < 0.0, INERTIAL_SLOPES[0], INERTIAL_SLOPES[1])
    return r + room * np.tanh((np.sqrt(r * r + (k * zeta) ** 2) - r) / room)


def _cap(eta, base, height):
    """Radius (px) of a spherical-cap drop of ``base`` radius and ``height`` on a face, at
    distance ``eta`` from the face (0 beyond its top)."""
    if height <= 0.0 or base <= 0.0:
        return np.zeros_like(eta)
    rho = (base * base + height * height) / (2.0 * height)
    inside = (eta >= 0.0) & (eta <= height)
    return np.where(inside, np.sqrt(np.clip(rho * rho - (eta - (height - rho)) ** 2, 0.0, None)), 0.0)


def _radius(z, tl: _Timeline, i: int) -> np.ndarray:
    """Liquid radius (px) at image axial coordinates ``z`` in state ``i`` (0: no liquid)."""
    z = np.asarray(z, float)
    z_up, z_lo, end = tl.z_upper[i], tl.z_lower[i], tl.end_radius
    if tl.phase[i] == "pendant":
        half = 0.5 * tl.pendant_length[i]
        bulb = tl.pendant_width * np.sqrt(np.clip(1.0 - ((z - z_up - half) / half) ** 2, 0.0, None))
        collar = _cap(z - z_up, end, tl.cap_upper[i])
        r = (bulb ** JOIN_NORM + collar ** JOIN_NORM) ** (1.0 / JOIN_NORM)
        return np.where((z >= z_up) & (z <= z_up + 2 * half), r, 0.0)
    z_n, r_n = tl.z_neck[i], float(tl.r_neck[i])
    zeta = z - z_n
    side = np.where(zeta < 0.0, z_n - z_up, z_lo - z_n)
    core = _core(zeta, side, r_n, tl.r_start, end, tl.style)
    tip = tl.tip[i]
    if tip > 0.0:       # the halves' tips, rounded over a length that grows with their radius
        tips = _core(np.array([-tip, tip]), np.array([z_n - z_up, z_lo - z_n]), r_n, tl.r_start,
                     end, tl.style)
        length = 1.0 + 2.0 * np.where(zeta < 0.0, tips[0], tips[1])
        w = np.clip((np.abs(zeta) - tip) / length, 0.0, 1.0)
        core = core * np.sqrt(w * (2.0 - w))
    # each face drop's base is chosen so that the joined profile meets the rim at its radius
    faces = _core(np.array([z_up - z_n, z_lo - z_n]), np.array([z_n - z_up, z_lo - z_n]), r_n,
                  tl.r_start, end, tl.style)
    base_up = (end ** JOIN_NORM - faces[0] ** JOIN_NORM) ** (1.0 / JOIN_NORM)
    base_lo = tl.base_lower[i]          # a sessile drop on the substrate is not limited
    if tl.geometry == "plates":
        base_lo = (end ** JOIN_NORM - faces[1] ** JOIN_NORM) ** (1.0 / JOIN_NORM)
    drops = (_cap(z - z_up, base_up, tl.cap_upper[i]) ** JOIN_NORM
             + _cap(z_lo - z, base_lo, tl.cap_lower[i]) ** JOIN_NORM)
    r = (core ** JOIN_NORM + drops) ** (1.0 / JOIN_NORM)
    return np.where((z >= z_up) & (z <= z_lo), r, 0.0)


def _radius_and_slope(z, tl: _Timeline, i: int, dz: float = 0.01):
    """Radius (px) and |dR/dz| at ``z`` (central differences over ±``dz`` px)."""
    r = _radius(np.concatenate([z - dz, z, z + dz]), tl, i).reshape(3, -1)
    return r[1], np.abs(r[2] - r[0]) / (2.0 * dz)


def face_transmission(distance, depth, lit_pupil: float):
    """Light left at ``distance`` (px, > 0) in front of an opaque face reaching ``depth`` (px)
    out of the object plane on both sides, for a lit pupil of radius ``lit_pupil`` (direction
    cosines): the rays of slope |d_z/d_y| above distance/depth hit the face. Closed form for a
    uniform disk of directions (its part with |u_z| < c); the rays' sideways tilt is ignored."""
    distance = np.asarray(distance, float)
    c = np.clip(distance / np.hypot(distance, depth) / lit_pupil, 0.0, 1.0)
    return 1.0 - 2.0 / math.pi * (np.arccos(c) - c * np.sqrt(1.0 - c * c))


# --- the renderer ----------------------------------------------------------------------------

def _fringes(image: np.ndarray, optics: RayOptics, cell_m: float) -> np.ndarray:
    """Partially coherent light: the image's amplitude propagated ``fringe_distance_m`` by the
    paraxial Fresnel transfer function, its intensity smoothed by the backlight's angular size
    (the coherence envelope), mixed in by ``coherent_fraction``."""
    import cv2
    from scipy import fft

    z, lam = optics.fringe_distance_m, optics.wavelength_m
    pad = int(math.ceil(4.0 * math.sqrt(lam * z) / cell_m)) + 8
    field = np.sqrt(np.clip(np.pad(image, pad, mode="reflect"), 0.0, None)).astype(np.complex64)
    fy = fft.fftfreq(field.shape[0], d=cell_m)
    fx = fft.fftfreq(field.shape[1], d=cell_m)
    transfer = np.exp(-1j * math.pi * lam * z * (fy[:, None] ** 2 + fx[None, :] ** 2)).astype(np.complex64)
    propagated = fft.ifft2(fft.fft2(field, workers=1) * transfer, workers=1)
    coherent = (np.abs(propagated) ** 2).astype(np.float32)[pad:-pad, pad:-pad]
    envelope = z * math.tan(math.radians(optics.illumination_half_angle_deg)) / cell_m
    if envelope > 0.3:
        coherent = cv2.GaussianBlur(coherent, (0, 0), envelope, borderType=cv2.BORDER_REFLECT)
    g = np.float32(optics.coherent_fraction)
    return (1.0 - g) * image + g * coherent


@dataclass(frozen=True)
class _Camera:
    """Fixed properties of a record drawn from its seed (sensor orientation, px)."""

    gain: np.ndarray           # uneven backlight (float32, sensor shape)
    flicker: np.ndarray        # per-frame backlight factor
    texture: tuple             # (wave vectors (m, 2) rad/px, phases, drift (2,) px/frame)
    dust: tuple                # (start (2,) px, velocity (2,) px/frame)
    banding: tuple             # (phase at frame 0, phase step per frame), rad
    hot: np.ndarray            # flat indices of hot pixels
    dead: np.ndarray           # flat indices of dead pixels


def _camera(shape, n_frames: int, optics: RayOptics, seed: int) -> _Camera:
    rng = np.random.default_rng([seed, 0])
    height, width = shape
    yy, xx = np.mgrid[0:height, 0:width].astype(np.float32)
    half = 0.5 * math.hypot(height, width)
    phi = rng.uniform(0.0, 2.0 * math.pi)
    ramp = ((xx - width / 2) * math.cos(phi) + (yy - height / 2) * math.sin(phi)) / half
    cx, cy = width * rng.uniform(0.3, 0.7), height * rng.uniform(0.3, 0.7)
    vignette = ((xx - cx) ** 2 + (yy - cy) ** 2) / half ** 2
    gain = (1.0 + optics.uneven_light * (0.5 * ramp - vignette + 0.3)).astype(np.float32)
    flicker = 1.0 + optics.flicker * np.random.default_rng([seed, 1]).standard_normal(n_frames)
    m = 6
    wavelengths = rng.uniform(20.0, 90.0, m)
    angles = rng.uniform(0.0, 2.0 * math.pi, m)
    waves = np.stack([np.cos(angles), np.sin(angles)], -1) * (2.0 * math.pi / wavelengths)[:, None]
    drift_angle = rng.uniform(0.0, 2.0 * math.pi)
    drift = optics.texture_speed_px * np.array([math.cos(drift_angle), math.sin(drift_angle)])
    texture = (waves, rng.uniform(0.0, 2.0 * math.pi, m), drift)
    # the dust blob crosses the frame once over the record, through a random point
    through = np.array([rng.uniform(0.2, 0.8) * width, rng.uniform(0.2, 0.8) * height])
    heading = rng.uniform(0.0, 2.0 * math.pi)
    span = 2.0 * half + 4.0 * optics.dust_blob_radius_px
    velocity = span / max(n_frames, 1) * np.array([math.cos(heading), math.sin(heading)])
    dust = (through - 0.5 * n_frames * velocity, velocity)
    banding = (rng.uniform(0.0, 2.0 * math.pi), 2.0 * math.pi * rng.uniform(0.1, 0.4))
    stuck = rng.choice(height * width, size=min(optics.stuck_pixels, height * width), replace=False)
    n_hot = (stuck.size + 1) // 2
    return _Camera(gain=gain, flicker=flicker, texture=texture, dust=dust,
                   banding=banding, hot=stuck[:n_hot], dead=stuck[n_hot:])


class RayRenderer:
    """Frames and truth of one recording; frames in any order, each deterministic.

    ``frame(i)`` gives the sensor's frame ``i`` (uint8 / uint16); ``optical_image(i)``
    the light on the sensor before glare, backlight variations, noise and
    quantisation (float32, 1 = bare backlight), in the recording's orientation.
    """

    def __init__(self, scene: RayScene, optics: RayOptics, *, seed: int):
        self.scene, self.optics, self.seed = scene, optics, int(seed)
        self.model, self.n_frames = _model(scene)
        self.frame_times = np.arange(self.n_frames) / scene.fps_hz
        self.timeline = _timeline(scene, self.model, self.n_frames, self.frame_times)
        n_axis, n_across = scene.frame_size_px
        self.sensor_shape = (n_axis, n_across) if optics.orientation == "vertical" else (n_across, n_axis)
        self.camera = _camera(self.sensor_shape, self.n_frames, optics, self.seed)
        #: the filament axis' position across the frame (px, x of a vertical frame)
        self.axis_px = (n_across - 1) / 2 + float(np.random.default_rng([seed, 3]).uniform(-1.5, 1.5))
        self.truth = _truth(scene, optics, self.model, self.timeline, self.axis_px,
                            self.sensor_shape, self.seed)
        k = optics.supersample
        self._z = (np.arange(n_axis * k) + 0.5) / k - 0.5
        self._x_edges = np.arange(n_across * k + 1) / k - 0.5
        self._table = None
        self._phases = None
        # directions (cosines) in which the bare backlight is seen: the pupil or the source
        self._lit_pupil = min(optics.numerical_aperture,
                              math.sin(math.radians(optics.illumination_half_angle_deg)))
        self._penumbra_slope = self._lit_pupil / math.sqrt(1.0 - self._lit_pupil ** 2)
        self.max_value = 2 ** optics.bit_depth - 1
        self.dtype = np.uint8 if optics.bit_depth == 8 else np.uint16

    @property
    def table(self) -> TransmissionTable:
        """The recording's transmission table (built on first use, cached per process)."""
        if self._table is None:
            s, o, tl = self.scene, self.optics, self.timeline
            widest = max(tl.end_radius, float(tl.base_lower.max()), tl.pendant_width) * s.pixel_size_m
            self._table = transmission_table(
                round(s.refractive_index, 6), round(o.numerical_aperture, 6),
                round(o.illumination_half_angle_deg, 6),
                absorbance_max=round(s.absorption_per_m * widest, 6), pupil_samples=o.pupil_samples)
            self._slope_spline = _slope_spline(self._table)
        return self._table

    def _liquid(self, image, r, slope):
        """Write the liquid's light into the sub-pixel ``image`` (rows: sub-rows) in place.

        Rows are handled in groups of similar width, each over the columns it can reach.
        """
        rows = np.flatnonzero(r > 1e-4)
        if rows.size == 0:
            return
        reach = self.table.q_uniform[-1] * r[rows] + 1.0
        group = np.floor(np.log(reach) / math.log(1.4)).astype(int)
        for g in np.unique(group):
            mine = rows[group == g]
            self._liquid_rows(image, mine, r[mine], slope[mine], float(reach[group == g].max()))

    def _liquid_rows(self, image, rows, r, slope, reach):
        import cv2

        table, k = self.table, self.optics.supersample
        x_c = self.axis_px
        c0 = max(int(np.searchsorted(self._x_edges, x_c - reach)) - 1, 0)
        c1 = min(int(np.searchsorted(self._x_edges, x_c + reach)) + 1, self._x_edges.size - 1)
        offset = self._x_edges[c0:c1 + 1] - x_c
        rr = r.astype(np.float32)[:, None]
        q_scale = (table.q_uniform.size - 1) / table.q_uniform[-1]
        map_x = np.abs(offset).astype(np.float32)[None, :] * (np.float32(q_scale) / rr)
        n_slope = table.slope.size
        if table.absorbance.size == 1:
            slices = [(np.zeros(rows.size, int), None)]
        else:
            f = np.sqrt(np.clip(self.scene.absorption_per_m * r * self.scene.pixel_size_m
                                / table.absorbance[-1], 0.0, 1.0)) * (table.absorbance.size - 1)
            k0 = np.minimum(np.floor(f).astype(int), table.absorbance.size - 2)
            w = (f - k0).astype(np.float32)[:, None]
            slices = [(k0, 1.0 - w), (k0 + 1, w)]
        deficit = None
        map_y = np.empty(map_x.shape, np.float32)
        for slab, weight in slices:
            # rows j and j + 1, each read on its node (cv2's own vertical weights come in steps
            # of 1/32, and a two-channel remap is less precise), blended with the exact weight
            # of :func:`_slope_blend`
            j, w = _slope_blend(table, slope, slab, self._slope_spline)
            w = w.astype(np.float32)[:, None]
            for row, share in ((j, 1.0 - w), (j + 1, w)):
                map_y[...] = (slab * n_slope + row).astype(np.float32)[:, None]
                part = cv2.remap(table.deficit, map_x, map_y, cv2.INTER_LINEAR,
                                 borderMode=cv2.BORDER_REPLICATE)
                part *= share if weight is None else share * weight
                deficit = part if deficit is None else deficit + part
        # the running integral is odd in x − x_c: difference it per column, signed
        step = np.diff(deficit, axis=1)
        sign = np.sign(offset[1:] + offset[:-1]).astype(np.float32)
        step *= sign
        across = np.flatnonzero((offset[:-1] < 0) & (offset[1:] > 0))
        if across.size:
            m = across[0]
            step[:, m] = deficit[:, m + 1] + deficit[:, m]
        image[rows, c0:c1] = 1.0 - step * (rr * np.float32(k))

    def _solids(self, image, i, tl):
        """Darken the sub-pixel ``image`` by the plates (nozzle, substrate) of state ``i``."""
        k = self.optics.supersample
        cell = 1.0 / k
        z = self._z
        x_c, end = self.axis_px, tl.end_radius
        lo, hi = self._x_edges[:-1], self._x_edges[1:]
        across = (np.clip(np.minimum(hi, x_c + end) - np.maximum(lo, x_c - end), 0.0, None)
                  / cell).astype(np.float32)
        upper = np.clip((tl.z_upper[i] - (z - 0.5 * cell)) / cell, 0.0, 1.0)
        lower = np.clip(((z + 0.5 * cell) - tl.z_lower[i]) / cell, 0.0, 1.0)
        rows = np.flatnonzero(upper > 0)
        image[rows] *= 1.0 - upper[rows, None].astype(np.float32) * across
        rows = np.flatnonzero(lower > 0)
        plates = self.scene.geometry == "plates"
        if plates:
            image[rows] *= 1.0 - lower[rows, None].astype(np.float32) * across
        else:
            image[rows] *= (1.0 - lower[rows]).astype(np.float32)[:, None]
        # the faces of the discs (and of the nozzle) reach out of the object plane
        x = 0.5 * (lo + hi) - x_c
        depth = np.sqrt(np.clip(end * end - x * x, 0.0, None))
        for distance in (z - tl.z_upper[i], tl.z_lower[i] - z) if plates else (z - tl.z_upper[i],):
            near = np.flatnonzero((distance > 0.0) & (distance < depth.max() * self._penumbra_slope))
            if near.size:
                image[near] *= face_transmission(distance[near, None], depth[None, :],
                                                 self._lit_pupil).astype(np.float32)

    def _state_image(self, tl: _Timeline, i: int) -> np.ndarray:
        n_axis, n_across = self.scene.frame_size_px
        k = self.optics.supersample
        image = np.ones((n_axis * k, n_across * k), np.float32)
        # a sub-row straddling a face sees the liquid on its open part: sample it there
        half = 0.5 / k
        a = np.maximum(self._z - half, tl.z_upper[i])
        b = np.minimum(self._z + half, tl.z_lower[i])
        r, slope = _radius_and_slope(np.where(b > a, 0.5 * (a + b), self._z), tl, i)
        self._liquid(image, r, slope)
        self._solids(image, i, tl)
        return image

    def optical_image(self, i: int) -> np.ndarray:
        """Light on the sensor in frame ``i`` relative to the bare backlight (float32)."""
        import cv2

        o, s = self.optics, self.scene
        if o.exposure_fraction > 0 and o.sub_exposures > 1:
            spread = ((np.arange(o.sub_exposures) + 0.5) / o.sub_exposures - 0.5) * o.exposure_fraction
            tl = _timeline(s, self.model, self.n_frames, (i + spread) / s.fps_hz)
            image = sum(self._state_image(tl, j) for j in range(o.sub_exposures)) / o.sub_exposures
        else:
            image = self._state_image(self.timeline, i)
        k = o.supersample
        if o.coherent_fraction > 0:
            image = _fringes(image, o, s.pixel_size_m / k)
        if self._phases is None:
            self._phases = _pixel_phases(psf_kernel(o, s.pixel_size_m), k)
        # the PSF and the pixels' box integration, evaluated at pixel resolution only
        out = None
        for p, q, weights, anchor in self._phases:
            part = cv2.filter2D(np.ascontiguousarray(image[p::k, q::k]), -1, weights, anchor=anchor,
                                borderType=cv2.BORDER_REPLICATE)
            out = part if out is None else out + part
        image = out
        return np.ascontiguousarray(image.T) if o.orientation == "horizontal" else image

    def frame(self, i: int) -> np.ndarray:
        """Frame ``i`` as the camera stores it (2-D uint8, or uint16 for 12/16 bits)."""
        o, cam = self.optics, self.camera
        light = self.optical_image(i)
        if o.veiling_glare > 0:
            light = np.float32(o.veiling_glare) + np.float32(1.0 - o.veiling_glare) * light
        light *= np.float32(o.background_level * cam.flicker[i])
        if o.uneven_light > 0:
            light *= cam.gain
        height, width = self.sensor_shape
        if o.texture_amplitude > 0:
            waves, phases, drift = cam.texture
            yy, xx = np.mgrid[0:height, 0:width].astype(np.float32)
            field = np.zeros((height, width), np.float32)
            for (kx, ky), ph in zip(waves, phases):
                field += np.cos(kx * (xx - drift[0] * i) + ky * (yy - drift[1] * i) + ph)
            light *= 1.0 + np.float32(o.texture_amplitude * math.sqrt(2.0 / len(phases))) * field
        if o.dust_blob_depth > 0:
            start, velocity = cam.dust
            cx, cy = start + velocity * i
            yy, xx = np.mgrid[0:height, 0:width].astype(np.float32)
            blob = np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / np.float32(2.0 * o.dust_blob_radius_px ** 2))
            light *= 1.0 - np.float32(o.dust_blob_depth) * blob
        if o.banding_amplitude > 0:
            phase0, step = cam.banding
            wave = np.tanh(3.0 * np.sin(2.0 * math.pi * np.arange(height) / o.banding_period_px
                                        + phase0 + step * i)) / math.tanh(3.0)
            light *= (1.0 + o.banding_amplitude * wave).astype(np.float32)[:, None]
        if o.full_well > 0 or o.read_noise > 0:
            if o.full_well > 0:
                spread = np.maximum(light, 0.0)
                spread *= np.float32(1.0 / o.full_well)
                spread += np.float32(o.read_noise ** 2)
                np.sqrt(spread, out=spread)
            else:
                spread = np.float32(o.read_noise)
            noise = np.random.default_rng([self.seed, 2, i]).standard_normal(light.shape, np.float32)
            noise *= spread
            light += noise
        light *= np.float32(self.max_value)
        np.rint(light, out=light)
        np.clip(light, 0, self.max_value, out=light)
        out = light.astype(self.dtype)
        flat = out.reshape(-1)
        flat[cam.hot] = self.max_value
        flat[cam.dead] = 0
        return out


def _truth(scene: RayScene, optics: RayOptics, hist, tl: _Timeline, axis_px: float, shape,
           seed: int) -> Truth:
    n = tl.time_s.size
    px = scene.pixel_size_m
    no_thread = np.isin(tl.phase, ("broken", "pendant"))
    diameter_m = np.where(no_thread, np.nan, 2.0 * tl.r_neck * px)
    free = tl.phase == "free"
    # free thinning: the model's diameter itself, not a round trip through pixels
    if free.any():
        diameter_m[free] = hist.diameter_at(tl.time_s[free] - tl.free_thinning_start_s)
    fluid = scene.fluid
    scene_dict = dataclasses.asdict(scene)
    scene_dict["frame_size_px"] = list(scene.frame_size_px)
    scene_dict["neck_style"] = scene.neck_style
    return Truth(
        frame=np.arange(n), time_s=tl.time_s, diameter_m=diameter_m, diameter_px=diameter_m / px,
        neck_position_px=np.where(no_thread, np.nan, tl.z_neck),
        neck_cross_px=np.where(no_thread, np.nan, axis_px), axis_angle_deg=np.zeros(n),
        upper_end_px=tl.z_upper, lower_end_px=tl.z_lower, phase=tl.phase,
        fps_hz=float(scene.fps_hz), pixel_size_m=float(px),
        plate_diameter_m=float(scene.plate_diameter_m),
        initial_diameter_m=float(scene.initial_diameter_m),
        free_thinning_start_s=float(tl.free_thinning_start_s), breakup_time_s=tl.breakup_time_s,
        relaxation_time_s=float(fluid.relaxation_time) if fluid.polymer_modulus > 0 else None,
        fluid={**dataclasses.asdict(fluid), "zero_shear_viscosity": fluid.zero_shear_viscosity,
               "terminal_extensional_viscosity": fluid.terminal_extensional_viscosity},
        geometry=scene.geometry, orientation=optics.orientation, frame_shape=tuple(shape),
        bit_depth=optics.bit_depth, dtype="uint8" if optics.bit_depth == 8 else "uint16",
        optics={**dataclasses.asdict(optics), "renderer": RENDERER, "lens": "object-side telecentric",
                "airy_radius_px": J1_FIRST_ZERO / (2.0 * math.pi) * optics.wavelength_m
                / optics.numerical_aperture / px},
        scene=scene_dict, seed=int(seed),
    )


def render_recording(scene: RayScene, optics: RayOptics, *, seed: int) -> tuple[Iterator[np.ndarray], Truth]:
    """Frames (a generator of 2-D uint8/uint16 arrays, streamed in constant memory) and the
    truth of a recording. Deterministic: the same arguments give identical frames."""
    renderer = RayRenderer(scene, optics, seed=seed)

    def frames():
        for i in range(renderer.n_frames):
            yield renderer.frame(i)

    return frames(), renderer.truth


def write_recording(scene: RayScene, optics: RayOptics, path, *, fmt: str, seed: int,
                    quality: int = 90, playback_fps: float = 25.0) -> Truth:
    """Render and write a recording in any of :data:`thinning.synth_io.FORMATS`; the truth goes
    to ``<file>.truth.json`` or ``<folder>/truth.json``. See :func:`thinning.synth_io.write_frames`."""
    check_format(fmt, optics.bit_depth, playback_fps)
    path = Path(path)
    frames, truth = render_recording(scene, optics, seed=seed)
    write_frames(frames, path, fmt=fmt, n_frames=truth.n_frames, frame_shape=truth.frame_shape,
                 bit_depth=optics.bit_depth, quality=quality, playback_fps=playback_fps)
    write_truth(truth, path / "truth.json" if fmt == "png-folder" else truth_path(path))
    return truth


# --- random cases for probes and coverage tests ----------------------------------------------

#: The real-footage artefacts the "artefacts" family draws one or two of.
ARTEFACTS = ("coherence", "texture", "dust", "banding", "stuck", "low-contrast", "uneven", "flicker")


def _log_uniform(rng, lo, hi):
    return float(math.exp(rng.uniform(math.log(lo), math.log(hi))))


def elastic_window_s(hist, relaxation_time: float, tolerance: float = 0.25) -> float:
    """Longest span (s) over which the model thins at ε̇ = 2/(3λ) within ``tolerance``
    (relative), i.e. the elasto-capillary window of a history from :func:`laws.filament_model`."""
    t, d = hist.time_s, hist.diameter_m
    rate = -np.gradient(np.log(d), t) * 3.0 * relaxation_time
    inside = np.abs(rate - 1.0) < tolerance
    best, start = 0.0, None
    for k, flag in enumerate(np.append(inside, False)):
        if flag and start is None:
            start = k
        elif not flag and start is not None:
            best = max(best, t[k - 1] - t[start])
            start = None
    return float(best)


def _draw_fluid(rng, kind: str, d0: float):
    """A fluid of ``kind`` ("elastic", "viscous", "inertial") for initial diameter d0, or None."""
    sigma = rng.uniform(0.020, 0.075)
    rho = rng.uniform(800.0, 1300.0)
    if kind == "elastic":
        eta = _log_uniform(rng, 1e-3, 10.0)
        lam = _log_uniform(rng, 3e-4, 1.0)
        g = _log_uniform(rng, 0.5, 100.0)
        if g * d0 / (4.0 * sigma) > 0.5 or laws.elasto_capillary_number(
                lam, d0 / 2, surface_tension=sigma, viscosity=eta + g * lam) < 1.0:
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
    still = family == "newtonian-still"
    if still:
        kind = str(rng.choice(["viscous", "inertial"]))
    else:
        kind = "elastic" if rng.random() < 0.6 else str(rng.choice(["viscous", "inertial"]))
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
    n_index = (rng.uniform(1.33, 1.36) if rng.random() < 0.5 else rng.uniform(1.47, 1.50)) if wide \
        else rng.uniform(1.33, 1.50)
    absorb = rng.random() < (0.3 if wide else 0.15)
    base = RayScene(fluid=fluid, geometry="dripping" if dripping else "plates", plate_diameter_m=plate,
                    initial_diameter_m=d0, gap_m=gap, pixel_size_m=px, fps_hz=1000.0,
                    frame_size_px=(n_axis, n_across), refractive_index=n_index,
                    absorption_per_m=rng.uniform(0.05, 1.0 if wide else 0.5) / d0 if absorb else 0.0,
                    sag=rng.uniform(0.03, 0.2) if rng.random() < 0.4 else 0.0)
    hist, _ = _model(base)
    life = hist.breakup_time_s
    changes = {}
    if not still and (dripping or rng.random() < 0.6):
        changes["stretch_duration_s"] = rng.uniform(0.05, 0.2) * life
        if dripping or rng.random() < 0.5:
            changes["pre_roll_s"] = rng.uniform(0.02, 0.08) * life
        if not dripping:
            changes["stretch_ratio"] = rng.uniform(1.8, min(4.0, (0.8 * plate / d0) ** 2))
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


def _draw_optics(rng, family: str, scene: RayScene) -> RayOptics:
    px = scene.pixel_size_m
    lam = rng.uniform(0.45e-6, 0.65e-6)
    # lenses matched to the pixels: Airy radius 0.25–2 px, NA within 0.02–0.2
    na_lo, na_hi = max(0.02, 0.61 * lam / (2.0 * px)), min(0.2, 0.61 * lam / (0.25 * px))
    if family == "refraction":
        na = _log_uniform(rng, na_lo, min(na_hi, 1.3 * na_lo)) if rng.random() < 0.5 \
            else _log_uniform(rng, max(na_lo, na_hi / 1.3), na_hi)
        beta = rng.uniform(0.2, 0.4) if rng.random() < 0.5 else rng.uniform(30.0, 40.0)
    else:
        na = _log_uniform(rng, na_lo, na_hi)
        pick = rng.random()
        beta = rng.uniform(0.2, 1.0) if pick < 0.4 else _log_uniform(rng, 1.0, 10.0) if pick < 0.7 \
            else rng.uniform(10.0, 40.0)
    alpha = math.asin(na)
    o = dict(numerical_aperture=na, wavelength_m=lam, illumination_half_angle_deg=beta,
             orientation=str(rng.choice(ORIENTATIONS)),
             bit_depth=int(rng.choice([8, 8, 8, 12, 16])), background_level=rng.uniform(0.6, 0.9),
             full_well=_log_uniform(rng, 5e3, 4e4), read_noise=rng.uniform(0.001, 0.006))
    if rng.random() < 0.4:
        o["defocus_m"] = float(rng.choice([-1.0, 1.0])) * rng.uniform(0.3, 2.0) * px / math.tan(alpha)
    if rng.random() < 0.2:
        o["exposure_fraction"] = rng.uniform(0.2, 1.0)
        o["sub_exposures"] = 4
    if family == "artefacts":
        for name in rng.choice(ARTEFACTS, size=int(rng.integers(1, 3)), replace=False):
            if name == "coherence":      # fringes survive only under collimated light
                o.update(coherent_fraction=rng.uniform(0.5, 1.0), fringe_distance_m=rng.uniform(50e-6, 400e-6),
                         illumination_half_angle_deg=rng.uniform(0.2, 0.6))
            elif name == "texture":
                o.update(texture_amplitude=rng.uniform(0.01, 0.04), texture_speed_px=rng.uniform(0.3, 3.0))
            elif name == "dust":
                o.update(dust_blob_depth=rng.uniform(0.1, 0.4), dust_blob_radius_px=rng.uniform(6.0, 25.0))
            elif name == "banding":
                o.update(banding_amplitude=rng.uniform(0.02, 0.08), banding_period_px=rng.uniform(16.0, 96.0))
            elif name == "stuck":
                o.update(stuck_pixels=int(rng.integers(5, 60)))
            elif name == "low-contrast":  # the thread only ~25 grey levels (of 255) below the light
                o.update(veiling_glare=1.0 - rng.uniform(20.0, 30.0) / (255.0 * o["background_level"]))
            elif name == "uneven":
                o.update(uneven_light=rng.uniform(0.1, 0.4))
            else:
                o.update(flicker=rng.uniform(0.01, 0.05))
    return RayOptics(**o)


def random_case(seed: int, *, family: str = "regular") -> tuple[RayScene, RayOptics]:
    """A (scene, optics) drawn across the parameter ranges of ``family`` (deterministic per seed).

    Common ranges: pixel 2–20 µm; plate / nozzle 0.5–6 mm (30–75 % of the frame's
    width); frames ≤ 512 × 512; σ 20–75 mN/m; ρ 800–1300 kg/m³; n 1.33–1.50;
    NA 0.02–0.2 matched to the pixel (Airy radius 0.25–2 px); λ 0.45–0.65 µm;
    records of about 110–600 frames ending 10 frames after breakup, elastic
    windows ≥ 16 frames; shot and read noise; 8/12/16 bits. Families:

    - ``"regular"``: elastic (60 %: η_s 1 mPa·s–10 Pa·s, λ 0.3 ms–1 s, G 0.5–100 Pa,
      FENE or Oldroyd-B) and Newtonian (viscous η 0.05–10 Pa·s, Oh > 0.5; inertial
      1–20 mPa·s, Oh < 0.2) liquids, plates (step stretch or still) and dripping,
      both orientations, collimated / intermediate / diffuse backlight (β 0.2–40°),
      defocus (blur disk 0.3–2 px), motion blur, sag, dye;
    - ``"artefacts"``: as regular, plus one or two of :data:`ARTEFACTS`;
    - ``"refraction"``: wide threads (D0 ≥ 80 px) with n near 1.33 or 1.50, NA at
      either end of its range, β 0.2–0.4° or 30–40°, dye in 30 %;
    - ``"newtonian-still"``: viscous or inertial Newtonian liquids between still
      plates, free thinning from frame 0.
    """
    if family not in FAMILIES:
        raise ValueError(f"family must be one of {FAMILIES}, not {family!r}")
    rng = np.random.default_rng([int(seed), FAMILIES.index(family), 11])
    for _ in range(500):
        scene = _draw_scene(rng, family)
        if scene is not None:
            return scene, _draw_optics(rng, family, scene)
    raise RuntimeError(f"no {family} case drawn for seed {seed}")
