"""Unpacking speed and peak memory of the native camera sources on a 20,000-frame recording.

Writes (once per folder) a 20,000-frame 512 × 256 12-bit packed Phantom ``.cine``
and the same frames as a 12-bit packed Photron ``.mraw`` + ``.cih`` (about
3.9 GB each) with :mod:`thinning.frames.writers`, then, each in a fresh child
process (so each peak memory figure is its own):

- ``open``: the source opened, no frame read (the baseline of the child's memory);
- ``unpack``: every frame merely unpacked into an array through
  :func:`thinning.frames.open_source` (memory-mapped reading, the MSB-first
  12-bit unpacking, the read-ahead thread).

Prints frames/s, CPU time per frame (both threads) and the child's peak resident
memory (VmHWM). The files were
just written, so they are read from the page cache, not from the disk.

    python benchmarks/native_speed.py [--frames 20000] [--dir FOLDER]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

SHAPE = (256, 512)  # height, width
FPS = 10_000
PATTERNS = 8


def _peak_rss_mb() -> float:
    """Peak resident memory of this process (MB): VmHWM, which starts afresh at exec."""
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    raise SystemExit("no /proc/self/status: VmHWM is a Linux figure")


def recordings(folder: Path, n_frames: int) -> list[Path]:
    """The benchmark .cine and .mraw (written when missing)."""
    import numpy as np

    from thinning.frames.writers import write_cine, write_mraw

    rng = np.random.default_rng(0)
    patterns = [rng.integers(0, 4096, size=SHAPE, dtype=np.uint16) for _ in range(PATTERNS)]
    folder.mkdir(parents=True, exist_ok=True)
    cine, mraw = folder / f"native-{n_frames}.cine", folder / f"native-{n_frames}.mraw"
    if not cine.exists():
        started = time.perf_counter()
        write_cine(cine, (patterns[i % PATTERNS] for i in range(n_frames)), fps=FPS, bit_depth=12,
                   packing="packed", exposure_s=20e-6, timestamps_s=np.arange(n_frames) / FPS)
        print(f"wrote {cine} in {time.perf_counter() - started:.0f} s", flush=True)
    if not mraw.with_suffix(".cih").exists():
        started = time.perf_counter()
        write_mraw(mraw, (patterns[i % PATTERNS] for i in range(n_frames)), fps=FPS, bit_depth=12,
                   shutter_s=20e-6)
        print(f"wrote {mraw} in {time.perf_counter() - started:.0f} s", flush=True)
    return [cine, mraw]


def child(mode: str, path: str) -> dict:
    """One measurement in this process: frames, seconds, peak memory."""
    from thinning.frames import open_source

    started, cpu_started = time.perf_counter(), time.process_time()
    count = 0
    with open_source(path) as source:
        if mode == "unpack":
            for _ in source:
                count += 1
    seconds, cpu_s = time.perf_counter() - started, time.process_time() - cpu_started
    return {"mode": mode, "frames": count, "seconds": seconds, "cpu_s": cpu_s,
            "frames_per_s": count / seconds if count else None, "peak_rss_mb": _peak_rss_mb()}


def run_child(mode: str, path: Path) -> dict:
    cmd = [sys.executable, __file__, "--child", mode, "--path", str(path)]
    done = subprocess.run(cmd, capture_output=True, text=True)
    if done.returncode != 0:
        return {"mode": mode, "error": done.stderr.strip().splitlines()[-1:]}
    return json.loads(done.stdout.strip().splitlines()[-1])


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--frames", type=int, default=20000)
    parser.add_argument("--dir", type=Path, help="keep the files here (default: a temporary folder)")
    parser.add_argument("--child", help=argparse.SUPPRESS)
    parser.add_argument("--path", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        print(json.dumps(child(args.child, args.path)))
        return
    with tempfile.TemporaryDirectory(prefix="thinning-native-") as scratch:
        folder = args.dir or Path(scratch)
        paths = recordings(folder, args.frames)
        print(f"{args.frames} frames of {SHAPE[1]} × {SHAPE[0]} px, 12-bit packed; {os.cpu_count()} cores")
        for path in paths:
            size_gb = path.stat().st_size / 1e9
            for mode in ("open", "unpack"):
                r = run_child(mode, path)
                if "error" in r:
                    print(f"{path.suffix:>6} {mode:>7}: failed: {r['error']}")
                elif mode == "open":
                    print(f"{path.suffix:>6} {mode:>7}: {r['seconds'] * 1e3:8.1f} ms, "
                          f"peak memory {r['peak_rss_mb']:.0f} MB")
                else:
                    print(f"{path.suffix:>6} {mode:>7}: {r['frames_per_s']:8.0f} frames/s "
                          f"({r['frames']} frames, {size_gb:.2f} GB, in {r['seconds']:.1f} s; "
                          f"{r['cpu_s'] * 1e3 / r['frames']:.2f} ms of CPU a frame), "
                          f"peak memory {r['peak_rss_mb']:.0f} MB")
        print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores (others' work slows this)")


if __name__ == "__main__":
    main()
