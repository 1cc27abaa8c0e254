"""Shadows of raised tables on the ground and on the next row, over sloping terrain.

Geometry in the field frame of :mod:`pvscan.simulate.geometry`: ``s`` along the table rows,
``w`` up the slope of the tables (away from the direction they face), heights ``z`` [m]
above the field's datum. The terrain is the plane ``z_g = grade_s * s + grade_w * w``. A
table row ``tr`` is a rigid plane strip, tilted against the horizontal, from its lower edge
(``w0 = tr * pitch``, ``h_low`` above the terrain there) to its upper edge
(``w0 + depth``, ``h_high - h_low`` higher); rows follow the terrain.

A point ``(s, w, z)`` is in a table's shadow when the ray from it toward the sun meets a
table: the ray climbs ``t`` metres while it moves ``-t * (ds, dw)`` on the map, where
``(ds, dw) = -cot(elevation) * (sun direction)`` is the horizontal shadow displacement per
metre of height, in field coordinates. For each candidate table row the two unknowns
(climb ``t``, fraction ``lam`` up the table) solve a 2 x 2 linear system exactly; the
table along the row then follows from ``s - t * ds``. Ground straight under a table is
shaded too. This is the construction of a shadow cast by an inclined plane, written here
from the geometry; the 1-D row-to-row result is checked against
:func:`pvlib.shading.shaded_fraction1d` (Marion et al.) in ``tests/test_sim_physics.py``.

What shade does to a module (:class:`RowShade`): a shaded cell keeps only the diffuse part
of the plane-of-array irradiance (``conditions.diffuse_fraction``), so its rise over the air
drops by the beam share; and a substring with a cell more than half shaded carries less
current than the string, so its bypass diode conducts (common practice: one shaded cell
is enough, from memory) and the unshaded cells of that substring keep their power as heat,
like a bypassed substring.

References
----------
.. [1] B. Marion, S. MacAlpine, C. Deline et al., "A practical irradiance model for bifacial
   PV modules", IEEE PVSC 2017 (the 1-D row-to-row shade geometry of pvlib.shading).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt
from numpy.typing import ArrayLike

from pvscan._typing import BoolArray, FloatArray, IntArray

if TYPE_CHECKING:
    from pvscan.simulate.geometry import Field

__all__ = ["ShadowGeometry", "shadow_geometry", "terrain_grades", "ground_beam_factor", "RowShade"]


@dataclass(frozen=True)
class ShadowGeometry:
    """What the shadow test needs [m], [-].

    Attributes
    ----------
    ds, dw : float
        Horizontal shadow displacement per metre of height, along ``s`` and ``w`` [-].
    h_low, h_high : float
        Heights of the tables' lower and upper edges above the terrain [m].
    grade_s, grade_w : float
        Terrain height gained per metre along ``s`` and ``w`` [-].
    pitch, depth, table_step, table_len : float
        Row pitch, table depth seen from above, table spacing and length along the row [m].
    n_trows, n_tables : int
    """

    ds: float
    dw: float
    h_low: float
    h_high: float
    grade_s: float
    grade_w: float
    pitch: float
    depth: float
    table_step: float
    table_len: float
    n_trows: int
    n_tables: int

    def ground_z(self, s: ArrayLike, w: ArrayLike) -> FloatArray:
        """Terrain height at field points [m]."""
        return self.grade_s * np.asarray(s, float) + self.grade_w * np.asarray(w, float)

    def table_z(self, s: ArrayLike, w: ArrayLike) -> FloatArray:
        """Height of the table plane of the row each point lies in [m]: a rigid table whose
        lower edge stands ``h_low`` above the terrain there, tilted against the horizontal."""
        w = np.asarray(w, float)
        w0 = np.floor(w / self.pitch) * self.pitch
        lam = np.clip((w - w0) / self.depth, 0.0, 1.0)
        return self.ground_z(s, w0) + self.h_low + lam * (self.h_high - self.h_low)

    def shaded(self, s: ArrayLike, w: ArrayLike, z: ArrayLike, own_row: ArrayLike | None = None) -> BoolArray:
        """True where points ``(s, w)`` at height ``z`` lie in the shadow of a table.

        Parameters
        ----------
        s, w, z : array_like
            Field coordinates and height of the points [m].
        own_row : array_like of int, optional
            Table row each point belongs to (module points); that row is not tested (a plane
            does not shade itself) and points are not "under" a table. ``None``: ground points.
        """
        s = np.asarray(s, float)
        w = np.asarray(w, float)
        z = np.broadcast_to(np.asarray(z, float), s.shape)
        out = np.zeros(s.shape, bool)
        if s.size == 0:
            return out
        dh = self.h_high - self.h_low                 # height gained across a table [m]
        den = 1.0 + self.grade_s * self.ds + dh * self.dw / self.depth
        tr_here = np.floor(w / self.pitch).astype(np.int64)
        reach = (abs(self.dw) * (self.h_high + abs(self.grade_w) * self.pitch + abs(self.grade_s) * 10.0 + 2.0)
                 + self.depth) / self.pitch
        k = int(math.ceil(reach)) + 1
        for dtr in range(-k, k + 1):
            tr = tr_here + dtr
            ok = (tr >= 0) & (tr < self.n_trows)
            if own_row is not None:
                ok &= tr != np.asarray(own_row)
            if not ok.any():
                continue
            w0 = tr * self.pitch
            if abs(den) < 1e-9:
                continue
            t = (self.grade_s * s + self.grade_w * w0 + self.h_low - z + dh * (w - w0) / self.depth) / den
            lam = (w - w0 - t * self.dw) / self.depth
            sp = s - t * self.ds
            tb = np.floor(sp / self.table_step)
            on = (sp - tb * self.table_step) <= self.table_len
            out |= ok & (t > 1e-6) & (lam >= 0.0) & (lam <= 1.0) & (tb >= 0) & (tb < self.n_tables) & on
        if own_row is None:  # ground straight under a table
            wp = w - tr_here * self.pitch
            tb = np.floor(s / self.table_step)
            out |= ((tr_here >= 0) & (tr_here < self.n_trows) & (wp >= 0) & (wp <= self.depth) & (tb >= 0)
                    & (tb < self.n_tables) & ((s - tb * self.table_step) <= self.table_len))
        return out


def terrain_grades(slope_deg: float, aspect_deg: float, a: ArrayLike, c: ArrayLike) -> tuple[float, float]:
    """Terrain height gained per metre along the field's ``s`` and ``w`` [-].

    Parameters
    ----------
    slope_deg : float
        Terrain slope [deg].
    aspect_deg : float
        Azimuth of the downhill direction, clockwise from north [deg].
    a, c : array_like (2,)
        Field unit vectors along the rows and toward the facing direction (east, north).
    """
    g = math.tan(math.radians(slope_deg))
    down = np.array([math.sin(math.radians(aspect_deg)), math.cos(math.radians(aspect_deg))])
    grad = -g * down                    # uphill gradient on the map (east, north)
    return float(grad @ np.asarray(a, float)), float(-(grad @ np.asarray(c, float)))


def ground_beam_factor(slope_deg: float, aspect_deg: float, sun_elevation_deg: float, sun_azimuth_deg: float,
                       diffuse_fraction: float) -> float:
    """Irradiance on sloping ground over that on level ground [-].

    The beam part scales with the cosine of the angle of incidence on the slope over the
    cosine of the zenith angle; the diffuse part (``diffuse_fraction`` of the level
    irradiance, isotropic) by the sky view ``(1 + cos slope) / 2``. Clipped at zero (a slope
    turned away from the sun gets diffuse light only).
    """
    zen = math.radians(90.0 - sun_elevation_deg)
    beta = math.radians(slope_deg)
    # the ground's normal tilts toward the downhill direction
    cos_aoi = (math.cos(zen) * math.cos(beta)
               + math.sin(zen) * math.sin(beta) * math.cos(math.radians(sun_azimuth_deg - aspect_deg)))
    beam = max(cos_aoi, 0.0) / max(math.cos(zen), 1e-3)
    return (1.0 - diffuse_fraction) * beam + diffuse_fraction * (1.0 + math.cos(beta)) / 2.0


def shadow_geometry(field: Field, sun_elevation_deg: float, sun_azimuth_deg: float, mount_height_m: float,
                    slope_deg: float = 0.0, aspect_deg: float = 0.0) -> ShadowGeometry:
    """The :class:`ShadowGeometry` of a field under a sun position (pvlib's convention:
    elevation above the horizon, azimuth clockwise from north) [deg]."""
    k = 1.0 / math.tan(math.radians(max(sun_elevation_deg, 1.0)))
    az = math.radians(sun_azimuth_deg)
    d = -k * np.array([math.sin(az), math.cos(az)])  # away from the sun, per metre of height
    tilt = math.radians(field.tilt_deg)
    h_high = mount_height_m + field.table_depth * math.tan(tilt)
    gs, gw = terrain_grades(slope_deg, aspect_deg, field.a, field.c)
    return ShadowGeometry(ds=float(d @ field.a), dw=float(-(d @ field.c)), h_low=float(mount_height_m),
                          h_high=float(h_high), grade_s=gs, grade_w=gw, pitch=field.pitch, depth=field.table_depth,
                          table_step=field.table_step, table_len=field.table_len, n_trows=field.n_trows,
                          n_tables=field.n_tables)


class RowShade:
    """Shade of the other rows on every cell of every module, and the substrings it bypasses.

    Parameters
    ----------
    field : Field
    geom : ShadowGeometry
    n_along, n_across, bypass_diodes : int
        Cells along / across a module, and substrings (strips along the long side).
    sub : int
        Sample points per cell side (``sub**2`` per cell) for the shaded fraction.
    """

    def __init__(self, field: Field, geom: ShadowGeometry, n_along: int, n_across: int, bypass_diodes: int,
                 sub: int = 4) -> None:
        n = field.n_modules
        uu = (np.arange(n_along * sub) + 0.5) / (n_along * sub)
        vv = (np.arange(n_across * sub) + 0.5) / (n_across * sub)
        U, V = np.meshgrid(uu, vv, indexing="ij")
        frac = np.zeros((n, n_along, n_across), np.float32)
        chunk = max(1, 300_000 // U.size)
        m = field.modules
        for i0 in range(0, n, chunk):
            ids = np.arange(i0, min(n, i0 + chunk))
            s, w = field.uv_to_field(ids[:, None, None], U[None], V[None])
            z = geom.table_z(s, w)
            sh = geom.shaded(s, w, z, own_row=np.broadcast_to(m["trow"][ids][:, None, None], s.shape))
            frac[ids] = sh.reshape(ids.size, n_along, sub, n_across, sub).mean(axis=(2, 4))
        self.fraction: npt.NDArray[np.float32] = frac
        per = n_across // bypass_diodes
        sub_max = frac.reshape(n, n_along, bypass_diodes, per).max(axis=(1, 3))
        #: (n_modules, bypass_diodes): substring with a cell more than half shaded
        self.bypassed = sub_max > 0.5
        self.per = per

    @property
    def any(self) -> BoolArray:
        """Modules with any shaded cell (n,)."""
        return self.fraction.reshape(self.fraction.shape[0], -1).max(axis=1) > 0.0

    def factor(self, idx: IntArray, ci: IntArray, cj: IntArray, beam_fraction: float) -> npt.NDArray[np.float32]:
        """Share of the module's rise over the air a cell keeps under shade [-]."""
        return 1.0 - beam_fraction * self.fraction[idx, ci, cj]

    def bypassed_at(self, idx: IntArray, cj: IntArray) -> BoolArray:
        """True where a point's substring is bypassed by the shade [-]."""
        return self.bypassed[idx, cj // self.per]
