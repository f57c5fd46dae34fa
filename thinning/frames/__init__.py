"""Frame sources: any recording opened as a stream of grey frames in constant memory.

One class per backend (video file through OpenCV's FFmpeg backend, multi-page
TIFF through tifffile, a folder of images in natural order, and the native
camera files: Phantom ``.cine`` in :mod:`.cine`, Photron ``.mraw`` with its
``.cih``/``.cihx`` header in :mod:`.mraw`), one small
contract (:class:`FrameSource`), and :func:`open_source`, which picks the
backend by what the path is. Frames are 2-D ``uint8`` or ``uint16`` arrays,
yielded in order; random access is not offered because some containers
cannot seek exactly.

To add a backend: subclass :class:`FrameSource`, implement ``_frames()`` and
the metadata, and add it to :func:`open_source` (see DEVELOPERS.md).
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import os
import queue
import re
import threading
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path

import numpy as np

from ..errors import ThinningError

log = logging.getLogger(__name__)

# FFmpeg's own log lines (a corrupt file's complaints) would reach the user's terminal before our
# one-sentence refusal: quiet (AV_LOG_QUIET) unless the user asked for them; OpenCV reads this
# when it first opens a video
os.environ.setdefault("OPENCV_FFMPEG_LOGLEVEL", "-8")

VIDEO_SUFFIXES = {".avi", ".mp4", ".mov", ".mkv", ".m4v", ".wmv", ".mpg", ".mpeg", ".webm", ".ogv"}
TIFF_SUFFIXES = {".tif", ".tiff"}
IMAGE_SUFFIXES = {".png", ".tif", ".tiff", ".bmp", ".jpg", ".jpeg", ".pgm", ".ppm"}
CINE_SUFFIXES = {".cine"}
MRAW_SUFFIXES = {".mraw", ".cih", ".cihx"}
#: Frames read ahead of the consumer (decoded in a background thread meanwhile): at most this
#: many bytes, and at most this many items of ``_frames()`` (single frames, or decoded batches).
READ_AHEAD_BYTES = 16 << 20
READ_AHEAD_ITEMS = 32
#: Compressed frames decoded together by one task of the decoding pool.
DECODE_BATCH = 8


class UnusableSource(ThinningError, ValueError):
    """The path cannot be read as a recording (message: one sentence for the user)."""


def natural_key(name: str):
    """Sort key putting ``frame_2`` before ``frame_10``."""
    return [int(tok) if tok.isdigit() else tok.lower() for tok in re.split(r"(\d+)", name)]


def _to_grey(image: np.ndarray) -> np.ndarray:
    if image.ndim == 3:
        import cv2

        if image.shape[2] == 4:
            image = image[:, :, :3]
        if image.shape[2] == 1:
            return image[:, :, 0]
        return cv2.cvtColor(image, cv2.COLOR_BGR2GRAY)
    return image


def sha256_of_files(paths, *, chunk=1 << 20) -> str:
    """sha256 of the files' bytes concatenated in the given order (hex)."""
    digest = hashlib.sha256()
    for path in paths:
        with open(path, "rb") as fh:
            while block := fh.read(chunk):
                digest.update(block)
    return digest.hexdigest()


def _quiet_opencv(cv2):
    """Keep OpenCV's own log lines (pixel-format notes) off the user's terminal."""
    try:
        cv2.utils.logging.setLogLevel(cv2.utils.logging.LOG_LEVEL_ERROR)
    except AttributeError:
        cv2.setLogLevel(2)


def read_ahead(items, depth):
    """Yield the items of the iterator ``items``, advanced in a background thread.

    At most ``depth`` items wait, so memory stays bounded while the consumer
    works on earlier ones; the decoders release the GIL, so reading overlaps
    the measurement. An exception from ``items`` is raised in the consumer.
    Closing this generator stops the thread and closes ``items``.
    """
    waiting = queue.Queue()
    slots = threading.Semaphore(depth)
    stop = threading.Event()
    end = object()

    def produce():
        try:
            while True:
                while not slots.acquire(timeout=0.05):
                    if stop.is_set():
                        return
                if stop.is_set():
                    return
                item = next(items, end)
                waiting.put(item)
                if item is end:
                    return
        except BaseException as exc:  # handed to the consumer
            waiting.put(_Raised(exc))
        finally:
            items.close()

    reader = threading.Thread(target=produce, name="thinning-read-ahead", daemon=True)
    reader.start()
    try:
        while True:
            item = waiting.get()
            if item is end:
                return
            if isinstance(item, _Raised):
                raise item.exc
            slots.release()
            yield item
    finally:
        stop.set()
        reader.join()


class _Raised:
    def __init__(self, exc):
        self.exc = exc


def _resolved(items):
    """The frames of ``items`` (frames, or futures of lists of them) in order, up to a None."""
    for item in items:
        for frame in item.result() if isinstance(item, Future) else (item,):
            if frame is None:  # a frame that does not decode: the stream ends here
                return
            yield frame


class FrameSource:
    """A recording as an ordered stream of grey frames.

    Attributes: ``path`` (as given), ``n_frames`` (expected count, from the
    container; the count actually read is ``frames_read`` after iteration),
    ``fps`` (container rate in 1/s, or None: for high-speed cameras usually a
    playback rate), ``shape`` (height, width), ``dtype``, ``bit_depth``.
    After iterating, ``broken_off`` is True when the stream ended before the
    container said it would.

    What the recording says of its clock (None where it says nothing):
    ``timestamps_s`` (per-frame times in s relative to frame 0, a float
    array of ``n_frames``), ``exposure_s`` (exposure time, s),
    ``trigger_frame`` (index of the trigger frame within the record) and
    ``clock`` (``"file"`` when ``fps`` comes from a native camera header,
    ``"container"`` when from a video container, None without a rate).
    ``left_out``: names of files beside the frames that were not read as
    frames (an image folder's other files), sorted. ``colour``: how a
    native file's colour frames were made grey (``"luma-bt601"`` or
    ``"bayer-2x2-mean"``, :mod:`.cine`), None for grey frames.
    """

    path: str
    n_frames: int
    fps: float | None
    shape: tuple[int, int]
    dtype: np.dtype
    bit_depth: int
    timestamps_s: np.ndarray | None = None
    exposure_s: float | None = None
    trigger_frame: int | None = None
    clock: str | None = None
    left_out: tuple[str, ...] = ()
    colour: str | None = None
    #: Frames in one item of ``_frames()`` (a batch decoded by one task), for the read-ahead depth.
    _frames_per_item = 1

    def __init__(self, path):
        self.path = str(path)
        self.frames_read = 0
        self.broken_off = False
        self._sha256 = None

    def __iter__(self):
        """The frames in order, read and decoded ahead in a background thread."""
        self.frames_read = 0
        self.broken_off = False
        frame_bytes = self.shape[0] * self.shape[1] * np.dtype(self.dtype).itemsize
        per_item = frame_bytes * self._frames_per_item
        depth = int(np.clip(READ_AHEAD_BYTES // max(per_item, 1), 2, READ_AHEAD_ITEMS))
        with contextlib.closing(read_ahead(self._frames(), depth)) as items:
            for frame in _resolved(items):
                self.frames_read += 1
                yield frame
        if self.frames_read < self.n_frames:
            self.broken_off = True

    def __len__(self):
        return self.n_frames

    def _frames(self):
        """Generator of the frames in order: 2-D arrays, or futures of lists of them (None for a
        frame that does not decode, which ends the stream)."""
        raise NotImplementedError

    def _hashed_files(self):
        return [self.path]

    @property
    def sha256(self) -> str:
        """sha256 of the file (or of the frame files concatenated in natural order)."""
        if self._sha256 is None:
            self._sha256 = sha256_of_files(self._hashed_files())
        return self._sha256

    def close(self):
        """Release the file; idempotent."""

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class VideoSource(FrameSource):
    """A video file read through OpenCV's FFmpeg backend, grey frames without colour conversion.

    MJPG files are read as compressed packets and decoded in a small thread
    pool (OpenCV releases the GIL), :data:`DECODE_BATCH` packets per task,
    the fastest route measured on this kind of machine
    (``benchmarks/speed.py``).
    """

    def __init__(self, path, *, decode_threads=None):
        super().__init__(path)
        import cv2

        _quiet_opencv(cv2)
        self._cv2 = cv2
        # one thread more than the cores: the cores stay busy while the consumer waits for a frame
        self._threads = decode_threads or min(os.cpu_count() or 2, 7) + 1
        cap = self._open()
        ok, first = cap.read()
        if not ok or first is None:
            cap.release()
            raise UnusableSource(f"{path}: no frame could be decoded from this video.")
        first = _to_grey(first)
        self.shape = first.shape[:2]
        self.dtype = first.dtype
        self.bit_depth = 16 if first.dtype == np.uint16 else 8
        count = int(cap.get(cv2.CAP_PROP_FRAME_COUNT) or 0)
        self.n_frames = max(count, 1)
        rate = float(cap.get(cv2.CAP_PROP_FPS) or 0.0)
        self.fps = rate if rate > 0 and np.isfinite(rate) else None
        self.clock = "container" if self.fps else None
        fourcc = int(cap.get(cv2.CAP_PROP_FOURCC) or 0)
        self.codec = "".join(chr((fourcc >> (8 * i)) & 0xFF) for i in range(4)).strip("\x00 ")
        if self.codec.upper() == "MJPG":
            self._frames_per_item = DECODE_BATCH
        cap.release()

    def _open(self, *, packets=False):
        cv2 = self._cv2
        if packets:
            cap = cv2.VideoCapture(self.path, cv2.CAP_FFMPEG)
            cap.set(cv2.CAP_PROP_FORMAT, -1)
        else:
            cap = cv2.VideoCapture(self.path, cv2.CAP_FFMPEG, [cv2.CAP_PROP_CONVERT_RGB, 0])
        if not cap.isOpened():
            cap.release()
            raise UnusableSource(f"{self.path}: not a video OpenCV can open.")
        return cap

    def _frames(self):
        if self.codec.upper() == "MJPG":
            yield from self._mjpg_frames()
            return
        cap = self._open()
        try:
            while True:
                ok, frame = cap.read()
                if not ok or frame is None:
                    break
                yield _to_grey(frame)
        finally:
            cap.release()

    def _mjpg_frames(self):
        """Futures of the frames, a few at a time: compressed packets decoded in a thread pool."""
        cv2 = self._cv2
        cap = self._open(packets=True)

        shape = tuple(self.shape)

        def one(packet):
            try:
                frame = cv2.imdecode(packet, cv2.IMREAD_GRAYSCALE)
            except cv2.error:  # a corrupt packet (e.g. claiming more pixels than OpenCV allows)
                return None
            return frame if frame is not None and frame.shape == shape else None

        def decode(packets):
            return [one(packet) for packet in packets]

        try:
            with ThreadPoolExecutor(max_workers=self._threads) as pool:
                packets = []
                while True:
                    ok, packet = cap.read()
                    if ok and packet is not None:
                        packets.append(packet.reshape(-1).copy())
                    if packets and (len(packets) == DECODE_BATCH or not ok or packet is None):
                        yield pool.submit(decode, packets)
                        packets = []
                    if not ok or packet is None:
                        break
        finally:
            cap.release()


class TiffSource(FrameSource):
    """A multi-page TIFF (8- or 16-bit), streamed page by page."""

    def __init__(self, path):
        super().__init__(path)
        import tifffile

        try:
            self._tif = tifffile.TiffFile(self.path)
            pages = self._tif.pages
            pages.cache = False
            pages.useframes = True
            first = pages.first.asarray()
        except Exception as exc:
            raise UnusableSource(f"{path}: not a readable TIFF ({type(exc).__name__}).") from None
        if first.ndim not in (2, 3) or min(first.shape[:2]) < 2:
            raise UnusableSource(f"{path}: its first page is not an image (shape {first.shape}).")
        self._planes_per_page = first.shape[0] if first.ndim == 3 and first.shape[-1] > 4 else 1
        try:
            plane = first[0] if self._planes_per_page > 1 else _to_grey(first)
        except Exception:  # OpenCV refuses e.g. two-channel pages
            raise UnusableSource(f"{path}: its pages are not grey or colour images "
                                 f"(shape {first.shape}).") from None
        if plane.ndim != 2 or plane.dtype not in (np.uint8, np.uint16):
            raise UnusableSource(f"{path}: not an 8- or 16-bit grey or colour image stack "
                                 f"(pages of {plane.dtype} {plane.shape}).")
        self.shape = plane.shape[:2]
        self.dtype = plane.dtype
        self.bit_depth = int(pages.first.bitspersample)
        self.n_frames = len(pages) * self._planes_per_page
        self.fps = None

    def _frames(self):
        pages = iter(self._tif.pages)
        while True:
            try:  # tifffile can fail on a page itself (a page unlike the first: "incompatible keyframe")
                page = next(pages)
                data = page.asarray()
            except StopIteration:
                return
            except Exception:
                log.warning("%s: page unreadable or unlike the first, stream stops here", self.path)
                return
            planes = data if self._planes_per_page > 1 else (_to_grey(data),)
            for plane in planes:
                if plane.shape[:2] != self.shape:
                    log.warning("%s: a page of another size, stream stops here", self.path)
                    return
                yield plane

    def close(self):
        self._tif.close()


class ImageFolderSource(FrameSource):
    """A folder of image files in natural sort order (``.json`` files are never frames)."""

    def __init__(self, path):
        super().__init__(path)
        folder = Path(path)
        entries = [p for p in folder.iterdir() if p.is_file() and not p.name.startswith(".")]
        files = [p for p in entries if p.suffix.lower() in IMAGE_SUFFIXES]
        recordings = [p for p in entries if p.suffix.lower() in VIDEO_SUFFIXES | CINE_SUFFIXES
                      | MRAW_SUFFIXES]
        if not files:
            hint = (f"; it holds {len(recordings)} video or camera file(s): analyse each one, or list "
                    "them in a manifest for 'thinning batch'") if recordings else ""
            raise UnusableSource(f"{path}: the folder holds no image files (PNG, TIFF, BMP, JPEG)"
                                 f"{hint}.")
        ignored = [p for p in entries if p not in files and p.suffix.lower() != ".json"]
        self.left_out = tuple(sorted(p.name for p in ignored))
        for file in files:
            require_text_path(file, "image file")
        self._files = sorted(files, key=lambda p: natural_key(p.name))
        first = self._read(self._files[0])
        if first is None:
            raise UnusableSource(f"{self._files[0]}: not a readable image.")
        self.shape = first.shape[:2]
        self.dtype = first.dtype
        self.bit_depth = 16 if first.dtype == np.uint16 else 8
        self.n_frames = len(self._files)
        self.fps = None

    @staticmethod
    def _read(file):
        import cv2

        if Path(file).suffix.lower() in JPEG_SUFFIXES:
            return _read_jpeg(file)
        try:
            image = cv2.imread(str(file), cv2.IMREAD_UNCHANGED)
        except cv2.error:  # e.g. a header claiming more pixels than OpenCV will allocate
            return None
        return None if image is None else _to_grey(image)

    def _frames(self):
        for file in self._files:
            image = self._read(file)
            if image is None or image.shape[:2] != self.shape or image.dtype != self.dtype:
                log.warning("%s: unreadable, or of another size or bit depth, stream stops here", file)
                return
            yield image

    def _hashed_files(self):
        return self._files


JPEG_SUFFIXES = (".jpg", ".jpeg")


def _read_jpeg(file) -> np.ndarray | None:
    """A JPEG frame in grey, or None when it is truncated or corrupt. Read with Pillow, whose
    decoder reports damage as an error: OpenCV's prints libjpeg's warnings on the terminal and
    returns the damaged image as if whole."""
    from PIL import Image, UnidentifiedImageError

    try:
        with Image.open(file) as image:
            image.load()
            if image.mode == "L":
                return np.asarray(image)
            return _to_grey(np.ascontiguousarray(np.asarray(image.convert("RGB"))[:, :, ::-1]))
    except (OSError, UnidentifiedImageError, ValueError, Image.DecompressionBombError):
        return None


def require_text_path(path, what="recording") -> None:
    """Refuse a path whose name is not valid UTF-8 (bytes the file system holds but text cannot
    name): OpenCV's readers crash on such names, and no report could print them."""
    try:
        os.fspath(path).encode("utf-8")
    except UnicodeEncodeError:
        shown = os.fsencode(path).decode("utf-8", "backslashreplace")
        raise UnusableSource(f"{shown}: the {what}'s name is not valid UTF-8 text; rename it "
                             "(letters, digits, '-', '_', '.') and try again.") from None


def open_source(path) -> FrameSource:
    """Open ``path`` as a recording: a video file, a multi-page TIFF, a folder of images, a
    Phantom ``.cine``, or a Photron ``.mraw`` with its ``.cih``/``.cihx`` header (either named).

    Raises :class:`UnusableSource` with one sentence when nothing can read it.
    """
    require_text_path(path)
    p = Path(path)
    if not p.exists():
        raise UnusableSource(f"{path}: no such file or folder.")
    if p.is_dir():
        return ImageFolderSource(path)
    if not os.access(p, os.R_OK):
        raise UnusableSource(f"{path}: the file cannot be read (permissions).")
    if p.stat().st_size == 0:
        raise UnusableSource(f"{path}: the file is empty.")
    suffix = p.suffix.lower()
    if suffix == ".json":
        raise UnusableSource(f"{path}: a .json file is never read as a recording.")
    if suffix in TIFF_SUFFIXES:
        return TiffSource(path)
    if suffix in CINE_SUFFIXES:  # never handed to OpenCV, whose FFmpeg cine demuxer can abort the process
        from .cine import CineSource

        return CineSource(path)
    if suffix in MRAW_SUFFIXES:
        from .mraw import MrawSource

        return MrawSource(path)
    reasons = []
    for backend in (VideoSource, TiffSource):
        try:
            return backend(path)
        except UnusableSource as exc:
            reasons.append(str(exc).split(": ", 1)[-1].rstrip("."))
    raise UnusableSource(f"{path}: not a recording this tool can read ({'; '.join(dict.fromkeys(reasons))}).")
