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


class _TwoQueues:
    """The 2Q replacement policy (Johnson and Shasha 1994, the "full version" with their
    recommended sizes: ``Kin`` a quarter of the capacity, ``Kout`` half of it) over at most
    ``capacity`` values: ``a1in`` holds values met once (first in, first out), ``am`` those
    met again after leaving ``a1in`` (least recently used first out), ``a1out`` only the keys
    of the last values dropped from ``a1in``."""

    def __init__(self, capacity: int) -> None:
        self.capacity = max(1, capacity)
        self.k_in = max(1, self.capacity // 4)
        self.k_out = max(1, self.capacity // 2)
        self.a1in: dict[Any, Any] = {}
        self.am: dict[Any, Any] = {}
        self.a1out: dict[Any, None] = {}

    def get(self, key: Any) -> Any:
        """The value kept under ``key`` (None when not kept)."""
        got = self.am.pop(key, None)
        if got is not None:
            self.am[key] = got  # most recently used last
            return got
        return self.a1in.get(key)  # first in, first out: a hit does not move it

    def put(self, key: Any, value: Any) -> None:
        """Keep ``value`` (not kept before) under ``key``, dropping another when full."""
        if len(self.a1in) + len(self.am) >= self.capacity:
            if len(self.a1in) > self.k_in or not self.am:
                old = next(iter(self.a1in))
                del self.a1in[old]
                self.a1out[old] = None
                if len(self.a1out) > self.k_out:
                    del self.a1out[next(iter(self.a1out))]
            else:
                del self.am[next(iter(self.am))]
        if key in self.a1out:
            del self.a1out[key]
            self.am[key] = value
        else:
            self.a1in[key] = value


@contextlib.contextmanager
def chunked_reader(orthos: OrthoSet, chunk_px: int = 256,
                   max_chunks: int = 128) -> Iterator[Callable[[int, Any], np.ndarray]]:
    """A ``read(tile_index, window)`` for many small windows close to each other.

    The tile is read in aligned chunks of ``chunk_px`` x ``chunk_px`` pixels, each converted
    once and kept (at most ``max_chunks`` of them, ``max_chunks * chunk_px**2 * 4`` bytes); a
    window is copied out of the chunks it overlaps. The values are those of
    :meth:`OrthoSet.read` pixel for pixel (the conversion is per pixel), at a fraction of the
    cost of one read per window. Not thread-safe.

    Which chunks are kept follows the 2Q policy of Johnson and Shasha (1994): a chunk read
    for the first time waits in a first-in first-out queue of a quarter of the cache; one
    asked for again after it left that queue (its key remembered among the last
    ``max_chunks / 2`` dropped) joins the main part, least recently used first out. A
    registration samples the same spread of modules pass after pass; when the chunks of one
    pass are more than the cache holds, plain least-recently-used order drops each chunk
    just before the next pass needs it again, while 2Q keeps the main part across passes.

    References
    ----------
    .. [1] T. Johnson and D. Shasha, "2Q: a low overhead high performance buffer management
       replacement algorithm", Proc. 20th VLDB Conference, 439-450, 1994.

    Yields
    ------
    callable
        ``read(tile_index, window) -> float32 ndarray`` [degC], as :meth:`OrthoSet.read`.
    """
    n = int(chunk_px)
    datasets = orthos._datasets
    cache = _TwoQueues(int(max_chunks))

    def chunk(ti: int, cr: int, cc: int) -> np.ndarray:
        key = (ti, cr, cc)
        got = cache.get(key)
        if got is None:
            tile = orthos.tiles[ti]
            r0, c0 = cr * n, cc * n
            win = Window(c0, r0, min(n, tile.width - c0), min(n, tile.height - r0))
            got = _read_into(datasets[ti], tile, win)
            cache.put(key, got)
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
