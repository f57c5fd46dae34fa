"""Accuracy probe: random recordings from both renderers, analysed as a user would, against their truth.

Each case draws a (scene, optics) with the renderer's ``random_case(seed + i, family=…)``,
writes it in a file format chosen by rotation over those its bit depth allows, analyses it
with ``thinning.analysis.analyse`` given the true calibration, σ, ρ and geometry, and compares
the result with the truth beside the file: per-frame diameter error, λ, regime, visco-capillary
viscosity, breakup, start of free thinning, quality. Prints one line per case and a summary per
renderer and family, with the targets beside the figures.

    python scripts/accuracy_probe.py --renderer both --family regular --n 30 --seed 0 \
        [--family artefacts …] [--jobs 1] [--json OUT.json] [--keep DIR] [--timeout 900]
"""

from __future__ import annotations

import argparse
import json
import math
import multiprocessing
import multiprocessing.connection
import shutil
import sys
import tempfile
import time
import traceback
from collections import Counter
from pathlib import Path

import numpy as np

from thinning import raysynth, synth
from thinning.result import json_plain
from thinning.synth_io import FORMATS, load_truth

RENDERERS = {"synth": synth, "raysynth": raysynth}
#: The formats that hold 12- and 16-bit frames.
DEEP_FORMATS = ("mkv-ffv1", "mp4-ffv1", "tiff", "png-folder")
SUFFIX = {"avi-raw": ".avi", "avi-mjpg": ".avi", "mkv-ffv1": ".mkv", "mp4-ffv1": ".mp4",
          "tiff": ".tif", "png-folder": ""}
#: Frames whose true diameter is below this (px) are not compared.
MIN_TRUE_PX = 3.0
#: Bands of true diameter (px) over which signed errors are pooled.
BANDS = ((3.0, 6.0), (6.0, 12.0), (12.0, 30.0), (30.0, 80.0), (80.0, math.inf))
#: A Newtonian liquid below this Ohnesorge number (at D0/2) thins inertio-capillary (both renderers'
#: neck styles split here).
INERTIAL_OHNESORGE = 0.3
#: A thread parts visibly in the record when its true diameter in the last frame before the
#: true pinch-off is at least this (px); a thinner one fades first, and its breakup time is
#: then only required to be a lower bound.
VISIBLE_PARTING_PX = 2.0
#: The lead's targets.
TARGETS = {"band_median_signed_px": 0.03, "median_of_median_abs_px": 0.05, "median_of_p95_px": 0.2,
           "lambda_median_abs": 0.015, "lambda_each": 0.05, "viscosity_each": 0.03,
           "breakup_frames": 3.0, "coverage": (0.90, 0.98)}


# --- one case -----------------------------------------------------------------------------

def file_format(index: int, bit_depth: int) -> str:
    """The format of case ``index``: a rotation over every format that holds ``bit_depth`` bits."""
    formats = FORMATS if bit_depth == 8 else DEEP_FORMATS
    return formats[index % len(formats)]


def ohnesorge(truth: dict, diameter_m: float) -> float:
    """The Ohnesorge number of the truth's liquid (η_0) at radius ``diameter_m / 2``."""
    f = truth["fluid"]
    return f["zero_shear_viscosity"] / math.sqrt(f["density"] * f["surface_tension"] * diameter_m / 2)


def liquid_kind(truth: dict) -> str:
    """"elastic", "viscous" or "inertial", from the truth's fluid (Newtonian: Oh at D0/2)."""
    if truth["relaxation_time_s"] is not None:
        return "elastic"
    return "inertial" if ohnesorge(truth, truth["initial_diameter_m"]) < INERTIAL_OHNESORGE else "viscous"


TRUE_REGIME = {"elastic": "elasto-capillary", "viscous": "visco-capillary",
               "inertial": "inertio-capillary"}


def optics_tags(renderer: str, optics: dict) -> str:
    """A few words on the optics of a case (blur or lens, and what is switched on)."""
    if renderer == "synth":
        tags = [f"{optics['blur_kind']} {optics['blur_sigma_px']:.1f}px"]
        if optics["tilt_deg"]:
            tags.append(f"tilt {optics['tilt_deg']:+.1f}°")
        if optics["motion_blur_px"]:
            tags.append(f"smear-{optics['motion_blur_axis']} {optics['motion_blur_px']:.1f}px")
        if optics["streak_strength"] >= 0.6:
            tags.append("streak")
        if optics["dust_specks"] >= 10:
            tags.append("dust")
        if optics["background_level"] >= 0.93:
            tags.append("clipping")
        return " ".join(tags)
    tags = [(f"NA {optics['numerical_aperture']:.3f} airy {optics['airy_radius_px']:.1f}px "
             f"β {optics['illumination_half_angle_deg']:.1f}°")]
    if optics["defocus_m"]:
        tags.append("defocus")
    if optics["exposure_fraction"]:
        tags.append("exposure")
    for key, name in (("coherent_fraction", "coherence"), ("texture_amplitude", "texture"),
                      ("dust_blob_depth", "dust"), ("banding_amplitude", "banding"),
                      ("stuck_pixels", "stuck"), ("veiling_glare", "low-contrast"),
                      ("uneven_light", "uneven"), ("flicker", "flicker")):
        if optics[key]:
            tags.append(name)
    return " ".join(tags)


def optics_class(renderer: str, optics: dict) -> str:
    """The optics group a case falls in: blur kind (synth) or backlight width (raysynth)."""
    if renderer == "synth":
        return f"{optics['blur_kind']} blur"
    beta = optics["illumination_half_angle_deg"]
    return "collimated β ≤ 1°" if beta <= 1.0 else "intermediate β 1–10°" if beta <= 10.0 \
        else "diffuse β > 10°"


def _stats(errors: np.ndarray) -> dict:
    if errors.size == 0:
        return {"n": 0, "median_signed": None, "median_abs": None, "p95_abs": None}
    a = np.abs(errors)
    return {"n": int(errors.size), "median_signed": float(np.median(errors)),
            "median_abs": float(np.median(a)), "p95_abs": float(np.percentile(a, 95))}


def _rel(measured, true):
    return None if measured is None or not np.isfinite(measured) else float(measured / true - 1.0)


def _interval(ci, truth) -> dict:
    """Whether a 95 % interval ``ci`` (low, high; NaN an open end) covers ``truth``, and its
    relative half-width (None without an interval)."""
    if ci is None or truth is None:
        return {"covered": None, "half_rel": None}
    lo = -math.inf if ci[0] is None or not math.isfinite(ci[0]) else float(ci[0])
    hi = math.inf if ci[1] is None or not math.isfinite(ci[1]) else float(ci[1])
    half = (hi - lo) / 2 / truth if math.isfinite(hi - lo) else None
    return {"covered": bool(lo <= truth <= hi), "half_rel": half}


def _coverage(entries) -> dict:
    """Coverage, median half-width and median |error| of (rel_error, covered, half_rel) dicts."""
    got = [e for e in entries if e is not None and e.get("rel_error") is not None]
    with_ci = [e for e in got if e.get("covered") is not None]
    covered = sum(e["covered"] for e in with_ci)
    half = _median(e["half_rel"] for e in with_ci if e["half_rel"] is not None)
    err = _median(abs(e["rel_error"]) for e in got)
    return {"n": len(got), "with_interval": len(with_ci), "covered": covered,
            "coverage": covered / len(with_ci) if with_ci else None, "median_half_rel": half,
            "median_abs": err, "within_3pct": sum(abs(e["rel_error"]) <= 0.03 for e in got),
            "width_ratio": half / err if half is not None and err else None}


def compare(truth: dict, result) -> dict:
    """The case's figures: the analyser's ``result`` against the ``truth`` dict."""
    fps, px = truth["fps_hz"], truth["pixel_size_m"]
    true_px = np.array([np.nan if v is None else v for v in truth["diameter_px"]], float)
    measured = np.full(true_px.size, np.nan)
    table = result.table
    frames = table["frame"].to_numpy().astype(int)
    inside = (frames >= 0) & (frames < true_px.size)
    measured[frames[inside]] = table["diameter_m"].to_numpy()[inside] / px
    compared = np.isfinite(true_px) & (true_px >= MIN_TRUE_PX)
    seen = compared & np.isfinite(measured)
    errors = measured[seen] - true_px[seen]
    out = {"diameter": {**_stats(errors), "missed": int((compared & ~seen).sum())},
           "true_px": np.round(true_px[seen], 4).tolist(), "error_px": np.round(errors, 5).tolist()}

    ch = result.characterisation
    kind = liquid_kind(truth)
    out["regime"] = {"truth": TRUE_REGIME[kind], "measured": ch.regime,
                     "right": ch.regime == TRUE_REGIME[kind]}
    lam = truth["relaxation_time_s"]
    model = ch.model_fit if ch.model_fit else None
    model_lam = model.relaxation_time_s if model is not None and model.model == "viscoelastic" else None
    out["lambda"] = None if kind != "elastic" else {
        "truth": lam, "measured": ch.relaxation_time_s,
        "rel_error": _rel(ch.relaxation_time_s, lam), **_interval(ch.relaxation_time_ci95_s, lam),
        "model": {"measured": model_lam, "rel_error": _rel(model_lam, lam),
                  **_interval(model.relaxation_time_ci95_s if model_lam is not None else None, lam)},
        "budget": {key: dict(terms) for key, terms in ch.uncertainty_budget.items()
                   if key in ("relaxation_time_s", "model_fit")},
        "regime": ch.regime, "finding_codes": result.finding_codes}
    eta = truth["fluid"]["solvent_viscosity"]
    model_eta = model.solvent_viscosity_Pa_s if model is not None and model.model == "newtonian" else None
    out["viscosity"] = None if kind != "viscous" else {
        "truth": eta, "measured": ch.shear_viscosity_Pa_s, "rel_error": _rel(ch.shear_viscosity_Pa_s, eta),
        **_interval(ch.interval("shear_viscosity_Pa_s"), eta),
        "model": {"measured": model_eta, "rel_error": _rel(model_eta, eta),
                  **_interval(model.solvent_viscosity_ci95_Pa_s if model_eta is not None else None,
                              eta)}}
    t_b = truth["breakup_time_s"]
    parts = t_b is not None and t_b < truth["n_frames"] / fps
    thin = np.flatnonzero(np.isfinite(true_px) & (true_px < 1.0))
    vanish = float(thin[0]) if thin.size else None
    found = ch.breakup_time_s is not None
    before = int(math.ceil(t_b * fps)) - 1 if parts else -1
    last_px = float(true_px[before]) if 0 <= before < true_px.size else math.nan
    lifetime_end = (None if ch.filament_lifetime_s is None
                    else ch.filament_lifetime_s + ch.free_thinning_start_s)
    out["breakup"] = None if not parts else {
        "truth_frame": t_b * fps, "measured_frame": ch.breakup_time_s * fps if found else None,
        "error_frames": (ch.breakup_time_s - t_b) * fps if found else None,
        "visible": bool(last_px >= VISIBLE_PARTING_PX), "last_true_px": last_px,
        "seen": ch.breakup_seen, "lifetime_basis": ch.filament_lifetime_basis,
        "lifetime_error_frames": None if lifetime_end is None else (lifetime_end - t_b) * fps,
        "subpixel_frame": vanish,
        "error_vs_subpixel_frames": ch.breakup_time_s * fps - vanish if found and vanish is not None
        else None}
    t0 = truth["free_thinning_start_s"]
    out["free_start"] = {"truth_frame": t0 * fps, "measured_frame": ch.free_thinning_start_s * fps,
                         "error_frames": (ch.free_thinning_start_s - t0) * fps}
    out["quality"] = result.quality
    out["finding_codes"] = result.finding_codes
    return out


def _error_summary(exc: BaseException) -> str:
    frames = traceback.extract_tb(exc.__traceback__)
    where = "; ".join(f"{Path(f.filename).name}:{f.lineno} {f.name}" for f in frames[-3:])
    return f"{type(exc).__name__}: {exc} [{where}]"


def run_case(renderer: str, family: str, seed: int, workdir) -> dict:
    """Draw, write, analyse and compare one case in ``workdir`` (never raises for a case's failure)."""
    from thinning.analysis import analyse
    from thinning.errors import ThinningError
    from thinning.units import AnalysisOptions

    case = {"renderer": renderer, "family": family, "seed": int(seed)}
    start = time.perf_counter()
    try:
        scene, optics = RENDERERS[renderer].random_case(seed, family=family)
        fmt = file_format(seed, optics.bit_depth)
        path = Path(workdir) / f"recording{SUFFIX[fmt]}"
        RENDERERS[renderer].write_recording(scene, optics, path, fmt=fmt, seed=seed)
        truth = load_truth(path)
    except Exception as exc:  # a renderer's failure is the probe's finding, not its crash
        return {**case, "status": "render-error", "message": _error_summary(exc),
                "wall_s": time.perf_counter() - start}
    rendered = time.perf_counter()
    case.update(format=fmt, bit_depth=truth["bit_depth"], orientation=truth["orientation"],
                geometry=truth["geometry"], liquid=liquid_kind(truth), n_frames=truth["n_frames"],
                shape=list(truth["frame_shape"]),
                d0_px=truth["initial_diameter_m"] / truth["pixel_size_m"],
                ohnesorge_d0=ohnesorge(truth, truth["initial_diameter_m"]),
                ohnesorge_floor=ohnesorge(truth, MIN_TRUE_PX * truth["pixel_size_m"]),
                optics=optics_tags(renderer, truth["optics"]),
                optics_class=optics_class(renderer, truth["optics"]), path=str(path),
                render_s=rendered - start)
    fluid = truth["fluid"]
    options = AnalysisOptions(fps_hz=truth["fps_hz"], pixel_size_m=truth["pixel_size_m"],
                              surface_tension_N_m=fluid["surface_tension"],
                              density_kg_m3=fluid["density"], geometry=truth["geometry"])
    try:
        result = analyse(path, options)
    except ThinningError as exc:
        case.update(status="unusable", message=str(exc))
    except Exception as exc:
        case.update(status="crash", message=_error_summary(exc))
    else:
        case.update(status="ok", **compare(truth, result))
    end = time.perf_counter()
    case.update(analyse_s=end - rendered, wall_s=end - start)
    return case


# --- many cases, each in its own process ----------------------------------------------------

def _child(spec, workdir, conn) -> None:
    conn.send(run_case(*spec, workdir))
    conn.close()


def run_cases(specs, *, jobs: int = 1, timeout_s: float = 900.0, keep=None):
    """Yield the case dicts of ``specs`` ((renderer, family, seed) …) as they finish.

    Each case runs in a forked process (a stalled renderer or analyser is killed after
    ``timeout_s``); its recording is written under ``keep`` (kept) or a temporary folder.
    """
    ctx = multiprocessing.get_context("fork")
    scratch = tempfile.TemporaryDirectory(prefix="accuracy-probe-")
    root = Path(keep) if keep is not None else Path(scratch.name)
    pending, running = list(specs), {}
    try:
        while pending or running:
            while pending and len(running) < jobs:
                spec = pending.pop(0)
                workdir = root / "{}-{}-{}".format(*spec)
                workdir.mkdir(parents=True, exist_ok=True)
                recv, send = ctx.Pipe(duplex=False)
                process = ctx.Process(target=_child, args=(spec, workdir, send), daemon=True)
                process.start()
                send.close()
                running[recv] = (process, spec, workdir, time.monotonic())
            for conn in multiprocessing.connection.wait(list(running), timeout=1.0):
                process, spec, workdir, _ = running.pop(conn)
                try:
                    case = conn.recv()
                except EOFError:
                    case = _failed(spec, "crash", f"the case's process died (exit code {process.exitcode})")
                process.join()
                _clean(workdir, keep)
                yield case
            now = time.monotonic()
            for conn, (process, spec, workdir, began) in list(running.items()):
                if now - began > timeout_s:
                    process.kill()
                    process.join()
                    del running[conn]
                    _clean(workdir, keep)
                    yield {**_failed(spec, "timeout", f"no result after {timeout_s:g} s"),
                           "wall_s": now - began}
    finally:
        for process, *_ in running.values():
            process.kill()
        scratch.cleanup()


def _failed(spec, status, message):
    renderer, family, seed = spec
    return {"renderer": renderer, "family": family, "seed": int(seed), "status": status,
            "message": message}


def _clean(workdir: Path, keep) -> None:
    if keep is None:
        shutil.rmtree(workdir, ignore_errors=True)


# --- summaries ------------------------------------------------------------------------------

def _median(values):
    values = [v for v in values if v is not None]
    return float(np.median(values)) if values else None


def summarise(cases: list[dict]) -> dict:
    """The figures of a group of cases (one renderer and family, or any group)."""
    ok = [c for c in cases if c["status"] == "ok"]
    true_px = np.concatenate([np.asarray(c["true_px"], float) for c in ok]) if ok else np.zeros(0)
    errors = np.concatenate([np.asarray(c["error_px"], float) for c in ok]) if ok else np.zeros(0)
    bands = []
    for lo, hi in BANDS:
        inside = (true_px >= lo) & (true_px < hi)
        bands.append({"band_px": [lo, None if math.isinf(hi) else hi], **_stats(errors[inside])})
    measured = [c for c in ok if c["diameter"]["n"]]
    worst = max(measured, key=lambda c: c["diameter"]["median_abs"], default=None)

    elastic = [c for c in cases if c.get("liquid") == "elastic"]
    lam = [c["lambda"]["rel_error"] for c in ok if c["lambda"] is not None
           and c["lambda"]["rel_error"] is not None]
    lam_cases = [c for c in ok if c["lambda"] is not None and c["lambda"]["rel_error"] is not None]
    lam_worst = max(lam_cases, key=lambda c: abs(c["lambda"]["rel_error"]), default=None)
    viscous = [c for c in cases if c.get("liquid") == "viscous"]
    eta = [c["viscosity"]["rel_error"] for c in ok if c["viscosity"] is not None
           and c["viscosity"]["rel_error"] is not None]
    breaking = [c for c in ok if c["breakup"] is not None]
    parting = [c for c in breaking if c["breakup"]["visible"]]
    fading = [c for c in breaking if not c["breakup"]["visible"]]
    extrapolated = [c["breakup"]["lifetime_error_frames"] for c in fading
                    if c["breakup"]["lifetime_basis"] == "extrapolated"]
    brk = [c["breakup"]["error_frames"] for c in parting if c["breakup"]["error_frames"] is not None]
    vanish = [c["breakup"]["error_vs_subpixel_frames"] for c in parting
              if c["breakup"]["error_vs_subpixel_frames"] is not None]
    start = [c["free_start"]["error_frames"] for c in ok]
    wrong = Counter(f"{c['regime']['truth']} → {c['regime']['measured']}" for c in ok
                    if not c["regime"]["right"])
    def by(key):
        groups = {}
        for value in sorted({c[key] for c in measured}):
            group = [c["diameter"] for c in measured if c[key] == value]
            groups[value] = {"n": len(group),
                             "median_of_median_abs_px": _median(d["median_abs"] for d in group),
                             "median_of_p95_px": _median(d["p95_abs"] for d in group),
                             "median_signed_px": _median(d["median_signed"] for d in group)}
        return groups
    return {
        "n": len(cases), "status": dict(Counter(c["status"] for c in cases)), "bands": bands,
        "median_of_median_abs_px": _median(c["diameter"]["median_abs"] for c in measured),
        "median_of_p95_px": _median(c["diameter"]["p95_abs"] for c in measured),
        "worst_median_abs": None if worst is None else {
            "seed": worst["seed"], "median_abs_px": worst["diameter"]["median_abs"]},
        "frames_missed": sum(c["diameter"]["missed"] for c in ok),
        "frames_compared": sum(c["diameter"]["n"] for c in ok),
        "lambda": {"elastic": len(elastic), "measured": len(lam),
                   "median_abs": _median(abs(v) for v in lam),
                   "worst": None if lam_worst is None else {
                       "seed": lam_worst["seed"], "rel_error": lam_worst["lambda"]["rel_error"]},
                   "within_5pct": sum(abs(v) <= TARGETS["lambda_each"] for v in lam),
                   "local_slope": _coverage(c["lambda"] for c in ok if c["lambda"] is not None),
                   "whole_curve": _coverage(c["lambda"]["model"] for c in ok
                                            if c["lambda"] is not None)},
        "regime": {"right": sum(c["regime"]["right"] for c in ok), "total": len(cases),
                   "wrong": dict(wrong)},
        "viscosity": {"viscous": len(viscous), "measured": len(eta),
                      "median_abs": _median(abs(v) for v in eta),
                      "worst": max(eta, key=abs, default=None),
                      "within_3pct": sum(abs(v) <= TARGETS["viscosity_each"] for v in eta),
                      "local_slope": _coverage(c["viscosity"] for c in ok if c["viscosity"] is not None),
                      "whole_curve": _coverage(c["viscosity"]["model"] for c in ok
                                               if c["viscosity"] is not None)},
        "breakup": {"parts": len(parting), "measured": len(brk),
                    "within_3_frames": sum(abs(v) <= TARGETS["breakup_frames"] for v in brk),
                    "median_abs_frames": _median(abs(v) for v in brk),
                    "worst_frames": max(brk, key=abs, default=None),
                    "subpixel_within_3_frames": sum(abs(v) <= TARGETS["breakup_frames"] for v in vanish),
                    "subpixel_median_abs_frames": _median(abs(v) for v in vanish),
                    "by_liquid": {kind: _breakups([c for c in parting if c["liquid"] == kind])
                                  for kind in TRUE_REGIME if any(c["liquid"] == kind for c in parting)},
                    "fades": len(fading),
                    "fades_reported": sum(c["breakup"]["seen"] == "faded" for c in fading),
                    "fades_lower_bound": sum(c["breakup"]["error_frames"] is not None
                                             and c["breakup"]["error_frames"] <= 1.0 for c in fading),
                    "fades_extrapolated": len(extrapolated),
                    "extrapolated_median_abs_frames": _median(abs(v) for v in extrapolated),
                    "extrapolated_worst_frames": max(extrapolated, key=abs, default=None),
                    "parted_reported": sum(c["breakup"]["seen"] == "parted" for c in parting)},
        "free_start": {"median_abs_frames": _median(abs(v) for v in start),
                       "worst_frames": max(start, key=abs, default=None)},
        "quality": dict(Counter(c.get("quality", c["status"]) for c in cases)),
        "formats": by("format"), "optics": by("optics_class"), "liquids": by("liquid"),
        "wall_s": {"median": _median(c.get("wall_s") for c in cases),
                   "total": float(sum(c.get("wall_s", 0.0) for c in cases))},
    }


def _breakups(parting: list[dict]) -> dict:
    errors = [c["breakup"]["error_frames"] for c in parting if c["breakup"]["error_frames"] is not None]
    return {"parts": len(parting),
            "within_3_frames": sum(abs(v) <= TARGETS["breakup_frames"] for v in errors),
            "median_frames": _median(errors)}


def probe(renderers, families, seeds, *, jobs: int = 1, keep=None, timeout_s: float = 900.0,
          echo=None) -> dict:
    """Run every (renderer, family, seed); return ``{"cases": […], "summaries": […], "targets": …}``.

    ``echo``: optional callable given each case's line as it finishes.
    """
    specs = [(r, f, s) for r in renderers for f in families for s in seeds]
    cases = []
    for case in run_cases(specs, jobs=jobs, timeout_s=timeout_s, keep=keep):
        cases.append(case)
        if echo is not None:
            echo(case_line(case))
    order = {spec: k for k, spec in enumerate(specs)}
    cases.sort(key=lambda c: order[(c["renderer"], c["family"], c["seed"])])
    summaries = []
    for r in renderers:
        for f in families:
            group = [c for c in cases if c["renderer"] == r and c["family"] == f]
            summaries.append({"renderer": r, "family": f, **summarise(group)})
        if len(families) > 1:
            summaries.append({"renderer": r, "family": "all",
                              **summarise([c for c in cases if c["renderer"] == r])})
    return {"targets": TARGETS, "cases": cases, "summaries": summaries}


# --- text -----------------------------------------------------------------------------------

def _num(v, fmt=".3f"):
    return "—" if v is None else format(v, fmt)


def _pct(v, sign="+"):
    return "—" if v is None else f"{100 * v:{sign}.1f}%"


def case_line(c: dict) -> str:
    """One line on a case."""
    head = f"{c['renderer']:8s} {c['family']:15s} {c['seed']:4d}"
    if "format" not in c:
        return f"{head}  {c['status'].upper()}: {c['message']}"
    head += (f" {c['format']:10s} {c['bit_depth']:2d}b {c['orientation'][0]} {c['geometry']:8s} "
             f"{c['liquid']:8s} D0 {c['d0_px']:5.0f}px {c['n_frames']:3d}f")
    if c["status"] != "ok":
        return f"{head}  {c['status'].upper()}: {c['message']}  [{c['optics']}] {c['wall_s']:.0f}s"
    d = c["diameter"]
    regime = c["regime"]
    text = (f"{head} | |e| {_num(d['median_abs'])} p95 {_num(d['p95_abs'])} "
            f"± {_num(d['median_signed'], '+.3f')}" + (f" miss {d['missed']}" if d["missed"] else "")
            + f" | {'ok' if regime['right'] else 'WRONG ' + regime['measured']}")
    if c["liquid"] != "elastic":
        text += f" Oh {c['ohnesorge_d0']:.2g}→{c['ohnesorge_floor']:.2g}"
    if c["lambda"] is not None:
        lam = c["lambda"]
        text += (f" λ {_pct(lam['rel_error'])}{'' if lam['covered'] in (None, True) else '!'}"
                 f" model {_pct(lam['model']['rel_error'])}"
                 f"{'' if lam['model']['covered'] in (None, True) else '!'}")
    if c["viscosity"] is not None:
        text += f" η {_pct(c['viscosity']['rel_error'])}"
    if c["breakup"] is not None:
        b = c["breakup"]
        text += (f" brk {_num(b['error_frames'], '+.1f')} (<1px {_num(b['error_vs_subpixel_frames'], '+.1f')}"
                 f"; {'parts' if b['visible'] else 'fades'}, {b['seen']}, {b['lifetime_basis']}"
                 + ("" if b["lifetime_error_frames"] is None else f" {b['lifetime_error_frames']:+.1f}")
                 + ")")
    text += f" ft {c['free_start']['error_frames']:+.1f}"
    codes = ",".join(c["finding_codes"])
    return f"{text} | {c['quality']} {c['wall_s']:.0f}s [{c['optics']}] {codes}"


def _mark(ok) -> str:
    return "—" if ok is None else ("ok" if ok else "MISSED")


def summary_text(s: dict) -> str:
    """The summary block of one group."""
    t = TARGETS
    status = ", ".join(f"{k} {v}" for k, v in sorted(s["status"].items()))
    lines = [f"== {s['renderer']} / {s['family']}: {s['n']} recordings ({status}) ==",
             ("true D (px)      n    median±   median|e|  p95|e|   target |median±| ≤ "
              f"{t['band_median_signed_px']}")]
    for b in s["bands"]:
        lo, hi = b["band_px"]
        name = f"{lo:g}–{hi:g}" if hi is not None else f"{lo:g}+"
        ok = None if b["median_signed"] is None else abs(b["median_signed"]) <= t["band_median_signed_px"]
        lines.append(f"  {name:10s} {b['n']:6d}  {_num(b['median_signed'], '+.4f'):>8s}  "
                     f"{_num(b['median_abs'], '.4f'):>8s}  {_num(b['p95_abs'], '.4f'):>7s}   {_mark(ok)}")
    mm, mp = s["median_of_median_abs_px"], s["median_of_p95_px"]
    worst = s["worst_median_abs"]
    lines.append(f"per recording: median of median |e| {_num(mm)} px "
                 f"(target ≤ {t['median_of_median_abs_px']}: "
                 f"{_mark(None if mm is None else mm <= t['median_of_median_abs_px'])}); median of p95 "
                 f"{_num(mp)} px (target ≤ {t['median_of_p95_px']}: "
                 f"{_mark(None if mp is None else mp <= t['median_of_p95_px'])}); worst median |e| "
                 + ("—" if worst is None else f"{worst['median_abs_px']:.3f} px (seed {worst['seed']})")
                 + f"; frames compared {s['frames_compared']}, missed {s['frames_missed']}")
    lam = s["lambda"]
    if lam["elastic"]:
        lw = lam["worst"]
        lines.append(
            f"λ: {lam['elastic']} elastic, {lam['measured']} with λ; "
            f"median |err| {_pct(lam['median_abs'], '')}"
            f" (target ≤ {100 * t['lambda_median_abs']:g} %: "
            f"{_mark(None if lam['median_abs'] is None else lam['median_abs'] <= t['lambda_median_abs'])}); "
            f"worst {'—' if lw is None else _pct(lw['rel_error']) + ' (seed ' + str(lw['seed']) + ')'}; "
            f"within 5 %: {lam['within_5pct']}/{lam['elastic']} "
            f"(target all: {_mark(lam['within_5pct'] == lam['elastic'])})")
    for what, key in (("λ", "lambda"), ("η (Newtonian)", "viscosity")):
        for name in ("local_slope", "whole_curve"):
            cov = s[key].get(name) if s[key] else None
            if not cov or not cov["n"]:
                continue
            ok_cov = None if cov["coverage"] is None else (
                t["coverage"][0] <= cov["coverage"] <= t["coverage"][1])
            ratio = cov["width_ratio"]
            lines.append(
                f"{what} {name.replace('_', '-')}: median |err| {_pct(cov['median_abs'], '')}, within 3 % "
                f"{cov['within_3pct']}/{cov['n']}; 95 % interval covers {cov['covered']}/"
                f"{cov['with_interval']} ({_pct(cov['coverage'], '')}; target 90–98 %: {_mark(ok_cov)}); "
                f"median half-width {_pct(cov['median_half_rel'], '')} = {_num(ratio, '.2f')} × median "
                f"|err| (target ≤ 3: {_mark(None if ratio is None else ratio <= 3)})")
    reg = s["regime"]
    wrong = "; ".join(f"{k} ×{v}" for k, v in reg["wrong"].items())
    lines.append(f"regime: {reg['right']}/{reg['total']} right (target all: "
                 f"{_mark(reg['right'] == reg['total'])})" + (f"; wrong: {wrong}" if wrong else ""))
    eta = s["viscosity"]
    if eta["viscous"]:
        lines.append(f"viscosity (visco-capillary fit vs η): {eta['viscous']} viscous, {eta['measured']} "
                     f"measured; median |err| {_pct(eta['median_abs'], '')}, worst {_pct(eta['worst'])}; "
                     f"within 3 %: {eta['within_3pct']}/{eta['viscous']} "
                     f"(target all: {_mark(eta['within_3pct'] == eta['viscous'])})")
    b = s["breakup"]
    lines.append(f"breakup: within 3 frames {b['within_3_frames']}/{b['parts']} where the thread parts visibly "
                 f"(target all: {_mark(b['within_3_frames'] == b['parts'])}); median |err| "
                 f"{_num(b['median_abs_frames'], '.2f')} frames, worst {_num(b['worst_frames'], '+.1f')}; "
                 f"against the first frame with true D < 1 px: within 3 frames "
                 f"{b['subpixel_within_3_frames']}/{b['parts']}, median |err| "
                 f"{_num(b['subpixel_median_abs_frames'], '.2f')} frames; by liquid: "
                 + ", ".join(f"{k} {v['within_3_frames']}/{v['parts']} "
                             f"(median {_num(v['median_frames'], '+.1f')})"
                             for k, v in b["by_liquid"].items()))
    lines.append(f"breakup seen parting: {b['parted_reported']}/{b['parts']}; threads that fade "
                 f"before they part: {b['fades']}, reported faded {b['fades_reported']}, breakup a "
                 f"lower bound {b['fades_lower_bound']}, lifetime extrapolated {b['fades_extrapolated']} "
                 f"(median |err| {_num(b['extrapolated_median_abs_frames'], '.2f')} frames, worst "
                 f"{_num(b['extrapolated_worst_frames'], '+.1f')})")
    fs = s["free_start"]
    lines.append(f"free-thinning start: median |err| {_num(fs['median_abs_frames'], '.2f')} frames, "
                 f"worst {_num(fs['worst_frames'], '+.1f')}")
    lines.append("quality: " + ", ".join(f"{k} {v}" for k, v in sorted(s["quality"].items())))
    for key, name in (("formats", "format"), ("optics", "optics"), ("liquids", "liquid")):
        lines.append(f"by {name} (median per recording): " + "; ".join(
            f"{k} n={v['n']} |e| {_num(v['median_of_median_abs_px'])} p95 {_num(v['median_of_p95_px'])} "
            f"± {_num(v['median_signed_px'], '+.3f')}" for k, v in s[key].items()))
    lines.append(f"wall: median {_num(s['wall_s']['median'], '.1f')} s a case, "
                 f"total {s['wall_s']['total']:.0f} s")
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--renderer", choices=("synth", "raysynth", "both"), default="both")
    parser.add_argument("--family", action="append", choices=raysynth.FAMILIES,
                        help="family of random cases (repeatable; default regular)")
    parser.add_argument("--n", type=int, default=10, help="cases per renderer and family")
    parser.add_argument("--seed", type=int, default=0, help="first seed (case i uses seed + i)")
    parser.add_argument("--jobs", type=int, default=1, help="cases run at once")
    parser.add_argument("--json", type=Path, help="write every figure to this JSON file")
    parser.add_argument("--keep", type=Path, help="keep the recordings and their truth in this folder")
    parser.add_argument("--timeout", type=float, default=900.0, help="seconds before a case is killed")
    args = parser.parse_args(argv)
    renderers = ("synth", "raysynth") if args.renderer == "both" else (args.renderer,)
    families = args.family or ["regular"]
    seeds = range(args.seed, args.seed + args.n)
    report = probe(renderers, families, seeds, jobs=max(1, args.jobs), keep=args.keep,
                   timeout_s=args.timeout, echo=lambda line: print(line, flush=True))
    print()
    for s in report["summaries"]:
        print(summary_text(s), end="\n\n")
    if args.json is not None:
        args.json.write_text(json.dumps(json_plain(report), indent=1, allow_nan=False) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
