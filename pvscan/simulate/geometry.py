"""Geometry of a simulated field: tables, module footprints, strings and the pixel lookup.

The field is built in a *field frame* with unit vectors ``a`` (along the table rows) and
``c`` (the direction the modules face, seen from above). A map point ``p`` has field
coordinates ``s = (p - o) . a`` (along the rows) and ``w = -(p - o) . c`` (up the slope,
away from the facing direction), where ``o`` is the lower corner of the first table. Tables
are laid out on a regular grid in (s, w), so finding the module (and its module-local
``u, v``) of any pixel is a few floor divisions: no polygon tests, and memory bounded by
the block being rendered.

Conventions match :mod:`pvscan.io.layout`: row 1 is the module row at the lower edge,
col 1 the table end with the smallest easting (northing for tables running north-south),
module ids ``<table_id>-R<row>-C<col>`` with table ids ``TB<table row>-<table>`` (never a
string that GDAL would read as a time, such as ``T0101``); the module-local frame has ``u`` along the long
side and ``v`` across, the lower edge at 0 and (U, V) right-handed.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TypedDict

import numpy as np
import numpy.typing as npt
from numpy.typing import ArrayLike

from pvscan._typing import FloatArray, IntArray
from pvscan.simulate.scenario import Scenario

__all__ = ["Field", "ModuleArrays", "build_field", "utm_epsg"]


class ModuleArrays(TypedDict):
    """Per-module arrays of a :class:`Field` (index = module index)."""

    trow: IntArray            #: table row (0-based)
    table: IntArray           #: table along the row (0-based)
    row: IntArray             #: module row across the table (0-based)
    col: IntArray             #: module column along the table (0-based grid position)
    col_num: IntArray         #: column number in the module id (1-based, smallest easting first)
    s0: FloatArray            #: field coordinate s of the module's lower corner [m]
    w0: FloatArray            #: field coordinate w of the module's lower corner [m]
    module_id: npt.NDArray[np.object_]
    table_id: npt.NDArray[np.object_]
    string_id: npt.NDArray[np.object_]
    string_index: IntArray    #: position in the string (1-based)
    cx: FloatArray            #: centroid east [m]
    cy: FloatArray            #: centroid north [m]
    corners: FloatArray       #: (n, 4, 2) footprint corners [m]


def utm_epsg(lon: float, lat: float) -> int:
    """EPSG code of the WGS84 UTM zone of a point (326xx north, 327xx south).

    Zones are the regular 6-degree bands; the exceptions around Norway and Svalbard are not
    applied (any zone projects a site of a few hundred metres without noticeable distortion).
    """
    zone = int(math.floor((lon + 180.0) / 6.0)) % 60 + 1
    return (32600 if lat >= 0 else 32700) + zone


@dataclass
class Field:
    """A simulated field in a projected CRS (UTM) [m].

    Attributes
    ----------
    epsg : int
    origin : ndarray (2,)
        Map point of field coordinates (s, w) = (0, 0).
    a, c : ndarray (2,)
        Unit vectors along the rows and toward the facing direction (east, north).
    azimuth_deg, tilt_deg : float
        Facing azimuth and module tilt [deg].
    n_trows, n_tables : int
        Table rows and tables per row.
    rows, cols : int
        Module rows across a table and modules along it.
    portrait : bool
    mod_s, mod_w : float
        Module footprint along the rows / up the slope, seen from above [m].
    gap_s, gap_w : float
        Gaps between modules along / across (the latter shortened by cos(tilt)) [m].
    table_len, table_depth, table_step, pitch : float
        Table length along s, depth along w, spacing of tables along s, row pitch [m].
    col_reversed : bool
        True when col 1 sits at the table's high-s end (so that col 1 has the smallest easting).
    modules : dict of ndarray
        Per-module arrays (index = module index): ``trow, table, row, col`` (0-based grid
        position), ``module_id, table_id, string_id`` (str), ``string_index`` (1-based),
        ``cx, cy`` (centroid), ``corners`` (n, 4, 2) footprint corners.
    lut : ndarray (n_trows, n_tables, rows, cols) of int
        Module index of each grid position.
    """

    epsg: int
    origin: FloatArray
    a: FloatArray
    c: FloatArray
    azimuth_deg: float
    tilt_deg: float
    n_trows: int
    n_tables: int
    rows: int
    cols: int
    portrait: bool
    mod_s: float
    mod_w: float
    gap_s: float
    gap_w: float
    table_len: float
    table_depth: float
    table_step: float
    pitch: float
    col_reversed: bool
    modules: ModuleArrays
    lut: IntArray

    @property
    def n_modules(self) -> int:
        return int(self.lut.size)

    def to_field(self, x: ArrayLike, y: ArrayLike) -> tuple[FloatArray, FloatArray]:
        """Field coordinates (s, w) of map points [m]."""
        dx = np.asarray(x, float) - self.origin[0]
        dy = np.asarray(y, float) - self.origin[1]
        return dx * self.a[0] + dy * self.a[1], -(dx * self.c[0] + dy * self.c[1])

    def to_map(self, s: ArrayLike, w: ArrayLike) -> tuple[FloatArray, FloatArray]:
        """Map points of field coordinates [m]."""
        s = np.asarray(s, float)
        w = np.asarray(w, float)
        return (self.origin[0] + s * self.a[0] - w * self.c[0],
                self.origin[1] + s * self.a[1] - w * self.c[1])

    def bounds(self, margin: float = 0.0) -> tuple[float, float, float, float]:
        """(xmin, ymin, xmax, ymax) of all tables plus a margin [m]."""
        s = np.array([0.0, self.total_s, 0.0, self.total_s])
        w = np.array([0.0, 0.0, self.total_w, self.total_w])
        x, y = self.to_map(s, w)
        return (x.min() - margin, y.min() - margin, x.max() + margin, y.max() + margin)

    @property
    def total_s(self) -> float:
        return (self.n_tables - 1) * self.table_step + self.table_len

    @property
    def total_w(self) -> float:
        return (self.n_trows - 1) * self.pitch + self.table_depth

    def locate(self, x: ArrayLike, y: ArrayLike
               ) -> tuple[IntArray, FloatArray, FloatArray, FloatArray, FloatArray]:
        """Module index and module-local (u, v) of map points.

        Returns
        -------
        idx : ndarray of int
            Module index, -1 outside every module footprint.
        u, v : ndarray of float
            Module-local coordinates (0..1) [-]; meaningless where ``idx == -1``.
        s, w : ndarray of float
            Field coordinates [m].
        """
        s, w = self.to_field(x, y)
        tr = np.floor(w / self.pitch).astype(np.int64)
        w_in = w - tr * self.pitch
        tb = np.floor(s / self.table_step).astype(np.int64)
        s_in = s - tb * self.table_step
        inside = (tr >= 0) & (tr < self.n_trows) & (tb >= 0) & (tb < self.n_tables)
        inside &= (s_in >= 0) & (s_in < self.table_len) & (w_in >= 0) & (w_in < self.table_depth)
        ci = np.floor(s_in / (self.mod_s + self.gap_s)).astype(np.int64)
        s_m = s_in - ci * (self.mod_s + self.gap_s)
        rj = np.floor(w_in / (self.mod_w + self.gap_w)).astype(np.int64)
        w_m = w_in - rj * (self.mod_w + self.gap_w)
        inside &= (s_m < self.mod_s) & (w_m < self.mod_w) & (ci < self.cols) & (rj < self.rows)
        idx = np.full(s.shape, -1, dtype=np.int64)
        if inside.any():
            idx[inside] = self.lut[tr[inside], tb[inside], rj[inside], ci[inside]]
        fs = s_m / self.mod_s
        fw = w_m / self.mod_w
        if self.portrait:
            u, v = fw, 1.0 - fs
        else:
            u, v = fs, fw
        return idx, u, v, s, w

    def uv_to_field(self, idx: IntArray | int, u: ArrayLike, v: ArrayLike) -> tuple[FloatArray, FloatArray]:
        """Field coordinates (s, w) of module-local (u, v) of modules ``idx`` [m]."""
        m = self.modules
        if self.portrait:
            fw, fs = np.asarray(u, float), 1.0 - np.asarray(v, float)
        else:
            fs, fw = np.asarray(u, float), np.asarray(v, float)
        return m["s0"][idx] + fs * self.mod_s, m["w0"][idx] + fw * self.mod_w

    def uv_to_map(self, idx: IntArray | int, u: ArrayLike, v: ArrayLike) -> tuple[FloatArray, FloatArray]:
        """Map points of module-local (u, v) of modules ``idx`` [m]."""
        return self.to_map(*self.uv_to_field(idx, u, v))


def build_field(sc: Scenario) -> Field:
    """Build the field of a (complete) scenario.

    Parameters
    ----------
    sc : dict
        Scenario from :func:`pvscan.simulate.scenario.scenario_from_dict`.
    """
    from pyproj import Transformer

    site, arr, mod = sc["site"], sc["array"], sc["module"]
    epsg = utm_epsg(site["lon"], site["lat"])
    tr = Transformer.from_crs("EPSG:4326", f"EPSG:{epsg}", always_xy=True)
    cx, cy = tr.transform(site["lon"], site["lat"])

    if arr["kind"] == "tracker":
        nominal = 90.0 if arr["facing"] == "east" else 270.0
    else:
        equator = 180.0 if site["lat"] >= 0 else 0.0
        nominal = equator if arr["facing"] == "equator" else (equator + 180.0) % 360.0
    azimuth = (nominal + arr["rotation_deg"]) % 360.0
    phi = math.radians(azimuth)
    c = np.array([math.sin(phi), math.cos(phi)])
    a = np.array([-math.cos(phi), math.sin(phi)])

    tilt = float(arr["tilt_deg"])
    cos_t = math.cos(math.radians(tilt))
    portrait = arr["orientation"] == "portrait"
    mod_s = mod["width_m"] if portrait else mod["length_m"]
    mod_w = (mod["length_m"] if portrait else mod["width_m"]) * cos_t
    gap_s = float(arr["gap_m"])
    gap_w = float(arr["gap_m"]) * cos_t
    rows, cols = int(arr["rows"]), int(arr["cols"])
    table_len = cols * mod_s + (cols - 1) * gap_s
    table_depth = rows * mod_w + (rows - 1) * gap_w
    table_step = table_len + float(arr["table_gap_m"])
    pitch = float(arr["row_pitch_m"])
    n_trows, n_tables = int(arr["table_rows"]), int(arr["tables_per_row"])

    total_s = (n_tables - 1) * table_step + table_len
    total_w = (n_trows - 1) * pitch + table_depth
    origin = np.array([cx, cy]) - a * total_s / 2 + c * total_w / 2

    # col 1 at the smallest easting (northing when the rows run exactly north-south)
    col_reversed = bool(a[0] < -1e-9 or (abs(a[0]) <= 1e-9 and a[1] < 0))

    n = n_trows * n_tables * rows * cols
    lut = np.arange(n, dtype=np.int64).reshape(n_trows, n_tables, rows, cols)
    g_tr, g_tb, g_r, g_c = (x.ravel() for x in np.indices(lut.shape))
    s0 = g_tb * table_step + g_c * (mod_s + gap_s)
    w0 = g_tr * pitch + g_r * (mod_w + gap_w)
    col_num = (cols - g_c) if col_reversed else (g_c + 1)
    # table numbering: first table row at the lower side, tables in order of increasing col
    tb_num = (n_tables - g_tb) if col_reversed else (g_tb + 1)
    table_id = np.array([f"TB{t + 1:02d}-{b:02d}" for t, b in zip(g_tr, tb_num)], dtype=object)
    module_id = np.array([f"{t}-R{r + 1}-C{k:02d}" for t, r, k in zip(table_id, g_r, col_num)], dtype=object)

    # strings: runs of modules_per_string along each module row, alternating direction
    mps = int(arr["modules_per_string"]) or cols
    k_str = (col_num - 1) // mps
    pos = (col_num - 1) % mps
    forward = ((g_r * (cols // mps) + k_str) % 2) == 0
    string_index = np.where(forward, pos + 1, mps - pos)
    string_id = np.array([f"{t}-S{r * (cols // mps) + k + 1}" for t, r, k in zip(table_id, g_r, k_str)],
                         dtype=object)

    corners_s = np.stack([s0, s0 + mod_s, s0 + mod_s, s0], axis=1)
    corners_w = np.stack([w0, w0, w0 + mod_w, w0 + mod_w], axis=1)
    xs, ys = (origin[0] + corners_s * a[0] - corners_w * c[0], origin[1] + corners_s * a[1] - corners_w * c[1])
    corners = np.stack([xs, ys], axis=2)
    cxm = corners[:, :, 0].mean(axis=1)
    cym = corners[:, :, 1].mean(axis=1)
    modules: ModuleArrays = {
        "trow": g_tr, "table": g_tb, "row": g_r, "col": g_c, "col_num": col_num,
        "s0": s0, "w0": w0, "module_id": module_id, "table_id": table_id,
        "string_id": string_id, "string_index": string_index.astype(np.int64),
        "cx": cxm, "cy": cym, "corners": corners,
    }
    return Field(epsg=epsg, origin=origin, a=a, c=c, azimuth_deg=azimuth, tilt_deg=tilt,
                 n_trows=n_trows, n_tables=n_tables, rows=rows, cols=cols, portrait=portrait,
                 mod_s=mod_s, mod_w=mod_w, gap_s=gap_s, gap_w=gap_w, table_len=table_len,
                 table_depth=table_depth, table_step=table_step, pitch=pitch,
                 col_reversed=col_reversed, modules=modules, lut=lut)
