"""Photron ``.mraw`` recordings with their ``.cih`` (text) or ``.cihx`` (XML) header.

The data file holds the frames one after another from its first byte, rows
top-down, without gaps or per-frame headers: 8-bit, 16-bit little-endian (the
real bits, EffectiveBit Depth, at the Lower or Higher side of each word) or
12-bit packed MSB-first (2 pixels in 3 bytes). Everything else is in the header
beside it, of the same name (the camera software's public header description;
pyMRAW reads the same keys):

- ``.cih``: ``Key : Value`` lines under ``#Camera Information Header``;
- ``.cihx``: an XML document ``<cih>…</cih>`` (after a short binary prefix in
  the camera software's own files).

=================  ==========================  ===========================================
quantity           ``.cih`` key                ``.cihx`` element (under ``<cih>``)
=================  ==========================  ===========================================
recording rate     Record Rate(fps)            recordInfo/recordRate
exposure           Shutter Type2(nsec),        recordInfo/shutterSpeedNsec,
                   Shutter Speed(s) (``1/N``)  recordInfo/shutterSpeed (1/s)
frames in file     Total Frame                 frameInfo/totalFrame
frames recorded    Original Total Frame        frameInfo/recordedFrame
first frame no.    Start Frame                 frameInfo/startFrame
save step          Save Step                   frameInfo/skipFrame
width, height      Image Width, Image Height   imageDataInfo/resolution/width, height
colour             Color Type                  imageDataInfo/colorInfo/type
stored bits        Color Bit                   imageDataInfo/colorInfo/bit
real bits          EffectiveBit Depth, Side    imageDataInfo/effectiveBit/depth, side
file format        File Format                 imageFileInfo/fileFormat
=================  ==========================  ===========================================
"""

from __future__ import annotations

import logging
import math
import re
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np

from . import FrameSource, UnusableSource
from ._raw import FRAMES_PER_BATCH, MappedFile, batch, packed_size, unpack

log = logging.getLogger(__name__)

HEADER_SUFFIXES = (".cihx", ".cih")
#: A camera header is a few kB; anything far larger is not one.
HEADER_MAX_BYTES = 4 << 20
CIH_MAGIC = "#Camera Information Header"
#: .cih key → .cihx element path, for the fields read.
CIHX_PATHS = {
    "Record Rate(fps)": "recordInfo/recordRate",
    "Shutter Type2(nsec)": "recordInfo/shutterSpeedNsec",
    "Shutter Speed(1/s)": "recordInfo/shutterSpeed",
    "Total Frame": "frameInfo/totalFrame",
    "Original Total Frame": "frameInfo/recordedFrame",
    "Start Frame": "frameInfo/startFrame",
    "Save Step": "frameInfo/skipFrame",
    "Image Width": "imageDataInfo/resolution/width",
    "Image Height": "imageDataInfo/resolution/height",
    "Color Type": "imageDataInfo/colorInfo/type",
    "Color Bit": "imageDataInfo/colorInfo/bit",
    "EffectiveBit Depth": "imageDataInfo/effectiveBit/depth",
    "EffectiveBit Side": "imageDataInfo/effectiveBit/side",
    "File Format": "imageFileInfo/fileFormat",
}
GREY_TYPES = {"mono", "raw"}


def companions(path) -> tuple[Path, Path]:
    """The header and the data file of the MRAW recording that ``path`` names (either one).

    Raises :class:`UnusableSource` when the other one is not beside it.
    """
    p = Path(path)
    if p.suffix.lower() == ".mraw":
        for suffix in HEADER_SUFFIXES:
            for candidate in (p.with_suffix(suffix), p.with_suffix(suffix.upper())):
                if candidate.is_file():
                    return candidate, p
        raise UnusableSource(f"{path}: no .cih or .cihx header of the same name beside it, "
                             f"which gives the frame size and rate.")
    for candidate in (p.with_suffix(".mraw"), p.with_suffix(".MRAW")):
        if candidate.is_file():
            return p, candidate
    raise UnusableSource(f"{path}: its image data {p.with_suffix('.mraw').name} is not beside it.")


def _shown(key: str, value: str) -> str:
    """`` (key 'value')`` for a message, when the value is a plain word fit to quote, else ``""``."""
    return f" ({key} '{value}')" if re.fullmatch(r"[A-Za-z][A-Za-z0-9 _-]{0,23}", value) else ""


class MrawSource(FrameSource):
    """A Photron MRAW recording, memory-mapped and streamed frame by frame.

    ``path`` may name the ``.mraw`` or its header. Beyond the contract:
    ``header_path``, ``data_path``, ``record_rate_hz`` (Record Rate, 1/s),
    ``save_step`` (recorded frames per frame in the file; ``fps`` is
    ``record_rate_hz / save_step``), ``start_frame`` (number of frame 0, the
    trigger being number 0), ``color_bit`` (bits stored per pixel).
    """

    _frames_per_item = FRAMES_PER_BATCH

    def __init__(self, path):
        super().__init__(path)
        self.header_path, self.data_path = companions(path)
        fields = self._read_header()
        self._interpret(fields)
        try:
            self._file = MappedFile(self.data_path)
        except (OSError, ValueError) as exc:
            raise UnusableSource(f"{self.data_path}: the file cannot be read ({type(exc).__name__}).") from None
        size, expected = self._file.size, self.n_frames * self._frame_bytes
        if size > expected:
            self._file.close()
            self._fail(f"its data file holds {size} bytes, more than the {self.n_frames} frames of "
                       f"{self.shape[1]} × {self.shape[0]} pixels at {self.color_bit} bits its header gives")
        if size < self._frame_bytes:
            self._file.close()
            self._fail(f"its data file holds no whole frame of {self.shape[1]} × {self.shape[0]} "
                       f"pixels at {self.color_bit} bits")

    def _fail(self, what):
        raise UnusableSource(f"{self.path}: {what}.")

    def _read_header(self) -> dict[str, str]:
        """The header's fields by their .cih key (values as text)."""
        try:
            with open(self.header_path, "rb") as fh:
                raw = fh.read(HEADER_MAX_BYTES + 1)
        except OSError as exc:
            raise UnusableSource(f"{self.header_path}: the header cannot be read ({type(exc).__name__}).") from None
        if len(raw) > HEADER_MAX_BYTES:
            self._fail(f"its header {self.header_path.name} is far larger than a camera header")
        if self.header_path.suffix.lower() == ".cih":
            return self._cih_fields(raw)
        return self._cihx_fields(raw)

    def _cih_fields(self, raw: bytes) -> dict[str, str]:
        lines = raw.decode("utf-8", errors="replace").splitlines()
        first = next((line for line in lines if line.strip()), "")
        if not first.startswith(CIH_MAGIC):
            self._fail(f"its header {self.header_path.name} does not start with '{CIH_MAGIC}'")
        fields = {}
        for line in lines:
            key, colon, value = line.partition(":")
            if colon and not line.startswith("#"):
                fields.setdefault(key.strip(), value.strip())
        return fields

    def _cihx_fields(self, raw: bytes) -> dict[str, str]:
        start, end = raw.find(b"<cih>"), raw.rfind(b"</cih>")
        if start < 0 or end < start:
            self._fail(f"its header {self.header_path.name} holds no <cih> element")
        try:
            root = ET.fromstring(raw[start:end + len(b"</cih>")])
        except Exception:  # expat's errors for malformed bytes, of several types
            self._fail(f"the XML of its header {self.header_path.name} is not well-formed")
        fields = {}
        for key, element in CIHX_PATHS.items():
            text = root.findtext(element)
            if text is None and element.startswith("imageDataInfo/resolution"):
                text = root.findtext(element.replace("imageDataInfo", "imageFileInfo"))
            if text is not None:
                fields[key] = text.strip()
        return fields

    def _whole(self, fields, key, default=None, minimum=None):
        value = fields.get(key)
        if value is None or value == "":
            if default is None:
                self._fail(f"its header gives no '{key}'")
            return default
        try:
            number = int(value)
        except ValueError:
            self._fail(f"its header field '{key}' is not a whole number")
        if minimum is not None and number < minimum:
            self._fail(f"its header field '{key}' is {number}, below {minimum}")
        return number

    def _interpret(self, fields):
        file_format = fields.get("File Format", "MRaw")
        if file_format.lower() != "mraw":
            self._fail(f"its header does not describe MRaw data{_shown('File Format', file_format)}")
        colour = fields.get("Color Type", "Mono")
        if colour.lower() not in GREY_TYPES:
            self._fail(f"colour MRAW recordings are not supported{_shown('Color Type', colour)}")
        self.color_bit = self._whole(fields, "Color Bit")
        if self.color_bit not in (8, 12, 16):
            self._fail(f"{self.color_bit}-bit MRAW data is not supported (only 8, 12 or 16)")
        self.bit_depth = self._whole(fields, "EffectiveBit Depth", self.color_bit, 1)
        if self.bit_depth > self.color_bit:
            self._fail(f"its header gives {self.bit_depth} real bits in {self.color_bit}-bit pixels")
        side = fields.get("EffectiveBit Side", "Lower").lower()
        if side not in ("lower", "higher"):
            self._fail("its header field 'EffectiveBit Side' is not Lower or Higher")
        self._shift = self.color_bit - self.bit_depth if side == "higher" else 0
        width = self._whole(fields, "Image Width", minimum=1)
        height = self._whole(fields, "Image Height", minimum=1)
        self.shape = (height, width)
        self.dtype = np.dtype(np.uint8 if self.color_bit == 8 else np.uint16)
        self._frame_bytes = packed_size(width * height, self.color_bit)
        if self._frame_bytes is None:
            self._fail(f"{width} × {height} pixels do not fill whole bytes at {self.color_bit} bits")
        self.n_frames = self._whole(fields, "Total Frame", minimum=1)

        self.save_step = self._whole(fields, "Save Step", 1, 1)
        recorded = self._whole(fields, "Original Total Frame", 0, 0)
        if self.save_step > 1 and recorded and (self.n_frames - 1) * self.save_step >= recorded:
            log.warning("%s: save step %d does not fit %d frames saved of %d recorded; taken as 1",
                        self.path, self.save_step, self.n_frames, recorded)
            self.save_step = 1
        self.record_rate_hz = self._positive(fields, "Record Rate(fps)")
        self.fps = self.record_rate_hz / self.save_step if self.record_rate_hz else None
        self.clock = "file" if self.fps else None
        self.exposure_s = self._exposure(fields)
        self.start_frame = self._whole(fields, "Start Frame", 0)
        trigger = -self.start_frame
        self.trigger_frame = (trigger // self.save_step
                              if trigger % self.save_step == 0 and 0 <= trigger // self.save_step < self.n_frames
                              else None)

    def _positive(self, fields, key):
        value = fields.get(key)
        if not value:
            return None
        try:
            number = float(value)
        except ValueError:
            number = math.nan
        if not (math.isfinite(number) and number > 0):
            self._fail(f"its header field '{key}' is not a positive number")
        return number

    def _exposure(self, fields):
        """Exposure in s: the nanosecond field, else the shutter speed (``1/N`` or s; 1/s in .cihx)."""
        nanoseconds = fields.get("Shutter Type2(nsec)", "")
        if nanoseconds.isdigit() and int(nanoseconds) > 0:
            return int(nanoseconds) / 1e9
        per_second = fields.get("Shutter Speed(1/s)")
        text = f"1/{per_second}" if per_second else fields.get("Shutter Speed(s)", "")
        numerator, slash, denominator = text.partition("/")
        try:
            seconds = float(numerator) / float(denominator) if slash else float(numerator)
        except (ValueError, ZeroDivisionError):
            return None
        return seconds if math.isfinite(seconds) and seconds > 0 else None

    def _frames(self):
        """Done futures of lists of up to :data:`FRAMES_PER_BATCH` frames, read (12-bit: unpacked
        straight from the mapping) together."""
        height, width = self.shape
        size = self._frame_bytes
        whole = min(self.n_frames, self._file.size // size)
        self._file.rewind()
        for start in range(0, whole, FRAMES_PER_BATCH):
            count = min(FRAMES_PER_BATCH, whole - start)
            raw = (self._file.rows(start * size, size, count, size) if self.color_bit == 12
                   else self._file.read(start * size, count * size))
            if raw is None:  # the file closed meanwhile
                log.warning("%s: frame %d cut short, stream stops here", self.path, start)
                return
            if self.color_bit == 12:
                pixels = unpack(raw, 12)
            else:
                raw = raw.reshape(count, size)
                pixels = raw if self.color_bit == 8 else raw.view("<u2").astype(np.uint16, copy=False)
            if self._shift:
                pixels = pixels >> self._shift
            self._file.release_before((start + count) * size)
            yield batch(list(pixels.reshape(count, height, width)))
        if whole < self.n_frames:
            log.warning("%s: frame %d cut short, stream stops here", self.path, whole)

    def _hashed_files(self):
        return [self.header_path, self.data_path]

    def close(self):
        if hasattr(self, "_file"):
            self._file.close()
