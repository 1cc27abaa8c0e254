"""Date-times read from files: one parser for manifests, weather series, frames and results.

Every time pvscan reads (``flight.start``, a weather series' ``time`` column, a camera
frame's ``time``, ``summary.json`` ``flight.start`` in a site history) is ISO 8601 with a
UTC offset: a time without one is ambiguous by hours in the field, so it is an error
naming where it was read, never a guess.
"""
from __future__ import annotations

from datetime import datetime

from pvscan.errors import PvscanError

__all__ = ["parse_datetime"]


def parse_datetime(value: object, where: str, error: type[PvscanError] = PvscanError) -> datetime:
    """An aware date-time from ISO 8601 text (or from an aware datetime / pandas Timestamp).

    Parameters
    ----------
    value : str or datetime
        ISO 8601 text with a UTC offset (``2026-06-14T10:40:00+02:00``; ``Z`` or ``z`` for
        UTC), or a datetime.
    where : str
        What was read, for the message (file, key, row), e.g. ``"flight.toml: key flight.start"``.
    error : type
        The :class:`~pvscan.errors.PvscanError` subclass to raise (the reader's own).

    Returns
    -------
    datetime
        In the offset it was written with (``astimezone`` converts).

    Raises
    ------
    PvscanError
        ``error``: empty text, text that is not ISO 8601, or a time without a UTC offset.
    """
    if isinstance(value, datetime):
        to_py = getattr(value, "to_pydatetime", None)  # a pandas Timestamp
        t = to_py() if callable(to_py) else value
    else:
        text = str(value).strip()
        if not text:
            raise error(f"{where}: empty date-time")
        try:
            t = datetime.fromisoformat(text[:-1] + "+00:00" if text.endswith(("Z", "z")) else text)
        except ValueError:
            raise error(f"{where}: {value!r} is not ISO 8601 (write e.g. 2026-06-14T10:40:00+02:00)") from None
    if t.tzinfo is None or t.utcoffset() is None:
        shown = value if isinstance(value, str) else t.isoformat()
        raise error(f"{where}: {shown!r} has no UTC offset (write e.g. +02:00 or Z)")
    return t
