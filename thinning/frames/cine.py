"""Phantom ``.cine`` files (Vision Research), read memory-mapped in constant memory.

The layout follows the public description of the format (Vision Research, "Cine
File Format", whose structures are those of the camera SDK's ``cinefile.h``);
FFmpeg's cine demuxer (``libavformat/cinedec.c``) reads the same offsets. All
fields are little-endian, packed at 1-byte alignment::

    0                CINEFILEHEADER (44 bytes)
    OffImageHeader   BITMAPINFOHEADER (40 bytes)
    OffSetup         SETUP (its own Length bytes), then the tagged information blocks
    OffImageOffsets  ImageCount × int64: the position of each image
    each image       AnnotationSize (DWORD), annotation, ImageSize (DWORD), the pixels

Pixels: 8- or 16-bit unpacked (``biCompression`` 0, rows stored bottom-up, as
in a Windows bitmap) or packed MSB-first (256: 10-bit, 4 pixels in 5 bytes;
1024: 12-bit, 2 pixels in 3 bytes; rows stored top-down). Time stamps come from
the tagged block of type 1002 (a TIME64 per image).
"""

from __future__ import annotations

import logging
import struct

import numpy as np

from . import FrameSource, UnusableSource
from ._raw import FRAMES_PER_BATCH, MappedFile, batch, packed_size, unpack

log = logging.getLogger(__name__)

#: CINEFILEHEADER, 44 bytes at offset 0:
#:   0 Type WORD ("CI")            2 Headersize WORD (44)       4 Compression WORD (0 grey or
#:   interpolated colour, 1 JPEG, 2 raw colour-filter mosaic)    6 Version WORD (1: 64-bit offsets)
#:   8 FirstMovieImage LONG       12 TotalImageCount DWORD      16 FirstImageNo LONG (number of the
#:   first image in the file, the trigger being image 0)       20 ImageCount DWORD (images in the file)
#:  24 OffImageHeader DWORD       28 OffSetup DWORD             32 OffImageOffsets DWORD
#:  36 TriggerTime TIME64
CINEFILEHEADER = struct.Struct("<2sHHHiIiIIIIQ")
#: BITMAPINFOHEADER, 40 bytes at OffImageHeader:
#:   0 biSize DWORD (40)   4 biWidth LONG   8 biHeight LONG   12 biPlanes WORD (1)   14 biBitCount WORD
#:  16 biCompression DWORD (0 BI_RGB, 256 10-bit packed, 1024 12-bit packed)   20 biSizeImage DWORD
#:  24 biXPelsPerMeter LONG   28 biYPelsPerMeter LONG   32 biClrUsed DWORD   36 biClrImportant DWORD
BITMAPINFOHEADER = struct.Struct("<IiiHHIIiiII")
#: SETUP fields read, as (offset from OffSetup, struct code); a field lies in the file only when
#: the setup's Length reaches past it (older software wrote shorter setups).
SETUP_FRAME_RATE_16 = (0, "<H")    # FrameRate16 WORD, frames/s (superseded by FrameRate)
SETUP_SHUTTER_16 = (2, "<H")       # Shutter16 WORD, µs (superseded by ShutterNs)
SETUP_MARK = (140, "<2s")          # Mark WORD, "ST"
SETUP_LENGTH = (142, "<H")         # Length WORD, bytes of this setup
SETUP_FRAME_RATE = (768, "<I")     # FrameRate DWORD, frames/s
SETUP_SHUTTER = (772, "<I")        # Shutter DWORD, µs (superseded by ShutterNs)
SETUP_CFA = (808, "<I")            # CFA DWORD, colour filter array code (0 grey)
SETUP_REAL_BPP = (896, "<I")       # RealBPP DWORD, real bits per pixel
SETUP_SHUTTER_NS = (1568, "<I")    # ShutterNs DWORD, exposure in ns
#: Tagged information block: 0 BlockSize DWORD (with this 8-byte head), 4 Type WORD, 6 Reserved
#: WORD (the camera software sets it to 1 when another block follows), 8 data.
TAGGED_BLOCK = struct.Struct("<IHH")
TAG_TIME_ONLY = 1002       # TIME64 per image
#: Annotation block before each image: 0 AnnotationSize DWORD (with both size fields), then the
#: annotation, then ImageSize DWORD at AnnotationSize - 4; the pixels follow at AnnotationSize.
DWORD = struct.Struct("<I")
#: TIME64: fractions DWORD (s × 2**32; the two low bits are synchronisation flags) then seconds
#: DWORD (since 1970); read as one little-endian uint64, seconds in the high half.
TIME64_FLAG_BITS = np.uint64(3)

BI_RGB, BI_PACKED_10, BI_PACKED_12 = 0, 256, 1024
CC_RGB, CC_JPEG, CC_UNINT = 0, 1, 2
#: How the frames of a colour sensor are made grey (the ``colour`` attribute).
COLOUR_LUMA = "luma-bt601"          # interpolated B, G, R: 0.299 R + 0.587 G + 0.114 B
COLOUR_BAYER = "bayer-2x2-mean"     # raw mosaic: mean of each 2 × 2 block, (R + 2 G + B) / 4


class CineSource(FrameSource):
    """A Phantom ``.cine`` recording, memory-mapped and streamed frame by frame.

    Beyond the contract: ``record_rate_hz`` (the camera's FrameRate, 1/s),
    ``save_step`` (recorded frames per frame in the file: the stamps of a
    file saved with a step are that many frame periods apart; ``fps`` is
    ``record_rate_hz / save_step``), ``colour`` (None for a grey sensor, else
    :data:`COLOUR_LUMA` or :data:`COLOUR_BAYER`), ``packing`` (``"8"``,
    ``"16"``, ``"10-packed"``, ``"12-packed"``: bits per stored sample),
    ``first_image_no`` (FirstImageNo: the number of frame 0, the trigger
    being number 0), ``cfa`` (the setup's colour filter array code, 0 grey).
    """

    clock = "file"
    _frames_per_item = FRAMES_PER_BATCH

    def __init__(self, path):
        super().__init__(path)
        try:
            self._file = MappedFile(path)
        except (OSError, ValueError) as exc:
            raise UnusableSource(f"{path}: the file cannot be read ({type(exc).__name__}).") from None
        try:
            self._read_headers()
        except BaseException:
            self._file.close()
            raise

    def _fail(self, what):
        raise UnusableSource(f"{self.path}: {what}.")

    def _struct(self, offset, layout):
        return self._file.unpack_from(layout, offset)

    def _read_headers(self):
        size = self._file.size
        head = self._struct(0, CINEFILEHEADER)
        if head is None:
            self._fail(f"only {size} bytes, too short for a cine file header")
        (mark, head_size, compression, version, _first_movie, _total, first_no, count,
         off_bitmap, off_setup, off_offsets, _trigger_time) = head
        if mark != b"CI":
            self._fail("not a cine file (it does not start with the mark 'CI')")
        if head_size != CINEFILEHEADER.size:
            self._fail(f"the cine file header gives its size as {head_size} bytes, not 44")
        if version != 1:
            self._fail(f"cine file version {version} is not supported (only version 1)")
        if compression == CC_JPEG:
            self._fail("JPEG-compressed cine files are not supported (save the recording uncompressed)")
        if compression not in (CC_RGB, CC_UNINT):
            self._fail(f"unknown cine compression code {compression}")
        if count == 0:
            self._fail("the cine file holds no image")
        self.n_frames = count
        self.first_image_no = first_no

        bitmap = self._struct(off_bitmap, BITMAPINFOHEADER)
        if bitmap is None:
            self._fail("the image header lies past the end of the file")
        bi_size, width, height, planes, bit_count, bi_compression = bitmap[:6]
        if bi_size < BITMAPINFOHEADER.size or planes != 1:
            self._fail("the image header is corrupt")
        if width <= 0 or height <= 0:
            self._fail(f"the image header gives an image of {width} × {height} pixels")
        self._storage(compression, bit_count, bi_compression)
        self.shape = (height, width)
        samples = width * height * (3 if self.colour == COLOUR_LUMA else 1)
        self._image_bytes = packed_size(samples, self._bits)
        if self._image_bytes is None:
            self._fail(f"{width} × {height} pixels do not fill whole bytes at {self._bits} bits")

        self._read_setup(off_setup)
        stamps = self._read_tagged_blocks(off_setup + self._setup_length, off_offsets, count)
        self._read_offsets(off_offsets, count)
        self._clock_from(stamps)
        trigger = -first_no
        self.trigger_frame = (trigger // self.save_step
                              if trigger % self.save_step == 0 and 0 <= trigger // self.save_step < count
                              else None)
        if self._image(0) is None:
            self._fail(f"its first image is missing or is not {self._image_bytes} bytes of "
                       f"{width} × {height} pixels at {self._bits} bits")

    def _storage(self, compression, bit_count, bi_compression):
        """Bits per stored sample, row order and colour handling from the bitmap header."""
        self.colour = COLOUR_BAYER if compression == CC_UNINT else None
        if bi_compression == BI_RGB and bit_count in (8, 16):
            self._bits = bit_count
        elif bi_compression == BI_RGB and bit_count in (24, 48) and compression == CC_RGB:
            self._bits = bit_count // 3
            self.colour = COLOUR_LUMA
        elif bi_compression == BI_PACKED_10:
            self._bits = 10
        elif bi_compression == BI_PACKED_12:
            self._bits = 12
        else:
            self._fail(f"unknown pixel storage ({bit_count} bits per pixel, biCompression {bi_compression})")
        self.packing = f"{self._bits}-packed" if self._bits in (10, 12) else str(self._bits)
        # unpacked images are stored bottom-up as in a Windows bitmap, packed ones top-down
        # (as pims and the published packed readers read them); the setup's bFlipV is a
        # display option and is not applied
        self._bottom_up = self._bits in (8, 16)
        self.dtype = np.dtype(np.uint8 if self._bits == 8 else np.uint16)

    def _read_setup(self, off_setup):
        lead = self._file.read(off_setup, SETUP_LENGTH[0] + 2)
        if lead is None:
            self._fail("the camera setup lies past the end of the file")
        lead = lead.tobytes()
        if struct.unpack_from(SETUP_MARK[1], lead, SETUP_MARK[0])[0] != b"ST":
            self._fail("the camera setup lacks its mark 'ST'")
        length = struct.unpack_from(SETUP_LENGTH[1], lead, SETUP_LENGTH[0])[0]
        setup = self._file.read(off_setup, length)
        if length < len(lead) or setup is None:
            self._fail(f"the camera setup gives its length as {length} bytes, which the file does not hold")
        self._setup_length = length
        setup = setup.tobytes()

        def field(spec):
            offset, code = spec
            end = offset + struct.calcsize(code)
            return struct.unpack_from(code, setup, offset)[0] if end <= length else 0

        self.record_rate_hz = float(field(SETUP_FRAME_RATE) or field(SETUP_FRAME_RATE_16)) or None
        shutter_ns = field(SETUP_SHUTTER_NS)
        shutter_us = field(SETUP_SHUTTER) or field(SETUP_SHUTTER_16)
        self.exposure_s = shutter_ns / 1e9 if shutter_ns else (shutter_us / 1e6 if shutter_us else None)
        real_bpp = field(SETUP_REAL_BPP)
        stored = 8 if self._bits == 8 else (self._bits if self._bits in (10, 12) else 16)
        self.bit_depth = min(real_bpp, stored) if real_bpp > 0 else stored
        self.cfa = field(SETUP_CFA)

    def _read_tagged_blocks(self, start, end, count):
        """The time stamps (ticks of 2**-32 s, flags cleared) of the block of type 1002, or None."""
        stamps = None
        position = start
        end = min(end, self._file.size)
        while position + TAGGED_BLOCK.size <= end:
            block_size, kind, _reserved = self._struct(position, TAGGED_BLOCK)
            if block_size < TAGGED_BLOCK.size or position + block_size > end:
                self._fail("a tagged information block runs past the image offsets")
            if kind == TAG_TIME_ONLY:
                data = block_size - TAGGED_BLOCK.size
                if data != 8 * count:
                    self._fail(f"its time-stamp block holds {data} bytes for {count} images (8 each)")
                raw = self._file.read(position + TAGGED_BLOCK.size, data)
                stamps = raw.view("<u8").astype(np.uint64) & ~TIME64_FLAG_BITS
            position += block_size
        return stamps

    def _read_offsets(self, off_offsets, count):
        available = max(0, min(count, (self._file.size - off_offsets) // 8))
        raw = self._file.read(off_offsets, 8 * available) if available else None
        self._offsets = raw.view("<u8").astype(np.uint64) if raw is not None else np.zeros(0, np.uint64)

    def _clock_from(self, stamps):
        """``fps``, ``save_step`` and ``timestamps_s`` from the FrameRate and the stamps."""
        self.save_step = 1
        self.timestamps_s = None
        if stamps is not None:
            if stamps.size > 1 and not np.all(stamps[1:] > stamps[:-1]):
                self._fail("its time stamps do not increase from frame to frame")
            self.timestamps_s = (stamps - stamps[0]).astype(np.float64) / 2.0 ** 32
            if self.record_rate_hz and stamps.size > 1:
                ratio = float(np.median(np.diff(self.timestamps_s))) * self.record_rate_hz
                step = round(ratio)
                if step >= 2 and abs(ratio - step) <= 0.01 * step:
                    self.save_step = step
        self.fps = self.record_rate_hz / self.save_step if self.record_rate_hz else None
        if self.fps is None:
            self.clock = None

    def _pixels_at(self, index):
        """Position of the pixels of image ``index``, or None when it is missing, cut short or
        inconsistent."""
        if index >= self._offsets.size:
            return None
        position = int(self._offsets[index])
        annotation = self._file.unpack_from(DWORD, position)
        if annotation is None or annotation[0] < 8:
            return None
        image_size = self._file.unpack_from(DWORD, position + annotation[0] - 4)
        if image_size is None or image_size[0] != self._image_bytes:
            return None
        start = position + annotation[0]
        return start if start + self._image_bytes <= self._file.size else None

    def _image(self, index):
        """Frame ``index`` as a 2-D array, or None when it is missing, cut short or inconsistent."""
        position = self._pixels_at(index)
        if position is None:
            return None
        return self._decode(self._file.read(position, self._image_bytes))

    def _decode(self, raw):
        height, width = self.shape
        if self._bits == 8:
            pixels = raw
        elif self._bits == 16:
            pixels = raw.view("<u2")
        else:
            pixels = unpack(raw, self._bits)
        if self.colour == COLOUR_LUMA:
            bgr = pixels.reshape(height, width, 3).astype(np.uint32)
            pixels = (299 * bgr[..., 2] + 587 * bgr[..., 1] + 114 * bgr[..., 0] + 500) // 1000
        pixels = pixels.reshape(height, width)
        if self._bottom_up:
            pixels = pixels[::-1]
        if self.colour == COLOUR_BAYER:
            m = np.pad(pixels.astype(np.uint32), ((0, 1), (0, 1)), mode="edge")
            pixels = (m[:-1, :-1] + m[1:, :-1] + m[:-1, 1:] + m[1:, 1:] + 2) // 4
        return np.ascontiguousarray(pixels, dtype=self.dtype)

    def _frames(self):
        """Done futures of lists of up to :data:`FRAMES_PER_BATCH` frames; packed grey images evenly
        spaced in the file are unpacked together, straight from the mapping."""
        self._file.rewind()
        for start in range(0, self.n_frames, FRAMES_PER_BATCH):
            positions = []
            for index in range(start, min(start + FRAMES_PER_BATCH, self.n_frames)):
                position = self._pixels_at(index)
                if position is None:
                    break
                positions.append(position)
            frames = self._decoded(positions) if positions else []
            if frames:
                self._file.release_before(positions[len(frames) - 1] + self._image_bytes)
                yield batch(frames)
            if start + len(frames) < min(start + FRAMES_PER_BATCH, self.n_frames):
                log.warning("%s: image %d missing or cut short, stream stops here", self.path,
                            start + len(frames))
                return

    def _decoded(self, positions):
        """The frames whose pixels start at ``positions`` (each known to lie in the file), up to
        the first that cannot be read (the file closed meanwhile)."""
        height, width = self.shape
        count = len(positions)
        step = positions[1] - positions[0] if count > 1 else 0
        if (self.colour is None and self._bits in (10, 12)
                and all(b - a == step for a, b in zip(positions, positions[1:]))):
            rows = self._file.rows(positions[0], self._image_bytes, count, step)
            if rows is not None:  # (None: images that overlap in the file)
                return list(unpack(rows, self._bits).reshape(count, height, width))
        frames = []
        for position in positions:
            raw = self._file.read(position, self._image_bytes)
            if raw is None:
                break
            frames.append(self._decode(raw))
        return frames

    def close(self):
        self._file.close()
