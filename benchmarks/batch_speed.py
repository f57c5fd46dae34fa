"""Batch throughput (recordings/s) with 1 and with 2 local worker processes on the same set.

Renders N small synthetic recordings (dilute polymer solution, 128 × 64 px,
about 170 frames each, raw AVI) into a temporary folder, runs
``run_batch(..., redo=True)`` with 1 and then 2 workers, and prints the
throughput of each (wall time from the call to the finished results table,
worker start-up included), the worker processes' CPU time per recording,
and the ratio of the throughputs.

    python benchmarks/batch_speed.py [--recordings 16] [--repeats 1]
"""

from __future__ import annotations

import argparse
import os
import resource
import shutil
import tempfile
import time
from pathlib import Path

from thinning import synth
from thinning.batch import run_batch

DEFAULTS = {"fps": "2000/s", "pixel_size": "25um", "surface_tension": "62mN/m"}


def scene():
    return synth.dilute_polymer_plates(frame_size_px=(128, 64), pixel_size_m=25e-6, fps_hz=2000.0,
                                       plate_diameter_m=1.4e-3, initial_diameter_m=0.7e-3,
                                       stretch_duration_s=0.0, pre_roll_s=0.0)


def write_set(folder: Path, n: int) -> Path:
    lines = ["path,sample"]
    for i in range(n):
        synth.write_recording(scene(), synth.Optics(), folder / f"r{i:03d}.avi", fmt="avi-raw", seed=i)
        lines.append(f"r{i:03d}.avi,R{i}")
    manifest = folder / "manifest.csv"
    manifest.write_text("\n".join(lines) + "\n")
    return manifest


def throughput(manifest: Path, out: Path, workers: int, repeats: int) -> tuple[float, float]:
    """(recordings/s, CPU seconds of the worker processes per recording) of the fastest run."""
    best, cpu = float("inf"), float("nan")
    for _ in range(repeats):
        before = resource.getrusage(resource.RUSAGE_CHILDREN)
        start = time.perf_counter()
        report = run_batch(manifest, out, defaults=DEFAULTS, workers=workers, redo=True)
        elapsed = time.perf_counter() - start
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
        if report.n_failed:
            raise SystemExit(f"{report.n_failed} rows failed; see {report.results_csv}")
        if elapsed < best:
            best = elapsed
            cpu = (after.ru_utime + after.ru_stime - before.ru_utime - before.ru_stime) / report.n_rows
    return report.n_rows / best, cpu


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--recordings", type=int, default=16)
    parser.add_argument("--repeats", type=int, default=1, help="runs per worker count; the fastest counts")
    args = parser.parse_args()
    base = Path(tempfile.mkdtemp(prefix="thinning-batch-bench-"))
    try:
        manifest = write_set(base / "data", args.recordings)
        load_before = os.getloadavg()[0]
        one, cpu_one = throughput(manifest, base / "out1", 1, args.repeats)
        two, cpu_two = throughput(manifest, base / "out2", 2, args.repeats)
    finally:
        shutil.rmtree(base, ignore_errors=True)
    print(f"{args.recordings} recordings, {os.cpu_count()} cores, 1-min load average "
          f"{load_before:.1f} before, {os.getloadavg()[0]:.1f} after (other work on the machine "
          "lowers the ratio)")
    print(f"1 worker : {one:.3f} recordings/s  ({cpu_one:.2f} CPU s per recording in workers)")
    print(f"2 workers: {two:.3f} recordings/s  ({cpu_two:.2f} CPU s per recording in workers)")
    print(f"ratio    : {two / one:.2f}")


if __name__ == "__main__":
    main()
