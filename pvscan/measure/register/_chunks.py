"""Where the module samples of a registration are read: one chunk cache for all of them
(:func:`shared_chunks`) and their windows (:func:`window_corners`)."""
from __future__ import annotations

import contextlib
from collections.abc import Iterator
from typing import Any

import numpy as np

__all__ = ["shared_chunks", "window_corners"]


#: Chunks (256 x 256 px, float32: 256 KiB each) kept by the chunk cache of one registration:
#: at most 128 MiB; a sample of modules spread over the site touches a few hundred. One
#: registration of the 25,536-module benchmark plant asks 14,166 times for 655 chunks: kept
#: in least-recently-used order 1,407 were decoded, with the 2Q policy of the reader 908
#: (768 chunks would hold all 655, but raise the process's peak memory by about 50 MiB).
_SHARED_CHUNKS = 512


class _ChunkedOrthos:
    """An ortho set whose small-window reader is one chunk cache shared by every sample."""

    def __init__(self, orthos: Any, read: Any) -> None:
        self._orthos = orthos
        self._read = read

    def __getattr__(self, name: str) -> Any:
        return getattr(self._orthos, name)

    def window_cache(self, *args: Any, **kwargs: Any) -> contextlib.AbstractContextManager[Any]:
        return contextlib.nullcontext(self._read)


@contextlib.contextmanager
def shared_chunks(orthos: Any) -> Iterator[Any]:
    """``orthos`` with one chunk cache for all the module samples of a registration (the same
    pixels as single reads: :meth:`pvscan.io.ortho.OrthoSet.window_cache`); ``orthos`` itself
    when it has no window cache."""
    cache = getattr(orthos, "window_cache", None)
    if cache is None:
        yield orthos
        return
    with cache(max_chunks=_SHARED_CHUNKS) as read:
        yield _ChunkedOrthos(orthos, read)


def window_corners(tiles: list[Any], x: np.ndarray, y: np.ndarray,
                   side_px: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Tile (the first whose bounds hold the point, else the first tile), first column and
    first row [px] of the square window of ``side_px`` centred on each point ``(x, y)`` [m]
    (the column and row rounded half to even, as Python's ``round``)."""
    ti = np.zeros(len(x), np.int64)
    todo = np.ones(len(x), bool)
    for j, t in enumerate(tiles):
        b = t.bounds
        hit = todo & (b.left <= x) & (x <= b.right) & (b.bottom <= y) & (y <= b.top)
        ti[hit] = j
        todo &= ~hit
    c0 = np.zeros(len(x), np.int64)
    r0 = np.zeros(len(x), np.int64)
    for j in np.unique(ti):
        sel = ti == j
        col, row = ~tiles[j].transform @ (x[sel], y[sel])
        c0[sel] = np.round(col - side_px / 2.0)
        r0[sel] = np.round(row - side_px / 2.0)
    return ti, c0, r0
