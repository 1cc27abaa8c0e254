"""Result writers: every file ``pvscan inspect`` writes, each module one format.

``atomic`` (files and folders appear whole or not at all), ``values`` (JSON-ready values,
the ``[outputs]`` settings), ``geometry`` (lon/lat GeoJSON, anomaly regions), ``walk``
(priority order, walking order, electrical attributes), ``geojson`` (modules and anomalies),
``workorders`` (CSV), ``gpx`` (waypoints), ``styles`` + ``gpkg`` (styled GeoPackage) and
``summary`` (``summary.json``, validation of a result folder). :mod:`pvscan.io.outputs`
re-exports the public names.
"""
from __future__ import annotations

from pvscan.io.writers.atomic import atomic_path, atomic_write, clean_stale_staging, staging_dir, write_failure
from pvscan.io.writers.geojson import (
                                       ANOMALY_PROPERTIES,
                                       ELECTRICAL_COLUMNS,
                                       MODULE_PROPERTIES,
                                       anomalies_feature_collection,
                                       module_results,
                                       modules_feature_collection,
                                       validate_geojson_rfc7946,
                                       write_anomalies_geojson,
                                       write_modules_geojson,
)
from pvscan.io.writers.geometry import anomaly_geometries, geometry_to_geojson, region_geometry
from pvscan.io.writers.gpkg import write_geopackage
from pvscan.io.writers.gpx import workorders_gpx, write_workorders_gpx
from pvscan.io.writers.summary import build_summary, safety_cautions, validate_output, write_summary
from pvscan.io.writers.values import to_jsonable
from pvscan.io.writers.walk import prepare_anomalies, walk_order
from pvscan.io.writers.workorders import WORKORDER_COLUMNS, read_workorders_csv, workorders_table, write_workorders_csv

__all__ = [
    "atomic_path", "atomic_write", "staging_dir", "clean_stale_staging", "write_failure",
    "to_jsonable", "geometry_to_geojson", "region_geometry", "anomaly_geometries",
    "module_results", "modules_feature_collection", "anomalies_feature_collection",
    "prepare_anomalies", "walk_order", "workorders_table", "write_modules_geojson",
    "write_anomalies_geojson", "write_workorders_csv", "read_workorders_csv",
    "workorders_gpx", "write_workorders_gpx", "write_geopackage", "build_summary",
    "write_summary", "safety_cautions", "validate_geojson_rfc7946", "validate_output",
    "MODULE_PROPERTIES", "ANOMALY_PROPERTIES", "WORKORDER_COLUMNS", "ELECTRICAL_COLUMNS",
]
