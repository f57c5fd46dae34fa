"""Native camera files: Phantom .cine and Photron .mraw (+ .cih/.cihx), written by our own writers.

Round trips of every bit depth and packing, the header's clock (rate, exposure, trigger, stamps),
cross-checks against the general-purpose readers pims (cine) and pyMRAW (mraw), unusable files
(one sentence, never another exception: property-based with hypothesis), constant memory.
"""

import hashlib
import re
import struct
import tempfile
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from thinning.frames import UnusableSource, open_source
from thinning.frames.cine import COLOUR_BAYER, COLOUR_LUMA, CineSource
from thinning.frames.mraw import MrawSource
from thinning.frames.writers import write_cine, write_mraw

FPS = 25_000
EXPOSURE_S = 12e-6


def _frames(n=7, shape=(24, 40), bits=12, seed=0, channels=1):
    rng = np.random.default_rng(seed)
    dtype = np.uint8 if bits <= 8 else np.uint16
    size = shape + ((3,) if channels == 3 else ())
    frames = [rng.integers(0, 1 << bits, size=size, dtype=dtype) for _ in range(n)]
    frames[0].flat[:2] = (0, (1 << bits) - 1)  # the extremes of the range are kept exactly
    return frames


def _quantised(stamps):
    """Time stamps as a cine stores them: steps of 2**-30 s (the two low bits are flags)."""
    stamps = np.asarray(stamps, dtype=np.float64)
    return (np.round(stamps * 2.0 ** 30) - np.round(stamps[0] * 2.0 ** 30)) / 2.0 ** 30


def _assert_one_sentence(exc, path):
    message = str(exc)
    assert Path(path).name in message, message
    assert message.endswith(".") and "\n" not in message, message
    assert ". " not in message, message


CINE_DEPTHS = [(8, "unpacked"), (10, "packed"), (12, "packed"), (10, "unpacked"), (12, "unpacked"),
               (14, "unpacked"), (16, "unpacked")]
MRAW_DEPTHS = [  # (real bits, stored bits, effective side)
    (8, 8, "Lower"), (12, 12, "Lower"), (16, 16, "Lower"), (12, 16, "Lower"), (10, 16, "Higher"),
]


# --- round trips -------------------------------------------------------------------------------

@pytest.mark.parametrize("bit_depth, packing", CINE_DEPTHS)
def test_cine_round_trip(tmp_path, bit_depth, packing):
    frames = _frames(bits=bit_depth)
    stamps = np.arange(len(frames)) / FPS
    path = tmp_path / "rec.cine"
    write_cine(path, frames, fps=FPS, bit_depth=bit_depth, packing=packing, exposure_s=EXPOSURE_S,
               trigger_frame=3)
    with open_source(path) as source:
        assert isinstance(source, CineSource)
        got = list(source)
        assert source.fps == FPS and source.clock == "file" and source.save_step == 1
        assert source.exposure_s == EXPOSURE_S
        assert source.trigger_frame == 3 and source.first_image_no == -3
        assert source.bit_depth == bit_depth and source.colour is None
        assert source.dtype == (np.uint8 if bit_depth == 8 else np.uint16)
        assert source.shape == frames[0].shape and source.n_frames == len(frames)
        assert source.frames_read == len(frames) and not source.broken_off
        np.testing.assert_array_equal(source.timestamps_s, _quantised(stamps))
        assert np.abs(source.timestamps_s - stamps).max() <= 2.0 ** -30
        assert source.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    for g, e in zip(got, frames, strict=True):
        assert g.dtype == e.dtype and g.flags.c_contiguous
        np.testing.assert_array_equal(g, e)


@pytest.mark.parametrize("header", ["cih", "cihx"])
@pytest.mark.parametrize("bit_depth, color_bit, side", MRAW_DEPTHS)
def test_mraw_round_trip(tmp_path, header, bit_depth, color_bit, side):
    frames = _frames(bits=bit_depth)
    write_mraw(tmp_path / "rec.mraw", frames, fps=7500.5, bit_depth=bit_depth, shutter_s=20e-6,
               start_frame=-4, header=header, color_bit=color_bit, effective_side=side)
    data, head = tmp_path / "rec.mraw", tmp_path / f"rec.{header}"
    assert data.stat().st_size == len(frames) * frames[0].size * color_bit // 8
    for named in (data, head):  # SOURCE may name either file
        with open_source(named) as source:
            assert isinstance(source, MrawSource)
            got = list(source)
            assert source.fps == 7500.5 and source.clock == "file" and source.save_step == 1
            assert source.exposure_s == 20e-6 and source.timestamps_s is None
            assert source.trigger_frame == 4 and source.start_frame == -4
            assert source.bit_depth == bit_depth and source.color_bit == color_bit
            assert source.dtype == (np.uint8 if color_bit == 8 else np.uint16)
            assert source.shape == frames[0].shape and source.n_frames == len(frames)
            assert source.frames_read == len(frames) and not source.broken_off
            # the hash covers the header and the data, in that order
            assert source.sha256 == hashlib.sha256(head.read_bytes() + data.read_bytes()).hexdigest()
        for g, e in zip(got, frames, strict=True):
            assert g.dtype == e.dtype
            np.testing.assert_array_equal(g, e)


def test_cine_irregular_stamps_come_back_exactly(tmp_path):
    # frames 3, 4 and 8 dropped, and the camera's clock a little off the nominal period
    numbers = np.array([0, 1, 2, 5, 6, 7, 9, 10])
    stamps = numbers / FPS + np.array([0, 3, -2, 5, 0, -4, 1, 2]) * 1e-9
    path = tmp_path / "dropped.cine"
    write_cine(path, _frames(n=len(stamps)), fps=FPS, bit_depth=12, packing="packed",
               exposure_s=EXPOSURE_S, timestamps_s=stamps)
    source = open_source(path)
    np.testing.assert_array_equal(source.timestamps_s, _quantised(stamps))
    assert np.abs(source.timestamps_s - (stamps - stamps[0])).max() <= 2.0 ** -30
    assert source.fps == FPS and source.save_step == 1  # gaps do not change the clock


def test_cine_saved_with_a_step_runs_on_the_step_clock(tmp_path):
    # a recording at 90 kHz saved every 10th frame (as the camera software's decimation does):
    # the stamps are 10 periods apart, the file's clock is 9 kHz
    stamps = np.arange(6) * 10 / 90_000
    path = tmp_path / "step.cine"
    write_cine(path, _frames(n=6), fps=90_000, bit_depth=12, packing="unpacked",
               exposure_s=EXPOSURE_S, trigger_frame=0, timestamps_s=stamps)
    source = open_source(path)
    assert source.record_rate_hz == 90_000 and source.save_step == 10 and source.fps == 9_000
    assert source.trigger_frame == 0


@pytest.mark.parametrize("trigger", [-5, 7, 40])
def test_cine_trigger_outside_the_record_is_none(tmp_path, trigger):
    path = tmp_path / "t.cine"
    write_cine(path, _frames(n=7), fps=FPS, bit_depth=12, packing="packed", exposure_s=EXPOSURE_S,
               trigger_frame=trigger)
    source = open_source(path)
    assert source.trigger_frame is None and source.first_image_no == -trigger


def test_mraw_trigger_outside_the_record_is_none(tmp_path):
    write_mraw(tmp_path / "t.mraw", _frames(n=5), fps=1000, bit_depth=12, shutter_s=1e-4, start_frame=2)
    assert open_source(tmp_path / "t.mraw").trigger_frame is None


def test_cine_interpolated_colour_is_read_as_luma(tmp_path):
    import cv2

    for bits in (8, 12):
        frames = _frames(n=3, bits=bits, channels=3)
        path = tmp_path / f"colour{bits}.cine"
        write_cine(path, frames, fps=FPS, bit_depth=bits, packing="unpacked", exposure_s=EXPOSURE_S)
        source = open_source(path)
        assert source.colour == COLOUR_LUMA and source.bit_depth == bits
        for g, bgr in zip(source, frames, strict=True):
            assert g.ndim == 2 and g.dtype == bgr.dtype
            # OpenCV's BGR → grey conversion (ITU-R BT.601 weights, fixed-point) as the reference
            reference = cv2.cvtColor(bgr, cv2.COLOR_BGR2GRAY).astype(int)
            assert np.abs(g.astype(int) - reference).max() <= 1


def test_cine_raw_colour_mosaic_is_read_as_2x2_mean(tmp_path):
    frames = _frames(n=3, bits=12)
    path = tmp_path / "bayer.cine"
    write_cine(path, frames, fps=FPS, bit_depth=12, packing="packed", exposure_s=EXPOSURE_S, cfa=3)
    source = open_source(path)
    assert source.colour == COLOUR_BAYER
    for g, mosaic in zip(source, frames, strict=True):
        m = mosaic.astype(int)
        inner = (m[:-1, :-1] + m[1:, :-1] + m[:-1, 1:] + m[1:, 1:] + 2) // 4
        np.testing.assert_array_equal(g[:-1, :-1], inner)  # every 2 × 2 block holds R, G, G, B once
        assert g.shape == mosaic.shape


def test_cih_as_cameras_write_it(tmp_path):
    """Real-file habits: a shutter given as 1/N s without the ns field, keys without a space before
    the colon, a save step that fits the recorded frames."""
    frames = _frames(n=4, bits=12)
    write_mraw(tmp_path / "cam.mraw", frames, fps=60000, bit_depth=12, shutter_s=1 / 800000, color_bit=16)
    head = tmp_path / "cam.cih"
    text = head.read_text()
    text = re.sub(r"Shutter Type2\(nsec\) : \d+\n", "", text)
    text = text.replace("Save Step : 1", "Save Step : 36").replace("Original Total Frame : 4",
                                                                 "Original Total Frame : 677")
    head.write_text(text + "Partition Number: 1\nDevice Last Error : -1:0xffffffff\n")
    source = open_source(head)
    assert source.exposure_s == pytest.approx(1.25e-6, rel=1e-12)
    assert source.save_step == 36 and source.fps == pytest.approx(60000 / 36)
    # a step the recorded frames cannot hold is not trusted
    head.write_text(text.replace("Original Total Frame : 677", "Original Total Frame : 40"))
    source = open_source(head)
    assert source.save_step == 1 and source.fps == 60000


def test_cihx_with_the_camera_softwares_binary_prefix(tmp_path):
    frames = _frames(n=3, bits=12)
    write_mraw(tmp_path / "cam.mraw", frames, fps=30000, bit_depth=12, shutter_s=20e-6, header="cihx")
    head = tmp_path / "cam.cihx"
    prefix = b"!!! This file can not be edited. !!!" + b" " * 92 + bytes(range(256)) + b"CIHX\0\0"
    head.write_bytes(prefix + head.read_bytes())
    source = open_source(tmp_path / "cam.mraw")
    assert source.fps == 30000 and source.exposure_s == 20e-6
    for g, e in zip(source, frames, strict=True):
        np.testing.assert_array_equal(g, e)


def test_other_sources_keep_the_clock_attributes_empty(tmp_path):
    import cv2
    import tifffile

    frames = _frames(n=3, bits=8)
    tif = tmp_path / "stack.tif"
    tifffile.imwrite(tif, np.stack(frames), photometric="minisblack")
    avi = tmp_path / "clip.avi"
    writer = cv2.VideoWriter(str(avi), cv2.CAP_FFMPEG, 0, 25.0, frames[0].shape[::-1], False)
    for frame in frames:
        writer.write(frame)
    writer.release()
    for path, clock in ((tif, None), (avi, "container")):
        source = open_source(path)
        assert source.clock == clock
        assert source.timestamps_s is None and source.exposure_s is None and source.trigger_frame is None


# --- the general-purpose readers read the same files identically ------------------------------

@pytest.mark.parametrize("bit_depth, packing", CINE_DEPTHS)
def test_cine_reads_as_pims_reads_it(tmp_path, bit_depth, packing):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        pims_cine = pytest.importorskip("pims.cine")  # pims (soft-matter): its Cine reader
    frames = _frames(bits=bit_depth)
    stamps = np.array([0, 1, 2, 3, 5, 6, 8]) / FPS
    path = tmp_path / "rec.cine"
    write_cine(path, frames, fps=FPS, bit_depth=bit_depth, packing=packing, exposure_s=EXPOSURE_S,
               trigger_frame=2, timestamps_s=stamps)
    ours = open_source(path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        theirs = pims_cine.Cine(str(path))
        try:
            assert len(theirs) == ours.n_frames and theirs.frame_rate == ours.fps
            assert theirs.header_dict["first_image_no"] == -ours.trigger_frame
            assert theirs.setup_fields_dict["real_bpp"] == ours.bit_depth
            assert theirs.setup_fields_dict["shutter_ns"] / 1e9 == ours.exposure_s
            for mine, frame in zip(ours, (theirs.get_frame(i) for i in range(len(theirs))), strict=True):
                np.testing.assert_array_equal(mine, np.asarray(frame))
            # pims keeps each stamp as (whole seconds as a datetime, fraction): relative to frame 0
            first_s, first_f = theirs.frame_time_stamps[0]
            relative = [(s - first_s).total_seconds() + (f - first_f) for s, f in theirs.frame_time_stamps]
            np.testing.assert_allclose(ours.timestamps_s, relative, rtol=0, atol=1e-12)
        finally:
            theirs.close()


@pytest.mark.parametrize("header", ["cih", "cihx"])
@pytest.mark.parametrize("bit_depth, color_bit", [(8, 8), (12, 12), (16, 16), (12, 16)])
def test_mraw_reads_as_pymraw_reads_it(tmp_path, header, bit_depth, color_bit):
    frames = _frames(bits=bit_depth)
    write_mraw(tmp_path / "rec.mraw", frames, fps=50000, bit_depth=bit_depth, shutter_s=20e-6,
               header=header, color_bit=color_bit)
    with warnings.catch_warnings():  # pyMRAW warns on anything but 12 real bits; numba on import
        warnings.simplefilter("ignore")
        pymraw = pytest.importorskip("pyMRAW")  # pyMRAW (ladisk): load_video
        images, cih = pymraw.load_video(str(tmp_path / f"rec.{header}"))
        theirs = np.array(images)
        del images
    ours = open_source(tmp_path / "rec.mraw")
    assert cih["Record Rate(fps)"] == ours.fps and cih["Total Frame"] == ours.n_frames
    assert cih["EffectiveBit Depth"] == ours.bit_depth
    assert (cih["Image Height"], cih["Image Width"]) == ours.shape
    np.testing.assert_array_equal(np.stack(list(ours)), theirs)


# --- unusable files: one sentence, naming the file ---------------------------------------------

def _cine_bytes(tmp_path, **kw):
    path = tmp_path / "base.cine"
    options = dict(fps=FPS, bit_depth=12, packing="packed", exposure_s=EXPOSURE_S)
    options.update(kw)
    write_cine(path, _frames(n=4, shape=(6, 8)), **options)
    return path.read_bytes()


def _patched(data, offset, fmt, value):
    data = bytearray(data)
    struct.pack_into(fmt, data, offset, value)
    return bytes(data)


@pytest.mark.parametrize("mutate, message", [
    (lambda b: b[:30], "too short"),
    (lambda b: b"XX" + b[2:], "not a cine file"),
    (lambda b: _patched(b, 2, "<H", 40), "header gives its size"),
    (lambda b: _patched(b, 6, "<H", 0), "version 0"),
    (lambda b: _patched(b, 4, "<H", 1), "JPEG"),
    (lambda b: _patched(b, 4, "<H", 7), "compression code 7"),
    (lambda b: _patched(b, 20, "<I", 0), "holds no image"),
    (lambda b: _patched(b, 24, "<I", 1 << 30), "image header lies past"),
    (lambda b: _patched(b, 44 + 16, "<I", 512), "unknown pixel storage"),
    (lambda b: _patched(b, 44 + 4, "<i", -8), "image of -8"),
    (lambda b: _patched(_patched(b, 44 + 4, "<i", 7), 44 + 8, "<i", 5), "do not fill whole bytes"),
    (lambda b: _patched(b, 84 + 140, "<2s", b"XX"), "mark 'ST'"),
    (lambda b: _patched(b, 84 + 142, "<H", 60000), "setup gives its length"),
    (lambda b: _patched(b, 84 + 7240, "<I", 1 << 20), "tagged information block"),
    (lambda b: _patched(b, 84 + 7240, "<I", 8 + 8 * 3), "time-stamp block holds"),
    (lambda b: _patched(b, 84 + 7240 + 8 + 8, "<Q", 0), "do not increase"),
    (lambda b: _patched(b, struct.unpack_from("<I", b, 32)[0], "<Q", 1 << 40), "first image is missing"),
    (lambda b: b[: len(b) - 4 * (8 + 72) + 8 + 50], "first image is missing"),
])
def test_unusable_cine_says_why_in_one_sentence(tmp_path, mutate, message):
    path = tmp_path / "bad.cine"
    path.write_bytes(mutate(_cine_bytes(tmp_path)))
    with pytest.raises(UnusableSource, match=message) as caught:
        open_source(path)
    _assert_one_sentence(caught.value, path)


def test_junk_named_cine_never_reaches_opencv(tmp_path):
    # an 8-bit cine handed to OpenCV's FFmpeg backend can abort the process: .cine is ours alone
    path = tmp_path / "junk.cine"
    path.write_bytes(bytes(range(256)) * 64)
    with pytest.raises(UnusableSource, match="not a cine file") as caught:
        open_source(path)
    _assert_one_sentence(caught.value, path)
    good = tmp_path / "eight.cine"
    write_cine(good, _frames(n=3, bits=8), fps=FPS, bit_depth=8, packing="unpacked", exposure_s=EXPOSURE_S)
    assert isinstance(open_source(good), CineSource)


@pytest.mark.parametrize("kind", ["cine", "mraw"])
def test_truncated_data_breaks_off_at_the_last_whole_frame(tmp_path, kind):
    frames = _frames(n=10, shape=(24, 40), bits=12)
    if kind == "cine":
        path = tmp_path / "cut.cine"
        write_cine(path, frames, fps=FPS, bit_depth=12, packing="packed", exposure_s=EXPOSURE_S)
        per_frame = 8 + 24 * 40 * 3 // 2
    else:
        path = tmp_path / "cut.mraw"
        write_mraw(path, frames, fps=FPS, bit_depth=12, shutter_s=EXPOSURE_S)
        per_frame = 24 * 40 * 3 // 2
    data = path.read_bytes()
    path.write_bytes(data[: len(data) - 3 * per_frame - per_frame // 2])  # 6.5 frames are left
    with open_source(path) as source:
        assert source.n_frames == 10
        got = list(source)
        assert len(got) == 6 and source.frames_read == 6 and source.broken_off
    for g, e in zip(got, frames[:6]):
        np.testing.assert_array_equal(g, e)


def _mraw_pair(tmp_path, header="cih", **kw):
    options = dict(fps=1000, bit_depth=12, shutter_s=1e-4, header=header)
    options.update(kw)
    write_mraw(tmp_path / "rec.mraw", _frames(n=4, shape=(6, 8)), **options)
    return tmp_path / "rec.mraw", tmp_path / f"rec.{header}"


def test_mraw_without_its_header(tmp_path):
    data, head = _mraw_pair(tmp_path)
    head.unlink()
    with pytest.raises(UnusableSource, match="no .cih or .cihx header") as caught:
        open_source(data)
    _assert_one_sentence(caught.value, data)


@pytest.mark.parametrize("header", ["cih", "cihx"])
def test_header_naming_a_missing_mraw(tmp_path, header):
    data, head = _mraw_pair(tmp_path, header)
    data.unlink()
    with pytest.raises(UnusableSource, match="rec.mraw is not beside it") as caught:
        open_source(head)
    _assert_one_sentence(caught.value, head)


@pytest.mark.parametrize("edit, message", [
    (lambda t: t.replace("#Camera Information Header", "# notes"), "does not start with"),
    (lambda t: t.replace("Color Bit : 12", "Color Bit : 10"), "10-bit MRAW data is not supported"),
    (lambda t: t.replace("Color Type : Mono", "Color Type : Color"), "colour MRAW .* \\(Color Type 'Color'\\)"),
    (lambda t: t.replace("File Format : MRaw", "File Format : TIFF"),
     "not describe MRaw data \\(File Format 'TIFF'\\)"),
    (lambda t: t.replace("Image Width : 8", "Image Width : eight"), "'Image Width' is not a whole number"),
    (lambda t: t.replace("Image Width : 8", "Image Width : 0"), "'Image Width' is 0"),
    (lambda t: t.replace("Image Width : 8", "Image Width : 7").replace("Image Height : 6", "Image Height : 5"),
     "do not fill whole bytes"),
    (lambda t: re.sub(r"(?m)^Total Frame : 4\n", "", t), "no 'Total Frame'"),
    (lambda t: t.replace("Total Frame : 4", "Total Frame : 3"), "more than the 3 frames"),
    (lambda t: t.replace("Image Height : 6", "Image Height : 600"), "no whole frame"),
    (lambda t: t.replace("EffectiveBit Depth : 12", "EffectiveBit Depth : 14"), "14 real bits"),
    (lambda t: t.replace("EffectiveBit Side : Lower", "EffectiveBit Side : Middle"), "not Lower or Higher"),
    (lambda t: t.replace("Record Rate(fps) : 1000", "Record Rate(fps) : -5"), "not a positive number"),
])
def test_unusable_cih_says_why_in_one_sentence(tmp_path, edit, message):
    data, head = _mraw_pair(tmp_path)
    head.write_text(edit(head.read_text()))
    for named in (data, head):
        with pytest.raises(UnusableSource, match=message) as caught:
            open_source(named)
        _assert_one_sentence(caught.value, named)


@pytest.mark.parametrize("edit, message", [
    (lambda t: t.replace("<cih>", "<notcih>"), "no <cih> element"),
    (lambda t: t.replace("</fileInfo>", ""), "not well-formed"),
    (lambda t: t.replace("<bit>12</bit>", "<bit>twelve</bit>"), "'Color Bit' is not a whole number"),
    (lambda t: t.replace("<recordRate>1000</recordRate>", "<recordRate>fast</recordRate>"), "positive number"),
])
def test_unusable_cihx_says_why_in_one_sentence(tmp_path, edit, message):
    data, head = _mraw_pair(tmp_path, "cihx")
    head.write_text(edit(head.read_text()))
    with pytest.raises(UnusableSource, match=message) as caught:
        open_source(data)
    _assert_one_sentence(caught.value, data)


# --- random and mutated bytes: UnusableSource or frames, nothing else ---------------------------

def _read_all_or_unusable(path):
    """Open and stream ``path``: either frames that honour the contract, or one UnusableSource."""
    try:
        source = open_source(path)
    except UnusableSource as exc:
        _assert_one_sentence(exc, path)
        return
    with source:
        frames = list(source)
        assert 1 <= len(frames) <= source.n_frames and source.frames_read == len(frames)
        assert source.broken_off == (len(frames) < source.n_frames)
        for frame in frames:
            assert frame.shape == source.shape and frame.dtype == source.dtype
        assert source.bit_depth >= 1 and (source.fps is None or source.fps > 0)
        if source.timestamps_s is not None:
            assert source.timestamps_s.shape == (source.n_frames,)
        assert len(source.sha256) == 64


@pytest.fixture(scope="module")
def scratch():
    with tempfile.TemporaryDirectory() as folder:
        yield Path(folder)


@pytest.fixture(scope="module")
def cine_bases(scratch):
    bases = {}
    for name, options, bits in [
        ("packed12", dict(bit_depth=12, packing="packed"), 12),
        ("plain8", dict(bit_depth=8, packing="unpacked"), 8),
        ("plain16", dict(bit_depth=16, packing="unpacked"), 16),
    ]:
        path = scratch / f"base-{name}.cine"
        write_cine(path, _frames(n=3, shape=(4, 8), bits=bits), fps=FPS, exposure_s=EXPOSURE_S,
                   trigger_frame=1, **options)
        bases[name] = path.read_bytes()
    return bases


#: Offsets worth aiming at: every header field, the setup fields read, the tagged blocks, the
#: image offsets and the first images' annotation blocks (of the small base files above).
CINE_TARGETS = (list(range(0, 84, 2)) + [84 + o for o in (0, 2, 140, 142, 768, 772, 808, 896, 1568)]
                + [84 + 7240 + o for o in (0, 4, 6, 8, 16, 32, 40, 44, 48)])
INTERESTING = [0, 1, 2, 7, 8, 9, 40, 44, 84, 255, 256, 1024, 7240, 0x7FFF, 0xFFFF, 0x7FFFFFFF,
               0x80000000, 0xFFFFFFFF]


def _edit(data, edits, cut):
    data = bytearray(data)
    for offset, chunk in edits:
        offset %= max(len(data), 1)
        data[offset:offset + len(chunk)] = chunk
    return bytes(data if cut is None else data[:cut])


chunks = st.one_of(st.binary(min_size=1, max_size=8),
                   st.sampled_from(INTERESTING).map(lambda v: struct.pack("<I", v)),
                   st.sampled_from(INTERESTING).map(lambda v: struct.pack("<H", v & 0xFFFF)))


@pytest.mark.slow
@settings(max_examples=2000, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(base=st.sampled_from(["packed12", "plain8", "plain16", "random"]),
       edits=st.lists(st.tuples(st.one_of(st.sampled_from(CINE_TARGETS), st.integers(0, 1 << 14)), chunks),
                      max_size=6),
       cut=st.one_of(st.none(), st.integers(0, 9000), st.integers(-500, -1)),  # < 0: from the end
       noise=st.binary(max_size=600))
def test_cine_mutated_bytes_are_unusable_or_readable(cine_bases, scratch, base, edits, cut, noise):
    data = b"CI" + noise if base == "random" else cine_bases[base]
    path = scratch / "mutated.cine"
    path.write_bytes(_edit(data, edits, cut))
    _read_all_or_unusable(path)


@pytest.fixture(scope="module")
def mraw_bases(scratch):
    bases = {}
    for header in ("cih", "cihx"):
        stem = scratch / f"base-{header}"
        write_mraw(stem.with_suffix(".mraw"), _frames(n=3, shape=(4, 8), bits=12), fps=1000,
                   bit_depth=12, shutter_s=1e-4, start_frame=-1, header=header)
        bases[header] = (stem.with_suffix(f".{header}").read_bytes(), stem.with_suffix(".mraw").read_bytes())
    return bases


MRAW_KEYS = ["Record Rate(fps)", "Shutter Speed(s)", "Shutter Type2(nsec)", "Total Frame",
             "Original Total Frame", "Start Frame", "Save Step", "Image Width", "Image Height",
             "Color Type", "Color Bit", "File Format", "EffectiveBit Depth", "EffectiveBit Side"]
CIHX_ELEMENTS = ["recordRate", "shutterSpeed", "shutterSpeedNsec", "totalFrame", "recordedFrame",
                 "startFrame", "skipFrame", "width", "height", "type", "bit", "fileFormat", "depth", "side"]
values = st.one_of(st.integers(-(1 << 40), 1 << 40).map(str), st.text(max_size=12),
                   st.sampled_from(["", "0", "-1", "1/0", "1/", "nan", "inf", "1e400", "Higher", "Color",
                                    "Raw", "8", "10", "12", "16", "24", "3", "5", "7", "1/800000"]))


@pytest.mark.slow
@settings(max_examples=2000, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(header=st.sampled_from(["cih", "cihx"]),
       fields=st.lists(st.tuples(st.integers(0, len(MRAW_KEYS) - 1), values), max_size=4),
       edits=st.lists(st.tuples(st.integers(0, 1 << 11), st.binary(min_size=1, max_size=4)), max_size=3),
       data_change=st.integers(-60, 60),
       name_header=st.booleans())
def test_mraw_mutated_headers_and_data_are_unusable_or_readable(mraw_bases, scratch, header, fields, edits,
                                                                data_change, name_header):
    head, data = mraw_bases[header]
    text = head.decode()
    for index, value in fields:
        if header == "cih":
            text = re.sub(rf"(?m)^{re.escape(MRAW_KEYS[index])} : .*$", lambda _: f"{MRAW_KEYS[index]} : {value}", text)
        else:
            tag = CIHX_ELEMENTS[index]
            text = re.sub(rf"<{tag}>[^<]*</{tag}>", lambda _: f"<{tag}>{value}</{tag}>", text)
    head = _edit(text.encode("utf-8", errors="surrogateescape"), edits, None)
    data = data[:data_change] if data_change < 0 else data + bytes(data_change)
    stem = scratch / "mutated"
    for stale in (".cih", ".cihx"):
        stem.with_suffix(stale).unlink(missing_ok=True)
    stem.with_suffix(f".{header}").write_bytes(head)
    stem.with_suffix(".mraw").write_bytes(data)
    _read_all_or_unusable(stem.with_suffix(f".{header}" if name_header else ".mraw"))


# --- constant memory ---------------------------------------------------------------------------

def _resident_mb():
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    pytest.skip("no /proc/self/status on this system")


@pytest.mark.parametrize("kind", ["cine", "mraw"])
def test_long_recordings_stream_in_constant_memory(tmp_path, kind):
    n, shape = 5000, (96, 128)
    patterns = _frames(n=4, shape=shape, bits=12)
    frames = (patterns[i % 4] for i in range(n))
    if kind == "cine":
        path = tmp_path / "long.cine"
        write_cine(path, frames, fps=FPS, bit_depth=12, packing="packed", exposure_s=EXPOSURE_S,
                   timestamps_s=np.arange(n) / FPS)
    else:
        path = tmp_path / "long.mraw"
        write_mraw(path, frames, fps=FPS, bit_depth=12, shutter_s=EXPOSURE_S)
    file_mb = path.stat().st_size / 2 ** 20  # 88 MB of frames
    with open_source(path) as source:
        count = 0
        for count, frame in enumerate(source, 1):
            if count == 500:
                early = _resident_mb()
            if count % 997 == 0:  # the frames are the patterns, in order
                np.testing.assert_array_equal(frame, patterns[(count - 1) % 4])
        late = _resident_mb()
    assert count == n
    # the mapped pages read are handed back as the stream goes: resident memory does not follow
    # the length (without that it would grow by about the file's size, ~80 MB here)
    assert late - early < min(24.0, file_mb / 3), (early, late)
