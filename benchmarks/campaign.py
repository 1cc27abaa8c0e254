"""Accuracy over many random flights nobody tuned on: simulate -> inspect -> evaluate.

    python benchmarks/campaign.py [--per-family 5] [--demo-seeds 3] [--families any,fixed,...]
                                  [--calibration-seeds 0-99] [--held-out-seeds 1000-1099]
                                  [--workers 2] [--json out.json] [--keep DIR]

Every flight family of :mod:`pvscan.simulate.sampler` gets ``--per-family`` random flights
and ``demo_site/scenario.toml`` gets ``--demo-seeds`` seeds; half of each set is drawn from
the calibration seed range and half from the held-out range (disjoint), and the two are
printed apart: a threshold chosen on calibration flights must be judged on held-out ones.
Flights run on a process pool (``--workers``, default 2).

Printed per family and seed set: worst / 10th percentile / median of module recall,
precision, false alarms per 1,000 healthy modules and registration error; how many flights
``inspect`` refused (exit 1) and how many it flagged ``validity.ok: false``. A flight that
scores recall or precision below 0.9 and calls itself valid is counted and listed as
"wrong and valid" (the worst outcome). The registration error is the RMS over modules of
the distance between the true module centre (``truth_ortho.geojson``) and the layout's centre
moved by ``summary.json`` ``layout_shift_m`` (shift only; a fitted rotation or scale the
pipeline may apply is not counted), in metres. Wall times are printed, never asserted.
"""
from __future__ import annotations

import argparse
import json
import math
import shutil
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor, as_completed
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "demo_site" / "scenario.toml"
PVSCAN = [sys.executable, "-m", "pvscan.cli.main"]


def _centres_lonlat(path: Path, epsg: int) -> dict:
    from pyproj import Transformer

    tr = Transformer.from_crs("EPSG:4326", f"EPSG:{epsg}", always_xy=True)
    out = {}
    for f in json.loads(path.read_text())["features"]:
        ring = np.asarray(f["geometry"]["coordinates"][0][:-1], float)
        x, y = tr.transform(ring[:, 0], ring[:, 1])
        out[f["properties"]["module_id"]] = (float(np.mean(x)), float(np.mean(y)))
    return out


def registration_error(flight: Path, result: Path) -> float | None:
    """RMS distance between true module centres and the layout's centres moved by the
    reported shift [m]; None when the flight has no truth_ortho.geojson or no shift."""
    t_path = flight / "truth_ortho.geojson"
    s_path = result / "summary.json"
    if not t_path.exists() or not s_path.exists():
        return None
    shift = json.loads(s_path.read_text()).get("layout_shift_m") or [0.0, 0.0]
    meta = json.loads((flight / "truth.json").read_text())
    drawn = _centres_lonlat(flight / "truth.geojson", int(meta["epsg"]))
    d2 = []
    for f in json.loads(t_path.read_text())["features"]:
        mid = f["properties"]["module_id"]
        ring = np.asarray(f["geometry"]["coordinates"][0][:-1], float)
        tx, ty = ring.mean(axis=0)
        if mid in drawn:
            dx, dy = drawn[mid]
            d2.append((dx + shift[0] - tx) ** 2 + (dy + shift[1] - ty) ** 2)
    return float(math.sqrt(np.mean(d2))) if d2 else None


def run_flight(job: dict) -> dict:
    """simulate -> inspect -> evaluate one flight in a scratch folder; returns its record."""
    work = Path(tempfile.mkdtemp(prefix="pvscan-campaign-"))
    flight, result = work / "flight", work / "result"
    rec = dict(job)
    t0 = time.perf_counter()
    try:
        if job["family"] == "demo":
            sim = PVSCAN + ["simulate", str(DEMO), "--out", str(flight), "--seed", str(job["seed"])]
        else:
            sim = PVSCAN + ["simulate", "--random", str(job["seed"]), "--family", job["family"], "--out", str(flight)]
        p = subprocess.run(sim, capture_output=True, text=True)
        if p.returncode:
            rec.update(status="simulate_failed", message=(p.stderr or p.stdout).strip().splitlines()[-1:])
            return rec
        p = subprocess.run(PVSCAN + ["-q", "inspect", str(flight / "flight.toml"), "--out", str(result)],
                           capture_output=True, text=True)
        rec["inspect_exit"] = p.returncode
        if p.returncode:
            rec.update(status="refused", message=(p.stderr or p.stdout).strip().splitlines()[-1:])
            return rec
        ev = work / "ev.json"
        p = subprocess.run(PVSCAN + ["-q", "evaluate", str(flight), str(result), "--json", str(ev)],
                           capture_output=True, text=True)
        if p.returncode:
            rec.update(status="evaluate_failed", message=(p.stderr or p.stdout).strip().splitlines()[-1:])
            return rec
        e = json.loads(ev.read_text())
        summ = json.loads((result / "summary.json").read_text())
        m = e["module"]
        rec.update(status="ok", recall=m["recall"], precision=m["precision"],
                   false_alarms_per_1000=m["false_alarms_per_1000_healthy"],
                   registration_error_m=registration_error(flight, result),
                   valid=bool(summ.get("validity", {}).get("ok", True)),
                   layout_error=json.loads((flight / "truth.json").read_text()).get("layout_error"))
        return rec
    finally:
        rec["wall_s"] = round(time.perf_counter() - t0, 1)
        if job.get("keep"):
            dest = Path(job["keep"]) / f"{job['family']}-{job['seed']}"
            shutil.rmtree(dest, ignore_errors=True)
            shutil.copytree(work, dest)
        shutil.rmtree(work, ignore_errors=True)


def _stats(vals):
    v = np.asarray([x for x in vals if x is not None and np.isfinite(x)], float)
    if not v.size:
        return None
    return {"n": int(v.size), "worst_low": float(v.min()), "worst_high": float(v.max()),
            "p10": float(np.percentile(v, 10)), "p90": float(np.percentile(v, 90)), "median": float(np.median(v))}


def summarise(records: list[dict]) -> dict:
    """Per (seed set, family): distributions, refusals, flags, wrong-and-valid flights."""
    out: dict = {}
    for rec in records:
        out.setdefault(rec["set"], {}).setdefault(rec["family"], []).append(rec)
    table: dict = {}
    for sset, fams in out.items():
        for fam, recs in fams.items():
            ok = [r for r in recs if r["status"] == "ok"]
            wrong_valid = [r["seed"] for r in ok if r["valid"] and min(r["recall"] or 0, r["precision"] or 0) < 0.9]
            table.setdefault(sset, {})[fam] = {
                "flights": len(recs), "scored": len(ok),
                "refused": sum(r["status"] == "refused" for r in recs),
                "failed": sum(r["status"] in ("simulate_failed", "evaluate_failed") for r in recs),
                "flagged_invalid": sum(not r["valid"] for r in ok),
                "wrong_and_valid": wrong_valid,
                "recall": _stats([r["recall"] for r in ok]), "precision": _stats([r["precision"] for r in ok]),
                "false_alarms_per_1000": _stats([r["false_alarms_per_1000"] for r in ok]),
                "registration_error_m": _stats([r["registration_error_m"] for r in ok]),
            }
    return table


def _fmt(s, low=True, nd=2):
    if s is None:
        return "       -        "
    w = s["worst_low"] if low else s["worst_high"]
    p = s["p10"] if low else s["p90"]
    return f"{w:5.{nd}f} {p:5.{nd}f} {s['median']:5.{nd}f}"


def print_table(table: dict) -> None:
    for sset in ("calibration", "held-out"):
        if sset not in table:
            continue
        print(f"\n== {sset} seeds ==   (recall/precision: worst p10 median; false alarms/1000 and "
              "registration error [m]: worst p90 median)")
        print(f"{'family':26s} {'n':>3s} {'ref':>3s} {'inv':>3s} {'w&v':>3s} | {'recall':17s} | {'precision':17s} | "
              f"{'false alarms/1000':17s} | registration [m]")
        for fam, r in table[sset].items():
            print(f"{fam:26s} {r['flights']:3d} {r['refused']:3d} {r['flagged_invalid']:3d} {len(r['wrong_and_valid']):3d} | "
                  f"{_fmt(r['recall'])} | {_fmt(r['precision'])} | {_fmt(r['false_alarms_per_1000'], False, 1)} | "
                  f"{_fmt(r['registration_error_m'], False, 3)}")
        for fam, r in table[sset].items():
            if r["wrong_and_valid"]:
                print(f"  wrong and valid, {fam}: seeds {r['wrong_and_valid']}")
            if r["failed"]:
                print(f"  {fam}: {r['failed']} flight(s) failed to simulate or evaluate")


def _range(text: str) -> range:
    a, b = (int(x) for x in text.split("-"))
    return range(a, b + 1)


def main(argv=None) -> int:
    from pvscan.simulate.sampler import FAMILIES

    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--per-family", type=int, default=5, help="random flights per family")
    ap.add_argument("--demo-seeds", type=int, default=3, help="seeds of demo_site/scenario.toml")
    ap.add_argument("--families", default=",".join(f for f in FAMILIES if f != "large_site"),
                    help="comma-separated families (large_site is slow; add it explicitly)")
    ap.add_argument("--calibration-seeds", type=_range, default=_range("0-999"))
    ap.add_argument("--held-out-seeds", type=_range, default=_range("100000-100999"))
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--json", type=Path, default=None, help="write every record and the table here")
    ap.add_argument("--keep", type=Path, default=None, help="keep every flight and result here")
    args = ap.parse_args(argv)
    if set(args.calibration_seeds) & set(args.held_out_seeds):
        ap.error("calibration and held-out seed ranges overlap")
    jobs = []
    fams = [f for f in args.families.split(",") if f]
    for fam, n in [(f, args.per_family) for f in fams] + [("demo", args.demo_seeds)]:
        n_cal = n // 2
        for sset, rng_, k in (("calibration", args.calibration_seeds, n_cal), ("held-out", args.held_out_seeds, n - n_cal)):
            for i in range(k):
                jobs.append({"family": fam, "seed": rng_[i], "set": sset,
                             "keep": str(args.keep) if args.keep else None})
    t0 = time.perf_counter()
    records = []
    with ProcessPoolExecutor(max_workers=args.workers) as pool:
        futs = [pool.submit(run_flight, j) for j in jobs]
        for k, f in enumerate(as_completed(futs), 1):
            r = f.result()
            records.append(r)
            print(f"[{k}/{len(jobs)}] {r['set']:11s} {r['family']:24s} seed {r['seed']:6d} {r['status']:9s} "
                  f"recall {r.get('recall')} precision {r.get('precision')} valid {r.get('valid')} "
                  f"reg {r.get('registration_error_m')} ({r['wall_s']} s)", flush=True)
    table = summarise(records)
    print_table(table)
    print(f"\n{len(jobs)} flights in {time.perf_counter() - t0:.0f} s on {args.workers} workers")
    if args.json:
        args.json.write_text(json.dumps({"records": records, "table": table}, indent=1, default=str))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
