"""Layout files read (GeoJSON ourselves, GeoPackage and Shapefile through GDAL) and reprojected."""
from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from pvscan.errors import LayoutError
from pvscan.io.layout.build import build_modules
from pvscan.io.layout.fields import _feature_name

if TYPE_CHECKING:
    import geopandas as gpd

    from pvscan.io.manifest import Flight, LayoutSpec, ModuleSpec

__all__ = ["read_layout"]

def _read_geojson(path: Path) -> gpd.GeoDataFrame:
    """Read GeoJSON ourselves: properties stay exactly as written (GDAL would guess types and
    turn an id such as "T1006" into a time), and a legacy ``crs`` member is honoured."""
    import geopandas as gpd

    from pvscan.io.geojson import read_feature_collection

    doc = read_feature_collection(path, LayoutError, what="the layout", single_feature=True)
    crs: Any = "EPSG:4326"  # RFC 7946: GeoJSON is WGS84 lon/lat
    legacy = doc.get("crs")
    if isinstance(legacy, dict):
        name = (legacy.get("properties") or {}).get("name")
        if name:
            from pyproj import CRS

            try:
                crs = CRS.from_user_input(name)
            except Exception:
                raise LayoutError(f"{path}: crs member {name!r} is not a known coordinate reference system") from None
    props, raw = [], []
    for k, feat in enumerate(doc["features"]):
        if not isinstance(feat, dict) or feat.get("type") != "Feature":
            raise LayoutError(f"{path}: feature #{k + 1}: not a GeoJSON Feature")
        props.append(dict(feat.get("properties") or {}))
        raw.append(feat.get("geometry"))
    geoms = _geojson_geometries(raw, props, path)
    return gpd.GeoDataFrame(pd.DataFrame(props, dtype=object) if props else None, geometry=geoms, crs=crs)


def _geojson_geometries(raw: list, props: list, path: Path) -> np.ndarray:
    """Shapely geometries of the features' GeoJSON members (one array build for plain polygons)."""
    from pvscan.io.geojson import shapes

    def bad(k: int, exc: Exception) -> None:
        name = _feature_name(pd.Series(props[k], dtype=object), k)
        raise LayoutError(f"{path}: {name}: invalid geometry: {exc}") from None

    return shapes(raw, bad)


def _read_file(path: Path) -> gpd.GeoDataFrame:
    import geopandas as gpd

    if not path.exists():
        raise LayoutError(f"{path}: layout file not found")
    if path.suffix.lower() in (".geojson", ".json"):
        gdf = _read_geojson(path)
    else:
        try:
            gdf = gpd.read_file(path, engine="pyogrio")
        except Exception as exc:  # pyogrio raises its own DataSourceError etc.
            msg = " ".join(str(exc).split())
            raise LayoutError(f"{path}: cannot read the layout: {msg}") from None
    if len(gdf) == 0:
        raise LayoutError(f"{path}: the layout has no features")
    if gdf.crs is None:
        raise LayoutError(f"{path}: the layout has no coordinate reference system")
    return gdf


def read_layout(flight_or_path: Flight | str | Path, crs: Any, spec: LayoutSpec | None = None,
                module_spec: ModuleSpec | None = None) -> gpd.GeoDataFrame:
    """Read a layout file and return the modules GeoDataFrame in ``crs``.

    Parameters
    ----------
    flight_or_path : Flight or path-like
        A :class:`pvscan.io.manifest.Flight` (its layout path, layout and module specs are
        used) or a path to the layout file (then give ``spec``).
    crs : pyproj.CRS or str
        Target CRS: the orthomosaic's (projected, metres).
    spec : LayoutSpec, optional
        Array facts when a path is given.
    module_spec : ModuleSpec, optional

    Returns
    -------
    geopandas.GeoDataFrame
        See :func:`build_modules`.
    """
    from pyproj import CRS

    from pvscan.io.manifest import LayoutSpec

    if hasattr(flight_or_path, "flight"):
        flight: Any = flight_or_path
        if flight.flight.layout is None:
            raise LayoutError(f"{flight.path}: key flight.layout: no layout given (pvscan inspect detects one "
                              f"in the ortho; `pvscan layout detect` writes one)")
        path = Path(flight.flight.layout)
        spec = flight.layout
        module_spec = flight.module
    else:
        path = Path(flight_or_path)
        spec = spec or LayoutSpec()
    gdf = _read_file(path)
    target = CRS.from_user_input(crs)
    if not target.is_projected:
        raise LayoutError(f"{path}: target CRS {target.name} is not projected; the ortho must be in metres")
    try:
        gdf = gdf.to_crs(target)
    except Exception as exc:
        raise LayoutError(f"{path}: cannot reproject the layout to {target.name}: {exc}") from None
    return build_modules(gdf, spec, module_spec, path)
