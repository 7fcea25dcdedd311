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
import math
import re
import sqlite3
import sys
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

if TYPE_CHECKING:
    from daemon.science.points import SessionPoint


class StoreError(Exception):
    """The store cannot be used; the message says what is wrong and what to do."""


class StoreReadError(StoreError):
    """The operator's command cannot read the store (missing, wrong or unreadable file)."""


#: The sessions of a plan day, and those that get a fit.
SESSIONS = ("am", "pm", "routine")
FIT_SESSIONS = ("am", "pm")

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


# Messages of the errors SQLite gives a reader that may read the store file but not
# create or write its -shm (WAL index): a stopped service leaves no -shm behind, and a
# reader in the store's group (directory 0750, file 0640) cannot create one.
_NO_SHM_MESSAGES = ("attempt to write a readonly database", "unable to open database file",
                    "readonly database")

#: What to do with a damaged store; said whenever SQLite calls the file damaged.
DAMAGE_ADVICE = ("the store looks damaged: stop heliotroped, copy the store file with its "
                 "-wal and -shm files aside, never delete the -wal or -shm files, and "
                 "salvage from the copy with `sqlite3 COPY.db .recover > recovered.sql`")


class DamagedStoreError(StoreReadError):
    """The store file, or a row in it, is damaged; the message gives the salvage route."""


def _connect_and_check(uri: str) -> tuple[sqlite3.Connection, int]:
    conn = sqlite3.connect(uri, uri=True, timeout=2.0)
    try:
        conn.execute("PRAGMA query_only = ON")
        row = conn.execute("SELECT count(*) FROM sqlite_master "
                           "WHERE type = 'table' AND name = 'session_results'").fetchone()
    except BaseException:
        conn.close()
        raise
    return conn, row[0]


def is_damage(exc: sqlite3.Error) -> bool:
    """Whether SQLite's error says the store file is damaged."""
    text = str(exc).lower()
    return isinstance(exc, sqlite3.DatabaseError) and (
        "not a database" in text or "malformed" in text or "corrupt" in text)


def open_readonly(path: str | Path, warn: TextIO | None = None) -> sqlite3.Connection:
    """Open the store read-only; raise :class:`StoreError` with a clear message.

    When the store can be read but its ``-shm`` file cannot be created or written (the
    service is stopped and the reader only has the group's read permission), the store
    is opened in SQLite's immutable mode instead, and one line on ``warn`` says so:
    such a read ignores the ``-wal`` file and is only safe while no writer runs.

    Parameters
    ----------
    path : str or Path
        The store file the service writes (``store.path`` in its configuration).
    warn : text stream, optional
        Where the immutable-mode notice goes; standard error when None.

    Returns
    -------
    sqlite3.Connection
        Rows come back as :class:`sqlite3.Row`; every write raises
        ``sqlite3.OperationalError``.

    Raises
    ------
    DamagedStoreError
        SQLite says the file is not a database or is malformed.
    StoreReadError
        The file is missing, unreadable, or has no heliotrope tables.
    """
    p = Path(path).expanduser()
    if not p.exists():
        raise StoreReadError(f"{p}: no store here; pass --db with the path of the heliotrope store "
                             "(store.path in the service's configuration)")
    if p.is_dir():
        raise StoreReadError(f"{p}: is a directory; pass --db with the path of the store file")
    base = p.absolute().as_uri()
    try:
        try:
            conn, tables = _connect_and_check(base + "?mode=ro")
        except sqlite3.OperationalError as exc:
            if not any(m in str(exc).lower() for m in _NO_SHM_MESSAGES):
                raise
            conn, tables = _connect_and_check(base + "?mode=ro&immutable=1")
            print(f"heliotrope: {p}: read in SQLite's immutable mode, since its -shm file "
                  f"cannot be created or written ({exc}); commits still in the -wal file "
                  "are not seen, and this read is safe only while heliotroped is stopped",
                  file=warn if warn is not None else sys.stderr)
    except sqlite3.Error as exc:
        if is_damage(exc):
            raise DamagedStoreError(f"{p}: not a readable SQLite store ({exc}); "
                                    f"{DAMAGE_ADVICE}") from None
        raise StoreReadError(f"{p}: cannot open the store read-only ({exc}); check that you may "
                             "read the file and its directory") from None
    if tables == 0:
        conn.close()
        raise StoreReadError(f"{p}: an SQLite file without heliotrope tables; pass --db with the "
                             "path of the heliotrope store (the service creates its tables when "
                             "it first starts)")
    conn.row_factory = sqlite3.Row
    return conn


def result_contract(row: Mapping[str, Any]) -> dict[str, Any]:
    """The JSON-contract keys of a result row, with non-finite numbers as None."""
    out = {}
    for key in RESULT_KEYS:
        value = row[key]
        if isinstance(value, float) and not math.isfinite(value):
            value = None
        out[key] = value
    return out



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


def _plan_item_error(item: Any, keys: tuple[str, ...], what: str) -> str | None:
    if not isinstance(item, dict):
        return f"{what} is not a JSON object"
    missing = [k for k in keys if k not in item]
    if missing:
        return f"{what} lacks {', '.join(missing)}"
    try:
        _dt.datetime.fromisoformat(item["time_utc"])
    except (TypeError, ValueError):
        return f"{what} has time_utc {item['time_utc']!r}, not ISO 8601"
    return None


_TARGET_KEYS = ("time_utc", "session", "airmass", "apparent_zenith_deg", "azimuth_deg")


def _plan_body_error(plan: dict[str, Any]) -> str | None:
    zone = plan.get("timezone")
    if zone is not None:
        try:
            ZoneInfo(zone)
        except (TypeError, ValueError, ZoneInfoNotFoundError):
            return f"has the unknown time zone {zone!r}"
    for i, t in enumerate(plan["targets"]):
        problem = _plan_item_error(t, _TARGET_KEYS, f"target {i + 1}")
        if problem is None:
            bad = [k for k in _TARGET_KEYS[2:] if isinstance(t[k], bool)
                   or not isinstance(t[k], (int, float))]
            problem = f"target {i + 1} has a non-numeric {bad[0]}" if bad else None
        if problem:
            return problem
    for i, e in enumerate(plan.get("events", [])):
        problem = _plan_item_error(e, ("time_utc", "kind"), f"event {i + 1}")
        if problem:
            return problem
    skipped = plan.get("skipped", [])
    if not isinstance(skipped, list) or not all(
            isinstance(k, dict) and {"session", "airmass", "reason"} <= k.keys()
            and isinstance(k["airmass"], (int, float)) for k in skipped):
        return "has a list of skipped targets without session, airmass and reason"
    return None


def decode_plan(plan_json: Any, plan_date: str | None = None) -> dict[str, Any]:
    """A stored plan's JSON text as a dict, checked for the keys the commands read.

    Raises
    ------
    DamagedStoreError
        The text is not JSON, or lacks the plan's ``date``, its ``targets`` (each with
        time, session, air mass, zenith and azimuth) or a valid ``events`` list.
    """
    where = f"the stored plan for {plan_date}" if plan_date else "a stored plan"
    try:
        plan = json.loads(plan_json)
    except (TypeError, ValueError) as exc:
        problem = f"is not valid JSON ({exc})"
    else:
        problem = None
        if not isinstance(plan, dict):
            problem = "is not a JSON object"
        elif "date" not in plan or not isinstance(plan.get("targets"), list):
            problem = "lacks its date or its list of targets"
        elif not isinstance(plan.get("events", []), list):
            problem = "has events that are not a list"
        else:
            problem = _plan_body_error(plan)
    if problem:
        raise DamagedStoreError(
            f"{where} is damaged: its plan_json {problem}; the service writes the plan "
            "again when it next plans that day (restart heliotroped for today's), or "
            "pass --config FILE to `heliotrope plan` to compute it") from None
    return plan


def stored_plan(conn: sqlite3.Connection,
                plan_date: str | _dt.date | None = None) -> dict[str, Any] | None:
    """The stored plan of one local date, or the most recent plan when ``plan_date`` is
    None; None when there is no such plan. A damaged plan row raises
    :class:`DamagedStoreError` (see :func:`decode_plan`)."""
    if plan_date is None:
        row = conn.execute("SELECT plan_date, plan_json FROM plans ORDER BY plan_date DESC "
                           "LIMIT 1").fetchone()
    else:
        row = conn.execute("SELECT plan_date, plan_json FROM plans WHERE plan_date = ?",
                           (check_plan_date(plan_date),)).fetchone()
    return decode_plan(row[1], row[0]) if row else None


def stored_sun_table(conn: sqlite3.Connection,
                     plan_date: str | _dt.date) -> tuple[str, dict[str, Any]] | None:
    """The stored sun table of one local date as (configuration SHA-256, table dict),
    or None when there is none (a store from before m007 has no such table). A row that
    is not JSON raises :class:`DamagedStoreError`."""
    try:
        row = conn.execute("SELECT config_sha256, table_json FROM sun_tables "
                           "WHERE plan_date = ?", (check_plan_date(plan_date),)).fetchone()
    except sqlite3.OperationalError as exc:
        if "no such table" in str(exc):
            return None
        raise
    if row is None:
        return None
    try:
        return row[0], json.loads(row[1])
    except (TypeError, ValueError):
        raise DamagedStoreError(f"the stored sun table for {plan_date} is not JSON; the "
                                "service computes it again when it next plans that day"
                                ) from None


def stored_plan_digest(conn: sqlite3.Connection, plan_date: str | _dt.date) -> str | None:
    """The configuration SHA-256 the stored plan of ``plan_date`` was computed from;
    None when there is no plan, or it was stored without one (before m007)."""
    try:
        row = conn.execute("SELECT config_sha256 FROM plans WHERE plan_date = ?",
                           (check_plan_date(plan_date),)).fetchone()
    except sqlite3.OperationalError as exc:
        if "no such column" in str(exc):
            return None
        raise
    return row[0] if row else None


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


# --------------------------------------------------------------------------- operator's view
# Readers for status, plot, report and export (daemon/commands/status.py and friends).

HOUSEKEEPING_KEYS = ("detector_temp_c", "case_temp_c", "ambient_temp_c", "supply_v",
                     "humidity_pct", "pressure_hpa")


def last_measurement(conn: sqlite3.Connection) -> dict[str, Any] | None:
    """The newest measurement of any status, with its housekeeping; None if there is none.

    Keys: ``id``, ``time_utc``, ``plan_date``, ``session``, ``target_airmass``,
    ``status``, ``failure``, ``airmass``, ``pointing_error_deg`` [deg], ``locked``
    (bool), and ``housekeeping`` (a dict of :data:`HOUSEKEEPING_KEYS` or None).
    """
    cur = conn.execute(
        "SELECT m.id, m.time_utc, m.plan_date, m.session, m.target_airmass, m.status, "
        "m.failure, m.airmass, m.pointing_error_deg, m.locked, "
        "h.measurement_id IS NOT NULL AS has_hk, h.detector_temp_c, h.case_temp_c, "
        "h.ambient_temp_c, h.supply_v, h.humidity_pct, h.pressure_hpa "
        "FROM measurements m LEFT JOIN housekeeping h ON h.measurement_id = m.id "
        "ORDER BY m.time_utc DESC, m.id DESC LIMIT 1")
    row = cur.fetchone()
    if row is None:
        return None
    r = tuple(row)
    out = dict(zip(("id", "time_utc", "plan_date", "session", "target_airmass", "status",
                    "failure", "airmass", "pointing_error_deg"), r[:9], strict=True))
    out["locked"] = None if r[9] is None else bool(r[9])
    out["housekeeping"] = dict(zip(HOUSEKEEPING_KEYS, r[11:], strict=True)) if r[10] else None
    return out


def recent_outcomes(conn: sqlite3.Connection, since_utc: str, limit: int = 10) -> list[str]:
    """Statuses ('ok' or 'failed') of the newest measurements since ``since_utc``, newest
    first."""
    cur = conn.execute("SELECT status FROM measurements WHERE time_utc >= ? "
                       "ORDER BY time_utc DESC, id DESC LIMIT ?", (since_utc, int(limit)))
    return [r[0] for r in cur.fetchall()]


def latest_housekeeping(conn: sqlite3.Connection) -> dict[str, Any] | None:
    """The newest housekeeping reading with its measurement time, or None."""
    row = conn.execute(
        "SELECT m.time_utc, h.detector_temp_c, h.case_temp_c, h.ambient_temp_c, h.supply_v, "
        "h.humidity_pct, h.pressure_hpa FROM housekeeping h "
        "JOIN measurements m ON m.id = h.measurement_id "
        "ORDER BY m.time_utc DESC, m.id DESC LIMIT 1").fetchone()
    if row is None:
        return None
    return dict(zip(("time_utc",) + HOUSEKEEPING_KEYS, tuple(row), strict=True))


def day_housekeeping(conn: sqlite3.Connection, plan_date: str | _dt.date) -> list[dict[str, Any]]:
    """Housekeeping of every measurement of one local date, in time order."""
    cur = conn.execute(
        "SELECT m.time_utc, m.session, h.detector_temp_c, h.case_temp_c, h.ambient_temp_c, "
        "h.supply_v, h.humidity_pct, h.pressure_hpa FROM housekeeping h "
        "JOIN measurements m ON m.id = h.measurement_id WHERE m.plan_date = ? "
        "ORDER BY m.time_utc, m.id", (check_plan_date(plan_date),))
    keys = ("time_utc", "session") + HOUSEKEEPING_KEYS
    return [dict(zip(keys, tuple(r), strict=True)) for r in cur.fetchall()]


def latest_event(conn: sqlite3.Connection, kind: str, since_utc: str) -> dict[str, Any] | None:
    """The newest event of ``kind`` at or after ``since_utc`` (ISO 8601 UTC text), or
    None; ``detail`` decoded from JSON. Reached through the time index, so its cost is
    that of the window, not of the store's age."""
    r = conn.execute("SELECT id, time_utc, level, kind, message, detail FROM events "
                     "WHERE time_utc >= ? AND kind = ? ORDER BY time_utc DESC, id DESC "
                     "LIMIT 1", (since_utc, kind)).fetchone()
    if r is None:
        return None
    return {"id": r[0], "time_utc": r[1], "level": r[2], "kind": r[3], "message": r[4],
            "detail": json.loads(r[5]) if r[5] else None}


def events_between(conn: sqlite3.Connection, start_utc: str, end_utc: str,
                   levels: tuple[str, ...] | None = None) -> list[dict[str, Any]]:
    """Events with ``start_utc <= time_utc < end_utc`` (ISO 8601 UTC text), oldest first.

    ``levels`` keeps only those levels (for example the faults: warning, error,
    critical). ``detail`` is decoded from JSON.
    """
    sql = ("SELECT id, time_utc, level, kind, message, detail FROM events "
           "WHERE time_utc >= ? AND time_utc < ?")
    params: list[Any] = [start_utc, end_utc]
    if levels:
        sql += f" AND level IN ({', '.join('?' * len(levels))})"
        params += list(levels)
    cur = conn.execute(sql + " ORDER BY time_utc, id", params)
    return [{"id": r[0], "time_utc": r[1], "level": r[2], "kind": r[3], "message": r[4],
             "detail": json.loads(r[5]) if r[5] else None} for r in cur.fetchall()]


def plans_from(conn: sqlite3.Connection, first_date: str | _dt.date) -> list[dict[str, Any]]:
    """Every stored plan with ``plan_date >= first_date``, oldest first (a damaged one
    raises :class:`DamagedStoreError`)."""
    cur = conn.execute("SELECT plan_date, plan_json FROM plans WHERE plan_date >= ? "
                       "ORDER BY plan_date", (check_plan_date(first_date),))
    return [decode_plan(r[1], r[0]) for r in cur.fetchall()]


def store_files_size(path: str | Path) -> int:
    """Bytes on disk of the store with its WAL and shared-memory files [bytes]."""
    p = Path(path).expanduser()
    total = 0
    for suffix in ("", "-wal", "-shm"):
        part = Path(str(p) + suffix)
        if part.is_file():
            total += part.stat().st_size
    return total


# The read-only plot and report use the same aggregates as daemon.store.writer.Store.
# session_points (SESSION_STATS_SQL below); tests/test_plot.py checks that both agree.

def sample_stats_cte(selection: str) -> str:
    """The WITH clause that aggregates raw samples of the measurements ``selection``
    picks (a SELECT of ids named ``id``): ``mean`` per measurement, kind and channel
    (AVG, COUNT) and ``spread``, the sum of squared deviations of the sun samples from
    their mean. Two passes, so a 5 V signal keeps its 1e-7 V noise.

    The selected ids drive both passes (``CROSS JOIN`` fixes SQLite's join order) and
    each reaches its samples by a search of the samples primary key, which leads with
    ``measurement_id``; grouped in that key's order (measurement, kind, channel), the
    work is the selected rows, not the store's age (``tests/test_query_plans.py``)."""
    return f"""
WITH sel AS ({selection}), mean AS (
    SELECT s.measurement_id, s.kind, s.channel, AVG(s.value_v) AS mean_v,
           COUNT(s.value_v) AS n
    FROM sel CROSS JOIN samples s ON s.measurement_id = sel.id
    GROUP BY s.measurement_id, s.kind, s.channel
), spread AS (
    SELECT s.measurement_id, s.channel,
           SUM((s.value_v - mean.mean_v) * (s.value_v - mean.mean_v)) AS ss
    FROM mean CROSS JOIN samples s ON s.measurement_id = mean.measurement_id
         AND s.kind = mean.kind AND s.channel = mean.channel
    WHERE mean.kind = 'sun'
    GROUP BY s.measurement_id, s.channel
)"""


# Per channel of each 'ok' measurement of one session: saturation, sun mean, count and
# spread, dark mean and count. Used by the writer's session fit and the read-only plot.
SESSION_STATS_SQL = sample_stats_cte(
    "SELECT id FROM measurements WHERE plan_date = ?1 AND session = ?2 AND status = 'ok'"
) + """
SELECT mc.measurement_id, mc.channel, mc.saturated, sun.mean_v, sun.n, spread.ss,
       dark.mean_v, dark.n
FROM sel CROSS JOIN measurement_channels mc ON mc.measurement_id = sel.id
LEFT JOIN mean sun ON sun.measurement_id = mc.measurement_id AND sun.channel = mc.channel
     AND sun.kind = 'sun'
LEFT JOIN mean dark ON dark.measurement_id = mc.measurement_id AND dark.channel = mc.channel
     AND dark.kind = 'dark'
LEFT JOIN spread ON spread.measurement_id = mc.measurement_id AND spread.channel = mc.channel
ORDER BY mc.measurement_id, mc.channel_index
"""


_POINTS_SQL = """
SELECT m.id, m.time_utc, m.target_airmass, m.apparent_zenith_deg, m.azimuth_deg, m.airmass,
       m.ozone_airmass, m.earth_sun_factor, m.pressure_hpa, m.pointing_error_deg, m.locked,
       m.duration_s, m.n_samples, h.measurement_id IS NOT NULL, h.detector_temp_c,
       h.case_temp_c, h.ambient_temp_c, h.supply_v, h.humidity_pct, h.pressure_hpa
FROM measurements m LEFT JOIN housekeeping h ON h.measurement_id = m.id
WHERE m.plan_date = ? AND m.session = ? AND m.status = 'ok'
ORDER BY m.time_utc, m.id
"""


def session_points(conn: sqlite3.Connection, plan_date: str | _dt.date,
                   session: str) -> list[SessionPoint]:
    """The 'ok' measurements of one session with per-channel sample aggregates.

    Means, sample standard deviations and counts come from SQL aggregates over the
    raw samples (two passes: the mean first, then squared deviations from it, which
    avoids the cancellation of the sum-of-squares formula). The service's writer and
    the read-only commands both read points through here.
    """
    # Here, not at the top: the points are frozen dataclasses, and making a dataclass
    # (and importing dataclasses, which imports inspect) costs a fresh process tens of
    # milliseconds that today, status and results do not need.
    from daemon.science.points import ChannelStats, SessionPoint
    from drivers.interfaces import Housekeeping

    date = check_plan_date(plan_date)
    if session not in SESSIONS:
        raise ValueError(f"session must be one of {', '.join(SESSIONS)}; got {session!r}")
    meas = conn.execute(_POINTS_SQL, (date, session)).fetchall()
    by_id: dict[int, dict[str, ChannelStats]] = {}
    for mid, channel, saturated, sun_mean, n_sun, sun_ss, dark_mean, n_dark in conn.execute(
            SESSION_STATS_SQL, (date, session)).fetchall():
        n_sun = int(n_sun or 0)
        sd = math.sqrt(sun_ss / (n_sun - 1)) if n_sun >= 2 and sun_ss is not None else None
        by_id.setdefault(mid, {})[channel] = ChannelStats(
            sun_mean_v=sun_mean, sun_sd_v=sd, n_sun=n_sun,
            dark_mean_v=dark_mean if n_dark else None, n_dark=int(n_dark or 0),
            saturated=bool(saturated))
    points = []
    for r in meas:
        hk = None
        if r[13]:
            hk = Housekeeping(detector_temp_c=_nan(r[14]), case_temp_c=_nan(r[15]),
                              ambient_temp_c=_nan(r[16]), supply_v=_nan(r[17]),
                              humidity_pct=_nan(r[18]), pressure_hpa=r[19])
        points.append(SessionPoint(
            measurement_id=r[0], time_utc=_dt.datetime.fromisoformat(r[1]),
            target_airmass=r[2], apparent_zenith_deg=r[3], azimuth_deg=r[4],
            airmass=r[5], ozone_airmass=r[6], earth_sun_factor=r[7], pressure_hpa=r[8],
            pointing_error_deg=r[9], locked=bool(r[10]), duration_s=r[11],
            housekeeping=hk, channels=by_id.get(r[0], {})))
    return points


def _nan(value: float | None) -> float:
    return math.nan if value is None else value


# --------------------------------------------------------------------------- fit points



def fit_points(conn: sqlite3.Connection, plan_date: str | _dt.date, session: str,
               channel: str) -> list[dict[str, Any]] | None:
    """The points of one channel's stored session fit, as the fit used them.

    Parameters
    ----------
    conn : sqlite3.Connection
        A store connection (:func:`open_readonly`).
    plan_date : str or date
        Local date of the plan, YYYY-MM-DD.
    session : str
        'am' or 'pm'.
    channel : str
        Channel name.

    Returns
    -------
    list of dict or None
        One dict per measurement of the session, in measurement order:
        ``measurement_id``, ``x`` (the regressor: air mass, or ``m^b`` for a
        water-vapour channel), ``y`` (ln V [ln(V / 1 V)] after the dark, temperature,
        ozone, pressure and, for a water-vapour channel, known-extinction
        corrections), ``role`` (one of :data:`FIT_POINT_ROLES`) and ``reason`` (the
        screening key of a 'screened' point, else None); ``x`` and ``y`` are None
        where not finite. An empty list when the session was not fitted since the
        store has the table; None when the store predates it.
    """
    if not _has_table(conn, "fit_points"):
        return None
    cur = conn.execute("SELECT measurement_id, x, y, role, reason FROM fit_points "
                       "WHERE plan_date = ? AND session = ? AND channel = ? "
                       "ORDER BY measurement_id", (check_plan_date(plan_date), session, channel))
    return [dict(zip(("measurement_id", "x", "y", "role", "reason"), tuple(r), strict=True))
            for r in cur.fetchall()]


# --------------------------------------------------------------------------- calibration, AOD

AOD_KEYS = ("time_utc", "plan_date", "session", "measurement_id", "channel", "wavelength_nm",
            "aod", "aod_unc", "tau_total", "tau_rayleigh", "tau_ozone", "airmass",
            "ozone_airmass", "pressure_hpa", "flag", "calibration_id", "angstrom_alpha",
            "angstrom_channels", "precipitable_water_cm")

_AOD_SQL = """
SELECT m.time_utc, m.plan_date, m.session, a.measurement_id, a.channel, a.wavelength_nm,
       a.aod, a.aod_unc, a.tau_total, a.tau_rayleigh, a.tau_ozone, a.airmass,
       a.ozone_airmass, a.pressure_hpa, a.flag, a.calibration_id, g.angstrom_alpha,
       g.channel_short, g.channel_long, a.precipitable_water_cm
FROM measurements m CROSS JOIN aod a ON a.measurement_id = m.id
LEFT JOIN aod_angstrom g ON g.measurement_id = a.measurement_id
WHERE m.plan_date BETWEEN ? AND ?
ORDER BY m.plan_date, m.time_utc, m.id, a.wavelength_nm, a.channel
"""
# A store from before m006 has no precipitable-water column: None there.
_AOD_SQL_BEFORE_M006 = _AOD_SQL.replace("a.precipitable_water_cm", "NULL")


def _has_table(conn: sqlite3.Connection, name: str) -> bool:
    row = conn.execute("SELECT count(*) FROM sqlite_master WHERE type = 'table' AND name = ?",
                       (name,)).fetchone()
    return bool(row[0])


def aod_between(conn: sqlite3.Connection, first: str | _dt.date,
                last: str | _dt.date) -> Iterator[dict[str, Any]]:
    """Stored aerosol optical depths of the measurements with ``first <= plan_date <= last``.

    One dict per measurement and channel, in time order (then wavelength). AOD is
    computed and stored by the service (:mod:`daemon.science.aod`) once a calibration exists:
    for every measurement of the calibration's date range when the calibration is
    stored, and for each new session after its fit. Stores written before AOD existed,
    and dates without a calibration, give nothing.

    Keys
    ----
    time_utc : str
        Burst mean time, ISO 8601 UTC.
    plan_date : str
        Local date of the plan (YYYY-MM-DD).
    session : str
        'am', 'pm' or 'routine'.
    measurement_id : int
        The measurement's row id.
    channel : str
        Channel name.
    wavelength_nm : float
        Nominal centre wavelength [nm].
    aod : float
        Aerosol optical depth [dimensionless]: total optical depth from the
        calibrated V0 minus Rayleigh (at the measured pressure) minus ozone (nominal
        column), each with its own air mass.
    aod_unc : float or None
        Standard uncertainty of ``aod`` from the calibration's V0 uncertainty alone
        (``e / m`` for a relative V0 error ``e``).
    tau_total, tau_rayleigh, tau_ozone : float or None
        Total (``ln(V0 f / V) / m``), Rayleigh and ozone vertical optical depths
        [dimensionless]; ``tau_total`` is on the Kasten-Young air mass.
    airmass, ozone_airmass : float
        Kasten-Young relative air mass and ozone (22 km layer) air mass.
    pressure_hpa : float or None
        Station pressure used for the Rayleigh part [hPa].
    flag : str or None
        Why the value is doubtful (for example a burst too variable to be clear
        sky); None for a clean value. Filter on it for cloud-screened series.
    calibration_id : int
        The calibration whose V0 was used.
    angstrom_alpha : float or None
        Angstrom exponent of this measurement, ``-ln(aod_1 / aod_2) / ln(l_1 / l_2)``
        from the pair in ``angstrom_channels``; the same on every channel's row of a
        measurement; None when either AOD is missing, flagged or not positive.
    angstrom_channels : list of str or None
        The two channel names (shorter wavelength first) behind ``angstrom_alpha``.
    precipitable_water_cm : float or None
        On a calibrated water-vapour channel's row (whose ``aod`` is None): the
        precipitable water [cm] from the modified Langley's constants and the
        calibrated V0; None on every other row.
    """
    d1, d2 = check_plan_date(first), check_plan_date(last)
    if d2 < d1:
        raise ValueError(f"the end date {d2} is before the start date {d1}; swap them")
    if not (_has_table(conn, "aod") and _has_table(conn, "aod_angstrom")):
        return
    sql = _AOD_SQL if _has_column(conn, "aod", "precipitable_water_cm") else \
        _AOD_SQL_BEFORE_M006
    cur = conn.execute(sql, (d1, d2))
    while True:
        batch = cur.fetchmany(500)
        if not batch:
            return
        for r in batch:
            r = tuple(r)
            pair = [r[17], r[18]] if r[17] is not None and r[18] is not None else None
            yield dict(zip(AOD_KEYS, r[:17] + (pair, r[19]), strict=True))


def _has_column(conn: sqlite3.Connection, table: str, column: str) -> bool:
    return any(r[1] == column for r in conn.execute(f"PRAGMA table_info({table})"))


#: A water-vapour channel's stored fit constants (m006), see water_vapour_result.
WATER_VAPOUR_KEYS = ("wv_a", "wv_b", "wv_u_a", "wv_u_b", "wv_v0_rel_unc_b",
                     "precipitable_water_cm")


def water_vapour_result(conn: sqlite3.Connection, plan_date: str | _dt.date, session: str,
                        channel: str) -> dict[str, Any] | None:
    """A water-vapour channel's modified-Langley constants stored with its session result.

    Keys: ``wv_a``, ``wv_b`` (``T = exp(-a (m W)^b)``, W in cm), their standard
    uncertainties ``wv_u_a``, ``wv_u_b``, ``wv_v0_rel_unc_b`` (b's share of the relative
    V0 uncertainty) and the session's ``precipitable_water_cm``; None for a channel
    without them (a window channel, a channel not fitted, a store before m006).
    """
    if not _has_column(conn, "session_results", "wv_b"):
        return None
    row = conn.execute(f"SELECT {', '.join(WATER_VAPOUR_KEYS)} FROM session_results WHERE "
                       f"plan_date = ? AND session = ? AND channel = ?",
                       (check_plan_date(plan_date), session, channel)).fetchone()
    if row is None or row[1] is None:
        return None
    return dict(zip(WATER_VAPOUR_KEYS, tuple(row), strict=True))


def shared_uncertainties(conn: sqlite3.Connection, first: str | _dt.date,
                         last: str | _dt.date) -> dict[tuple[str, str, str], float]:
    """The stored shared part of each session result's V0 uncertainty (m009), by
    (date, session, channel), for plan dates ``first`` to ``last``; rows without one
    (older rows, channels not fitted) are left out, as is everything in a store
    before m009."""
    if not _has_column(conn, "session_results", "v0_shared_rel_unc"):
        return {}
    rows = conn.execute(
        "SELECT plan_date, session, channel, v0_shared_rel_unc FROM session_results "
        "WHERE plan_date BETWEEN ? AND ? AND v0_shared_rel_unc IS NOT NULL",
        (check_plan_date(first), check_plan_date(last)))
    return {(d, s, c): u for d, s, c, u in rows}


def _calibration_row(conn: sqlite3.Connection, cal: Mapping[str, Any]) -> dict[str, Any]:
    cur = conn.execute(
        "SELECT channel, wavelength_nm, v0_1au, v0_1au_unc, repeatability_pct, n_sessions, "
        "n_flagged, drift_pct_per_year, drift_unc_pct_per_year, e0_1au_w_m2_nm, astm_ratio, "
        "usable, sessions, reasons FROM calibration_channels WHERE calibration_id = ? "
        "ORDER BY wavelength_nm, channel", (cal["id"],))
    names = [d[0] for d in cur.description]
    channels = []
    for r in cur.fetchall():
        row = dict(zip(names, tuple(r), strict=True))
        row["usable"] = bool(row["usable"])
        row["sessions"] = json.loads(row["sessions"]) if row["sessions"] else []
        row["reasons"] = json.loads(row["reasons"]) if row["reasons"] else []
        channels.append(row)
    return {"id": cal["id"], "created_utc": cal["created_utc"], "from": cal["first_date"],
            "to": cal["last_date"], "site_name": cal["site_name"],
            "settings": json.loads(cal["settings"]) if cal["settings"] else {},
            "notes": json.loads(cal["notes"]) if cal["notes"] else [], "channels": channels}


def stored_calibration(conn: sqlite3.Connection,
                       calibration_id: int | None = None) -> dict[str, Any] | None:
    """One stored calibration record (the newest when ``calibration_id`` is None).

    Returns None when there is none. Keys: ``id``, ``created_utc``, ``from``, ``to``
    (campaign dates), ``site_name``, ``settings``, ``notes`` and ``channels``, a list
    of per-channel dicts (``channel``, ``wavelength_nm``, ``v0_1au`` [V],
    ``v0_1au_unc`` [V], ``repeatability_pct``, ``n_sessions``, ``n_flagged``,
    ``drift_pct_per_year``, ``drift_unc_pct_per_year``, ``e0_1au_w_m2_nm``,
    ``astm_ratio``, ``usable``, ``sessions``, ``reasons``); see :mod:`daemon.science.campaign`.
    """
    if not _has_table(conn, "calibrations"):
        return None
    cols = "id, created_utc, first_date, last_date, site_name, settings, notes"
    if calibration_id is None:
        cur = conn.execute(f"SELECT {cols} FROM calibrations ORDER BY id DESC LIMIT 1")
    else:
        cur = conn.execute(f"SELECT {cols} FROM calibrations WHERE id = ?", (int(calibration_id),))
    row = cur.fetchone()
    if row is None:
        return None
    names = [d[0] for d in cur.description]
    return _calibration_row(conn, dict(zip(names, tuple(row), strict=True)))


def software_version() -> str:
    """The installed heliotrope version.

    Read from the distribution's METADATA file on ``sys.path``: importing
    ``importlib.metadata`` costs about 50 ms, a third of the read commands' budget.
    """
    for entry in sys.path:
        try:
            base = Path(entry or ".")
            found = sorted(base.glob("heliotrope-*.dist-info"))
        except OSError:
            continue
        for info in found:
            try:
                with (info / "METADATA").open(encoding="utf-8") as fh:
                    for line in fh:
                        if line.startswith("Version:"):
                            return line.split(":", 1)[1].strip()
                        if not line.strip():
                            break
            except OSError:
                continue
    from importlib import metadata
    try:
        return metadata.version("heliotrope")
    except metadata.PackageNotFoundError:
        return "unknown (not installed)"


# --------------------------------------------------------------------------- provenance

_CONFIG_COLUMNS = ("id, sha256, text, source, software_version, origin, first_used_utc, "
                   "last_used_utc")


def _configuration(cur: sqlite3.Cursor) -> dict[str, Any] | None:
    row = cur.fetchone()
    if row is None:
        return None
    return dict(zip([d[0] for d in cur.description], tuple(row), strict=True))


def stored_configuration(conn: sqlite3.Connection,
                         configuration_id: int | None = None) -> dict[str, Any] | None:
    """A recorded configuration: the one the store's last run used (newest
    ``last_used_utc``) when ``configuration_id`` is None; None when there is none.

    Keys: ``id``, ``sha256`` (of ``text``), ``text`` (the YAML as the run read it),
    ``source`` (its path then), ``software_version``, ``origin`` ('service' or 'bench'
    for a store the simulator filled), ``first_used_utc``, ``last_used_utc``, and, in
    a store of schema m008 or later, ``data_json`` (the text's parsed data as JSON, or
    None where JSON cannot hold it exactly).
    """
    if not _has_table(conn, "configurations"):
        return None
    columns = _CONFIG_COLUMNS
    if _has_column(conn, "configurations", "data_json"):
        columns += ", data_json"
    if configuration_id is None:
        cur = conn.execute(f"SELECT {columns} FROM configurations "
                           "ORDER BY last_used_utc DESC, id DESC LIMIT 1")
    else:
        cur = conn.execute(f"SELECT {columns} FROM configurations WHERE id = ?",
                           (int(configuration_id),))
    return _configuration(cur)


def result_configurations(conn: sqlite3.Connection, first: str | _dt.date,
                          last: str | _dt.date) -> dict[tuple[str, str, str], int | None]:
    """``(date, session, channel) -> configuration id`` of the stored session results
    from ``first`` to ``last`` (None for results stored before provenance existed)."""
    d1, d2 = check_plan_date(first), check_plan_date(last)
    if not _has_table(conn, "configurations"):
        return {}
    cur = conn.execute("SELECT plan_date, session, channel, configuration_id FROM "
                       "session_results WHERE plan_date BETWEEN ? AND ?", (d1, d2))
    return {(d, s, c): cid for d, s, c, cid in cur.fetchall()}


def configurations_by_id(conn: sqlite3.Connection,
                         ids: set[int]) -> dict[int, dict[str, Any]]:
    """The recorded configurations with these ids, without their text."""
    out = {}
    for cid in sorted(ids):
        cfg = stored_configuration(conn, cid)
        if cfg is not None:
            out[cid] = {k: v for k, v in cfg.items() if k not in ("text", "data_json")}
    return out


def configuration_origins(conn: sqlite3.Connection) -> set[str]:
    """Who recorded configurations in this store ('service', 'bench', 'operator')."""
    if not _has_table(conn, "configurations"):
        return set()
    return {r[0] for r in conn.execute("SELECT DISTINCT origin FROM configurations")}


def targets_measured(conn: sqlite3.Connection, plan_date: str | _dt.date,
                     until_utc: str) -> int:
    """How many air-mass targets ('am' and 'pm') of one plan date were measured 'ok' by
    ``until_utc`` (ISO 8601 UTC)."""
    row = conn.execute("SELECT count(*) FROM measurements WHERE plan_date = ? AND status = "
                       "'ok' AND session IN ('am', 'pm') AND time_utc <= ?",
                       (check_plan_date(plan_date), until_utc)).fetchone()
    return int(row[0])
