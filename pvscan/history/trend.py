"""Per-flight and per-module series of a site, and their plots."""
from __future__ import annotations

import json
import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike

from pvscan.history.common import SEVERITY_RANK
from pvscan.history.db import _Session
from pvscan.io.records import as_float as _num
from pvscan.physics._arrays import FloatOrArray
from pvscan.physics.heat import U0_FAIMAN_2008, U1_FAIMAN_2008, normalise_delta_t

if TYPE_CHECKING:
    from matplotlib.axes import Axes

# --------------------------------------------------------------------------------------------
# trend


def normalised_rise(temp_module: ArrayLike, temp_air: ArrayLike, poa_global: ArrayLike, wind_speed: ArrayLike,
                    u0: float = U0_FAIMAN_2008, u1: float = U1_FAIMAN_2008, *, g_ref: float = 1000.0,
                    wind_ref: float = 1.0) -> FloatOrArray:
    """Module temperature rise over air scaled to reference irradiance and wind (Faiman model).

    In the Faiman model [2] the steady rise is ``T_m - T_a = G / (u0 + u1 * v)``; scaling the
    measured rise by ``(g_ref / G) * (U(v) / U(wind_ref))``
    (:func:`pvscan.physics.heat.normalise_delta_t`, the one copy of the model) makes flights
    of different irradiance, wind and season comparable: a module that follows the model
    gives ``g_ref / U(wind_ref)`` in every flight.

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
    g_ref, wind_ref : float
        Reference irradiance [W/m2] and wind speed [m/s].

    Returns
    -------
    numpy.ndarray or float
        Normalised rise. [K] NaN where the irradiance is not positive.

    References
    ----------
    .. [2] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
       Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
    """
    rise = np.asarray(temp_module, dtype=float) - np.asarray(temp_air, dtype=float)
    return normalise_delta_t(rise, poa_global, wind_speed, g_ref=g_ref, wind_ref=wind_ref, u0=u0, u1=u1)


@dataclass(frozen=True)
class Trend:
    """Per-flight and per-module series of a site.

    Attributes
    ----------
    flights : pandas.DataFrame
        One row per flight (oldest first): flight_id, start, n_modules, n_anomalies,
        ``count_<defect>`` and ``severity_<severity>`` columns, total_power_loss_w [W],
        total_energy_loss_kwh_per_year [kWh/yr], median_t_module_c [degC],
        median_delta_t_norm_k [K], temp_air_c [degC], poa_global_w_m2 [W/m2],
        wind_speed_m_s [m/s] (the flight's mean conditions), median_rise_norm_k [K]
        (Faiman-normalised rise over air; NaN when the flight's conditions are not stored).
    modules : pandas.DataFrame
        Long format, one row per module and flight: flight_id, start, module_id, table_id,
        t_median_c [degC], delta_t_norm_k [K], defect, severity, power_loss_w [W].
    """

    flights: pd.DataFrame
    modules: pd.DataFrame = field(repr=False)


def _cond(conds: Mapping[str, Any], *keys: str) -> float:
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
        The pipeline: ``[heat]`` (Faiman coefficients) and ``[reference]`` (reference
        irradiance and wind) for the normalised rise, the same as ``delta_t_norm_k``.

    Returns
    -------
    Trend
    """
    from pvscan.diagnose.thermal import Normalisation

    norm = Normalisation.from_settings(settings)
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
        row["temp_air_c"] = ta
        row["poa_global_w_m2"] = g
        row["wind_speed_m_s"] = v
        if np.isfinite(tm).any() and not any(math.isnan(x) for x in (g, ta, v)):
            row["median_rise_norm_k"] = float(np.nanmedian(normalised_rise(
                tm, ta, g, v, norm.heat.u0, norm.heat.u1, g_ref=norm.g_ref_w_m2, wind_ref=norm.wind_ref_m_s)))
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

#: Defect classes in words, for legends.
DEFECT_WORDS = {
    "hot_cell": "hot cell", "several_hot_cells": "several hot cells",
    "bypassed_substring": "bypassed substring", "several_bypassed_substrings": "several bypassed substrings",
    "open_module": "open module", "open_string": "open string", "pid": "PID (potential-induced degradation)",
    "soiling": "soiling", "junction_box": "hot junction box",
}


def defect_words(defect: str) -> str:
    """A defect class in words (``several_hot_cells`` -> ``several hot cells``)."""
    return DEFECT_WORDS.get(defect, defect.replace("_", " "))


def _keep_markers_inside(ax: Axes, *, y_floor: float | None = None) -> None:
    """Pad the axes so markers at the first and last flight and at the extremes are drawn
    whole: a data margin on both axes, and the y floor set below the lowest value."""
    ax.margins(x=0.08, y=0.1)
    if y_floor is not None:
        lo, hi = ax.get_ylim()
        ax.set_ylim(y_floor - 0.06 * max(hi - y_floor, 1.0), hi)


def _plot_trend(trend: Trend, out_dir: Path) -> list[str]:
    written = []
    for name, fig in trend_figures(trend).items():
        fig.savefig(out_dir / name, dpi=100)
        written.append(name)
    return written


def trend_figures(trend: Trend) -> dict:
    """The trend plots as matplotlib Figures: ``counts.png`` (anomalies per defect class, in
    words, and per severity), ``loss.png`` (power and energy loss) and ``temperature.png``
    (module and air temperature as flown; normalised rise over air and normalised delta T)."""
    # a bare Figure renders with the Agg canvas: no pyplot, no global backend state
    from matplotlib.figure import Figure
    from matplotlib.ticker import MaxNLocator

    fl = trend.flights
    # naive UTC datetimes: matplotlib dates, no time-zone conversions
    x = pd.DatetimeIndex([datetime.fromisoformat(s).astimezone(UTC).replace(tzinfo=None)
                          for s in fl["start"]])
    labels = list(fl["flight_id"])
    figures = {}

    fig = Figure(figsize=(8, 7), layout="constrained")
    ax, ax2 = fig.subplots(2, 1, sharex=True)
    cols = [c for c in fl.columns if c.startswith("count_")]
    for k, c in enumerate(cols):
        ax.plot(x, fl[c], marker=_MARKERS[k % len(_MARKERS)], linestyle="-" if k < 10 else "--",
                label=defect_words(c[len("count_"):]))
    ax.plot(x, fl["n_anomalies"], marker="s", color="black", linewidth=2, label="all anomalies")
    ax.set_ylabel("anomalies per flight [-]")
    ax.set_title("Anomalies per defect class")
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax.grid(True, alpha=0.3)
    _keep_markers_inside(ax, y_floor=0.0)
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
    figures["counts.png"] = fig

    fig = Figure(figsize=(8, 6), layout="constrained")
    ax, ax2 = fig.subplots(2, 1, sharex=True)
    ax.plot(x, fl["total_power_loss_w"] / 1000.0, marker="o", color="tab:red")
    ax.set_ylabel("power loss at STC [kW]")
    ax.set_title("Estimated losses")
    ax.grid(True, alpha=0.3)
    _keep_markers_inside(ax, y_floor=0.0)
    ax2.plot(x, fl["total_energy_loss_kwh_per_year"] / 1000.0, marker="s", color="tab:blue")
    ax2.set_ylabel("energy loss [MWh/yr]")
    ax2.grid(True, alpha=0.3)
    _keep_markers_inside(ax2, y_floor=0.0)
    ax2.set_xlabel("flight start (UTC)")
    _label_flights(ax2, x, labels)
    figures["loss.png"] = fig

    fig = Figure(figsize=(8, 6), layout="constrained")
    ax, ax2 = fig.subplots(2, 1, sharex=True)
    ax.plot(x, fl["median_t_module_c"], marker="o", color="tab:red", label="modules (median)")
    if "temp_air_c" in fl.columns and np.isfinite(fl["temp_air_c"].to_numpy(dtype=float)).any():
        ax.plot(x, fl["temp_air_c"], marker="^", color="tab:blue", label="air")
    ax.set_ylabel("temperature [degC]")
    ax.set_title("Temperatures as flown")
    ax.grid(True, alpha=0.3)
    _keep_markers_inside(ax)
    ax.legend(fontsize="small")
    ax2.plot(x, fl["median_rise_norm_k"], marker="o", color="tab:orange",
             label="module rise over air, normalised (median)")
    ax2.plot(x, fl["median_delta_t_norm_k"], marker="D", color="tab:gray",
             label="delta T to the local reference, normalised (median)")
    ax2.axhline(0.0, color="black", linewidth=0.6)
    ax2.set_ylabel("at reference conditions [K]")
    ax2.set_title("Normalised temperatures (Faiman): comparable across seasons")
    ax2.grid(True, alpha=0.3)
    _keep_markers_inside(ax2)
    ax2.legend(fontsize="small")
    ax2.set_xlabel("flight start (UTC)")
    _label_flights(ax2, x, labels)
    figures["temperature.png"] = fig
    return figures


def _bar_width(x: pd.Series) -> float:
    """Bar width [days] for bars at dates ``x``: a third of the smallest spacing."""
    if len(x) < 2:
        return 10.0
    gaps = np.diff(np.sort(x.to_numpy()).astype("datetime64[s]").astype(float)) / 86400.0
    gaps = gaps[gaps > 0]
    return float(max(gaps.min() / 3.0, 0.5)) if gaps.size else 10.0


def _label_flights(ax: Axes, x: Iterable[Any], labels: Iterable[object]) -> None:
    from matplotlib.dates import AutoDateLocator, ConciseDateFormatter

    locator = AutoDateLocator(maxticks=7)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(ConciseDateFormatter(locator))
    for xi, lab in zip(x, labels):
        ax.annotate(str(lab), (xi, 0), xytext=(0, -34), textcoords="offset points",
                    ha="center", va="top", fontsize="x-small", rotation=0,
                    annotation_clip=False)


def write_trend(trend: Trend, out_dir: str | Path, *, overwrite: bool = False) -> list[Path]:
    """Write ``flights.csv``, ``modules.csv`` (long format), ``counts.png``, ``loss.png`` and
    ``temperature.png``.

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
