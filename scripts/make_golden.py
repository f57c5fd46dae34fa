"""The golden results: fixed rendered recordings analysed end to end, kept in ``tests/golden/``.

Each case renders one recording with :mod:`thinning.synth` (fixed scene, optics, format and
seed), analyses it with :func:`thinning.analyse` and keeps what matters of the outputs:
``result.json`` (without the tool version) and the ``diameter_m`` column of
``diameter.csv``. ``tests/test_golden.py`` renders and analyses the same cases again and
compares, so a number cannot drift from one commit to the next unseen. A commit that means to
change the numbers regenerates the file with this script and says why.

    python scripts/make_golden.py                 # rewrite tests/golden/golden.json
    python scripts/make_golden.py --out DIR       # also keep every output file in DIR/<case>/
    python scripts/make_golden.py --check         # compare with the committed file, exit 1 on drift
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import tempfile
from pathlib import Path

from thinning import laws, synth

GOLDEN = Path(__file__).resolve().parent.parent / "tests" / "golden" / "golden.json"
#: Relative tolerance of the comparison: floating-point noise of another machine, not drift.
RELATIVE_TOLERANCE = 1e-7
#: Relative tolerance when the recording itself rendered differently (its SHA-256 differs: another
#: CPU's or library's floating point flipped the rounding of a few pixels): the analysis then
#: sees other frames, and its bootstrap intervals move by a few per cent; a drift of the method
#: beyond that still shows.
RENDERED_ELSEWHERE_TOLERANCE = 0.05


def _fluid(lam, *, eta_s=1e-3, g=2.0, l2=None, sigma=0.06, rho=1000.0):
    return laws.Fluid(surface_tension=sigma, solvent_viscosity=eta_s, density=rho,
                      polymer_modulus=g, relaxation_time=lam, extensibility=l2)


def cases():
    """``{name: (scene, optics, file format, seed)}``: polymer and Newtonian, every format."""
    plates = dict(fps_hz=2500.0, frame_size_px=(200, 160), pixel_size_m=25e-6)
    return {
        "plates-5ms-10kHz-gauss": (
            synth.dilute_polymer_plates(frame_size_px=(240, 200), pixel_size_m=16e-6),
            synth.Optics(blur_sigma_px=1.0), "avi-raw", 11),
        "dripping-0.5ms-25kHz-mjpg": (
            synth.polymer_dripping(fluid=_fluid(0.5e-3, g=10.0, l2=1e5), frame_size_px=(256, 200),
                                   pixel_size_m=6e-6),
            synth.Optics(blur_sigma_px=0.8), "avi-mjpg", 12),
        "plates-50ms-2kHz-viscous-disk-horizontal": (
            synth.dilute_polymer_plates(fluid=_fluid(50e-3, eta_s=50e-3, g=1.0, sigma=0.04),
                                        fps_hz=2000.0, frame_size_px=(240, 200),
                                        pixel_size_m=16e-6, stretch_duration_s=0.0, pre_roll_s=0.0),
            synth.Optics(blur_sigma_px=1.5, blur_kind="disk", orientation="horizontal"), "tiff", 13),
        "dripping-1ms-50kHz-tilt-png": (
            synth.polymer_dripping(fluid=_fluid(1e-3, g=5.0, l2=1e5), fps_hz=50000.0,
                                   frame_size_px=(256, 200), pixel_size_m=6e-6),
            synth.Optics(blur_sigma_px=1.2, tilt_deg=3.0), "png-folder", 14),
        "plates-20ms-5kHz-halo-16bit": (
            synth.dilute_polymer_plates(fluid=_fluid(20e-3, eta_s=0.1, g=3.0, l2=1e4),
                                        fps_hz=5000.0, frame_size_px=(240, 200),
                                        pixel_size_m=16e-6, stretch_duration_s=0.0, pre_roll_s=0.0),
            synth.Optics(blur_sigma_px=1.0, blur_kind="lorentzian", bit_depth=16), "tiff", 15),
        "plates-2s-20Hz-boger": (
            synth.boger_fluid_plates(frame_size_px=(240, 240), pixel_size_m=30e-6),
            synth.Optics(blur_sigma_px=2.0, uneven_light=0.3), "avi-raw", 16),
        "glycerol-plates-2kHz": (
            synth.newtonian_viscous_plates(frame_size_px=(240, 200), pixel_size_m=24e-6),
            synth.Optics(), "avi-raw", 5),
        "water-dripping-50kHz": (
            synth.water_like_dripping(frame_size_px=(256, 200), pixel_size_m=8e-6),
            synth.Optics(), "avi-mjpg", 5),
        "beads-plates": (synth.dilute_polymer_plates(beads=True, **plates), synth.Optics(),
                         "avi-raw", 21),
        "plates-12bit-streak-mp4": (
            synth.dilute_polymer_plates(**plates),
            synth.Optics(bit_depth=12, streak_strength=0.9, flicker=0.05), "mp4-ffv1", 22),
        "plates-12bit-cine-dropped-frames": (
            synth.dilute_polymer_plates(**plates), synth.Optics(bit_depth=12, blur_sigma_px=1.2),
            "cine-dropped", 23),
    }


SUFFIX = {"avi-raw": ".avi", "avi-mjpg": ".avi", "tiff": ".tif", "png-folder": "",
          "mkv-ffv1": ".mkv", "mp4-ffv1": ".mp4", "cine-dropped": ".cine"}
#: In the "cine-dropped" case every this-many-th frame is left out of the file (its stamps keep
#: the clock), and the analysis takes the header's clock (no --fps).
DROPPED_EVERY = 7


def _write_cine_dropped(scene, optics, path, *, seed):
    """The recording as a 12-bit packed .cine with every DROPPED_EVERY-th frame missing."""
    import numpy as np

    from thinning.frames.writers import write_cine

    frames, truth = synth.render_recording(scene, optics, seed=seed)
    kept = [i for i in range(truth.n_frames) if i % DROPPED_EVERY != DROPPED_EVERY - 1]
    wanted = set(kept)
    write_cine(path, (f for i, f in enumerate(frames) if i in wanted), fps=int(scene.fps_hz),
               bit_depth=12, packing="packed", exposure_s=50e-6, trigger_frame=5,
               timestamps_s=np.array(kept) / scene.fps_hz)


def run_case(name, folder: Path) -> dict:
    """Render and analyse one case in ``folder`` (outputs in ``folder/out``); its golden record."""
    from thinning.analysis import analyse_to
    from thinning.units import AnalysisOptions

    scene, optics, fmt, seed = cases()[name]
    source = f"rec{SUFFIX[fmt]}"
    if fmt == "cine-dropped":
        _write_cine_dropped(scene, optics, folder / source, seed=seed)
    else:
        synth.write_recording(scene, optics, folder / source, fmt=fmt, seed=seed)
    options = AnalysisOptions(fps_hz=None if fmt == "cine-dropped" else scene.fps_hz,
                              pixel_size_m=scene.pixel_size_m,
                              surface_tension_N_m=scene.fluid.surface_tension,
                              density_kg_m3=scene.fluid.density, geometry=scene.geometry)
    here = os.getcwd()
    os.chdir(folder)  # the source path is recorded as given: keep it relative and fixed
    try:
        analyse_to(source, "out", options)
    finally:
        os.chdir(here)
    result = json.loads((folder / "out" / "result.json").read_text(encoding="utf-8"))
    result.pop("tool_version", None)
    lines = (folder / "out" / "diameter.csv").read_text(encoding="utf-8").splitlines()
    column = lines[0].split(",").index("diameter_m")
    diameter = [float(v) if v else None for v in (line.split(",")[column] for line in lines[1:])]
    return {"result": result, "diameter_m": diameter}


def differences(expected, actual, where="", *, rel=RELATIVE_TOLERANCE):
    """Human-readable list of where ``actual`` departs from ``expected`` (floats within ``rel``)."""
    if isinstance(expected, dict) and isinstance(actual, dict):
        out = [f"{where}.{k}: missing" for k in expected if k not in actual]
        out += [f"{where}.{k}: unexpected" for k in actual if k not in expected]
        for key in expected:
            if key in actual:
                out += differences(expected[key], actual[key], f"{where}.{key}", rel=rel)
        return out
    if isinstance(expected, list) and isinstance(actual, list):
        if len(expected) != len(actual):
            return [f"{where}: {len(actual)} items, expected {len(expected)}"]
        out = []
        for i, (a, b) in enumerate(zip(expected, actual)):
            out += differences(a, b, f"{where}[{i}]", rel=rel)
        return out
    if isinstance(expected, float) and isinstance(actual, (int, float)) \
            and not isinstance(actual, bool):
        if math.isclose(expected, actual, rel_tol=rel, abs_tol=1e-300):
            return []
        return [f"{where}: {actual!r}, expected {expected!r}"]
    return [] if expected == actual else [f"{where}: {actual!r}, expected {expected!r}"]


def compare(golden: dict, records: dict) -> list:
    """Where ``records`` depart from ``golden``, case by case: to :data:`RELATIVE_TOLERANCE`
    where a case's recording rendered bit for bit as committed, else (its SHA-256 noted) to
    :data:`RENDERED_ELSEWHERE_TOLERANCE`."""
    out = [f".{name}: missing" for name in golden if name not in records]
    out += [f".{name}: unexpected" for name in records if name not in golden]
    for name in golden:
        if name not in records:
            continue
        expected, actual = golden[name], records[name]
        same = expected["result"]["source"]["sha256"] == actual["result"]["source"]["sha256"]
        if not same:  # (the bootstrap's standard errors move by more: their intervals are compared)
            expected, actual = json.loads(json.dumps(expected)), json.loads(json.dumps(actual))
            expected["result"]["source"]["sha256"] = actual["result"]["source"]["sha256"]
            for case in (expected, actual):
                for fit in case["result"].get("fits", {}).values():
                    fit.pop("stderr", None)
        out += differences(expected, actual, f".{name}",
                           rel=RELATIVE_TOLERANCE if same else RENDERED_ELSEWHERE_TOLERANCE)
    return out


def rendered_elsewhere(golden: dict, records: dict) -> list:
    """The cases whose recording did not render bit for bit as committed."""
    return [name for name in golden if name in records and golden[name]["result"]["source"]["sha256"]
            != records[name]["result"]["source"]["sha256"]]


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, help="keep every output file in OUT/<case>/")
    parser.add_argument("--check", action="store_true", help="compare with the committed file")
    args = parser.parse_args(argv)
    records = {}
    with tempfile.TemporaryDirectory() as tmp:
        for name in cases():
            folder = (args.out / name) if args.out else Path(tmp) / name
            folder.mkdir(parents=True, exist_ok=True)
            records[name] = run_case(name, folder)
            print(f"{name}: λ = {records[name]['result']['relaxation_time_s']}", flush=True)
    if args.check:
        golden = json.loads(GOLDEN.read_text(encoding="utf-8"))
        problems = compare(golden, records)
        for name in rendered_elsewhere(golden, records):
            print(f"{name}: rendered differently here (its SHA-256 differs), compared to "
                  f"{RENDERED_ELSEWHERE_TOLERANCE:.0%}")
        print("\n".join(problems) or "no drift")
        return 1 if problems else 0
    GOLDEN.parent.mkdir(parents=True, exist_ok=True)
    GOLDEN.write_text(json.dumps(records, indent=1, allow_nan=False) + "\n", encoding="utf-8")
    print(f"wrote {GOLDEN}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
