"""Many small windows of an ortho through a cache of aligned chunks (see :meth:`OrthoSet.window_cache`)."""
from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator
from typing import TYPE_CHECKING, Any

import numpy as np
from rasterio.windows import Window

from pvscan.errors import OrthoError
from pvscan.io.ortho import _as_window, _read_into

if TYPE_CHECKING:  # pragma: no cover
    from pvscan.io.ortho import OrthoSet

__all__ = ["chunked_reader"]


@contextlib.contextmanager
def chunked_reader(orthos: OrthoSet, chunk_px: int = 256,
                   max_chunks: int = 128) -> Iterator[Callable[[int, Any], np.ndarray]]:
    """A ``read(tile_index, window)`` for many small windows close to each other.

    The tile is read in aligned chunks of ``chunk_px`` x ``chunk_px`` pixels, each converted
    once and kept (the ``max_chunks`` most recently used; at most ``max_chunks * chunk_px**2 * 4``
    bytes); a window is copied out of the chunks it overlaps. The values are those of
    :meth:`OrthoSet.read` pixel for pixel (the conversion is per pixel), at a fraction of the
    cost of one read per window. Not thread-safe.

    Yields
    ------
    callable
        ``read(tile_index, window) -> float32 ndarray`` [degC], as :meth:`OrthoSet.read`.
    """
    chunks: dict[tuple[int, int, int], np.ndarray] = {}
    n = int(chunk_px)
    datasets = orthos._datasets

    def chunk(ti: int, cr: int, cc: int) -> np.ndarray:
        key = (ti, cr, cc)
        got = chunks.pop(key, None)
        if got is None:
            tile = orthos.tiles[ti]
            r0, c0 = cr * n, cc * n
            win = Window(c0, r0, min(n, tile.width - c0), min(n, tile.height - r0))
            got = _read_into(datasets[ti], tile, win)
            if len(chunks) >= max_chunks:
                del chunks[next(iter(chunks))]
        chunks[key] = got  # most recently used last
        return got

    def read(tile_index: int, window: Any) -> np.ndarray:
        if datasets[tile_index].closed:
            raise OrthoError(f"{orthos.tiles[tile_index].path}: ortho is closed")
        tile = orthos.tiles[tile_index]
        win = _as_window(window)
        h, w = int(win.height), int(win.width)
        r0, c0 = int(win.row_off), int(win.col_off)
        out = np.full((h, w), np.nan, dtype=np.float32)
        rr0, rr1 = max(r0, 0), min(r0 + h, tile.height)
        cc0, cc1 = max(c0, 0), min(c0 + w, tile.width)
        for cr in range(rr0 // n, (rr1 - 1) // n + 1) if rr1 > rr0 and cc1 > cc0 else ():
            for cc in range(cc0 // n, (cc1 - 1) // n + 1):
                a = chunk(tile_index, cr, cc)
                y0, y1 = max(rr0, cr * n), min(rr1, cr * n + a.shape[0])
                x0, x1 = max(cc0, cc * n), min(cc1, cc * n + a.shape[1])
                out[y0 - r0 : y1 - r0, x0 - c0 : x1 - c0] = a[y0 - cr * n : y1 - cr * n, x0 - cc * n : x1 - cc * n]
        return out

    yield read
