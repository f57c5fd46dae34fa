"""The result of one analysed recording: one frozen object, and the one producer of ``result.json``.

:class:`Result` gathers what every later consumer needs (figures, both
reports, the batch table, the records): where the recording came from, the
calibration and options used, the measured layout, the per-frame table in
SI, the characterisation (regimes, typed fits, rheology numbers) and the
findings. :meth:`Result.to_json` is the only code that makes the content of
``result.json`` (the contract's keys, in a fixed order, JSON-plain, never
NaN); :meth:`Result.from_json` reads it back, so a stored result is the same
object as a fresh one, less what the file does not hold (the neck series in
pixels and the per-frame table, which :func:`read_result` takes from
``diameter.csv``).
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd

from .checks import Code, Finding, Severity, quality_of, warning_sentences
from .clock import RecordingClock
from .units import AnalysisOptions, Calibration
from .values import json_plain

if TYPE_CHECKING:  # imported where needed: the characterisation stage loads scipy
    from .characterisation import Characterisation

RESULT_SCHEMA = "thinning.result/1"


@dataclass(frozen=True)
class SourceInfo:
    """The recording analysed: ``path`` as given, ``sha256`` of its bytes, frames read, size (px)
    and bit depth (None where not recorded)."""

    path: str
    sha256: str
    n_frames: int | None = None
    width_px: int | None = None
    height_px: int | None = None
    bit_depth: int | None = None

    def to_dict(self) -> dict:
        return {"path": self.path, "sha256": self.sha256, "n_frames": self.n_frames,
                "width_px": self.width_px, "height_px": self.height_px, "bit_depth": self.bit_depth}


@dataclass(frozen=True)
class MeasuredLayout:
    """How the filament lay in the frames: ``orientation`` ("vertical" or "horizontal"), the
    region analysed ``roi_px`` (x0, y0, x1, y1) and the plate (nozzle) width across the axis (px)."""

    orientation: str
    roi_px: tuple[int, int, int, int]
    plate_width_px: float | None

    def to_dict(self) -> dict:
        return {"orientation": self.orientation, "roi_px": [int(v) for v in self.roi_px],
                "plate_width_px": self.plate_width_px}


@dataclass(frozen=True)
class Result:
    """One analysed recording (SI units throughout).

    ``neck`` is the measurement in pixels (:class:`thinning.measure.NeckSeries`,
    with the frames of the picture strip) and ``table`` the per-frame table in
    SI with the derived curves (the columns of ``diameter.csv`` and more);
    both are None for a result read back from ``result.json`` alone.
    ``findings`` are all of the record's, in the order they were raised.
    ``clock`` says where the clock came from, with the exposure and trigger
    frame (:class:`thinning.clock.RecordingClock`; read back without stamps).
    """

    source: SourceInfo
    calibration: Calibration
    options: AnalysisOptions
    characterisation: Characterisation
    findings: tuple[Finding, ...] = ()
    layout: MeasuredLayout | None = None
    tool_version: str = ""
    clock: RecordingClock | None = None
    neck: object | None = field(default=None, compare=False, repr=False)
    table: pd.DataFrame | None = field(default=None, compare=False, repr=False)

    # --- what people read first ---------------------------------------------------------
    @property
    def warnings(self) -> list[str]:
        """The findings' sentences, in order, without repeats."""
        return warning_sentences(self.findings)

    @property
    def quality(self) -> str:
        """``"good"`` or ``"doubtful"``."""
        return quality_of(self.findings)[0]

    @property
    def quality_reasons(self) -> list[str]:
        """The sentences of the doubtful findings."""
        return quality_of(self.findings)[1]

    @property
    def finding_codes(self) -> list[str]:
        """The findings' codes, in order, without repeats."""
        return list(dict.fromkeys(f.code.value for f in self.findings))

    @property
    def warning_codes(self) -> list[str]:
        """One code per sentence of :attr:`warnings` (the code that first said it)."""
        first = {}
        for f in self.findings:
            first.setdefault(f.message, f.code.value)
        return [first[message] for message in self.warnings]

    def summary(self) -> "Result":
        """This result without the heavy parts (neck series, per-frame table): what a batch
        worker hands back to its coordinator."""
        return Result(self.source, self.calibration, self.options,
                      _without_curves(self.characterisation), self.findings, self.layout,
                      self.tool_version, self.clock)

    # --- result.json ------------------------------------------------------------------------
    def to_json(self) -> dict:
        """The content of ``result.json``: every contract key, JSON-plain, None for NaN."""
        data = {
            "schema": RESULT_SCHEMA,
            "tool_version": self.tool_version,
            "source": self.source.to_dict(),
            "fps_hz": self.calibration.fps_hz,
            "pixel_size_m": self.calibration.pixel_size_m,
            "clock_source": None if self.clock is None else self.clock.source,
            "exposure_s": None if self.clock is None else self.clock.exposure_s,
            "trigger_frame": None if self.clock is None else self.clock.trigger_frame,
            "options": self.options.to_dict(),
            **self.characterisation.result_fields(),
            "warnings": self.warnings,
            "quality": self.quality,
            "quality_reasons": self.quality_reasons,
            "finding_codes": self.finding_codes,
            "layout": None if self.layout is None else self.layout.to_dict(),
            "findings": [f.to_dict() for f in self.findings],
        }
        return json_plain(data)

    def to_json_text(self) -> str:
        """The ``result.json`` text: full precision, never NaN."""
        return json.dumps(self.to_json(), indent=2, allow_nan=False) + "\n"

    @classmethod
    def from_json(cls, data: dict, *, table: pd.DataFrame | None = None) -> "Result":
        """The result held by a ``result.json`` dict (missing keys read as None)."""
        from .characterisation import Characterisation

        if not isinstance(data, dict):
            raise TypeError("a result.json holds one JSON object")
        source = data.get("source") or {}
        layout = data.get("layout")
        options = {k: v for k, v in (data.get("options") or {}).items()
                   if k in AnalysisOptions.__dataclass_fields__}
        if options.get("roi_px") is not None:
            options["roi_px"] = tuple(options["roi_px"])
        return cls(
            source=SourceInfo(path=str(source.get("path", "")), sha256=str(source.get("sha256") or ""),
                              n_frames=source.get("n_frames"), width_px=source.get("width_px"),
                              height_px=source.get("height_px"), bit_depth=source.get("bit_depth")),
            calibration=Calibration(fps_hz=data.get("fps_hz"), pixel_size_m=data.get("pixel_size_m")),
            options=AnalysisOptions(**options),
            characterisation=Characterisation.from_fields(data),
            findings=tuple(_findings_of(data)),
            layout=None if not layout else MeasuredLayout(
                orientation=layout["orientation"], roi_px=tuple(layout["roi_px"]),
                plate_width_px=layout.get("plate_width_px")),
            tool_version=str(data.get("tool_version") or ""),
            clock=None if not data.get("clock_source") else RecordingClock(
                fps_hz=data.get("fps_hz"), source=str(data["clock_source"]),
                exposure_s=data.get("exposure_s"), trigger_frame=data.get("trigger_frame")),
            table=table)


def _without_curves(characterisation: Characterisation) -> Characterisation:
    from dataclasses import replace

    return replace(characterisation, curves=pd.DataFrame())


def _findings_of(data: dict):
    """The findings of a ``result.json``; for one written before they were kept whole, rebuilt from
    the codes and sentences (severity from ``quality_reasons``)."""
    if "findings" in data:
        for f in data["findings"] or []:
            span = f.get("t_range_s")
            yield Finding(Code(f["code"]), Severity(f["severity"]), str(f["message"]),
                          None if span is None else (float(span[0]), float(span[1])))
        return
    reasons = set(data.get("quality_reasons") or [])
    codes = list(data.get("finding_codes") or [])
    warnings = list(data.get("warnings") or [])
    if len(codes) != len(warnings):
        return
    for code, message in zip(codes, warnings):
        try:
            code = Code(code)
        except ValueError:
            continue
        severity = Severity.DOUBTFUL if (message in reasons and code.doubtful != "no") \
            or code.doubtful == "yes" else Severity.NOTE
        yield Finding(code, severity, message)


def read_result(folder) -> Result:
    """The result written into ``folder`` (``result.json``, and ``diameter.csv`` as its table).

    Raises ``OSError`` when the file cannot be read, ``ValueError`` when it is
    not a result.
    """
    folder = Path(folder)
    data = json.loads((folder / "result.json").read_text(encoding="utf-8"))
    table = None
    if (folder / "diameter.csv").is_file():
        table = pd.read_csv(folder / "diameter.csv")
    return Result.from_json(data, table=table)
