"""Every per-date and per-session query reaches its rows through an index.

A store grows for years; a query that scans samples, measurements or fit_points costs
time in proportion to the store's age, not to the work asked for. SQLite's
``EXPLAIN QUERY PLAN`` (https://www.sqlite.org/eqp.html) says how each table is
reached: ``SEARCH t USING INDEX ...`` walks an index range, ``SCAN t`` reads the whole
table or index. Without ``ANALYZE`` statistics the planner's choice does not depend on
the row counts, so a small store built through the writer shows the plan of a big one.

Small tables may be scanned: ``meta`` (a few keys), ``plans`` (one row a day,
read by primary key anyway), and the CTE results ``sel``/``mean``/``spread`` (the rows
of the one session or date range already selected). Only the three big tables are
refused.
"""

from __future__ import annotations

import re
import sqlite3
from pathlib import Path

import pytest

from daemon.commands import export as export_cmd
from daemon.store import reader
from tests.synthetic_store import DAY, build_day

BIG_TABLES = ("samples", "measurements", "fit_points", "aod", "measurement_channels")
# A SCAN of one of these reads the whole table whatever the query asks for (SQLite's
# EXPLAIN QUERY PLAN wording, https://www.sqlite.org/eqp.html).
_SCAN_RE = re.compile(r"\bSCAN (\w+)")


@pytest.fixture(scope="module")
def store(tmp_path_factory) -> sqlite3.Connection:
    path: Path = tmp_path_factory.mktemp("plans") / "heliotrope.db"
    build_day(path)
    conn = reader.open_readonly(path)
    yield conn
    conn.close()


def _plan(conn: sqlite3.Connection, sql: str, params: tuple) -> list[str]:
    return [row[3] for row in conn.execute("EXPLAIN QUERY PLAN " + sql, params).fetchall()]


def _aliases(sql: str) -> dict[str, str]:
    """Alias -> table for ``FROM/JOIN table alias`` in ``sql``."""
    out = {t: t for t in BIG_TABLES}
    for table, alias in re.findall(r"(?:FROM|JOIN)\s+(\w+)\s+(\w+)", sql):
        if alias.upper() not in ("ON", "WHERE", "JOIN", "LEFT", "ORDER", "GROUP", "USING"):
            out[alias] = table
    return out


def _big_scans(conn: sqlite3.Connection, sql: str, params: tuple) -> list[str]:
    names = _aliases(sql)
    return [line for line in _plan(conn, sql, params)
            for m in _SCAN_RE.finditer(line) if names.get(m.group(1)) in BIG_TABLES]


D = DAY.isoformat()
QUERIES = {
    "session points (measurements of a session)": (reader._POINTS_SQL, (D, "am")),
    "session stats (sample aggregate)": (reader.SESSION_STATS_SQL, (D, "am")),
    "day measurements": (
        "SELECT id, time_utc, session, target_airmass, status, failure, airmass, "
        "pointing_error_deg, locked, n_samples FROM measurements WHERE plan_date = ? "
        "ORDER BY time_utc, id", (D,)),
    "day housekeeping": (
        "SELECT m.time_utc, h.detector_temp_c FROM housekeeping h "
        "JOIN measurements m ON m.id = h.measurement_id WHERE m.plan_date = ? "
        "ORDER BY m.time_utc, m.id", (D,)),
    "results between dates": (
        f"SELECT {reader._RESULT_COLUMNS} FROM session_results "
        f"WHERE plan_date BETWEEN ? AND ? {reader._RESULT_ORDER}", (D, D)),
    "fit points of a channel": (
        "SELECT measurement_id, x, y, role, reason FROM fit_points "
        "WHERE plan_date = ? AND session = ? AND channel = ? ORDER BY measurement_id",
        (D, "am", "500")),
    "replace fit points (writer)": (
        "DELETE FROM fit_points WHERE plan_date = ? AND session = ? AND channel = ?",
        (D, "am", "500")),
    "aod between dates": (reader._AOD_SQL, (D, D)),
    "samples export (measurements)": (export_cmd._SAMPLE_MEASUREMENTS_SQL, (D, D)),
    "samples export (one measurement's samples)": (export_cmd._MEASUREMENT_SAMPLES_SQL, (1,)),
    "samples export (one measurement's channel rows)": (
        export_cmd._MEASUREMENT_CHANNELS_SQL, (1,)),
    "samples export (one measurement's samples, sorted)": (
        export_cmd._MEASUREMENT_SAMPLES_SORTED_SQL, (1,)),
    "measurements export": (export_cmd._MEASUREMENTS_SQL, (D, D)),
    "last measurement (status)": (
        "SELECT status FROM measurements WHERE time_utc >= ? "
        "ORDER BY time_utc DESC, id DESC LIMIT 10", ("2027-02-15T00:00:00+00:00",)),
}


@pytest.mark.parametrize("name", sorted(QUERIES))
def test_query_reaches_its_rows_through_an_index(store, name):
    sql, params = QUERIES[name]
    scans = _big_scans(store, sql, params)
    assert not scans, (f"{name}: full scan of a table that grows with the store's age: "
                       f"{scans}; plan: {_plan(store, sql, params)}")


def test_samples_export_streams_in_index_order(store):
    # No sort at all: the measurements come off their index at once, with no temporary
    # B-tree (which SQLite spills to temporary files when it outgrows the cache), and
    # each measurement's samples off the samples primary key in its own order.
    plan = _plan(store, export_cmd._SAMPLE_MEASUREMENTS_SQL, (D, D))
    assert not [line for line in plan if "TEMP B-TREE" in line], plan
    for sql in (export_cmd._MEASUREMENT_SAMPLES_SQL, export_cmd._MEASUREMENT_CHANNELS_SQL):
        plan = _plan(store, sql, (1,))
        assert not [line for line in plan if "TEMP B-TREE" in line], plan
        assert any(line.startswith("SEARCH") and "(measurement_id=?)" in line
                   for line in plan), plan


def test_aod_between_sorts_only_within_a_measurement(store):
    # "RIGHT PART OF ORDER BY" sorts the rows of one measurement (its channels) as
    # they come; a plain "FOR ORDER BY" would sort the whole range first.
    plan = _plan(store, reader._AOD_SQL, (D, D))
    assert "USE TEMP B-TREE FOR ORDER BY" not in plan, plan


def test_samples_export_order_is_time_then_sun_before_dark(store):
    # The index-order rewrite must keep the documented order: time, sun before
    # dark, channel order, sample index (export.py's module docstring).
    rows = list(export_cmd.sample_rows(store, D, D))
    assert rows, "the synthetic day has samples"
    channel_index = {(r[0], r[1]): r[2] for r in store.execute(
        "SELECT measurement_id, channel, channel_index FROM measurement_channels")}
    keys = [(r["time_utc"], r["measurement_id"], r["kind"] != "sun",
             channel_index[(r["measurement_id"], r["channel"])], r["sample_index"])
            for r in rows]
    assert keys == sorted(keys)
    n = store.execute("SELECT count(*) FROM samples s JOIN measurements m "
                      "ON m.id = s.measurement_id WHERE m.plan_date = ?", (D,)).fetchone()[0]
    assert len(rows) == n


def test_the_check_sees_a_scan():
    # The test above must be able to fail: a query without a usable index is caught.
    conn = sqlite3.connect(":memory:")
    conn.execute("CREATE TABLE samples (measurement_id INTEGER, value_v REAL)")
    assert _big_scans(conn, "SELECT value_v FROM samples s WHERE s.value_v > ?", (0.0,))
