"""The report's decimated ortho overview gathered from windows another pass reads anyway.

:class:`OverviewSampler` keeps, from the zonal statistics' block reads, the pixels GDAL's
nearest-neighbour decimation takes (:func:`nearest_source_index`), so the overview is the same
array as :meth:`pvscan.io.ortho.OrthoSet.read_overview` without decoding those blocks again;
:func:`finish_overview_ahead` reads the rest on a thread of its own while the diagnosis runs.
"""
from __future__ import annotations

import threading
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Any

import numpy as np
from affine import Affine
from rasterio.windows import Window

from pvscan.io.ortho import OrthoSet, _as_window, _compose_overview

__all__ = ["OverviewSampler", "nearest_source_index", "finish_overview_ahead"]


def nearest_source_index(n_src: int, n_out: int) -> np.ndarray:
    """The source pixel GDAL's nearest-neighbour decimation takes for each of ``n_out``
    output pixels along an axis of ``n_src`` pixels (``n_out <= n_src``): the pixel under
    the output pixel's centre, ``floor((i + 0.5) * n_src / n_out + 1e-10)``, as GDAL's
    ``GDALRasterBand::IRasterIO`` computes it (checked against GDAL's own reads in
    ``tests/test_ortho.py``)."""
    idx = np.floor((np.arange(n_out) + 0.5) * (n_src / n_out) + 1e-10).astype(np.int64)
    return np.minimum(idx, n_src - 1)


class OverviewSampler:
    """The decimated mosaic of :meth:`OrthoSet.read_overview`, gathered from the full-resolution
    windows another pass reads anyway (the zonal statistics' blocks: :meth:`take`), the rest
    read at the end (:meth:`finish`), so the ortho is decoded once less.

    The pixels kept are those GDAL's nearest-neighbour decimated read takes
    (:func:`nearest_source_index`) and the values converted the same way, so the mosaic is
    the same array. Only for tiles where that holds: without overview levels (GDAL would
    read those), without an internal mask band, decimated (not enlarged) on both axes;
    otherwise :attr:`usable` is False and :meth:`finish` returns :meth:`OrthoSet.read_overview`.

    :meth:`take` may be called from several threads.
    """

    def __init__(self, orthos: OrthoSet, max_px: int) -> None:
        self.orthos = orthos
        self.max_px = int(max_px)
        self.shape, self.transform, self.parts = orthos._overview_grid(self.max_px)
        self.usable = True
        for (r0, r1, c0, c1), t, ds in zip(self.parts, orthos.tiles, orthos._datasets):
            if t.has_mask or r1 - r0 > t.height or c1 - c0 > t.width or ds.closed or ds.overviews(1):
                self.usable = False
        self._rows = [nearest_source_index(t.height, r1 - r0) for (r0, r1, _, _), t in zip(self.parts, orthos.tiles)]
        self._cols = [nearest_source_index(t.width, c1 - c0) for (_, _, c0, c1), t in zip(self.parts, orthos.tiles)]
        # (empty arrays when not usable: nothing is kept then)
        self._data: list[np.ndarray] = [np.full((r.size, c.size) if self.usable else (0, 0), np.nan, np.float32)
                                        for r, c in zip(self._rows, self._cols)]
        self._have: list[np.ndarray] = [np.zeros((r.size, c.size) if self.usable else (0, 0), bool)
                                        for r, c in zip(self._rows, self._cols)]
        self._lock = threading.Lock()

    def _span(self, tile_index: int, window: Window) -> tuple[slice, slice]:
        rows, cols = self._rows[tile_index], self._cols[tile_index]
        r0, c0 = int(window.row_off), int(window.col_off)
        return (slice(int(np.searchsorted(rows, r0)), int(np.searchsorted(rows, r0 + int(window.height)))),
                slice(int(np.searchsorted(cols, c0)), int(np.searchsorted(cols, c0 + int(window.width)))))

    def take(self, tile_index: int, window: Any, data: np.ndarray) -> None:
        """Keep the overview's pixels inside ``window`` of a tile from ``data``, the window
        as :meth:`OrthoSet.read` returns it [degC]."""
        if not self.usable:
            return
        window = _as_window(window)
        si, sj = self._span(tile_index, window)
        if si.stop <= si.start or sj.stop <= sj.start:
            return
        rows = self._rows[tile_index][si] - int(window.row_off)
        cols = self._cols[tile_index][sj] - int(window.col_off)
        part = data[np.ix_(rows, cols)]
        with self._lock:
            self._data[tile_index][si, sj] = part
            self._have[tile_index][si, sj] = True

    def finish(self, read: Callable[[int, Any], np.ndarray] | None = None) -> tuple[np.ndarray, Affine]:
        """The mosaic and its transform, as :meth:`OrthoSet.read_overview` gives them; the
        pixels no :meth:`take` kept are read now, one window per internal block of the file,
        with ``read(tile_index, window)`` (default :meth:`OrthoSet.read`; another thread
        passes a read of :meth:`OrthoSet.reader`)."""
        if not self.usable:
            return self.orthos.read_overview(self.max_px)
        read = self.orthos.read if read is None else read
        for k, t in enumerate(self.orthos.tiles):
            rows, cols, have = self._rows[k], self._cols[k], self._have[k]
            if have.all():
                continue
            bh, bw = t.block_shape
            # the overview rows and columns of each internal block of the file
            rb = np.searchsorted(rows, np.arange(0, t.height + bh, bh)[1:])
            cb = np.searchsorted(cols, np.arange(0, t.width + bw, bw)[1:])
            i0 = 0
            for i1 in rb.tolist():
                j0 = 0
                for j1 in cb.tolist():
                    if i1 > i0 and j1 > j0:
                        miss = ~have[i0:i1, j0:j1]
                        if miss.any():
                            mi, mj = np.flatnonzero(miss.any(axis=1)), np.flatnonzero(miss.any(axis=0))
                            a, b = i0 + int(mi[0]), i0 + int(mi[-1]) + 1
                            c, d = j0 + int(mj[0]), j0 + int(mj[-1]) + 1
                            win = Window(int(cols[c]), int(rows[a]), int(cols[d - 1] - cols[c] + 1),
                                         int(rows[b - 1] - rows[a] + 1))
                            self.take(k, win, read(k, win))
                    j0 = j1
                i0 = i1
        return _compose_overview(self.shape, self.parts, self.orthos.tiles, self._data), self.transform


def finish_overview_ahead(sampler: OverviewSampler | None, orthos: OrthoSet) -> Future | None:
    """The rest of an :class:`OverviewSampler` the zonal pass filled, read on a thread of its
    own (with its own file handles: the flight's are closed meanwhile) while the diagnosis
    runs: a future of :meth:`OverviewSampler.finish`'s (mosaic, transform); None without a
    usable sampler."""
    if sampler is None or not sampler.usable:
        return None

    def finish() -> tuple[np.ndarray, Affine]:
        with orthos.reader() as read:
            return sampler.finish(read)

    pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="pvscan-overview")
    try:
        return pool.submit(finish)
    finally:
        pool.shutdown(wait=False)  # the thread ends with its one task
