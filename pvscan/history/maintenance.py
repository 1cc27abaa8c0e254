"""Maintenance events (repairs, replacements, cleaning) of a site: reading the log, storing it."""
from __future__ import annotations

import csv
import hashlib
import json
import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import date, datetime
from pathlib import Path

import pandas as pd

from pvscan.errors import HistoryError
from pvscan.history.common import MAINTENANCE_ACTIONS, MaintenanceWarning
from pvscan.history.db import _Session, _now

# --------------------------------------------------------------------------------------------
# maintenance


@dataclass(frozen=True)
class MaintenanceResult:
    """What :func:`import_maintenance` did: events read, newly stored, already present, and
    module ids the site does not know."""

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


def read_maintenance_csv(path: str | Path) -> pd.DataFrame:
    """Read a maintenance log.

    Parameters
    ----------
    path : path-like
        CSV with a header row and columns ``date`` (ISO 8601 date or date-time), ``module_id``,
        ``action`` (repair | replace | clean | other) and an optional ``note``.

    Returns
    -------
    pandas.DataFrame
        Columns date (normalised ISO 8601 text), module_id, action, note.

    Raises
    ------
    HistoryError
        Missing file or column, bad date, unknown action, empty module_id (message names the
        line).
    """
    p = Path(path)
    try:
        with open(p, encoding="utf-8-sig", newline="") as fh:
            reader = csv.DictReader(fh)
            fields = [f.strip() for f in (reader.fieldnames or [])]
            missing = [c for c in ("date", "module_id", "action") if c not in fields]
            if missing:
                raise HistoryError(f"{p}: missing column {missing[0]} (needs date, module_id, action, note)")
            rows = []
            for line, raw in enumerate(reader, start=2):
                rec = {(k or "").strip(): (v or "").strip() if isinstance(v, str) else v
                       for k, v in raw.items()}
                if not any(rec.get(c) for c in ("date", "module_id", "action")):
                    continue  # blank line
                where = f"{p}: line {line}"
                d = _parse_event_date(rec.get("date", ""), where)
                mid = rec.get("module_id", "")
                if not mid:
                    raise HistoryError(f"{where}: empty module_id")
                action = rec.get("action", "").lower()
                if action not in MAINTENANCE_ACTIONS:
                    raise HistoryError(f"{where}: action {rec.get('action')!r} is not one of "
                                       f"{', '.join(MAINTENANCE_ACTIONS)}")
                rows.append({"date": d, "module_id": mid, "action": action,
                             "note": rec.get("note") or ""})
    except FileNotFoundError:
        raise HistoryError(f"{p}: maintenance file not found") from None
    except UnicodeDecodeError:
        raise HistoryError(f"{p}: not UTF-8 text") from None
    except csv.Error as exc:
        raise HistoryError(f"{p}: not valid CSV: {exc}") from None
    return pd.DataFrame(rows, columns=["date", "module_id", "action", "note"])


def _event_hash(rec: Mapping) -> str:
    key = json.dumps([rec["date"], rec["module_id"], rec["action"], rec["note"]])
    return hashlib.sha256(key.encode()).hexdigest()


def import_maintenance(db_path: str | Path, events_csv: str | Path) -> MaintenanceResult:
    """Import repairs, replacements and cleaning into the site history (idempotent).

    An event already stored (same date, module, action and note) is skipped; when nothing is
    new, nothing is written and the file stays byte-identical.

    Warns
    -----
    MaintenanceWarning
        For module ids the site layout does not contain (they are stored anyway).
    """
    events = read_maintenance_csv(events_csv)
    with _Session(db_path, write=True) as s:
        known = {r[0] for r in s.con.execute("SELECT module_id FROM site_modules")}
        unknown = tuple(sorted(set(events["module_id"]) - known))
        if unknown:
            more = f" (+{len(unknown) - 5} more)" if len(unknown) > 5 else ""
            warnings.warn(f"{events_csv}: module id(s) not in the site layout: "
                          f"{', '.join(unknown[:5])}{more}", MaintenanceWarning, stacklevel=2)
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
    return MaintenanceResult(len(events), added, len(events) - added, unknown)


def load_maintenance(db_path: str | Path) -> pd.DataFrame:
    """Stored maintenance events (date, module_id, action, note), by date."""
    with _Session(db_path, write=False) as s:
        rows = s.con.execute("SELECT date, module_id, action, note FROM maintenance_events "
                             "ORDER BY date, module_id, fid").fetchall()
    return pd.DataFrame(rows, columns=["date", "module_id", "action", "note"])
