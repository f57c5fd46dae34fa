"""Files replaced atomically (thinning.atomic): content, permissions, failure leaves the old file."""

import os
import stat

import pytest

from thinning import atomic


def _umask():
    mask = os.umask(0o077)
    os.umask(mask)
    return mask


def test_replaced_file_has_the_users_ordinary_permissions(tmp_path):
    # a temporary file is owner-only (0600); a result in a shared lab folder must not be: it gets
    # what open() gives a new file, 0666 less the umask (POSIX open(2), common practice)
    path = tmp_path / "result.json"
    atomic.write_bytes(path, b"{}\n")
    assert path.read_bytes() == b"{}\n"
    assert stat.S_IMODE(path.stat().st_mode) == 0o666 & ~_umask()
    atomic.write_text(path, "é\n")
    assert path.read_bytes() == "é\n".encode()
    assert [p.name for p in tmp_path.iterdir()] == ["result.json"]


def test_a_failed_write_leaves_the_earlier_file_and_no_temporary(tmp_path):
    path = tmp_path / "results.csv"
    path.write_text("row,status\n1,ok\n")
    with pytest.raises(RuntimeError):
        with atomic.replacing(path, "w") as stream:
            stream.write("half")
            raise RuntimeError("interrupted")
    assert path.read_text() == "row,status\n1,ok\n"
    assert [p.name for p in tmp_path.iterdir()] == ["results.csv"]


def _tree(folder):
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in folder.rglob("*") if p.is_file()}


def test_a_replaced_folder_is_wholly_new_and_keeps_the_users_files(tmp_path):
    out = tmp_path / "out"
    with atomic.replacing_folder(out, {"a.txt", "b.txt"}) as stage:
        (stage / "a.txt").write_text("old a")
        (stage / "b.txt").write_text("old b")
    (out / "mine.txt").write_text("the user's note")
    (out / "sub").mkdir()
    (out / "sub" / "x").write_text("kept")
    with atomic.replacing_folder(out, {"a.txt", "b.txt"}) as stage:
        (stage / "a.txt").write_text("new a")      # b.txt is not written again: it goes
    assert _tree(out) == {"a.txt": b"new a", "mine.txt": b"the user's note", "sub/x": b"kept"}
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_a_failed_folder_write_leaves_the_old_folder_whole(tmp_path):
    out = tmp_path / "out"
    with atomic.replacing_folder(out, {"a.txt", "b.txt"}) as stage:
        (stage / "a.txt").write_text("old a")
        (stage / "b.txt").write_text("old b")
    before = _tree(out)
    with pytest.raises(RuntimeError):
        with atomic.replacing_folder(out, {"a.txt", "b.txt"}) as stage:
            (stage / "a.txt").write_text("new a")
            raise RuntimeError("interrupted")
    assert _tree(out) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_a_killed_runs_staging_folder_is_removed_by_the_next(tmp_path):
    # a staging folder named for a process that no longer exists is debris; a live one is not
    import subprocess
    import sys

    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True).stdout.strip()
    out = tmp_path / "out"
    stale = tmp_path / f".out.new-{dead}-abcd{atomic.TEMP_SUFFIX}"
    live = tmp_path / f".out.new-{os.getpid()}-beef{atomic.TEMP_SUFFIX}"
    for folder in (stale, live):
        folder.mkdir()
        (folder / "result.json").write_text("{}")
    with atomic.replacing_folder(out, {"a.txt"}) as stage:
        (stage / "a.txt").write_text("a")
    assert not stale.exists() and live.exists()
