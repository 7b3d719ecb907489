"""Durable files on POSIX: writing every byte, fsync'ing a folder, an exclusive advisory lock.

A create, rename or unlink survives a power cut only once the folder holding it is fsync'ed;
a write may be short, so :func:`write_all` loops; :func:`try_lock` takes a non-blocking
``flock``, which the kernel drops when the holder dies (even by ``SIGKILL``).
"""

from __future__ import annotations

import os
from pathlib import Path

try:  # POSIX advisory locks; without them recovery cannot tell a live journal from a dead one
    import fcntl
except ImportError:  # pragma: no cover - non-POSIX
    fcntl = None  # type: ignore[assignment]  # the module is absent; callers test for None


def fsync_dir(path: Path) -> None:
    """fsync a folder so that a create, rename or unlink inside it survives a power cut."""
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:  # pragma: no cover - platforms without directory fds
        return
    try:
        os.fsync(fd)
    except OSError:  # pragma: no cover - some file systems refuse fsync on folders
        pass
    finally:
        os.close(fd)


def write_all(fd: int, data: bytes) -> None:
    """Write every byte of ``data`` to ``fd`` (``os.write`` may write fewer)."""
    view = memoryview(data)
    while view:
        n = os.write(fd, view)
        view = view[n:]


def try_lock(fd: int) -> bool:
    """Exclusive, non-blocking flock; True if taken (or if the platform has no flock)."""
    if fcntl is None:  # pragma: no cover
        return True
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        return False
    return True


def replace_atomically(path: Path, data: bytes) -> None:
    """Put ``data`` at ``path`` whole or not at all, surviving a power cut: write
    ``<path>.tmp``, fsync it, ``os.replace`` it onto ``path`` (atomic within one file system)
    and fsync the folder (common practice on POSIX). A failed write leaves the old file."""
    path = Path(path)
    tmp = path.with_name(path.name + ".tmp")
    try:
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
        try:
            write_all(fd, data)
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
    except BaseException:
        try:
            tmp.unlink()
        except OSError:
            pass
        raise
    fsync_dir(path.parent)
