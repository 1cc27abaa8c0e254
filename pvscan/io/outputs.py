"""Result files: GeoJSON (RFC 7946), work orders (CSV, GPX), GeoPackage and ``summary.json``.

The writers live in :mod:`pvscan.io.writers`, one module per format; this module gathers
their public names, so ``from pvscan.io import outputs`` keeps working.

References
----------
.. [1] H. Butler et al., "The GeoJSON Format", IETF RFC 7946, 2016. doi:10.17487/RFC7946
.. [2] Open Geospatial Consortium, "OGC GeoPackage Encoding Standard", OGC 12-128r18, 2021.
.. [3] TopoGrafix, "GPX 1.1 Schema Documentation", 2004. https://www.topografix.com/GPX/1/1/
"""
from __future__ import annotations

from pvscan.io.writers import *  # noqa: F403
from pvscan.io.writers import __all__  # noqa: F401
