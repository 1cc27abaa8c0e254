"""Map labels that do not collide: greedy placement of the priority numbers around their marks.

Labels are placed one by one in priority order (1 first): each tries positions around its
mark, nearest ring first, and takes the first whose box overlaps neither a mark nor a label
already placed and stays inside the map. A label that finds no free position takes the one
overlapping least and is reported (``free`` False). Works in typographic points [pt].
"""
from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = ["place_labels"]

# directions tried on every ring: right, upper right, up, upper left, left, lower left, down, lower right
_DIRS = np.array([(1, 0), (1, 1), (0, 1), (-1, 1), (-1, 0), (-1, -1), (0, -1), (1, -1)], dtype=float)


def _overlap(box: np.ndarray, boxes: np.ndarray) -> np.ndarray:
    """Overlap area of ``box`` (x0, y0, x1, y1) with each row of ``boxes`` [pt²]."""
    if len(boxes) == 0:
        return np.zeros(0)
    w = np.minimum(box[2], boxes[:, 2]) - np.maximum(box[0], boxes[:, 0])
    h = np.minimum(box[3], boxes[:, 3]) - np.maximum(box[1], boxes[:, 1])
    return np.clip(w, 0, None) * np.clip(h, 0, None)


def place_labels(points: np.ndarray, sizes: Sequence[tuple[float, float]], *, mark_radius: float,
                 frame: tuple[float, float, float, float], rings: Sequence[float] = (2.0, 9.0, 18.0, 30.0, 45.0, 62.0)
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Label centres for marks at ``points``.

    Parameters
    ----------
    points : (n, 2) array
        Mark centres, in placement order [pt].
    sizes : sequence of (width, height)
        Each label's box [pt].
    mark_radius : float
        Half the side of the square each mark covers [pt].
    frame : (x0, y0, x1, y1)
        The map's box; labels stay inside it [pt].
    rings : sequence of float
        Gaps between the mark's edge and the label's nearest edge tried, nearest first [pt].

    Returns
    -------
    (centres, free)
        ``centres`` (n, 2) [pt]; ``free`` (n,) bool, False where no position was free.
    """
    pts = np.asarray(points, dtype=float).reshape(-1, 2)
    n = len(pts)
    r = float(mark_radius)
    occupied = np.column_stack([pts - r, pts + r]) if n else np.zeros((0, 4))
    placed: list[np.ndarray] = []
    centres = np.zeros((n, 2))
    free = np.zeros(n, dtype=bool)
    fx0, fy0, fx1, fy1 = frame
    for i in range(n):
        w, h = sizes[i]
        best, best_cost = None, np.inf
        reach = r + max(rings) + max(w, h)
        others = np.vstack([occupied, *placed]) if placed else occupied
        near = (others[:, 2] > pts[i, 0] - reach) & (others[:, 0] < pts[i, 0] + reach) \
            & (others[:, 3] > pts[i, 1] - reach) & (others[:, 1] < pts[i, 1] + reach)
        others = others[near]
        for gap in rings:
            for dx, dy in _DIRS:
                cx = pts[i, 0] + dx * (r + gap + w / 2)
                cy = pts[i, 1] + dy * (r + gap + h / 2)
                box = np.array([cx - w / 2, cy - h / 2, cx + w / 2, cy + h / 2])
                if box[0] < fx0 or box[1] < fy0 or box[2] > fx1 or box[3] > fy1:
                    continue
                cost = float(_overlap(box, others).sum())
                if cost < best_cost:
                    best, best_cost = (cx, cy), cost
                if cost == 0.0:
                    break
            if best_cost == 0.0:
                break
        if best is None:  # the frame is too small for the label: next to the mark
            best = (pts[i, 0] + r + w / 2, pts[i, 1])
        centres[i] = best
        free[i] = best_cost == 0.0
        placed.append(np.array([[best[0] - w / 2, best[1] - h / 2, best[0] + w / 2, best[1] + h / 2]]))
    return centres, free
