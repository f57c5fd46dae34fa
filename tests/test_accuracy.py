"""Accuracy of the neck diameter on synthetic recordings written to disk and read back.

Each case renders a short recording with thinning.synth (known diameter in every
frame), writes it in one of the file formats, reads it back with
thinning.frames.open_source and measures it with thinning.measure.measure_recording.
The truth used for the comparison is the Truth object returned by the writer: the
analyser only ever sees the frames (it never reads the truth JSON beside them).

Requirement (the project's issue): over frames whose true diameter is at least
3 px, median |measured − true| ≤ 0.1 px and 95th percentile ≤ 0.3 px.
"""

import numpy as np
import pytest

from thinning import synth
from thinning.frames import open_source
from thinning.measure import measure_recording

pytestmark = pytest.mark.slow  # renders or runs whole recordings, batches or services

PLATES = dict(fps_hz=2500.0, frame_size_px=(200, 160), pixel_size_m=25e-6)
DRIP = dict(fps_hz=25000.0, frame_size_px=(240, 200), pixel_size_m=8e-6)


def plates(**overrides):
    return synth.dilute_polymer_plates(**{**PLATES, **overrides})


def dripping(**overrides):
    return synth.polymer_dripping(**{**DRIP, **overrides})


O = synth.Optics
#: name → (scene, optics, file format)
CASES = {
    "gaussian-blur-0.5": (plates(), O(blur_sigma_px=0.5), "avi-raw"),
    "gaussian-blur-2": (plates(), O(blur_sigma_px=2.0), "avi-raw"),
    "disk-blur-1": (plates(), O(blur_kind="disk", blur_sigma_px=1.0), "avi-raw"),
    "disk-blur-2": (plates(), O(blur_kind="disk", blur_sigma_px=2.0), "tiff"),
    "noisy": (plates(), O(read_noise=0.015, full_well=5000.0), "avi-raw"),
    "tilt-4deg": (plates(), O(tilt_deg=4.0), "avi-raw"),
    "tilt-minus-3deg": (plates(), O(tilt_deg=-3.0, blur_sigma_px=1.5), "png-folder"),
    "strong-streak-uneven-flicker": (plates(), O(streak_strength=0.9, uneven_light=0.3,
                                               flicker=0.05), "avi-raw"),
    "motion-blur-axial": (plates(), O(motion_blur_px=3.0), "avi-raw"),
    "motion-blur-across": (plates(), O(motion_blur_px=2.0, motion_blur_axis="across"), "avi-raw"),
    "mjpg-q90": (plates(), O(), "avi-mjpg"),
    "mjpg-q90-blur-2": (plates(), O(blur_sigma_px=2.0), "avi-mjpg"),
    "tiff-8bit": (plates(), O(), "tiff"),
    "tiff-12-in-16bit": (plates(), O(bit_depth=12), "tiff"),
    "png-folder-8bit": (plates(), O(), "png-folder"),
    "horizontal-plates": (plates(), O(orientation="horizontal"), "avi-raw"),
    "beads": (plates(beads=True), O(), "avi-raw"),
    "viscous-newtonian": (synth.newtonian_viscous_plates(fps_hz=300.0, frame_size_px=(200, 160),
                                                         pixel_size_m=30e-6), O(), "tiff"),
    "dripping-polymer": (dripping(), O(), "avi-raw"),
    "dripping-water": (synth.water_like_dripping(fps_hz=50000.0, frame_size_px=(240, 200),
                                                 pixel_size_m=10e-6), O(), "avi-mjpg"),
    "dripping-horizontal-tilted": (dripping(), O(orientation="horizontal", tilt_deg=2.0), "avi-raw"),
    "dripping-16bit-blur-2": (dripping(), O(bit_depth=12, blur_sigma_px=2.0), "tiff"),
}

SUFFIX = {"avi-raw": ".avi", "avi-mjpg": ".avi", "tiff": ".tif", "png-folder": "", "mkv-ffv1": ".mkv"}


def measure(tmp_path, scene, optics, fmt, seed):
    path = tmp_path / f"recording{SUFFIX[fmt]}"
    truth = synth.write_recording(scene, optics, path, fmt=fmt, seed=seed)
    with open_source(path) as source:
        series = measure_recording(source, geometry=scene.geometry, n_frames=source.n_frames)
    return series, truth


def errors(series, truth):
    measured = series.table["diameter_px"].to_numpy()
    true = truth.diameter_px
    keep = np.isfinite(true) & (true >= 3.0)
    return measured[keep] - true[keep]


@pytest.mark.parametrize("name", list(CASES))
def test_neck_diameter_accuracy(name, tmp_path, record_property):
    scene, optics, fmt = CASES[name]
    series, truth = measure(tmp_path, scene, optics, fmt, seed=sum(map(ord, name)))
    assert len(series.table) == truth.n_frames
    err = errors(series, truth)
    assert err.size >= 10
    assert np.isfinite(err).all(), "a frame with a thread of at least 3 px got no diameter"
    # the figures, for the record (pytest --junitxml=FILE keeps them)
    record_property("frames_compared", int(err.size))
    record_property("median_abs_error_px", float(np.median(np.abs(err))))
    record_property("p95_abs_error_px", float(np.percentile(np.abs(err), 95)))
    assert np.median(np.abs(err)) <= 0.1
    assert np.percentile(np.abs(err), 95) <= 0.3
    assert series.layout.orientation == optics.orientation
    plate_px = truth.plate_diameter_m / truth.pixel_size_m
    assert series.layout.plate_width_px == pytest.approx(plate_px, abs=0.3)


@pytest.mark.parametrize("name", ["viscous-newtonian", "dripping-water"])
def test_breakup_of_a_fast_pinch_off(name, tmp_path):
    # Newtonian threads pinch off fast: the last frame with a visible thread is within a
    # frame of the true pinch-off instant
    scene, optics, fmt = CASES[name]
    series, truth = measure(tmp_path, scene, optics, fmt, seed=3)
    assert series.breakup_frame is not None
    assert series.breakup_frame == pytest.approx(truth.breakup_time_s * truth.fps_hz, abs=1.0)
    after = series.table["frame"] > series.breakup_frame
    assert series.table.loc[after, "diameter_px"].isna().all()


def test_free_thinning_start_after_the_step_stretch(tmp_path):
    scene, optics, fmt = plates(), O(), "avi-raw"
    series, truth = measure(tmp_path, scene, optics, fmt, seed=11)
    true_start = truth.free_thinning_start_s * truth.fps_hz
    assert true_start > 3
    assert series.free_thinning_start_frame == pytest.approx(true_start, abs=1.0)


def test_elastic_thread_breakup_is_after_the_thread_fades(tmp_path):
    # an elastic thread thins exponentially and fades below a pixel long before the model's
    # pinch-off: the breakup is placed after the last frame with a visible thread
    scene, optics, fmt = plates(), O(), "avi-raw"
    series, truth = measure(tmp_path, scene, optics, fmt, seed=12)
    last_visible = np.flatnonzero(truth.diameter_px >= 0.5)[-1]
    assert series.breakup_frame is not None
    assert last_visible - 10 <= series.breakup_frame <= truth.breakup_time_s * truth.fps_hz


def test_long_tailed_blur_reads_narrow_by_a_known_amount(tmp_path):
    # synth's "lorentzian" PSF puts 10 % of the light in a halo of 9 σ. The liquid's shadow
    # level is read from the end bodies' rims, whose depth the far halo lowers less than a
    # thread's: the half-level edges then sit inside the true ones. Measured: every frame
    # narrow, median 0.12 px, p95 0.19 px (a documented limitation, README "Accuracy").
    scene, optics = plates(), O(blur_kind="lorentzian", blur_sigma_px=1.0)
    series, truth = measure(tmp_path, scene, optics, "avi-raw", seed=7)
    err = errors(series, truth)
    assert np.median(err) < 0  # a bias, not noise: the sign is the halo's
    assert np.median(np.abs(err)) <= 0.15
    assert np.percentile(np.abs(err), 95) <= 0.3
