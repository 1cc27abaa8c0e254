"""Shapely geometries of many GeoJSON geometry members at once.

Layouts and result files hold tens of thousands of plain polygons. Building them one by
one with :func:`shapely.geometry.shape` costs about 40 us each; gathering their positions
into one array and building them with :func:`shapely.from_ragged_array` costs about 1 us.
Anything that is not a plain 2-D polygon with closed rings (multipolygons, points, 3-D
positions, open rings, malformed members) still goes through ``shape`` one by one, which
gives the same geometry and the same error as before.
"""
from __future__ import annotations

import os
import threading
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import shapely

__all__ = ["read_feature_collection", "shapes", "remember_written", "written_document"]

#: The GeoJSON documents this process wrote last, by the identity of their file (device,
#: inode, size, modification time): a reader in the same process (the report after
#: ``pvscan inspect``) takes the document instead of parsing the file again. At most
#: ``_WRITTEN_KEEP`` documents (a result's modules and anomalies) are held.
_WRITTEN: dict[tuple[int, int, int, int], Any] = {}
_WRITTEN_KEEP = 2
#: Flights inspected in threads of one process (``pvscan.fleet``) share the registry.
_WRITTEN_LOCK = threading.Lock()


def _file_identity(path: str | os.PathLike[str]) -> tuple[int, int, int, int] | None:
    try:
        st = os.stat(path)
    except OSError:
        return None
    return (st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns)


def remember_written(path: str | os.PathLike[str], doc: Any) -> None:
    """Keep ``doc``, the JSON-ready document just written to ``path`` (exactly what
    ``json.loads`` gives back from the file: plain dicts, lists, str, int, float, bool, None),
    for :func:`written_document`. The caller must not change ``doc`` afterwards."""
    key = _file_identity(path)
    if key is None:
        return
    with _WRITTEN_LOCK:
        _WRITTEN.pop(key, None)
        _WRITTEN[key] = doc
        while len(_WRITTEN) > _WRITTEN_KEEP:
            _WRITTEN.pop(next(iter(_WRITTEN)))


def written_document(path: str | os.PathLike[str]) -> Any:
    """The document this process wrote to ``path`` (:func:`remember_written`) while the file
    is still the one written (same device, inode, size and modification time; a file renamed
    since is the same file), else None. Handed out once: the holder lets it go."""
    key = _file_identity(path)
    if key is None:
        return None
    with _WRITTEN_LOCK:
        return _WRITTEN.pop(key, None)


def read_feature_collection(path: Path, error_cls: type[Exception], missing: str = "file not found", *,
                            what: str | None = None, single_feature: bool = False) -> dict[str, Any]:
    """The parsed GeoJSON FeatureCollection of ``path`` (properties exactly as written).

    Parameters
    ----------
    path : Path
        The GeoJSON file.
    error_cls : type
        The error raised, with a one-line message (a :class:`pvscan.errors.PvscanError` class).
    missing : str
        Message when the file does not exist.
    what : str, optional
        What the file is (``"the layout"``): messages read ``<path>: cannot read <what>: ...``.
    single_feature : bool
        Also accept a lone Feature, as a collection of one.

    Raises
    ------
    error_cls
        The file is missing or unreadable, not JSON (:func:`pvscan.io.resources.read_json_file`),
        or not a FeatureCollection.
    """
    from pvscan.io.resources import read_json_file

    doc = read_json_file(path, error_cls, missing, what=what)
    prefix = f"{path}: cannot read {what}: " if what else f"{path}: "
    if single_feature and isinstance(doc, dict) and doc.get("type") == "Feature":
        doc = {"type": "FeatureCollection", "features": [doc]}
    if not isinstance(doc, dict) or doc.get("type") != "FeatureCollection" or not isinstance(
            doc.get("features"), list):
        raise error_cls(f"{prefix}not a GeoJSON FeatureCollection")
    return doc


def _plain_polygon_rings(g: object) -> list | None:
    """The rings of a plain GeoJSON Polygon member (closed, 4+ positions each), else None."""
    if type(g) is not dict or g.get("type") != "Polygon":
        return None
    rings = g.get("coordinates")
    if type(rings) is not list or not rings:
        return None
    for r in rings:
        if type(r) is not list or len(r) < 4 or r[0] != r[-1]:
            return None
    return rings


def shapes(members: Sequence, on_error: Callable[[int, Exception], None]) -> np.ndarray:
    """Shapely geometries of GeoJSON geometry members (``None`` or ``{}`` -> None).

    Parameters
    ----------
    members : sequence
        The ``geometry`` members of the features, in order.
    on_error : callable
        ``on_error(index, exception)`` for a member ``shape`` cannot read; it should raise
        (the caller's own error naming the feature). If it returns, the geometry is None.

    Returns
    -------
    numpy.ndarray
        Object array of shapely geometries (or None), one per member.
    """
    from shapely.geometry import shape

    n = len(members)
    out = np.full(n, None, dtype=object)
    flat: list = []
    ring_len: list[int] = []
    poly_rings: list[int] = []
    fast: list[int] = []
    slow: list[int] = []
    for k, g in enumerate(members):
        rings = _plain_polygon_rings(g)
        if rings is None:
            slow.append(k)
            continue
        fast.append(k)
        poly_rings.append(len(rings))
        for r in rings:
            ring_len.append(len(r))
            flat.extend(r)
    if fast:
        try:
            coords = np.array(flat, dtype=np.float64)
            if coords.ndim != 2 or coords.shape[1] != 2:
                raise ValueError("not 2-D positions")
            offsets = (np.concatenate([[0], np.cumsum(ring_len)]), np.concatenate([[0], np.cumsum(poly_rings)]))
            out[fast] = shapely.from_ragged_array(shapely.GeometryType.POLYGON, coords, offsets)
        except (ValueError, TypeError, shapely.errors.GEOSException):
            slow = sorted(slow + fast)  # shape() reads and words them one by one
    for k in slow:
        g = members[k]
        try:
            out[k] = shape(g) if g else None
        except Exception as exc:
            on_error(k, exc)
    return out
