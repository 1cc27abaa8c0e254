"""The one exception family of pvscan.

Every error that bad input can cause derives from :class:`PvscanError`, so the CLI can
catch that one class and print a one-line message (no traceback). Each subclass also
derives from the built-in exception that fits, so callers may catch either.

Messages name the file, key or feature and what is wrong, in one line.
"""
from __future__ import annotations

__all__ = [
    "PvscanError",
    "ManifestError",
    "PipelineError",
    "LayoutError",
    "OrthoError",
    "ConditionsError",
    "RegistrationError",
    "SimulationError",
    "HistoryError",
    "OutputError",
    "FleetError",
    "MismatchError",
    "PvscanWarning",
    "ValidityWarning",
    "RegistrationWarning",
    "LayoutWarning",
]


class PvscanError(Exception):
    """Root of all pvscan errors."""


class ManifestError(PvscanError, ValueError):
    """The flight manifest (flight.toml) is missing, unreadable or invalid."""


class PipelineError(PvscanError, ValueError):
    """The pipeline settings (pipelines/*.toml) are invalid."""


class LayoutError(PvscanError, ValueError):
    """The module layout is unreadable or a feature is invalid."""


class OrthoError(PvscanError, OSError):
    """An orthomosaic cannot be read or does not fit the flight."""


class ConditionsError(PvscanError, ValueError):
    """Flight conditions (constants, weather series, frames) are invalid."""


class RegistrationError(PvscanError, ValueError):
    """The layout cannot be co-registered to the orthomosaic."""


class SimulationError(PvscanError, ValueError):
    """A simulation scenario is invalid."""


class HistoryError(PvscanError, OSError):
    """The site history database is unreadable, foreign or inconsistent."""


class OutputError(PvscanError, OSError):
    """An output cannot be written (e.g. the folder exists and --overwrite is not given)."""


class FleetError(PvscanError, ValueError):
    """Flights given together cannot run together (e.g. two would write one result folder)."""


class MismatchError(PvscanError, ValueError):
    """Files given together belong to different flights (e.g. a truth and a result)."""


class PvscanWarning(UserWarning):
    """Root of pvscan warnings."""


class ValidityWarning(PvscanWarning):
    """The flight was made outside the recommended acquisition conditions."""


class RegistrationWarning(PvscanWarning):
    """The layout-to-ortho fit is weakly constrained by the image."""


class LayoutWarning(PvscanWarning):
    """A layout feature was repaired or looks inconsistent with the datasheet."""
