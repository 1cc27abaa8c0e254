"""One chunk cache for every module sample of a registration (see :func:`shared_chunks`)."""
from __future__ import annotations

import contextlib
from collections.abc import Iterator
from typing import Any

__all__ = ["shared_chunks"]


#: Chunks (256 x 256 px, float32: 256 KiB each) kept by the chunk cache of one registration:
#: at most 128 MiB; a sample of modules spread over the site touches a few hundred. One
#: registration of the 25,536-module benchmark plant asks 14,166 times for 655 chunks: kept
#: in least-recently-used order 1,407 were decoded, with the 2Q policy of the reader 908
#: (768 chunks would hold all 655, but raise the process's peak memory by about 50 MiB).
_SHARED_CHUNKS = 512


class _ChunkedOrthos:
    """An ortho set whose small-window reader is one chunk cache shared by every sample."""

    def __init__(self, orthos: Any, read: Any) -> None:
        self._orthos = orthos
        self._read = read

    def __getattr__(self, name: str) -> Any:
        return getattr(self._orthos, name)

    def window_cache(self, *args: Any, **kwargs: Any) -> contextlib.AbstractContextManager[Any]:
        return contextlib.nullcontext(self._read)


@contextlib.contextmanager
def shared_chunks(orthos: Any) -> Iterator[Any]:
    """``orthos`` with one chunk cache for all the module samples of a registration (the same
    pixels as single reads: :meth:`pvscan.io.ortho.OrthoSet.window_cache`); ``orthos`` itself
    when it has no window cache."""
    cache = getattr(orthos, "window_cache", None)
    if cache is None:
        yield orthos
        return
    with cache(max_chunks=_SHARED_CHUNKS) as read:
        yield _ChunkedOrthos(orthos, read)
