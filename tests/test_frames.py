"""One contract suite for every frame backend, against frames saved as arrays."""

import hashlib
import tracemalloc

import cv2
import numpy as np
import pytest
import tifffile

from thinning.frames import UnusableSource, natural_key, open_source


def _frames(n=12, shape=(40, 64), dtype=np.uint8, seed=0):
    rng = np.random.default_rng(seed)
    top = 255 if dtype == np.uint8 else 4095
    return [rng.integers(0, top, size=shape, dtype=dtype) for _ in range(n)]


def _write_png_folder(path, frames):
    path.mkdir()
    for i, f in enumerate(frames):
        cv2.imwrite(str(path / f"img_{i}.png"), f)   # img_2 must come before img_10
    (path / "notes.json").write_text("{}")           # never read as a frame
    return path


def _write_tiff(path, frames):
    with tifffile.TiffWriter(path) as tw:
        for f in frames:
            tw.write(f, contiguous=True, metadata=None)
    return path


def _write_raw_avi(path, frames):
    h, w = frames[0].shape
    writer = cv2.VideoWriter(str(path), cv2.CAP_FFMPEG, 0, 25.0, (w, h), False)
    for f in frames:
        writer.write(f)
    writer.release()
    return path


def _write_cine(path, frames, bit_depth, packing):
    from thinning.frames.writers import write_cine

    write_cine(path, frames, fps=10000, bit_depth=bit_depth, packing=packing, exposure_s=5e-5)
    return path


def _write_mraw(path, frames, bit_depth, header):
    from thinning.frames.writers import write_mraw

    write_mraw(path, frames, fps=10000, bit_depth=bit_depth, shutter_s=5e-5, header=header)
    return path


BACKENDS = {
    "png-folder-8": (lambda p, f: _write_png_folder(p / "frames", f), np.uint8),
    "png-folder-16": (lambda p, f: _write_png_folder(p / "frames", f), np.uint16),
    "tiff-8": (lambda p, f: _write_tiff(p / "stack.tif", f), np.uint8),
    "tiff-16": (lambda p, f: _write_tiff(p / "stack.tif", f), np.uint16),
    "avi-raw": (lambda p, f: _write_raw_avi(p / "clip.avi", f), np.uint8),
    "cine-8": (lambda p, f: _write_cine(p / "rec.cine", f, 8, "unpacked"), np.uint8),
    "cine-12-packed": (lambda p, f: _write_cine(p / "rec.cine", f, 12, "packed"), np.uint16),
    "cine-16": (lambda p, f: _write_cine(p / "rec.cine", f, 16, "unpacked"), np.uint16),
    "mraw-8-cih": (lambda p, f: _write_mraw(p / "rec.mraw", f, 8, "cih"), np.uint8),
    "mraw-12-cihx": (lambda p, f: _write_mraw(p / "rec.mraw", f, 12, "cihx").with_suffix(".cihx"), np.uint16),
    "mraw-16-cih": (lambda p, f: _write_mraw(p / "rec.mraw", f, 16, "cih"), np.uint16),
}


@pytest.mark.parametrize("backend", sorted(BACKENDS))
def test_backend_contract(tmp_path, backend):
    writer, dtype = BACKENDS[backend]
    expected = _frames(n=12, dtype=dtype)
    path = writer(tmp_path, expected)
    with open_source(path) as source:
        assert source.n_frames == len(expected)
        assert source.shape == expected[0].shape
        assert source.dtype == dtype
        got = list(source)
        assert source.frames_read == len(expected) and not source.broken_off
        assert len(source.sha256) == 64
    for g, e in zip(got, expected):
        assert g.shape == e.shape and g.dtype == e.dtype
        np.testing.assert_array_equal(g, e)   # all of these formats are lossless


def test_folder_hash_is_frames_bytes_in_natural_order(tmp_path):
    frames = _frames(n=11)
    folder = _write_png_folder(tmp_path / "f", frames)
    names = sorted((p.name for p in folder.glob("*.png")), key=natural_key)
    assert names[:3] == ["img_0.png", "img_1.png", "img_2.png"] and names[-1] == "img_10.png"
    digest = hashlib.sha256(b"".join((folder / n).read_bytes() for n in names)).hexdigest()
    assert open_source(folder).sha256 == digest


def test_mjpg_is_decoded_grey(tmp_path):
    frames = [np.full((48, 64), 40 + 10 * i, np.uint8) for i in range(8)]
    path = tmp_path / "clip.avi"
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), 25.0, (64, 48), False)
    for f in frames:
        writer.write(f)
    writer.release()
    source = open_source(path)
    assert source.codec == "MJPG" and source.fps == 25.0
    got = list(source)
    assert len(got) == 8 and got[0].ndim == 2
    assert [int(round(g.mean())) for g in got] == [40 + 10 * i for i in range(8)]  # lossy, ±1


def test_truncated_video_reports_broken_off(tmp_path):
    path = _write_raw_avi(tmp_path / "clip.avi", _frames(n=40, shape=(64, 64)))
    data = path.read_bytes()
    cut = tmp_path / "cut.avi"
    cut.write_bytes(data[: len(data) // 2])
    source = open_source(cut)
    n = sum(1 for _ in source)
    assert 0 < n < 40 and source.broken_off


@pytest.mark.parametrize("name, content, message", [
    ("missing.avi", None, "no such file"),
    ("empty", "folder", "no image files"),
    ("zero.avi", b"", "empty"),
    ("junk.avi", b"not a video at all" * 100, "not a"),
    ("junk.tif", b"II*\x00garbage", "TIFF"),
    ("t.json", b"{}", "json"),
    ("junk.cine", b"not a camera file" * 100, "not a cine file"),
    ("alone.mraw", b"\x00" * 100, "no .cih or .cihx header"),
    ("alone.cih", b"#Camera Information Header\n", "alone.mraw is not beside it"),
])
def test_unusable_sources_say_why(tmp_path, name, content, message):
    path = tmp_path / name
    if content == "folder":
        path.mkdir()
    elif content is not None:
        path.write_bytes(content)
    with pytest.raises(UnusableSource, match=message):
        open_source(path)


def test_tiff_streams_in_constant_memory(tmp_path):
    path = tmp_path / "long.tif"
    with tifffile.TiffWriter(path) as tw:
        for i in range(600):
            tw.write(np.full((128, 128), i % 255, np.uint8), contiguous=True, metadata=None)
    source = open_source(path)
    tracemalloc.start()
    count = sum(1 for _ in source)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert count == 600
    assert peak < 600 * 128 * 128 / 10   # far below holding all frames (9.8 MB)


def test_read_ahead_keeps_order_bounds_the_queue_and_stops_with_the_consumer():
    import threading

    from thinning.frames import read_ahead

    produced = []

    def items():
        for i in range(1000):
            produced.append(i)
            yield i

    reader = read_ahead(items(), 4)
    assert [next(reader) for _ in range(10)] == list(range(10))
    assert len(produced) <= 10 + 4 + 1  # never more than the bound ahead of the consumer
    reader.close()  # the consumer stops early: the background thread ends with it
    assert not any(t.name == "thinning-read-ahead" and t.is_alive() for t in threading.enumerate())
    assert len(produced) < 1000


def test_read_ahead_hands_a_failure_to_the_consumer():
    from thinning.frames import read_ahead

    def items():
        yield 1
        raise OSError("the disk went away")

    reader = read_ahead(items(), 2)
    assert next(reader) == 1
    with pytest.raises(OSError, match="disk went away"):
        next(reader)


def test_jpeg_frames_are_read_quietly_and_damage_ends_the_stream(tmp_path, capfd):
    # OpenCV's libjpeg prints "Premature end of JPEG file" on the terminal and returns a truncated
    # frame as whole; the folder reader says nothing there and stops the stream at the damage
    import cv2

    from thinning.frames import open_source

    rng = np.random.default_rng(5)
    frames = [cv2.GaussianBlur((rng.random((48, 40)) * 255).astype(np.uint8), (5, 5), 0) for _ in range(3)]
    for i, frame in enumerate(frames):
        cv2.imwrite(str(tmp_path / f"f{i}.jpg"), frame)
    whole = (tmp_path / "f2.jpg").read_bytes()
    with open_source(tmp_path) as recording:
        read = list(recording)
    # the same decode as OpenCV's within one grey level (two libjpeg builds)
    for path, image in zip(sorted(tmp_path.glob("*.jpg")), read):
        reference = cv2.imread(str(path), cv2.IMREAD_GRAYSCALE)
        assert image.dtype == np.uint8 and np.abs(image.astype(int) - reference).max() <= 1
    (tmp_path / "f2.jpg").write_bytes(whole[: len(whole) // 2])
    capfd.readouterr()
    with open_source(tmp_path) as recording:
        assert len(list(recording)) == 2
        assert recording.broken_off
    assert "JPEG" not in capfd.readouterr().err
