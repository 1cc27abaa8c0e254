"""Thermal pixels for the report: a decimated site overview and small crops.

Reads go through an ortho set (``pvscan.ortho.OrthoSet``: ``.tiles``, ``.crs``,
``.read(tile_index, window)`` giving apparent temperature [degC] with NaN for nodata).
Memory stays bounded: the overview is read decimated (``out_shape``) tile by tile, and a
crop is one small window.

When the ortho stage's reader is not available, :class:`FileOrthos` reads the GeoTIFFs
directly with the same conventions (value = raw * scale + offset, kelvin converted to
degC, nodata to NaN).
"""
from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

log = logging.getLogger(__name__)

__all__ = ["ThermalView", "FileOrthos", "open_thermal"]

_KELVIN_OFFSET = 273.15  # [K] at 0 degC, by definition of the Celsius scale


@dataclass
class _Tile:
    path: Path
    crs: Any
    transform: Any
    width: int
    height: int
    bounds: tuple[float, float, float, float]


class FileOrthos:
    """Minimal reader of single-band thermal GeoTIFFs (used when no ortho set is given).

    Parameters
    ----------
    paths : sequence of path-like
    units : {"celsius", "kelvin"}
    scale, offset : float
        value = raw * scale + offset, in ``units``.
    nodata : float, optional
        Overrides the file's nodata tag.
    """

    def __init__(self, paths: Sequence[str | Path], units: str = "celsius", scale: float = 1.0,
                 offset: float = 0.0, nodata: float | None = None):
        import rasterio

        self._datasets = []
        self.tiles: list[_Tile] = []
        self.units, self.scale, self.offset, self.nodata = units, scale, offset, nodata
        try:
            for p in paths:
                ds = rasterio.open(p)
                self._datasets.append(ds)
                b = ds.bounds
                self.tiles.append(_Tile(Path(p), ds.crs, ds.transform, ds.width, ds.height,
                                        (b.left, b.bottom, b.right, b.top)))
        except Exception:
            self.close()
            raise
        self.crs = self.tiles[0].crs if self.tiles else None

    def _convert(self, raw: np.ndarray, ds) -> np.ndarray:
        nod = self.nodata if self.nodata is not None else ds.nodata
        out = raw.astype(np.float32) * np.float32(self.scale) + np.float32(self.offset)
        if nod is not None and math.isfinite(nod):
            out[raw == nod] = np.nan
        if self.units == "kelvin":
            out -= np.float32(_KELVIN_OFFSET)
        return out

    def read(self, tile_index: int, window, out_shape: tuple[int, int] | None = None) -> np.ndarray:
        from rasterio.enums import Resampling

        ds = self._datasets[tile_index]
        kw = {"window": window}
        if out_shape is not None:
            kw.update(out_shape=out_shape, resampling=Resampling.nearest)
        return self._convert(ds.read(1, **kw), ds)

    def close(self) -> None:
        for ds in self._datasets:
            ds.close()
        self._datasets = []

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def _tile_attr(tile, name):
    return getattr(tile, name) if not isinstance(tile, dict) else tile[name]


class ThermalView:
    """Overview and crops in the ortho CRS from an ortho set.

    Parameters
    ----------
    orthos : OrthoSet-like
        Has ``tiles`` (each with ``transform``, ``width``, ``height``, ``bounds``),
        ``crs`` and ``read(tile_index, window)``.
    """

    def __init__(self, orthos):
        self.orthos = orthos
        self.tiles = list(orthos.tiles)
        self.crs = getattr(orthos, "crs", None) or _tile_attr(self.tiles[0], "crs")
        bounds = np.array([tuple(_tile_attr(t, "bounds")) for t in self.tiles], dtype=float)
        self.bounds = (bounds[:, 0].min(), bounds[:, 1].min(), bounds[:, 2].max(), bounds[:, 3].max())
        self.gsd_m = min(abs(_tile_attr(t, "transform").a) for t in self.tiles)

    # ------------------------------------------------------------------ overview
    def overview(self, max_px: int, progress=None) -> tuple[np.ndarray, tuple[float, float, float, float]]:
        """Decimated mosaic of all tiles.

        Returns
        -------
        array : float32 ndarray (rows, cols)
            Apparent temperature [degC], NaN where no tile has data.
        extent : tuple
            (xmin, xmax, ymin, ymax) [m] in the ortho CRS (matplotlib ``imshow`` order).
        """
        from rasterio.windows import Window

        if hasattr(self.orthos, "read_overview"):  # the ortho stage's decimated mosaic
            arr, t = self.orthos.read_overview(int(max_px))
            arr = np.asarray(arr, dtype=np.float32)
            h, w = arr.shape
            if progress is not None:
                progress("report overview", 1, 1)
            return arr, (t.c, t.c + t.a * w, t.f + t.e * h, t.f)
        xmin, ymin, xmax, ymax = self.bounds
        px = max((xmax - xmin), (ymax - ymin)) / max(int(max_px), 1)
        px = max(px, self.gsd_m)
        ncols = max(1, int(math.ceil((xmax - xmin) / px)))
        nrows = max(1, int(math.ceil((ymax - ymin) / px)))
        mosaic = np.full((nrows, ncols), np.nan, dtype=np.float32)
        for i, tile in enumerate(self.tiles):
            tb = _tile_attr(tile, "bounds")
            c0 = int(round((tb[0] - xmin) / px))
            r0 = int(round((ymax - tb[3]) / px))
            w = max(1, min(ncols - c0, int(round((tb[2] - tb[0]) / px))))
            h = max(1, min(nrows - r0, int(round((tb[3] - tb[1]) / px))))
            win = Window(0, 0, _tile_attr(tile, "width"), _tile_attr(tile, "height"))
            arr = self._read_decimated(i, win, (h, w))
            dst = mosaic[r0:r0 + h, c0:c0 + w]
            fill = np.isnan(dst) & np.isfinite(arr)
            dst[fill] = arr[fill]
            if progress is not None:
                progress("report overview", i + 1, len(self.tiles))
        extent = (xmin, xmin + ncols * px, ymax - nrows * px, ymax)
        return mosaic, extent

    def _read_decimated(self, i: int, window, shape: tuple[int, int]) -> np.ndarray:
        reader = self.orthos
        try:
            return np.asarray(reader.read(i, window, out_shape=shape), dtype=np.float32)
        except TypeError:
            pass
        # a reader without out_shape: read strided rows block by block (bounded memory)
        from rasterio.windows import Window

        h, w = shape
        width, height = int(window.width), int(window.height)
        rows = np.minimum((np.arange(h) + 0.5) * height / h, height - 1).astype(int)
        cols = np.minimum((np.arange(w) + 0.5) * width / w, width - 1).astype(int)
        out = np.full((h, w), np.nan, dtype=np.float32)
        for k, r in enumerate(rows):
            line = np.asarray(reader.read(i, Window(0, int(r), width, 1)), dtype=np.float32)
            out[k] = line.reshape(-1)[cols]
        return out

    # ------------------------------------------------------------------ crops
    def crop(self, bounds: tuple[float, float, float, float]) -> tuple[np.ndarray, tuple] | None:
        """Full-resolution pixels of a map box from the tile that covers it best.

        Parameters
        ----------
        bounds : (xmin, ymin, xmax, ymax) [m], ortho CRS

        Returns
        -------
        (array, extent) or None
            ``array`` float32 [degC] with NaN outside the tile; ``extent`` is
            (xmin, xmax, ymin, ymax) of the pixel edges. None when no tile overlaps.
        """
        from rasterio.windows import Window

        bx0, by0, bx1, by1 = bounds
        best, best_area = None, 0.0
        for i, tile in enumerate(self.tiles):
            tb = _tile_attr(tile, "bounds")
            ox = max(0.0, min(bx1, tb[2]) - max(bx0, tb[0]))
            oy = max(0.0, min(by1, tb[3]) - max(by0, tb[1]))
            if ox * oy > best_area:
                best, best_area = i, ox * oy
        if best is None:
            return None
        tile = self.tiles[best]
        t = _tile_attr(tile, "transform")
        width, height = _tile_attr(tile, "width"), _tile_attr(tile, "height")
        # requested window in pixel indices (may extend beyond the tile)
        c0 = int(math.floor((bx0 - t.c) / t.a))
        c1 = int(math.ceil((bx1 - t.c) / t.a))
        r0 = int(math.floor((by1 - t.f) / t.e))
        r1 = int(math.ceil((by0 - t.f) / t.e))
        c1, r1 = max(c1, c0 + 1), max(r1, r0 + 1)
        out = np.full((r1 - r0, c1 - c0), np.nan, dtype=np.float32)
        rc0, rc1 = max(c0, 0), min(c1, width)
        rr0, rr1 = max(r0, 0), min(r1, height)
        if rc1 > rc0 and rr1 > rr0:
            arr = np.asarray(self.orthos.read(best, Window(rc0, rr0, rc1 - rc0, rr1 - rr0)),
                             dtype=np.float32)
            out[rr0 - r0:rr1 - r0, rc0 - c0:rc1 - c0] = arr.reshape(rr1 - rr0, rc1 - rc0)
        extent = (t.c + c0 * t.a, t.c + c1 * t.a, t.f + r1 * t.e, t.f + r0 * t.e)
        return out, extent


def open_thermal(paths: Sequence[Path], spec: Any = None):
    """Open ortho tiles for the report: the ortho stage's reader when present, else ours.

    Parameters
    ----------
    paths : sequence of Path
    spec : OrthoSpec-like or mapping, optional
        ``units``, ``scale``, ``offset``, ``nodata`` of the export.

    Returns
    -------
    A context-manager ortho set.
    """
    def _get(name, default):
        if spec is None:
            return default
        if isinstance(spec, dict):
            return spec.get(name, default) if spec.get(name) is not None else default
        val = getattr(spec, name, default)
        return default if val is None else val

    try:
        from pvscan import ortho as _ortho  # the ortho stage's reader
    except ImportError:
        _ortho = None
    if _ortho is not None and hasattr(_ortho, "open_orthos"):
        return _ortho.open_orthos(list(paths), spec)
    return FileOrthos(paths, units=str(_get("units", "celsius")), scale=float(_get("scale", 1.0)),
                      offset=float(_get("offset", 0.0)), nodata=_get("nodata", None))
