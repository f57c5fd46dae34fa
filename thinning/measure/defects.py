"""Defective sensor pixels (stuck, hot or dead) found in the frames and repaired before measuring.

A defective pixel is a single pixel that departs from all eight of its neighbours while they
agree among themselves: no liquid, plate or blur makes such a spot (a thread is at least one
pixel wide and extends along its axis, so its pixels have dark neighbours). A dark one in the
background can be taken for a thread; one inside the shadow breaks a row's dark run. They are
looked for in the first frame and then every :data:`CHECK_EVERY` frames (a defect under the
shadow shows once the thread has thinned away from it), and every frame has them replaced by the
median of their eight neighbours (common practice in camera defect correction).
"""

from __future__ import annotations

import cv2
import numpy as np

#: A pixel is defective when it departs from the median of its 3×3 neighbourhood by more than
#: DEFECT_LEVEL of the frame's contrast (and 8 noise widths) while its eight neighbours spread
#: over less than NEIGHBOUR_SPREAD of that contrast (and 6 noise widths).
DEFECT_LEVEL = 0.25
NEIGHBOUR_SPREAD = 0.1
#: Frames between two searches for new defects.
CHECK_EVERY = 64
#: More defects than this fraction of the pixels is no sensor defect (a texture, a noisy frame):
#: nothing is repaired then.
MAX_FRACTION = 1e-3

_RING = np.ones((3, 3), np.uint8)
_RING[1, 1] = 0
_OFFSETS = [(dy, dx) for dy in (-1, 0, 1) for dx in (-1, 0, 1) if dy or dx]


def find_defects(frame) -> np.ndarray:
    """``(row, column)`` of the defective pixels of one 2-D frame, as an ``(n, 2)`` int array."""
    frame = np.asarray(frame)
    if frame.ndim != 2 or min(frame.shape) < 3:
        return np.empty((0, 2), np.int64)
    work = frame if frame.dtype in (np.uint8, np.uint16) else frame.astype(np.float32)
    if work.dtype == np.float32 or not work.flags.c_contiguous:
        work = np.ascontiguousarray(work)
    median = cv2.medianBlur(work, 3)
    high = cv2.dilate(work, _RING)
    low = cv2.erode(work, _RING)
    sample = work[::4, ::4].astype(np.float32)
    contrast = float(np.percentile(sample, 98) - np.percentile(sample, 0.5))
    noise = 1.4826 * float(np.median(np.abs(work[::2, ::2].astype(np.float32)
                                            - median[::2, ::2].astype(np.float32))))
    # only a pixel outside its ring's range can be a defect: the other tests on those alone
    outside = (work > high) | (work < low)
    outside[0, :] = outside[-1, :] = outside[:, 0] = outside[:, -1] = False  # (borders: no full ring)
    r, c = np.nonzero(outside)
    departure = work[r, c].astype(np.float32) - median[r, c].astype(np.float32)
    spread = high[r, c].astype(np.float32) - low[r, c].astype(np.float32)
    bad = ((np.abs(departure) > max(DEFECT_LEVEL * contrast, 8.0 * noise))
           & (spread <= max(NEIGHBOUR_SPREAD * contrast, 6.0 * noise)))
    found = np.stack([r[bad], c[bad]], axis=1).astype(np.int64)
    return found if found.shape[0] <= MAX_FRACTION * frame.size else np.empty((0, 2), np.int64)


class DefectivePixels:
    """The defects seen so far in a recording, and their repair (see the module's note)."""

    def __init__(self):
        self.pixels = np.empty((0, 2), np.int64)

    def update(self, frame) -> None:
        """Add the defects found in ``frame`` to those known."""
        found = find_defects(frame)
        if found.size:
            self.pixels = np.unique(np.concatenate([self.pixels, found]), axis=0)

    def repair(self, frame):
        """``frame`` with every known defect replaced by its neighbours' median (a copy when any)."""
        if not self.pixels.size:
            return frame
        out = np.array(frame, copy=True)
        r, c = self.pixels[:, 0], self.pixels[:, 1]
        ring = np.stack([out[r + dy, c + dx] for dy, dx in _OFFSETS], axis=1)
        value = np.median(ring, axis=1)
        out[r, c] = (np.rint(value) if np.issubdtype(out.dtype, np.integer) else value).astype(out.dtype)
        return out

    def __len__(self) -> int:
        return int(self.pixels.shape[0])
