"""Files replaced atomically: written to a temporary sibling, then renamed over the target.

A reader never sees a half-written file, and an interrupted run leaves the
earlier file as it was. The new file gets the ordinary permissions of the
user's files (0666 less the umask), not the owner-only ones of a temporary
file, so results in a shared folder stay readable by the lab.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path


def _read_umask() -> int:
    # os.umask can only be read by setting it: done once, when this module is imported (the
    # analysis imports it before it starts any thread), through the most private mask, so that
    # a file another thread might create meanwhile is never more open than the user's own
    mask = os.umask(0o077)
    os.umask(mask)
    return mask


_UMASK = _read_umask()


@contextlib.contextmanager
def replacing(path, mode="wb", **open_kwargs):
    """Open a temporary sibling of ``path`` for writing; it replaces ``path`` when the block ends.

    ``mode`` and ``open_kwargs`` as for :func:`open` (a writing mode). On any
    error the temporary file is removed and ``path`` is left untouched.
    """
    path = Path(path)
    handle, temp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(handle, mode, **open_kwargs) as stream:
            yield stream
        os.chmod(temp, 0o666 & ~_UMASK)
        os.replace(temp, path)
    except BaseException:
        Path(temp).unlink(missing_ok=True)
        raise


def write_bytes(path, data: bytes):
    """Replace ``path`` by ``data``, atomically."""
    with replacing(path) as stream:
        stream.write(data)


def write_text(path, text: str):
    """Replace ``path`` by ``text`` (UTF-8, ``\\n`` line ends), atomically."""
    with replacing(path, "w", encoding="utf-8", newline="\n") as stream:
        stream.write(text)
