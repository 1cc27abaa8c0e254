"""Records of a registration: the shift of each block and the combined fit."""
from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

logger = logging.getLogger(__name__)


# --------------------------------------------------------------------------------------
# records
# --------------------------------------------------------------------------------------
@dataclass
class BlockShift:
    """The shift measured in one block of one ortho tile.

    Attributes
    ----------
    x, y : float
        Centre of the block in the ortho CRS [m].
    dx, dy : float
        Shift to add to the layout so it fits the image, east / north [m]
        (NaN when the block gave no usable peak).
    confidence : float
        0..1; product of the peak's signal-to-noise term and its distinctness term.
    tile : int
        Index of the ortho tile the block was read from.
    snr : float
        Peak height above the median of the correlation surface in robust standard
        deviations (1.4826 x MAD) [-].
    distinctness : float
        ``1 - second / best``: the best peak against the best value outside its main
        lobe within the search radius; near 0 when the shift is ambiguous [-].
    candidates : int
        Number of candidate peaks within ``ambiguity_ratio`` of the best one.
    used : bool
        True when the block entered the final fit (not rejected as an outlier).
    note : str
        Why a block was not used, or which candidate was taken.
    """

    x: float
    y: float
    dx: float
    dy: float
    confidence: float
    tile: int = 0
    snr: float = float("nan")
    distinctness: float = float("nan")
    candidates: int = 0
    used: bool = False
    note: str = ""

    def to_dict(self) -> dict:
        return {
            "x": _r(self.x, 3), "y": _r(self.y, 3), "dx_m": _r(self.dx, 4), "dy_m": _r(self.dy, 4),
            "confidence": _r(self.confidence, 3), "tile": int(self.tile), "snr": _r(self.snr, 2),
            "distinctness": _r(self.distinctness, 3), "candidates": int(self.candidates),
            "used": bool(self.used), "note": self.note,
        }


@dataclass
class Registration:
    """Result of :func:`estimate_shift`.

    Attributes
    ----------
    shift_m : tuple of float
        Shift applied to the layout (east, north in the ortho CRS) [m]; ``(0, 0)`` when
        none was applied. With ``follow_drift`` this is the fitted shift at the centre of
        the layout; each module then moves by the fitted shift at its own centre.
    measured_m : tuple of float
        The measured shift, whether applied or not [m] (NaN when nothing was measured).
    blocks : list of BlockShift
    residual_rotation_deg : float
        Rotation of the fitted similarity, counter-clockwise on the map [deg]
        (NaN with fewer than three usable blocks).
    residual_scale : float
        Scale of the fitted similarity [-] (1 = none; NaN with fewer than three blocks).
    confidence : float
        0..1, the confidence of the combined fit.
    applied : bool
    message : str
        One line saying what was done and why.
    notes : list of str
        Remarks (e.g. tiles that contain no layout module).
    contrast : str
        ``"warmer"`` when modules are warmer than their surroundings in the image,
        ``"cooler"`` otherwise, ``""`` when undecided.
    model : tuple of float or None
        Shift field ``(tx, ty, a, b, x0, y0)``: the shift at ``(x, y)`` is
        ``(tx + a (x - x0) - b (y - y0), ty + b (x - x0) + a (y - y0))`` [m].
    follow_drift : bool
        Whether :func:`apply_shift` uses the field (True) or the single ``shift_m``.
    """

    shift_m: tuple[float, float] = (0.0, 0.0)
    measured_m: tuple[float, float] = (float("nan"), float("nan"))
    blocks: list[BlockShift] = field(default_factory=list)
    residual_rotation_deg: float = float("nan")
    residual_scale: float = float("nan")
    confidence: float = 0.0
    applied: bool = False
    message: str = ""
    notes: list[str] = field(default_factory=list)
    contrast: str = ""
    model: tuple[float, float, float, float, float, float] | None = None
    follow_drift: bool = False
    placement: Any = None
    evidence: dict = field(default_factory=dict)
    status: str = ""
    local: Any = None
    local_rows: Any = None

    def shift_at(self, x: Any, y: Any) -> tuple[np.ndarray, np.ndarray]:
        """Applied shift at map points (x, y) [m] (zeros when nothing was applied)."""
        x = np.asarray(x, float)
        y = np.asarray(y, float)
        if not self.applied:
            return np.zeros_like(x), np.zeros_like(y)
        if self.follow_drift and self.model is not None:
            tx, ty, a, b, x0, y0 = self.model
            return tx + a * (x - x0) - b * (y - y0), ty + b * (x - x0) + a * (y - y0)
        return np.full_like(x, self.shift_m[0]), np.full_like(y, self.shift_m[1])

    def to_dict(self) -> dict:
        """Plain-JSON record for ``summary.json``."""
        return {
            "layout_shift_m": [_r(self.shift_m[0], 4), _r(self.shift_m[1], 4)],
            "measured_shift_m": [_r(self.measured_m[0], 4), _r(self.measured_m[1], 4)],
            "applied": bool(self.applied),
            "confidence": _r(self.confidence, 3),
            "residual_rotation_deg": _r(self.residual_rotation_deg, 5),
            "residual_scale": _r(self.residual_scale, 7),
            "follow_drift": bool(self.follow_drift and self.applied and self.model is not None),
            "contrast": self.contrast,
            "message": self.message,
            "notes": list(self.notes),
            "blocks": [b.to_dict() for b in self.blocks],
            "status": self.status,
            "placement": self.placement.to_dict() if self.placement is not None else None,
            "evidence": self.evidence,
            "local": self.local.summary() if self.local is not None else None,
            "tables": self.local.table_records() if self.local is not None else [],
            "local_rows": self.local_rows.summary() if self.local_rows is not None else None,
            "rows": self.local_rows.table_records() if self.local_rows is not None else [],
        }


def _r(v: Any, nd: int) -> float | None:
    v = float(v)
    return None if not math.isfinite(v) else round(v, nd)


def _num(v: Any) -> float:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return float("inf")
    return f if math.isfinite(f) else float("inf")


def _moved_message(p: Any, how: str, q_id: Mapping[str, Any], q_c: Mapping[str, Any], lim: float) -> str:
    """The registration message of a moved placement: shift [m], rotation [deg], scale, ``how``
    it was found, and the module evidence as drawn and as placed."""
    return (f"layout moved by ({p.tx:+.3f}, {p.ty:+.3f}) m, rotated {p.theta_deg:+.3f} deg, "
            f"scaled {p.scale:.5f}{how}: module evidence {q_id['evidence']:.3f} -> {q_c['evidence']:.3f} "
            f"(probe ratios {q_c['ratio_u']:.2f}, {q_c['ratio_v']:.2f}; limit {lim:g}; footprints at their own "
            f"minimum {_num(q_c.get('minimum_share_u')):.0%}, {_num(q_c.get('minimum_share_v')):.0%})")
