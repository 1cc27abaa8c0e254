"""Zonal statistics: per module, per cell and per bypass-diode substring, in one pass.

Method
------
The raster is processed block by block (blocks aligned with the file's internal tiling,
``[zonal] block_px`` in size). Each module is assigned to the block that contains the
centre of its measuring footprint; the window read for a block is enlarged to contain the
bounding boxes of all its modules, so no state crosses blocks and memory is bounded by
the block size. In each window:

1. the modules' footprints (shrunk by the edge margins, grown by a quarter pixel so no
   pixel centre on the boundary is lost) are burnt as local labels with
   :func:`rasterio.features.rasterize`;
2. the labelled pixel centres are mapped to module-local ``(u, v)`` with per-label affine
   coefficients (gathered by label); pixels outside ``[mu, 1-mu] x [mv, 1-mv]`` are
   dropped, so the footprint is exactly the pixel centres of the shrunk frame;
3. cell ``(floor(u * n_along), floor(v * n_across))`` and substring
   ``floor(v * bypass_diodes)`` indices are computed;
4. values are quantised (``[zonal] quantum_k``, 0.01 K) and combined with the group id
   into one integer key (int32 when it fits, else int64); one sort per grouping
   (module, cell, substring) yields every group's order statistics, read with linear
   interpolation between order statistics (the default of :func:`numpy.percentile`);
   counts, means and standard deviations come from :func:`numpy.bincount`.

There are no per-polygon loops. Blocks are visited in strips of a few block columns so
the tiles neighbouring windows share are still in GDAL's bounded block cache, and are
processed on ``[zonal] workers`` threads (each with its own dataset handles; results are
merged in block order, so they do not depend on the number of threads). Memory is
bounded by ``workers`` blocks plus the result arrays (12 bytes per cell of each module).

A module seen by several tiles is measured from the tile with the most valid pixels
(ties: the lower tile index). All temperatures are *apparent* [degC], as the ortho holds
them; :mod:`pvscan.physics.radiometry` converts them afterwards. Footprints of different modules
should not overlap (as in a real layout); where they do, a pixel goes to the later module.
"""
from __future__ import annotations

import logging
from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from affine import Affine
from rasterio.windows import Window

from pvscan.io.layout import FRAME_COLUMNS
from pvscan.io.ortho import OrthoSet, Tile
from pvscan.io.ortho_overview import OverviewSampler
from pvscan.io.settings import section
from pvscan.measure._memory import release_freed_memory
from pvscan.measure.zonal_window import _BlockResult, _frame_corners, _measure, measure_window

__all__ = ["ZonalStats", "zonal_stats", "measure_window", "TABLE_COLUMNS"]

log = logging.getLogger(__name__)

TABLE_COLUMNS = [
    "t_mean_c",
    "t_median_c",
    "t_p95_c",
    "t_max_c",
    "t_min_c",
    "t_std_k",
    "valid_fraction",
    "n_pixels",
    "tile",
]


#: Block columns per strip of the processing order (see ``_plan``).
_STRIP_BLOCKS = 4


@dataclass
class ZonalStats:
    """Statistics of the apparent temperature of each module.

    Attributes
    ----------
    table : pandas.DataFrame
        Aligned with the modules (same index): ``t_mean_c``, ``t_median_c``, ``t_p95_c``,
        ``t_max_c``, ``t_min_c`` [degC], ``t_std_k`` [K] (population standard deviation),
        ``valid_fraction`` [-] (valid pixels / pixel centres in the shrunk footprint),
        ``n_pixels`` (valid pixels measured) and ``tile`` (index of the tile measured, -1
        when the module is outside every tile). NaN statistics where no pixel is valid.
    cell_median, cell_p95 : numpy.ndarray
        float32 (n_modules, n_along, n_across) [degC], NaN where a cell has no valid
        pixel; cell (i, j) = (floor(u * n_along), floor(v * n_across)).
    cell_count : numpy.ndarray
        int32 (n_modules, n_along, n_across): valid pixels per cell.
    sub_median, sub_p95 : numpy.ndarray
        float32 (n_modules, bypass_diodes) [degC]; substring k = floor(v * bypass_diodes),
        the strip running the full length of the module.
    shift : tuple of float
        (dx, dy) [m] added to the frames before measuring.
    quantum_k : float
        Quantisation step of the order statistics [K].
    """

    table: pd.DataFrame
    cell_median: np.ndarray
    cell_p95: np.ndarray
    cell_count: np.ndarray
    sub_median: np.ndarray
    sub_p95: np.ndarray
    shift: tuple[float, float] = (0.0, 0.0)
    quantum_k: float = 0.01
    settings: Mapping = field(default_factory=dict)

    @property
    def n_along(self) -> int:
        return int(self.cell_median.shape[1])

    @property
    def n_across(self) -> int:
        return int(self.cell_median.shape[2])

    @property
    def bypass_diodes(self) -> int:
        return int(self.sub_median.shape[1])

    def __len__(self) -> int:
        return len(self.table)


def _grid(module_spec: Any) -> tuple[int, int, int]:
    """(n_along, n_across, bypass_diodes) of a ModuleSpec-like object or mapping."""

    def get(key: str, default: Any = None) -> Any:
        if isinstance(module_spec, Mapping):
            return module_spec.get(key, default)
        return getattr(module_spec, key, default)

    n_along = get("n_along")
    if n_along is None:
        n_along = int(get("cells_along")) * (2 if get("half_cut", False) else 1)
    n_across = get("n_across")
    if n_across is None:
        n_across = int(get("cells_across"))
    nsub = int(get("bypass_diodes"))
    n_along, n_across = int(n_along), int(n_across)
    if n_along < 1 or n_across < 1 or nsub < 1:
        raise ValueError(f"module cell grid {n_along} x {n_across} with {nsub} substrings is not valid")
    return n_along, n_across, nsub


def _frames(modules: Any, shift: tuple[float, float]) -> np.ndarray:
    """(n, 6) float64 frames (fx0, fy0, fux, fuy, fvx, fvy) [m], shifted by (dx, dy)."""
    if isinstance(modules, np.ndarray):
        fr = np.array(modules, dtype=np.float64, copy=True).reshape(-1, 6)
    else:
        missing = [c for c in FRAME_COLUMNS if c not in modules.columns]
        if missing:
            raise KeyError(f"modules frame lacks the module-local frame columns {missing}")
        fr = modules[FRAME_COLUMNS].to_numpy(dtype=np.float64, copy=True)
    fr[:, 0] += float(shift[0])
    fr[:, 1] += float(shift[1])
    return fr


@dataclass(frozen=True)
class _Job:
    tile: int
    window: Window
    modules: np.ndarray  # global indices


def _plan(orthos: OrthoSet, fr: np.ndarray, margins: tuple[float, float], block_px: int) -> list[_Job]:
    """Assign modules to blocks of each tile they touch; one job per non-empty block."""
    mu, mv = margins
    ok = np.isfinite(fr).all(axis=1)
    x, y = _frame_corners(np.where(ok[:, None], fr, 0.0), mu, 1 - mu, mv, 1 - mv)
    cx, cy = x.mean(axis=1), y.mean(axis=1)
    jobs: list[_Job] = []
    for t in orthos.tiles:
        tr = t.transform
        cols = (x - tr.c) / tr.a
        rows = (y - tr.f) / tr.e
        c0 = np.floor(cols.min(axis=1)).astype(np.int64) - 1
        c1 = np.ceil(cols.max(axis=1)).astype(np.int64) + 1
        r0 = np.floor(rows.min(axis=1)).astype(np.int64) - 1
        r1 = np.ceil(rows.max(axis=1)).astype(np.int64) + 1
        touches = ok & (c1 > 0) & (c0 < t.width) & (r1 > 0) & (r0 < t.height)
        too_big = touches & (((c1 - c0) > 8 * block_px) | ((r1 - r0) > 8 * block_px))
        if too_big.any():
            log.warning(
                "%d module frame(s) larger than %d px skipped on %s (first: module index %d)",
                int(too_big.sum()), 8 * block_px, t.path.name, int(np.flatnonzero(too_big)[0]),
            )  # fmt: skip
            touches &= ~too_big
        sel = np.flatnonzero(touches)
        if sel.size == 0:
            continue
        bh, bw = orthos.block_shape(t.index, block_px)
        nbr = -(-t.height // bh)
        nbc = -(-t.width // bw)
        ccol = (cx[sel] - tr.c) / tr.a
        crow = (cy[sel] - tr.f) / tr.e
        bi = np.clip(np.floor(crow / bh).astype(np.int64), 0, nbr - 1)
        bj = np.clip(np.floor(ccol / bw).astype(np.int64), 0, nbc - 1)
        # strip-major order: strips of _STRIP_BLOCKS block columns, row by row inside a
        # strip, so the halo tiles a window shares with its neighbours are still in
        # GDAL's (bounded) block cache whatever the width of the ortho
        bid = (bj // _STRIP_BLOCKS) * (nbr * _STRIP_BLOCKS) + bi * _STRIP_BLOCKS + bj % _STRIP_BLOCKS
        order = np.argsort(bid, kind="stable")
        sel, bid = sel[order], bid[order]
        cuts = np.flatnonzero(np.diff(bid)) + 1
        starts = np.concatenate([[0], cuts])
        ends = np.concatenate([cuts, [sel.size]])
        wr0 = np.minimum.reduceat(r0[sel], starts)
        wr1 = np.maximum.reduceat(r1[sel], starts)
        wc0 = np.minimum.reduceat(c0[sel], starts)
        wc1 = np.maximum.reduceat(c1[sel], starts)
        for k in range(starts.size):
            win = Window(int(wc0[k]), int(wr0[k]), int(wc1[k] - wc0[k]), int(wr1[k] - wr0[k]))
            jobs.append(_Job(t.index, win, sel[starts[k] : ends[k]]))
    return jobs


class _Accumulator:
    """Keeps, for each module, the result of the tile with the most valid pixels."""

    def __init__(self, n: int, grid: tuple[int, int, int]):
        n_along, n_across, nsub = grid
        ncell = n_along * n_across
        self.best = np.full(n, -1, np.int64)
        self.tile = np.full(n, -1, np.int64)
        self.n_fp = np.zeros(n, np.int64)
        self.cols = {k: np.full(n, np.nan) for k in ("mean", "std", "median", "p95", "tmin", "tmax")}
        self.cell_median = np.full((n, ncell), np.nan, np.float32)
        self.cell_p95 = np.full((n, ncell), np.nan, np.float32)
        self.cell_count = np.zeros((n, ncell), np.int32)
        self.sub_median = np.full((n, nsub), np.nan, np.float32)
        self.sub_p95 = np.full((n, nsub), np.nan, np.float32)

    def merge(self, tile: int, r: _BlockResult) -> None:
        # most valid pixels wins; ties go to the lower tile index, whatever the merge order
        best = self.best[r.index]
        better = (r.n_valid > best) | ((r.n_valid == best) & (tile < self.tile[r.index]))
        if not better.any():
            return
        gi = r.index[better]
        self.best[gi] = r.n_valid[better]
        self.tile[gi] = tile
        self.n_fp[gi] = r.n_fp[better]
        for k in self.cols:
            self.cols[k][gi] = getattr(r, k)[better]
        self.cell_median[gi] = r.cell_median[better]
        self.cell_p95[gi] = r.cell_p95[better]
        self.cell_count[gi] = r.cell_count[better]
        self.sub_median[gi] = r.sub_median[better]
        self.sub_p95[gi] = r.sub_p95[better]


def _run_block(reader: Callable[[int, Window], np.ndarray], job: _Job, fr: np.ndarray, grid: tuple[int, int, int],
               margins: tuple[float, float], quantum_k: float, transform: Affine,
               overview: OverviewSampler | None = None) -> _BlockResult:
    data = reader(job.tile, job.window)
    if overview is not None:
        overview.take(job.tile, job.window, data)
    return _measure(data, transform, fr[job.modules], grid, margins, quantum_k, index=job.modules)


def _block_task(tile: Tile, window: Window, fr_sub: np.ndarray, index: np.ndarray, grid: tuple[int, int, int],
                margins: tuple[float, float], quantum_k: float, cache_mb: int | None) -> _BlockResult:
    """One block as a task (opens the file itself; see :func:`pvscan.tasks.run_tasks`)."""
    from pvscan.io.ortho import read_window

    data = read_window(tile, window, cache_mb=cache_mb)
    return _measure(data, tile.window_transform(window), fr_sub, grid, margins, quantum_k, index=index)


def zonal_stats(
    orthos: OrthoSet,
    modules: pd.DataFrame | np.ndarray,
    module_spec: Any,
    settings: Mapping[str, Any] | None = None,
    *,
    shift: tuple[float, float] = (0.0, 0.0),
    progress: Callable[[str, int, int], None] | None = None,
    scheduler: Any = None,
    workers: int | None = None,
    prefetch: bool = True,
    overview: OverviewSampler | None = None,
) -> ZonalStats:
    """Apparent-temperature statistics of every module, cell and substring.

    Parameters
    ----------
    orthos : pvscan.io.ortho.OrthoSet
        The open ortho tiles of the flight (values in apparent temperature [degC]).
    modules : geopandas.GeoDataFrame or pandas.DataFrame
        One row per module with the module-local frame columns ``fx0, fy0, fux, fuy,
        fvx, fvy`` [m] in the ortho's CRS (see :mod:`pvscan.io.layout`).
    module_spec : ModuleSpec or mapping
        Gives ``n_along`` / ``n_across`` (or ``cells_along``, ``cells_across``,
        ``half_cut``) and ``bypass_diodes``.
    settings : Pipeline or mapping, optional
        The pipeline or its ``[zonal]`` section: ``edge_margin_u``, ``edge_margin_v`` [-],
        ``block_px`` [px], ``quantum_k`` [K], ``workers``. Default: the default pipeline.
    shift : (float, float)
        (dx, dy) [m] added to every frame before measuring (co-registration result).
    progress : callable, optional
        Called as ``progress("zonal", done_blocks, total_blocks)``.
    scheduler : None, {"synchronous", "threads", "processes"}, address or distributed.Client, optional
        None: the single-machine block loop. Otherwise each block is a task
        (:func:`pvscan.tasks.run_tasks`) that opens the file itself: in this process, on a
        pool of local threads or processes, or on a Dask distributed cluster (a
        ``tcp://host:port`` address or a connected ``Client``; the workers must see the
        ortho's files by the same paths). Results are identical on every scheduler.
    workers : int, optional
        Threads of the single-machine path (default ``[zonal] workers``). With more than
        one, blocks are read and reduced on a thread pool (GDAL decoding and numpy's
        heavy loops release the GIL); results are identical to one thread.
    prefetch : bool
        One worker only: read the next block on a helper thread while the current one
        is reduced.
    overview : pvscan.io.ortho_overview.OverviewSampler, optional
        Keeps the report's decimated overview pixels of every block read (this process's
        loops only; not with ``scheduler``), so the overview needs no second decoding of
        those blocks.

    Returns
    -------
    ZonalStats

    Notes
    -----
    The measuring footprint of a module is the set of pixel centres with local
    coordinates u in [mu, 1 - mu] and v in [mv, 1 - mv] (the edge margins). Medians and
    95th percentiles are computed on values quantised to ``quantum_k`` and interpolated
    linearly between order statistics, as :func:`numpy.percentile` does by default;
    minima and maxima are quantised too; means and standard deviations are exact.
    """
    cfg = section(settings, "zonal")
    mu = float(cfg["edge_margin_u"])
    mv = float(cfg["edge_margin_v"])
    block_px = int(cfg["block_px"])
    quantum_k = float(cfg["quantum_k"])
    workers = int(cfg["workers"] if workers is None else workers)
    grid = _grid(module_spec)
    fr = _frames(modules, shift)
    n = len(fr)
    margins = (mu, mv)
    jobs = _plan(orthos, fr, margins, block_px)
    total = len(jobs)
    acc = _Accumulator(n, grid)
    log.debug("zonal: %d modules, %d blocks on %d tile(s)", n, total, len(orthos.tiles))
    if progress is not None:
        progress("zonal", 0, total)

    if scheduler is None:
        tiles = orthos.tiles

        def transform_of(job: _Job) -> Affine:
            return tiles[job.tile].window_transform(job.window)

        if workers > 1 and total > 1:
            # blocks on a pool of threads, each with its own dataset handles; numpy and
            # GDAL release the GIL in the heavy parts. Results are merged in job order.
            def task(job: _Job) -> _BlockResult:
                data = read(job.tile, job.window)
                if overview is not None:
                    overview.take(job.tile, job.window, data)
                return _measure(data, transform_of(job), fr[job.modules], grid, margins, quantum_k, job.modules)

            with orthos.reader() as read, ThreadPoolExecutor(workers, thread_name_prefix="pvscan-zonal") as pool:
                for k, (job, r) in enumerate(zip(jobs, pool.map(task, jobs))):
                    acc.merge(job.tile, r)
                    if progress is not None:
                        progress("zonal", k + 1, total)
        elif prefetch and total > 1:
            with ThreadPoolExecutor(max_workers=1, thread_name_prefix="pvscan-read") as pool:
                nxt = pool.submit(orthos.read, jobs[0].tile, jobs[0].window)
                for k, job in enumerate(jobs):
                    data = nxt.result()
                    if overview is not None:
                        overview.take(job.tile, job.window, data)
                    if k + 1 < total:
                        nxt = pool.submit(orthos.read, jobs[k + 1].tile, jobs[k + 1].window)
                    r = _measure(data, transform_of(job), fr[job.modules], grid, margins, quantum_k, job.modules)
                    del data
                    acc.merge(job.tile, r)
                    if progress is not None:
                        progress("zonal", k + 1, total)
        else:
            for k, job in enumerate(jobs):
                r = _run_block(orthos.read, job, fr, grid, margins, quantum_k, transform_of(job), overview)
                acc.merge(job.tile, r)
                if progress is not None:
                    progress("zonal", k + 1, total)
    else:
        from pvscan.tasks import run_tasks

        # tasks on local cores or a Dask cluster: each opens the file itself; results merge
        # in any order (the accumulator's choice does not depend on it)
        sched = "threads" if scheduler == "dask" else scheduler
        args = [(orthos.tiles[j.tile], j.window, fr[j.modules], j.modules, grid, margins, quantum_k, orthos.cache_mb)
                for j in jobs]
        for done, (k, r) in enumerate(run_tasks(_block_task, args, sched),
                                      start=1):
            acc.merge(jobs[k].tile, r)
            if progress is not None:
                progress("zonal", done, total)

    out = _finish(acc, modules, n, grid, (float(shift[0]), float(shift[1])), quantum_k, cfg)
    del acc
    # the blocks' arrays freed on the worker threads stay resident in their arenas otherwise
    release_freed_memory()
    return out


def _finish(acc: _Accumulator, modules: Any, n: int, grid: tuple[int, int, int], shift: tuple[float, float],
            quantum_k: float, cfg: Mapping[str, Any]) -> ZonalStats:
    n_along, n_across, nsub = grid
    n_valid = np.maximum(acc.best, 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        vf = np.where(acc.n_fp > 0, n_valid / np.maximum(acc.n_fp, 1), 0.0)
    index = modules.index if hasattr(modules, "index") and not isinstance(modules, np.ndarray) else None
    table = pd.DataFrame(
        {
            "t_mean_c": acc.cols["mean"],
            "t_median_c": acc.cols["median"],
            "t_p95_c": acc.cols["p95"],
            "t_max_c": acc.cols["tmax"],
            "t_min_c": acc.cols["tmin"],
            "t_std_k": acc.cols["std"],
            "valid_fraction": vf,
            "n_pixels": n_valid.astype(np.int64),
            "tile": acc.tile.astype(np.int64),
        },
        index=index,
    )
    n_out = int((acc.tile < 0).sum())
    if n_out:
        log.info("zonal: %d of %d modules outside every ortho tile", n_out, n)
    return ZonalStats(
        table=table,
        cell_median=acc.cell_median.reshape(n, n_along, n_across),
        cell_p95=acc.cell_p95.reshape(n, n_along, n_across),
        cell_count=acc.cell_count.reshape(n, n_along, n_across),
        sub_median=acc.sub_median,
        sub_p95=acc.sub_p95,
        shift=shift,
        quantum_k=quantum_k,
        settings=dict(cfg),
    )
