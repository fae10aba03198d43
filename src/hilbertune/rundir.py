"""Run directories on disk: one writer at a time, and a finished run replaced all at once.

Place in the data flow: under ``runs.execute_fit``, ``runs.reproduce_run`` and the sweep.
A writer holds an exclusive ``flock`` on a lock file beside the directory (``.NAME.lock``;
beside, not inside, so that it survives the swap below) for as long as it writes; a second
writer is refused at once with one line. A fit that replaces a finished run builds the new
run in a sibling directory (``.NAME.hilbertune-build``) and exchanges the two directories
only when the new run is complete, so the old run survives any failure, a kill included.
"""

from __future__ import annotations

import ctypes
import errno
import os
import shutil
from contextlib import contextmanager
from pathlib import Path

from hilbertune.errors import InvalidInputError

BUILD_SUFFIX = ".hilbertune-build"
OLD_SUFFIX = ".hilbertune-old"
_AT_FDCWD = -100
_RENAME_EXCHANGE = 2  # linux/fs.h


def lock_path(target) -> Path:
    target = Path(target).resolve()
    return target.parent / f".{target.name}.lock"


def build_path(target) -> Path:
    """Where a run that replaces ``target`` is built (fixed name: a killed build resumes)."""
    target = Path(target).resolve()
    return target.parent / f".{target.name}{BUILD_SUFFIX}"


@contextmanager
def exclusive(target, *, what: str = "run directory", option: str | None = "--out"):
    """Hold the exclusive lock of ``target`` (a directory, existing or not) in this block.

    Raises:
      InvalidInputError (exit 2) at once when another process holds it.
    """
    import fcntl

    shown = str(target)
    path = lock_path(target)
    path.parent.mkdir(parents=True, exist_ok=True)
    while True:
        handle = open(path, "a+")
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            handle.close()
            if exc.errno not in (errno.EAGAIN, errno.EWOULDBLOCK, errno.EACCES):
                raise
            holder = _holder(path)
            raise InvalidInputError(
                f"{what} {shown!r} is being written by another hilbertune process"
                f"{holder}; wait for it to finish"
                f"{f' or choose another {option}' if option else ' and try again'}") from None
        try:  # the previous holder may have removed the file between our open and lock
            same = os.stat(path).st_ino == os.fstat(handle.fileno()).st_ino
        except FileNotFoundError:
            same = False
        if same:
            break
        handle.close()
    try:
        handle.seek(0)
        handle.truncate()
        handle.write(f"{os.getpid()}\n")
        handle.flush()
        yield Path(target).resolve()
    finally:
        try:  # unlink while still holding the lock: the next writer then locks a new file
            os.unlink(path)
        except FileNotFoundError:
            pass
        handle.close()


def _holder(path: Path) -> str:
    try:
        pid = path.read_text().strip()
    except OSError:
        return ""
    return f" (process {pid})" if pid.isdigit() else ""


def recover(target) -> None:
    """Undo a swap that a kill cut between its two renames (only the fallback swap has two):
    the old run goes back in place. Call while holding the lock."""
    target = Path(target).resolve()
    old = target.parent / f".{target.name}{OLD_SUFFIX}"
    if old.is_dir() and not os.path.lexists(target):
        os.rename(old, target)
    elif old.is_dir():
        shutil.rmtree(old, ignore_errors=True)


def swap_in(build, target, *, replaced) -> None:
    """Put the complete run in ``build`` in the place of ``target`` and delete the old one.

    Entries of ``target`` whose names are not in ``replaced`` (the user's own files) are
    carried over as hard links (copies where links are not possible) before the swap, so
    they are in both directories at every moment. The swap itself is one atomic exchange
    of the two directories where the system supports it (Linux ``renameat2``), else two
    renames (``recover`` finishes them after a kill).
    """
    build, target = Path(build), Path(target).resolve()
    for entry in target.iterdir():
        if entry.name in replaced or os.path.lexists(build / entry.name):
            continue
        _link_tree(entry, build / entry.name)
    _exchange(build, target)
    shutil.rmtree(build, ignore_errors=True)  # now the old run


def _link_or_copy(src, dst) -> None:
    try:
        os.link(src, dst)
    except OSError:
        shutil.copy2(src, dst)


def _link_tree(src: Path, dst: Path) -> None:
    if src.is_symlink():
        os.symlink(os.readlink(src), dst)
    elif src.is_dir():
        shutil.copytree(src, dst, symlinks=True, copy_function=_link_or_copy)
    else:
        _link_or_copy(src, dst)


def _exchange(a: Path, b: Path) -> None:
    """Exchange two directories; afterwards ``a`` holds what ``b`` held and vice versa."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        exchange = libc.renameat2
    except (OSError, AttributeError):
        exchange = None
    if exchange is not None:
        done = exchange(_AT_FDCWD, os.fsencode(a), _AT_FDCWD, os.fsencode(b), _RENAME_EXCHANGE)
        if done == 0:
            return
        if ctypes.get_errno() not in (errno.EINVAL, errno.ENOSYS, errno.ENOTSUP):
            code = ctypes.get_errno()
            raise OSError(code, os.strerror(code), str(b))
    old = b.parent / f".{b.name}{OLD_SUFFIX}"
    os.rename(b, old)
    os.rename(a, b)
    os.rename(old, a)
