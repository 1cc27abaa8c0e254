"""Benchmark of the registration alone (``register_layout``), optionally against another tree.

Registers the layout of each flight given (or of the simulated benchmark plants of
``bench_inspect.py``: ``--scale 1`` about 25,000 modules, ``--scale 4`` about 100,000, cached in
``.bench/``) in a fresh subprocess, after the ortho is opened and the layout read, as the
pipeline calls it (sun and expected glass temperature of the flight). Prints per run the CPU
time (user + system of the process during the registration), wall time and the peak resident
set of the process [MiB], the status and the placement.

With ``--base PATH`` (a source tree of pvscan, e.g. ``git worktree add /tmp/base main`` or a
``git archive``), each flight is registered by both trees, in alternating rounds (so load from
other work on the machine hits both alike), and the two records (``summary.json``'s
registration block and the placement with its table corrections) are compared: ``identical``
or ``DIFFERENT``.

Usage::

    python benchmarks/bench_register.py --scale 1
    python benchmarks/bench_register.py --base /tmp/base --repeat 2 path/to/flight.toml ...
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent


def run_child(flight: Path, record: Path) -> dict:
    """Register one flight in this process; write the record, return the figures."""
    import resource

    from pvscan.io.layout import read_layout
    from pvscan.io.manifest import load_flight
    from pvscan.io.ortho import open_orthos
    from pvscan.io.settings import load_pipeline
    from pvscan.measure import register
    from pvscan.measure.register.physics import expected_module_apparent_c

    settings = load_pipeline()
    fl = load_flight(flight)
    with open_orthos(fl.flight.orthos, fl.ortho, settings) as orthos:
        modules = read_layout(fl, orthos.crs)
        expected = expected_module_apparent_c(fl, settings, strict=False)
        import numpy as np
        import shapely
        from pyproj import Transformer

        # the plant's centroid as the pipeline takes it (area-weighted footprint centroids)
        geoms = modules.geometry.to_numpy()
        area = shapely.area(geoms)
        c = shapely.get_coordinates(shapely.centroid(geoms))
        x, y = (float(np.sum(c[:, k] * area) / np.sum(area)) for k in (0, 1))
        lon, lat = Transformer.from_crs(modules.crs, 4326, always_xy=True).transform(x, y)
        sun = register.sun_vector(lon, lat, fl.flight.start + (fl.flight.end - fl.flight.start) / 2)
        t0, c0 = time.perf_counter(), time.process_time()
        reg = register.register_layout(orthos, modules, settings["register"], sun=sun, expected_apparent_c=expected)
        wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    rec = reg.to_dict()
    rec["placement_repr"] = repr(reg.placement)
    record.write_text(json.dumps(rec, sort_keys=True, default=str), encoding="utf-8")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    return {"cpu_s": cpu, "wall_s": wall, "peak_mib": peak, "modules": len(modules), "status": reg.status,
            "placement": (reg.placement.to_dict() if reg.placement is not None else None)}


def _run(tree: Path | None, flight: Path, record: Path) -> dict:
    env = dict(os.environ)
    if tree is not None:
        env["PYTHONPATH"] = str(tree) + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    # run from a neutral folder: the tree on PYTHONPATH (or the installed one) is what is imported
    out = subprocess.run([sys.executable, str(Path(__file__).resolve()), "--_child", str(flight), "--_record",
                          str(record)], env=env, cwd=tempfile.gettempdir(), capture_output=True, text=True,
                         check=False)
    if out.returncode != 0:
        raise SystemExit(f"{flight}: registration child failed:\n{out.stderr[-2000:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("flights", nargs="*", type=Path, help="flight.toml files")
    ap.add_argument("--scale", type=int, nargs="*", default=[], help="benchmark plants (bench_inspect.py scales)")
    ap.add_argument("--dir", type=Path, default=ROOT / ".bench", help="cache of simulated benchmark flights")
    ap.add_argument("--base", type=Path, help="another pvscan source tree to compare with")
    ap.add_argument("--repeat", type=int, default=1, help="rounds; the fastest (CPU) of each is reported")
    ap.add_argument("--_child", type=Path, help=argparse.SUPPRESS)
    ap.add_argument("--_record", type=Path, help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    if a._child is not None:
        print(json.dumps(run_child(a._child, a._record)))
        return 0
    flights = list(a.flights)
    if a.scale:
        sys.path.insert(0, str(HERE))
        from bench_inspect import build

        flights += [build(s, a.dir) for s in a.scale]
    if not flights:
        ap.error("give flight.toml files or --scale")
    trees = ([("base", a.base)] if a.base is not None else []) + [("this", None)]
    print(f"load average before: {os.getloadavg()}", flush=True)
    with tempfile.TemporaryDirectory() as tmp:
        for flight in flights:
            best: dict[str, dict] = {}
            for _ in range(a.repeat):
                for name, tree in trees:
                    res = _run(tree, flight, Path(tmp) / f"{name}.json")
                    res["record"] = (Path(tmp) / f"{name}.json").read_text(encoding="utf-8")
                    if name not in best or res["cpu_s"] < best[name]["cpu_s"]:
                        best[name] = res
            print(f"{flight} ({best['this']['modules']} modules)")
            for name, _ in trees:
                b = best[name]
                print(f"  {name:5s} registration {b['cpu_s']:7.2f} CPU s {b['wall_s']:7.2f} s wall, peak RSS "
                      f"{b['peak_mib']:7.0f} MiB, {b['status']}, {b['placement']}", flush=True)
            if a.base is not None:
                same = best["base"]["record"] == best["this"]["record"]
                ratio = best["base"]["cpu_s"] / max(best["this"]["cpu_s"], 1e-9)
                print(f"  records {'identical' if same else 'DIFFERENT'}; CPU base / this {ratio:.2f}", flush=True)
    print(f"load average after: {os.getloadavg()}", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
