"""Maintenance events (repairs, replacements, cleaning) of a site: reading the log, storing it."""
from __future__ import annotations

import csv
import hashlib
import io
import json
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import date, datetime
from pathlib import Path

import pandas as pd

from pvscan.errors import HistoryError
from pvscan.history.common import MAINTENANCE_ACTIONS
from pvscan.history.db import _now, _Session

# --------------------------------------------------------------------------------------------
# maintenance


@dataclass(frozen=True)
class MaintenanceResult:
    """What :func:`import_maintenance` did: events read, newly stored, already present
    (``unknown_modules`` stays empty: events of modules the site does not have are refused)."""

    n_read: int
    n_added: int
    n_present: int
    unknown_modules: tuple[str, ...] = ()


def _parse_event_date(value: str, where: str) -> str:
    v = (value or "").strip()
    if not v:
        raise HistoryError(f"{where}: empty date")
    try:
        if len(v) == 10:
            return date.fromisoformat(v).isoformat()
        t = datetime.fromisoformat(v.replace("Z", "+00:00"))
    except ValueError:
        raise HistoryError(f"{where}: date {v!r} is not ISO 8601 (YYYY-MM-DD or a date-time)") from None
    return t.isoformat()


#: Header spellings read for each column (after lower-casing and turning spaces and dashes
#: into underscores).
_ALIASES = {
    "date": ("date", "event_date"),
    "module_id": ("module_id", "module", "moduleid"),
    "action": ("action",),
    "note": ("note", "notes", "comment", "comments", "remark", "remarks"),
}


def _column_key(name: str) -> str:
    return "_".join((name or "").strip().lower().replace("-", " ").split())


def _delimiter(header: str) -> str:
    """The delimiter of a maintenance CSV from its header line: ``;`` (spreadsheets with a
    decimal comma write it), tab or ``,``."""
    counts = {d: header.count(d) for d in (";", "\t", ",")}
    best = max(counts, key=lambda d: counts[d])
    return best if counts[best] else ","


def read_maintenance_csv(path: str | Path) -> pd.DataFrame:
    """Read a maintenance log.

    Parameters
    ----------
    path : path-like
        CSV with a header row and columns ``date`` (ISO 8601 date or date-time), ``module_id``,
        ``action`` (repair | replace | clean | other) and an optional ``note``. Separators
        ``,``, ``;`` or tab; headers in any case, with spaces for underscores (``Module ID``)
        and a few common variants (``module``, ``comment``); actions in any case.

    Returns
    -------
    pandas.DataFrame
        Columns date (normalised ISO 8601 text), module_id, action, note, line (the line of
        the file each event came from).

    Raises
    ------
    HistoryError
        Missing file or column, bad date, unknown action, empty module_id (message names the
        line).
    """
    p = Path(path)
    try:
        with open(p, encoding="utf-8-sig", newline="") as fh:
            text = fh.read()
        header = text.splitlines()[0] if text else ""
        reader = csv.reader(io.StringIO(text), delimiter=_delimiter(header))
        raw_fields = next(reader, [])
        keys = [_column_key(f) for f in raw_fields]
        col = {}
        for name, aliases in _ALIASES.items():
            for k, key in enumerate(keys):
                if key in aliases and name not in col:
                    col[name] = k
        missing = [c for c in ("date", "module_id", "action") if c not in col]
        if missing:
            raise HistoryError(f"{p}: missing column {missing[0]} (needs date, module_id, action, note; "
                               f"found {', '.join(repr(f) for f in raw_fields) or 'no header'})")
        rows = []
        for line, values in enumerate(reader, start=2):
            def cell(name: str, values: list[str] = values) -> str:
                k = col.get(name)
                return values[k].strip() if k is not None and k < len(values) else ""
            if not any(cell(c) for c in ("date", "module_id", "action")):
                continue  # blank line
            where = f"{p}: line {line}"
            d = _parse_event_date(cell("date"), where)
            mid = cell("module_id")
            if not mid:
                raise HistoryError(f"{where}: empty module_id")
            action = cell("action").lower()
            if action not in MAINTENANCE_ACTIONS:
                raise HistoryError(f"{where}: action {cell('action')!r} is not one of "
                                   f"{', '.join(MAINTENANCE_ACTIONS)}")
            rows.append({"date": d, "module_id": mid, "action": action, "note": cell("note"), "line": line})
    except FileNotFoundError:
        raise HistoryError(f"{p}: maintenance file not found") from None
    except UnicodeDecodeError:
        raise HistoryError(f"{p}: not UTF-8 text") from None
    except csv.Error as exc:
        raise HistoryError(f"{p}: not valid CSV: {exc}") from None
    return pd.DataFrame(rows, columns=["date", "module_id", "action", "note", "line"])


def _event_hash(rec: Mapping) -> str:
    key = json.dumps([rec["date"], rec["module_id"], rec["action"], rec["note"]])
    return hashlib.sha256(key.encode()).hexdigest()


def import_maintenance(db_path: str | Path, events_csv: str | Path) -> MaintenanceResult:
    """Import repairs, replacements and cleaning into the site history (idempotent).

    An event already stored (same date, module, action and note) is skipped; when nothing is
    new, nothing is written and the file stays byte-identical.

    Raises
    ------
    HistoryError
        A bad file (:func:`read_maintenance_csv`), or a module id the site layout does not
        contain (the message names the line; nothing is stored).
    """
    events = read_maintenance_csv(events_csv)
    with _Session(db_path, write=True) as s:
        known = {r[0] for r in s.con.execute("SELECT module_id FROM site_modules")}
        unknown = events[~events["module_id"].isin(known)]
        if len(unknown):
            first = unknown.iloc[0]
            more = f" (and {len(unknown) - 1} more line(s))" if len(unknown) > 1 else ""
            raise HistoryError(f"{events_csv}: line {first['line']}: module_id {first['module_id']!r} is not "
                               f"in the site layout of {db_path}{more}; nothing imported")
        added = 0
        for rec in events.to_dict("records"):
            cur = s.con.execute(
                "INSERT OR IGNORE INTO maintenance_events (date, module_id, action, note, event_hash, "
                "source) VALUES (?, ?, ?, ?, ?, ?)",
                (rec["date"], rec["module_id"], rec["action"], rec["note"], _event_hash(rec),
                 Path(events_csv).name))
            added += cur.rowcount
        if added == 0:
            s.discard()
        else:
            s.con.execute("UPDATE gpkg_contents SET last_change=? WHERE table_name='maintenance_events'",
                          (_now(),))
    return MaintenanceResult(len(events), added, len(events) - added)


def load_maintenance(db_path: str | Path) -> pd.DataFrame:
    """Stored maintenance events (date, module_id, action, note), by date."""
    with _Session(db_path, write=False) as s:
        rows = s.con.execute("SELECT date, module_id, action, note FROM maintenance_events "
                             "ORDER BY date, module_id, fid").fetchall()
    return pd.DataFrame(rows, columns=["date", "module_id", "action", "note"])
