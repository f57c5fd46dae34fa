"""One recording end to end: source → neck diameters → regimes and fits → DIR files.

:func:`analyse` is the whole ``thinning analyse`` job and the unit of work of a
batch. It reads only the recording, writes only into ``out_dir`` (every file
replaced atomically, ``result.json`` last), and raises :class:`UnusableInput`
with one sentence for input it cannot use.
"""

from __future__ import annotations

import importlib
import json
import logging
import math
import threading
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import ThinningError
from . import __version__, atomic
from .checks import Code, Finding, Severity, quality_of, warning_sentences
from .frames import UnusableSource, open_source
from .units import AnalysisOptions, BadQuantity, Calibration, check_required

log = logging.getLogger(__name__)

RESULT_SCHEMA = "thinning.result/1"
#: Without --fps, a container rate below this (1/s) is used with a warning (likely a playback rate).
PLAYBACK_RATE_LIMIT_HZ = 500.0
#: Modules of the stages after the measurement, imported in the background while it runs.
LATER_STAGES = ("thinning.characterise", "thinning.plots", "thinning.report.recording")
DIAMETER_COLUMNS = ["frame", "time_s", "diameter_m", "neck_position_m", "strain_rate_1_s",
                    "hencky_strain", "apparent_extensional_viscosity_Pa_s"]


class UnusableInput(ThinningError, ValueError):
    """The recording or its options cannot be analysed (message: one sentence for the user)."""


def seed_from_sha256(sha256: str) -> int:
    """Seed for anything random (bootstrap), from the source's content hash."""
    return int(sha256[:16], 16)


def resolve_frame_rate(options: AnalysisOptions, container_fps):
    """Frame rate (1/s) to use and the findings about where it came from."""
    if options.fps_hz is not None:
        return options.fps_hz, []
    if container_fps is None:
        raise UnusableInput("The recording carries no frame rate; pass --fps with the camera's "
                            "recording rate, e.g. --fps 10kHz.")
    if container_fps >= PLAYBACK_RATE_LIMIT_HZ:
        return container_fps, []
    message = (f"No --fps given: the container's rate of {container_fps:g}/s was used, but for "
               "high-speed cameras it is usually a playback rate; pass --fps to be sure.")
    return container_fps, [Finding(Code.CONTAINER_FRAME_RATE, Severity.NOTE, message)]


def analyse(source, out_dir, options: AnalysisOptions, *, progress=None) -> dict:
    """Analyse one recording into ``out_dir``; return the ``result.json`` content.

    ``progress``: optional callable ``progress(frames_done, n_frames)``.
    Writes ``diameter.csv``, the figures, ``report.html`` and ``result.json``.
    Linear algebra runs on one thread: the fits are small, and an idle BLAS
    thread pool spins on cores that the decoders (or other workers) need.
    """
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        return _analyse(source, out_dir, options, progress)


def _analyse(source, out_dir, options: AnalysisOptions, progress) -> dict:
    from .edges import NoFilament
    from .neck import measure_recording, to_physical

    try:
        check_required(options, container_fps=1.0)  # the frame rate is checked below, with the source
    except BadQuantity as exc:
        raise UnusableInput(str(exc)) from None
    try:
        recording = open_source(source)
    except UnusableSource as exc:
        raise UnusableInput(str(exc)) from None
    # while the frames are measured: the file's hash, and the imports of the later stages
    # (both mostly outside the GIL or on an idle core; about a second on a laptop)
    threading.Thread(target=_import_later_stages, name="thinning-imports", daemon=True).start()
    with recording, ThreadPoolExecutor(max_workers=1) as hasher:
        fps_hz, findings = resolve_frame_rate(options, recording.fps)
        hashing = hasher.submit(lambda: recording.sha256)
        frames = _counted(recording, progress)
        try:
            series = measure_recording(frames, geometry=options.geometry, roi=options.roi_px,
                                       n_frames=recording.n_frames)
        except NoFilament as exc:
            raise UnusableInput(f"{source}: {exc}") from None
        if recording.frames_read == 0:
            raise UnusableInput(f"{source}: no frame could be decoded.")
        if recording.broken_off:
            findings.append(Finding(Code.RECORD_BROKEN_OFF, Severity.DOUBTFUL,
                f"The recording broke off after frame {recording.frames_read - 1} of "
                f"{recording.n_frames} expected; it was analysed up to its last good frame."))
        sha256 = hashing.result()
        source_info = {"path": str(source), "sha256": sha256, "n_frames": int(recording.frames_read),
                       "width_px": int(recording.shape[1]), "height_px": int(recording.shape[0]),
                       "bit_depth": int(recording.bit_depth)}

    from .characterise import characterise

    pixel_size_m = _pixel_size(options, series)
    calibration = Calibration(fps_hz=fps_hz, pixel_size_m=pixel_size_m)
    table = to_physical(series, calibration)
    findings.extend(series.findings)
    free_start_s = float(series.free_thinning_start_frame) / fps_hz
    breakup_s = None if series.breakup_frame is None else float(series.breakup_frame) / fps_hz
    rheo = characterise(
        table["time_s"].to_numpy(), table["diameter_m"].to_numpy(),
        surface_tension=options.surface_tension_N_m, pixel_size_m=pixel_size_m, fps_hz=fps_hz,
        free_thinning_start_s=free_start_s, breakup_time_s=breakup_s,
        density=options.density_kg_m3, solvent_viscosity=options.solvent_viscosity_Pa_s,
        zero_shear_viscosity=options.zero_shear_viscosity_Pa_s, geometry=options.geometry,
        seed=seed_from_sha256(sha256), diameter_noise_m=series.diameter_noise_px * pixel_size_m)
    findings.extend(rheo.findings)
    for column in rheo.curves.columns:
        table[column] = rheo.curves[column].to_numpy()

    quality, reasons = quality_of(findings)
    result = {
        "schema": RESULT_SCHEMA,
        "tool_version": __version__,
        "source": source_info,
        "fps_hz": fps_hz,
        "pixel_size_m": pixel_size_m,
        "options": options.to_dict(),
        **rheo.result_fields(),
        "warnings": warning_sentences(findings),
        "quality": quality,
        "quality_reasons": reasons,
        "finding_codes": list(dict.fromkeys(f.code for f in findings)),
        "layout": _layout_dict(series),
    }
    result = _json_safe(result)
    write_outputs(out_dir, result, table, series, rheo)
    return result


def _import_later_stages():
    for name in LATER_STAGES:
        importlib.import_module(name)


def _counted(recording, progress):
    for i, frame in enumerate(recording):
        if progress is not None and i % 256 == 0:
            progress(i, recording.n_frames)
        yield frame


def _pixel_size(options: AnalysisOptions, series) -> float:
    if options.pixel_size_m is not None:
        return options.pixel_size_m
    width_px = series.layout.plate_width_px
    if width_px is None or not np.isfinite(width_px) or width_px <= 0:
        raise UnusableInput("--reference-width was given but no plate or nozzle could be measured "
                            "in the frame; pass --pixel-size instead.")
    return options.reference_width_m / float(width_px)


def _layout_dict(series):
    layout = series.layout
    return {"orientation": layout.orientation, "roi_px": [int(v) for v in layout.roi],
            "plate_width_px": layout.plate_width_px}


def _json_safe(value):
    """Plain Python for JSON: numpy scalars unwrapped, NaN/inf → None, tuples → lists."""
    if isinstance(value, dict):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return value if math.isfinite(value) else None
    if isinstance(value, np.ndarray):
        return _json_safe(value.tolist())
    return value


# --- writers -------------------------------------------------------------------------

def result_json_text(result: dict) -> str:
    """The ``result.json`` text: full precision, never NaN."""
    return json.dumps(result, indent=2, allow_nan=False) + "\n"


def diameter_csv_text(table: pd.DataFrame) -> str:
    """The ``diameter.csv`` text: the contract's columns first, empty cells where undefined."""
    columns = [c for c in DIAMETER_COLUMNS if c in table.columns]
    frame = table[columns].copy()
    return frame.to_csv(index=False, na_rep="", lineterminator="\n", float_format=lambda v: repr(float(v)))


def write_outputs(out_dir, result, table, series, rheo):
    """Write every file of one analysed recording into ``out_dir`` (created if needed)."""
    from .plots import write_figures
    from .report.recording import write_recording_report

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    atomic.write_bytes(out / "diameter.csv", diameter_csv_text(table).encode())
    figures = write_figures(out, table, result, series.snapshots, fit_curves=None,
                            orientation=series.layout.orientation)
    write_recording_report(out, result, figures)
    atomic.write_bytes(out / "result.json", result_json_text(result).encode())
