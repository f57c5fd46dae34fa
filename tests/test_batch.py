"""Batches: row folders, results.csv, failed rows, resume, dying workers, kill and rerun.

Most tests run the batch machinery with :func:`fake_analyse` (imported by
the spawned workers as ``test_batch:fake_analyse``), which reads the frames
and writes a result.json quickly; the end-to-end tests use the real
analysis on synthetic recordings from :mod:`thinning.synth`.
"""

import csv
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile
from click.testing import CliRunner

from thinning.batch import (RESULT_COLUMNS, TABLE_COLUMNS, TEMP_SUFFIX, row_folder_name, run_batch,
                            safe_name)
from thinning.cli import cli
from thinning.result import Result

pytestmark = pytest.mark.slow  # renders or runs whole recordings, batches or services

FAKE = "test_batch:fake_analyse"
CALLS_ENV = "THINNING_TEST_CALLS"      # file the fake appends one line per analysis to
MARKS_ENV = "THINNING_TEST_MARKS"      # folder for the fake's crash-once markers
DELAY_ENV = "THINNING_TEST_DELAY_S"    # seconds the fake sleeps per row
REPO = Path(__file__).resolve().parents[1]


def fake_analyse(source, out_dir, options, *, progress=None):
    """Stand-in for thinning.analysis.analyse: same errors, same files, numbers from the pixels.

    A source whose stem contains ``crash-always`` kills its process; ``crash-once`` does so
    on the first attempt only.
    """
    from thinning.analysis import UnusableInput
    from thinning.atomic import write_bytes as atomic_write_bytes
    from thinning.frames import UnusableSource, open_source

    stem = Path(source).stem
    if "crash-always" in stem:
        os._exit(7)
    if "crash-once" in stem:
        mark = Path(os.environ[MARKS_ENV]) / stem
        if not mark.exists():
            mark.write_text("crashed")
            os._exit(7)
    if os.environ.get(CALLS_ENV):
        with open(os.environ[CALLS_ENV], "a") as fh:
            fh.write(f"{Path(source).name}\n")
    time.sleep(float(os.environ.get(DELAY_ENV, "0")))
    if options.surface_tension_N_m is None:
        raise UnusableInput("No surface tension given; pass --surface-tension, e.g. '35mN/m'.")
    try:
        recording = open_source(source)
    except UnusableSource as exc:
        raise UnusableInput(str(exc)) from None
    with recording:
        fps = options.fps_hz or recording.fps
        if fps is None:
            raise UnusableInput("The recording carries no frame rate; pass --fps, e.g. --fps 10kHz.")
        means = [float(frame.mean()) for frame in recording]
        sha256 = recording.sha256
    lam = float(np.mean(means)) / 7e4 + options.surface_tension_N_m / 3.0
    result = {
        "schema": "thinning.result/1", "tool_version": "0.0-fake",
        "source": {"path": str(source), "sha256": sha256, "n_frames": len(means)},
        "fps_hz": fps, "pixel_size_m": options.pixel_size_m, "options": options.to_dict(),
        "regime": "elasto-capillary", "relaxation_time_s": lam,
        "relaxation_time_ci95_s": [lam * 0.9, lam * 1.1], "elastic_modulus_Pa": 1.0 / 3.0,
        "shear_viscosity_Pa_s": None, "extensional_viscosity_max_Pa_s": 12.5,
        "breakup_time_s": len(means) / fps, "filament_lifetime_s": len(means) / fps,
        "initial_diameter_m": 1e-3,
        "findings": [{"code": "beads", "severity": "note", "message": "First sentence.",
                      "t_range_s": None},
                     {"code": "tilt", "severity": "note", "message": "Second, with a comma.",
                      "t_range_s": None}],
    }
    Path(out_dir).mkdir(parents=True, exist_ok=True)
    atomic_write_bytes(Path(out_dir) / "diameter.csv", b"frame,time_s,diameter_m\n")
    result = Result.from_json(result)
    atomic_write_bytes(Path(out_dir) / "result.json", result.to_json_text().encode())
    return result


def write_stack(path, rng, n_frames=5, shape=(16, 24)):
    """A tiny multi-page TIFF with random pixels."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tifffile.imwrite(path, rng.integers(0, 256, (n_frames, *shape), dtype=np.uint8),
                     photometric="minisblack")
    return path


def small_scene():
    """A dilute polymer solution (λ = 5 ms) in 128 × 64 px frames at 2000/s: ~170 frames to breakup."""
    from thinning import synth

    return synth.dilute_polymer_plates(frame_size_px=(128, 64), pixel_size_m=25e-6, fps_hz=2000.0,
                                       plate_diameter_m=1.4e-3, initial_diameter_m=0.7e-3,
                                       stretch_duration_s=0.0, pre_roll_s=0.0)


#: Real-analysis rows: (file, writer format, seed); the batch gives the calibration.
SYNTHETIC = (("raw.avi", "avi-raw", 11), ("stack.tif", "tiff", 12), ("frames", "png-folder", 13))
SYNTHETIC_DEFAULTS = {"fps": "2000/s", "pixel_size": "25um", "surface_tension": "62mN/m"}


def write_synthetic_set(folder):
    """Three tiny synthetic recordings plus a corrupt file, an empty folder and a missing file.

    Returns the manifest path; rows 2, 4 and 6 are the bad ones.
    """
    from thinning import synth

    folder.mkdir(parents=True, exist_ok=True)
    for name, fmt, seed in SYNTHETIC:
        synth.write_recording(small_scene(), synth.Optics(), folder / name, fmt=fmt, seed=seed)
    rng = np.random.default_rng(14)
    (folder / "corrupt.avi").write_bytes(b"RIFF" + rng.integers(0, 256, 4000, dtype=np.uint8).tobytes())
    (folder / "empty").mkdir()
    manifest = folder / "manifest.csv"
    manifest.write_text("path,sample,lot,product,replicate\n"
                        "raw.avi,S1,L1,ink,1\n"
                        "corrupt.avi,S2,L1,ink,2\n"
                        "stack.tif,S3,L1,ink,3\n"
                        "empty,S4,L2,ink,1\n"
                        "frames,S5,L2,ink,2\n"
                        "gone.avi,S6,L2,ink,3\n")
    return manifest


def read_table(path):
    with open(path, newline="", encoding="utf-8-sig") as fh:
        reader = csv.DictReader(fh)
        return reader.fieldnames, list(reader)


def stacks_and_manifest(folder, names, *, seed, missing=()):
    """Tiny stacks ``NAME.tif`` for ``names`` and ``folder/m.csv`` listing them (then the
    ``missing`` files), each at 10 kHz; returns the manifest path."""
    rng = np.random.default_rng(seed)
    for name in names:
        write_stack(folder / f"{name}.tif", rng)
    manifest = folder / "m.csv"
    manifest.write_text("path,fps\n" + "".join(f"{n}.tif,10kHz\n" for n in (*names, *missing)))
    return manifest


def calls(path):
    return path.read_text().split() if path.exists() else []


@pytest.fixture
def fake_env(tmp_path, monkeypatch):
    """Environment the fake analyser reads in the workers; returns the calls file."""
    marks = tmp_path / "marks"
    marks.mkdir()
    monkeypatch.setenv(CALLS_ENV, str(tmp_path / "calls.txt"))
    monkeypatch.setenv(MARKS_ENV, str(marks))
    monkeypatch.delenv(DELAY_ENV, raising=False)
    return tmp_path / "calls.txt"


DEFAULTS = {"surface_tension": "35mN/m", "pixel_size": "10um"}


def test_names():
    # docs/contract.md: row zero-padded to the width of the largest row number; unsafe chars → "_"
    assert safe_name("Lot 7/ä+b.c_d-e") == "Lot_7___b.c_d-e"
    assert row_folder_name(3, "S 1", 3) == "003-S_1"
    assert row_folder_name(12, "x", 2) == "12-x"
    # names over 80 characters are cut, with a digest of the whole name (file names hold 255 bytes)
    long_a, long_b = "S" * 300 + "a", "S" * 300 + "b"
    assert len(safe_name(long_a)) == 80 and safe_name(long_a) != safe_name(long_b)
    assert safe_name(long_a).startswith("S" * 71 + "-")


def test_a_very_long_sample_name_is_analysed_like_any_other(tmp_path, fake_env):
    rng = np.random.default_rng(6)
    write_stack(tmp_path / "a.tif", rng)
    manifest = tmp_path / "m.csv"
    manifest.write_text(f"path,sample,fps\na.tif,{'x' * 300},10kHz\n")
    report = run_batch(manifest, tmp_path / "out", defaults=DEFAULTS, workers=1, analyser=FAKE)
    assert report.n_ok == 1


def test_failed_rows_and_results_table(tmp_path, fake_env):
    rng = np.random.default_rng(3)
    data = tmp_path / "data"
    for name in ("a", "b", "c"):
        write_stack(data / f"{name}.tif", rng)
    (data / "corrupt.tif").write_bytes(rng.integers(0, 256, 900, dtype=np.uint8).tobytes())
    (data / "empty").mkdir()
    manifest = tmp_path / "m.csv"
    rows = [("data/a.tif", "Sample A", "L1", "10kHz", ""),
            ("data/corrupt.tif", "", "L1", "10kHz", ""),
            ("data/b.tif", "B", "L2", "", ""),           # no rate anywhere: a failed row
            ("data/empty", "E", "L2", "10kHz", ""),
            ("data/missing.tif", "M", "L2", "10kHz", ""),
            ("data/c.tif", "C", "L3", "20000/s", "70"),
            ("data/c.tif", "C2", "L3", "3 kg", ""),       # bad cell: a failed row
            ("data/a.tif", "A2", "L1", "10kHz", ""),
            ("data/b.tif", "B2", "L1", "8kHz", ""),
            ("data/c.tif", "C3", "L1", "8kHz", "")]
    with open(manifest, "w", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow(["path", "sample", "lot", "fps", "surface_tension"])
        writer.writerows(rows)
    out = tmp_path / "out"
    report = run_batch(manifest, out, defaults=DEFAULTS, workers=2, analyser=FAKE)
    assert (report.n_rows, report.n_ok, report.n_failed) == (10, 5, 5)

    columns, table = read_table(out / "results.csv")
    assert tuple(columns[:len(RESULT_COLUMNS)]) == RESULT_COLUMNS
    assert tuple(columns) == TABLE_COLUMNS
    assert [r["row"] for r in table] == [str(i) for i in range(1, 11)]
    assert [r["path"] for r in table] == [r[0] for r in rows]
    status = {int(r["row"]): r["status"] for r in table}
    assert [k for k, v in status.items() if v == "failed"] == [2, 3, 4, 5, 7]
    reasons = {int(r["row"]): r["reason"] for r in table}
    assert "frame rate" in reasons[3] and "no image files" in reasons[4]
    assert "no such file" in reasons[5] and "column fps" in reasons[7]
    assert all(r["reason"] == "" for r in table if r["status"] == "ok")

    folders = sorted(p.name for p in out.iterdir() if p.is_dir())
    assert folders == ["01-Sample_A", "02-corrupt", "03-B", "04-E", "05-M", "06-C", "07-C2",
                       "08-A2", "09-B2", "10-C3"]
    for r in table:
        folder = out / r["folder"]
        record = json.loads((folder / "row.json").read_text())
        assert record["status"] == r["status"]
        if r["status"] == "failed":
            assert sorted(p.name for p in folder.iterdir()) == ["row.json"]
            continue
        result = json.loads((folder / "result.json").read_text())
        # numbers at full precision: every value round-trips exactly
        assert float(r["relaxation_time_s"]) == result["relaxation_time_s"]
        assert float(r["relaxation_time_ci95_high_s"]) == result["relaxation_time_ci95_s"][1]
        assert float(r["elastic_modulus_Pa"]) == 1.0 / 3.0
        assert r["shear_viscosity_Pa_s"] == ""
        assert r["warnings"] == "First sentence.; Second, with a comma."
        assert r["sha256"] == result["source"]["sha256"]
    assert float(table[5]["fps_hz"]) == 20000.0
    assert table[0]["analysed_at"].endswith("Z")

    parquet = pytest.importorskip("pyarrow.parquet")
    frame = parquet.read_table(out / "results.parquet").to_pandas()
    assert list(frame["status"]) == [r["status"] for r in table]
    assert frame["relaxation_time_s"].iloc[0] == float(table[0]["relaxation_time_s"])
    assert not any(p.name.endswith(TEMP_SUFFIX) for p in out.iterdir())


def test_resume_skips_finished_rows_and_redoes_changed_ones(tmp_path, fake_env):
    manifest = stacks_and_manifest(tmp_path, ("a", "b", "c"), seed=4, missing=("none",))
    rng = np.random.default_rng(40)                     # for new content later
    out = tmp_path / "out"
    first = run_batch(manifest, out, defaults=DEFAULTS, workers=2, analyser=FAKE)
    assert sorted(calls(fake_env)) == ["a.tif", "b.tif", "c.tif", "none.tif"]
    _, before = read_table(out / "results.csv")

    fake_env.unlink()
    again = run_batch(manifest, out, defaults=DEFAULTS, workers=2, analyser=FAKE)
    assert calls(fake_env) == ["none.tif"]            # failed rows are tried again
    assert again.n_skipped == 3
    _, after = read_table(out / "results.csv")
    assert after[:3] == before[:3]                    # skipped rows keep their analysed_at too

    fake_env.unlink()
    manifest.write_text("path,fps\na.tif,10kHz\nb.tif,12kHz\nc.tif,10kHz\nnone.tif,10kHz\n")
    write_stack(tmp_path / "c.tif", rng)               # new content, same name
    run_batch(manifest, out, defaults=DEFAULTS, workers=2, analyser=FAKE)
    assert sorted(calls(fake_env)) == ["b.tif", "c.tif", "none.tif"]

    fake_env.unlink()
    run_batch(manifest, out, defaults={**DEFAULTS, "density": "1000"}, workers=1, analyser=FAKE)
    assert len(calls(fake_env)) == 4                   # a batch-wide option changed every row

    fake_env.unlink()
    run_batch(manifest, out, defaults={**DEFAULTS, "density": "1000"}, workers=1, analyser=FAKE,
              redo=True)
    assert len(calls(fake_env)) == 4
    assert first.n_rows == 4


def test_dying_worker_is_retried_once(tmp_path, fake_env):
    rng = np.random.default_rng(5)
    for name in ("a", "crash-once", "crash-always", "b"):
        write_stack(tmp_path / f"{name}.tif", rng)
    manifest = tmp_path / "m.csv"
    manifest.write_text("path\na.tif\ncrash-once.tif\ncrash-always.tif\nb.tif\n")
    out = tmp_path / "out"
    report = run_batch(manifest, out, defaults={**DEFAULTS, "fps": "1kHz"}, workers=2, analyser=FAKE)
    _, table = read_table(out / "results.csv")
    assert [r["status"] for r in table] == ["ok", "ok", "failed", "ok"]
    assert "died 2 times" in table[2]["reason"]
    record = json.loads((out / table[2]["folder"] / "row.json").read_text())
    assert record["status"] == "failed" and sorted(os.listdir(out / table[2]["folder"])) == ["row.json"]
    assert report.outcomes[2].attempts == 2 and report.outcomes[3].attempts == 2
    assert report.outcomes[1].attempts == 1 and report.outcomes[4].attempts == 1
    assert not any(p.name.endswith(TEMP_SUFFIX) for p in out.iterdir())


def test_nothing_written_outside_out(tmp_path, fake_env):
    rng = np.random.default_rng(6)
    data = tmp_path / "data"
    write_stack(data / "a.tif", rng)
    manifest = data / "m.csv"
    manifest.write_text("path,fps\na.tif,5kHz\n")
    before = {p: p.stat().st_mtime_ns for p in data.rglob("*")}
    run_batch(manifest, tmp_path / "out", defaults=DEFAULTS, workers=1, analyser=FAKE)
    assert {p: p.stat().st_mtime_ns for p in data.rglob("*")} == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["calls.txt", "data", "marks", "out"]


def test_leftover_temporary_folders_are_removed(tmp_path, fake_env):
    rng = np.random.default_rng(7)
    write_stack(tmp_path / "a.tif", rng)
    manifest = tmp_path / "m.csv"
    manifest.write_text("path,fps\na.tif,5kHz\n")
    out = tmp_path / "out"
    stale = out / f".1-a.new-123-abcd{TEMP_SUFFIX}"
    stale.mkdir(parents=True)
    (stale / "result.json").write_text("{half")
    run_batch(manifest, out, defaults=DEFAULTS, workers=1, analyser=FAKE)
    assert sorted(p.name for p in out.iterdir() if p.is_dir()) == ["1-a"]


def test_real_batch_matches_single_analyses(tmp_path):
    from thinning.analysis import analyse_to
    from thinning.units import options_from_text

    manifest = write_synthetic_set(tmp_path / "data")
    out = tmp_path / "out"
    specs = tmp_path / "specs.toml"
    specs.write_text('[[product]]\nname = "ink"\nrelaxation_time_s = [0.004, 0.006]\n'
                     'replicates = 3\nmax_cv = 0.10\n')
    db_url = f"sqlite:///{tmp_path / 'records.db'}"
    runner = CliRunner()
    args = ["batch", str(manifest), "--out", str(out), "--workers", "2", "--db", db_url,
            "--specs", str(specs)]
    for name, value in SYNTHETIC_DEFAULTS.items():
        args += [f"--{name.replace('_', '-')}", value]
    done = runner.invoke(cli, args)
    assert done.exit_code == 0, done.output     # failed rows do not fail the batch
    assert "6 rows: 3 ok, 3 failed" in done.output
    _, table = read_table(out / "results.csv")
    assert [r["status"] for r in table] == ["ok", "failed", "ok", "failed", "ok", "failed"]
    assert "corrupt.avi" in table[1]["reason"] and "no image files" in table[3]["reason"]
    assert "no such file" in table[5]["reason"]
    options = options_from_text(SYNTHETIC_DEFAULTS)
    for r, (name, _, _) in zip([table[0], table[2], table[4]], SYNTHETIC):
        single = analyse_to(tmp_path / "data" / name, tmp_path / "single" / name, options).to_json()
        batched = json.loads((out / r["folder"] / "result.json").read_text())
        single["source"].pop("path"), batched["source"].pop("path")
        assert batched == single
        assert r["sha256"] == single["source"]["sha256"]
        lam = single["relaxation_time_s"]
        assert (r["relaxation_time_s"] == "") if lam is None else (float(r["relaxation_time_s"]) == lam)
        assert float(r["fps_hz"]) == 2000.0 and float(r["pixel_size_m"]) == single["pixel_size_m"]
        assert r["quality"] == single["quality"] and r["regime"] == single["regime"]
        assert r["warnings"] == "; ".join(single["warnings"])

    # --db: every ok row stored as a measurement, from the coordinating process as rows finished
    from thinning.records import open_records

    with open_records(db_url) as records:
        stored = records.export_rows()
        lots = {lot.lot for lot in records.lots(product="ink")}
    assert sorted(m["sha256"] for m in stored) == sorted(r["sha256"] for r in table if r["status"] == "ok")
    assert lots == {"L1", "L2"}
    # each with the digests of its row folder, so that the folder can be checked later
    checked = runner.invoke(cli, ["records", "verify", "--db", db_url, "--folder", str(out)])
    assert checked.exit_code == 0 and "3 stored measurements intact; 3 rows" in checked.output, checked.output
    from sqlalchemy import create_engine, select

    from thinning.records import measurements
    engine = create_engine(db_url)
    with engine.connect() as conn:
        kept = [json.loads(v) for (v,) in conn.execute(select(measurements.c.outputs_json))]
    engine.dispose()
    assert len(kept) == 3 and all({"result.json", "diameter.csv", "report.html"} <= set(k) for k in kept)


def test_killed_command_then_rerun_keeps_each_recording_once(tmp_path):
    data = tmp_path / "data"
    write_synthetic_set(data)
    manifest = data / "manifest.csv"
    lines = ["path,sample"] + [f"{name},K{i}" for i in range(2) for name in ("raw.avi", "stack.tif")]
    manifest.write_text("\n".join(lines) + "\n")
    out = tmp_path / "out"
    args = [sys.executable, "-m", "thinning.cli", "batch", str(manifest), "--out", str(out),
            "--workers", "2"]
    for name, value in SYNTHETIC_DEFAULTS.items():
        args += [f"--{name.replace('_', '-')}", value]
    proc = subprocess.Popen(args, cwd=tmp_path, start_new_session=True, stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT)
    try:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            if (out / "results.csv").exists() and len(read_table(out / "results.csv")[1]) >= 2:
                break
            time.sleep(0.05)
        else:
            pytest.fail("the batch finished no row within 120 s")
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
        proc.stdout.close()
    _, partial = read_table(out / "results.csv")
    assert 2 <= len(partial) < 4
    stamps = {r["row"]: json.loads((out / r["folder"] / "row.json").read_text())["analysed_at"]
              for r in partial}
    time.sleep(0.5)
    rerun = subprocess.run(args, cwd=tmp_path, capture_output=True, text=True, timeout=300)
    assert rerun.returncode == 0, rerun.stderr
    assert rerun.stdout.count("(up to date)") >= len(partial)
    _, table = read_table(out / "results.csv")
    assert [r["row"] for r in table] == [str(i) for i in range(1, 5)]
    assert all(r["status"] == "ok" for r in table)
    entries = sorted(p.name for p in out.iterdir() if not p.name.startswith("."))
    assert entries == sorted([r["folder"] for r in table] + ["results.csv", "results.parquet"])
    assert not any(p.name.endswith(TEMP_SUFFIX) for p in out.iterdir())
    for r in table:
        folder = out / r["folder"]
        assert (folder / "result.json").is_file() and (folder / "report.html").is_file()
        if r["row"] in stamps:   # finished before the kill: kept, not analysed again
            assert json.loads((folder / "row.json").read_text())["analysed_at"] == stamps[r["row"]]
    assert not list(tmp_path.glob("*.db")) and sorted(p.name for p in tmp_path.iterdir()) == ["data", "out"]


_KILL_SCRIPT = """
import sys
sys.path.insert(0, {tests!r})
from thinning.batch import run_batch
if __name__ == "__main__":
    run_batch({manifest!r}, {out!r}, defaults={defaults!r}, workers=2, analyser={fake!r}, redo={redo!r})
"""


def test_kill_and_rerun_analyses_every_recording_exactly_once(tmp_path, fake_env, monkeypatch):
    rng = np.random.default_rng(8)
    names = [f"r{i}" for i in range(8)]
    for name in names:
        write_stack(tmp_path / f"{name}.tif", rng)
    manifest = tmp_path / "m.csv"
    manifest.write_text("path,fps\n" + "".join(f"{n}.tif,5kHz\n" for n in names))
    out = tmp_path / "out"
    script = tmp_path / "run.py"
    script.write_text(_KILL_SCRIPT.format(tests=str(Path(__file__).parent), manifest=str(manifest),
                                          out=str(out), defaults=DEFAULTS, fake=FAKE, redo=False))
    env = {**os.environ, DELAY_ENV: "0.4"}
    proc = subprocess.Popen([sys.executable, str(script)], env=env, start_new_session=True)
    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            if (out / "results.csv").exists() and len(read_table(out / "results.csv")[1]) >= 2:
                break
            time.sleep(0.05)
        else:
            pytest.fail("the batch finished no row within 60 s")
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
    _, partial = read_table(out / "results.csv")
    finished_before = {r["path"] for r in partial}
    assert 2 <= len(finished_before) < len(names)
    time.sleep(0.5)   # the workers die with the coordinator (PR_SET_PDEATHSIG) and stop writing
    first_calls = calls(fake_env)

    run_batch(manifest, out, defaults=DEFAULTS, workers=2, analyser=FAKE)
    _, table = read_table(out / "results.csv")
    assert [r["path"] for r in table] == [f"{n}.tif" for n in names]
    assert all(r["status"] == "ok" for r in table)
    folders = sorted(p.name for p in out.iterdir() if not p.name.startswith("."))
    assert folders == sorted([f"{i + 1}-{n}" for i, n in enumerate(names)]
                             + ["results.csv", "results.parquet"])
    assert not any(p.name.endswith(TEMP_SUFFIX) for p in out.iterdir())
    rerun_calls = calls(fake_env)[len(first_calls):]
    # rows finished before the kill are not analysed again; every other row once in the rerun
    assert sorted(rerun_calls) == sorted(set(f"{n}.tif" for n in names) - finished_before)


def test_redo_killed_at_twenty_moments_keeps_every_row_once_and_whole(tmp_path, fake_env):
    # SIGKILL at 20 moments spread over `batch --redo` of a finished six-row batch: after each kill
    # both tables still list every row exactly once, each row folder holds the files of one
    # analysis (its row.json digests match), and a rerun leaves no debris
    from thinning.batch.rows import ROW_FILE, changed_outputs

    rng = np.random.default_rng(9)
    names = [f"q{i}" for i in range(6)]
    for name in names:
        write_stack(tmp_path / f"{name}.tif", rng)
    manifest = tmp_path / "m.csv"
    manifest.write_text("path,fps\n" + "".join(f"{n}.tif,5kHz\n" for n in names))
    out = tmp_path / "out"
    run_batch(manifest, out, defaults=DEFAULTS, workers=2, analyser=FAKE)
    script = tmp_path / "redo.py"
    script.write_text(_KILL_SCRIPT.format(tests=str(Path(__file__).parent), manifest=str(manifest),
                                          out=str(out), defaults=DEFAULTS, fake=FAKE, redo=True))
    env = {**os.environ, DELAY_ENV: "0.2"}
    start = time.monotonic()
    subprocess.run([sys.executable, str(script)], env=env, check=True)
    full = time.monotonic() - start
    folders = sorted([f"{i + 1}-{n}" for i, n in enumerate(names)] + ["results.csv", "results.parquet"])
    for k in range(20):
        proc = subprocess.Popen([sys.executable, str(script)], env=env, start_new_session=True)
        time.sleep(full * (0.1 + 0.045 * k))
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=10)
        time.sleep(0.1)
        _, table = read_table(out / "results.csv")
        assert [r["path"] for r in table] == [f"{n}.tif" for n in names], k
        assert (out / "results.parquet").is_file(), k
        for r in table:
            record = json.loads((out / r["folder"] / ROW_FILE).read_text())
            assert changed_outputs(out / r["folder"], record) == [], (k, r["folder"])
        run_batch(manifest, out, defaults=DEFAULTS, workers=2, analyser=FAKE)
        _, table = read_table(out / "results.csv")
        assert [r["path"] for r in table] == [f"{n}.tif" for n in names] and all(
            r["status"] == "ok" for r in table), k
        for r in table:   # the table tells what each row folder holds
            record = json.loads((out / r["folder"] / ROW_FILE).read_text())
            assert r["analysed_at"] == record["analysed_at"], (k, r["folder"])
        assert sorted(p.name for p in out.iterdir() if not p.name.startswith(".")) == folders, k
        hidden = sorted(p.name for p in out.iterdir() if p.name.startswith("."))
        assert hidden == [".thinning-batch.lock"], (k, hidden)   # the lock stays; nothing else


def test_batch_command_errors(tmp_path):
    runner = CliRunner()
    unknown = tmp_path / "m.csv"
    unknown.write_text("path,surface_tensoin\na.tif,35\n")
    result = runner.invoke(cli, ["batch", str(unknown), "--out", str(tmp_path / "out")])
    assert result.exit_code == 2 and "'surface_tensoin'" in result.output
    assert not (tmp_path / "out").exists()
    good = tmp_path / "good.csv"
    good.write_text("path\na.tif\n")
    result = runner.invoke(cli, ["batch", str(good), "--out", str(tmp_path / "out"), "--fps", "3 kg"])
    assert result.exit_code == 2
    result = runner.invoke(cli, ["batch", str(good), "--out", str(tmp_path / "out"),
                                 "--specs", str(tmp_path / "specs.toml")])
    assert result.exit_code == 2 and "--db" in result.output


@pytest.mark.parametrize("cell, shown", [
    ("=HYPERLINK(\"http://x\",\"y\")", "'=HYPERLINK(\"http://x\",\"y\")"),
    ("@SUM(A1:A9)", "'@SUM(A1:A9)"), ("+cmd|' /C calc'!A0", "'+cmd|' /C calc'!A0"),
    ("-2+3", "'-2+3"), ("\tx", "'\tx"),
    ("-0.5", "-0.5"), ("+1e-3", "+1e-3"), ("lot 7 = ok", "lot 7 = ok"), ("'quoted", "'quoted"),
])
def test_results_table_cells_never_start_a_formula(tmp_path, cell, shown):
    # OWASP, "CSV Injection": a text cell starting with = + - @ tab or CR gets an apostrophe;
    # numbers stay numbers; the batch reads its own table back unchanged
    from thinning.batch.table import TABLE_COLUMNS, _text, write_results_csv
    from thinning.values import from_spreadsheet_safe, spreadsheet_safe

    assert spreadsheet_safe(cell) == shown
    assert from_spreadsheet_safe(shown) == cell
    row = {c: None for c in TABLE_COLUMNS} | {"row": 1, "notes": cell, "sample": "S1"}
    write_results_csv(tmp_path, [row])
    raw = (tmp_path / "results.csv").read_bytes()
    assert raw.startswith(b"\xef\xbb\xbf")          # a byte-order mark for spreadsheets
    _, table = read_table(tmp_path / "results.csv")
    assert table[0]["notes"] == shown and _text(table[0]["notes"]) == cell


def test_an_interrupted_redo_keeps_every_row_in_both_tables(tmp_path, fake_env):
    # Ctrl-C after the first row of a --redo: results.csv and results.parquet still list every
    # row, the first as redone and the others as they were
    manifest = stacks_and_manifest(tmp_path, ("a", "b", "c"), seed=5)
    out = tmp_path / "out"
    run_batch(manifest, out, defaults=DEFAULTS, workers=1, analyser=FAKE)
    _, before = read_table(out / "results.csv")

    def interrupt(row, outcome, folder):
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_batch(manifest, out, defaults=DEFAULTS, workers=1, analyser=FAKE, redo=True,
                  on_row=interrupt)
    _, after = read_table(out / "results.csv")
    assert [r["row"] for r in after] == ["1", "2", "3"]
    assert sum(a != b for a, b in zip(after, before)) <= 1       # only the redone row changed
    import importlib.util
    if importlib.util.find_spec("pyarrow"):
        import pandas as pd
        assert list(pd.read_parquet(out / "results.parquet")["row"]) == [1, 2, 3]


def test_an_edited_result_is_refused_by_name_and_analysed_again_on_resume(tmp_path, fake_env):
    # row.json keeps the SHA-256 of every output: records load (read_batch) refuses an edited
    # folder, naming the file, and a rerun analyses the row again instead of copying the edit
    from thinning.batch import read_batch
    from thinning.batch.table import UnusableBatchFolder

    manifest = stacks_and_manifest(tmp_path, ("a", "b"), seed=8)
    out = tmp_path / "out"
    run_batch(manifest, out, defaults=DEFAULTS, workers=1, analyser=FAKE)
    assert len(read_batch(out)) == 2
    _, table = read_table(out / "results.csv")
    edited = out / table[0]["folder"] / "result.json"
    data = json.loads(edited.read_text())
    data["relaxation_time_s"] = 1.0
    edited.write_text(json.dumps(data))
    with pytest.raises(UnusableBatchFolder, match="result.json was changed after its analysis"):
        read_batch(out)
    fake_env.unlink()
    run_batch(manifest, out, defaults=DEFAULTS, workers=1, analyser=FAKE)
    assert calls(fake_env) == ["a.tif"]
    assert len(read_batch(out)) == 2


@pytest.mark.slow
def test_a_full_disk_during_a_batch_is_exit_2_and_keeps_what_was_written(tmp_path):
    # a write-failing shim: the child's file-size limit (RLIMIT_FSIZE, SIGXFSZ ignored) makes
    # every write past 20 kB fail with EFBIG, as a full disk does with ENOSPC
    import resource

    from thinning import synth

    data = tmp_path / "data"
    data.mkdir()
    for name, seed in (("a.avi", 21), ("b.avi", 22)):
        synth.write_recording(small_scene(), synth.Optics(), data / name, fmt="avi-raw", seed=seed)
    manifest = data / "m.csv"
    manifest.write_text("path,sample,lot,product\na.avi,S1,L1,ink\nb.avi,S2,L1,ink\n")
    out = tmp_path / "out"
    command = [sys.executable, "-m", "thinning.cli", "batch", str(manifest), "--out", str(out),
               "--fps", "2000/s", "--pixel-size", "25um", "--surface-tension", "62mN/m",
               "--workers", "1"]
    subprocess.run(command, check=True, capture_output=True)
    before = {p.relative_to(out).as_posix(): p.read_bytes() for p in out.rglob("*")
              if p.is_file() and p.parent != out}

    def small_files():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (20_000, 20_000))

    proc = subprocess.run(command + ["--redo"], capture_output=True, text=True,
                          preexec_fn=small_files)
    assert proc.returncode == 2, proc.stderr
    assert "Traceback" not in proc.stderr
    assert proc.stderr.strip().splitlines()[-1].startswith("thinning: 2 row(s) could not be written")
    after = {p.relative_to(out).as_posix(): p.read_bytes() for p in out.rglob("*")
             if p.is_file() and p.parent != out}
    assert after == before                            # the rows' folders are untouched
    _, table = read_table(out / "results.csv")
    assert [r["row"] for r in table] == ["1", "2"]
    assert not [p for p in out.iterdir() if p.name.endswith(TEMP_SUFFIX)]
