"""Atomic writing: a file or a whole result folder appears complete or not at all.

A file is first written to a temporary sibling, flushed to disk and then renamed over its
final name (:func:`atomic_write`, :func:`atomic_path`), and a whole result folder is
assembled in a temporary sibling folder that replaces the final folder only when every file
was written (:func:`staging_dir`). A failure therefore never leaves a half-written file or
folder behind. Write failures of the machine (disk full, permission, a GDAL or SQLite
commit) become an :class:`~pvscan.errors.OutputError` naming the final file.
"""
from __future__ import annotations

import contextlib
import logging
import os
import shutil
import tempfile
import uuid
from collections.abc import Iterator
from pathlib import Path

from pvscan.errors import OutputError, PvscanError
from pvscan.io.locking import HeldLock, try_lock

__all__ = ["atomic_path", "atomic_write", "staging_dir", "clean_stale_staging", "write_failure"]

log = logging.getLogger(__name__)

def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _fsync_dir(path: Path) -> None:
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:  # not supported on every file system
        pass
    finally:
        os.close(fd)


def write_failure(exc: BaseException) -> str | None:
    """Why a write failed, when ``exc`` comes from the file system, GDAL or SQLite (disk full,
    permission, a failed commit); None for anything else (a bug, or a pvscan error)."""
    if isinstance(exc, PvscanError):
        return None
    if isinstance(exc, OSError):
        return exc.strerror or " ".join(str(exc).split()) or type(exc).__name__
    module = type(exc).__module__ or ""
    if module.split(".")[0] in ("pyogrio", "rasterio", "fiona", "sqlite3", "_sqlite3"):
        return " ".join(str(exc).split()) or type(exc).__name__
    return None


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike, suffix: str = ".tmp") -> Iterator[Path]:
    """Yield a temporary sibling path for a writer (e.g. GDAL) that needs a file name; on
    success the file is fsync'ed and renamed over ``path``, on any failure it is removed.

    Raises
    ------
    OutputError
        If the file cannot be written: a file-system error (disk full, permission) or a
        GDAL/SQLite failure (e.g. a failed commit); the message names ``path``.
    """
    path = Path(path)
    tmp = path.with_name(f".{path.stem}.{uuid.uuid4().hex[:8]}{suffix}")
    try:
        yield tmp
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException as exc:
        for leftover in (tmp, *(tmp.with_name(tmp.name + s) for s in ("-journal", "-wal", "-shm"))):
            with contextlib.suppress(OSError):
                os.unlink(leftover)
        why = write_failure(exc)
        if why is not None:
            raise OutputError(f"{path}: cannot write: {why}") from None
        raise
    _fsync_dir(path.parent)


def atomic_write(path: str | os.PathLike, data: bytes | str) -> Path:
    """Write ``data`` to ``path`` so that readers see either the old file or the whole new one.

    The data go to a temporary file in the same folder, are flushed and fsync'ed, and the
    temporary file is renamed over ``path`` with :func:`os.replace` (atomic on POSIX and on
    Windows within one volume).

    Parameters
    ----------
    path : path-like
        Destination file. Its folder must exist.
    data : bytes or str
        Content; ``str`` is encoded as UTF-8.

    Returns
    -------
    pathlib.Path
        ``path``.

    Raises
    ------
    OutputError
        If the file cannot be written (the message names the file).
    """
    path = Path(path)
    payload = data.encode("utf-8") if isinstance(data, str) else bytes(data)
    with atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            fh.write(payload)
    return path


def _is_empty_dir(path: Path) -> bool:
    return path.is_dir() and not any(path.iterdir())


_STAGING = ".staging-"
_OLD = ".old-"


def clean_stale_staging(out_dir: str | os.PathLike) -> list[Path]:
    """Remove what killed runs left beside ``out_dir``: their staging folders
    (``.NAME.staging-XXXX``) and previous results moved aside (``.NAME.old-XXXX``).

    A run holds an exclusive lock (:mod:`pvscan.io.locking`) on its staging folder, and on
    the previous results while it swaps them out, for as long as it lives; the kernel drops
    the lock when the process dies, however it dies. A folder whose lock can be taken thus
    belongs to no living run and is removed; a locked one (a run still going) is left alone,
    and so is everything when locks are not available. Previous results moved aside by a
    run killed before it moved its own into place are moved back when ``out_dir`` is missing.

    Returns
    -------
    list of pathlib.Path
        The folders removed or restored.
    """
    out = Path(out_dir)
    parent = out.parent if str(out.parent) else Path(".")
    prefixes = (f".{out.name}{_STAGING}", f".{out.name}{_OLD}")
    try:
        candidates = sorted(p for p in parent.iterdir() if p.name.startswith(prefixes))
    except OSError:
        return []
    done = []
    for p in candidates:
        if p.is_symlink() or not p.is_dir():
            continue
        lock = try_lock(p)
        if not isinstance(lock, HeldLock):  # a living run owns it (False), or no way to know (None)
            continue
        try:
            if p.name.startswith(prefixes[1]) and not out.exists():
                os.replace(p, out)
                log.warning("%s: restored the previous results that an interrupted run had moved to %s",
                            out, p.name)
            else:
                shutil.rmtree(p)
                log.info("%s: removed %s left by an interrupted run", out, p.name)
            done.append(p)
        except OSError as exc:
            log.warning("%s: cannot remove %s left by an interrupted run: %s", out, p, exc.strerror or exc)
        finally:
            lock.release()
    return done


def _new_staging(out: Path, parent: Path) -> tuple[Path, HeldLock | None]:
    """A fresh staging folder beside ``out``, locked by this process."""
    for _ in range(10):
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}{_STAGING}", dir=parent))
        lock = try_lock(tmp)
        if lock is False:  # a cleaner of another run took it in the instant before us
            continue
        os.chmod(tmp, 0o777 & ~_umask())
        return tmp, lock if isinstance(lock, HeldLock) else None
    raise OSError(f"cannot create a staging folder in {parent}")


def _staged_message(exc: BaseException, tmp: Path, out: Path) -> BaseException | None:
    """The error to raise for ``exc`` raised while writing into the staging folder ``tmp``:
    file names inside it are given under ``out``; write failures become OutputError."""
    if isinstance(exc, PvscanError):
        if isinstance(exc, OutputError) and str(tmp) in str(exc):
            return OutputError(str(exc).replace(str(tmp), str(out)))
        return None
    why = write_failure(exc)
    if why is None:
        return None
    name = getattr(exc, "filename", None)
    if name and str(tmp) in str(name):
        return OutputError(f"{str(name).replace(str(tmp), str(out))}: cannot write: {why}")
    if name:
        return OutputError(f"{name}: {why}")
    return OutputError(f"{out}: cannot write: {why}")


@contextlib.contextmanager
def staging_dir(out_dir: str | os.PathLike, overwrite: bool = False) -> Iterator[Path]:
    """A temporary sibling folder that replaces ``out_dir`` only when the block succeeds.

    Parameters
    ----------
    out_dir : path-like
        The final result folder. It must not exist (an existing *empty* folder is accepted)
        unless ``overwrite`` is true. Missing parent folders are created.
    overwrite : bool
        Replace an existing ``out_dir`` (its old content is removed after the new folder
        is in place).

    Yields
    ------
    pathlib.Path
        The staging folder to write every output into.

    Raises
    ------
    OutputError
        If ``out_dir`` exists and ``overwrite`` is false, is not a folder, or cannot be
        created or replaced; and for every write failure in the block (disk full,
        permission, GDAL or SQLite errors), naming the file under ``out_dir``.

    Notes
    -----
    On any exception inside the ``with`` block the staging folder is removed and
    ``out_dir`` is left as it was, so no half-written result is ever visible there. The
    staging folder (``.NAME.staging-XXXX`` beside ``out_dir``) is locked by this process
    while it lives; :func:`clean_stale_staging`, called first, removes those of runs that
    were killed.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise OutputError(f"{out}: exists and is not a folder")
    if out.exists() and not overwrite and not _is_empty_dir(out):
        raise OutputError(f"{out}: output folder exists and is not empty (use --overwrite to replace it)")
    parent = out.parent if str(out.parent) else Path(".")
    try:
        parent.mkdir(parents=True, exist_ok=True)
        clean_stale_staging(out)
        tmp, lock = _new_staging(out, parent)
    except OSError as exc:
        raise OutputError(f"{out}: cannot create the output folder: {exc.strerror or exc}") from None
    try:
        try:
            yield tmp
        except BaseException as exc:
            shutil.rmtree(tmp, ignore_errors=True)
            mapped = _staged_message(exc, tmp, out)
            if mapped is not None:
                raise mapped from None
            raise
        # the block succeeded: move the staging folder into place
        try:
            if out.exists():
                if not overwrite and not _is_empty_dir(out):
                    raise OutputError(f"{out}: output folder appeared while writing (use --overwrite to replace it)")
                old = parent / f".{out.name}{_OLD}{uuid.uuid4().hex[:8]}"
                old_lock = try_lock(out)  # the lock moves with the folder: ours until removed
                try:
                    os.replace(out, old)
                    try:
                        os.replace(tmp, out)
                    except OSError:
                        os.replace(old, out)
                        raise
                    shutil.rmtree(old, ignore_errors=True)
                finally:
                    if isinstance(old_lock, HeldLock):
                        old_lock.release()
            else:
                os.replace(tmp, out)
        except OSError as exc:
            shutil.rmtree(tmp, ignore_errors=True)
            raise OutputError(f"{out}: cannot move results into place: {exc.strerror or exc}") from None
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        _fsync_dir(parent)
    finally:
        if lock:
            lock.release()
