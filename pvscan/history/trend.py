"""Per-flight and per-module series of a site, and their plots."""
from __future__ import annotations

import json
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd

from pvscan.history.common import SEVERITY_RANK, _num, _settings
from pvscan.history.db import _Session

# --------------------------------------------------------------------------------------------
# trend


def normalised_rise(temp_module, temp_air, poa_global, wind_speed, u0: float = 25.0,
                    u1: float = 6.84):
    """Module temperature rise over air scaled to 1000 W/m2 and 1 m/s wind (Faiman model).

    In the Faiman model [2] the steady rise is ``T_m - T_a = G / (u0 + u1 * v)``; scaling the
    measured rise by ``(1000 / G) * (U(v) / U(1))`` makes flights of different irradiance,
    wind and season comparable: a module that follows the model gives ``1000 / (u0 + u1)``
    in every flight.

    Parameters
    ----------
    temp_module : array-like
        Module temperature. [degC]
    temp_air : array-like
        Air temperature. [degC]
    poa_global : array-like
        Plane-of-array irradiance. [W/m2]
    wind_speed : array-like
        Wind speed. [m/s]
    u0 : float
        Constant heat-loss coefficient. [W/(m2 K)]
    u1 : float
        Wind heat-loss coefficient. [W s/(m3 K)]

    Returns
    -------
    numpy.ndarray or float
        Normalised rise. [K] NaN where the irradiance is not positive.

    References
    ----------
    .. [2] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
       Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
    """
    tm, ta, g, v = (np.asarray(x, dtype=float) for x in (temp_module, temp_air, poa_global, wind_speed))
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(g > 0, (tm - ta) * (1000.0 / g) * ((u0 + u1 * v) / (u0 + u1 * 1.0)), np.nan)
    return out if out.ndim else float(out)


@dataclass(frozen=True)
class Trend:
    """Per-flight and per-module series of a site.

    Attributes
    ----------
    flights : pandas.DataFrame
        One row per flight (oldest first): flight_id, start, n_modules, n_anomalies,
        ``count_<defect>`` and ``severity_<severity>`` columns, total_power_loss_w [W],
        total_energy_loss_kwh_per_year [kWh/yr], median_t_module_c [degC],
        median_delta_t_norm_k [K], median_rise_norm_k [K] (Faiman-normalised rise over air;
        NaN when the flight's conditions are not stored).
    modules : pandas.DataFrame
        Long format, one row per module and flight: flight_id, start, module_id, table_id,
        t_median_c [degC], delta_t_norm_k [K], defect, severity, power_loss_w [W].
    """

    flights: pd.DataFrame
    modules: pd.DataFrame = field(repr=False)


def _cond(conds: Mapping, *keys) -> float:
    for k in keys:
        v = conds.get(k)
        if isinstance(v, Mapping):
            v = v.get("value", v.get("mean"))
        v = _num(v) if not isinstance(v, Mapping) else math.nan
        if not math.isnan(v):
            return v
    return math.nan


def site_trend(db_path: str | Path, *, settings: Mapping | None = None) -> Trend:
    """Counts per defect and severity, losses and temperatures of every stored flight.

    Parameters
    ----------
    db_path : path-like
    settings : mapping, optional
        The ``[history]`` section (Faiman coefficients for the normalised rise).

    Returns
    -------
    Trend
    """
    cfg = _settings(settings)
    with _Session(db_path, write=False) as s:
        flights = s.con.execute(
            "SELECT flight_id, start, n_modules, n_anomalies, total_power_loss_w, "
            "total_energy_loss_kwh_per_year, conditions_json FROM flights "
            "ORDER BY start_utc, flight_id").fetchall()
        anoms = s.con.execute("SELECT flight_id, defect, severity FROM anomalies").fetchall()
        mods = s.con.execute(
            "SELECT flight_id, module_id, table_id, t_median_c, delta_t_norm_k, defect, severity, "
            "power_loss_w FROM module_results ORDER BY module_id").fetchall()
    fl = pd.DataFrame(flights, columns=["flight_id", "start", "n_modules", "n_anomalies",
                                        "total_power_loss_w", "total_energy_loss_kwh_per_year",
                                        "conditions_json"])
    an = pd.DataFrame(anoms, columns=["flight_id", "defect", "severity"])
    md = pd.DataFrame(mods, columns=["flight_id", "module_id", "table_id", "t_median_c",
                                     "delta_t_norm_k", "defect", "severity", "power_loss_w"])
    for c in ("t_median_c", "delta_t_norm_k", "power_loss_w"):
        md[c] = pd.to_numeric(md[c]).astype(float)
    order = {f: i for i, f in enumerate(fl["flight_id"])}
    defects = sorted(set(an["defect"].dropna()))
    severities = [x for x in SEVERITY_RANK if x in set(an["severity"].dropna())]
    rows = []
    for rec in fl.to_dict("records"):
        f = rec["flight_id"]
        a = an[an["flight_id"] == f]
        m = md[md["flight_id"] == f]
        row = {k: rec[k] for k in ("flight_id", "start", "n_modules", "n_anomalies")}
        for d in defects:
            row[f"count_{d}"] = int((a["defect"] == d).sum())
        for sv in severities:
            row[f"severity_{sv}"] = int((a["severity"] == sv).sum())
        row["total_power_loss_w"] = _num(rec["total_power_loss_w"])
        row["total_energy_loss_kwh_per_year"] = _num(rec["total_energy_loss_kwh_per_year"])
        tm = m["t_median_c"].to_numpy()
        row["median_t_module_c"] = float(np.nanmedian(tm)) if np.isfinite(tm).any() else math.nan
        dn = m["delta_t_norm_k"].to_numpy()
        row["median_delta_t_norm_k"] = float(np.nanmedian(dn)) if np.isfinite(dn).any() else math.nan
        conds = json.loads(rec["conditions_json"] or "{}")
        g = _cond(conds, "poa_irradiance_w_m2", "poa_global", "poa_global_w_m2")
        ta = _cond(conds, "ambient_c", "temp_air", "temp_air_c")
        v = _cond(conds, "wind_m_s", "wind_speed", "wind_speed_m_s")
        if np.isfinite(tm).any() and not any(math.isnan(x) for x in (g, ta, v)):
            row["median_rise_norm_k"] = float(np.nanmedian(normalised_rise(
                tm, ta, g, v, float(cfg["faiman_u0"]), float(cfg["faiman_u1"]))))
        else:
            row["median_rise_norm_k"] = math.nan
        rows.append(row)
    per_flight = pd.DataFrame(rows)
    starts = dict(zip(fl["flight_id"], fl["start"]))
    md.insert(1, "start", md["flight_id"].map(starts))
    md["_o"] = md["flight_id"].map(order)
    md = md.sort_values(["module_id", "_o"], kind="stable").drop(columns="_o").reset_index(drop=True)
    return Trend(per_flight, md)


_SEVERITY_COLOURS = {"safety": "#b2182b", "repair": "#ef8a62", "monitor": "#67a9cf"}
_MARKERS = "osD^vP*Xhp<>"


def _plot_trend(trend: Trend, out_dir: Path) -> list[str]:
    # a bare Figure renders with the Agg canvas: no pyplot, no global backend state
    from matplotlib.figure import Figure
    from matplotlib.ticker import MaxNLocator

    fl = trend.flights
    # naive UTC datetimes: matplotlib dates, no time-zone conversions
    x = pd.DatetimeIndex([datetime.fromisoformat(s).astimezone(timezone.utc).replace(tzinfo=None)
                          for s in fl["start"]])
    labels = list(fl["flight_id"])
    written = []

    fig = Figure(figsize=(8, 7), layout="constrained")
    ax, ax2 = fig.subplots(2, 1, sharex=True)
    cols = [c for c in fl.columns if c.startswith("count_")]
    for k, c in enumerate(cols):
        ax.plot(x, fl[c], marker=_MARKERS[k % len(_MARKERS)], linestyle="-" if k < 10 else "--",
                label=c[len("count_"):])
    ax.plot(x, fl["n_anomalies"], marker="s", color="black", linewidth=2, label="all anomalies")
    ax.set_ylabel("anomalies per flight [-]")
    ax.set_title("Anomalies per defect pattern")
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize="small", ncols=2)
    bottom = np.zeros(len(fl))
    width = _bar_width(x)
    for sv in ("safety", "repair", "monitor"):
        c = f"severity_{sv}"
        if c in fl.columns:
            vals = fl[c].to_numpy(dtype=float)
            ax2.bar(x, vals, width=width, bottom=bottom, color=_SEVERITY_COLOURS[sv], label=sv)
            bottom += vals
    ax2.set_ylabel("anomalies per flight [-]")
    ax2.set_title("Anomalies per severity")
    ax2.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax2.grid(True, axis="y", alpha=0.3)
    ax2.legend(fontsize="small")
    ax2.set_xlabel("flight start (UTC)")
    _label_flights(ax2, x, labels)
    fig.savefig(out_dir / "counts.png", dpi=100)
    written.append("counts.png")

    fig = Figure(figsize=(8, 6), layout="constrained")
    ax, ax2 = fig.subplots(2, 1, sharex=True)
    ax.plot(x, fl["total_power_loss_w"] / 1000.0, marker="o", color="tab:red")
    ax.set_ylabel("power loss at STC [kW]")
    ax.set_title("Estimated losses")
    ax.set_ylim(bottom=0)
    ax.grid(True, alpha=0.3)
    ax2.plot(x, fl["total_energy_loss_kwh_per_year"] / 1000.0, marker="s", color="tab:blue")
    ax2.set_ylabel("energy loss [MWh/yr]")
    ax2.set_ylim(bottom=0)
    ax2.grid(True, alpha=0.3)
    ax2.set_xlabel("flight start (UTC)")
    _label_flights(ax2, x, labels)
    fig.savefig(out_dir / "loss.png", dpi=100)
    written.append("loss.png")
    return written


def _bar_width(x) -> float:
    """Bar width [days] for bars at dates ``x``: a third of the smallest spacing."""
    if len(x) < 2:
        return 10.0
    gaps = np.diff(np.sort(x.to_numpy()).astype("datetime64[s]").astype(float)) / 86400.0
    gaps = gaps[gaps > 0]
    return float(max(gaps.min() / 3.0, 0.5)) if gaps.size else 10.0


def _label_flights(ax, x, labels) -> None:
    from matplotlib.dates import AutoDateLocator, ConciseDateFormatter

    locator = AutoDateLocator(maxticks=7)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(ConciseDateFormatter(locator))
    for xi, lab in zip(x, labels):
        ax.annotate(str(lab), (xi, 0), xytext=(0, -34), textcoords="offset points",
                    ha="center", va="top", fontsize="x-small", rotation=0,
                    annotation_clip=False)


def write_trend(trend: Trend, out_dir: str | Path, *, overwrite: bool = False) -> list[Path]:
    """Write ``flights.csv``, ``modules.csv`` (long format), ``counts.png`` and ``loss.png``.

    Everything is written into a staging folder beside ``out_dir`` and renamed into place
    only when all files are complete.

    Raises
    ------
    OutputError
        ``out_dir`` exists, is not empty and ``overwrite`` is false; or it cannot be written.
    """
    from pvscan.io.outputs import atomic_write, staging_dir

    out = Path(out_dir)
    with staging_dir(out, overwrite=overwrite) as stage:
        atomic_write(stage / "flights.csv", trend.flights.to_csv(index=False, lineterminator="\n"))
        atomic_write(stage / "modules.csv", trend.modules.to_csv(index=False, lineterminator="\n"))
        names = ["flights.csv", "modules.csv"]
        if len(trend.flights):
            names += _plot_trend(trend, stage)
    return [out / n for n in names]
