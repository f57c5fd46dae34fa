"""The recording's clock (thinning.clock): a native file's header and stamps, --fps and
--fps-override, exposure and trigger, dropped frames, motion blur; through the CLI as the
contract says (docs/contract.md, version 2 additions: native camera files)."""

import json
from types import SimpleNamespace

import numpy as np
import pytest
from click.testing import CliRunner

from thinning.cli import cli
from thinning.clock import ClockConflict, motion_blur_finding, resolve_clock
from thinning.units import AnalysisOptions

FPS = 4000
PIXEL = "15um"
SIGMA = "62mN/m"
#: Every fifth frame is dropped: frame / fps would compress the clock to 0.8 of the truth.
DROP_EVERY = 5


@pytest.fixture(scope="module")
def rendered():
    """A dilute polymer solution between plates (λ = 5 ms, thinning.synth), 12-bit frames."""
    from thinning import synth

    scene = synth.dilute_polymer_plates(fps_hz=float(FPS), frame_size_px=(240, 216), pixel_size_m=15e-6)
    frames, truth = synth.render_recording(scene, synth.Optics(bit_depth=12), seed=5)
    return list(frames), truth


@pytest.fixture(scope="module")
def native_files(rendered, tmp_path_factory):
    """The record as a .cine (whole, and with every fifth frame dropped, stamped) and an .mraw."""
    from thinning.frames.writers import write_cine, write_mraw

    frames, truth = rendered
    folder = tmp_path_factory.mktemp("native")
    whole, dropped, mraw = folder / "whole.cine", folder / "dropped.cine", folder / "whole.mraw"
    write_cine(whole, frames, fps=FPS, bit_depth=12, packing="packed", exposure_s=20e-6, trigger_frame=12)
    kept = [i for i in range(len(frames)) if i % DROP_EVERY != DROP_EVERY - 1]
    write_cine(dropped, [frames[i] for i in kept], fps=FPS, bit_depth=12, packing="packed",
               exposure_s=20e-6, timestamps_s=np.array(kept) / FPS)
    write_mraw(mraw, frames, fps=FPS, bit_depth=12, shutter_s=50e-6, start_frame=-30)
    return SimpleNamespace(whole=whole, dropped=dropped, mraw=mraw, truth=truth)


def _analyse(source, out, *extra):
    run = CliRunner().invoke(cli, ["analyse", str(source), "--out", str(out), "--pixel-size", PIXEL,
                                   "--surface-tension", SIGMA, *extra])
    return run, (json.loads((out / "result.json").read_text()) if run.exit_code == 0 else None)


def test_dropped_frames_are_timed_by_their_stamps(native_files, tmp_path):
    # the "must show": λ within 1 % of the truth where frame / fps would be off by the
    # dropped fraction (here 20 %)
    true_lam = native_files.truth.relaxation_time_s
    run, stamped = _analyse(native_files.dropped, tmp_path / "stamped")
    assert run.exit_code == 0, run.output
    assert stamped["clock_source"] == "file" and stamped["fps_hz"] == FPS
    assert abs(stamped["relaxation_time_s"] / true_lam - 1) < 0.01
    (note,) = [f for f in stamped["findings"] if f["code"] == "frames-dropped"]
    assert note["severity"] == "note" and "73 frame(s) missing" in note["message"]
    times = np.loadtxt(tmp_path / "stamped" / "diameter.csv", delimiter=",", skiprows=1,
                       usecols=1, max_rows=8)
    kept = [i for i in range(8 * DROP_EVERY) if i % DROP_EVERY != DROP_EVERY - 1][:8]
    assert np.allclose(times, np.array(kept) / FPS, atol=1e-9)
    # the same frames on the frame / fps clock (what a reader without stamps would do)
    run, counted = _analyse(native_files.dropped, tmp_path / "counted", "--fps", str(FPS), "--fps-override")
    assert run.exit_code == 0, run.output
    assert counted["clock_source"] == "option" and "clock-overridden" in counted["finding_codes"]
    assert "frames-dropped" not in counted["finding_codes"]
    assert abs(counted["relaxation_time_s"] / true_lam - (1 - 1 / DROP_EVERY)) < 0.03


def test_dropped_frames_on_the_refracting_renderer_too(tmp_path):
    # the same check on the second renderer (thinning.raysynth: a ray-traced transparent thread,
    # n 1.40): on the stamps λ within 1 % of the truth, on frame / fps off by the dropped fraction
    from thinning import laws, raysynth
    from thinning.frames.writers import write_cine

    fluid = laws.Fluid(surface_tension=0.062, solvent_viscosity=1.0e-3, density=1000.0,
                       polymer_modulus=2.0, relaxation_time=5e-3, extensibility=2.0e4)
    scene = raysynth.RayScene(fluid=fluid, plate_diameter_m=3e-3, initial_diameter_m=0.8e-3,
                              pixel_size_m=15e-6, fps_hz=float(FPS), frame_size_px=(240, 216),
                              stretch_duration_s=5e-3, pre_roll_s=1e-3)
    optics = raysynth.RayOptics(numerical_aperture=0.06, illumination_half_angle_deg=0.4, bit_depth=12)
    frames, truth = raysynth.render_recording(scene, optics, seed=5)
    frames = list(frames)
    kept = [i for i in range(len(frames)) if i % DROP_EVERY != DROP_EVERY - 1]
    dropped = tmp_path / "dropped.cine"
    write_cine(dropped, [frames[i] for i in kept], fps=FPS, bit_depth=12, packing="packed",
               exposure_s=20e-6, timestamps_s=np.array(kept) / FPS)
    run, stamped = _analyse(dropped, tmp_path / "stamped")
    assert run.exit_code == 0, run.output
    assert stamped["clock_source"] == "file" and "frames-dropped" in stamped["finding_codes"]
    assert abs(stamped["relaxation_time_s"] / truth.relaxation_time_s - 1) < 0.01
    run, counted = _analyse(dropped, tmp_path / "counted", "--fps", str(FPS), "--fps-override")
    assert run.exit_code == 0, run.output
    assert abs(counted["relaxation_time_s"] / truth.relaxation_time_s - (1 - 1 / DROP_EVERY)) < 0.03


def test_the_header_is_the_clock_and_a_disagreeing_fps_is_refused(native_files, tmp_path):
    run, whole = _analyse(native_files.whole, tmp_path / "a")
    assert run.exit_code == 0, run.output
    assert (whole["clock_source"], whole["exposure_s"], whole["trigger_frame"]) == ("file", 20e-6, 12)
    assert "frames-dropped" not in whole["finding_codes"]
    # within 0.1 %: accepted, and the file's clock is used
    run, close = _analyse(native_files.whole, tmp_path / "b", "--fps", f"{FPS * 1.0009}/s")
    assert run.exit_code == 0 and close["clock_source"] == "file" and close["fps_hz"] == FPS
    assert close["relaxation_time_s"] == whole["relaxation_time_s"]
    # beyond 0.1 %: bad usage, one sentence, nothing written
    run, _ = _analyse(native_files.whole, tmp_path / "c", "--fps", f"{FPS * 1.0011}/s")
    assert run.exit_code == 2 and "differs from the recording rate in the file's header" in run.output
    assert "--fps-override" in run.output and not (tmp_path / "c").exists()
    # the override without a rate is bad usage
    run, _ = _analyse(native_files.whole, tmp_path / "d", "--fps-override")
    assert run.exit_code == 2 and "without --fps" in run.output


def test_mraw_clock_exposure_and_trigger(native_files, tmp_path):
    run, mraw = _analyse(native_files.mraw.with_suffix(".cih"), tmp_path / "m")
    assert run.exit_code == 0, run.output
    assert (mraw["clock_source"], mraw["fps_hz"], mraw["exposure_s"], mraw["trigger_frame"]) == \
        ("file", FPS, 50e-6, 30)
    # an --exposure against the file's own is not used, and says so
    run, other = _analyse(native_files.mraw, tmp_path / "n", "--exposure", "10")
    assert run.exit_code == 0 and other["exposure_s"] == 50e-6
    assert "exposure-option-unused" in other["finding_codes"]
    assert other["options"]["exposure_s"] == pytest.approx(10e-6, rel=1e-12)


def test_sources_without_a_clock_of_their_own(tmp_path, rendered):
    # a TIFF stack: --fps is the clock; --exposure gives the exposure; no trigger
    import tifffile

    frames, _ = rendered
    stack = tmp_path / "stack.tif"
    tifffile.imwrite(stack, np.stack(frames), photometric="minisblack")
    run = CliRunner().invoke(cli, ["analyse", str(stack), "--out", str(tmp_path / "t"), "--fps", "4kHz",
                                   "--pixel-size", PIXEL, "--surface-tension", SIGMA, "--exposure", "20us"])
    assert run.exit_code == 0, run.output
    data = json.loads((tmp_path / "t" / "result.json").read_text())
    assert (data["clock_source"], data["trigger_frame"]) == ("option", None)
    assert data["exposure_s"] == pytest.approx(20e-6, rel=1e-12)


def _video(rate, **kw):
    return SimpleNamespace(fps=rate, clock="container" if rate else None, timestamps_s=None,
                           exposure_s=None, trigger_frame=None, **kw)


def test_resolve_clock_rules():
    clock, notes = resolve_clock(AnalysisOptions(exposure_s=5e-6), _video(30000.0))
    assert (clock.source, clock.fps_hz, clock.exposure_s, notes) == ("container", 30000.0, 5e-6, [])
    with pytest.raises(ClockConflict, match="no frame rate"):
        resolve_clock(AnalysisOptions(), _video(None))
    # a container rate is not a header: --fps over it is not a conflict, with or without override
    for override in (False, True):
        clock, notes = resolve_clock(AnalysisOptions(fps_hz=1e4, fps_override=override), _video(25.0))
        assert (clock.source, clock.fps_hz, notes) == ("option", 1e4, [])
    native = SimpleNamespace(fps=1e4, clock="file", timestamps_s=np.array([0, 1e-4, 3e-4, 4e-4]),
                             exposure_s=None, trigger_frame=2)
    clock, notes = resolve_clock(AnalysisOptions(), native)
    assert clock.source == "file" and [n.code for n in notes] == ["frames-dropped"]
    assert notes[0].t_range_s == (1e-4, 3e-4)
    calibration = clock.calibration(2e-6, frames_read=3)
    assert np.allclose(calibration.time_s(np.arange(5)), [0, 1e-4, 3e-4, 4e-4, 5e-4])


def test_calibration_without_stamps_is_frame_over_fps():
    from thinning.units import Calibration

    frames = np.arange(1000, dtype=float)
    assert np.array_equal(Calibration(3000.0, 1e-6).time_s(frames), frames / 3000.0)


def test_motion_blur_note_from_the_neck_speed():
    # a thread thinning at a constant rate (visco-capillary: dD/dt = -0.1418 σ/η, Papageorgiou 1995)
    # of 0.2 m/s; each edge moves 0.1 m/s; pixel 10 µm
    t = np.arange(200) / 10000.0
    d = 1e-3 - 0.2 * t
    kw = dict(pixel_size_m=10e-6, floor_m=30e-6, t_range_s=(0.0, t[-1]))
    # 20 µs: 2 µm of travel, 0.2 px → nothing; 50 µs: 0.5 px → the note
    assert motion_blur_finding(t, d, exposure_s=20e-6, **kw) is None
    blur = motion_blur_finding(t, d, exposure_s=50e-6, **kw)
    assert blur is not None and blur.code == "motion-blur" and blur.severity.value == "note"
    assert "0.5 px" in blur.message
    assert motion_blur_finding(t, d, exposure_s=None, **kw) is None


def test_manifest_rows_of_native_files(native_files, tmp_path):
    # the fps cell may stay empty for a native file; one that contradicts the header is a row
    # problem for --check, as it is for analyse
    from thinning.batch.manifest import check_manifest

    manifest = tmp_path / "m.csv"
    manifest.write_text(
        "path,sample,lot,pixel_size,surface_tension,fps,fps_override\n"
        f"{native_files.whole},S1,L1,{PIXEL},{SIGMA},,\n"
        f"{native_files.mraw},S2,L1,{PIXEL},{SIGMA},5kHz,\n"
        f"{native_files.whole},S3,L1,{PIXEL},{SIGMA},5kHz,yes\n"
        f"{native_files.whole},S4,L1,{PIXEL},{SIGMA},,maybe\n", encoding="utf-8")
    problems = check_manifest(manifest)
    assert [p.row for p in problems] == [2, 4]
    assert "differs from the recording rate in the file's header" in problems[0].message
    assert "is not yes or no" in problems[1].message


def test_a_batch_of_native_files_reports_clock_and_trigger(native_files, tmp_path):
    # a manifest row with an empty fps cell: the header is the clock; the lot report's provenance
    # says how each recording was clocked and started, the recording report too
    manifest = tmp_path / "m.csv"
    manifest.write_text(
        "path,product,lot,sample,replicate,pixel_size,surface_tension,fps\n"
        f"{native_files.whole},clock-test,CT-1,S1,1,{PIXEL},{SIGMA},\n"
        f"{native_files.mraw.with_suffix('.cih')},clock-test,CT-1,S1,2,{PIXEL},{SIGMA},\n",
        encoding="utf-8")
    db = f"sqlite:///{tmp_path / 'r.db'}"
    run = CliRunner().invoke(cli, ["batch", str(manifest), "--out", str(tmp_path / "out"), "--db", db,
                                   "--workers", "1"])
    assert run.exit_code == 0, run.output
    run = CliRunner().invoke(cli, ["report", "CT-1", "--db", db, "--out", str(tmp_path / "reports")])
    assert run.exit_code == 0, run.output
    html = (tmp_path / "reports" / "CT-1.html").read_text(encoding="utf-8")
    assert "header 4000 frames/s · trigger at frame 12 · exposure 20 µs" in html
    assert "header 4000 frames/s · trigger at frame 30 · exposure 50 µs" in html
    row_report = tmp_path / "out" / "1-S1" / "report.html"
    text = row_report.read_text(encoding="utf-8")
    assert "the camera file&#39;s header" in text or "the camera file's header" in text
    assert "frame 12 of the record" in text


def test_a_colour_camera_file_says_how_it_was_made_grey(rendered, native_files, tmp_path):
    # interpolated colour with equal channels: its luma is the grey frame itself, so the
    # analysis matches the grey file's; the record says the frames were read as luma
    from thinning.frames.writers import write_cine

    frames, _ = rendered
    colour = tmp_path / "colour.cine"
    write_cine(colour, [np.repeat(f[:, :, None], 3, axis=2) for f in frames], fps=FPS, bit_depth=12,
               packing="unpacked", exposure_s=20e-6, trigger_frame=12)
    run, data = _analyse(colour, tmp_path / "c")
    assert run.exit_code == 0, run.output
    (note,) = [f for f in data["findings"] if f["code"] == "colour-as-grey"]
    assert note["severity"] == "note" and "luma" in note["message"]
    run, grey = _analyse(native_files.whole, tmp_path / "g")
    assert "colour-as-grey" not in grey["finding_codes"]
    assert abs(data["relaxation_time_s"] / grey["relaxation_time_s"] - 1) < 0.005
