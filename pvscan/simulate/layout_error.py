"""Errors of the written layout against the plant as it stands in the ortho.

The ortho always shows the modules where they are; the layout file is drawn with the errors
real layouts and georeferencing have (common practice: as-built drawings are placed on a map
by a few control points, so they come out shifted, slightly turned and scaled, and
photogrammetry bends the ortho locally):

``p_drawn = c + scale * R(rotation) (p_true - c) + offset + d_table``

with ``c`` the centre of the field (the bounding box of all tables), ``R`` a rotation
counter-clockwise on the map by ``layout.rotation_deg``, ``layout.scale`` the scale factor
(1.01 = drawn 1 % too large), ``layout.offset_m`` (east, north) [m] and ``d_table`` a
random displacement per table, normal in each axis with ``local_rms_m / sqrt(2)`` so that
its root-mean-square length is ``layout.local_rms_m`` [m] (seeded by the flight's seed).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import ArrayLike

from pvscan._typing import FloatArray, IntArray
from pvscan.simulate.scenario import Scenario

if TYPE_CHECKING:
    from pvscan.simulate.geometry import Field

__all__ = ["LayoutError", "layout_error"]


@dataclass(frozen=True)
class LayoutError:
    """The transform from true map positions to the positions drawn in the layout.

    Attributes
    ----------
    dx_m, dy_m : float
        Shift east, north [m].
    rotation_deg : float
        Rotation about ``centre``, counter-clockwise [deg].
    scale : float
        Scale factor [-].
    local_rms_m : float
        RMS length of the per-table displacements [m].
    centre : (float, float)
        Centre of rotation and scale (field centre, ortho CRS) [m].
    table_shift : ndarray, shape (n_tables_total, 2)
        Displacement of each table (indexed ``trow * n_tables + table``) [m].
    """

    dx_m: float
    dy_m: float
    rotation_deg: float
    scale: float
    local_rms_m: float
    centre: tuple[float, float]
    table_shift: FloatArray

    @property
    def is_identity(self) -> bool:
        return (self.dx_m == 0 and self.dy_m == 0 and self.rotation_deg == 0 and self.scale == 1
                and self.local_rms_m == 0)

    def apply(self, xy: ArrayLike, table_index: IntArray | int | None = None) -> FloatArray:
        """Drawn positions of true map points ``xy`` (..., 2) [m] of tables ``table_index``."""
        xy = np.asarray(xy, float)
        a = math.radians(self.rotation_deg)
        rot = np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]])
        c = np.asarray(self.centre, float)
        out = c + self.scale * (xy - c) @ rot.T + np.array([self.dx_m, self.dy_m])
        if table_index is not None and self.local_rms_m > 0:
            d = self.table_shift[np.asarray(table_index, np.int64)]
            out = out + (d[..., None, :] if out.ndim == d.ndim + 1 else d)
        return out

    def as_truth(self) -> dict[str, Any]:
        """``truth.json`` ``layout_error``: what was drawn wrong, in the ortho CRS."""
        rms = float(np.sqrt(np.mean(np.sum(self.table_shift ** 2, axis=1)))) if self.table_shift.size else 0.0
        return {"dx_m": self.dx_m, "dy_m": self.dy_m, "rotation_deg": self.rotation_deg, "scale": self.scale,
                "local_rms_m": round(rms, 6), "local_rms_m_requested": self.local_rms_m,
                "centre_m": [round(self.centre[0], 3), round(self.centre[1], 3)],
                "rotation_sense": "counter-clockwise on the map",
                "formula": "p_drawn = c + scale * R(rotation) (p_true - c) + [dx, dy] + d_table"}


def layout_error(sc: Scenario, fld: Field, seed: int) -> LayoutError:
    """The :class:`LayoutError` of a scenario (``[layout]`` keys) on its field."""
    lay = sc["layout"]
    off = lay["offset_m"]
    x0, y0, x1, y1 = fld.bounds(0.0)
    n = fld.n_trows * fld.n_tables
    rms = float(lay.get("local_rms_m", 0.0))
    rng = np.random.default_rng([int(seed), 9])
    shift = rng.normal(0.0, rms / math.sqrt(2.0), (n, 2)) if rms > 0 else np.zeros((n, 2))
    return LayoutError(float(off[0]), float(off[1]), float(lay.get("rotation_deg", 0.0)),
                       float(lay.get("scale", 1.0)), rms, ((x0 + x1) / 2, (y0 + y1) / 2), shift)
