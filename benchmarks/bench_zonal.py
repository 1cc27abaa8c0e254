"""Benchmark of the zonal statistics stage on a large synthetic flight.

Builds (once, into ``.bench/`` or ``--dir``; never into git) a synthetic orthomosaic of
rows of fixed-tilt tables, about 25,000 portrait modules on ~60 Mpx at 5 cm GSD
(``--scale 4``: four times the raster, 100,000 modules), written window by window as a
tiled, deflate-compressed float32 GeoTIFF, so building it needs little memory too.

It then measures, each in a fresh subprocess so every peak memory is that stage's own:

* ``read``  - the time just to read and decode the raster: windowed reads of every block;
* ``stats`` - :func:`pvscan.measure.zonal.zonal_stats` (module + cell + substring statistics,
  including the reads) with the pipeline's ``[zonal] workers`` threads, and again with
  one thread (plus its read-ahead thread);

and prints a table: times, the ratio stats / read, the peak resident memory (``VmHWM``,
which includes GDAL's C allocations and the interpreter) and the peak of Python/numpy
allocations seen by ``tracemalloc``.

Usage::

    python benchmarks/bench_zonal.py                 # scale 1
    python benchmarks/bench_zonal.py --scale 4       # scale 1 and 4: memory stays flat
    python benchmarks/bench_zonal.py --scale 4 --no-scale-1
"""
from __future__ import annotations

import argparse
import json
import math
import os
import resource
import subprocess
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

# ---------------------------------------------------------------- synthetic flight
GSD = 0.05  # [m/px]
CRS = "EPSG:32633"  # an invented site in UTM zone 33N
ORIGIN = (480_000.0, 5_300_000.0)
MODULE_L, MODULE_W = 2.094, 1.038  # [m] (invented 72-cell datasheet)
ROWS_PER_TABLE, COLS_PER_TABLE = 2, 24
GAP = 0.02  # between modules [m]
TABLE_GAP = 1.0  # between tables of a row [m]
ROW_PITCH = 10.0  # between table rows [m]
PLANT_ROTATION_DEG = 3.0  # the rows are not aligned with the raster grid
BASE_TABLES = (14, 38)  # tables per row, rows of tables at scale 1 (25,536 modules)
BUILD_ROWS = 512  # rows per written window


def plant_frames(scale: int) -> np.ndarray:
    """Module-local frames (n, 6) of the synthetic plant [m] (u up the slope, v along the row)."""
    k = int(round(math.sqrt(scale)))
    nt_x, nt_y = BASE_TABLES[0] * k, BASE_TABLES[1] * k
    table_len = COLS_PER_TABLE * MODULE_W + (COLS_PER_TABLE - 1) * GAP
    ti, tj, r, c = np.meshgrid(
        np.arange(nt_y), np.arange(nt_x), np.arange(ROWS_PER_TABLE), np.arange(COLS_PER_TABLE), indexing="ij"
    )
    # plant coordinates of each module's lower-right corner (u = +y, v = -x: right-handed)
    px = 5.0 + tj * (table_len + TABLE_GAP) + (c + 1) * MODULE_W + c * GAP
    py = 5.0 + ti * ROW_PITCH + r * (MODULE_L + GAP)
    th = math.radians(PLANT_ROTATION_DEG)
    ct, st = math.cos(th), math.sin(th)
    x0 = ORIGIN[0] + px.ravel() * ct - py.ravel() * st
    y0 = ORIGIN[1] - 20.0 - (nt_y * ROW_PITCH) + px.ravel() * st + py.ravel() * ct
    n = x0.size
    ux, uy = -MODULE_L * st * np.ones(n), MODULE_L * ct * np.ones(n)
    vx, vy = -MODULE_W * ct * np.ones(n), -MODULE_W * st * np.ones(n)
    return np.stack([x0, y0, ux, uy, vx, vy], axis=1)


def _raster_grid(frames: np.ndarray):
    u = np.array([0.0, 1.0, 1.0, 0.0])
    v = np.array([0.0, 0.0, 1.0, 1.0])
    x = frames[:, 0:1] + u * frames[:, 2:3] + v * frames[:, 4:5]
    y = frames[:, 1:2] + u * frames[:, 3:4] + v * frames[:, 5:6]
    left, top = math.floor(x.min() - 5.0), math.ceil(y.max() + 5.0)
    width = int(math.ceil((x.max() + 5.0 - left) / GSD))
    height = int(math.ceil((top - (y.min() - 5.0)) / GSD))
    return left, top, width, height, x, y


def build(scale: int, out: Path, seed: int = 7) -> dict:
    """Write the synthetic ortho and frames of one scale into ``out`` (skipped when present)."""
    import rasterio
    import shapely
    from affine import Affine
    from rasterio.features import rasterize

    out.mkdir(parents=True, exist_ok=True)
    tif, npy, meta_path = out / "thermal.tif", out / "frames.npy", out / "meta.json"
    if tif.exists() and npy.exists() and meta_path.exists():
        return json.loads(meta_path.read_text())
    frames = plant_frames(scale)
    left, top, width, height, x, y = _raster_grid(frames)
    transform = Affine(GSD, 0.0, left, 0.0, -GSD, top)
    polys = shapely.polygons(np.stack([x, y], axis=-1))
    rng = np.random.default_rng(seed)
    hot = rng.random(len(frames)) < 0.02  # a few warm modules, for texture
    profile = dict(
        driver="GTiff", width=width, height=height, count=1, dtype="float32", crs=CRS, transform=transform,
        tiled=True, blockxsize=256, blockysize=256, compress="deflate", predictor=3, zlevel=1,
        nodata=-9999.0, BIGTIFF="IF_SAFER",
    )  # fmt: skip
    t0 = time.perf_counter()
    tmp = tif.with_suffix(".part.tif")
    # module polygons sorted by their top, to pick those touching each window cheaply
    ymax, ymin = y.max(axis=1), y.min(axis=1)
    with rasterio.open(tmp, "w", **profile) as ds:
        for r0 in range(0, height, BUILD_ROWS):
            h = min(BUILD_ROWS, height - r0)
            wtop = top - r0 * GSD
            wbot = wtop - h * GSD
            sel = np.flatnonzero((ymin < wtop) & (ymax > wbot))
            wt = Affine(GSD, 0.0, left, 0.0, -GSD, wtop)
            lab = np.zeros((h, width), np.int32)
            if sel.size:
                lab = rasterize(zip(polys[sel], (sel + 1).tolist()), out_shape=(h, width), transform=wt, dtype="int32")
            cols = np.arange(width, dtype=np.float32)
            ground = 38.0 + 2.0 * np.sin(cols / 900.0)[None, :]
            base = np.where(lab > 0, 31.0 + 0.5 * np.cos(cols / 1500.0)[None, :], ground)
            base = base + np.where(lab > 0, np.where(hot[np.maximum(lab - 1, 0)], 4.0, 0.0), 0.0)
            data = base + rng.normal(0.0, 0.35, (h, width))
            data = (np.round(data * 100.0) / 100.0).astype(np.float32)
            ds.write(data, 1, window=rasterio.windows.Window(0, r0, width, h))
    tmp.rename(tif)
    np.save(npy, frames)
    meta = {
        "scale": scale,
        "modules": int(len(frames)),
        "width": width,
        "height": height,
        "mpx": width * height / 1e6,
        "file_mb": tif.stat().st_size / 1e6,
        "build_s": time.perf_counter() - t0,
    }
    meta_path.write_text(json.dumps(meta))
    return meta


# ---------------------------------------------------------------- measured stages
def _maxrss_mb() -> float:
    """Peak resident set of this process [MB].

    Linux: ``VmHWM`` of /proc/self/status, which belongs to this program image alone
    (``ru_maxrss`` carries the parent's resident set over fork + exec). Elsewhere
    ``ru_maxrss``.
    """
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0  # kB
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB on Linux


def stage_read(out: Path) -> dict:
    """Windowed reads (raw decode) of every block of the ortho."""
    from pvscan.io.ortho import open_orthos
    from pvscan.io.settings import load_pipeline

    zonal = load_pipeline()["zonal"]
    rss0 = _maxrss_mb()
    with open_orthos([out / "thermal.tif"], {"units": "celsius"}) as o:
        t0, c0 = time.perf_counter(), time.process_time()
        npx = 0
        for w in o.block_windows(0, zonal["block_px"]):
            npx += o.read_raw(0, w).size
        dt, dc = time.perf_counter() - t0, time.process_time() - c0
    return {"time_s": dt, "cpu_s": dc, "pixels": npx, "rss_before_mb": rss0, "maxrss_mb": _maxrss_mb()}


def stage_stats(out: Path, traced: bool = False, workers: int | None = None) -> dict:
    """zonal_stats over the whole flight (reads included).

    With ``traced`` the run is under ``tracemalloc`` (slower: for memory only)."""
    import pandas as pd

    from pvscan.io.manifest import ModuleSpec
    from pvscan.io.ortho import open_orthos
    from pvscan.io.settings import load_pipeline
    from pvscan.measure.zonal import zonal_stats

    pipeline = load_pipeline()
    if workers is not None:
        pipeline = pipeline.replace(zonal={"workers": workers})
    frames = np.load(out / "frames.npy")
    modules = pd.DataFrame(frames, columns=["fx0", "fy0", "fux", "fuy", "fvx", "fvy"])
    spec = ModuleSpec(pmax_w=410.0, width_m=MODULE_W, length_m=MODULE_L, cells_across=6, cells_along=12, bypass_diodes=3)
    rss0 = _maxrss_mb()
    peak = 0
    with open_orthos([out / "thermal.tif"], {"units": "celsius"}, pipeline) as o:
        if traced:
            tracemalloc.start()
        t0, c0 = time.perf_counter(), time.process_time()
        zs = zonal_stats(o, modules, spec, pipeline)
        dt, dc = time.perf_counter() - t0, time.process_time() - c0
        if traced:
            _, peak = tracemalloc.get_traced_memory()
            tracemalloc.stop()
    t = zs.table
    return {
        "time_s": dt,
        "cpu_s": dc,
        "modules": len(t),
        "measured": int((t["n_pixels"] > 0).sum()),
        "median_valid_fraction": float(t["valid_fraction"].median()),
        "pixels_per_module": float(t["n_pixels"].median()),
        "rss_before_mb": rss0,
        "maxrss_mb": _maxrss_mb(),
        "traced_mb": peak / 1e6,
    }


def _run_stage(stage: str, out: Path) -> dict:
    env = dict(os.environ)
    env.setdefault("OMP_NUM_THREADS", "1")
    proc = subprocess.run(
        [sys.executable, str(Path(__file__).resolve()), "--_stage", stage, "--dir", str(out)],
        capture_output=True, text=True, env=env, check=False,
    )  # fmt: skip
    if proc.returncode != 0:
        sys.stderr.write(proc.stderr)
        raise SystemExit(f"stage {stage} failed (exit {proc.returncode})")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scale", type=int, nargs="*", default=[], help="raster scale factors besides 1 (e.g. 4)")
    ap.add_argument("--no-scale-1", action="store_true", help="do not run scale 1")
    ap.add_argument("--dir", type=Path, default=ROOT / ".bench", help="where synthetic flights are built")
    ap.add_argument("--repeat", type=int, default=1, help="runs per stage; the fastest is reported")
    ap.add_argument("--_stage", choices=["read", "stats", "stats1", "traced"], help=argparse.SUPPRESS)
    args = ap.parse_args(argv)

    if args._stage:
        if args._stage == "read":
            res = stage_read(args.dir)
        else:
            res = stage_stats(args.dir, traced=args._stage == "traced", workers=1 if args._stage == "stats1" else None)
        print(json.dumps(res))
        return 0

    scales = sorted(set(([] if args.no_scale_1 else [1]) + [int(s) for s in args.scale]))
    rows = []
    for s in scales:
        out = args.dir / f"zonal_x{s}"
        meta = build(s, out)
        print(
            f"scale {s}: {meta['modules']} modules, {meta['width']} x {meta['height']} px "
            f"({meta['mpx']:.1f} Mpx, {meta['file_mb']:.0f} MB on disk)",
            flush=True,
        )
        runs = {"read": [], "stats": [], "stats1": []}
        for _ in range(max(1, args.repeat)):  # alternate, so load from other work hits all
            for stage in runs:
                runs[stage].append(_run_stage(stage, out))
        best = {k: min(v, key=lambda r: r["time_s"]) for k, v in runs.items()}
        for k, v in runs.items():
            best[k]["maxrss_mb"] = max(r["maxrss_mb"] for r in v)
            best[k]["cpu_s"] = min(r["cpu_s"] for r in v)
        best["traced"] = _run_stage("traced", out)
        rows.append((s, meta, best))

    print()
    head = f"{'scale':>5} {'modules':>8} {'Mpx':>6} {'read s':>7} {'stats s':>8} {'ratio':>6} "
    head += f"{'1-thread s':>10} {'ratio':>6} {'cpu ratio':>9} {'read RSS MB':>11} {'stats RSS MB':>12} {'traced MB':>9}"
    print(head)
    print("-" * len(head))
    for s, meta, best in rows:
        rd, st, s1 = best["read"], best["stats"], best["stats1"]
        print(
            f"{s:>5} {meta['modules']:>8} {meta['mpx']:>6.1f} {rd['time_s']:>7.2f} {st['time_s']:>8.2f} "
            f"{st['time_s'] / rd['time_s']:>6.2f} {s1['time_s']:>10.2f} {s1['time_s'] / rd['time_s']:>6.2f} "
            f"{s1['cpu_s'] / rd['cpu_s']:>9.2f} {rd['maxrss_mb']:>11.0f} "
            f"{max(st['maxrss_mb'], s1['maxrss_mb']):>12.0f} {best['traced']['traced_mb']:>9.0f}"
        )
    print()
    print("read: windowed raw reads of every block; stats: zonal_stats incl. reads (module, cell, substring).")
    print("times: wall clock, best of --repeat runs. stats: [zonal] workers threads; 1-thread: workers = 1")
    print("(one thread plus read-ahead). cpu ratio: process CPU time of the 1-thread stats / read.")
    print("RSS: peak resident set (VmHWM) of the stage's own process (interpreter and libraries included).")
    print("traced: peak of Python/numpy allocations during the stats stage (tracemalloc, separate run).")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
