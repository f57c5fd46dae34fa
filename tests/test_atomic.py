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
