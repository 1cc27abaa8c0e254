"""Thermal orthomosaic ingest: tiles, unit conversion, nodata, windowed reads.

A flight's orthomosaic is one or more single-band GeoTIFF tiles (they may overlap) in one
projected CRS in metres. :func:`open_orthos` checks every file, keeps the rasterio
datasets open and converts raw values to *apparent* temperature [degC] once, here::

    value = raw * scale + offset            (in the manifest's units)
    degC  = value - 273.15                  (when units = "kelvin")

Pixels equal to the nodata value (the manifest's ``nodata`` overrides the file's tag),
NaN pixels, pixels masked by an internal mask band and values outside the plausible
range of the ``[zonal]`` settings become NaN.

Reads are always windowed (:meth:`OrthoSet.read`); nothing here reads a whole ortho into
memory. :meth:`OrthoSet.block_windows` yields windows aligned with the file's internal
tiling, and :meth:`OrthoSet.read_overview` gives a decimated mosaic of bounded size for
the report. The GDAL block cache is bounded by ``[zonal] gdal_cache_mb`` so memory stays
flat whatever the size of the ortho.
"""
from __future__ import annotations

import contextlib
import logging
import math
import threading
import warnings
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from os import PathLike
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
from affine import Affine
from rasterio.coords import BoundingBox
from rasterio.crs import CRS
from rasterio.enums import MaskFlags, Resampling
from rasterio.errors import NotGeoreferencedWarning, RasterioError, RasterioIOError
from rasterio.windows import Window

from pvscan.errors import OrthoError
from pvscan.io.settings import section

__all__ = ["Tile", "OrthoSet", "open_orthos", "read_window", "KELVIN_OFFSET"]

log = logging.getLogger(__name__)

#: 0 degC in kelvin [K] (ITS-90 / SI definition of the Celsius scale).
KELVIN_OFFSET = 273.15
#: Held around rasterio calls that switch warning filters (``warnings.catch_warnings`` is
#: not thread-safe: two threads inside it can restore each other's filters).
WARNINGS_LOCK = threading.RLock()


@dataclass(frozen=True)
class Tile:
    """One GeoTIFF tile of a flight's orthomosaic and how to convert its values.

    Attributes
    ----------
    index : int
        Position in :attr:`OrthoSet.tiles`.
    path : pathlib.Path
    crs : rasterio.crs.CRS
        Projected CRS in metres, the same for every tile of the set.
    transform : affine.Affine
        Pixel-to-map transform (north-up or south-up, never rotated) [m].
    width, height : int
        Size [px].
    bounds : rasterio.coords.BoundingBox
        Map extent (left, bottom, right, top) [m].
    gsd_m : float
        Ground sampling distance, the mean pixel side [m/px].
    block_shape : tuple of int
        Internal block (tile or strip) shape (rows, cols) [px].
    dtype : str
        Raw data type of the band.
    nodata : float or None
        Raw nodata value in effect (the manifest's, else the file's tag).
    scale, offset_c : float
        ``degC = raw * scale + offset_c`` (kelvin already folded into ``offset_c``).
    valid_min_c, valid_max_c : float
        Plausible apparent temperature range [degC]; values outside become NaN.
    has_mask : bool
        The file carries a per-dataset mask band that is honoured on reads.
    """

    index: int
    path: Path
    crs: CRS
    transform: Affine
    width: int
    height: int
    bounds: BoundingBox
    gsd_m: float
    block_shape: tuple[int, int]
    dtype: str
    nodata: float | None
    scale: float
    offset_c: float
    valid_min_c: float
    valid_max_c: float
    has_mask: bool = False

    @property
    def shape(self) -> tuple[int, int]:
        """(height, width) [px]."""
        return (self.height, self.width)

    @property
    def is_tiled(self) -> bool:
        """True when the file is internally tiled (not stripped)."""
        return self.block_shape[1] < self.width

    def window_transform(self, window: Window) -> Affine:
        """Map transform of a window (which may reach beyond the tile)."""
        t, c0, r0 = self.transform, window.col_off, window.row_off
        return Affine(t.a, t.b, t.c + t.a * c0 + t.b * r0, t.d, t.e, t.f + t.d * c0 + t.e * r0)


def _get(spec: Any, key: str, default: Any = None) -> Any:
    if spec is None:
        return default
    if isinstance(spec, Mapping):
        return spec.get(key, default)
    return getattr(spec, key, default)


def _as_window(window: Any) -> Window:
    if isinstance(window, Window):
        return window
    (r0, r1), (c0, c1) = window
    return Window(c0, r0, c1 - c0, r1 - r0)


def _representable(value: float, dtype: np.dtype) -> bool:
    """Whether a nodata value can occur in a band of this dtype."""
    dtype = np.dtype(dtype)
    if dtype.kind in "iu":
        info = np.iinfo(dtype)
        return float(value).is_integer() and info.min <= value <= info.max
    if dtype.kind == "f":
        return bool(np.isfinite(value)) and abs(value) <= np.finfo(dtype).max or math.isinf(value)
    return False


def _to_celsius(raw: np.ndarray, tile: Tile, mask: np.ndarray | None = None) -> np.ndarray:
    """Raw band values -> apparent temperature [degC], float32, NaN where invalid.

    ``raw`` may be modified in place (it is a fresh buffer from a read).
    """
    out = raw if raw.dtype == np.float32 else raw.astype(np.float32)
    bad = None
    nd = tile.nodata
    if nd is not None:
        nd_c = nd * tile.scale + tile.offset_c
        # a nodata value outside the plausible range is caught by the range test below
        if math.isnan(nd):
            pass  # NaN never passes the range test
        elif tile.valid_min_c <= nd_c <= tile.valid_max_c and _representable(nd, raw.dtype):
            bad = raw == raw.dtype.type(nd)
    if tile.scale != 1.0:
        np.multiply(out, np.float32(tile.scale), out=out)
    if tile.offset_c != 0.0:
        np.add(out, np.float32(tile.offset_c), out=out)
    # NaN compares False, so this also catches NaN pixels.
    ok = out >= np.float32(tile.valid_min_c)
    ok &= out <= np.float32(tile.valid_max_c)
    if bad is not None:
        ok &= ~bad
    if mask is not None:
        ok &= mask != 0
    np.copyto(out, np.float32(np.nan), where=~ok)
    return out


def _read_into(ds: Any, tile: Tile, window: Window) -> np.ndarray:
    """Read a window (possibly reaching beyond the raster: padded with NaN) [degC]."""
    window = Window(int(window.col_off), int(window.row_off), int(window.width), int(window.height))
    h, w = int(window.height), int(window.width)
    r0, c0 = int(window.row_off), int(window.col_off)
    rr0, rr1 = max(r0, 0), min(r0 + h, tile.height)
    cc0, cc1 = max(c0, 0), min(c0 + w, tile.width)
    if rr1 <= rr0 or cc1 <= cc0:
        return np.full((h, w), np.nan, dtype=np.float32)
    inner = Window(cc0, rr0, cc1 - cc0, rr1 - rr0)
    try:
        raw = ds.read(1, window=inner)
        mask = ds.read_masks(1, window=inner) if tile.has_mask else None
    except (RasterioError, RasterioIOError) as exc:  # RasterioIOError is no RasterioError before 1.4
        raise OrthoError(f"{tile.path}: cannot read window {inner}: {exc}") from None
    data = _to_celsius(raw, tile, mask)
    if (rr0, rr1, cc0, cc1) == (r0, r0 + h, c0, c0 + w):
        return data
    out = np.full((h, w), np.nan, dtype=np.float32)
    out[rr0 - r0 : rr1 - r0, cc0 - c0 : cc1 - c0] = data
    return out


def _gdal_env(cache_mb: int | None) -> rasterio.Env:
    """A rasterio environment bounding GDAL's block cache to ``cache_mb`` [MB].

    rasterio hands the value to ``GDALSetCacheMax64``, which takes bytes.
    """
    if not cache_mb:
        return rasterio.Env()
    return rasterio.Env(GDAL_CACHEMAX=int(cache_mb) * 1024 * 1024)


def read_window(tile: Tile, window: Any, *, cache_mb: int | None = None) -> np.ndarray:
    """Read one window of a tile, opening the file for this call only.

    For workers that cannot share the open datasets of an :class:`OrthoSet` (e.g. dask
    tasks on threads or processes).

    Parameters
    ----------
    tile : Tile
    window : rasterio.windows.Window or ((row0, row1), (col0, col1))
        May reach beyond the raster; outside pixels are NaN.
    cache_mb : int, optional
        GDAL block cache bound for this read [MB].

    Returns
    -------
    numpy.ndarray
        float32 apparent temperature [degC], NaN where invalid.
    """
    with _gdal_env(cache_mb):
        with WARNINGS_LOCK, warnings.catch_warnings():
            warnings.simplefilter("ignore", NotGeoreferencedWarning)
            ds = rasterio.open(tile.path)
        with ds:
            return _read_into(ds, tile, _as_window(window))


def _check_crs(path: Path, crs: CRS | None) -> None:
    if crs is None:
        raise OrthoError(f"{path}: no CRS (the ortho must be georeferenced in a projected CRS in metres)")
    if not crs.is_projected:
        raise OrthoError(f"{path}: CRS {crs.to_string()} is not projected; a projected CRS in metres is needed")
    try:
        unit, factor = crs.linear_units_factor
    except Exception:
        raise OrthoError(f"{path}: CRS {crs.to_string()} has no linear unit") from None
    if abs(float(factor) - 1.0) > 1e-9:
        raise OrthoError(f"{path}: CRS {crs.to_string()} is in {unit}, not metres")


def _open_one(path: Path, index: int, spec: Any, zonal: Mapping) -> tuple[Any, Tile]:
    if not path.exists():
        raise OrthoError(f"{path}: ortho file not found")
    if not path.is_file():
        raise OrthoError(f"{path}: not a file")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", NotGeoreferencedWarning)
            ds = rasterio.open(path)
    except (RasterioError, RasterioIOError) as exc:  # RasterioIOError is no RasterioError before 1.4
        raise OrthoError(f"{path}: not a readable raster ({str(exc).splitlines()[0][:120]})") from None
    try:
        if ds.driver not in ("GTiff", "COG"):
            raise OrthoError(f"{path}: not a GeoTIFF (GDAL reads it as {ds.driver})")
        if ds.count != 1:
            raise OrthoError(f"{path}: has {ds.count} bands; a single-band thermal ortho is needed")
        if np.dtype(ds.dtypes[0]).kind == "c":
            raise OrthoError(f"{path}: complex data type {ds.dtypes[0]} is not a temperature")
        t = ds.transform
        if t.is_identity or (t.a == 0 and t.b == 0) or (t.d == 0 and t.e == 0):
            raise OrthoError(f"{path}: no geotransform (the ortho is not georeferenced)")
        if t.b != 0 or t.d != 0:
            raise OrthoError(f"{path}: rotated geotransform is not supported (north-up rasters only)")
        _check_crs(path, ds.crs)
        units = str(_get(spec, "units", "celsius")).lower()
        if units not in ("celsius", "kelvin"):
            raise OrthoError(f"{path}: ortho units {units!r} unknown (celsius or kelvin)")
        scale = float(_get(spec, "scale", 1.0))
        offset = float(_get(spec, "offset", 0.0))
        nodata = _get(spec, "nodata", None)
        nodata = float(nodata) if nodata is not None else ds.nodata
        flags = ds.mask_flag_enums[0]
        has_mask = MaskFlags.per_dataset in flags and MaskFlags.nodata not in flags
        tile = Tile(
            index=index,
            path=path,
            crs=ds.crs,
            transform=t,
            width=ds.width,
            height=ds.height,
            bounds=ds.bounds,
            gsd_m=0.5 * (abs(t.a) + abs(t.e)),
            block_shape=(int(ds.block_shapes[0][0]), int(ds.block_shapes[0][1])),
            dtype=str(ds.dtypes[0]),
            nodata=None if nodata is None else float(nodata),
            scale=scale,
            offset_c=offset - KELVIN_OFFSET if units == "kelvin" else offset,
            valid_min_c=float(zonal["plausible_min_c"]),
            valid_max_c=float(zonal["plausible_max_c"]),
            has_mask=bool(has_mask),
        )
    except BaseException:
        ds.close()
        raise
    return ds, tile


class OrthoSet:
    """The open tiles of one flight's orthomosaic (a context manager).

    Use :func:`open_orthos` to build one. Values read are apparent temperature [degC]
    (float32, NaN where invalid).

    Attributes
    ----------
    tiles : tuple of Tile
    crs : rasterio.crs.CRS
        The common projected CRS (metres).
    gsd_m : float
        Finest ground sampling distance of the tiles [m/px].
    bounds : rasterio.coords.BoundingBox
        Union of the tile extents [m].
    """

    def __init__(self, datasets: Sequence[Any], tiles: Sequence[Tile], cache_mb: int | None = None):
        self._datasets = list(datasets)
        self.tiles: tuple[Tile, ...] = tuple(tiles)
        self.crs: CRS = self.tiles[0].crs
        self.gsd_m: float = min(t.gsd_m for t in self.tiles)
        self.cache_mb = cache_mb
        b = [t.bounds for t in self.tiles]
        self.bounds = BoundingBox(
            min(x.left for x in b), min(x.bottom for x in b), max(x.right for x in b), max(x.top for x in b)
        )

    # context manager -------------------------------------------------------------
    def __enter__(self) -> OrthoSet:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Close every dataset (idempotent)."""
        for ds in self._datasets:
            if ds is not None and not ds.closed:
                ds.close()

    @property
    def closed(self) -> bool:
        return all(ds.closed for ds in self._datasets)

    def __len__(self) -> int:
        return len(self.tiles)

    def __repr__(self) -> str:
        return f"OrthoSet({len(self.tiles)} tiles, crs={self.crs.to_string()}, gsd={self.gsd_m:.4f} m)"

    def _env(self) -> rasterio.Env:
        return _gdal_env(self.cache_mb)

    # reads -----------------------------------------------------------------------
    def read(self, tile_index: int, window: Any) -> np.ndarray:
        """Read a window of one tile as apparent temperature.

        Parameters
        ----------
        tile_index : int
        window : rasterio.windows.Window or ((row0, row1), (col0, col1))
            Pixel window; it may reach beyond the raster (outside pixels are NaN).

        Returns
        -------
        numpy.ndarray
            float32 array of shape (window.height, window.width), apparent temperature
            [degC], NaN for nodata, masked, NaN or implausible values.
        """
        ds = self._datasets[tile_index]
        if ds.closed:
            raise OrthoError(f"{self.tiles[tile_index].path}: ortho is closed")
        with self._env():
            return _read_into(ds, self.tiles[tile_index], _as_window(window))

    @contextlib.contextmanager
    def window_cache(self, chunk_px: int = 256, max_chunks: int = 128) -> Iterator[Callable[[int, Any], np.ndarray]]:
        """A ``read(tile_index, window)`` for many small windows close to each other, through
        aligned chunks converted once (:func:`pvscan.io.ortho_chunks.chunked_reader`)."""
        from pvscan.io.ortho_chunks import chunked_reader

        with self._env(), chunked_reader(self, chunk_px, max_chunks) as read:
            yield read

    @contextlib.contextmanager
    def reader(self) -> Iterator[Callable[[int, Any], np.ndarray]]:
        """A thread-safe ``read(tile_index, window)`` for worker threads.

        rasterio datasets must not be shared between threads, so each thread that calls
        the function opens its own handles (lazily); all are closed when the context
        ends. GDAL's block cache is shared (and bounded) across them.

        Yields
        ------
        callable
            ``read(tile_index, window) -> float32 ndarray`` [degC], as :meth:`read`.
        """
        local = threading.local()
        opened: list[Any] = []
        lock = threading.Lock()

        def read(tile_index: int, window: Any) -> np.ndarray:
            handles = getattr(local, "handles", None)
            if handles is None:
                handles = local.handles = {}
            ds = handles.get(tile_index)
            tile = self.tiles[tile_index]
            with self._env():
                if ds is None:
                    with WARNINGS_LOCK, warnings.catch_warnings():
                        warnings.simplefilter("ignore", NotGeoreferencedWarning)
                        ds = handles[tile_index] = rasterio.open(tile.path)
                    with lock:
                        opened.append(ds)
                return _read_into(ds, tile, _as_window(window))

        try:
            yield read
        finally:
            for ds in opened:
                ds.close()

    def read_raw(self, tile_index: int, window: Any) -> np.ndarray:
        """Read a window of raw band values without conversion (window inside the raster)."""
        with self._env():
            try:
                return self._datasets[tile_index].read(1, window=_as_window(window))
            except (RasterioError, RasterioIOError) as exc:  # a truncated or damaged file
                raise OrthoError(f"{self.tiles[tile_index].path}: cannot read window {window}: {exc}") from None

    def block_shape(self, tile_index: int, block_px: int) -> tuple[int, int]:
        """Processing block (rows, cols) [px] near ``block_px``, aligned with the file's tiling.

        For tiled files the block is a whole number of internal tiles; for stripped files a
        whole number of strips high and ``block_px`` wide.
        """
        t = self.tiles[tile_index]
        bh, bw = t.block_shape
        if bw < t.width:  # internally tiled
            rows = max(1, round(block_px / bh)) * bh
            cols = max(1, round(block_px / bw)) * bw
        else:
            rows = max(1, round(block_px / bh)) * bh
            cols = block_px
        return int(min(rows, t.height)), int(min(cols, t.width))

    def block_windows(self, tile_index: int, block_px: int) -> Iterator[Window]:
        """Windows covering a tile in row-major order, aligned with its internal tiling."""
        t = self.tiles[tile_index]
        rows, cols = self.block_shape(tile_index, block_px)
        for r0 in range(0, t.height, rows):
            for c0 in range(0, t.width, cols):
                yield Window(c0, r0, min(cols, t.width - c0), min(rows, t.height - r0))

    def read_overview(self, max_px: int = 2048) -> tuple[np.ndarray, Affine]:
        """A decimated mosaic of all tiles for display.

        Uses the files' overviews when they have them, else GDAL's decimated (nearest
        neighbour) reads; memory is bounded by ``max_px**2`` and the GDAL cache.

        Parameters
        ----------
        max_px : int
            Longest side of the result [px].

        Returns
        -------
        (numpy.ndarray, affine.Affine)
            float32 apparent temperature [degC] (NaN where no tile has data) and its
            north-up map transform [m].
        """
        if max_px < 1:
            raise ValueError("max_px must be >= 1")
        out_shape, transform, parts = self._overview_grid(max_px)
        decimated = []
        with self._env():
            for (r0, r1, c0, c1), t, ds in zip(parts, self.tiles, self._datasets):
                raw = ds.read(1, out_shape=(r1 - r0, c1 - c0), resampling=Resampling.nearest)
                mask = (
                    ds.read_masks(1, out_shape=(r1 - r0, c1 - c0), resampling=Resampling.nearest)
                    if t.has_mask
                    else None
                )
                decimated.append(_to_celsius(raw, t, mask))
        return _compose_overview(out_shape, parts, self.tiles, decimated), transform

    def _overview_grid(self, max_px: int) -> tuple[tuple[int, int], Affine, list[tuple[int, int, int, int]]]:
        """The grid of :meth:`read_overview`: its shape (rows, cols), north-up transform [m]
        and each tile's (row0, row1, col0, col1) in it."""
        b = self.bounds
        span = max(b.right - b.left, b.top - b.bottom)
        step = max(span / max_px, self.gsd_m)
        ow = max(1, int(math.ceil((b.right - b.left) / step)))
        oh = max(1, int(math.ceil((b.top - b.bottom) / step)))
        transform = Affine(step, 0.0, b.left, 0.0, -step, b.top)
        parts = []
        for t in self.tiles:
            c0 = int(round((t.bounds.left - b.left) / step))
            r0 = int(round((b.top - t.bounds.top) / step))
            c1 = min(ow, max(c0 + 1, int(round((t.bounds.right - b.left) / step))))
            r1 = min(oh, max(r0 + 1, int(round((b.top - t.bounds.bottom) / step))))
            parts.append((r0, r1, c0, c1))
        return (oh, ow), transform, parts


def _compose_overview(out_shape: tuple[int, int], parts: Sequence[tuple[int, int, int, int]],
                      tiles: Sequence[Tile], decimated: Sequence[np.ndarray]) -> np.ndarray:
    """The overview mosaic of decimated tiles [degC] (rows in file order): north-up, NaN
    where no tile has data, the first tile with data wins."""
    out = np.full(out_shape, np.nan, dtype=np.float32)
    for (r0, r1, c0, c1), t, data in zip(parts, tiles, decimated):
        if t.transform.e > 0:  # south-up tile: flip to north-up
            data = data[::-1]
        dst = out[r0:r1, c0:c1]
        fill = np.isnan(dst)
        dst[fill] = data[fill]
    return out


def _normalise_paths(paths: Any) -> list[Path]:
    if isinstance(paths, (str, PathLike)):
        return [Path(paths)]
    return [Path(p) for p in paths]


def open_orthos(paths: Any, spec: Any = None, settings: Any = None) -> OrthoSet:
    """Open the GeoTIFF tiles of one flight.

    Parameters
    ----------
    paths : path-like, sequence of path-like, or Flight
        One or more single-band GeoTIFFs of one flight (tiles may overlap). A
        :class:`pvscan.io.manifest.Flight` may be given instead, with ``spec`` omitted: its
        ``flight.orthos`` and ``ortho`` are used.
    spec : OrthoSpec or mapping, optional
        ``units`` ("celsius" | "kelvin"), ``scale``, ``offset`` (value = raw * scale +
        offset) and ``nodata`` (overrides the files' nodata tag). Default: celsius, 1, 0,
        the files' tag.
    settings : Pipeline or mapping, optional
        The pipeline (or its ``[zonal]`` section) for ``plausible_min_c``,
        ``plausible_max_c`` [degC] and ``gdal_cache_mb`` [MB]. Default: the default pipeline.

    Returns
    -------
    OrthoSet
        A context manager holding the open datasets; close it (or use ``with``).

    Raises
    ------
    OrthoError
        A file is missing, not a GeoTIFF, has more than one band, has no CRS or
        geotransform, has a rotated geotransform, a CRS that is not projected in metres,
        or a CRS different from the first tile's. The message names the file.
    """
    if spec is None and hasattr(paths, "flight") and hasattr(paths, "ortho"):
        spec = paths.ortho
        paths = paths.flight.orthos
    path_list = _normalise_paths(paths)
    if not path_list:
        raise OrthoError("flight.orthos: no ortho file given")
    zonal = section(settings, "zonal")
    cache_mb = zonal.get("gdal_cache_mb")
    datasets, tiles = [], []
    try:
        with _gdal_env(cache_mb):
            for i, p in enumerate(path_list):
                ds, tile = _open_one(p, i, spec, zonal)
                datasets.append(ds)
                tiles.append(tile)
                if tile.crs != tiles[0].crs:
                    raise OrthoError(
                        f"{p}: CRS {tile.crs.to_string()} differs from {tiles[0].path.name}'s "
                        f"{tiles[0].crs.to_string()}; all tiles of a flight must share one CRS"
                    )
    except BaseException:
        for ds in datasets:
            ds.close()
        raise
    oset = OrthoSet(datasets, tiles, cache_mb=cache_mb)
    gsds = [t.gsd_m for t in tiles]
    if max(gsds) > 1.01 * min(gsds):
        log.info("ortho tiles have different GSD (%.4f..%.4f m/px)", min(gsds), max(gsds))
    for t in tiles:
        if not t.is_tiled and t.width > 4096:
            log.info("%s is stripped, not tiled: windowed reads decode whole strips", t.path)
    log.debug("opened %r", oset)
    return oset
