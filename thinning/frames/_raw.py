"""Pieces shared by the native camera readers and writers.

A read-only memory map of a recording that hands its pages back to the kernel
as the stream moves on (so resident memory stays flat however long the file),
and the MSB-first bit packings of 10- and 12-bit pixels used by both the
Phantom cine (``biCompression`` 256 and 1024) and the Photron MRAW (12-bit)
formats: the first pixel's most significant bits come first.
"""

from __future__ import annotations

import mmap
import os
import struct
from concurrent.futures import Future

import numpy as np

#: Pages read and then left behind are handed back once this many bytes have accumulated.
RELEASE_BYTES = 8 << 20
#: Frames read and unpacked together (one set of numpy calls, one item of the read-ahead queue):
#: fewer hand-overs of the GIL between the read-ahead thread and the measurement
#: (``benchmarks/native_speed.py``: a few tens of percent faster streamed analysis on 2 cores).
FRAMES_PER_BATCH = 4


def batch(frames: list) -> Future:
    """``frames`` as the done future of a list, the form in which a source's ``_frames()`` hands
    over a batch (see :class:`thinning.frames.FrameSource`)."""
    done = Future()
    done.set_result(frames)
    return done


class MappedFile:
    """A file mapped read-only; :meth:`read` copies a range out, bounds-checked.

    Parameters
    ----------
    path : str or Path
        The file.
    """

    def __init__(self, path):
        self._fh = open(path, "rb")
        self.size = os.fstat(self._fh.fileno()).st_size
        self._mm = mmap.mmap(self._fh.fileno(), 0, access=mmap.ACCESS_READ) if self.size else None
        self._released = 0

    def read(self, offset: int, length: int) -> np.ndarray | None:
        """``length`` bytes at ``offset`` as a fresh ``uint8`` array, or None past the end."""
        mm = self._mm
        if mm is None or offset < 0 or length < 0 or offset + length > self.size:
            return None
        view = np.frombuffer(mm, np.uint8, count=length, offset=offset)
        out = view.copy()
        del view
        return out

    def rows(self, offset: int, length: int, count: int = 1, step: int = 0) -> np.ndarray | None:
        """``count`` ranges of ``length`` bytes, the first at ``offset``, each ``step`` bytes after the
        last, as a read-only ``(count, length)`` ``uint8`` view of the mapping (no copy), or None
        when one lies past the end.

        For bytes that are unpacked into a new array at once (so no view outlives the call): the
        mapping cannot be unmapped while a view of it is alive (:meth:`close` then leaves it to be
        unmapped when the view is gone).
        """
        mm = self._mm
        last = offset + (count - 1) * step
        if (mm is None or offset < 0 or length < 0 or count < 1 or (count > 1 and step < length)
                or last + length > self.size):
            return None
        return np.ndarray((count, length), np.uint8, buffer=mm, offset=offset, strides=(step or length, 1))

    def unpack_from(self, layout: struct.Struct, offset: int) -> tuple | None:
        """The fields of ``layout`` at ``offset``, or None past the end."""
        mm = self._mm
        if mm is None or offset < 0 or offset + layout.size > self.size:
            return None
        return layout.unpack_from(mm, offset)

    def release_before(self, offset: int):
        """Give back to the kernel the mapped pages wholly before ``offset`` (bytes)."""
        if self._mm is None or not hasattr(self._mm, "madvise"):
            return
        end = (offset // mmap.PAGESIZE) * mmap.PAGESIZE
        if end - self._released >= RELEASE_BYTES:
            self._mm.madvise(mmap.MADV_DONTNEED, self._released, end - self._released)
            self._released = end

    def rewind(self):
        """Start releasing from the beginning again (a new pass over the file)."""
        self._released = 0

    def close(self):
        """Unmap and close; idempotent."""
        if self._mm is not None:
            try:
                self._mm.close()
            except BufferError:  # frames being copied or unpacked in another thread: unmapped when done
                pass
            self._mm = None
        self._fh.close()


def unpack(raw: np.ndarray, bits: int) -> np.ndarray:
    """Pixels of an MSB-first packed byte string as ``uint16``.

    Parameters
    ----------
    raw : ndarray of uint8
        Packed bytes: 10-bit (4 pixels in 5 bytes) or 12-bit (2 pixels in 3 bytes), 1-D, or
        N-D with the bytes of each item (e.g. a frame: ``(frames, bytes)``, rows may be strided)
        along the last axis.
    bits : int
        10 or 12.

    Returns
    -------
    ndarray of uint16
        A new C-contiguous array: 1-D, or of ``raw.shape[:-1]`` + (pixels,).
    """
    group, per = (3, 2) if bits == 12 else (5, 4)
    lead = raw.shape[:-1]
    b = raw.reshape(lead + (-1, group))
    # each byte column as a contiguous uint16 array, combined in place (about three times faster
    # than working on the strided columns), then stored interleaved
    c = [b[..., i].astype(np.uint16) for i in range(group - 1)] + [b[..., -1]]
    out = np.empty(b.shape[:-1] + (per,), np.uint16)
    if bits == 12:
        c[0] <<= 4
        c[0] |= c[1] >> 4
        c[1] &= 0x0F
        c[1] <<= 8
        c[1] |= c[2]
        out[..., 0], out[..., 1] = c[0], c[1]
    else:
        for i, (keep, shift) in enumerate(((0xFF, 2), (0x3F, 4), (0x0F, 6), (0x03, 8))):
            c[i] &= keep
            c[i] <<= shift
            c[i] |= c[i + 1] >> (8 - shift)
            out[..., i] = c[i]
    return out.reshape(lead + (-1,))


def pack(pixels: np.ndarray, bits: int) -> bytes:
    """The inverse of :func:`unpack`: ``uint16`` pixels (values below ``2**bits``) packed MSB-first."""
    p = np.ascontiguousarray(pixels, dtype=np.uint16).reshape(-1)
    if bits == 12:
        q = p.reshape(-1, 2)
        out = np.empty((q.shape[0], 3), np.uint8)
        out[:, 0] = q[:, 0] >> 4
        out[:, 1] = ((q[:, 0] & 0x0F) << 4) | (q[:, 1] >> 8)
        out[:, 2] = q[:, 1] & 0xFF
        return out.tobytes()
    q = p.reshape(-1, 4)
    out = np.empty((q.shape[0], 5), np.uint8)
    out[:, 0] = q[:, 0] >> 2
    out[:, 1] = ((q[:, 0] & 0x03) << 6) | (q[:, 1] >> 4)
    out[:, 2] = ((q[:, 1] & 0x0F) << 4) | (q[:, 2] >> 6)
    out[:, 3] = ((q[:, 2] & 0x3F) << 2) | (q[:, 3] >> 8)
    out[:, 4] = q[:, 3] & 0xFF
    return out.tobytes()


def packed_size(n_pixels: int, bits: int) -> int | None:
    """Bytes of ``n_pixels`` at ``bits`` per pixel, or None when they do not fill whole bytes
    (10-bit packing needs a multiple of 4 pixels, 12-bit of 2)."""
    total = n_pixels * bits
    return total // 8 if total % 8 == 0 else None
