"""The weather series of the flight (irradiance and wind) plotted against the validity limits."""
from __future__ import annotations

import datetime as _dt
import logging
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from pvscan.errors import PvscanError
from pvscan.report import _figures as figs
from pvscan.report._images import png_data_uri
from pvscan.report._result import ResultData
from pvscan.report._text import isnum

log = logging.getLogger(__name__)

__all__ = ["series_plot"]


def series_plot(data: ResultData, flight: Any, checks: list[dict], dpi: int) -> str:
    """The plot as a data URI; '' when the flight has no readable weather series."""
    series = None
    if flight is not None:
        series = getattr(flight.conditions, "series", None)
    else:
        manifest = data.manifest_path()
        if manifest is not None:
            try:
                from pvscan.io.manifest import load_flight

                series = load_flight(manifest, check_files=False).conditions.series
            except PvscanError:
                series = None
    if series is None or not Path(series).exists():
        return ""
    try:
        df = pd.read_csv(series)
        times = pd.to_datetime(df["time"], utc=True)
    except (OSError, KeyError, ValueError, pd.errors.ParserError) as exc:
        log.info("weather series %s not plotted: %s", series, exc)
        return ""

    def col(*names: str) -> np.ndarray:
        for n in names:
            if n in df:
                return pd.to_numeric(df[n], errors="coerce").to_numpy(dtype=float)
        return np.full(len(df), np.nan)

    def limit(kind: str, *words: str) -> float | None:
        for c in checks:
            name = str(c["name"]).lower()
            if c["kind"] == kind and any(w in name for w in words) and isnum(c["limit"]) \
                    and "change" not in name:
                return float(c["limit"])
        return None

    def when(text: str) -> Any:
        try:
            return pd.Timestamp(text).tz_convert("UTC") if text else None
        except (ValueError, TypeError):
            return None

    start, end = when(data.flight_start), when(data.flight_end)
    tz = None
    try:
        tz = _dt.datetime.fromisoformat(data.flight_start).tzinfo
    except (TypeError, ValueError):
        pass
    if tz is not None:
        times = times.dt.tz_convert(tz)
        start = start.tz_convert(tz) if start is not None else None
        end = end.tz_convert(tz) if end is not None else None
    png = figs.conditions_series_png(
        list(times), col("poa_irradiance_w_m2", "poa_global"), col("wind_m_s", "wind_speed"),
        poa_min=limit("min", "irradiance", "poa"), wind_max=limit("max", "wind"),
        start=start, end=end, dpi=dpi)
    return png_data_uri(png)
