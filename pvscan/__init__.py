"""pvscan: post-flight analysis of drone thermal orthomosaics of PV plants."""
from __future__ import annotations

from typing import Any

__version__ = "0.1.0"

__all__ = ["__version__", "load_flight", "load_pipeline", "inspect_flight"]


def __getattr__(name: str) -> Any:  # lazy public API, so importing pvscan stays cheap
    if name == "load_flight":
        from pvscan.io.manifest import load_flight

        return load_flight
    if name == "load_pipeline":
        from pvscan.io.settings import load_pipeline

        return load_pipeline
    if name == "inspect_flight":
        from pvscan.pipeline import inspect_flight

        return inspect_flight
    raise AttributeError(name)
