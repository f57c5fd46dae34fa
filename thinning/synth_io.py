"""Files of synthetic recordings: container writers and the truth record, shared by both renderers.

A renderer (:mod:`thinning.synth`, :mod:`thinning.raysynth`) yields frames and a
:class:`Truth`; :func:`write_frames` puts the frames into one of :data:`FORMATS`
and :func:`write_truth` the truth beside them (:func:`truth_path`).

Containers never carry the true frame rate (AVI/MKV/MP4 get a playback rate,
25/s by default, as high-speed cameras do); MJPG AVIs are written by a small
writer of our own, because OpenCV's ignores the JPEG quality.
"""

from __future__ import annotations

import dataclasses
import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .values import json_plain

__all__ = ["FORMATS", "Truth", "truth_path", "write_truth", "load_truth", "check_format",
           "write_frames"]

FORMATS = ("avi-raw", "avi-mjpg", "mkv-ffv1", "mp4-ffv1", "tiff", "png-folder")


# --- the truth record ----------------------------------------------------------------------

@dataclass(frozen=True)
class Truth:
    """What was drawn, per frame and for the whole record.

    Per-frame arrays: ``frame``, ``time_s`` (frame / fps), ``diameter_m`` (true
    minimum neck diameter perpendicular to the axis; NaN where there is no
    thread: after breakup, or before a drop touched the substrate),
    ``diameter_px``, ``neck_position_px`` (image coordinate of the neck along
    the axis direction: y for vertical, x for horizontal recordings),
    ``neck_cross_px`` (the other image coordinate), ``axis_angle_deg``
    (cross-axis displacement per unit axial displacement, as an angle),
    ``upper_end_px`` / ``lower_end_px`` (axial image coordinate of the upper
    plate face or nozzle tip and of the lower plate face or substrate, on the
    axis; left and right ends of a horizontal recording) and ``phase`` ("rest", "stretch", "free", "broken", "pendant").
    """

    frame: np.ndarray
    time_s: np.ndarray
    diameter_m: np.ndarray
    diameter_px: np.ndarray
    neck_position_px: np.ndarray
    neck_cross_px: np.ndarray
    axis_angle_deg: np.ndarray
    upper_end_px: np.ndarray
    lower_end_px: np.ndarray
    phase: np.ndarray
    fps_hz: float
    pixel_size_m: float
    plate_diameter_m: float
    initial_diameter_m: float
    free_thinning_start_s: float
    breakup_time_s: float | None
    relaxation_time_s: float | None
    fluid: dict
    geometry: str
    orientation: str
    frame_shape: tuple[int, int]
    bit_depth: int
    dtype: str
    optics: dict
    scene: dict
    seed: int

    @property
    def n_frames(self) -> int:
        """Number of frames in the record."""
        return int(self.frame.size)

    def to_dict(self) -> dict:
        """Plain JSON-ready dict (NaN → None)."""
        out = {"schema": "thinning.synth-truth/1"}
        for f in dataclasses.fields(self):
            out[f.name] = json_plain(getattr(self, f.name))
        out["n_frames"] = self.n_frames
        return out


# --- writers -------------------------------------------------------------------------------

def truth_path(path) -> Path:
    """Where a renderer's ``write_recording`` puts the truth of a recording written to ``path``."""
    path = Path(path)
    if path.is_dir():
        return path / "truth.json"
    return path.with_name(path.name + ".truth.json")


def write_truth(truth: Truth, path) -> None:
    """Write ``truth.to_dict()`` as JSON (no NaN) to ``path``."""
    text = json.dumps(truth.to_dict(), allow_nan=False, separators=(",", ":"))
    Path(path).write_text(text + "\n")


def load_truth(path) -> dict:
    """Read the truth JSON of a recording (for tests and notebooks; the analyser never does)."""
    return json.loads(truth_path(path).read_text())


def _video_writer(path: Path, fourcc: str, shape, bit_depth: int, playback_fps: float):
    import cv2

    height, width = shape
    params = [cv2.VIDEOWRITER_PROP_IS_COLOR, 0]
    if bit_depth > 8:
        params += [cv2.VIDEOWRITER_PROP_DEPTH, cv2.CV_16U]
    code = 0 if fourcc == "raw" else cv2.VideoWriter_fourcc(*fourcc)
    writer = cv2.VideoWriter(str(path), cv2.CAP_FFMPEG, code, float(playback_fps), (width, height), params)
    if not writer.isOpened():
        raise RuntimeError(f"OpenCV could not open a {fourcc} writer for {path}")
    return writer


class _MjpegAvi:
    """Minimal streaming AVI 1.0 writer of grey JPEG frames (OpenCV's writer ignores quality).

    Layout: RIFF 'AVI ' { LIST hdrl { avih, LIST strl { strh, strf } }, LIST movi { 00dc … },
    idx1 }; sizes and counts are patched on close. The index (16 bytes a frame) is the only
    thing that grows with the record.
    """

    LIMIT_BYTES = 1 << 30   # AVI 1.0 readers are safe below 1 GiB

    def __init__(self, path: Path, shape, playback_fps: float, quality: int):
        import struct

        self.struct = struct
        self.height, self.width = shape
        self.fps = float(playback_fps)
        self.quality = int(quality)
        self.index = bytearray()
        self.n = 0
        self.largest = 0
        self.fh = open(path, "wb")
        self.fh.write(self._header())
        self.movi_start = self.fh.tell() - 4          # offset of the 'movi' fourcc

    def _header(self, n_frames=0, largest=0, riff_size=0, movi_size=0) -> bytes:
        pack = self.struct.pack
        w, h = self.width, self.height
        rate_num, rate_den = _rational(self.fps)
        avih = pack("<10I4I", int(round(1e6 / self.fps)), 0, 0, 0x10, n_frames, 0, 1, largest,
                    w, h, 0, 0, 0, 0)
        strh = pack("<4s4sIHHIIIIIIII4h", b"vids", b"MJPG", 0, 0, 0, 0, rate_den, rate_num, 0,
                    n_frames, largest, 0xFFFFFFFF, 0, 0, 0, w, h)
        strf = pack("<IiiHH4sIiiII", 40, w, h, 1, 24, b"MJPG", w * h * 3, 0, 0, 0, 0)
        strl = b"strl" + _chunk(b"strh", strh) + _chunk(b"strf", strf)
        hdrl = b"hdrl" + _chunk(b"avih", avih) + _chunk(b"LIST", strl)
        return (b"RIFF" + pack("<I", riff_size) + b"AVI " + _chunk(b"LIST", hdrl)
                + b"LIST" + pack("<I", movi_size) + b"movi")

    def write(self, frame: np.ndarray) -> None:
        import cv2

        ok, jpeg = cv2.imencode(".jpg", frame, [cv2.IMWRITE_JPEG_QUALITY, self.quality])
        if not ok:
            raise RuntimeError("JPEG encoding failed")
        data = jpeg.tobytes()
        offset = self.fh.tell() - self.movi_start
        self.fh.write(_chunk(b"00dc", data))
        if self.fh.tell() > self.LIMIT_BYTES:
            raise ValueError("MJPG AVI beyond 1 GiB: write fewer frames or lower the quality")
        self.index += self.struct.pack("<4sIII", b"00dc", 0x10, offset, len(data))
        self.n += 1
        self.largest = max(self.largest, len(data))

    def close(self) -> None:
        if self.fh.closed:
            return
        movi_end = self.fh.tell()
        self.fh.write(_chunk(b"idx1", bytes(self.index)))
        riff_size = self.fh.tell() - 8
        movi_size = movi_end - self.movi_start
        self.fh.seek(0)
        self.fh.write(self._header(self.n, self.largest, riff_size, movi_size))
        self.fh.close()


def _chunk(fourcc: bytes, data: bytes) -> bytes:
    import struct

    pad = b"\0" if len(data) % 2 else b""
    return fourcc + struct.pack("<I", len(data)) + data + pad


def _rational(rate: float) -> tuple[int, int]:
    from fractions import Fraction

    f = Fraction(rate).limit_denominator(1000)
    return f.numerator, f.denominator


def check_format(fmt: str, bit_depth: int, playback_fps: float) -> None:
    """Raise ValueError when ``fmt`` cannot hold ``bit_depth``-bit frames at ``playback_fps`` (1/s)."""
    if fmt not in FORMATS:
        raise ValueError(f"fmt must be one of {FORMATS}, not {fmt!r}")
    if fmt in ("avi-raw", "avi-mjpg") and bit_depth != 8:
        raise ValueError(f"{fmt} holds 8-bit frames only; use mkv-ffv1, tiff or png-folder")
    if fmt.startswith("avi") and playback_fps > 60:
        raise ValueError("AVI containers drop frames at high rates: keep playback_fps <= 60")


def write_frames(frames, path, *, fmt: str, n_frames: int, frame_shape, bit_depth: int,
                 quality: int = 90, playback_fps: float = 25.0) -> None:
    """Write ``n_frames`` 2-D frames (an iterable, consumed once, constant memory) to ``path``.

    ``fmt``: ``"avi-raw"`` (uncompressed 8-bit grey), ``"avi-mjpg"`` (lossy,
    JPEG ``quality`` 0–100, 8-bit), ``"mkv-ffv1"`` / ``"mp4-ffv1"`` (lossless,
    8 or 16-bit), ``"tiff"`` (one multi-page stack), ``"png-folder"``
    (``frame_0001.png`` …, 1-based, in a folder created at ``path``).
    ``frame_shape`` is (height, width) in px; ``bit_depth`` 8, 12 or 16 (12
    and 16 stored as uint16). Video containers carry ``playback_fps`` (≤ 60/s),
    never the true frame rate.
    """
    check_format(fmt, bit_depth, playback_fps)
    path = Path(path)
    if fmt == "png-folder":
        _write_png_folder(frames, path, n_frames)
        return
    path.parent.mkdir(parents=True, exist_ok=True)
    if fmt == "tiff":
        import tifffile

        dtype = np.uint8 if bit_depth == 8 else np.uint16
        tifffile.imwrite(path, data=frames, shape=(n_frames, *frame_shape), dtype=dtype,
                         photometric="minisblack")
    elif fmt == "avi-mjpg":
        writer = _MjpegAvi(path, frame_shape, playback_fps, quality)
        try:
            for frame in frames:
                writer.write(frame)
        finally:
            writer.close()
    else:
        fourcc = {"avi-raw": "raw", "mkv-ffv1": "FFV1", "mp4-ffv1": "FFV1"}[fmt]
        writer = _video_writer(path, fourcc, frame_shape, bit_depth, playback_fps)
        try:
            for frame in frames:
                writer.write(frame)
        finally:
            writer.release()


def _write_png_folder(frames, folder: Path, n_frames: int) -> None:
    import cv2

    folder.mkdir(parents=True, exist_ok=True)
    for stale in folder.glob("frame_*.png"):    # a shorter rewrite must not keep old frames
        stale.unlink()
    width = max(4, len(str(n_frames)))
    for i, frame in enumerate(frames, start=1):
        name = folder / f"frame_{i:0{width}d}.png"
        if not cv2.imwrite(str(name), frame):
            raise RuntimeError(f"could not write {name}")
