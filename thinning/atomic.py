"""Files and folders replaced atomically: written to a temporary sibling, then renamed over the
target.

A reader never sees a half-written file, and an interrupted run leaves the
earlier file as it was. A folder of outputs is staged whole beside its target and
exchanged with it in one step (:func:`replacing_folder`), so it is wholly old or
wholly new. The new file gets the ordinary permissions of the
user's files (0666 less the umask), not the owner-only ones of a temporary
file, so results in a shared folder stay readable by the lab.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import os
import secrets
import shutil
import tempfile
from pathlib import Path

from .errors import ThinningError

#: The suffix of every temporary folder the tool stages beside its target.
TEMP_SUFFIX = ".thinning-tmp"


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


#: The longest file name (bytes) the common file systems take (ext4, XFS, NTFS, APFS).
NAME_MAX_BYTES = 255
#: Bytes a staging name adds to a folder's own name (``.NAME.new-PID-HEX.thinning-tmp``).
STAGING_ROOM_BYTES = 48


class UnusableOutputPath(ThinningError):
    """An output path no file system can hold."""


def require_fitting_name(folder, what: str = "output folder", *, staged: bool = True) -> None:
    """Refuse an output folder with a name part too long to be written, or (``staged``) too long
    to stage a new version beside it (raises :class:`UnusableOutputPath`, one sentence)."""
    parts = Path(folder).parts
    for k, part in enumerate(parts):
        last = k == len(parts) - 1
        room = NAME_MAX_BYTES - (STAGING_ROOM_BYTES if staged and last else 0)
        size = len(os.fsencode(part))
        if size > room:
            why = (f", and thinning needs {STAGING_ROOM_BYTES} of them to stage results beside it"
                   if staged and last else "")
            raise UnusableOutputPath(
                f"the {what}'s name part {part[:24]}… is {size} bytes long; file systems take "
                f"{NAME_MAX_BYTES}{why}: give a name of at most {room} bytes.")


def temp_sibling(folder: Path, tag: str) -> Path:
    """A fresh hidden name beside ``folder``: ``.NAME.TAG-PID-HEX.thinning-tmp``."""
    folder = Path(folder)
    return folder.with_name(f".{folder.name}.{tag}-{os.getpid()}-{secrets.token_hex(4)}{TEMP_SUFFIX}")


def _exchange(a: Path, b: Path) -> bool:
    """Swap two paths in one step (Linux renameat2 RENAME_EXCHANGE); False where unsupported."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        renameat2 = libc.renameat2
    except (OSError, AttributeError):
        return False
    at_fdcwd, rename_exchange = -100, 2
    if renameat2(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange) == 0:
        return True
    code = ctypes.get_errno()
    if code in (errno.ENOSYS, errno.EINVAL, errno.ENOTSUP, errno.EXDEV):
        return False
    raise OSError(code, os.strerror(code), str(b))


def swap_in(temp: Path, folder: Path):
    """Put the finished folder ``temp`` in place of ``folder`` (same file system): exchanged in one
    step where the system allows, else by two renames; the old folder is then removed."""
    temp, folder = Path(temp), Path(folder)
    if folder.exists() and _exchange(temp, folder):
        shutil.rmtree(temp, ignore_errors=True)    # temp now holds the old folder
        return
    old = None
    if folder.exists():
        old = temp_sibling(folder, "old")
        os.rename(folder, old)
    os.rename(temp, folder)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def remove_stale_siblings(folder: Path):
    """Remove the temporary siblings of ``folder`` left by runs that were killed (their process
    is gone); a running one's are kept."""
    folder = Path(folder)
    if not folder.parent.is_dir():
        return
    for entry in folder.parent.glob(f".{folder.name}.*-*-*{TEMP_SUFFIX}"):
        try:
            pid = int(entry.name[len(folder.name) + 2:].split(".", 1)[0].split("-")[1])
        except (IndexError, ValueError):
            continue
        if not _alive(pid):
            shutil.rmtree(entry, ignore_errors=True)


@contextlib.contextmanager
def replacing_folder(folder, own_names):
    """Stage a new version of ``folder``: yields an empty temporary sibling to write into; when
    the block ends it holds, besides what was written, every entry of the old folder whose name
    is not in ``own_names`` (the user's own files, hard-linked), and replaces ``folder`` in one
    step. On any error ``folder`` is left as it was and the staging folder removed."""
    folder = Path(folder)
    folder.parent.mkdir(parents=True, exist_ok=True)
    remove_stale_siblings(folder)
    stage = temp_sibling(folder, "new")
    stage.mkdir()
    os.chmod(stage, 0o777 & ~_UMASK)
    try:
        yield stage
        if folder.is_dir():
            for entry in folder.iterdir():
                if entry.name in own_names or (entry.name.startswith(".") and
                                               entry.name.endswith(".tmp")):
                    continue
                target = stage / entry.name
                if target.exists():
                    continue
                if entry.is_dir() and not entry.is_symlink():
                    shutil.copytree(entry, target, symlinks=True, copy_function=_link_or_copy)
                else:
                    _link_or_copy(entry, target)
        swap_in(stage, folder)
    finally:
        if stage.exists():
            shutil.rmtree(stage, ignore_errors=True)


def _link_or_copy(source, target):
    if os.path.islink(source):
        os.symlink(os.readlink(source), target)
        return target
    try:
        os.link(source, target)
    except OSError:
        shutil.copy2(source, target)
    return target
