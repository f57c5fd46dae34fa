"""The command-line contract of `thinning analyse` (docs/contract.md)."""

import json
import math
import numpy as np

import pytest
from click.testing import CliRunner

from thinning import synth
from thinning.cli import cli

REQUIRED_KEYS = [
    "schema", "tool_version", "source", "fps_hz", "pixel_size_m", "options", "regime", "regimes",
    "relaxation_time_s", "relaxation_time_ci95_s", "fit_window_s", "fit_window_frames",
    "free_thinning_start_s", "initial_diameter_m", "elastic_modulus_Pa", "shear_viscosity_Pa_s",
    "extensional_viscosity_max_Pa_s", "extensional_viscosity_terminal_Pa_s", "breakup_time_s",
    "filament_lifetime_s", "warnings", "quality", "quality_reasons",
]
SMALL = dict(frame_size_px=(160, 144), pixel_size_m=25e-6, fps_hz=2500.0, initial_diameter_m=0.9e-3)


@pytest.fixture(scope="module")
def recording(tmp_path_factory):
    folder = tmp_path_factory.mktemp("rec")
    path = folder / "bridge.avi"
    truth = synth.write_recording(synth.dilute_polymer_plates(**SMALL), synth.Optics(), path,
                                  fmt="avi-raw", seed=7)
    return path, truth


def run(*args):
    result = CliRunner().invoke(cli, [str(a) for a in args], catch_exceptions=False)
    return result


def analyse_args(source, out, **extra):
    args = ["analyse", source, "--out", out, "--fps", "2.5kHz", "--pixel-size", "25 µm/px",
            "--surface-tension", "62mN/m"]
    for key, value in extra.items():
        args += [f"--{key.replace('_', '-')}", value]
    return args


def test_analyse_writes_the_contract_files(recording, tmp_path):
    path, truth = recording
    out = tmp_path / "out"
    result = run(*analyse_args(path, out))
    assert result.exit_code == 0, result.output
    assert "relaxation time" in result.output
    data = json.loads((out / "result.json").read_text())
    assert list(data)[: len(REQUIRED_KEYS)] == REQUIRED_KEYS or set(REQUIRED_KEYS) <= set(data)
    assert data["schema"] == "thinning.result/1"
    assert data["source"]["n_frames"] == truth.n_frames
    assert data["source"]["width_px"] == 144 and data["source"]["height_px"] == 160
    assert data["fps_hz"] == 2500.0 and math.isclose(data["pixel_size_m"], 25e-6)
    assert data["regime"] == "elasto-capillary"
    assert abs(data["relaxation_time_s"] / truth.relaxation_time_s - 1) < 0.05
    lines = (out / "diameter.csv").read_text().splitlines()
    assert lines[0].split(",")[:3] == ["frame", "time_s", "diameter_m"]
    assert len(lines) == truth.n_frames + 1
    row = lines[11].split(",")
    assert row[0] == "10" and float(row[1]) == 10 / 2500.0
    assert "NaN" not in (out / "result.json").read_text()


def test_same_input_same_output(recording, tmp_path):
    path, _ = recording
    for name in ("a", "b"):
        assert run(*analyse_args(path, tmp_path / name)).exit_code == 0
    for file in ("result.json", "diameter.csv", "diameter.png", "report.html"):
        assert (tmp_path / "a" / file).read_bytes() == (tmp_path / "b" / file).read_bytes(), file


def test_reference_width_calibration(recording, tmp_path):
    path, truth = recording
    out = tmp_path / "ref"
    result = run("analyse", path, "--out", out, "--fps", "2500", "--reference-width",
                 f"{truth.plate_diameter_m * 1e3}mm", "--surface-tension", "0.062 N/m")
    assert result.exit_code == 0, result.output
    data = json.loads((out / "result.json").read_text())
    assert abs(data["pixel_size_m"] / truth.pixel_size_m - 1) < 0.01


@pytest.mark.parametrize("case, message", [
    ("missing", "no such file"),
    ("empty-folder", "no image files"),
    ("junk", "not a recording"),
    ("no-fps", "frame rate"),
    ("bad-unit", "not a surface tension"),
    ("no-filament", "filament"),
    ("backlight-vignette", "no filament in any frame"),
    ("backlight-dust", "no filament in any frame"),
    ("no-surface-tension", "surface tension"),
    ("huge-png", "not a readable image"),
    ("roi-outside", "leaves less than 8×8 pixels"),
    ("out-inside-source", "inside the image folder"),
    ("decimal-comma", "comma"),
    ("out-name-too-long", "give a name of at most 207 bytes"),
])
def test_bad_input_is_one_sentence_and_exit_2(tmp_path, recording, case, message):
    import numpy as np
    import tifffile

    good, _ = recording
    source = tmp_path / "x.avi"
    extra = []
    args = None
    if case == "empty-folder":
        source = tmp_path / "empty"
        source.mkdir()
    elif case == "junk":
        source.write_bytes(b"\x00garbage" * 500)
    elif case == "no-filament":
        source = tmp_path / "blank.tif"
        tifffile.imwrite(source, np.full((20, 64, 64), 200, np.uint8), photometric="minisblack")
    elif case.startswith("backlight-"):
        # a backlight-only recording: a vignetted lamp, or dust specks drifting across it (a
        # dark shadow in view, but no liquid thread between end bodies in any frame)
        rng = np.random.default_rng(3)
        y, x = np.mgrid[:120, :100]
        lamp = 210.0 * (1.0 - 0.3 * ((x - 50) ** 2 + (y - 60) ** 2) / 5000.0)
        frames = np.repeat(lamp[None], 30, axis=0) + rng.normal(0.0, 2.0, (30, 120, 100))
        if case == "backlight-dust":
            for i in range(30):
                frames[i, (y - 40 - i) ** 2 + (x - 30) ** 2 < 25] = 40.0
                frames[i, (y - 90) ** 2 + (x - 70 + i) ** 2 < 9] = 60.0
        source = tmp_path / "lamp.tif"
        tifffile.imwrite(source, frames.clip(0, 255).astype(np.uint8), photometric="minisblack")
    elif case == "no-fps":
        source = tmp_path / "stack.tif"   # a TIFF carries no frame rate
        tifffile.imwrite(source, np.full((3, 64, 64), 200, np.uint8), photometric="minisblack")
        args = ["analyse", source, "--out", tmp_path / "o", "--pixel-size", "5um",
                "--surface-tension", "30"]
    elif case == "bad-unit":
        args = analyse_args(good, tmp_path / "o")
        args[args.index("--surface-tension") + 1] = "3 kg"
    elif case == "huge-png":
        # a PNG header claiming 100000 × 100000 pixels (OpenCV refuses to allocate it)
        import struct
        import zlib

        def chunk(kind, data):
            return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))
        source = tmp_path / "huge"
        source.mkdir()
        (source / "f1.png").write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(
            ">IIBBBBB", 100000, 100000, 8, 0, 0, 0, 0)) + chunk(b"IDAT", zlib.compress(b"\0" * 99))
            + chunk(b"IEND", b""))
    elif case == "roi-outside":
        args = analyse_args(good, tmp_path / "o", roi="1000,1000,2000,2000")
    elif case == "out-inside-source":
        import cv2
        source = tmp_path / "frames"
        source.mkdir()
        cv2.imwrite(str(source / "f1.png"), np.full((32, 32), 200, np.uint8))
        args = analyse_args(source, source / "results")
    elif case == "decimal-comma":
        args = analyse_args(good, tmp_path / "o")
        args[args.index("--fps") + 1] = "2,5kHz"
    elif case == "out-name-too-long":   # 230 bytes fit a file system, not beside a staging name
        args = analyse_args(good, tmp_path / ("a" * 230))
    elif case == "no-surface-tension":
        args = ["analyse", good, "--out", tmp_path / "o", "--fps", "2kHz", "--pixel-size", "5um"]
    if args is None:
        args = analyse_args(source, tmp_path / "o") + extra
    result = CliRunner().invoke(cli, [str(a) for a in args])
    assert result.exit_code == 2, result.output
    assert message in result.output
    assert "Traceback" not in result.output
    assert len(result.output.strip().splitlines()) <= 2


def test_failed_rerun_keeps_earlier_results(recording, tmp_path):
    path, _ = recording
    out = tmp_path / "keep"
    assert run(*analyse_args(path, out)).exit_code == 0
    before = (out / "result.json").read_bytes()
    result = CliRunner().invoke(cli, [str(a) for a in analyse_args(tmp_path / "gone.avi", out)])
    assert result.exit_code == 2
    assert (out / "result.json").read_bytes() == before


def test_truncated_video_is_analysed_with_a_warning(recording, tmp_path):
    path, _ = recording
    cut = tmp_path / "cut.avi"
    data = path.read_bytes()
    cut.write_bytes(data[: int(len(data) * 0.6)])
    out = tmp_path / "cut"
    result = run(*analyse_args(cut, out))
    assert result.exit_code == 0, result.output
    data = json.loads((out / "result.json").read_text())
    assert data["quality"] == "doubtful"
    assert any("broke off" in r for r in data["quality_reasons"])


def test_ctrl_c_exits_130_with_one_word(tmp_path):
    # a real process given SIGINT mid-command (the demo runs for many seconds)
    import signal
    import subprocess
    import sys

    proc = subprocess.Popen([sys.executable, "-m", "thinning.cli", "demo", "--out", str(tmp_path / "d"),
                             "--workers", "1"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    for line in proc.stdout:   # interrupt it inside the batch, after its first row
        if "row 1 " in line:
            break
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert err.strip().splitlines()[-1] == "thinning: interrupted."
    assert "Traceback" not in err and "Aborted" not in err


@pytest.mark.parametrize("what", ["video", "image-folder", "out"])
def test_names_that_are_not_utf8_are_refused_not_crashed_on(tmp_path, recording, what):
    # OpenCV's readers die (exit 139) on such names: a real process must exit 2 with one line
    import os
    import shutil
    import subprocess
    import sys

    good, _ = recording
    bad = os.fsdecode(b"caf\xe9\xff")
    source, out = tmp_path / "ok.avi", tmp_path / "o"
    if what == "video":
        source = tmp_path / f"{bad}.avi"
        shutil.copy(good, source)
    elif what == "image-folder":
        import cv2
        source = tmp_path / "frames"
        source.mkdir()
        cv2.imwrite(str(source / "f1.png"), np.full((32, 32), 200, np.uint8))
        (source / f"{bad}.png").write_bytes((source / "f1.png").read_bytes())
    else:
        shutil.copy(good, source)
        out = tmp_path / bad
    proc = subprocess.run([sys.executable, "-m", "thinning.cli", *map(str, analyse_args(source, out))],
                          capture_output=True)
    err = proc.stderr.decode("utf-8", "replace")
    assert proc.returncode == 2, err
    assert "not valid UTF-8" in err and len(err.strip().splitlines()) == 1
    assert not out.exists()


@pytest.mark.slow
def test_killed_analyse_leaves_its_folder_wholly_old_or_wholly_new(tmp_path, recording):
    # SIGKILL at 20 moments spread over a run towards the other of two versions (two surface
    # tensions): every file of the folder comes from one run, and the next run clears the killed
    # one's staging folder
    import signal
    import subprocess
    import sys
    import time

    good, _ = recording
    out = tmp_path / "o"
    versions = []
    for tension in ("62mN/m", "55mN/m"):
        command = [sys.executable, "-m", "thinning.cli", *map(str, analyse_args(good, out))]
        command[command.index("--surface-tension") + 1] = tension
        start = time.monotonic()
        subprocess.run(command, check=True, capture_output=True)
        full = time.monotonic() - start
        versions.append((command, {p.name: p.read_bytes() for p in out.iterdir()}))
    (_, old), (_, new) = versions
    assert new.keys() == old.keys() and new["result.json"] != old["result.json"]
    for k in range(20):
        now = {p.name: p.read_bytes() for p in out.iterdir()}
        command = versions[1][0] if now == old else versions[0][0]
        proc = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        time.sleep(full * (0.15 + 0.05 * k))
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        now = {p.name: p.read_bytes() for p in out.iterdir()}
        assert now in (old, new), sorted(name for name in now if now[name] != old.get(name))
    assert run(*analyse_args(good, out)).exit_code == 0
    assert {p.name: p.read_bytes() for p in out.iterdir()} == old
    assert sorted(p.name for p in tmp_path.iterdir()) == ["o"]


def test_a_playback_rate_used_without_fps_makes_the_record_doubtful():
    # an AVI's 25/s playback rate, taken for the camera's clock, would scale λ 100-fold or more
    from types import SimpleNamespace

    from thinning.checks import Severity
    from thinning.clock import resolve_clock
    from thinning.units import AnalysisOptions

    def video(rate):
        return SimpleNamespace(fps=rate, clock="container", timestamps_s=None, exposure_s=None,
                               trigger_frame=None)

    clock, findings = resolve_clock(AnalysisOptions(), video(25.0))
    assert (clock.fps_hz, clock.source) == (25.0, "container")
    assert [f.code for f in findings] == ["container-frame-rate"]
    assert findings[0].severity is Severity.DOUBTFUL
    clock, findings = resolve_clock(AnalysisOptions(), video(10000.0))
    assert (clock.fps_hz, clock.source, findings) == (10000.0, "container", [])
    clock, findings = resolve_clock(AnalysisOptions(fps_hz=5000.0), video(25.0))
    assert (clock.fps_hz, clock.source, findings) == (5000.0, "option", [])


@pytest.mark.parametrize("kind", ["tiff-pages", "image-bits"])
def test_frames_unlike_the_first_end_the_record_as_doubtful(tmp_path, recording, kind):
    # a TIFF whose second page has another size, or a folder mixing 8- and 16-bit frames, is
    # never analysed as one good recording
    import cv2
    import tifffile

    good, _ = recording
    cap = cv2.VideoCapture(str(good))
    frames = []
    while len(frames) < 12:
        ok, frame = cap.read()
        if not ok:
            break
        frames.append(cv2.cvtColor(frame, cv2.COLOR_BGR2GRAY))
    if kind == "tiff-pages":
        source = tmp_path / "mixed.tif"
        with tifffile.TiffWriter(source) as tif:
            tif.write(frames[0], photometric="minisblack")
            tif.write(np.zeros((40, 40), np.uint8), photometric="minisblack")
            for frame in frames[1:]:
                tif.write(frame, photometric="minisblack")
    else:
        source = tmp_path / "bits"
        source.mkdir()
        for i, frame in enumerate(frames):
            cv2.imwrite(str(source / f"f{i:03d}.png"), frame if i % 2 else frame.astype(np.uint16) * 256)
    result = run(*analyse_args(source, tmp_path / "o"))
    if result.exit_code == 0:
        data = json.loads((tmp_path / "o" / "result.json").read_text())
        assert data["quality"] == "doubtful" and "record-broken-off" in data["finding_codes"]
    else:
        assert result.exit_code == 2 and "Traceback" not in result.output


def test_a_folder_of_videos_points_to_batch(tmp_path, recording):
    import shutil

    good, _ = recording
    folder = tmp_path / "videos"
    folder.mkdir()
    shutil.copy(good, folder / "a.avi")
    shutil.copy(good, folder / "b.avi")
    result = CliRunner().invoke(cli, [str(a) for a in analyse_args(folder, tmp_path / "o")])
    assert result.exit_code == 2 and "thinning batch" in result.output


def test_a_mixed_folder_says_which_files_it_left_out(tmp_path, recording):
    good, truth = recording
    folder = tmp_path / "frames"
    synth.write_recording(synth.dilute_polymer_plates(**SMALL), synth.Optics(), folder, fmt="png-folder",
                          seed=7)
    (folder / "notes.txt").write_text("camera settings")
    (folder / "run.avi").write_bytes(good.read_bytes())
    result = run(*analyse_args(folder, tmp_path / "o"))
    assert result.exit_code == 0, result.output
    data = json.loads((tmp_path / "o" / "result.json").read_text())
    (left,) = [f for f in data["findings"] if f["code"] == "files-left-out"]
    assert left["severity"] == "note" and "notes.txt, run.avi" in left["message"]
    assert data["source"]["n_frames"] == truth.n_frames and data["quality"] == "good"


@pytest.mark.parametrize("limit", [3_000, 30_000, 150_000])   # at result.json, the figures, the report
def test_a_full_disk_during_analyse_is_exit_2_and_keeps_the_earlier_folder(tmp_path, recording, limit):
    import subprocess
    import sys

    from services import small_files

    good, _ = recording
    out = tmp_path / "o"
    assert run(*analyse_args(good, out)).exit_code == 0
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    command = [sys.executable, "-m", "thinning.cli", *map(str, analyse_args(good, out))]
    command[command.index("--surface-tension") + 1] = "55mN/m"
    proc = subprocess.run(command, capture_output=True, text=True, preexec_fn=small_files(limit))
    assert proc.returncode == 2 and "Traceback" not in proc.stderr, proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1 and "full" in proc.stderr
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["o"]
