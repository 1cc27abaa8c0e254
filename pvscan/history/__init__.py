"""Site history: the results of many flights of one site in one GeoPackage, and what changed.

A plant is flown several times a year. :func:`add_flight` stores the results folder of one
``pvscan inspect`` run in a per-site database; :func:`compare` tells, module by module, which
defects are new, persisting, worsened, improved or resolved between two flights;
:func:`import_maintenance` records repairs and replacements so a resolved defect can be told
apart from one that vanished without anyone touching the module (suspicious: a missed
detection, a module not imaged, or a defect that comes and goes); :func:`site_trend` gives
counts, losses and temperatures per flight and per module; :func:`degradation` the
normalised delta T of every module that was ever anomalous, flight by flight, and its
robust rate of change per year.

Modules: ``common`` (constants, settings), ``results`` (reading a result folder), ``db``
(GeoPackage encoding, transactions), ``store`` (add, list, read back), ``maintenance``,
``compare`` (change classes), ``trend`` (series and plots), ``degradation``.

The database
------------
One GeoPackage 1.3 file per site, written with :mod:`sqlite3` following the GeoPackage
encoding (``gpkg_spatial_ref_sys``, ``gpkg_contents``, ``gpkg_geometry_columns``, geometries
as GeoPackage binary: a ``GP`` header with an envelope, then ISO WKB). GIS tools (and
``geopandas.read_file(path, layer="module_results")``) open its spatial layers:

``site_modules``
    the site's module layout as first seen (module_id, table_id, footprint, first flight);
``module_results``
    one row per module and flight (temperatures, ``delta_t_norm_k``, defect, power loss);
``anomalies``
    one row per anomaly and flight (region geometry, defect, severity, losses, priority).

Plain tables: ``flights`` (flight id, site, start, end, conditions and summary as JSON,
content hash, time added, layout differences to the site), ``maintenance_events`` and
``pvscan_metadata`` (key/value; ``schema_version``). A database whose schema version is newer
than :data:`SCHEMA_VERSION` is refused, as is an SQLite file without our metadata.

Every command is one transaction (``BEGIN IMMEDIATE`` with a busy timeout and retries), so two
processes adding flights at the same time both succeed. Adding a flight whose content hash is
already stored writes nothing at all: the file stays byte-identical.

References
----------
.. [1] Open Geospatial Consortium, "OGC GeoPackage Encoding Standard", version 1.3.1,
   OGC 12-128r18, 2021.
.. [2] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
   Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
.. [3] IEC TS 62446-3:2017, Photovoltaic (PV) systems - Requirements for testing,
   documentation and maintenance - Part 3: Photovoltaic modules and plants - Outdoor
   infrared thermography.
"""
from __future__ import annotations

from pvscan.history.common import (
                                   CHANGE_CLASSES,
                                   MAINTENANCE_ACTIONS,
                                   SCHEMA_VERSION,
                                   LayoutChangeWarning,
                                   MaintenanceWarning,
)
from pvscan.history.compare import classify_change, compare, compare_flights, module_states, write_changes
from pvscan.history.maintenance import MaintenanceResult, import_maintenance, load_maintenance, read_maintenance_csv
from pvscan.history.results import FlightResult, content_hash, read_result_dir
from pvscan.history.store import AddResult, LayoutDiff, add_flight, layout_diff, list_flights, load_flight_results
from pvscan.history.trend import Trend, normalised_rise, site_trend, write_trend

__all__ = [
    "SCHEMA_VERSION",
    "CHANGE_CLASSES",
    "MAINTENANCE_ACTIONS",
    "LayoutChangeWarning",
    "MaintenanceWarning",
    "FlightResult",
    "LayoutDiff",
    "AddResult",
    "MaintenanceResult",
    "Trend",
    "read_result_dir",
    "content_hash",
    "layout_diff",
    "add_flight",
    "list_flights",
    "load_flight_results",
    "load_maintenance",
    "read_maintenance_csv",
    "import_maintenance",
    "module_states",
    "classify_change",
    "compare",
    "compare_flights",
    "write_changes",
    "normalised_rise",
    "site_trend",
    "write_trend",
]
