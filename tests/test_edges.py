"""Sub-pixel edges and layout on simple rendered frames (thinning.measure.layout, rows, profile)."""

import math

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter
from skimage.measure import find_contours

from thinning.measure import NoFilament, find_layout, locate_edges
from thinning.measure.rows import DETECT_LEVEL

BACKLIGHT = 200.0
SHADOW = 0.05  # shadow level as a fraction of the backlight


def render(*, height=200, width=160, plate=20, plate_width=100.0, neck=10.0, tilt_deg=0.0,
           blur=1.0, noise=0.0, streak=0.0, light_slope=0.0, seed=0, horizontal=False):
    """A liquid bridge between two plates: analytic pixel coverage, Gaussian blur, noise.

    The bridge radius is neck/2 + (plate_width − neck)/2 · u⁴ (u = distance
    from the mid-plane over half the gap); ``streak`` brightens the central
    30 % of wide sections (a transparent thread's lens streak); ``light_slope``
    is a linear gradient of the backlight across the frame (fraction per frame width).
    """
    cx, yc = width / 2 + 0.3, height / 2 + 0.27
    half_gap = (height - 2 * plate) / 2
    tan = math.tan(math.radians(tilt_deg))
    cos = math.cos(math.radians(tilt_deg))
    x = np.arange(width)

    def coverage(lo, hi):
        return np.clip(np.minimum(x + 0.5, hi[:, None]) - np.maximum(x - 0.5, lo[:, None]), 0, 1)

    occ = np.zeros((height, width))
    core = np.zeros((height, width))
    for s in range(8):
        y = np.arange(height) + (s + 0.5) / 8 - 0.5
        u = np.clip(np.abs(y - yc) / half_gap, 0, 1)
        r = neck / 2 + (plate_width - neck) / 2 * u ** 4
        c = cx + tan * (y - yc)
        in_plate = (y < plate) | (y >= height - plate)
        lo = np.where(in_plate, cx - plate_width / 2, c - r / cos)
        hi = np.where(in_plate, cx + plate_width / 2, c + r / cos)
        occ += coverage(lo, hi) / 8
        wide = ~in_plate & (2 * r > 12)
        core += coverage(c - 0.15 * r, c + 0.15 * r) * wide[:, None] / 8
    image = gaussian_filter(occ - streak * core, blur, mode="nearest")
    light = BACKLIGHT * (1 + light_slope * (x / width - 0.5))[None, :]
    frame = light * (1 - (1 - SHADOW) * image)
    frame += np.random.default_rng(seed).normal(0, noise * BACKLIGHT, frame.shape)
    frame = np.clip(np.round(frame), 0, 255).astype(np.uint8)
    return frame.T.copy() if horizontal else frame


def contour_edges(frame, levels_fraction=SHADOW):
    """Left/right half-intensity crossings per row from scikit-image's marching squares."""
    norm = (frame.astype(float) / BACKLIGHT - levels_fraction) / (1 - levels_fraction)
    crossings = {}
    for contour in find_contours(norm, 0.5):
        on_row = np.abs(contour[:, 0] - np.round(contour[:, 0])) < 1e-9
        for r, c in contour[on_row]:
            crossings.setdefault(int(round(r)), []).append(c)
    return {r: (min(c), max(c)) for r, c in crossings.items() if len(c) >= 2}


@pytest.mark.parametrize("blur", [0.7, 1.0, 1.5])
@pytest.mark.parametrize("neck", [8.0, 24.0])
def test_edges_agree_with_scikit_image_half_intensity_contour(blur, neck):
    # Outside reference: scikit-image's skimage.measure.find_contours (marching squares with
    # linear interpolation) at the half-intensity level of the normalised frame. For threads
    # wider than ~3 blur sigmas the half-intensity width equals the true width (docs/physics.md §8),
    # so both methods must give the same edges there.
    frame = render(neck=neck, blur=blur)
    layout = find_layout(frame)
    profile = locate_edges(frame, layout)
    reference = contour_edges(frame)
    # rows whose edges run nearly along the axis (slope < 0.3 px/row): on strongly curved,
    # slanted edges 2-D blur moves a half-intensity contour (curvature bias) by itself
    slope = np.abs(np.gradient(profile.left_px))
    rows = [i for i, y in enumerate(profile.axial_px.astype(int))
            if profile.valid[i] and y in reference and slope[i] < 0.3]
    assert len(rows) > 50
    left = np.array([reference[int(profile.axial_px[i])][0] for i in rows])
    right = np.array([reference[int(profile.axial_px[i])][1] for i in rows])
    assert np.max(np.abs(profile.left_px[rows] - left)) < 0.1
    assert np.max(np.abs(profile.right_px[rows] - right)) < 0.1


def test_layout_of_plates():
    frame = render(plate_width=100.0, blur=1.0, noise=0.01)
    layout = find_layout(frame)
    assert layout.orientation == "vertical"
    assert layout.plate_width_px == pytest.approx(100.0, abs=0.15)
    assert layout.thread_span[0] in range(19, 23) and layout.thread_span[1] in range(178, 182)
    assert 0.7 < layout.blur_sigma_px < 1.4
    assert layout.shadow_fraction == pytest.approx(SHADOW, abs=0.01)


def test_horizontal_filament_is_measured_along_x():
    frame = render(neck=12.0, blur=1.0, horizontal=True)
    layout = find_layout(frame)
    assert layout.orientation == "horizontal"
    profile = locate_edges(frame, layout)
    i = np.nanargmin(np.where(profile.valid, profile.width_px, np.nan))
    assert profile.width_px[i] == pytest.approx(12.0, abs=0.05)
    assert abs(profile.axial_px[i] - 100.27) < 8


@pytest.mark.parametrize("view,horizontal", [(np.s_[:, 35:], False), (np.s_[:, :125], False),
                                             (np.s_[35:, :], True)],
                         ids=["left-cut", "right-cut", "horizontal-top-cut"])
def test_plates_wider_than_the_view_on_one_side(view, horizontal):
    # zoomed on the thread, the plates may run out of the frame on one side: the axis is still
    # the one joining the plates, the neck is measured, and a cut plate is no width reference
    frame = render(neck=12.0, blur=1.0, horizontal=horizontal)
    frame = np.ascontiguousarray(frame[view])
    layout = find_layout(frame)
    assert layout.orientation == ("horizontal" if horizontal else "vertical")
    assert layout.plate_width_px is None
    profile = locate_edges(frame, layout)
    i = np.nanargmin(np.where(profile.valid, profile.width_px, np.nan))
    assert profile.width_px[i] == pytest.approx(12.0, abs=0.05)


@pytest.mark.parametrize("neck,blur", [(3.0, 2.0), (4.0, 1.5), (6.0, 0.5)])
def test_thin_blurred_thread_keeps_its_width(neck, blur):
    # a 50 % threshold loses ~40 % of a 1.5-sigma thread (docs/physics.md §8 table); the
    # integrated deficit does not
    frame = render(neck=neck, blur=blur)
    profile = locate_edges(frame, find_layout(frame))
    i = np.nanargmin(np.where(profile.valid, profile.width_px, np.nan))
    assert profile.width_px[i] == pytest.approx(neck, abs=0.05)
    if neck < 3 * blur:
        assert profile.contrast[i] < 0.9


def test_tilted_thread_is_measured_across_its_axis():
    # this renderer tilts the bridge but not its plates: leave the plates out of the region
    frame = render(neck=10.0, tilt_deg=4.0, blur=1.0)
    profile = locate_edges(frame, find_layout(frame, roi=(0, 30, 160, 170)))
    i = np.nanargmin(np.where(profile.valid, profile.width_px, np.nan))
    assert profile.angle_deg == pytest.approx(4.0, abs=0.3)
    assert profile.cut_width_px[i] == pytest.approx(10.0 / math.cos(math.radians(4.0)), abs=0.05)
    assert profile.width_px[i] == pytest.approx(10.0, abs=0.05)


def test_lens_streak_and_uneven_light_do_not_split_the_thread():
    frame = render(neck=30.0, streak=0.7, light_slope=0.3, blur=1.0)
    profile = locate_edges(frame, find_layout(frame))
    i = np.nanargmin(np.where(profile.valid, profile.width_px, np.nan))
    assert profile.width_px[i] == pytest.approx(30.0, abs=0.1)
    assert profile.connected


def test_gap_in_the_thread_is_not_connected():
    frame = render(neck=10.0)
    frame[95:105] = int(BACKLIGHT)
    profile = locate_edges(frame, find_layout(render(neck=10.0)))
    assert not profile.connected
    assert not profile.present[profile.axial_px == 100].any()


def test_blank_frame_has_no_filament():
    rng = np.random.default_rng(3)
    frame = np.clip(rng.normal(200, 2, (120, 100)), 0, 255).astype(np.uint8)
    with pytest.raises(NoFilament, match="No filament"):
        find_layout(frame)


def test_roi_restricts_the_layout():
    frame = render(neck=10.0)
    layout = find_layout(frame, roi=(20, 40, 140, 160))
    assert layout.roi == (20, 40, 140, 160)
    assert layout.plate_width_px is None
    assert layout.thread_span == (40, 160)
    profile = locate_edges(frame, layout)
    assert profile.axial_px[0] == 40 and profile.axial_px[-1] == 159
    i = np.nanargmin(np.where(profile.valid, profile.width_px, np.nan))
    assert profile.width_px[i] == pytest.approx(10.0, abs=0.05)


@pytest.mark.parametrize("neck,blur", [(4.0, 1.0), (12.0, 2.0), (40.0, 0.7)])
def test_per_frame_path_matches_the_full_row_method(neck, blur):
    # the per-frame path (edge zones only, light field) and the full-row method (deficit on
    # every pixel, light interpolated between the margins) must give the same widths
    from dataclasses import replace

    frame = render(neck=neck, blur=blur, noise=0.005, seed=4)
    layout = find_layout(frame)
    # one detection level for both (the stream's own is lower; the method is the same)
    fast = locate_edges(frame, layout, detect_level=DETECT_LEVEL)
    full = locate_edges(frame, replace(layout, light=None), detect_level=DETECT_LEVEL)
    slope = np.abs(np.gradient(full.left_px))
    rows = fast.valid & full.valid & (slope < 0.3)  # edges along the axis (see above)
    assert rows.sum() > 50
    assert np.max(np.abs(fast.cut_width_px[rows] - full.cut_width_px[rows])) < 0.05
    assert np.max(np.abs(fast.left_px[rows] - full.left_px[rows])) < 0.1


def test_dust_speck_beside_the_thread_is_not_part_of_it():
    frame = render(neck=8.0, blur=1.0)
    layout = find_layout(frame)
    speck = frame.copy()
    speck[96:104, 64:68] = 120  # a dark speck 8 px left of the thread, after the layout
    profile = locate_edges(speck, layout)
    rows = (profile.axial_px >= 96) & (profile.axial_px < 104)
    assert np.all(np.abs(profile.cut_width_px[rows] - 8.0) < 0.2)


def test_compiled_row_pass_matches_the_numpy_path(beaded_recording, monkeypatch):
    # the compiled row pass (thinning/measure/_rowscan.c) and the numpy path are two codings of one
    # method: the same rows, widths and centres to float32 rounding, frame for frame
    from thinning.measure import compiled as compiled_pass
    from thinning.measure.rows import measure_block

    frames = beaded_recording
    compiled = measure_block(frames, find_layout(frames[0]))
    monkeypatch.setattr(compiled_pass, "COMPILED", False)
    plain = measure_block(frames, find_layout(frames[0]))  # its own cache of threshold maps
    assert (~compiled.has).any() and compiled.has.any()  # thick, thin and broken rows
    for key in ("has", "truncated", "core_n", "light", "gain"):
        assert np.array_equal(getattr(compiled, key), getattr(plain, key)), key
    for key in ("cut_width", "peak", "rim_ratio"):
        a, b = getattr(compiled, key), getattr(plain, key)
        assert np.array_equal(np.isnan(a), np.isnan(b)), key
        assert np.nanmax(np.abs(a - b)) < 1e-4, key
    # a centre is defined to float32 rounding where the row holds some shadow
    shadow = np.abs(plain.cut_width) > 0.5
    assert np.max(np.abs(compiled.centre - plain.centre)[shadow]) < 1e-4


def test_a_partially_coherent_straight_edge_is_placed_at_its_geometric_edge():
    # Fresnel diffraction at a straight edge in coherent light (Born & Wolf, Principles of Optics,
    # from memory): the geometric edge gets a quarter of the light, the first bright fringe 1.37 of
    # it; incoherent light puts half the light there. Half and half here: the half-level crossing
    # sits outside the edge, and the bright overshoot tells the level to use instead.
    # Coherent part: I(v) = ((C(v) + 1/2)^2 + (S(v) + 1/2)^2) / 2, v into the light.
    from scipy.ndimage import gaussian_filter1d
    from scipy.special import erf, fresnel

    from thinning.measure.liquid import _rim_edge

    x = np.arange(-0.45, 119.5, 0.1)  # rendered finely, then averaged over pixels (centres at i)
    left, right, scale, share = 40.3, 80.3, 1.6, 0.5
    outside = np.maximum(left - x, x - right)
    s, c = fresnel(outside / scale)
    # (the backlight's angular size smooths the coherent fringes: 1 px, as in thinning.raysynth)
    coherent = gaussian_filter1d(0.5 * ((c + 0.5) ** 2 + (s + 0.5) ** 2), 10.0)
    incoherent = 0.5 * (1.0 + erf(outside / (0.7 * np.sqrt(2.0))))
    light = (share * coherent + (1.0 - share) * incoherent).reshape(-1, 10).mean(axis=1)
    x = np.arange(120, dtype=float)
    deficit = (1.0 - light)[None, None, :].astype(np.float32)
    dark = np.flatnonzero(deficit[0, 0] > 0.5)
    lj, rj = np.array([[dark[0]]]), np.array([[dark[-1]]])
    edge_l, ok_l = _rim_edge(deficit, lj, rj, 4, 4, inward=+1, depth=1.0)
    edge_r, ok_r = _rim_edge(deficit, rj, lj, 4, 4, inward=-1, depth=1.0)
    assert ok_l[0, 0] and ok_r[0, 0]
    # within 0.12 px (measured 0.01 and 0.10, the pixel phase); taking the coherent share for
    # the whole light (level 0.75) would put both edges about 0.3 px inside
    assert abs(edge_l[0, 0] - left) <= 0.12 and abs(edge_r[0, 0] - right) <= 0.12
