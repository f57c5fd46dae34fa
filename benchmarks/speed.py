"""Decode and analysis speed on the 20,000-frame benchmark recording, and peak memory.

Generates once (cached) the benchmark recording of ``thinning.synth``: an 8-bit
MJPG AVI of 512 × 256 frames, a slowly thinning elastic filament between plates
that breaks near the end. Then, each in a fresh child process (so that each peak
memory figure is its own):

- decode only, every route measured: the compressed packets decoded in a thread
  pool (what :class:`thinning.frames.VideoSource` does) with 1 to max(4, cores + 1)
  threads, and
  OpenCV's plain ``read()`` with its colour conversion;
- the neck measurement alone (:func:`thinning.measure.measure_recording`), on the
  stream and on the first ``IN_MEMORY_FRAMES`` frames decoded beforehand (the
  analysis cost alone, without decoders competing for the cores);
- the whole analysis (:func:`thinning.analysis.analyse`: frames → diameters →
  regimes, fits, figures, report, files), when that module is present.

Prints frames/s, peak resident memory (VmHWM of the child) and the ratio
of the analysis rate to the fastest decode-only rate.

    python benchmarks/speed.py [--frames 20000] [--dir FOLDER] [--orientation horizontal]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path


#: Frames decoded into memory for the decoder-free measurement (about 260 MB).
IN_MEMORY_FRAMES = 2000


def recording(folder: Path, n_frames: int, orientation: str = "vertical") -> Path:
    """The benchmark file (written when missing)."""
    from thinning import synth

    name = "benchmark" if orientation == "vertical" else f"benchmark-{orientation}"
    path = folder / f"{name}-{n_frames}.avi"
    if not path.exists():
        folder.mkdir(parents=True, exist_ok=True)
        started = time.perf_counter()
        partial = folder / f"partial-{os.getpid()}-{name}-{n_frames}.avi"
        synth.write_benchmark_recording(partial, n_frames=n_frames, seed=0, orientation=orientation)
        partial.rename(path)
        truth = synth.truth_path(partial)
        if truth.exists():
            truth.rename(synth.truth_path(path))
        print(f"wrote {path} in {time.perf_counter() - started:.0f} s", flush=True)
    return path


def _peak_rss_mb() -> float:
    """Peak resident memory of this process (MB): VmHWM, which starts afresh at exec.

    (``ru_maxrss`` would not: Linux carries into it the resident size of the forking parent.)
    """
    try:
        with open("/proc/self/status") as status:
            for line in status:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB on Linux


def child(mode: str, path: str, threads: int) -> dict:
    """Run one measurement in this process; return frames, seconds and peak memory."""
    import numpy as np

    started = time.perf_counter()
    if mode == "decode-packets":
        from thinning.frames import VideoSource

        count = 0
        with VideoSource(path, decode_threads=threads) as source:
            for frame in source:
                count += 1
    elif mode == "decode-read":
        import cv2

        cap = cv2.VideoCapture(path, cv2.CAP_FFMPEG)
        count = 0
        while True:
            ok, frame = cap.read()
            if not ok:
                break
            grey = cv2.cvtColor(frame, cv2.COLOR_BGR2GRAY)
            count += 1
        cap.release()
        del grey
    elif mode == "measure":
        from thinning.frames import open_source
        from thinning.measure import measure_recording

        from thinning.measure.compiled import COMPILED

        with open_source(path) as source:
            series = measure_recording(source, n_frames=source.n_frames)
        count = len(series.table)
        finite = int(np.isfinite(series.table["diameter_px"]).sum())
        extra = {"frames_with_diameter": finite, "compiled": COMPILED}
    elif mode == "measure-in-memory":
        from thinning.frames import open_source
        from thinning.measure import measure_recording

        with open_source(path) as source:
            frames = [frame for _, frame in zip(range(IN_MEMORY_FRAMES), source)]
        started = time.perf_counter()
        series = measure_recording(frames, n_frames=len(frames))
        count = len(series.table)
    elif mode == "analyse":
        from thinning.analysis import analyse_to
        from thinning.units import AnalysisOptions

        options = AnalysisOptions(fps_hz=_benchmark_fps(path), pixel_size_m=15e-6,
                                  surface_tension_N_m=0.036, geometry="plates")
        with tempfile.TemporaryDirectory() as out:
            result = analyse_to(path, out, options)
        count = int(result.source.n_frames)
        extra = {"regime": result.characterisation.regime}
    else:
        raise SystemExit(f"unknown mode {mode}")
    seconds = time.perf_counter() - started
    out = {"mode": mode, "threads": threads, "frames": count, "seconds": seconds,
           "frames_per_s": count / seconds, "peak_rss_mb": _peak_rss_mb(),
           "pyarrow": "pyarrow" in sys.modules}
    if mode in ("measure", "analyse"):
        out.update(extra)
    return out


def _benchmark_fps(path) -> float:
    from thinning import synth

    n = int(Path(path).stem.split("-")[-1])
    return synth.benchmark_scene(n).fps_hz


def run_child(mode, path, threads=2):
    cmd = [sys.executable, __file__, "--child", mode, "--path", str(path), "--threads", str(threads)]
    done = subprocess.run(cmd, capture_output=True, text=True)
    if done.returncode != 0:
        return {"mode": mode, "threads": threads, "error": done.stderr.strip().splitlines()[-1:]}
    return json.loads(done.stdout.strip().splitlines()[-1])


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--frames", type=int, default=20000)
    parser.add_argument("--dir", type=Path, default=Path(tempfile.gettempdir()) / "thinning-benchmark")
    parser.add_argument("--orientation", choices=("vertical", "horizontal"), default="vertical",
                        help="the filament across the frame's short side (default) or along its long one")
    parser.add_argument("--child", help=argparse.SUPPRESS)
    parser.add_argument("--path", help=argparse.SUPPRESS)
    parser.add_argument("--threads", type=int, default=2, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        print(json.dumps(child(args.child, args.path, args.threads)))
        return
    path = recording(args.dir, args.frames, args.orientation)
    print(f"recording: {path} ({path.stat().st_size / 1e6:.0f} MB, {args.frames} frames, "
          f"{os.cpu_count()} cores)")
    # every pool size up to one more than the cores (what the analysis uses), at least 1-4
    runs = [run_child("decode-packets", path, t) for t in range(1, max(4, (os.cpu_count() or 2) + 1) + 1)]
    runs.append(run_child("decode-read", path))
    runs.append(run_child("measure", path))
    runs.append(run_child("measure-in-memory", path))
    try:
        import thinning.analysis  # noqa: F401

        runs.append(run_child("analyse", path))
    except ImportError:
        pass
    for r in runs:
        threads = f"threads={r['threads']}" if r["mode"].startswith("decode") else "as shipped"
        if "error" in r:
            print(f"{r['mode']:>17} {threads:>10}: failed: {r['error']}")
        else:
            note = "" if "compiled" not in r else (
                "  (compiled row pass)" if r["compiled"] else "  (numpy row pass: no compiled module)")
            print(f"{r['mode']:>17} {threads:>10}: {r['frames_per_s']:8.0f} frames/s  "
                  f"({r['frames']} frames in {r['seconds']:.1f} s), peak memory "
                  f"{r['peak_rss_mb']:.0f} MB{note}")
    decode = [r for r in runs if r["mode"].startswith("decode") and "error" not in r]
    best = max(decode, key=lambda r: r["frames_per_s"])
    print(f"fastest decode-only: {best['mode']} threads={best['threads']}, "
          f"{best['frames_per_s']:.0f} frames/s")
    if any(r.get("pyarrow") for r in runs if r["mode"] == "analyse"):
        print("note: pandas loaded pyarrow (installed here, e.g. by the test extras): about 40 MB "
              "of the whole analysis's peak memory that a plain install does not have")
    labels = {"measure": "neck measurement (frames to diameters)",
              "analyse": "whole analysis (+ rheology, figures, report, files)"}
    for r in runs:
        if r["mode"] in labels and "error" not in r:
            print(f"{labels[r['mode']]} / decode-only: {r['frames_per_s'] / best['frames_per_s']:.2f}")


if __name__ == "__main__":
    main()
