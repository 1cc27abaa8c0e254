"""Shared constants, warnings, settings and small readers of the site history."""
from __future__ import annotations

import json
import math
from collections.abc import Iterable, Mapping
from datetime import datetime
from pathlib import Path
from typing import Any

import pandas as pd
import shapely
from shapely.geometry import shape

from pvscan.errors import HistoryError, PvscanWarning
from pvscan.io.records import get_path
from pvscan.io.times import parse_datetime

#: Version of the database layout written by this module.
SCHEMA_VERSION = 1
APPLICATION = "pvscan-site-history"
GPKG_APPLICATION_ID = 0x47504B47  # "GPKG", GeoPackage 1.3.1 [1], Req. 2
GPKG_USER_VERSION = 10301  # GeoPackage 1.3.1 [1], Req. 2

#: Change classes between two flights, the most important news first: a defect recorded as
#: repaired or replaced (or soiling as cleaned) between the flights and still there.
CHANGE_CLASSES = ("persists_after_repair", "new", "persisting", "worsened", "improved", "resolved")
MAINTENANCE_ACTIONS = ("repair", "replace", "clean", "other")
SEVERITY_RANK = {"monitor": 1, "repair": 2, "safety": 3}

_BUSY_TIMEOUT_S = 30.0
_LOCK_RETRIES = 8


class LayoutChangeWarning(PvscanWarning):
    """A flight's module layout differs from the site's (ids added or missing, modules moved)."""


class MaintenanceWarning(PvscanWarning):
    """Kept for callers that filter it; no longer issued: a maintenance event naming a module
    the site does not have is an error (:class:`~pvscan.errors.HistoryError` naming the line)."""


# --------------------------------------------------------------------------------------------
# settings


def _settings(settings: Mapping | None) -> Mapping:
    """The ``[history]`` section over the pipeline file's defaults (a pipeline, a mapping of
    sections, the section itself, or None)."""
    from pvscan.io.settings import section

    return section(settings, "history")


#: Message for a result file that is missing.
NOT_A_RESULT = "file not found (not a pvscan inspect result folder?)"


def _features(path: Path) -> list[dict]:
    from pvscan.io.geojson import read_feature_collection

    features: list[dict] = read_feature_collection(path, HistoryError, NOT_A_RESULT)["features"]
    return features


def _geometries(raw: list, ids: list, path: Path) -> list:
    """Shapely geometries of GeoJSON geometry objects (None stays None), converted in one
    vectorised call; a bad one is named by its feature id."""
    out: list = [None] * len(raw)
    idx = [i for i, g in enumerate(raw) if g is not None]
    if not idx:
        return out
    try:
        geoms = shapely.from_geojson([json.dumps(raw[i]) for i in idx], on_invalid="raise")
    except Exception:  # find and name the bad feature
        for i in idx:
            try:
                shape(raw[i])
            except Exception as exc:  # shapely raises several types for bad coordinates
                raise HistoryError(f"{path}: feature {ids[i]}: invalid geometry ({exc})") from None
        raise HistoryError(f"{path}: invalid geometry") from None
    for i, g in zip(idx, geoms):
        out[i] = g
    return out


def _pick(d: Mapping[str, Any], *paths: str) -> Any:
    """First non-empty value among dotted key paths of ``d`` (:func:`pvscan.io.records.get_path`)."""
    return get_path(d, *paths, skip_empty=True)


def _parse_time(value: object, where: str) -> datetime:
    """A recorded time (:func:`pvscan.io.times.parse_datetime`, errors as HistoryError)."""
    return parse_datetime(value, where, HistoryError)


def _as_objects(df: pd.DataFrame, cols: Iterable[str]) -> pd.DataFrame:
    """Text columns as plain Python objects with None for missing (pandas may infer a string
    dtype whose missing value is NaN)."""
    for c in cols:
        df[c] = pd.Series([None if (v is None or (isinstance(v, float) and math.isnan(v))) else v
                           for v in df[c].tolist()], index=df.index, dtype=object)
    return df


def _text(v: Any) -> Any:
    """A text value, None for missing (None or NaN)."""
    return None if v is None or (isinstance(v, float) and math.isnan(v)) else v


def _worse_severity(a: str | None, b: str | None) -> str | None:
    ra, rb = SEVERITY_RANK.get(a or "", 0), SEVERITY_RANK.get(b or "", 0)
    return a if ra >= rb else b


def write_new_file(out_path: str | Path, text: str, *, overwrite: bool = False) -> Path:
    """Write ``text`` to ``out_path`` atomically; an existing file only with ``overwrite``.

    Raises
    ------
    OutputError
        When the path is a folder, the file exists and ``overwrite`` is false, or it cannot be
        written.
    """
    from pvscan.errors import OutputError
    from pvscan.io.outputs import atomic_write

    p = Path(out_path)
    if p.is_dir():
        raise OutputError(f"{p}: is a folder, not a file")
    if p.exists() and not overwrite:
        raise OutputError(f"{p}: exists (use --overwrite to replace it)")
    try:
        p.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{p.parent}: cannot create the folder: {exc.strerror or exc}") from None
    return atomic_write(p, text)
