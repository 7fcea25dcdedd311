"""Read-only access to the store for the operator's commands.

Only the standard library is imported here (no sqlite-utils, numpy, pandas or
pvlib), so a read command over SSH starts in a few tens of milliseconds, and the
connection is opened read-only, so it can never write to or lock the service's
store. In WAL mode a reader sees the last committed state while the service keeps
writing.

The session-result rows returned here follow the JSON contract of the operator's
``results`` command:

``date`` (YYYY-MM-DD), ``session`` ("am" or "pm"), ``channel``, ``wavelength_nm``,
``v0`` [V], ``v0_1au`` [V], ``v0_rel_unc`` (fraction), ``tau``, ``n_used``,
``n_total``, ``airmass_min``, ``airmass_max``, ``accepted`` (bool), ``reasons``
(list of strings, empty when accepted). Numbers that could not be computed are
``None`` (JSON null).
"""

from __future__ import annotations

import datetime as _dt
import json
import re
import sqlite3
from collections.abc import Mapping
from pathlib import Path
from typing import Any


class StoreError(Exception):
    """The store cannot be used; the message says what is wrong and what to do."""


class StoreReadError(StoreError):
    """The operator's command cannot read the store (missing, wrong or unreadable file)."""


RESULT_KEYS = ("date", "session", "channel", "wavelength_nm", "v0", "v0_1au", "v0_rel_unc",
               "tau", "n_used", "n_total", "airmass_min", "airmass_max", "accepted", "reasons")

_DATE_RE = re.compile(r"\d{4}-\d{2}-\d{2}")
_RESULT_COLUMNS = ("plan_date, session, channel, wavelength_nm, v0, v0_1au, v0_rel_unc, tau, "
                   "n_used, n_total, airmass_min, airmass_max, accepted, reasons")
_RESULT_ORDER = "ORDER BY plan_date, session, wavelength_nm, channel"


def check_plan_date(value: str | _dt.date) -> str:
    """Return ``value`` as a YYYY-MM-DD string; raise ValueError if it is not a date."""
    if isinstance(value, _dt.datetime):
        raise ValueError(f"expected a calendar date (YYYY-MM-DD), got the date-time {value!r}")
    if isinstance(value, _dt.date):
        return value.isoformat()
    if isinstance(value, str) and _DATE_RE.fullmatch(value):
        try:
            _dt.date.fromisoformat(value)
            return value
        except ValueError:
            pass
    raise ValueError(f"expected a date as YYYY-MM-DD (for example 2025-03-21), got {value!r}")


def open_readonly(path: str | Path) -> sqlite3.Connection:
    """Open the store read-only; raise :class:`StoreError` with a clear message.

    Parameters
    ----------
    path : str or Path
        The store file the service writes (``store.path`` in its configuration).

    Returns
    -------
    sqlite3.Connection
        Rows come back as :class:`sqlite3.Row`; every write raises
        ``sqlite3.OperationalError``.

    Raises
    ------
    StoreReadError
        The file is missing, is not an SQLite database, or has no heliotrope tables.
    """
    p = Path(path).expanduser()
    if not p.exists():
        raise StoreReadError(f"{p}: no store here; pass --db with the path of the heliotrope store "
                         "(store.path in the service's configuration)")
    if p.is_dir():
        raise StoreReadError(f"{p}: is a directory; pass --db with the path of the store file")
    uri = p.absolute().as_uri() + "?mode=ro"
    try:
        conn = sqlite3.connect(uri, uri=True, timeout=2.0)
    except sqlite3.Error as exc:
        raise StoreReadError(f"{p}: cannot open the store read-only ({exc}); check that you may "
                         "read the file and its directory") from None
    try:
        conn.execute("PRAGMA query_only = ON")
        row = conn.execute("SELECT count(*) FROM sqlite_master "
                           "WHERE type = 'table' AND name = 'session_results'").fetchone()
    except sqlite3.DatabaseError as exc:
        conn.close()
        raise StoreReadError(f"{p}: not a readable SQLite store ({exc}); pass --db with the path "
                         "of the heliotrope store") from None
    if row[0] == 0:
        conn.close()
        raise StoreReadError(f"{p}: an SQLite file without heliotrope tables; pass --db with the "
                         "path of the heliotrope store (the service creates its tables when "
                         "it first starts)")
    conn.row_factory = sqlite3.Row
    return conn


def result_row_to_contract(row: Mapping[str, Any]) -> dict[str, Any]:
    """Turn one ``session_results`` row into a dict in the JSON contract."""
    reasons = row["reasons"]
    return {
        "date": row["plan_date"],
        "session": row["session"],
        "channel": row["channel"],
        "wavelength_nm": row["wavelength_nm"],
        "v0": row["v0"],
        "v0_1au": row["v0_1au"],
        "v0_rel_unc": row["v0_rel_unc"],
        "tau": row["tau"],
        "n_used": row["n_used"],
        "n_total": row["n_total"],
        "airmass_min": row["airmass_min"],
        "airmass_max": row["airmass_max"],
        "accepted": bool(row["accepted"]),
        "reasons": list(json.loads(reasons)) if reasons else [],
    }


def latest_results(conn: sqlite3.Connection) -> list[dict[str, Any]]:
    """Session results of the most recent plan date that has any, in the JSON contract."""
    row = conn.execute("SELECT max(plan_date) FROM session_results").fetchone()
    if row[0] is None:
        return []
    return _results(conn, "plan_date = ?", (row[0],))


def results_between(conn: sqlite3.Connection, first: str | _dt.date,
                    last: str | _dt.date) -> list[dict[str, Any]]:
    """Session results with ``first <= plan_date <= last`` (local civil dates, inclusive)."""
    d1, d2 = check_plan_date(first), check_plan_date(last)
    if d2 < d1:
        raise ValueError(f"the end date {d2} is before the start date {d1}; swap them")
    return _results(conn, "plan_date BETWEEN ? AND ?", (d1, d2))


def _results(conn: sqlite3.Connection, where: str, params: tuple) -> list[dict[str, Any]]:
    sql = f"SELECT {_RESULT_COLUMNS} FROM session_results WHERE {where} {_RESULT_ORDER}"
    cur = conn.execute(sql, params)
    names = [d[0] for d in cur.description]
    return [result_row_to_contract(dict(zip(names, r, strict=True))) for r in cur.fetchall()]


def last_heartbeat(conn: sqlite3.Connection) -> _dt.datetime | None:
    """When the service last touched its heartbeat (aware UTC), or None if never."""
    row = conn.execute("SELECT value FROM meta WHERE key = 'heartbeat_utc'").fetchone()
    return _dt.datetime.fromisoformat(row[0]) if row else None


def stored_plan(conn: sqlite3.Connection,
                plan_date: str | _dt.date | None = None) -> dict[str, Any] | None:
    """The stored plan of one local date, or the most recent plan when ``plan_date`` is
    None; None when there is no such plan."""
    if plan_date is None:
        row = conn.execute("SELECT plan_json FROM plans ORDER BY plan_date DESC "
                           "LIMIT 1").fetchone()
    else:
        row = conn.execute("SELECT plan_json FROM plans WHERE plan_date = ?",
                           (check_plan_date(plan_date),)).fetchone()
    return json.loads(row[0]) if row else None


def recent_events(conn: sqlite3.Connection, limit: int = 20) -> list[dict[str, Any]]:
    """The newest ``limit`` events, newest first; ``detail`` decoded from JSON."""
    cur = conn.execute("SELECT id, time_utc, level, kind, message, detail FROM events "
                       "ORDER BY time_utc DESC, id DESC LIMIT ?", (int(limit),))
    out = []
    for r in cur.fetchall():
        out.append({"id": r[0], "time_utc": r[1], "level": r[2], "kind": r[3],
                    "message": r[4], "detail": json.loads(r[5]) if r[5] else None})
    return out


def day_measurements(conn: sqlite3.Connection, plan_date: str | _dt.date) -> list[dict[str, Any]]:
    """One line per measurement of a local date, in time order (no samples)."""
    cur = conn.execute(
        "SELECT id, time_utc, session, target_airmass, status, failure, airmass, "
        "pointing_error_deg, locked, n_samples FROM measurements WHERE plan_date = ? "
        "ORDER BY time_utc, id", (check_plan_date(plan_date),))
    names = [d[0] for d in cur.description]
    rows = [dict(zip(names, r, strict=True)) for r in cur.fetchall()]
    for r in rows:
        r["locked"] = None if r["locked"] is None else bool(r["locked"])
    return rows
