"""Advisory locks between processes: who owns a staging folder, who creates a site history.

The locks are ``flock(2)`` locks (:mod:`fcntl`): the kernel drops them when the owning
process ends, however it ends (a crash, ``kill -9``), so a lock is never stale and a folder
whose lock can be taken has no living owner. Where :mod:`fcntl` is missing (Windows) or the
file system refuses the lock (some network file systems), :func:`try_lock` reports
``None`` ("unknown") and callers leave things alone.
"""
from __future__ import annotations

import contextlib
import errno
import logging
import os
from collections.abc import Iterator
from pathlib import Path

try:  # POSIX
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None  # type: ignore[assignment]

__all__ = ["HeldLock", "try_lock", "exclusive_lock"]

log = logging.getLogger(__name__)


class HeldLock:
    """An exclusive lock held on a file or folder until :meth:`release` (or process exit)."""

    def __init__(self, fd: int, path: Path):
        self._fd: int | None = fd
        self.path = path

    def release(self) -> None:
        if self._fd is not None:
            with contextlib.suppress(OSError):
                os.close(self._fd)  # closing the descriptor drops the flock
            self._fd = None

    def __enter__(self) -> HeldLock:
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()


def _open(path: Path) -> int:
    flags = os.O_RDONLY
    if path.is_dir():
        flags |= getattr(os, "O_DIRECTORY", 0)
    return os.open(path, flags)


def try_lock(path: str | os.PathLike) -> HeldLock | None | bool:
    """Take an exclusive lock on ``path`` (a file or a folder) without waiting.

    Returns
    -------
    HeldLock
        The lock, held until released or until this process ends.
    False
        Another process holds it.
    None
        Locks are not available here (no :mod:`fcntl`, the file system refuses, or
        ``path`` vanished): nothing can be said about an owner.
    """
    path = Path(path)
    if fcntl is None:
        return None
    try:
        fd = _open(path)
    except OSError:
        return None
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError as exc:
        os.close(fd)
        if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
            return False
        log.debug("%s: cannot lock: %s", path, exc)
        return None
    return HeldLock(fd, path)


@contextlib.contextmanager
def exclusive_lock(path: str | os.PathLike, *, remove: bool = False) -> Iterator[None]:
    """Wait for an exclusive lock on the lock file ``path`` (created when missing).

    Without :mod:`fcntl` the block runs unlocked.

    Parameters
    ----------
    remove : bool
        Remove the lock file when the block succeeded. Only safe for a *one-way* change that
        every holder re-checks after taking the lock (e.g. "create the file if it is still
        missing"): a process that was waiting on the removed file then finds the change done,
        and one that comes later does not need the lock any more.
    """
    path = Path(path)
    if fcntl is None:  # pragma: no cover - Windows
        yield
        return
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o666)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX)
        except OSError as exc:  # e.g. a file system without locks: go on unlocked
            log.debug("%s: cannot lock: %s", path, exc)
        yield
        if remove:
            with contextlib.suppress(OSError):
                os.unlink(path)
    finally:
        os.close(fd)
