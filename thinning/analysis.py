"""One recording end to end: source → neck diameters → regimes and fits → Result → DIR files.

:func:`analyse` turns a recording and its options into a
:class:`~thinning.result.Result` (it reads only the recording and writes
nothing); :func:`write_outputs` writes a result's files into a folder (every
file replaced atomically, ``result.json`` last); :func:`analyse_to` is both,
the ``thinning analyse`` job and the unit of work of a batch. Input it cannot
use raises :class:`UnusableInput` with one sentence.
"""

from __future__ import annotations

import importlib
import logging
import threading
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd

from . import __version__, atomic
from .checks import Code, Finding, Severity
from .clock import ClockConflict, motion_blur_finding, resolve_clock
from .errors import ThinningError
from .frames import UnusableSource, open_source
from .result import MeasuredLayout, Result, SourceInfo
from .units import AnalysisOptions, BadQuantity, check_required

log = logging.getLogger(__name__)

#: Modules of the stages after the measurement, imported in the background while it runs.
LATER_STAGES = ("thinning.characterisation", "thinning.plots", "thinning.report.recording")
#: How a colour camera's frames were made grey (``FrameSource.colour``), for the record.
COLOUR_WORDS = {
    "luma-bt601": "The camera's interpolated colour frames were read as grey by their luma, "
                  "0.299 R + 0.587 G + 0.114 B (ITU-R BT.601 weights).",
    "bayer-2x2-mean": "The camera's raw colour-filter mosaic was read as grey by the mean of each "
                      "pixel's 2 × 2 block, (R + 2 G + B) / 4, which evens out the filter pattern.",
}
#: The formats the figures can be written in (PNG always: the contract names the files and the
#: report embeds them).
FIGURE_FORMATS = ("png", "svg")
DIAMETER_COLUMNS = ["frame", "time_s", "diameter_m", "neck_position_m", "strain_rate_1_s",
                    "hencky_strain", "apparent_extensional_viscosity_Pa_s"]


class UnusableInput(ThinningError, ValueError):
    """The recording or its options cannot be analysed (message: one sentence for the user)."""


def seed_from_sha256(sha256: str) -> int:
    """Seed for anything random (bootstrap), from the source's content hash."""
    return int(sha256[:16], 16)


def analyse(source, options: AnalysisOptions, *, progress=None) -> Result:
    """Analyse one recording; nothing is written.

    Parameters
    ----------
    source : str or path
        A recording: video file, multi-page TIFF, image folder or native camera
        file (see :func:`thinning.frames.open_source`).
    options : AnalysisOptions
        The analysis options in SI (:func:`thinning.units.options_from_text`
        reads them from text with units).
    progress : callable, optional
        ``progress(frames_done, n_frames)``, called every 256 frames.

    Returns
    -------
    Result
        The frozen result: neck series, per-frame SI table, regimes, fits,
        rheology numbers and findings.

    Raises
    ------
    UnusableInput
        One sentence, for a recording or options that cannot be analysed.

    Notes
    -----
    Linear algebra runs on one thread: the fits are small, and an idle BLAS
    thread pool spins on cores that the decoders (or other workers) need.
    """
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        return _analyse(source, options, progress)


def analyse_to(source, out_dir, options: AnalysisOptions, *, progress=None,
               figures=("png",)) -> Result:
    """Analyse one recording and write its files: the ``thinning analyse`` job.

    Parameters
    ----------
    source, options, progress
        As for :func:`analyse`.
    out_dir : str or path
        The output folder (created if needed); see :func:`write_outputs`.
    figures : iterable of str or str
        The formats of the figures, as for :func:`write_outputs`.

    Returns
    -------
    Result
    """
    from .atomic import require_fitting_name
    from .frames import require_text_path

    require_text_path(out_dir, "output folder")
    require_fitting_name(out_dir)
    try:
        source_path, out_path = Path(source).resolve(), Path(out_dir).resolve()
    except RuntimeError:   # Python's word for a symbolic link that leads back to itself
        raise UnusableInput(f"{source} or {out_dir}: a symbolic link that leads back to itself; "
                            "give the real file or folder.") from None
    if source_path.is_dir() and (out_path == source_path or source_path in out_path.parents):
        raise UnusableInput(f"{out_dir}: the output folder lies inside the image folder {source}, "
                            "whose frames it would mix with figures; choose an --out elsewhere.")
    try:
        figures = figure_formats(figures)
    except ValueError as exc:
        raise UnusableInput(f"--figures: {exc}.") from None
    result = analyse(source, options, progress=progress)
    write_outputs(result, out_dir, figures=figures)
    return result


def _analyse(source, options: AnalysisOptions, progress) -> Result:
    from .measure import NoFilament, measure_recording, to_physical
    from .measure.layout import UnusableRoi, roi_within

    try:
        check_required(options, container_fps=1.0)  # the frame rate is checked below, with the source
    except BadQuantity as exc:
        raise UnusableInput(str(exc)) from None
    try:
        recording = open_source(source)
    except UnusableSource as exc:
        raise UnusableInput(str(exc)) from None
    try:  # the crop is checked against the frames before any is decoded
        roi_within(options.roi_px, recording.shape)
    except UnusableRoi as exc:
        recording.close()
        raise UnusableInput(str(exc)) from None
    # while the frames are measured: the file's hash, and the imports of the later stages
    # (both mostly outside the GIL or on an idle core; about a second on a laptop)
    threading.Thread(target=_import_later_stages, name="thinning-imports", daemon=True).start()
    try:  # the clock is checked against the file's header before any frame is decoded
        clock, findings = resolve_clock(options, recording)
    except ClockConflict as exc:
        recording.close()
        raise UnusableInput(str(exc)) from None
    with recording, ThreadPoolExecutor(max_workers=1) as hasher:
        hashing = hasher.submit(lambda: recording.sha256)
        frames = _counted(recording, progress)
        try:
            series = measure_recording(frames, geometry=options.geometry, roi=options.roi_px,
                                       n_frames=recording.n_frames)
        except NoFilament as exc:
            raise UnusableInput(f"{source}: {exc}") from None
        if not series.table["thread_connected"].any():
            raise UnusableInput(f"{source}: no filament in any frame: no frame shows a liquid thread "
                                "between the end bodies (is this a backlight-only recording?).")
        if recording.frames_read == 0:
            raise UnusableInput(f"{source}: no frame could be decoded.")
        if recording.broken_off:
            findings.append(Finding(
                Code.RECORD_BROKEN_OFF, Severity.DOUBTFUL,
                f"The recording broke off after frame {recording.frames_read - 1} of "
                f"{recording.n_frames} expected; it was analysed up to its last good frame."))
        if recording.colour:
            findings.append(Finding(Code.COLOUR_AS_GREY, Severity.NOTE, COLOUR_WORDS.get(
                recording.colour, f"The colour frames were read as grey ({recording.colour}).")))
        if recording.left_out:
            names = recording.left_out
            findings.append(Finding(
                Code.FILES_LEFT_OUT, Severity.NOTE,
                f"{len(names)} file(s) of the folder that are not image frames were left out "
                f"({', '.join(names[:3])}{', …' if len(names) > 3 else ''}); only the images were analysed."))
        sha256 = hashing.result()
        source_info = SourceInfo(path=str(source), sha256=sha256, n_frames=int(recording.frames_read),
                                 width_px=int(recording.shape[1]), height_px=int(recording.shape[0]),
                                 bit_depth=int(recording.bit_depth))

    from .characterisation import characterise
    from .uncertainty import reference_width_uncertainty

    pixel_size_m = _pixel_size(options, series)
    calibration = clock.calibration(pixel_size_m, source_info.n_frames)
    fps_hz = calibration.fps_hz
    table = to_physical(series, calibration)
    findings.extend(series.findings)
    free_start_s = float(calibration.time_s(series.free_thinning_start_frame))
    breakup_s = (None if series.breakup_frame is None
                 else float(calibration.time_s(series.breakup_frame)))
    rheo = characterise(
        table["time_s"].to_numpy(), table["diameter_m"].to_numpy(),
        surface_tension=options.surface_tension_N_m, pixel_size_m=pixel_size_m, fps_hz=fps_hz,
        free_thinning_start_s=free_start_s, breakup_time_s=breakup_s,
        density=options.density_kg_m3, solvent_viscosity=options.solvent_viscosity_Pa_s,
        zero_shear_viscosity=options.zero_shear_viscosity_Pa_s, geometry=options.geometry,
        seed=seed_from_sha256(sha256), diameter_noise_m=series.diameter_noise_px * pixel_size_m,
        breakup_parted=series.breakup_parted,
        pixel_size_rel=(0.0 if options.pixel_size_m is not None
                        else reference_width_uncertainty(series.layout.plate_width_px)))
    findings.extend(rheo.findings)
    blur = motion_blur_finding(
        table["time_s"].to_numpy(), table["diameter_m"].to_numpy(), exposure_s=clock.exposure_s,
        pixel_size_m=pixel_size_m, floor_m=rheo.resolution_floor_m,
        t_range_s=(free_start_s, breakup_s if breakup_s is not None else float(table["time_s"].iloc[-1])))
    if blur is not None:
        findings.append(blur)
    for column in rheo.curves.columns:
        table[column] = rheo.curves[column].to_numpy()
    layout = series.layout
    return Result(source=source_info, calibration=calibration, options=options,
                  characterisation=rheo, findings=tuple(findings), clock=clock,
                  layout=MeasuredLayout(orientation=layout.orientation, roi_px=tuple(layout.roi),
                                        plate_width_px=layout.plate_width_px),
                  tool_version=__version__, neck=series, table=table)


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


# --- writers -------------------------------------------------------------------------

def diameter_csv_text(table: pd.DataFrame) -> str:
    """The ``diameter.csv`` text: the contract's columns first, empty cells where undefined."""
    columns = [c for c in DIAMETER_COLUMNS if c in table.columns]
    frame = table[columns].copy()
    return frame.to_csv(index=False, na_rep="", lineterminator="\n", float_format=lambda v: repr(float(v)))


def figure_formats(formats):
    """The formats to write, in :data:`FIGURE_FORMATS` order, PNG always among them; ``formats``
    an iterable of names or one comma-separated text (``"png,svg"``). Raises ValueError for an
    unknown one."""
    if isinstance(formats, str):
        formats = formats.split(",")
    wanted = {str(f).strip().lower().lstrip(".") for f in formats} - {""}
    unknown = sorted(wanted - set(FIGURE_FORMATS))
    if unknown:
        raise ValueError(f"unknown figure format {', '.join(map(repr, unknown))}: choose from "
                         f"{', '.join(FIGURE_FORMATS)} (e.g. png,svg)")
    return tuple(f for f in FIGURE_FORMATS if f in wanted | {"png"})


def write_outputs(result: Result, out_dir, *, figures=("png",)) -> Path:
    """Write every file of one analysed recording.

    Parameters
    ----------
    result : Result
        A fresh result of :func:`analyse` (with its per-frame table and neck series).
    out_dir : str or path
        The folder, created if needed. ``diameter.csv``, the figures,
        ``report.html`` and ``result.json`` are written into a staging folder
        beside it, which then replaces it in one step (:func:`thinning.atomic.replacing_folder`):
        the folder is wholly old or wholly new, and other files in it are kept.
    figures : iterable of str or str
        The formats of the figures (:func:`figure_formats`): ``"png"`` (always
        written) and ``"svg"`` (``diameter.svg`` … besides the PNGs). The SVGs of an earlier
        run are removed when this one writes none.

    Returns
    -------
    pathlib.Path
        The folder.
    """
    from .plots import FIGURE_NAMES, write_figures
    from .report.recording import write_recording_report

    out = Path(out_dir)
    own = {"diameter.csv", "report.html", "result.json"} | {
        f"{n}.{fmt}" for n in FIGURE_NAMES for fmt in FIGURE_FORMATS}
    with atomic.replacing_folder(out, own) as stage:
        atomic.write_bytes(stage / "diameter.csv", diameter_csv_text(result.table).encode())
        pngs = write_figures(stage, result, formats=figures)
        write_recording_report(stage, result, pngs)
        atomic.write_bytes(stage / "result.json", result.to_json_text().encode())
    return out
