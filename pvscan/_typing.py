"""Type aliases shared by every layer (no imports of the package: the lowest layer;
numpy only)."""
from __future__ import annotations

from collections.abc import Callable
from typing import TypeAlias

import numpy as np
import numpy.typing as npt

__all__ = ["BoolArray", "FloatArray", "IntArray", "ProgressFn"]

#: ``progress(stage, done, total)``: a caller's progress callback (the CLI draws a bar with it).
ProgressFn: TypeAlias = Callable[[str, int, int], None]

#: Arrays of float64 / int64 / bool (numpy's generic alias, spelled once here).
FloatArray: TypeAlias = npt.NDArray[np.float64]
IntArray: TypeAlias = npt.NDArray[np.int64]
BoolArray: TypeAlias = npt.NDArray[np.bool_]
