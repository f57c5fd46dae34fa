"""Writers of the native camera formats, for tests, benchmarks and the demo.

:func:`write_cine` writes a Phantom ``.cine`` (version 1) and
:func:`write_mraw` a Photron ``.mraw`` with its ``.cih`` or ``.cihx`` header,
both following the structures the readers (:mod:`thinning.frames.cine`,
:mod:`thinning.frames.mraw`) cite, frame by frame (constant memory), each file
through :mod:`thinning.atomic`. Output is deterministic: the same frames and
settings give the same bytes.
"""

from __future__ import annotations

import struct
from pathlib import Path
from xml.sax.saxutils import escape

import numpy as np

from .. import atomic
from . import cine as _cine
from ._raw import pack, packed_size

#: Seconds since 1970 of the (fixed) recording date stamped into written files: 2025-01-01 00:00 UTC.
RECORDING_EPOCH_S = 1_735_689_600
#: Setup written: the whole SETUP of software version 702 (its last field, CineName, ends here).
SETUP_BYTES = 7240
SOFTWARE_VERSION = 702


def _checked_frame(frame, index, shape, bit_depth, channels):
    frame = np.asarray(frame)
    if frame.dtype not in (np.uint8, np.uint16):
        raise ValueError(f"frame {index} is {frame.dtype}, not uint8 or uint16")
    expected = shape + ((3,) if channels == 3 else ())
    if frame.shape != expected:
        raise ValueError(f"frame {index} is {frame.shape}, the first was {expected}")
    if frame.size and int(frame.max()) >= 1 << bit_depth:
        raise ValueError(f"frame {index} holds values of {bit_depth} bits or more")
    return frame


def _time64(seconds_fraction_ticks: int) -> int:
    """TIME64 of a time given in 2**-30 s since 1970: the two flag bits set (bit 0: not
    synchronised to IRIG, bit 1: event input open), as cameras without IRIG write them."""
    return (seconds_fraction_ticks << 2) | 3


def write_cine(path, frames, *, fps, bit_depth, packing, exposure_s, trigger_frame=0,
               timestamps_s=None, cfa=0):
    """Write ``frames`` as a Phantom cine file, streamed.

    Parameters
    ----------
    path : str or Path
        The ``.cine`` file (replaced atomically).
    frames : iterable of ndarray
        2-D ``uint8``/``uint16`` grey frames (or, with ``cfa``, raw colour-filter mosaics), or
        3-D (height, width, 3) B, G, R frames of an interpolated colour recording. Sized,
        unless ``timestamps_s`` gives the count.
    fps : int
        Recording rate, frames/s (a whole number: FrameRate is a DWORD).
    bit_depth : int
        Real bits per pixel (RealBPP), 8 to 16; every value must be below ``2**bit_depth``.
    packing : {"unpacked", "packed"}
        ``"unpacked"``: 8-bit in bytes, deeper in 16-bit words (rows bottom-up);
        ``"packed"``: 10- or 12-bit, MSB-first (biCompression 256 or 1024, rows top-down).
    exposure_s : float
        Exposure time, s (ShutterNs, and a per-image exposure block).
    trigger_frame : int
        Index of the trigger frame in the record (FirstImageNo = -trigger_frame).
    timestamps_s : sequence of float, optional
        Time of each frame, s, strictly increasing (default ``i / fps``); stored as TIME64 in
        steps of 2**-30 s.
    cfa : int
        Colour filter array code (0 grey; 3 or 4 Bayer: the frames are raw mosaics, compression 2).
    """
    if fps != int(fps) or fps <= 0:
        raise ValueError(f"fps must be a positive whole number of frames/s, not {fps}")
    if not 0 < exposure_s < 1:
        raise ValueError(f"exposure_s must lie between 0 and 1 s, not {exposure_s}")
    fps = int(fps)
    if timestamps_s is None and not hasattr(frames, "__len__"):
        raise TypeError("frames must be a sized sequence, or timestamps_s give their count")
    count = len(timestamps_s) if timestamps_s is not None else len(frames)
    if count == 0:
        raise ValueError("no frames to write")
    if timestamps_s is None:
        timestamps_s = np.arange(count) / fps
    stamps = np.asarray(timestamps_s, dtype=np.float64)
    if not np.all(np.isfinite(stamps)) or np.any(np.diff(stamps) <= 0) or stamps[0] < 0:
        raise ValueError("timestamps_s must be finite, non-negative and strictly increasing")
    if packing == "packed" and bit_depth not in (10, 12):
        raise ValueError("packed cine frames are 10- or 12-bit")
    if packing not in ("packed", "unpacked") or not 8 <= bit_depth <= 16:
        raise ValueError(f"unsupported packing {packing!r} at {bit_depth} bits")
    stored_bits = bit_depth if packing == "packed" else (8 if bit_depth == 8 else 16)

    frames = iter(frames)
    first = np.asarray(next(frames))
    channels = 3 if first.ndim == 3 else 1
    if channels == 3 and (packing == "packed" or cfa):
        raise ValueError("colour cine frames are written unpacked, without a cfa code")
    height, width = first.shape[:2]
    image_bytes = packed_size(width * height * channels, stored_bits)
    if image_bytes is None:
        raise ValueError(f"{width} × {height} pixels do not fill whole bytes at {stored_bits} bits")

    ticks = np.round(stamps * 2.0 ** 30).astype(np.int64)
    base = RECORDING_EPOCH_S << 30
    times = [_time64(base + int(t)) for t in ticks]
    if 0 <= trigger_frame < count:
        trigger_ticks = int(ticks[trigger_frame])
    else:  # the trigger outside the record: its time extrapolated at the recording rate
        trigger_ticks = int(ticks[0]) + round(trigger_frame * 2.0 ** 30 / fps)
    exposure_fraction = min(round(exposure_s * 2.0 ** 32), 2 ** 32 - 1)

    off_bitmap = _cine.CINEFILEHEADER.size
    off_setup = off_bitmap + _cine.BITMAPINFOHEADER.size
    time_block = _cine.TAGGED_BLOCK.size + 8 * count
    exposure_block = _cine.TAGGED_BLOCK.size + 4 * count
    off_offsets = off_setup + SETUP_BYTES + time_block + exposure_block
    off_images = off_offsets + 8 * count
    per_image = 8 + image_bytes

    header = _cine.CINEFILEHEADER.pack(
        b"CI", _cine.CINEFILEHEADER.size, _cine.CC_UNINT if cfa else _cine.CC_RGB, 1,
        -trigger_frame, count, -trigger_frame, count,
        off_bitmap, off_setup, off_offsets, _time64(base + trigger_ticks))
    bi_compression = {10: _cine.BI_PACKED_10, 12: _cine.BI_PACKED_12}.get(stored_bits, _cine.BI_RGB)
    bit_count = (24 if stored_bits == 8 else 48) if channels == 3 else (8 if stored_bits == 8 else 16)
    bitmap = _cine.BITMAPINFOHEADER.pack(
        _cine.BITMAPINFOHEADER.size, width, height, 1, bit_count, bi_compression, image_bytes,
        0, 0, 0, 1 << bit_depth)  # biClrImportant: the grey levels, as the camera software writes

    setup = bytearray(SETUP_BYTES)
    exposure_ns = round(exposure_s * 1e9)
    exposure_us = round(exposure_s * 1e6)

    def put(spec, value):
        offset, code = spec
        struct.pack_into(code, setup, offset, value)

    put(_cine.SETUP_FRAME_RATE_16, min(fps, 0xFFFF))
    put(_cine.SETUP_SHUTTER_16, min(exposure_us, 0xFFFF))
    put(_cine.SETUP_MARK, b"ST")
    put(_cine.SETUP_LENGTH, SETUP_BYTES)
    put((737, "<H"), min(width, 0xFFFF))            # ImWidth WORD
    put((739, "<H"), min(height, 0xFFFF))           # ImHeight WORD
    put(_cine.SETUP_FRAME_RATE, fps)
    put(_cine.SETUP_SHUTTER, exposure_us)
    put((780, "<I"), max(count - 1 - trigger_frame, 0))  # PostTrigger DWORD, frames after the trigger
    put((788, "<i"), 1 if channels == 3 or cfa else 0)   # bEnableColor BOOL
    put((800, "<I"), SOFTWARE_VERSION)              # SoftwareVersion DWORD
    put(_cine.SETUP_CFA, cfa if channels == 1 else 3)
    put(_cine.SETUP_REAL_BPP, bit_depth)
    put(_cine.SETUP_SHUTTER_NS, exposure_ns)
    put((1588, "<I"), width)                        # ImWidthAcq DWORD
    put((1592, "<I"), height)                       # ImHeightAcq DWORD

    with atomic.replacing(path) as out:
        out.write(header + bitmap + bytes(setup))
        # Reserved = 1 when another block follows, as the camera software writes it
        out.write(_cine.TAGGED_BLOCK.pack(time_block, _cine.TAG_TIME_ONLY, 1))
        out.write(np.asarray(times, dtype="<u8").tobytes())
        out.write(_cine.TAGGED_BLOCK.pack(exposure_block, 1003, 0))  # 1003: exposure per image
        out.write(np.full(count, exposure_fraction, dtype="<u4").tobytes())
        out.write((off_images + per_image * np.arange(count, dtype=np.int64)).astype("<u8").tobytes())
        written = 0
        for index, frame in enumerate(_chain(first, frames)):
            if index >= count:
                raise ValueError(f"more frames than the {count} time stamps")
            frame = _checked_frame(frame, index, (height, width), bit_depth, channels)
            out.write(struct.pack("<II", 8, image_bytes))  # AnnotationSize (no annotation), ImageSize
            if stored_bits in (10, 12):
                out.write(pack(frame, stored_bits))
            else:
                out.write(np.ascontiguousarray(frame[::-1], dtype="<u1" if stored_bits == 8 else "<u2").tobytes())
            written += 1
        if written != count:
            raise ValueError(f"{written} frames for {count} time stamps")


def _chain(first, rest):
    yield first
    yield from rest


def write_mraw(path, frames, *, fps, bit_depth, shutter_s, start_frame=0, header="cih",
               color_bit=None, effective_side="Lower"):
    """Write ``frames`` as a Photron MRAW file with its header beside it, streamed.

    Parameters
    ----------
    path : str or Path
        The ``.mraw`` file (a ``.cih``/``.cihx`` suffix names the same pair); both are replaced
        atomically, the data first.
    frames : iterable of ndarray
        2-D ``uint8``/``uint16`` grey frames, all of one shape.
    fps : float
        Recording rate, frames/s.
    bit_depth : int
        Real bits per pixel (EffectiveBit Depth); every value must be below ``2**bit_depth``.
    shutter_s : float
        Exposure time, s.
    start_frame : int
        Number of the first frame, the trigger being frame 0 (Start Frame).
    header : {"cih", "cihx"}
        Text or XML header.
    color_bit : {8, 12, 16}, optional
        Bits stored per pixel (Color Bit; 12 is packed MSB-first, 2 pixels in 3 bytes); default
        ``bit_depth`` when it is 8, 12 or 16, else 16.
    effective_side : {"Lower", "Higher"}
        Where the real bits sit in a wider stored word (EffectiveBit Side).
    """
    if not (fps > 0 and shutter_s > 0):
        raise ValueError("fps and shutter_s must be positive")
    if header not in ("cih", "cihx"):
        raise ValueError(f"header must be 'cih' or 'cihx', not {header!r}")
    color_bit = color_bit or (bit_depth if bit_depth in (8, 12, 16) else 16)
    if color_bit not in (8, 12, 16) or not 1 <= bit_depth <= color_bit:
        raise ValueError(f"{bit_depth} real bits cannot be stored in {color_bit}")
    if effective_side not in ("Lower", "Higher"):
        raise ValueError(f"effective_side must be 'Lower' or 'Higher', not {effective_side!r}")
    shift = color_bit - bit_depth if effective_side == "Higher" else 0
    stem = Path(path).with_suffix("")
    data_path, header_path = stem.with_suffix(".mraw"), stem.with_suffix(f".{header}")

    shape, count = None, 0
    with atomic.replacing(data_path) as out:
        for index, frame in enumerate(frames):
            frame = np.asarray(frame)
            shape = shape or frame.shape
            if frame.ndim != 2:
                raise ValueError(f"frame {index} is not 2-D")
            frame = _checked_frame(frame, index, shape, bit_depth, 1)
            words = frame.astype(np.uint16) << shift if shift else frame
            if color_bit == 12:
                if frame.size % 2:
                    raise ValueError("12-bit MRAW frames need an even number of pixels")
                out.write(pack(words, 12))
            else:
                out.write(np.ascontiguousarray(words, dtype="<u1" if color_bit == 8 else "<u2").tobytes())
            count += 1
        if count == 0:
            raise ValueError("no frames to write")
    height, width = shape
    fields = dict(rate=f"{fps:.10g}", ns=round(shutter_s * 1e9), per_s=round(1 / shutter_s),
                  frames=count, start=start_frame, width=width, height=height,
                  color_bit=color_bit, depth=bit_depth, side=effective_side)
    text = (_CIH if header == "cih" else _CIHX).format(**{k: escape(str(v)) for k, v in fields.items()})
    atomic.write_text(header_path, text)


#: The keys of a .cih text header the reader uses (``key : value`` lines, as the camera software writes).
_CIH = """#Camera Information Header
Date : 2025/1/1
Time : 00:00
Camera Type : thinning writer
Record Rate(fps) : {rate}
Shutter Speed(s) : 1/{per_s}
Original Total Frame : {frames}
Total Frame : {frames}
Start Frame : {start}
Correct Trigger Frame : 0
Save Step : 1
Image Width : {width}
Image Height : {height}
Color Type : Mono
Color Bit : {color_bit}
File Format : MRaw
EffectiveBit Depth : {depth}
EffectiveBit Side : {side}
Comment Text :
Shutter Type2(nsec) : {ns}
"""

#: A .cihx XML header with the elements the reader uses (shutterSpeed is 1/s, shutterSpeedNsec ns).
_CIHX = """<?xml version="1.0" encoding="utf-8"?>
<cih>
    <fileInfo>
        <version>1.0</version>
        <date>2025/1/1</date>
        <time>00:00:00</time>
    </fileInfo>
    <imageFileInfo>
        <fileFormat>Mraw</fileFormat>
        <resolution>
            <width>{width}</width>
            <height>{height}</height>
        </resolution>
    </imageFileInfo>
    <imageDataInfo>
        <resolution>
            <width>{width}</width>
            <height>{height}</height>
        </resolution>
        <colorInfo>
            <type>Mono</type>
            <bit>{color_bit}</bit>
        </colorInfo>
        <effectiveBit>
            <depth>{depth}</depth>
            <side>{side}</side>
        </effectiveBit>
    </imageDataInfo>
    <frameInfo>
        <recordedFrame>{frames}</recordedFrame>
        <totalFrame>{frames}</totalFrame>
        <startFrame>{start}</startFrame>
        <skipFrame>1</skipFrame>
    </frameInfo>
    <basicInfo>
        <comment></comment>
    </basicInfo>
    <recordInfo>
        <recordRate>{rate}</recordRate>
        <shutterSpeed>{per_s}</shutterSpeed>
        <shutterSpeedNsec>{ns}</shutterSpeedNsec>
    </recordInfo>
    <deviceInfo>
        <deviceName>thinning writer</deviceName>
    </deviceInfo>
</cih>
"""
