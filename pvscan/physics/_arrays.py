"""Array conventions shared by the physics modules."""
from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

__all__ = ["ArrayLike", "Band", "FloatOrArray", "as_output"]

#: A float for scalar input, a numpy.ndarray otherwise (the physics functions broadcast).
FloatOrArray = Any

#: A camera band: short and long wavelength [um].
Band = Sequence[float]


def as_output(x: ArrayLike) -> FloatOrArray:
    """``float`` for a 0-d result, else the float array."""
    a = np.asarray(x, dtype=float)
    return float(a) if a.ndim == 0 else a
