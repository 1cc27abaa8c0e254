"""Accuracy over many random flights nobody tuned on: simulate -> inspect -> evaluate.

    python benchmarks/campaign.py [--per-family 5] [--demo-seeds 3] [--families any,fixed,...]
                                  [--calibration-seeds 0-999] [--held-out-seeds 100000-100999]
                                  [--workers 2] [--out .campaign/NAME] [--notes FILE.md] [--keep DIR]
    python benchmarks/campaign.py --summarise .campaign/NAME/records.jsonl [--notes FILE.md]

Every flight family of :mod:`pvscan.simulate.sampler` gets ``--per-family`` random flights
and ``demo_site/scenario.toml`` gets ``--demo-seeds`` seeds; half of each set is drawn from
the calibration seed range and half from the held-out range (disjoint), and the two are
printed apart: a threshold chosen on calibration flights must be judged on held-out ones.
Flights run on a process pool (``--workers``, default 2); each finished flight is appended to
``records.jsonl`` in ``--out`` at once, so an interrupted campaign keeps what it measured and
``--summarise`` prints (and ``--notes`` writes) the tables of any records file.

Reported per family, per kind of flight (fixed / tracker, north / south, morning / noon /
afternoon by the sun's hour angle, hot / cold ground, the ortho's surface model: true ortho /
smoothed surface / ground level, level / sloping terrain) and per seed set: worst / 10th
percentile / median of module recall and precision, the power-loss ratio predicted / true
(worst low, p10, median, p90, worst high), false alarms per 1,000 healthy modules and the
registration error; how many flights ``inspect`` refused (exit 1), how many it flagged
``validity.ok: false``, and every flight that scored recall or precision below 0.9 (or a
loss ratio outside 0.5-2) and yet called itself valid ("wrong and valid", the worst
outcome), with what looked wrong. ``inspect`` runs with ``--no-report`` (the report is not
scored). The registration error is ``pvscan evaluate``'s placement error: the 95th percentile
over modules of the distance between the footprint the result measured (the drawn layout moved
as its registration record says) and the module in the ortho [m] (on flights without the truth
in the ortho, the distance between the reported layout shift and the true layout offset, which
does not see rotation or scale). Wall times are printed, never asserted.
"""
from __future__ import annotations

import argparse
import json
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
#: a flight is "wrong" below this recall or precision (common practice for a usable survey) ...
WRONG_BELOW = 0.9
#: ... or with its power-loss ratio outside this range
LOSS_RATIO_OK = (0.5, 2.0)
#: 95th-percentile placement error [m] above which a wrong flight's reading says the registration
#: was off: about half the shorter side of a cell (full cells are about 0.16 m; common practice),
#: where a footprint's edge band starts to take in the neighbouring cell or the ground.
PLACEMENT_OFF_M = 0.1


def _last_line(p) -> str:
    lines = (p.stderr or p.stdout or "").strip().splitlines()
    return lines[-1] if lines else ""


def _strata(flight: Path) -> dict:
    """Kind of flight from the truth: array kind, hemisphere, hour, ground, sun."""
    meta = json.loads((flight / "truth.json").read_text())
    sc = meta.get("scenario_settings") or {}
    site = sc.get("site", {})
    lon, lat = float(site.get("lon", 0.0)), float(site.get("lat", 0.0))
    out = {"kind": sc.get("array", {}).get("kind"), "hemisphere": "north" if lat >= 0 else "south",
           "sun_elevation_deg": meta.get("sun_elevation_deg")}
    try:
        from datetime import UTC, datetime

        start = datetime.fromisoformat(str(sc["flight"]["start"]).replace("Z", "+00:00")).astimezone(UTC)
        utc_h = start.hour + start.minute / 60.0
        solar_h = (utc_h + lon / 15.0) % 24.0  # local mean solar time [h]
        out["solar_hour"] = round(solar_h, 2)
        out["hour"] = "noon" if abs(solar_h - 12.0) <= 1.5 else ("morning" if solar_h < 12.0 else "afternoon")
    except (KeyError, ValueError, TypeError):
        out["hour"] = None
    rise = sc.get("ground", {}).get("sun_rise_k")
    out["ground"] = None if rise is None else ("hot" if float(rise) >= 10.0 else "cold")
    return out


def run_flight(job: dict) -> dict:
    """simulate -> inspect -> evaluate one flight in a scratch folder; returns its record."""
    work = Path(tempfile.mkdtemp(prefix="pvscan-campaign-"))
    flight, result = work / "flight", work / "result"
    rec = dict(job)
    rec.pop("keep", None)
    t0 = time.perf_counter()
    try:
        if job["family"] == "demo":
            sim = PVSCAN + ["-q", "simulate", str(DEMO), "--out", str(flight), "--seed", str(job["seed"])]
        else:
            sim = PVSCAN + ["-q", "simulate", "--random", str(job["seed"]), "--family", job["family"],
                            "--out", str(flight)]
        p = subprocess.run(sim, capture_output=True, text=True)
        if p.returncode:
            rec.update(status="simulate_failed", message=_last_line(p))
            return rec
        rec.update(_strata(flight))
        meta = json.loads((flight / "truth.json").read_text())
        rec["n_modules"] = meta.get("n_modules")
        rec["layout_error"] = meta.get("layout_error")
        p = subprocess.run(PVSCAN + ["-q", "inspect", str(flight / "flight.toml"), "--out", str(result), "--no-report"],
                           capture_output=True, text=True)
        rec["inspect_exit"] = p.returncode
        if p.returncode:
            rec.update(status="refused", message=_last_line(p))
            return rec
        ev = work / "ev.json"
        p = subprocess.run(PVSCAN + ["-q", "evaluate", str(flight), str(result), "--json", str(ev)],
                           capture_output=True, text=True)
        if p.returncode:
            rec.update(status="evaluate_failed", message=_last_line(p))
            return rec
        e = json.loads(ev.read_text())
        summ = json.loads((result / "summary.json").read_text())
        m = e["module"]
        val = summ.get("validity", {})
        pl = e.get("power_loss", {})
        missed = {k: c["n_true"] - c["correct"] for k, c in e.get("per_class", {}).items()
                  if c.get("n_true") and c["n_true"] - c["correct"] > 0}
        rec.update(status="ok", recall=m["recall"], precision=m["precision"],
                   n_defective_true=e.get("n_defective_true"), n_defective_predicted=e.get("n_defective_predicted"),
                   false_alarms_per_1000=m["false_alarms_per_1000_healthy"],
                   false_alarms_by_distractor=m.get("false_alarms_by_distractor"),
                   missed_by_class=missed,
                   missed_faint=(e.get("missed") or {}).get("n_faint"),
                   missed_clear=((e.get("missed") or {}).get("n_missed", 0) - ((e.get("missed") or {}).get("n_faint") or 0)),
                   recall_clear=(e.get("missed") or {}).get("recall_clear"),
                   loss_ratio=pl.get("ratio"), loss_ratio_group=(pl.get("group") or {}).get("ratio"),
                   registration_error_m=_placement_p95(e.get("registration")),
                   shift_error_m=(e.get("registration") or {}).get("error_m"),
                   registration_status=(summ.get("registration") or {}).get("status"),
                   valid=bool(val.get("ok", True)), failed_checks=val.get("failed", []),
                   healthy_rmse_k=(e.get("temperature") or {}).get("healthy_rmse_k"))
        return rec
    finally:
        rec["wall_s"] = round(time.perf_counter() - t0, 1)
        if job.get("keep"):
            dest = Path(job["keep"]) / f"{job['family']}-{job['seed']}"
            shutil.rmtree(dest, ignore_errors=True)
            shutil.copytree(work, dest)
        shutil.rmtree(work, ignore_errors=True)


def is_wrong(r: dict, *, clear: bool = False) -> bool:
    """Recall or precision below :data:`WRONG_BELOW`, or the loss ratio outside :data:`LOSS_RATIO_OK`.
    ``clear``: recall over the defects the flight lets be seen (evaluate's ``recall_clear``: faint
    ones, under ``faint_contrast`` x the healthy spread, left out) in place of the recall."""
    recall = r.get("recall_clear") if clear and r.get("recall_clear") is not None else r.get("recall")
    if min(recall or 0.0, r.get("precision") or 0.0) < WRONG_BELOW:
        return True
    lr = r.get("loss_ratio")
    return lr is not None and not (LOSS_RATIO_OK[0] <= lr <= LOSS_RATIO_OK[1])


def _placement_p95(reg: dict | None) -> float | None:
    """p95 of the per-module placement error [m], else the shift error (see the module doc)."""
    if not reg:
        return None
    placed = reg.get("placed_error_m") or {}
    return placed.get("p95_m") if placed.get("p95_m") is not None else reg.get("error_m")


def what_looked_wrong(r: dict) -> str:
    """A short reading of a wrong flight's record (registration, false alarms, misses)."""
    bits = []
    if (r.get("registration_error_m") or 0.0) > PLACEMENT_OFF_M:
        bits.append(f"registration off by {r['registration_error_m']:.2f} m")
    fa = {k: v for k, v in (r.get("false_alarms_by_distractor") or {}).items() if v}
    if fa:
        bits.append("false alarms at " + ", ".join(f"{k} {v}" for k, v in sorted(fa.items())))
    if r.get("missed_by_class"):
        bits.append("missed " + ", ".join(f"{k} {v}" for k, v in sorted(r["missed_by_class"].items())))
        if r.get("missed_faint") is not None:
            bits.append(f"of the modules missed {r['missed_faint']} faint, {r.get('missed_clear')} clear")
    lr = r.get("loss_ratio")
    if lr is not None and not (LOSS_RATIO_OK[0] <= lr <= LOSS_RATIO_OK[1]):
        bits.append(f"loss ratio {lr:.2f}")
    return "; ".join(bits) or "-"


def _stats(vals):
    v = np.asarray([x for x in vals if x is not None and np.isfinite(x)], float)
    if not v.size:
        return None
    return {"n": int(v.size), "worst_low": float(v.min()), "worst_high": float(v.max()),
            "p10": float(np.percentile(v, 10)), "p90": float(np.percentile(v, 90)), "median": float(np.median(v))}


def _group(recs: list[dict]) -> dict:
    ok = [r for r in recs if r["status"] == "ok"]
    return {
        "flights": len(recs), "scored": len(ok),
        "refused": sum(r["status"] == "refused" for r in recs),
        "failed": sum(r["status"] in ("simulate_failed", "evaluate_failed") for r in recs),
        "flagged_invalid": sum(not r["valid"] for r in ok),
        "wrong_and_valid": [r["seed"] for r in ok if r["valid"] and is_wrong(r)],
        "wrong_and_flagged": sum((not r["valid"]) and is_wrong(r) for r in ok),
        "recall": _stats([r["recall"] for r in ok]), "precision": _stats([r["precision"] or 0.0 for r in ok]),
        "recall_clear": _stats([r.get("recall_clear") for r in ok]),
        "wrong_and_valid_clear": [r["seed"] for r in ok if r["valid"] and is_wrong(r, clear=True)],
        "loss_ratio": _stats([r.get("loss_ratio") for r in ok]),
        "false_alarms_per_1000": _stats([r["false_alarms_per_1000"] for r in ok]),
        "registration_error_m": _stats([r.get("registration_error_m") for r in ok]),
    }


STRATA = ("family", "kind", "hemisphere", "hour", "ground", "ortho_relief", "terrain")


def _enrich(records: list[dict]) -> None:
    """Strata of the simulator's optics and terrain, from the scenario the seed draws
    (:func:`pvscan.simulate.sampler.draw_scenario` is deterministic); the demo has neither."""
    from pvscan.simulate.sampler import draw_scenario

    for r in records:
        if "ortho_relief" in r:
            continue
        if r["family"] == "demo":
            r["ortho_relief"], r["terrain"] = "true_ortho", "level"
            continue
        sc = draw_scenario(int(r["seed"]), r["family"])
        f = float(sc.get("ortho", {}).get("relief_height_fraction", 0.0))
        r["ortho_relief"] = "true_ortho" if f == 0 else ("ground_level" if f >= 1 else "smoothed_surface")
        r["terrain"] = "level" if float(sc.get("terrain", {}).get("slope_deg", 0.0)) == 0 else "sloping"


def summarise(records: list[dict]) -> dict:
    """Per seed set: one row per family and per value of each stratum, and 'all'."""
    _enrich(records)
    table: dict = {}
    for sset in ("calibration", "held-out"):
        recs = [r for r in records if r["set"] == sset]
        if not recs:
            continue
        rows = {"all": _group(recs)}
        for key in STRATA:
            for val in sorted({str(r.get(key)) for r in recs if r.get(key) is not None}):
                rows[f"{key}={val}"] = _group([r for r in recs if str(r.get(key)) == val])
        table[sset] = rows
    return table


def _fmt(s, nd=2, cols=("worst_low", "p10", "median")):
    if s is None:
        return " - "
    return " / ".join(f"{s[c]:.{nd}f}" for c in cols)


def markdown(records: list[dict], title: str = "Campaign") -> str:
    """The tables and the wrong-and-valid list as markdown."""
    table = summarise(records)
    done = len(records)
    lines = [f"# {title}", "",
             f"{done} flights finished. Recall / precision: worst / p10 / median. Loss ratio (predicted / true "
             "power loss at STC): worst low / p10 / median / p90 / worst high. False alarms per 1,000 healthy "
             "modules and registration error [m]: median / p90 / worst. ref = refused (exit 1), inv = flagged "
             "validity.ok false, w&v = wrong (recall or precision < 0.9, or loss ratio outside 0.5-2) and valid; "
             "w&v clear = the same with the recall over clear defects (faint ones, under evaluate's faint_contrast "
             "x the healthy modules' spread, left out). Recall clear: worst / p10 / median.",
             ""]
    for sset, rows in table.items():
        lines += [f"## {sset} seeds", "",
                  "| group | n | ref | inv | w&v | w&v clear | recall | recall clear | precision | loss ratio "
                  "| false alarms/1000 | registration [m] |",
                  "|---|---|---|---|---|---|---|---|---|---|---|---|"]
        for name, g in rows.items():
            lines.append(
                f"| {name} | {g['flights']} | {g['refused']} | {g['flagged_invalid']} | {len(g['wrong_and_valid'])} | "
                f"{len(g['wrong_and_valid_clear'])} | {_fmt(g['recall'])} | {_fmt(g['recall_clear'])} | "
                f"{_fmt(g['precision'])} | "
                f"{_fmt(g['loss_ratio'], 2, ('worst_low', 'p10', 'median', 'p90', 'worst_high'))} | "
                f"{_fmt(g['false_alarms_per_1000'], 1, ('median', 'p90', 'worst_high'))} | "
                f"{_fmt(g['registration_error_m'], 2, ('median', 'p90', 'worst_high'))} |")
        lines.append("")
    wv = [r for r in records if r["status"] == "ok" and r["valid"] and is_wrong(r)]
    lines += ["## Wrong and valid flights", "",
              "Replay: `pvscan simulate --random SEED --family FAMILY --out F` (demo: "
              "`pvscan simulate demo_site/scenario.toml --seed SEED --out F`), then `pvscan inspect F/flight.toml "
              "--out R` and `pvscan evaluate F R`.", "",
              "| set | family | seed | kind | hemisphere | hour | ground | P | R | loss ratio | what looked wrong |",
              "|---|---|---|---|---|---|---|---|---|---|---|"]
    for r in sorted(wv, key=lambda r: (r["set"], r["family"], r["seed"])):
        lr = r.get("loss_ratio")
        lines.append(f"| {r['set']} | {r['family']} | {r['seed']} | {r.get('kind')} | {r.get('hemisphere')} | "
                     f"{r.get('hour')} | {r.get('ground')} | {(r['precision'] or 0):.2f} | {r['recall']:.2f} | "
                     f"{'-' if lr is None else f'{lr:.2f}'} | {what_looked_wrong(r)} |")
    if not wv:
        lines.append("| (none) | | | | | | | | | | |")
    other = [r for r in records if r["status"] not in ("ok", "refused")]
    if other:
        lines += ["", "Failed to simulate or evaluate: " + ", ".join(
            f"{r['family']} {r['seed']} ({r['status']}: {r.get('message', '')})" for r in other)]
    refused = [r for r in records if r["status"] == "refused"]
    if refused:
        lines += ["", "Refused: " + "; ".join(f"{r['family']} {r['seed']}: {r.get('message', '')}" for r in refused)]
    return "\n".join(lines) + "\n"


def print_table(table: dict) -> None:
    for sset, rows in table.items():
        print(f"\n== {sset} seeds ==   (recall/precision: worst p10 median; loss ratio: worst-low p10 median "
              "p90 worst-high; false alarms/1000 and registration error [m]: median p90 worst)")
        for name, g in rows.items():
            print(f"{name:28s} n {g['flights']:3d} ref {g['refused']:2d} inv {g['flagged_invalid']:3d} "
                  f"w&v {len(g['wrong_and_valid']):2d} ({len(g['wrong_and_valid_clear']):2d} clear) | "
                  f"R {_fmt(g['recall'])} | Rc {_fmt(g['recall_clear'])} | P {_fmt(g['precision'])} | "
                  f"loss {_fmt(g['loss_ratio'], 2, ('worst_low', 'p10', 'median', 'p90', 'worst_high'))} | "
                  f"FA {_fmt(g['false_alarms_per_1000'], 1, ('median', 'p90', 'worst_high'))} | "
                  f"reg {_fmt(g['registration_error_m'], 2, ('median', 'p90', 'worst_high'))}")


def _range(text: str) -> range:
    a, b = (int(x) for x in text.split("-"))
    return range(a, b + 1)


def _write_atomic(path: Path, text: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.part")
    tmp.write_text(text, encoding="utf-8")
    tmp.replace(path)


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
    ap.add_argument("--out", type=Path, default=ROOT / ".campaign" / "latest",
                    help="folder for records.jsonl and table.json (git-ignored .campaign/ by default)")
    ap.add_argument("--notes", type=Path, default=None, help="markdown summary, rewritten as flights finish")
    ap.add_argument("--title", default="Campaign of random flights")
    ap.add_argument("--summarise", type=Path, default=None, help="only summarise this records.jsonl")
    ap.add_argument("--json", type=Path, default=None, help="write every record and the table here")
    ap.add_argument("--keep", type=Path, default=None, help="keep every flight and result here")
    args = ap.parse_args(argv)
    if args.summarise:
        records = [json.loads(x) for x in args.summarise.read_text().splitlines() if x.strip()]
        print_table(summarise(records))
        if args.notes:
            _write_atomic(args.notes, markdown(records, args.title))
        return 0
    if set(args.calibration_seeds) & set(args.held_out_seeds):
        ap.error("calibration and held-out seed ranges overlap")
    jobs = []
    fams = [f for f in args.families.split(",") if f]
    for fam, n in [(f, args.per_family) for f in fams] + [("demo", args.demo_seeds)]:
        n_cal = n // 2
        for sset, rng_, k in (("calibration", args.calibration_seeds, n_cal),
                              ("held-out", args.held_out_seeds, n - n_cal)):
            for i in range(k):
                jobs.append({"family": fam, "seed": rng_[i], "set": sset,
                             "keep": str(args.keep) if args.keep else None})
    # interleave families so that an early summary already covers every kind of flight
    jobs.sort(key=lambda j: (j["seed"] - (args.calibration_seeds[0] if j["set"] == "calibration"
                                          else args.held_out_seeds[0]), j["set"], j["family"]))
    args.out.mkdir(parents=True, exist_ok=True)
    log = args.out / "records.jsonl"
    t0 = time.perf_counter()
    records = []
    with ProcessPoolExecutor(max_workers=args.workers) as pool, open(log, "w", encoding="utf-8") as fh:
        futs = [pool.submit(run_flight, j) for j in jobs]
        for k, f in enumerate(as_completed(futs), 1):
            r = f.result()
            records.append(r)
            fh.write(json.dumps(r, default=str) + "\n")
            fh.flush()
            print(f"[{k}/{len(jobs)}] {r['set']:11s} {r['family']:24s} seed {r['seed']:6d} {r['status']:9s} "
                  f"R {r.get('recall')} P {r.get('precision')} loss {r.get('loss_ratio')} valid {r.get('valid')} "
                  f"reg {r.get('registration_error_m')} ({r['wall_s']} s)", flush=True)
            if args.notes and (k % 5 == 0 or k == len(jobs)):
                _write_atomic(args.notes, markdown(records, args.title))
    table = summarise(records)
    print_table(table)
    print(f"\n{len(jobs)} flights in {time.perf_counter() - t0:.0f} s on {args.workers} workers")
    _write_atomic(args.out / "table.json", json.dumps(table, indent=1, default=str))
    if args.json:
        _write_atomic(args.json, json.dumps({"records": records, "table": table}, indent=1, default=str))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
