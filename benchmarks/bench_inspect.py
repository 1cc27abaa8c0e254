"""Benchmark of ``pvscan inspect`` as a whole process against the raster-read floor.

Builds (once, cached in ``.bench/``, which git ignores) simulated flights of the demo plant
grown to about 25,000 modules (scale 1: 38 rows of 14 tables of 2 x 24 modules) and four
times the area (scale 4: about 100,000 modules), with ``pvscan simulate`` from
``demo_site/scenario.toml`` (everything but the plant's size as in the demo, including the
defects, distractors, weather series and frames). Then, each in a fresh subprocess and in
alternating rounds (so load from other work on the machine hits every measurement alike):

* ``read``: the floor, windowed reads and decoding of every block of the ortho
  (``[zonal] block_px`` blocks, as the statistics read them);
* ``exactextract``: a general-purpose zonal-statistics library, mean / median / min / max /
  stdev / count per module footprint on the same ortho and the same polygons (the layout's
  modules reprojected to the ortho's CRS before the clock starts), with both of its
  processing strategies;
* ``inspect``: ``pvscan -v inspect FLIGHT.toml --out DIR`` as a whole process (interpreter
  start, imports, every stage, all outputs and the report), its wall time, CPU time (user +
  system of the process) and peak resident set, and every stage's wall and CPU time as the
  pipeline logs them.

It prints the best round of each (wall time; CPU time and peak memory of the same run), the
ratios to the floor and to exactextract, the time per module at each scale and the growth
from scale 1 to scale 4, and the machine's load average before and after.

Usage::

    python benchmarks/bench_inspect.py                  # scales 1 and 4, 3 rounds
    python benchmarks/bench_inspect.py --scale 1 --repeat 1
    python benchmarks/bench_inspect.py --no-exactextract

Needs the ``bench`` extra for exactextract (``pip install -e '.[bench]'``; ``make bench``
installs it).
"""
from __future__ import annotations

import argparse
import json
import math
import os
import re
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
SCENARIO = ROOT / "demo_site" / "scenario.toml"
#: Rows of tables and tables per row at scale 1 (2 x 24 modules a table: 25,536 modules).
BASE_TABLES = (38, 14)
SEED = 7
EXACTEXTRACT_OPS = ["mean", "median", "min", "max", "stdev", "count"]


# ---------------------------------------------------------------- flights
def scenario_text(scale: int) -> str:
    """The demo scenario with the plant grown to ``scale`` times the area."""
    k = int(round(math.sqrt(scale)))
    if k * k != scale:
        raise SystemExit(f"scale {scale}: use a square number (1, 4, 9, ...)")
    text = SCENARIO.read_text(encoding="utf-8")
    text, n1 = re.subn(r"(?m)^table_rows\s*=\s*\d+", f"table_rows = {BASE_TABLES[0] * k}", text)
    text, n2 = re.subn(r"(?m)^tables_per_row\s*=\s*\d+", f"tables_per_row = {BASE_TABLES[1] * k}", text)
    text, n3 = re.subn(r'(?m)^name\s*=\s*"[^"]*"', 'name = "Benchmark plant (invented)"', text, count=1)
    if not (n1 and n2 and n3):
        raise SystemExit(f"{SCENARIO}: no table_rows / tables_per_row / name key to grow the plant")
    return text


def build(scale: int, root: Path) -> Path:
    """Simulate the flight of one scale into ``root/inspect_x<scale>`` (reused when current)."""
    folder = root / f"inspect_x{scale}"
    flight = folder / "flight" / "flight.toml"
    text = scenario_text(scale)
    stamp = folder / "scenario.toml"
    if flight.exists() and stamp.exists() and stamp.read_text(encoding="utf-8") == text:
        return flight
    if folder.exists():
        shutil.rmtree(folder)
    folder.mkdir(parents=True)
    (folder / "scenario.in.toml").write_text(text, encoding="utf-8")
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-m", "pvscan.cli.main", "-q", "simulate", str(folder / "scenario.in.toml"),
                    "--out", str(folder / "flight"), "--seed", str(SEED)], check=True)
    print(f"  simulated in {time.perf_counter() - t0:.0f} s", flush=True)
    stamp.write_text(text, encoding="utf-8")  # written last: a broken build is redone
    return flight


# ---------------------------------------------------------------- measured stages (subprocesses)
def _vmhwm_mb() -> float:
    """Peak resident set of this process [MB] (VmHWM on Linux, else ru_maxrss)."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def stage_read(flight_path: Path) -> dict:
    """Windowed raw reads (decode) of every block of every ortho tile."""
    from pvscan.io.manifest import load_flight
    from pvscan.io.ortho import open_orthos
    from pvscan.io.settings import load_pipeline

    flight = load_flight(flight_path)
    settings = load_pipeline()
    block_px = settings["zonal"]["block_px"]
    with open_orthos(flight.flight.orthos, flight.ortho, settings) as o:
        t0, c0 = time.perf_counter(), time.process_time()
        npx = 0
        for t in o.tiles:
            for w in o.block_windows(t.index, block_px):
                npx += o.read_raw(t.index, w).size
        dt, dc = time.perf_counter() - t0, time.process_time() - c0
    return {"wall_s": dt, "cpu_s": dc, "pixels": npx, "rss_mb": _vmhwm_mb()}


def stage_exactextract(flight_path: Path, strategy: str) -> dict:
    """exactextract's zonal statistics of every module footprint (polygons prepared first)."""
    import rasterio
    from exactextract import exact_extract

    from pvscan.io.layout import read_layout
    from pvscan.io.manifest import load_flight

    flight = load_flight(flight_path)
    tif = str(flight.flight.orthos[0])
    with rasterio.open(tif) as ds:
        crs = ds.crs
    modules = read_layout(flight, crs)[["module_id", "geometry"]]
    t0, c0 = time.perf_counter(), time.process_time()
    out = exact_extract(tif, modules, EXACTEXTRACT_OPS, strategy=strategy, output="pandas")
    dt, dc = time.perf_counter() - t0, time.process_time() - c0
    return {"wall_s": dt, "cpu_s": dc, "features": int(len(out)), "tiles": len(flight.flight.orthos),
            "rss_mb": _vmhwm_mb()}


_STAGE_LINE = re.compile(r"stage (\w+): ([0-9.]+) s wall, ([0-9.]+) s CPU(?:, peak RSS so far ([0-9.]+) MiB)?")


def run_inspect(flight_path: Path, out_dir: Path) -> dict:
    """``pvscan -v inspect`` as a whole process: wall, CPU, peak RSS, per-stage times."""
    cmd = [sys.executable, "-m", "pvscan.cli.main", "-v", "inspect", str(flight_path), "--out", str(out_dir),
           "--overwrite"]
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    out, err = proc.communicate()
    dt = time.perf_counter() - t0
    # rusage of the finished child (ru_maxrss [kB] on Linux)
    ru = resource.getrusage(resource.RUSAGE_CHILDREN)
    if proc.returncode != 0:
        sys.stderr.write(err)
        raise SystemExit(f"pvscan inspect failed (exit {proc.returncode})")
    stages = {m.group(1): (float(m.group(2)), float(m.group(3)), float(m.group(4) or "nan"))
              for m in _STAGE_LINE.finditer(err)}
    return {"wall_s": dt, "stages": stages, "ru": ru}


def _child(stage: str, flight: Path, extra: str = "") -> dict:
    env = dict(os.environ)
    cmd = [sys.executable, str(Path(__file__).resolve()), "--_stage", stage, "--_flight", str(flight)]
    if extra:
        cmd += ["--_extra", extra]
    proc = subprocess.run(cmd, capture_output=True, text=True, env=env, check=False)
    if proc.returncode != 0:
        sys.stderr.write(proc.stderr)
        raise SystemExit(f"stage {stage} failed (exit {proc.returncode})")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def _inspect_child(flight: Path, out_dir: Path) -> dict:
    """Run ``pvscan inspect`` from a small fresh process, so rusage is the inspect's alone."""
    return _child("inspect", flight, str(out_dir))


def _load() -> str:
    try:
        return " ".join(f"{x:.2f}" for x in os.getloadavg())
    except OSError:
        return "n/a"


# ---------------------------------------------------------------- main
def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scale", type=int, nargs="+", default=[1, 4], help="plant scales (area factors; default 1 4)")
    ap.add_argument("--repeat", type=int, default=3, help="rounds; the fastest of each is reported (default 3)")
    ap.add_argument("--dir", type=Path, default=ROOT / ".bench", help="cache of simulated flights")
    ap.add_argument("--no-exactextract", action="store_true", help="skip the exactextract comparison")
    ap.add_argument("--build-only", action="store_true", help="only simulate (or check) the flights")
    ap.add_argument("--_stage", help=argparse.SUPPRESS)
    ap.add_argument("--_flight", type=Path, help=argparse.SUPPRESS)
    ap.add_argument("--_extra", default="", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)

    if args._stage:
        if args._stage == "read":
            res = stage_read(args._flight)
        elif args._stage == "exactextract":
            res = stage_exactextract(args._flight, args._extra)
        elif args._stage == "inspect":
            r = run_inspect(args._flight, Path(args._extra))
            ru = r.pop("ru")
            r.update(cpu_s=ru.ru_utime + ru.ru_stime, rss_mb=ru.ru_maxrss / 1024.0)
            res = r
        else:
            raise SystemExit(f"unknown stage {args._stage}")
        print(json.dumps(res))
        return 0

    if not args.no_exactextract:
        try:
            import exactextract  # noqa: F401
        except ImportError:
            raise SystemExit("exactextract is not installed: pip install -e '.[bench]' (or --no-exactextract)")

    print(f"machine: {os.cpu_count()} cores, load average {_load()} (1, 5, 15 min)", flush=True)
    results = []
    for scale in sorted(set(args.scale)):
        print(f"scale {scale}: preparing the flight ...", flush=True)
        flight = build(scale, args.dir)
        if args.build_only:
            continue
        runs: dict[str, list] = {"read": [], "inspect": []}
        strategies = [] if args.no_exactextract else ["feature-sequential", "raster-sequential"]
        for s in strategies:
            runs[f"exactextract {s}"] = []
        with tempfile.TemporaryDirectory(prefix="pvscan-bench-", dir=args.dir) as tmp:
            for k in range(max(1, args.repeat)):
                runs["read"].append(_child("read", flight))
                for s in strategies:
                    runs[f"exactextract {s}"].append(_child("exactextract", flight, s))
                runs["inspect"].append(_inspect_child(flight, Path(tmp) / f"out{k}"))
                print(f"  round {k + 1}: read {runs['read'][-1]['wall_s']:.2f} s, inspect "
                      f"{runs['inspect'][-1]['wall_s']:.2f} s, load {_load()}", flush=True)
            summary = json.loads((Path(tmp) / "out0" / "summary.json").read_text(encoding="utf-8"))
        n_modules = int(summary["counts"]["modules"])
        best = {k: min(v, key=lambda r: r["wall_s"]) for k, v in runs.items()}
        results.append((scale, n_modules, best, runs))

    if args.build_only:
        return 0
    print()
    print(f"load average after: {_load()}")
    for scale, n, best, runs in results:
        rd = best["read"]
        ins = best["inspect"]
        ee = [v for k, v in best.items() if k.startswith("exactextract")]
        ee_best = min(ee, key=lambda r: r["wall_s"]) if ee else None
        print()
        print(f"scale {scale}: {n:,} modules, {rd['pixels'] / 1e6:.1f} Mpx, best of {len(runs['read'])} round(s)")
        head = f"  {'':<34} {'wall s':>8} {'CPU s':>8} {'x floor':>8} {'peak RSS MiB':>13}"
        print(head)
        print("  " + "-" * (len(head) - 2))
        for k in [k for k in best if k != "inspect"] + ["inspect"]:
            r = best[k]
            print(f"  {k:<34} {r['wall_s']:>8.2f} {r['cpu_s']:>8.2f} {r['wall_s'] / rd['wall_s']:>8.1f} "
                  f"{r['rss_mb']:>13.0f}")
        stages = ins["stages"]
        staged = sum(v[0] for v in stages.values())
        for name, (w, c, rss) in stages.items():
            print(f"    {name:<32} {w:>8.2f} {c:>8.2f} {'':>8} {rss:>13.0f}")
        print(f"    {'start-up, summary, other':<32} {ins['wall_s'] - staged:>8.2f}")
        print(f"  inspect per module: {1e3 * ins['wall_s'] / n:.3f} ms wall, {1e3 * ins['cpu_s'] / n:.3f} ms CPU, "
              f"{1024 * ins['rss_mb'] / n:.1f} KiB peak RSS")
        if ee_best is not None:
            print(f"  inspect / exactextract (faster strategy): {ins['wall_s'] / ee_best['wall_s']:.2f}")
    if len(results) > 1:
        (s0, n0, b0, _), (s1, n1, b1, _) = results[0], results[-1]
        g = (b1["inspect"]["wall_s"] / n1) / (b0["inspect"]["wall_s"] / n0)
        print()
        print(f"time per module, scale {s1} / scale {s0}: {g:.2f} (wall); "
              f"floor per pixel: {(b1['read']['wall_s'] / b1['read']['pixels']) / (b0['read']['wall_s'] / b0['read']['pixels']):.2f}")
        st0, st1 = b0["inspect"]["stages"], b1["inspect"]["stages"]
        print(f"per stage (CPU time per module, scale {s1} / scale {s0}; 1.0 = linear): " + ", ".join(
            f"{k} {(st1[k][1] / n1) / (st0[k][1] / n0):.2f}" for k in st0 if k in st1 and st0[k][1] > 0.05))
    print()
    print("read: windowed reads + decoding of every block (the floor). exactextract: "
          + ", ".join(EXACTEXTRACT_OPS) + " per module footprint,")
    print("call only (polygons prepared before the clock). inspect: the whole `pvscan inspect` process")
    print("(start-up, every stage, outputs and report). CPU: user + system time of the process.")
    print("peak RSS: VmHWM / ru_maxrss of the measured process; stages: wall, CPU and the peak RSS so far,")
    print("as the pipeline logs them (-v).")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
