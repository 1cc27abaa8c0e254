"""Type aliases shared by every layer (no imports of the package: the lowest layer)."""
from __future__ import annotations

from collections.abc import Callable
from typing import TypeAlias

__all__ = ["ProgressFn"]

#: ``progress(stage, done, total)``: a caller's progress callback (the CLI draws a bar with it).
ProgressFn: TypeAlias = Callable[[str, int, int], None]
