"""Neck diameter per frame, breakup and start of free thinning (thinning.measure.neck, record)."""

import importlib.util
from pathlib import Path

import numpy as np
import pytest

from thinning.measure import NoFilament
from thinning.measure.record import (SNAPSHOT_CANDIDATES, TABLE_COLUMNS, diameter_noise, free_thinning_start,
                                     measure_recording, to_physical)
from thinning.checks import Severity
from thinning.units import Calibration

_spec = importlib.util.spec_from_file_location("_edge_frames", Path(__file__).with_name("test_edges.py"))
_module = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(_module)
render = _module.render


def thinning_frames(diameters, *, plates=None, seed=0, noise=0.01, blur=1.0):
    """Frames of a thinning bridge; a diameter below 1 px is a broken thread (gap at the neck)."""
    rng = np.random.default_rng(seed)
    for i, d in enumerate(diameters):
        plate = 20 if plates is None else plates[i]
        frame = render(neck=max(d, 2.0), plate=plate, blur=blur, noise=noise,
                       seed=int(rng.integers(1 << 30)))
        if d < 1.0:
            frame[90:112] = np.clip(np.random.default_rng(i).normal(200, 2, (22, frame.shape[1])),
                                    0, 255).astype(np.uint8)
        yield frame


def test_thinning_record_to_breakup():
    diameters = 30.0 * np.exp(-np.arange(90) / 25.0)
    diameters[diameters < 2.5] = 0.0
    series = measure_recording(thinning_frames(diameters), n_frames=diameters.size)
    table = series.table
    assert list(table.columns) == TABLE_COLUMNS
    assert len(table) == diameters.size
    last = int(np.flatnonzero(diameters > 0)[-1])
    assert series.breakup_frame == last + 0.5
    assert table["diameter_px"].iloc[last + 1:].isna().all()
    good = diameters >= 3.0
    err = np.abs(table["diameter_px"].to_numpy()[good] - diameters[good])
    assert np.median(err) < 0.1
    assert np.percentile(err, 95) < 0.3
    assert series.free_thinning_start_frame == 0.0
    # the strip's candidates: frames with a thread only, spread over its life, the last one kept
    kept = [index for index, _, _ in series.snapshots]
    assert 1 <= len(kept) <= SNAPSHOT_CANDIDATES + 1 and kept == sorted(kept)
    assert kept[-1] == last and all(table["thread_connected"].iloc[kept])
    assert abs(table["neck_position_px"].iloc[0] - 100.27) < 10
    # the reported noise matches the scatter about the truth within a factor of two
    scatter = np.std(table["diameter_px"].to_numpy()[good] - diameters[good])
    assert 0.5 * scatter < series.diameter_noise_px < 2.0 * scatter


def test_free_thinning_starts_when_the_plates_stop():
    n = 60
    plates = [max(20, 40 - 2 * i) for i in range(n)]  # plates move apart until frame 10
    diameters = np.full(n, 12.0)
    series = measure_recording(thinning_frames(diameters, plates=plates))
    gap = series.table["plate_gap_px"].to_numpy()
    assert gap[0] < gap[-1] - 30
    assert 9 <= series.free_thinning_start_frame <= 12
    assert series.breakup_frame is None


def test_free_thinning_start_from_a_gap_series():
    rng = np.random.default_rng(5)
    gap = np.concatenate([np.linspace(50, 150, 21), np.full(80, 150.0)])
    gap += rng.integers(-1, 2, gap.size) * (np.arange(gap.size) > 20)
    assert free_thinning_start(gap) == pytest.approx(20, abs=2)
    assert free_thinning_start(np.full(50, 150.0) + rng.integers(-1, 2, 50)) is None


def test_draining_feet_on_still_plates_are_no_plate_motion():
    # still plates: the liquid feet drain and the gap between the end bodies opens ever faster
    # up to breakup; that never holds afterwards, so it is no motion of the plates
    t = np.linspace(0.0, 1.0, 120)
    draining = 150.0 + 30.0 * t ** 6
    assert free_thinning_start(draining) is None
    # a step stretch at the start, then the same drainage: the start follows the stretch
    stretched = np.concatenate([np.linspace(60, 150, 16), draining])
    assert free_thinning_start(stretched) == pytest.approx(15, abs=2)


def test_blank_frames_before_the_filament_are_empty_rows():
    blank = np.full((200, 160), 200, np.uint8)
    frames = [blank, blank] + list(thinning_frames(np.full(20, 10.0)))
    series = measure_recording(iter(frames))
    assert series.table["diameter_px"].iloc[:2].isna().all()
    assert series.table["diameter_px"].iloc[2:].notna().all()
    assert any(f.code == "no-filament-frames" for f in series.findings)


def test_no_filament_anywhere_raises():
    rng = np.random.default_rng(2)
    frames = (np.clip(rng.normal(200, 2, (100, 80)), 0, 255).astype(np.uint8) for _ in range(5))
    with pytest.raises(NoFilament):
        measure_recording(frames)


def test_diameter_noise_of_a_smooth_series():
    rng = np.random.default_rng(7)
    d = 20 * np.exp(-np.arange(400) / 200) + rng.normal(0, 0.05, 400)
    assert diameter_noise(d) == pytest.approx(0.05, rel=0.15)


def test_to_physical_uses_the_recording_clock():
    series = measure_recording(thinning_frames(np.full(12, 10.0)))
    table = to_physical(series, Calibration(fps_hz=1000.0, pixel_size_m=2e-6))
    assert list(table.columns[:4]) == ["frame", "time_s", "diameter_m", "neck_position_m"]
    assert table["time_s"].iloc[5] == pytest.approx(0.005)
    assert table["diameter_m"].median() == pytest.approx(10.0 * 2e-6, rel=0.01)


def test_beads_are_reported_and_the_neck_is_on_the_thread():
    from thinning import synth

    scene = synth.dilute_polymer_plates(fps_hz=1000.0, frame_size_px=(200, 160),
                                        pixel_size_m=25e-6, beads=True)
    frames, truth = synth.render_recording(scene, synth.Optics(), seed=5)
    series = measure_recording(frames, n_frames=truth.n_frames)
    assert any(f.code == "beads" for f in series.findings)
    beaded = series.table["beads"].to_numpy() & (truth.diameter_px >= 1.0)
    assert beaded.sum() >= 5
    err = series.table["diameter_px"].to_numpy()[beaded] - truth.diameter_px[beaded]
    assert np.nanmax(np.abs(err)) < 0.3


def test_neck_quadratic_matches_numpy_polyfit():
    # outside reference: numpy.polyfit (least squares with a Vandermonde matrix)
    from thinning.measure.neck import quadratic_fits

    rng = np.random.default_rng(9)
    xs, ys = [], []
    for _ in range(5):
        x = np.arange(-int(rng.integers(1, 9)), int(rng.integers(3, 15))).astype(float)
        xs.append(x)
        ys.append(rng.normal(0, 1, 3) @ np.vstack([x ** 2, x, np.ones_like(x)]) + rng.normal(0, 0.01, x.size))
    # the fits of one block: rows of different lengths, padded with points that are not used
    width = max(x.size for x in xs) + 3
    use = np.zeros((len(xs), width), bool)
    x_block = rng.normal(0, 50, (len(xs), width))
    y_block = rng.normal(0, 50, (len(xs), width))
    for i, (x, y) in enumerate(zip(xs, ys)):
        use[i, 1:1 + x.size] = True
        x_block[i, 1:1 + x.size], y_block[i, 1:1 + x.size] = x, y
    a, b, c, solvable = quadratic_fits(x_block, y_block, use)
    assert solvable.all()
    for i, (x, y) in enumerate(zip(xs, ys)):
        assert np.allclose([a[i], b[i], c[i]], np.polyfit(x, y, 2), rtol=1e-9, atol=1e-9)
    # two points do not fix a parabola
    assert not quadratic_fits(x_block[:1], y_block[:1], use[:1] & (np.arange(width) < 3))[3][0]


def test_compiled_measurement_matches_the_numpy_path(beaded_recording, monkeypatch):
    # thinning/measure/_rowscan.c and the numpy path are two codings of one method: the same table,
    # frame for frame, to rounding (the compiled sums run in another order)
    from thinning.measure import compiled as compiled_pass

    frames = beaded_recording
    compiled = measure_recording(frames, n_frames=len(frames))
    monkeypatch.setattr(compiled_pass, "COMPILED", False)
    plain = measure_recording(frames, n_frames=len(frames))
    a, b = compiled.table, plain.table
    assert a["thread_connected"].sum() > 20 and (~a["thread_connected"]).sum() > 5
    for column in ("frame", "thread_connected", "filament_seen", "beads", "fit_rows"):
        assert np.array_equal(a[column].to_numpy(), b[column].to_numpy()), column
    # the row sums differ by ~1e-6 px; the vertex of a flat parabola amplifies that along the axis
    for column, tolerance in (("diameter_px", 1e-5), ("neck_position_px", 1e-2),
                              ("axis_angle_deg", 1e-4), ("axis_lateral_px", 1e-4),
                              ("min_contrast", 1e-5), ("plate_gap_px", 0.0)):
        x, y = a[column].to_numpy(float), b[column].to_numpy(float)
        assert np.array_equal(np.isnan(x), np.isnan(y)), column
        assert np.nanmax(np.abs(x - y)) <= tolerance, column
    assert compiled.breakup_frame == plain.breakup_frame
    assert compiled.free_thinning_start_frame == plain.free_thinning_start_frame
    assert len(compiled.snapshots) == len(plain.snapshots)
    for (i, _, p), (j, _, q) in zip(compiled.snapshots, plain.snapshots):
        shadow = np.abs(q.cut_width_px) > 0.5  # a centre is defined where the row holds shadow
        assert i == j and np.allclose(p.left_px[shadow], q.left_px[shadow], atol=1e-4)


def test_a_clipped_background_makes_the_record_doubtful():
    # a backlight brighter than the sensor's maximum hides the outer part of each edge: the
    # partial-area widths would read low by 1-2 px, so the edges come from the steepest light
    # gradient instead, and the record says so (and stays quiet when the light is below it)
    diameters = np.linspace(20.0, 6.0, 30)
    frames = list(thinning_frames(diameters))
    quiet = measure_recording(frames)
    assert not any(f.code == "background-clipped" for f in quiet.findings)
    bright = measure_recording([np.clip(f * 1.5, 0, 255).astype(np.uint8) for f in frames])
    flagged = [f for f in bright.findings if f.code == "background-clipped"]
    assert len(flagged) == 1 and flagged[0].severity is Severity.DOUBTFUL
    err = np.abs(bright.table["diameter_px"].to_numpy() - diameters)
    assert np.median(err) < 0.3 and np.percentile(err, 95) < 0.4
