"""Thermal pixels for the report: a decimated site overview and small crops.

Reads go through the ortho stage's :class:`pvscan.io.ortho.OrthoSet` (``.tiles``, ``.crs``,
``.read(tile_index, window)`` and ``.read_overview(max_px)``, all giving apparent
temperature [degC] with NaN for nodata). Memory stays bounded: the overview is a
decimated read and a crop is one small window.
"""
from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from pvscan._typing import ProgressFn
from pvscan.report._images import Extent

if TYPE_CHECKING:
    from pvscan.io.ortho import OrthoSet

log = logging.getLogger(__name__)

__all__ = ["ThermalView", "open_thermal", "OverviewRead", "OverviewDone"]


class ThermalView:
    """Overview and crops in the ortho CRS from an ortho set.

    Parameters
    ----------
    orthos : pvscan.io.ortho.OrthoSet
        Open tiles of one flight (left open: the caller closes them).
    """

    def __init__(self, orthos: OrthoSet, overview_read: OverviewRead | OverviewDone | None = None) -> None:
        self.orthos = orthos
        self.tiles = list(orthos.tiles)
        self.crs = orthos.crs
        self.gsd_m = min(abs(t.transform.a) for t in self.tiles)
        self._overview_read = overview_read

    def overview(self, max_px: int, progress: ProgressFn | None = None) -> tuple[np.ndarray, Extent]:
        """Decimated mosaic of all tiles.

        Parameters
        ----------
        max_px : int
            Longest side of the mosaic [px].

        Returns
        -------
        array : float32 ndarray (rows, cols)
            Apparent temperature [degC], NaN where no tile has data.
        extent : tuple
            (xmin, xmax, ymin, ymax) [m] in the ortho CRS (matplotlib ``imshow`` order).
        """
        done = self._overview_read.result(self.orthos, int(max_px)) if self._overview_read is not None else None
        self._overview_read = None
        if done is None:
            done = _overview(self.orthos, int(max_px))
        if progress is not None:
            progress("report overview", 1, 1)
        return done

    def crop(self, bounds: tuple[float, float, float, float]) -> tuple[np.ndarray, Extent] | None:
        """Full-resolution pixels of a map box from the tile that covers it best.

        Parameters
        ----------
        bounds : (xmin, ymin, xmax, ymax) [m], ortho CRS

        Returns
        -------
        (array, extent) or None
            ``array`` float32 [degC] with NaN outside the tile; ``extent`` is
            (xmin, xmax, ymin, ymax) of the pixel edges [m]. None when no tile overlaps.
        """
        from rasterio.windows import Window

        bx0, by0, bx1, by1 = bounds
        best, best_area = None, 0.0
        for i, tile in enumerate(self.tiles):
            tb = tile.bounds
            ox = max(0.0, min(bx1, tb[2]) - max(bx0, tb[0]))
            oy = max(0.0, min(by1, tb[3]) - max(by0, tb[1]))
            if ox * oy > best_area:
                best, best_area = i, ox * oy
        if best is None:
            return None
        tile = self.tiles[best]
        t = tile.transform
        # pixel window of the box (north-up tiles: e < 0); it may reach beyond the tile
        c0 = int(math.floor((bx0 - t.c) / t.a))
        c1 = max(int(math.ceil((bx1 - t.c) / t.a)), c0 + 1)
        r0 = int(math.floor((by1 - t.f) / t.e))
        r1 = max(int(math.ceil((by0 - t.f) / t.e)), r0 + 1)
        out = np.full((r1 - r0, c1 - c0), np.nan, dtype=np.float32)
        rc0, rc1 = max(c0, 0), min(c1, tile.width)
        rr0, rr1 = max(r0, 0), min(r1, tile.height)
        if rc1 > rc0 and rr1 > rr0:
            arr = np.asarray(self.orthos.read(best, Window(rc0, rr0, rc1 - rc0, rr1 - rr0)), dtype=np.float32)
            out[rr0 - r0:rr1 - r0, rc0 - c0:rc1 - c0] = arr.reshape(rr1 - rr0, rc1 - rc0)
        extent = (t.c + c0 * t.a, t.c + c1 * t.a, t.f + r1 * t.e, t.f + r0 * t.e)
        self._fill_from_other_tiles(out, best, extent)
        return out, extent

    def _fill_from_other_tiles(self, out: np.ndarray, best: int, extent: Extent) -> None:
        """Fill NaN pixels of a crop from other tiles on the same pixel grid (tiles of one
        ortho cut at seams); tiles on another grid are left out (no resampling here)."""
        from rasterio.windows import Window

        if len(self.tiles) < 2 or not np.isnan(out).any():
            return
        t0 = self.tiles[best].transform
        for i, tile in enumerate(self.tiles):
            if i == best:
                continue
            t = tile.transform
            dc, dr = (t.c - t0.c) / t0.a, (t.f - t0.f) / t0.e
            if not (math.isclose(t.a, t0.a, rel_tol=1e-9) and math.isclose(t.e, t0.e, rel_tol=1e-9)
                    and abs(dc - round(dc)) < 1e-3 and abs(dr - round(dr)) < 1e-3):
                continue
            c0 = int(round((extent[0] - t.c) / t.a))
            r0 = int(round((extent[3] - t.f) / t.e))
            h, w = out.shape
            rc0, rc1 = max(c0, 0), min(c0 + w, tile.width)
            rr0, rr1 = max(r0, 0), min(r0 + h, tile.height)
            if rc1 <= rc0 or rr1 <= rr0:
                continue
            dst = out[rr0 - r0:rr1 - r0, rc0 - c0:rc1 - c0]
            hole = np.isnan(dst)
            if hole.any():
                arr = np.asarray(self.orthos.read(i, Window(rc0, rr0, rc1 - rc0, rr1 - rr0)), dtype=np.float32)
                dst[hole] = arr.reshape(dst.shape)[hole]
            if not np.isnan(out).any():
                return


def _overview(orthos: OrthoSet, max_px: int) -> tuple[np.ndarray, Extent]:
    """``orthos.read_overview(max_px)`` as float32 [degC] with its extent (``ThermalView.overview``)."""
    return _with_extent(*orthos.read_overview(int(max_px)))


def _with_extent(arr: np.ndarray, t: Any) -> tuple[np.ndarray, Extent]:
    """An overview mosaic as float32 [degC] with its extent from its north-up transform ``t``."""
    arr = np.asarray(arr, dtype=np.float32)
    h, w = arr.shape
    return arr, (t.c, t.c + t.a * w, t.f + t.e * h, t.f)


class OverviewDone:
    """The report's overview made beforehand (by the pipeline, from the blocks the zonal
    statistics read: :class:`pvscan.io.ortho_overview.OverviewSampler`), handed over like
    :class:`OverviewRead`: only for the same tiles (files, grids, value conversions) and size.

    Parameters
    ----------
    tiles : sequence of Tile
        The tiles it is made from.
    max_px : int
        Its longest side [px] (``[report] overview_max_px``).
    future : concurrent.futures.Future
        Gives ``(image, transform)``: the mosaic [degC] and its north-up map transform, as
        ``OrthoSet.read_overview`` gives them.
    """

    def __init__(self, tiles: Sequence[Any], max_px: int, future: Any) -> None:
        self.tiles = tuple(tiles)
        self.max_px = int(max_px)
        self._future = future

    def result(self, orthos: OrthoSet, max_px: int) -> tuple[np.ndarray, Extent] | None:
        """The overview when ``orthos`` and ``max_px`` are those it was made for, else None
        (also when making it failed: the caller then reads it itself, and meets the failure)."""
        from pvscan.errors import PvscanError

        try:
            image, transform = self._future.result()
        except (PvscanError, OSError, ValueError) as exc:
            log.debug("report: the overview made beforehand failed (%s); reading it again", exc)
            return None
        if int(max_px) != self.max_px or tuple(orthos.tiles) != self.tiles:
            return None
        return _with_extent(image, transform)


class OverviewRead:
    """The report's decimated overview of a flight's orthos, read in a background thread
    while other work (the result writers) runs: GDAL decodes without holding Python's
    interpreter lock, so the read uses the machine's second core.

    The thread opens its own handles of the tiles (a dataset handle is not shared between
    threads) and reads exactly what :meth:`ThermalView.overview` reads, so the image is the
    same; :meth:`result` hands it over only for the same tiles, units and size.

    Parameters
    ----------
    paths : sequence of path-like
        The ortho tiles.
    spec : OrthoSpec or mapping, optional
        Their units (as for :func:`open_thermal`).
    max_px : int
        Longest side of the overview [px] (``[report] overview_max_px``).
    executor : concurrent.futures.Executor
        Where the read runs.
    """

    def __init__(self, paths: Sequence[str | Path], spec: Any, max_px: int, executor: Any) -> None:
        self.paths = [Path(p) for p in paths]
        self.spec = spec
        self.max_px = int(max_px)
        self._future = executor.submit(self._read)

    def _read(self) -> tuple[tuple[Any, ...], tuple[np.ndarray, Extent]]:
        with open_thermal(self.paths, self.spec) as oset:
            return tuple(oset.tiles), _overview(oset, self.max_px)

    def result(self, orthos: OrthoSet, max_px: int) -> tuple[np.ndarray, Extent] | None:
        """The overview read for ``orthos`` at ``max_px``; None when it was read for other
        tiles, units or size, or the read failed (the caller then reads it itself and meets
        the same failure in its own thread)."""
        from pvscan.errors import PvscanError

        try:
            tiles, done = self._future.result()
        except (PvscanError, OSError, ValueError) as exc:
            log.debug("report: the overview read beforehand failed (%s); reading it again", exc)
            return None
        # the same files, grids and value conversions (Tile equality), the same size
        return done if int(max_px) == self.max_px and tuple(orthos.tiles) == tiles else None


def open_thermal(paths: Sequence[str | Path], spec: Any = None) -> OrthoSet:
    """Open ortho tiles for the report with the ortho stage's reader.

    Parameters
    ----------
    paths : sequence of path-like
    spec : OrthoSpec or mapping, optional
        ``units``, ``scale``, ``offset``, ``nodata`` of the export (default: degC as stored).

    Returns
    -------
    pvscan.io.ortho.OrthoSet
        A context manager; the caller closes it.
    """
    from pvscan.io.ortho import open_orthos

    return open_orthos([Path(p) for p in paths], spec)
