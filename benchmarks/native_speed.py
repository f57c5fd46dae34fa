"""Analysis speed against unpacking speed, and peak memory, of the native camera sources.

Writes (once per folder) a ``--frames``-frame (default 20,000) 512 × 256 12-bit packed
Phantom ``.cine`` and the same frames as a 12-bit packed Photron ``.mraw`` + ``.cih``
(about 3.9 GB each at 20,000 frames) with :mod:`thinning.frames.writers`. The frames
are the scene of ``benchmarks/speed.py`` (:func:`thinning.synth.benchmark_scene`: a
slowly thinning elastic filament between plates that breaks near the end), rendered
by :mod:`thinning.synth` at 12 bits (``Optics(bit_depth=12)``: the same light, blur
and noise, quantised to 0..4095) and streamed into the writers (constant memory).
Its frame rate is rounded to a whole number (a cine stores FrameRate as a DWORD);
the headers carry it, so the analysis is given none.

Then, each in a fresh child process (so each peak memory figure is its own):

- ``open``: the source opened, no frame read (the baseline of the child's memory);
- ``unpack``: every frame merely unpacked into an array through
  :func:`thinning.frames.open_source` (memory-mapped reading, the MSB-first
  12-bit unpacking, the read-ahead thread);
- ``measure``: the neck measurement alone (:func:`thinning.measure.measure_recording`
  on the stream: frames → diameters);
- ``analyse``: the whole analysis, :func:`thinning.analysis.analyse` (frames →
  diameters → regimes, fits, rheology; nothing written), with the options of
  ``benchmarks/speed.py`` (15 µm pixels, 0.036 N/m, plates) but no frame rate.

Prints frames/s, CPU time per frame (all threads), the child's peak resident memory
(VmHWM) and the ratios of the measurement's and the analysis's rates to the unpack-only
rate, per format. (The analysis also hashes the whole file, sha256, and then fits: on
2 cores those and the measurement, not the unpacking, set its rate.)
``--repeat R`` runs unpack and analyse R times, alternately, and takes the median
(the rates vary with the machine's load). ``--memory-check`` also runs unpack and
analyse on a ``--small-frames`` (default 5,000) recording written beside it and
prints both peak memories (flat in the length: they should agree within a few MB).
The files were just written or cached, so they are read from the page cache, not
from the disk (the first run after writing may partly read the disk).

    python benchmarks/native_speed.py [--frames 20000] [--dir FOLDER] [--memory-check]
        [--small-frames 5000] [--repeat 1] [--formats cine,mraw]
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

SHAPE = (256, 512)  # height, width
BITS = 12
#: Options of the whole analysis (those of benchmarks/speed.py, without the frame rate).
PIXEL_SIZE_M = 15e-6
SURFACE_TENSION_N_M = 0.036


def _peak_rss_mb() -> float:
    """Peak resident memory of this process (MB): VmHWM, which starts afresh at exec."""
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    raise SystemExit("no /proc/self/status: VmHWM is a Linux figure")


def scene(n_frames: int):
    """The scene of benchmarks/speed.py at ``n_frames``, its rate rounded to whole frames/s."""
    from thinning import synth

    base = synth.benchmark_scene(n_frames)
    return dataclasses.replace(base, fps_hz=float(round(base.fps_hz)))


def rendered(n_frames: int):
    """The frames (a generator, constant memory) of the 12-bit benchmark recording."""
    from thinning import synth

    frames, truth = synth.render_recording(scene(n_frames), synth.Optics(bit_depth=BITS), seed=0)
    if truth.n_frames != n_frames or tuple(truth.frame_shape) != SHAPE:
        raise SystemExit(f"the scene renders {truth.n_frames} frames of {truth.frame_shape}, "
                         f"not {n_frames} of {SHAPE}")
    return frames


def recordings(folder: Path, n_frames: int) -> list[Path]:
    """The benchmark .cine and .mraw (written when missing; both through atomic replacement)."""
    import numpy as np

    from thinning.frames.writers import write_cine, write_mraw

    folder.mkdir(parents=True, exist_ok=True)
    fps = scene(n_frames).fps_hz
    stem = folder / f"native-thinning-{n_frames}"
    cine, mraw = stem.with_suffix(".cine"), stem.with_suffix(".mraw")
    if not cine.exists():
        started = time.perf_counter()
        write_cine(cine, rendered(n_frames), fps=int(fps), bit_depth=BITS, packing="packed",
                   exposure_s=20e-6, timestamps_s=np.arange(n_frames) / fps)
        print(f"wrote {cine} in {time.perf_counter() - started:.0f} s", flush=True)
    if not mraw.with_suffix(".cih").exists():
        started = time.perf_counter()
        write_mraw(mraw, rendered(n_frames), fps=fps, bit_depth=BITS, shutter_s=20e-6)
        print(f"wrote {mraw} in {time.perf_counter() - started:.0f} s", flush=True)
    return [cine, mraw]


def child(mode: str, path: str) -> dict:
    """One measurement in this process: frames, seconds, CPU seconds, peak memory."""
    from thinning.frames import open_source

    extra = {}
    if mode in ("measure", "analyse"):  # imports outside the timing, as for unpack
        import thinning.analysis  # noqa: F401
        import thinning.measure  # noqa: F401
    started, cpu_started = time.perf_counter(), time.process_time()
    count = 0
    if mode in ("open", "unpack"):
        with open_source(path) as source:
            if mode == "unpack":
                for _ in source:
                    count += 1
    elif mode == "measure":
        import numpy as np

        from thinning.measure import measure_recording
        from thinning.measure.compiled import COMPILED

        with open_source(path) as source:
            series = measure_recording(source, n_frames=source.n_frames)
        count = len(series.table)
        extra = {"frames_with_diameter": int(np.isfinite(series.table["diameter_px"]).sum()),
                 "compiled": COMPILED}
    elif mode == "analyse":
        from thinning.analysis import analyse
        from thinning.units import AnalysisOptions

        options = AnalysisOptions(pixel_size_m=PIXEL_SIZE_M, surface_tension_N_m=SURFACE_TENSION_N_M,
                                  geometry="plates")
        result = analyse(path, options)
        count = int(result.source.n_frames)
        extra = {"regime": result.characterisation.regime, "fps_hz": result.calibration.fps_hz}
    else:
        raise SystemExit(f"unknown mode {mode}")
    seconds, cpu_s = time.perf_counter() - started, time.process_time() - cpu_started
    return {"mode": mode, "frames": count, "seconds": seconds, "cpu_s": cpu_s,
            "frames_per_s": count / seconds if count else None, "peak_rss_mb": _peak_rss_mb(),
            "load": os.getloadavg()[0], **extra}


def run_child(mode: str, path: Path) -> dict:
    cmd = [sys.executable, __file__, "--child", mode, "--path", str(path)]
    done = subprocess.run(cmd, capture_output=True, text=True)
    if done.returncode != 0:
        return {"mode": mode, "error": done.stderr.strip().splitlines()[-1:]}
    return json.loads(done.stdout.strip().splitlines()[-1])


def _median_run(runs: list[dict]) -> dict:
    """The run of median rate (of an odd count; the faster middle one of an even count)."""
    good = [r for r in runs if "error" not in r]
    if not good:
        return runs[0]
    ordered = sorted(good, key=lambda r: r["frames_per_s"])
    pick = dict(ordered[len(ordered) // 2])
    pick["rates"] = [r["frames_per_s"] for r in good]
    pick["peak_rss_mb"] = max(r["peak_rss_mb"] for r in good)
    return pick


def _line(label: str, r: dict, size_gb: float) -> str:
    if "error" in r:
        return f"{label}: failed: {r['error']}"
    if r["mode"] == "open":
        return f"{label}: {r['seconds'] * 1e3:8.1f} ms, peak memory {r['peak_rss_mb']:.0f} MB"
    rates = r.get("rates", [])
    spread = f"; runs {', '.join(f'{x:.0f}' for x in rates)}" if len(rates) > 1 else ""
    note = ""
    if r["mode"] == "measure":
        note = f"; {r['frames_with_diameter']} with a diameter" + ("" if r["compiled"] else ", numpy row pass")
    elif r["mode"] == "analyse":
        note = f"; regime {r['regime']}, {r['fps_hz']:g} frames/s from the header"
    return (f"{label}: {r['frames_per_s']:8.0f} frames/s ({r['frames']} frames, {size_gb:.2f} GB, "
            f"in {r['seconds']:.1f} s; {r['cpu_s'] * 1e3 / r['frames']:.2f} ms of CPU a frame), "
            f"peak memory {r['peak_rss_mb']:.0f} MB{note}{spread}")


def bench(paths: list[Path], repeat: int, modes: tuple[str, ...]) -> dict:
    """Every mode on every file; unpack and analyse alternated ``repeat`` times."""
    out = {}
    for path in paths:
        size_gb = path.stat().st_size / 1e9
        if path.suffix == ".mraw":
            size_gb += path.with_suffix(".cih").stat().st_size / 1e9
        runs = {"open": [run_child("open", path)]}
        if "measure" in modes:
            runs["measure"] = [run_child("measure", path)]
        for _ in range(repeat):
            for mode in ("unpack", "analyse"):
                if mode in modes:
                    runs.setdefault(mode, []).append(run_child(mode, path))
        picked = {mode: _median_run(rs) for mode, rs in runs.items()}
        for mode, r in picked.items():
            print(_line(f"{path.suffix:>6} {mode:>8}", r, size_gb), flush=True)
        unpack = picked.get("unpack")
        for mode in ("measure", "analyse"):
            other = picked.get(mode)
            if unpack and other and "error" not in unpack and "error" not in other:
                ratio = other["frames_per_s"] / unpack["frames_per_s"]
                print(f"{path.suffix:>6}    ratio: {mode} / unpack-only = {ratio:.2f} "
                      f"(load average {os.getloadavg()[0]:.1f})", flush=True)
        out[path.suffix] = picked
    return out


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--frames", type=int, default=20000)
    parser.add_argument("--dir", type=Path, help="keep the files here (default: a temporary folder)")
    parser.add_argument("--memory-check", action="store_true",
                        help="also run unpack and analyse on a --small-frames recording, and print both "
                             "peak memories")
    parser.add_argument("--small-frames", type=int, default=5000)
    parser.add_argument("--repeat", type=int, default=1, help="unpack and analyse runs each (median taken)")
    parser.add_argument("--formats", default="cine,mraw", help="comma-separated: cine, mraw")
    parser.add_argument("--modes", default="open,unpack,measure,analyse",
                        help="comma-separated: open, unpack, measure, analyse")
    parser.add_argument("--child", help=argparse.SUPPRESS)
    parser.add_argument("--path", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        print(json.dumps(child(args.child, args.path)))
        return
    formats = {f".{f.strip().lstrip('.')}" for f in args.formats.split(",")}
    modes = tuple(m.strip() for m in args.modes.split(","))
    with tempfile.TemporaryDirectory(prefix="thinning-native-") as scratch:
        folder = args.dir or Path(scratch)
        print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores before the runs", flush=True)
        lengths = [args.frames] + ([args.small_frames] if args.memory_check else [])
        results = {}
        for n in lengths:
            paths = [p for p in recordings(folder, n) if p.suffix in formats]
            print(f"{n} frames of {SHAPE[1]} × {SHAPE[0]} px, {BITS}-bit packed; {os.cpu_count()} cores",
                  flush=True)
            results[n] = bench(paths, args.repeat if n == args.frames else 1,
                               modes if n == args.frames else ("open", "unpack", "analyse"))
        if args.memory_check:
            print(f"peak memory, {args.small_frames} vs {args.frames} frames:")
            for suffix in sorted(formats):
                for mode in ("open", "unpack", "analyse"):
                    small = results[args.small_frames].get(suffix, {}).get(mode, {})
                    large = results[args.frames].get(suffix, {}).get(mode, {})
                    if "peak_rss_mb" in small and "peak_rss_mb" in large:
                        print(f"{suffix:>6} {mode:>8}: {small['peak_rss_mb']:.0f} MB vs "
                              f"{large['peak_rss_mb']:.0f} MB "
                              f"({large['peak_rss_mb'] - small['peak_rss_mb']:+.0f} MB)")
        print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores (others' work slows this)")


if __name__ == "__main__":
    main()
