"""Tests of the synthetic recordings: truth, unbiased rendering, determinism, file formats."""

import dataclasses
import json
import tracemalloc

import cv2
import numpy as np
import pytest
import tifffile

from thinning import laws, raysynth, synth

CLEAN = synth.Optics(blur_sigma_px=1.0, uneven_light=0.0, flicker=0.0, shot_noise=False,
                     read_noise=0.0, dust_specks=0, jitter_px=0.0, lens_streak=False, bit_depth=16)


def small_scene(**overrides):
    """A quick polymer bridge in 96 × 80 frames."""
    base = dict(plate_diameter_m=0.6e-3, initial_diameter_m=0.3e-3, pixel_size_m=10e-6,
                fps_hz=20000.0, frame_size_px=(96, 80), n_frames=40)
    return synth.dilute_polymer_plates(**{**base, **overrides})


def read_video(path):
    cap = cv2.VideoCapture(str(path), cv2.CAP_FFMPEG, [cv2.CAP_PROP_CONVERT_RGB, 0])
    frames = []
    while True:
        ok, frame = cap.read()
        if not ok:
            break
        frames.append(frame)
    cap.release()
    return frames


def half_intensity_width(row, background, shadow):
    """Width (px) between the two 50 % crossings of a dark band, linear interpolation
    (common practice; unbiased for a symmetric PSF and a wide object, docs/physics.md §8)."""
    level = 0.5 * (background + shadow)
    dark = np.flatnonzero(row < level)
    lo, hi = dark[0], dark[-1]
    left = lo - 1 + (row[lo - 1] - level) / (row[lo - 1] - row[lo])
    right = hi + (row[hi] - level) / (row[hi] - row[hi + 1])
    return right - left


def test_truth_diameter_is_the_model():
    scene = synth.dilute_polymer_plates(n_frames=None, pre_roll_s=0.5e-3, stretch_duration_s=2e-3)
    _, truth = synth.render_recording(scene, synth.Optics(), seed=0)
    # independent run of the shared 0-D model
    hist = laws.filament_model(scene.fluid, scene.initial_diameter_m, duration=1.0,
                               initial_conformation=scene.initial_conformation)
    t_ft = scene.pre_roll_s + scene.stretch_duration_s
    assert truth.free_thinning_start_s == pytest.approx(t_ft)
    free = truth.phase == "free"
    expected = hist.diameter_at(truth.time_s[free] - t_ft)
    # another integration span gives another output grid: log-linear interpolation differs ~1e-5
    np.testing.assert_allclose(truth.diameter_m[free], expected, rtol=1e-4)
    assert truth.breakup_time_s == pytest.approx(t_ft + hist.breakup_time_s, rel=1e-4)
    broken = truth.time_s >= truth.breakup_time_s
    assert broken.sum() >= 5 and np.all(np.isnan(truth.diameter_m[broken]))
    assert np.all(np.isfinite(truth.diameter_m[~broken]))
    # before free thinning the bridge is wider than D0, and thins towards it
    pre = truth.time_s < t_ft
    assert np.all(truth.diameter_m[pre] >= scene.initial_diameter_m * (1 - 1e-12))
    assert truth.relaxation_time_s == scene.fluid.relaxation_time
    assert np.all(truth.diameter_px[free] == truth.diameter_m[free] / scene.pixel_size_m)


def test_newtonian_truth_has_no_relaxation_time():
    _, truth = synth.render_recording(synth.newtonian_viscous_plates(), synth.Optics(), seed=0)
    assert truth.relaxation_time_s is None
    assert truth.breakup_time_s is not None
    assert truth.time_s[-1] > truth.breakup_time_s


@pytest.mark.parametrize("orientation", ["vertical", "horizontal"])
@pytest.mark.parametrize("kind", ["gaussian", "disk", "lorentzian"])
def test_half_intensity_width_is_unbiased(orientation, kind):
    optics = dataclasses.replace(CLEAN, blur_kind=kind, orientation=orientation)
    scene = synth.dilute_polymer_plates(n_frames=None)
    frames, truth = synth.render_recording(scene, optics, seed=1)
    # the first free-thinning frame whose thread is 30–60 px wide: wide and straight
    target = np.flatnonzero((truth.diameter_px > 30) & (truth.diameter_px < 60)
                            & (truth.phase == "free"))[-1]
    for i, frame in enumerate(frames):
        if i == target:
            break
    image = frame.astype(float) if orientation == "vertical" else frame.T.astype(float)
    row = image[int(round(truth.neck_position_px[i]))]
    top = int(round(truth.upper_end_px[i])) - 3
    background = np.median(image[:, :5])
    shadow = np.median(image[max(top - 20, 0):top, image.shape[1] // 2 - 5:image.shape[1] // 2 + 5])
    width = half_intensity_width(row, background, shadow)
    assert width == pytest.approx(truth.diameter_px[i], abs=0.1)


def test_jitter_moves_the_neck_not_the_diameter():
    scene = small_scene()
    _, still = synth.render_recording(scene, dataclasses.replace(CLEAN, jitter_px=0.0), seed=4)
    _, shaky = synth.render_recording(scene, dataclasses.replace(CLEAN, jitter_px=0.5), seed=4)
    np.testing.assert_array_equal(still.diameter_m, shaky.diameter_m)
    shift = shaky.neck_position_px - still.neck_position_px
    assert 0.2 < np.nanstd(shift) < 1.0


def test_recording_is_deterministic(tmp_path):
    scene, optics = small_scene(), synth.Optics()
    synth.write_recording(scene, optics, tmp_path / "a.avi", fmt="avi-raw", seed=7)
    synth.write_recording(scene, optics, tmp_path / "b.avi", fmt="avi-raw", seed=7)
    synth.write_recording(scene, optics, tmp_path / "c.avi", fmt="avi-raw", seed=8)
    a, b, c = ((tmp_path / n).read_bytes() for n in ("a.avi", "b.avi", "c.avi"))
    assert a == b
    assert a != c
    assert (tmp_path / "a.avi.truth.json").read_bytes() == (tmp_path / "b.avi.truth.json").read_bytes()


@pytest.mark.parametrize(("fmt", "name"), [("tiff", "s.tif"), ("png-folder", "pngs"),
                                         ("avi-mjpg", "m.avi")])
def test_other_formats_are_deterministic(tmp_path, fmt, name):
    scene, optics = small_scene(n_frames=8), synth.Optics(bit_depth=8)

    def contents(folder):
        synth.write_recording(scene, optics, folder / name, fmt=fmt, seed=5)
        path = folder / name
        files = sorted(path.iterdir()) if path.is_dir() else [path]
        return [f.read_bytes() for f in files]

    assert contents(tmp_path / "one") == contents(tmp_path / "two")


def test_png_folder_rewrite_drops_stale_frames(tmp_path):
    synth.write_recording(small_scene(n_frames=12), synth.Optics(), tmp_path / "f", fmt="png-folder", seed=0)
    synth.write_recording(small_scene(n_frames=5), synth.Optics(), tmp_path / "f", fmt="png-folder", seed=0)
    assert len(list((tmp_path / "f").glob("frame_*.png"))) == 5


def test_frames_match_render(tmp_path):
    scene, optics = small_scene(), synth.Optics()
    frames, _ = synth.render_recording(scene, optics, seed=2)
    expected = list(frames)
    synth.write_recording(scene, optics, tmp_path / "r.avi", fmt="avi-raw", seed=2)
    decoded = read_video(tmp_path / "r.avi")
    assert len(decoded) == len(expected)
    assert all(np.array_equal(d, e) for d, e in zip(decoded, expected))


@pytest.mark.parametrize(("fmt", "name", "bits"), [
    ("avi-raw", "x.avi", 8), ("avi-mjpg", "x.avi", 8), ("mkv-ffv1", "x.mkv", 16),
    ("mp4-ffv1", "x.mp4", 8), ("tiff", "x.tif", 8), ("tiff", "x.tif", 12),
    ("png-folder", "pngs", 8), ("png-folder", "pngs", 16)])
def test_formats_round_trip(tmp_path, fmt, name, bits):
    scene = small_scene(n_frames=12)
    optics = synth.Optics(bit_depth=bits, orientation="horizontal")
    path = tmp_path / name
    truth = synth.write_recording(scene, optics, path, fmt=fmt, seed=3)
    dtype = np.uint8 if bits == 8 else np.uint16
    if fmt == "tiff":
        with tifffile.TiffFile(path) as tif:
            assert len(tif.series) == 1
            frames = list(tif.series[0].asarray())
    elif fmt == "png-folder":
        files = sorted(path.glob("frame_*.png"))
        assert files[0].name == "frame_0001.png"
        frames = [cv2.imread(str(f), cv2.IMREAD_UNCHANGED) for f in files]
    else:
        frames = read_video(path)
    assert len(frames) == truth.n_frames == 12
    assert frames[0].shape == truth.frame_shape == (80, 96)
    assert frames[0].dtype == dtype
    if bits == 12:
        assert max(int(f.max()) for f in frames) < 4096
    expected, _ = synth.render_recording(scene, optics, seed=3)
    if fmt == "avi-mjpg":   # lossy: close, not equal
        assert all(np.abs(f.astype(float) - e).mean() < 3.0 for f, e in zip(frames, expected))
    else:
        assert all(np.array_equal(f, e) for f, e in zip(frames, expected))
    truth_file = path / "truth.json" if fmt == "png-folder" else tmp_path / (name + ".truth.json")
    loaded = json.loads(truth_file.read_text())
    assert loaded["n_frames"] == 12 and loaded["fps_hz"] == scene.fps_hz


def test_avi_refuses_deep_frames(tmp_path):
    with pytest.raises(ValueError, match="8-bit"):
        synth.write_recording(small_scene(), synth.Optics(bit_depth=16), tmp_path / "x.avi",
                              fmt="avi-raw", seed=0)


def test_truth_json_has_no_nan():
    _, truth = synth.render_recording(synth.water_like_dripping(), synth.Optics(), seed=0)
    text = json.dumps(truth.to_dict(), allow_nan=False)
    data = json.loads(text)
    assert data["diameter_m"][-1] is None
    assert data["relaxation_time_s"] is None
    assert data["geometry"] == "dripping"


@pytest.mark.slow
def test_writing_streams_in_constant_memory(tmp_path):
    def peak(n_frames):
        scene = small_scene(n_frames=n_frames, frame_size_px=(96, 80))
        tracemalloc.start()
        synth.write_recording(scene, synth.Optics(), tmp_path / f"m{n_frames}.tif", fmt="tiff", seed=0)
        _, top = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        return top

    small, large = peak(100), peak(2000)
    frame_bytes = 96 * 80
    # 20× the frames: the peak may grow by the per-frame truth arrays, never by the frames
    assert large < small + 200 * frame_bytes


@pytest.mark.parametrize("name", sorted(synth.standard_scenes()))
def test_presets_resolve_the_elastic_stretch(name):
    scene = synth.standard_scenes()[name]
    fluid = scene.fluid
    if fluid.polymer_modulus > 0:
        # ≥ 20 frames per 3λ (one e-fold of the diameter), from memory of the brief's rule
        assert 3 * fluid.relaxation_time * scene.fps_hz >= 20
    assert 0.030 <= fluid.surface_tension <= 0.072
    assert 2 * scene.plate_diameter_m / 2 / scene.pixel_size_m < scene.frame_size_px[1]


def test_sagging_and_tilt_move_the_neck():
    base = small_scene(n_frames=5)
    _, straight = synth.render_recording(base, CLEAN, seed=0)
    _, sagged = synth.render_recording(dataclasses.replace(base, sagging=0.1), CLEAN, seed=0)
    gap = straight.lower_end_px[-1] - straight.upper_end_px[-1]
    shift = sagged.neck_position_px[-1] - straight.neck_position_px[-1]
    assert shift == pytest.approx(0.1 * gap, rel=1e-6)
    _, tilted = synth.render_recording(base, dataclasses.replace(CLEAN, tilt_deg=5.0), seed=0)
    assert np.all(tilted.axis_angle_deg == 5.0)
    np.testing.assert_array_equal(tilted.diameter_m, straight.diameter_m)


@pytest.mark.parametrize("name", sorted(synth.standard_scenes()))
def test_drawn_profile_has_its_minimum_at_the_true_neck(name):
    scene = dataclasses.replace(synth.standard_scenes()[name], beads=True, sagging=0.05)
    hist, n = synth._model(scene)
    tl = synth._timeline(scene, hist, n)
    rng = np.random.default_rng(5)
    threads = np.flatnonzero(np.isfinite(tl.r_min) & (tl.r_min > 0))
    for i in rng.choice(threads, size=12, replace=False):
        a = np.linspace(tl.a_upper[i], tl.a_lower[i], 20001)
        r = synth._profile(a, tl, i)
        inner = r[1:-1]
        assert inner.min() >= tl.r_min[i] * (1 - 1e-9)
        at_neck = synth._profile(np.array([tl.a_neck[i]]), tl, i)[0]
        assert at_neck == pytest.approx(tl.r_min[i], rel=1e-9)
        # the liquid meets the upper plate at its edge and the lower end at its radius
        ends = synth._profile(np.array([tl.a_upper[i] + 1e-9, tl.a_lower[i] - 1e-9]), tl, i)
        np.testing.assert_allclose(ends, [tl.plate_radius, tl.lower_end_radius[i]], rtol=1e-6)


def test_tilted_thread_row_width_is_unbiased():
    tilt = 6.0
    optics = dataclasses.replace(CLEAN, tilt_deg=tilt)
    scene = synth.dilute_polymer_plates(n_frames=None)
    frames, truth = synth.render_recording(scene, optics, seed=1)
    target = np.flatnonzero((truth.diameter_px > 30) & (truth.phase == "free"))[-1]
    for i, frame in enumerate(frames):
        if i == target:
            break
    image = frame.astype(float)
    row = image[int(round(truth.neck_position_px[i]))]
    background = np.median(image[:, :5])
    shadow = np.median(image[:5, image.shape[1] // 2 - 5:image.shape[1] // 2 + 5])
    # a straight cylinder cut by an image row at angle θ to its normal is D / cos θ wide
    expected = truth.diameter_px[i] / np.cos(np.radians(tilt))
    assert half_intensity_width(row, background, shadow) == pytest.approx(expected, abs=0.15)


def test_exposure_smears_only_what_moves():
    scene = small_scene(pre_roll_s=0.5e-3, stretch_duration_s=0.5e-3, n_frames=30)
    instant_frames, instant = synth.render_recording(scene, synth.Optics(), seed=9)
    smeared_frames, smeared = synth.render_recording(
        scene, synth.Optics(exposure_fraction=1.0), seed=9)
    np.testing.assert_array_equal(instant.diameter_m, smeared.diameter_m)
    at_rest = int(np.sum(instant.phase == "rest")) - 1    # exposure still inside the rest phase
    assert at_rest >= 5
    for i, (a, b) in enumerate(zip(instant_frames, smeared_frames)):
        if i < at_rest:
            np.testing.assert_array_equal(a, b)
        elif instant.phase[i] == "stretch":
            assert np.abs(a.astype(int) - b.astype(int)).max() > 20


def test_benchmark_recording_is_a_long_elastic_mjpg(tmp_path):
    path = tmp_path / "bench.avi"
    truth = synth.write_benchmark_recording(path, n_frames=150, seed=0)
    frames = read_video(path)
    assert len(frames) == 150 and frames[0].shape == (256, 512) and frames[0].dtype == np.uint8
    assert path.read_bytes()[8:12] == b"AVI " and b"MJPG" in path.read_bytes()[:400]
    assert synth.load_truth(path)["n_frames"] == 150
    # the elastic filament breaks near the end of the record, after thinning slowly
    assert truth.relaxation_time_s is not None
    assert 0.9 * 150 / truth.fps_hz < truth.breakup_time_s < 150 / truth.fps_hz


@pytest.mark.parametrize("family", raysynth.FAMILIES)
def test_random_cases_are_valid_and_deterministic(family):
    seen = set()
    for seed in range(8):
        scene, optics = synth.random_case(seed, family=family)
        assert (scene, optics) == synth.random_case(seed, family=family)
        fluid = scene.fluid
        assert 2e-6 <= scene.pixel_size_m <= 20e-6 and 0.5e-3 <= scene.plate_diameter_m <= 6e-3
        assert max(scene.frame_size_px) <= 512 and 0.5 <= optics.blur_sigma_px <= 2.0
        assert 0.020 <= fluid.surface_tension <= 0.075 and 800 <= fluid.density <= 1300
        hist, n = synth._model(scene)
        assert 100 <= n <= 600
        t_breakup = scene.pre_roll_s + scene.stretch_duration_s + hist.breakup_time_s
        assert n - (int(t_breakup * scene.fps_hz) + 1) == synth.FRAMES_AFTER_BREAKUP
        if fluid.polymer_modulus > 0:
            window = raysynth.elastic_window_s(hist, fluid.relaxation_time)
            assert window * scene.fps_hz >= 15
            assert fluid.polymer_viscosity <= synth.MAX_POLYMER_TO_SOLVENT * fluid.solvent_viscosity
        seen.add((scene.geometry, optics.orientation))
        artefacts = [optics.dust_specks >= 10, optics.streak_strength >= 0.7, optics.motion_blur_px > 0,
                     optics.blur_kind == "lorentzian", optics.background_level >= 0.93]
        if family == "artefacts":
            assert 1 <= sum(artefacts) <= 2
        elif family != "refraction":
            assert not any(artefacts)
        if family == "newtonian-still":
            assert fluid.polymer_modulus == 0 and scene.geometry == "plates"
            assert scene.pre_roll_s == scene.stretch_duration_s == 0.0
        if family == "refraction":
            assert scene.initial_diameter_m / scene.pixel_size_m >= 80
            assert optics.lens_streak and optics.streak_strength >= 0.6
    assert len({s[0] for s in seen}) == (1 if family == "newtonian-still" else 2)
    assert len({s[1] for s in seen}) == 2


def test_random_case_refuses_an_unknown_family():
    with pytest.raises(ValueError, match="family"):
        synth.random_case(0, family="no-such-family")
